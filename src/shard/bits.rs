//! Serde helpers that store `f64` values as their IEEE-754 bit patterns (`u64`), so NaN,
//! infinities and every finite value survive a JSON round trip exactly (JSON itself has no
//! NaN or infinity). Use with `#[serde(with = "crate::shard::bits")]` on a `Vec<f64>`.

use serde::{Deserialize, Deserializer, Serializer};

/// Writes each value as its bit pattern.
pub fn serialize<S: Serializer>(values: &[f64], s: S) -> Result<S::Ok, S::Error> {
    s.collect_seq(values.iter().map(|v| v.to_bits()))
}

/// Reads values written by [`serialize`].
pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<Vec<f64>, D::Error> {
    Ok(Vec::<u64>::deserialize(d)?.into_iter().map(f64::from_bits).collect())
}

/// One `f64` as its bit pattern: `#[serde(with = "crate::shard::bits::one")]`.
pub mod one {
    use serde::{Deserialize, Deserializer, Serializer};

    /// Writes the value's bit pattern.
    pub fn serialize<S: Serializer>(value: &f64, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_u64(value.to_bits())
    }

    /// Reads a value written by [`serialize`].
    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<f64, D::Error> {
        Ok(f64::from_bits(u64::deserialize(d)?))
    }
}
