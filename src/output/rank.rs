//! Exact rank selection over more values than memory should hold: the values are written to
//! a temporary file as they go by, then selected by radix over their ordering keys.
//!
//! Key: the IEEE-754 bits of a value mapped to a u64 whose unsigned order is the order of
//! `f64::total_cmp` (sign bit flipped for positive values, all bits flipped for negative
//! ones). Selection: a histogram of the keys' top 16 bits (made while the values are
//! written) gives the bucket holding the wanted rank; each further pass over the file
//! narrows the prefix by 16 bits, counting only keys with the prefix found, until the
//! bucket holds at most [`GATHER_VALUES`] values, which are gathered and selected in memory
//! (or all 64 bits are fixed). The value found is the one a full sort by `total_cmp` puts
//! at that rank, bit for bit. Memory: a histogram of 65 536 counts and at most
//! [`GATHER_VALUES`] values; reads of the file: at most three.

use std::fs::File;
use std::io::{BufReader, BufWriter, Read, Write};
use std::path::{Path, PathBuf};

/// Largest bucket gathered into memory for the final selection (8 MB of values).
const GATHER_VALUES: u64 = 1 << 20;
/// Bits of the key each pass resolves.
const DIGIT_BITS: u32 = 16;
/// Values read at a time.
const READ_VALUES: usize = 1 << 17;

/// The ordering key of `v`: unsigned order equals `f64::total_cmp` order.
fn key(v: f64) -> u64 {
    let bits = v.to_bits();
    if bits >> 63 == 1 { !bits } else { bits | (1 << 63) }
}

/// The value of key `k` (inverse of [`key`]).
fn value(k: u64) -> f64 {
    f64::from_bits(if k >> 63 == 1 { k & !(1 << 63) } else { !k })
}

/// Values written to a temporary file, for exact selection by rank. The file is removed when
/// this is dropped.
pub struct SpilledValues {
    path: PathBuf,
    writer: Option<BufWriter<File>>,
    n: u64,
    /// Counts of the keys' top [`DIGIT_BITS`] bits.
    top: Vec<u64>,
}

impl SpilledValues {
    /// Values to be spilled into the new file `path`.
    pub fn create(path: &Path) -> std::io::Result<Self> {
        let writer = BufWriter::with_capacity(1 << 20, File::create(path)?);
        Ok(Self { path: path.to_path_buf(), writer: Some(writer), n: 0, top: vec![0; 1 << DIGIT_BITS] })
    }

    /// Appends `v`.
    pub fn push(&mut self, v: f64) -> std::io::Result<()> {
        let writer = self.writer.as_mut().ok_or_else(|| std::io::Error::other("values pushed after a selection"))?;
        writer.write_all(&v.to_le_bytes())?;
        self.top[(key(v) >> (64 - DIGIT_BITS)) as usize] += 1;
        self.n += 1;
        Ok(())
    }

    /// Number of values pushed.
    pub fn count(&self) -> u64 {
        self.n
    }

    /// The value of 0-based rank `rank` in ascending `total_cmp` order (None if `rank` is out
    /// of range). No value may be pushed afterwards.
    pub fn select(&mut self, rank: u64) -> std::io::Result<Option<f64>> {
        if rank >= self.n {
            return Ok(None);
        }
        if let Some(mut w) = self.writer.take() {
            w.flush()?;
        }
        // Keys k with k >> shift == prefix hold the wanted rank, at `rank` among them.
        let (mut prefix, mut rank) = (0u64, rank);
        let mut shift = 64 - DIGIT_BITS;
        let mut counts = self.top.clone();
        loop {
            let (digit, below) = bucket_of(&counts, rank);
            prefix = (prefix << DIGIT_BITS) | digit as u64;
            rank -= below;
            let in_bucket = counts[digit];
            if shift == 0 {
                return Ok(Some(value(prefix)));
            }
            if in_bucket <= GATHER_VALUES {
                let mut gathered = Vec::with_capacity(in_bucket as usize);
                self.scan(|k| {
                    if k >> shift == prefix {
                        gathered.push(k);
                    }
                })?;
                let (_, k, _) = gathered.select_nth_unstable(rank as usize);
                return Ok(Some(value(*k)));
            }
            shift -= DIGIT_BITS;
            counts.iter_mut().for_each(|c| *c = 0);
            self.scan(|k| {
                if k >> (shift + DIGIT_BITS) == prefix {
                    counts[((k >> shift) & ((1 << DIGIT_BITS) - 1)) as usize] += 1;
                }
            })?;
        }
    }

