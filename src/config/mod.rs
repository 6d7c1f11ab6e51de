//! Pipeline files: TOML `[[stage]]` tables -> validated, printable plan -> built stages.
//!
//! Every problem found is collected and reported together, each starting with its line and
//! column in the file and naming the stage (its position and kind), the key and the valid
//! choices. Checks live in small modules: `position` (offsets to line and column, nearest
//! name), `table` (one stage table), `chain` (stage order), `registry` (the stage kinds).

mod chain;
mod position;
mod problem;
mod registry;
mod table;

pub use position::Position;
pub use registry::{Entry, ParseFn, REGISTRY};

use problem::Problem;
use toml::de::{DeTable, DeValue};

use crate::stage::{Combiner, NightInfo, SpectrumStage, StepStage};
use std::fmt;

/// A built stage, by shape.
pub enum Built {
    /// Runs on each step.
    Step(Box<dyn StepStage>),
    /// Maps steps onto the RF grid.
    Combine(Box<dyn Combiner>),
    /// Runs on the combined spectrum.
    Spectrum(Box<dyn SpectrumStage>),
}

/// What a stage's config offers to the rest of the plan when it is built.
pub struct BuildContext {
    /// Interior smoothing kernel of the baseline fit, if the plan has one (for predicting
    /// the null spread of the filtered spectrum).
    pub baseline_kernel: Option<Vec<f64>>,
}

/// The config of one stage kind: parsed from its table, validated, then built.
pub trait StageConfig: fmt::Debug + Send + Sync {
    /// Every out-of-range value as (key, message).
    fn validate(&self) -> Vec<(String, String)>;
    /// Builds the runtime stage with all kernels precomputed.
    fn build(&self, night: &NightInfo, ctx: &BuildContext) -> Result<Built, String>;
    /// The baseline smoothing kernel this stage applies, if any.
    fn baseline_kernel(&self) -> Option<Vec<f64>> {
        None
    }
    /// The threshold this stage flags the grand spectrum at, if it is a flagging stage.
    fn flag_threshold(&self) -> Option<f64> {
        None
    }
    /// Every option with its resolved value (defaults filled in), as a TOML table.
    fn options(&self) -> toml::Table;
}

/// The options of a stage config as a TOML table (for [`StageConfig::options`]).
pub fn options_of<C: serde::Serialize>(config: &C) -> toml::Table {
    toml::Table::try_from(config).unwrap_or_default()
}

/// One stage of a loaded plan.
#[derive(Debug)]
pub struct PlannedStage {
    /// Registry entry of its kind.
    pub entry: &'static Entry,
    /// Its validated options.
    pub config: Box<dyn StageConfig>,
    /// 1-based line of its `[[stage]]` header.
    pub line: usize,
}

/// A validated pipeline.
#[derive(Debug)]
pub struct Plan {
    /// The stages in order.
    pub stages: Vec<PlannedStage>,
    /// The file's text, kept for provenance.
    pub text: String,
}

/// All problems found in a pipeline file.
#[derive(Debug)]
pub struct ConfigError {
    /// Name of the file (for messages).
    pub source_name: String,
    /// One message per problem, in file order, each starting "line L, column C: ".
    pub problems: Vec<String>,
}

impl fmt::Display for ConfigError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        writeln!(f, "{}: {} problem(s) in the pipeline:", self.source_name, self.problems.len())?;
        for p in &self.problems {
            writeln!(f, "  - {p}")?;
        }
        Ok(())
    }
}
impl std::error::Error for ConfigError {}

