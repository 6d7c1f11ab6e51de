//! Pipeline files: TOML `[[stage]]` tables -> validated, printable plan -> built stages.
//!
//! Every problem found is collected and reported together, each naming the stage (its
//! position and kind), the key, the line in the file and the valid choices.

mod registry;

pub use registry::{Entry, REGISTRY};

use crate::stage::{Combiner, Form, NightInfo, SpectrumStage, StepStage};
use serde::Deserialize;
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
    /// One message per problem, each with its line.
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

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct PipelineFile {
    #[serde(default)]
    stage: Vec<toml::Spanned<toml::Table>>,
}

fn line_of(text: &str, offset: usize) -> usize {
    text[..offset.min(text.len())].matches('\n').count() + 1
}

/// Line of `key = ...` inside the byte range of a stage table, else the table's line.
fn key_line(text: &str, span: std::ops::Range<usize>, key: &str) -> usize {
    let mut offset = span.start;
    for l in text[span.clone()].split_inclusive('\n') {
        let t = l.trim_start();
        if t.strip_prefix(key).is_some_and(|rest| rest.trim_start().starts_with('=')) {
            return line_of(text, offset);
        }
        offset += l.len();
    }
    line_of(text, span.start)
}

/// Loads and validates a pipeline from TOML text. `source_name` labels messages.
pub fn load(text: &str, source_name: &str) -> Result<Plan, ConfigError> {
    let fail = |problems| ConfigError { source_name: source_name.to_string(), problems };
    let file: PipelineFile = toml::from_str(text).map_err(|e| {
        let at = e.span().map(|s| format!("line {}: ", line_of(text, s.start))).unwrap_or_default();
        fail(vec![format!("{at}{}", e.message())])
    })?;
    if file.stage.is_empty() {
        return Err(fail(vec!["no [[stage]] tables: a pipeline needs at least ingest, baseline, rescale, combine, filter, flag".into()]));
    }
    let mut problems = Vec::new();
    let mut stages = Vec::new();
    for (pos, spanned) in file.stage.iter().enumerate() {
        let span = spanned.span();
        let line = line_of(text, span.start);
        let mut table = spanned.get_ref().clone();
        let label = format!("stage {} (line {line})", pos + 1);
        let kind = match table.remove("kind") {
            Some(toml::Value::String(k)) => k,
            Some(other) => {
                problems.push(format!("{label}: key `kind` must be a string, found {}", other.type_str()));
                continue;
            }
            None => {
                problems.push(format!("{label}: missing key `kind`; valid kinds: {}", registry::kind_list()));
                continue;
            }
        };
        let Some(entry) = REGISTRY.iter().find(|e| e.kind == kind) else {
            let hint = registry::suggest(&kind).map(|s| format!(" (did you mean \"{s}\"?)")).unwrap_or_default();
            problems.push(format!(
                "{label}: line {}: unknown kind \"{kind}\"{hint}; valid kinds: {}",
                key_line(text, span.clone(), "kind"),
                registry::kind_list()
            ));
            continue;
        };
        let label = format!("stage {} \"{kind}\"", pos + 1);
        match (entry.parse)(toml::Value::Table(table)) {
            Err(msg) => {
                let key = msg.split('`').nth(1).unwrap_or("");
                let at = if key.is_empty() { line } else { key_line(text, span.clone(), key) };
                problems.push(format!("{label}: line {at}: {msg}"));
            }
            Ok(config) => {
                for (key, msg) in config.validate() {
                    problems.push(format!("{label}: line {}: key `{key}`: {msg}", key_line(text, span.clone(), &key)));
                }
                stages.push(PlannedStage { entry, config, line });
            }
        }
    }
    if problems.is_empty() {
        problems.extend(check_chain(&stages));
    }
    if problems.is_empty() {
        Ok(Plan { stages, text: text.to_string() })
    } else {
        Err(fail(problems))
    }
}

/// Checks that each stage consumes what the one before produces, and that the plan ends
/// with flagged candidates.
fn check_chain(stages: &[PlannedStage]) -> Vec<String> {
    let mut problems = Vec::new();
    let mut form = Form::Raw;
    for (pos, s) in stages.iter().enumerate() {
        if s.entry.input != form {
            let fitting: Vec<&str> = REGISTRY.iter().filter(|e| e.input == form).map(|e| e.kind).collect();
            problems.push(format!(
                "stage {} \"{}\" (line {}): is in the wrong place: it needs {:?} data but receives {:?}; stages that fit here: {}",
                pos + 1,
                s.entry.kind,
                s.line,
                s.entry.input,
                form,
                fitting.join(", ")
            ));
            return problems;
        }
        form = s.entry.output;
    }
    if form != Form::Grand || !stages.iter().any(|s| s.entry.kind == "flag") {
        problems.push(format!("the pipeline ends with {form:?} data; it must end with a \"flag\" stage on the grand spectrum"));
    }
    problems
}

impl Plan {
    /// A human-readable description of the resolved plan: every stage with all options,
    /// defaults filled in.
    pub fn describe(&self) -> String {
        let mut out = String::new();
        for (i, s) in self.stages.iter().enumerate() {
            out.push_str(&format!(
                "{:>2}. {:<9} {:?} -> {:?}   {}\n     {:?}\n",
                i + 1,
                s.entry.kind,
                s.entry.input,
                s.entry.output,
                s.entry.summary,
                s.config
            ));
        }
        out
    }

    /// Builds every stage for a night, in order.
    pub fn build(&self, night: &NightInfo) -> Result<Vec<Built>, String> {
        let ctx = BuildContext { baseline_kernel: self.stages.iter().find_map(|s| s.config.baseline_kernel()) };
        self.stages
            .iter()
            .enumerate()
            .map(|(i, s)| s.config.build(night, &ctx).map_err(|e| format!("stage {} \"{}\": {e}", i + 1, s.entry.kind)))
            .collect()
    }
}