    /// Calls `each` with the key of every value, in file order.
    fn scan(&self, mut each: impl FnMut(u64)) -> std::io::Result<()> {
        let mut reader = BufReader::with_capacity(1 << 20, File::open(&self.path)?);
        let mut buffer = vec![0u8; READ_VALUES * 8];
        let mut left = self.n as usize;
        while left > 0 {
            let take = left.min(READ_VALUES);
            reader.read_exact(&mut buffer[..take * 8])?;
            for bytes in buffer[..take * 8].chunks_exact(8) {
                each(key(f64::from_le_bytes(bytes.try_into().unwrap_or_default())));
            }
            left -= take;
        }
        Ok(())
    }
}

/// The bucket of `counts` holding 0-based rank `rank`, and the count below it.
fn bucket_of(counts: &[u64], rank: u64) -> (usize, u64) {
    let mut below = 0;
    for (digit, &c) in counts.iter().enumerate() {
        if rank < below + c {
            return (digit, below);
        }
        below += c;
    }
    // Unreachable while rank < the total count; the last bucket otherwise.
    (counts.len() - 1, below - counts.last().copied().unwrap_or(0))
}

impl Drop for SpilledValues {
    fn drop(&mut self) {
        drop(self.writer.take());
        let _ = std::fs::remove_file(&self.path);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Reference: the value a full sort by `f64::total_cmp` (the standard library's total
    /// order, IEEE 754-2019 totalOrder) puts at each rank, for values with many repeated
    /// top bits (so the passes narrow the prefix), repeated values, both signs and zeros.
    #[test]
    fn selection_equals_the_sorted_values() {
        let dir = tempfile::tempdir().unwrap();
        let mut values: Vec<f64> = (0..300_000u64).map(|i| 1.0 + ((i.wrapping_mul(2_654_435_761) % 1_000_003) as f64) * 1e-9).collect();
        values.extend([0.0, -0.0, -2.5, 7.0, 7.0, 1.0, f64::MIN_POSITIVE]);
        let mut spilled = SpilledValues::create(&dir.path().join("v.bin")).unwrap();
        values.iter().for_each(|&v| spilled.push(v).unwrap());
        let mut sorted = values.clone();
        sorted.sort_by(f64::total_cmp);
        for rank in [0, 1, 2, 3, 150_000, 299_999, sorted.len() as u64 - 2, sorted.len() as u64 - 1] {
            let got = spilled.select(rank).unwrap().unwrap();
            assert_eq!(got.to_bits(), sorted[rank as usize].to_bits(), "rank {rank}");
        }
        assert_eq!(spilled.select(sorted.len() as u64).unwrap(), None);
    }

    /// The narrowing passes (a bucket above the gathering size) and the case of all 64 bits
    /// fixed (one value repeated more often than can be gathered) against a sort.
    #[test]
    fn selection_narrows_large_buckets() {
        let dir = tempfile::tempdir().unwrap();
        let n = GATHER_VALUES as usize + 5000;
        let mut values: Vec<f64> = (0..n).map(|i| 2.0 + (i % 7919) as f64 * 1e-12).collect();
        values.extend(std::iter::repeat_n(3.0, n));
        let mut spilled = SpilledValues::create(&dir.path().join("v.bin")).unwrap();
        values.iter().for_each(|&v| spilled.push(v).unwrap());
        let mut sorted = values.clone();
        sorted.sort_by(f64::total_cmp);
        for rank in [0, n as u64 / 2, n as u64 - 1, n as u64, 2 * n as u64 - 1] {
            assert_eq!(spilled.select(rank).unwrap().unwrap().to_bits(), sorted[rank as usize].to_bits(), "rank {rank}");
        }
    }
}
