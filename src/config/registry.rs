//! The ordered list of stage kinds. Adding a kind: one file in `src/stage/` and one line here.

use super::StageConfig;
use crate::stage::{self, Form};
use serde::de::DeserializeOwned;
use toml::Spanned;
use toml::de::{DeValue, ValueDeserializer};

/// Reads the options of one `[[stage]]` table (without `kind`); errors carry a span.
pub type ParseFn = for<'i> fn(Spanned<DeValue<'i>>) -> Result<Box<dyn StageConfig>, toml::de::Error>;

/// A stage kind: its name, what it does, and how to read its options.
pub struct Entry {
    /// The `kind = "..."` value.
    pub kind: &'static str,
    /// One-line summary.
    pub summary: &'static str,
    /// Form of the data it consumes.
    pub input: Form,
    /// Form of the data it produces.
    pub output: Form,
    /// Reads the options of a `[[stage]]` table (without `kind`).
    pub parse: ParseFn,
}

impl std::fmt::Debug for Entry {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.kind)
    }
}

fn parse<C: StageConfig + DeserializeOwned + 'static>(value: Spanned<DeValue<'_>>) -> Result<Box<dyn StageConfig>, toml::de::Error> {
    C::deserialize(ValueDeserializer::from(value)).map(|c| Box::new(c) as Box<dyn StageConfig>)
}

/// Every stage kind, in pipeline order.
pub static REGISTRY: &[Entry] = &[
    Entry {
        kind: "ingest",
        summary: "validate steps and apply metadata quality cuts",
        input: Form::Raw,
        output: Form::Accepted,
        parse: parse::<stage::ingest::IngestConfig>,
    },
    Entry {
        kind: "baseline",
        summary: "divide by the common gain shape and a Savitzky-Golay fit per step",
        input: Form::Accepted,
        output: Form::Normalised,
        parse: parse::<stage::baseline::BaselineConfig>,
    },
    Entry {
        kind: "rescale",
        summary: "express each bin in units of the reference axion's power",
        input: Form::Normalised,
        output: Form::Rescaled,
        parse: parse::<stage::rescale::RescaleConfig>,
    },
    Entry {
        kind: "combine",
        summary: "maximum-likelihood weighted mean of all steps on one RF grid",
        input: Form::Rescaled,
        output: Form::Combined,
        parse: parse::<stage::combine::CombineConfig>,
    },
    Entry {
        kind: "filter",
        summary: "optimal filter with the halo lineshape -> grand spectrum",
        input: Form::Combined,
        output: Form::Grand,
        parse: parse::<stage::filter::FilterConfig>,
    },
    Entry {
        kind: "flag",
        summary: "flag grand-spectrum bins above threshold as rescan candidates",
        input: Form::Grand,
        output: Form::Grand,
        parse: parse::<stage::flag::FlagConfig>,
    },
];

/// The valid kinds, comma separated.
pub fn kind_list() -> String {
    REGISTRY.iter().map(|e| e.kind).collect::<Vec<_>>().join(", ")
}

/// The nearest valid kind to a misspelt one, if close enough.
pub fn suggest(kind: &str) -> Option<&'static str> {
    super::position::nearest(kind, REGISTRY.iter().map(|e| e.kind))
}
