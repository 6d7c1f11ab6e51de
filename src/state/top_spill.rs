//! A night's most significant single-step samples, set aside in a temporary file block by
//! block while the night streams through (which of them are IF-line samples is known only
//! once the night's IF profile is complete), and read back block by block afterwards.
//!
//! The file (12 bytes per RF bin: z and 1 / sigma as f32, the IF bin as u32, little-endian)
//! has no name: the system removes it when it is closed, however the run ends.

use super::interference::TopSamples;
use super::store::StateError;
use std::fs::File;
use std::io::{BufReader, BufWriter, Read, Seek, Write};

/// The samples of the blocks of a night's grid, in the order they were finished.
pub(super) struct TopSpill {
    file: BufWriter<File>,
    /// Block index and number of bins of each block written.
    blocks: Vec<(usize, usize)>,
}

fn io(e: impl std::fmt::Display) -> StateError {
    StateError::Io { path: std::env::temp_dir(), message: format!("the temporary file of the night's top samples: {e}") }
}

impl TopSpill {
    /// An empty spill in the system's temporary folder.
    pub fn new() -> Result<Self, StateError> {
        Ok(Self { file: BufWriter::with_capacity(1 << 20, tempfile::tempfile().map_err(io)?), blocks: Vec::new() })
    }

    /// Sets aside block `block`'s samples (None: no step touched it).
    pub fn push(&mut self, block: usize, top: Option<&TopSamples>) -> Result<(), StateError> {
        let Some(top) = top else { return Ok(()) };
        let mut buffer = Vec::with_capacity(12 * top.z.len());
        buffer.extend(top.z.iter().flat_map(|x| x.to_le_bytes()));
        buffer.extend(top.inverse_sigma.iter().flat_map(|x| x.to_le_bytes()));
        buffer.extend(top.if_bin.iter().flat_map(|x| x.to_le_bytes()));
        self.file.write_all(&buffer).map_err(io)?;
        self.blocks.push((block, top.z.len()));
        Ok(())
    }

    /// Calls `each` with every block's index and samples, in the order they were set aside.
    pub fn read_back(self, mut each: impl FnMut(usize, TopSamples) -> Result<(), StateError>) -> Result<(), StateError> {
        let mut file = self.file.into_inner().map_err(io)?;
        file.rewind().map_err(io)?;
        let mut reader = BufReader::with_capacity(1 << 20, file);
        let mut buffer = Vec::new();
        for (block, n) in self.blocks {
            buffer.resize(12 * n, 0);
            reader.read_exact(&mut buffer).map_err(io)?;
            let word = |i: usize| [buffer[4 * i], buffer[4 * i + 1], buffer[4 * i + 2], buffer[4 * i + 3]];
            let top = TopSamples {
                z: (0..n).map(|i| f32::from_le_bytes(word(i))).collect(),
                inverse_sigma: (n..2 * n).map(|i| f32::from_le_bytes(word(i))).collect(),
                if_bin: (2 * n..3 * n).map(|i| u32::from_le_bytes(word(i))).collect(),
            };
            each(block, top)?;
        }
        Ok(())
    }
}
