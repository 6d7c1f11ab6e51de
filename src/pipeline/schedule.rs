//! When each block of a night's RF grid can be finished: once the last step touching it, in
//! file order, has been combined. Known before any spectrum is read, from the steps' start
//! frequencies.

use crate::runfile::RunReader;
use crate::stage::{BLOCK_BINS, NightInfo};

/// The last step (global index, file order) touching each block of the grid.
#[derive(Debug, Clone)]
pub(super) struct Schedule {
    last_step: Vec<Option<usize>>,
}

impl Schedule {
    /// The schedule of a grid of `grid_bins` bins starting at the night's lowest start
    /// frequency. A step off the bin grid is placed at its nearest bin here; the combination
    /// refuses it with a message when it gets there.
    pub fn new(readers: &[RunReader], night: &NightInfo, grid_bins: usize) -> Self {
        let mut last_step = vec![None; grid_bins.div_ceil(BLOCK_BINS)];
        let steps = readers.iter().flat_map(|r| r.steps());
        for (index, step) in steps.enumerate() {
            let first = ((step.start_freq_hz - night.rf_span_hz.0) / night.bin_width_hz).round().max(0.0) as usize;
            let last = (first + night.n_bins).min(grid_bins).saturating_sub(1);
            for block in last_step.iter_mut().take(last / BLOCK_BINS + 1).skip(first / BLOCK_BINS) {
                *block = Some(index);
            }
        }
        Self { last_step }
    }

    /// Blocks of the grid.
    pub fn blocks(&self) -> usize {
        self.last_step.len()
    }

    /// Whether `block` can be finished once the steps up to global index `through` have
    /// been combined.
    pub fn ready(&self, block: usize, through: usize) -> bool {
        self.last_step[block].is_none_or(|last| last <= through)
    }
}
