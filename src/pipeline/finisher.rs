//! Finishes a night's RF grid block by block, in grid order: takes each block's combined
//! values out of the combination as soon as the schedule allows, runs the spectrum stages on
//! it (with the combined bins of the next block they read past its end) and hands it on.
//!
//! Blocks leave in grid order, so a block whose steps are all combined waits for the blocks
//! below it: with steps that move up the grid (the usual scan) that is no wait, and the open
//! blocks are the few the current steps touch; with steps in another order the blocks wait,
//! held as combined values, until those below them are done (at worst the whole grid, as an
//! in-memory reduction holds it). The results are the same either way.

use super::schedule::Schedule;
use crate::runfile::StepMeta;
use crate::stage::{BLOCK_BINS, Block, Combiner, NightInfo, SpectrumStage};
use std::collections::VecDeque;

/// A block's combined values taken out of the combination.
#[derive(Debug, Default)]
struct Combined {
    block: usize,
    combined: Vec<f64>,
    sigma: Vec<f64>,
    coverage: Vec<u32>,
}

/// The blocks between the combination and the output.
pub(super) struct Finisher<'a> {
    schedule: Schedule,
    stages: &'a [Box<dyn SpectrumStage>],
    lookahead: usize,
    /// Blocks taken out of the combination so far.
    taken: usize,
    /// Taken, not yet through the stages, in grid order.
    waiting: VecDeque<Combined>,
    /// Buffers of blocks done, for reuse.
    spare: Vec<Combined>,
    /// The block worked on, its buffers reused.
    block: Block,
}

impl<'a> Finisher<'a> {
    /// A finisher for the grid of `combiner`, with the night's `schedule`.
    pub fn new(schedule: Schedule, stages: &'a [Box<dyn SpectrumStage>], combiner: &dyn Combiner, night: &NightInfo) -> Result<Self, String> {
        let lookahead = stages.iter().map(|s| s.lookahead_bins()).max().unwrap_or(0);
        if lookahead > BLOCK_BINS {
            return Err(format!("the spectrum stages read {lookahead} bins ahead, more than one block of {BLOCK_BINS}"));
        }
        let block = Block {
            origin_hz: night.rf_span_hz.0,
            bin_width_hz: night.bin_width_hz,
            step_span_hz: (night.n_bins - 1) as f64 * night.bin_width_hz,
            grid_bins: combiner.grid_bins(),
            ..Block::default()
        };
        Ok(Self { schedule, stages, lookahead, taken: 0, waiting: VecDeque::new(), spare: Vec::new(), block })
    }

    /// After the steps up to global index `through` were combined: finishes every block
    /// that can be, in grid order, and calls `out` with each (the steps used so far in
    /// `steps`). Returns whether the whole grid is done.
    pub fn advance(
        &mut self,
        combiner: &mut dyn Combiner,
        through: usize,
        steps: &[(usize, StepMeta)],
        out: &mut dyn FnMut(&Block) -> Result<(), String>,
    ) -> Result<bool, String> {
        let blocks = self.schedule.blocks();
        while self.taken < blocks && self.schedule.ready(self.taken, through) {
            let mut c = self.spare.pop().unwrap_or_default();
            c.block = self.taken;
            c.combined.clear();
            c.sigma.clear();
            c.coverage.clear();
            combiner.finish_block(self.taken, &mut c.combined, &mut c.sigma, Some(&mut c.coverage));
            self.waiting.push_back(c);
            self.taken += 1;
        }
        while let Some(front) = self.waiting.front() {
            let wants_next = front.block + 1 < blocks && self.lookahead > 0;
            if wants_next && self.waiting.len() < 2 {
                break;
            }
            let Some(mut front) = self.waiting.pop_front() else { break };
            let next = wants_next.then(|| &self.waiting[0]);
            let b = &mut self.block;
            (b.first_bin, b.len) = (front.block * BLOCK_BINS, front.combined.len());
            // The block takes the combined buffers; its previous ones go back as spares.
            std::mem::swap(&mut b.combined, &mut front.combined);
            std::mem::swap(&mut b.combined_sigma, &mut front.sigma);
            std::mem::swap(&mut b.coverage, &mut front.coverage);
            if let Some(next) = next {
                let reach = self.lookahead.min(next.combined.len());
                b.combined.extend_from_slice(&next.combined[..reach]);
                b.combined_sigma.extend_from_slice(&next.sigma[..reach]);
            }
            b.candidates.clear();
            for stage in self.stages {
                stage.apply_block(b, steps)?;
            }
            out(b)?;
            self.spare.push(front);
        }
        Ok(self.taken == blocks && self.waiting.is_empty())
    }

    /// The stage facts of the last block worked on (threshold, halo mean squared speed).
    pub fn last_block(&self) -> &Block {
        &self.block
    }
}