/// Loads and validates a pipeline from TOML text. `source_name` labels messages.
///
/// Every problem is collected: TOML syntax errors (then nothing else is checked, since the
/// rest of the file cannot be trusted), unknown top-level keys, and per stage its kind,
/// unknown keys (with the nearest valid one), wrong value types and out-of-range values;
/// when every stage has a known kind, also their order. Each message starts with the line
/// and column it points at.
pub fn load(text: &str, source_name: &str) -> Result<Plan, ConfigError> {
    let fail = |mut problems: Vec<Problem>| {
        problems.sort_by_key(|p| p.offset);
        ConfigError { source_name: source_name.to_string(), problems: problems.iter().map(|p| p.render(text)).collect() }
    };
    let (doc, syntax) = DeTable::parse_recoverable(text);
    if !syntax.is_empty() {
        return Err(fail(syntax_problems(&syntax)));
    }
    let mut problems = Vec::new();
    for (key, _) in doc.get_ref().iter().filter(|(k, _)| k.get_ref() != "stage") {
        let hint = position::nearest(key.get_ref(), ["stage"]).map(|s| format!(" (did you mean `[[{s}]]`?)")).unwrap_or_default();
        problems.push(Problem::at(key.span().start, format!("unknown top-level key `{}`{hint}; a pipeline holds only [[stage]] tables", key.get_ref())));
    }
    let tables: Vec<(std::ops::Range<usize>, &DeTable<'_>)> = match doc.get_ref().get("stage").map(|v| (v.span(), v.get_ref())) {
        None => Vec::new(),
        Some((_, DeValue::Array(items))) => {
            let mut tables = Vec::new();
            for item in items.iter() {
                match item.get_ref() {
                    DeValue::Table(t) => tables.push((item.span(), t)),
                    other => problems.push(Problem::at(item.span().start, format!("`stage` must hold tables, found {}", other.type_str()))),
                }
            }
            tables
        }
        Some((span, other)) => {
            problems.push(Problem::at(span.start, format!("`stage` must be an array of tables (write each stage as [[stage]]), found {}", other.type_str())));
            Vec::new()
        }
    };
    if tables.is_empty() && problems.is_empty() {
        problems.push(Problem::at(0, "no [[stage]] tables: a pipeline needs at least ingest, baseline, rescale, combine, filter, flag"));
    }
    let mut stages = Vec::new();
    let mut kinds = Vec::new();
    let mut all_kinds_known = true;
    for (pos, (header, table)) in tables.iter().enumerate() {
        let checked = table::check(pos, header.clone(), table);
        problems.extend(checked.problems);
        match checked.entry {
            Some(entry) => kinds.push((entry, header.start)),
            None => all_kinds_known = false,
        }
        if let Some(s) = checked.stage {
            stages.push(PlannedStage { entry: s.entry, config: s.config, line: Position::of(text, header.start).line });
        }
    }
    if all_kinds_known && !kinds.is_empty() {
        problems.extend(chain::check(&kinds, text.len()));
    }
    if problems.is_empty() { Ok(Plan { stages, text: text.to_string() }) } else { Err(fail(problems)) }
}

/// TOML syntax errors, at most one per line (later ones on a line are mostly echoes).
fn syntax_problems(errors: &[toml::de::Error]) -> Vec<Problem> {
    let mut seen_offsets: Vec<usize> = Vec::new();
    let mut out = Vec::new();
    for e in errors {
        let offset = e.span().map_or(0, |s| s.start);
        if seen_offsets.contains(&offset) {
            continue;
        }
        seen_offsets.push(offset);
        out.push(Problem::at(offset, format!("TOML syntax: {}", e.message())));
    }
    out
}

impl Plan {
    /// A human-readable description of the resolved plan: every stage with all options,
    /// defaults filled in.
    pub fn describe(&self) -> String {
        let mut out = String::new();
        for (i, s) in self.stages.iter().enumerate() {
            out.push_str(&format!("{:>2}. {:<9} {:?} -> {:?}: {}\n", i + 1, s.entry.kind, s.entry.input, s.entry.output, s.entry.summary));
            for (key, value) in s.config.options() {
                out.push_str(&format!("      {key} = {value}\n"));
            }
        }
        out
    }

    /// Builds every stage for a night, in order.
    pub fn build(&self, night: &NightInfo) -> Result<Vec<Built>, String> {
        let ctx = BuildContext { baseline_kernel: self.stages.iter().find_map(|s| s.config.baseline_kernel()) };
        self.stages.iter().enumerate().map(|(i, s)| s.config.build(night, &ctx).map_err(|e| format!("stage {} \"{}\": {e}", i + 1, s.entry.kind))).collect()
    }
}
