//! Adding a night to the state's sums: where its grid lies on the state's, its combined
//! spectrum block by block in grid order, then the IF-line samples of its IF profile.
//!
//! Each state block is read once, added to while the night's blocks that overlap it go by,
//! and put back ([`State::put_block`]) as soon as no later night block can touch it, so
//! memory holds the two or three state blocks the current night block overlaps.

use super::State;
use super::store::StateError;
use super::sums::Sums;
use std::collections::BTreeMap;
use std::ops::Range;

fn refused(msg: String) -> StateError {
    StateError::Refused(msg)
}

/// Places a night's grid (bin 0 at `rf_start_hz`, `n_bins` bins of `bin_width_hz`, its run
/// files' `bin_correlation`) on the state's, which the first night defines; checks that the
/// bin width and the correlation agree and that the grids align, and extends the state's
/// grid over it. Returns the grid bins the night spans.
pub(super) fn place(state: &mut State, rf_start_hz: f64, bin_width_hz: f64, bin_correlation: &[f64], n_bins: usize) -> Result<Range<i64>, StateError> {
    if state.grid_bins.is_none() {
        state.bin_width_hz = bin_width_hz;
        state.rf_origin_hz = rf_start_hz;
        state.bin_correlation = bin_correlation.to_vec();
    }
    if bin_width_hz != state.bin_width_hz {
        return Err(refused(format!("bin width {bin_width_hz} Hz differs from the state's {} Hz", state.bin_width_hz)));
    }
    if bin_correlation != state.bin_correlation {
        return Err(refused(format!(
            "field `bin_correlation` of the night's run files, {bin_correlation:?}, differs from the state's {:?}: the nights of one state must come from the same spectrum estimator (window and overlap)",
            state.bin_correlation
        )));
    }
    let offset = (rf_start_hz - state.rf_origin_hz) / state.bin_width_hz;
    let whole = offset.round();
    if (offset - whole).abs() > 1e-3 {
        return Err(refused(format!("the night's RF grid lies {:.4} bins off the state's grid (origin {} Hz)", offset - whole, state.rf_origin_hz)));
    }
    let first = whole as i64;
    let bins = first..first + n_bins as i64;
    state.grid_bins = Some(match state.grid_bins {
        Some((a, b)) => (a.min(bins.start), b.max(bins.end)),
        None => (bins.start, bins.end),
    });
    Ok(bins)
}

/// Which bins of a night's grid its data reached (one bit per bin).
#[derive(Debug, Clone, Default)]
pub(super) struct NightCoverage {
    words: Vec<u64>,
}

impl NightCoverage {
    fn set(&mut self, k: usize) {
        if self.words.len() <= k / 64 {
            self.words.resize(k / 64 + 1, 0);
        }
        self.words[k / 64] |= 1 << (k % 64);
    }

    /// Whether night bin `k` holds data.
    pub fn get(&self, k: usize) -> bool {
        self.words.get(k / 64).is_some_and(|w| w & (1 << (k % 64)) != 0)
    }
}

/// A night's combined spectrum on its way into the state's sums, in grid order.
pub(super) struct SumsMerger {
    /// Grid bin of the night's bin 0.
    first_bin: i64,
    /// State blocks being added to.
    open: BTreeMap<i64, Sums>,
    coverage: NightCoverage,
}

impl SumsMerger {
    /// A merger for a night spanning grid bins `night_bins`.
    pub fn new(night_bins: &Range<i64>) -> Self {
        Self { first_bin: night_bins.start, open: BTreeMap::new(), coverage: NightCoverage::default() }
    }

    /// Adds night bins `first ..` (combined values, their sigma and step counts; bins without
    /// data are skipped), in grid order: each call's bins follow the previous call's. The
    /// state blocks that end within these bins are put back.
    pub fn add(&mut self, st: &mut State, first: usize, combined: &[f64], sigma: &[f64], coverage: &[u32]) -> Result<(), StateError> {
        let bins = self.first_bin + first as i64..self.first_bin + (first + combined.len()) as i64;
        if bins.is_empty() {
            return Ok(());
        }
        for index in st.block_of(bins.start)..=st.block_of(bins.end - 1) {
            if let std::collections::btree_map::Entry::Vacant(slot) = self.open.entry(index) {
                slot.insert(st.block(index)?);
            }
        }
        for (&index, sums) in self.open.range_mut(st.block_of(bins.start)..=st.block_of(bins.end - 1)) {
            // The night's bins in this block: k0..k1 of these, j0.. of the block.
            let block = st.block_range(index);
            let (lo, hi) = (bins.start.max(block.start), bins.end.min(block.end));
            let (k0, k1, j0) = ((lo - bins.start) as usize, (hi - bins.start) as usize, (lo - sums.first_bin) as usize);
            for (i, k) in (k0..k1).enumerate() {
                let (c, s) = (combined[k], sigma[k]);
                if c.is_finite() && s.is_finite() && s > 0.0 {
                    let j = j0 + i;
                    let w = 1.0 / (s * s);
                    sums.weight[j] += w;
                    sums.weighted_sum[j] += w * c;
                    sums.coverage[j] += coverage[k];
                    self.coverage.set(first + k);
                }
            }
        }
        // Blocks ending within these bins: no later night bin falls in them.
        let done: Vec<i64> = self.open.keys().copied().filter(|&i| st.block_range(i).end <= bins.end).collect();
        for index in done {
            let sums = self.open.remove(&index).expect("listed above");
            st.put_block(index, sums)?;
        }
        Ok(())
    }

    /// Puts back the blocks still open; returns which night bins held data.
    pub fn finish(mut self, st: &mut State) -> Result<NightCoverage, StateError> {
        for (index, sums) in std::mem::take(&mut self.open) {
            st.put_block(index, sums)?;
        }
        Ok(self.coverage)
    }
}

/// Adds IF-line samples to the sums: `samples` as (night bin, weight 1 / sigma^2, weight
/// times value, IF bin), in increasing night bin, of the night `night` whose grid starts at
/// grid bin `first_bin`, with that night's IF-profile significance per IF bin. Each sum
/// records the sample's night, IF bin and significance as the latest.
pub(super) fn add_line_samples(
    st: &mut State,
    first_bin: i64,
    samples: impl IntoIterator<Item = (usize, f64, f64, i32)>,
    night: usize,
    if_profile_sigma: &[f64],
) -> Result<(), StateError> {
    let mut open: Option<(i64, Sums)> = None;
    for (k, w, ws, if_bin) in samples.into_iter().filter(|s| s.1 > 0.0) {
        let bin = first_bin + k as i64;
        let index = st.block_of(bin);
        if open.as_ref().is_none_or(|(i, _)| *i != index) {
            if let Some((i, sums)) = open.take() {
                st.put_block(i, sums)?;
            }
            open = Some((index, st.block(index)?));
        }
        let (_, sums) = open.as_mut().expect("opened above");
        let j = (bin - sums.first_bin) as usize;
        sums.line_weight[j] += w;
        sums.line_weighted_sum[j] += ws;
        sums.line_steps[j] += 1;
        sums.line_night[j] = night as i32;
        sums.line_if_bin[j] = if_bin;
        sums.line_if_profile_sigma[j] = usize::try_from(if_bin).ok().and_then(|i| if_profile_sigma.get(i)).copied().unwrap_or(f64::NAN);
    }
    if let Some((i, sums)) = open {
        st.put_block(i, sums)?;
    }
    Ok(())
}
