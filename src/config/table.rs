//! Checking one `[[stage]]` table: its kind, its keys (unknown ones with a suggestion), the
//! type of every value, and the ranges the stage's own validation asks for. Every key is
//! checked on its own, so one table can report several problems at once.

use super::StageConfig;
use super::position::nearest;
use super::problem::Problem;
use super::registry::{self, Entry, REGISTRY};
use std::ops::Range;
use toml::Spanned;
use toml::de::{DeTable, DeValue};

/// A stage table that passed every check.
pub struct CheckedStage {
    /// Registry entry of its kind.
    pub entry: &'static Entry,
    /// Its validated options.
    pub config: Box<dyn StageConfig>,
}

/// The outcome of checking one table.
pub struct TableCheck {
    /// The kind, if it named a known one (used for the order check even if options failed).
    pub entry: Option<&'static Entry>,
    /// The built options, if there was no problem.
    pub stage: Option<CheckedStage>,
    /// Problems found.
    pub problems: Vec<Problem>,
}

/// Checks stage number `pos` (0-based); `header` is the span of its `[[stage]]` header.
pub fn check(pos: usize, header: Range<usize>, table: &DeTable<'_>) -> TableCheck {
    let mut problems = Vec::new();
    let done = |entry, problems| TableCheck { entry, stage: None, problems };
    let label = format!("stage {}", pos + 1);
    let entry = match table.get("kind") {
        None => {
            problems.push(Problem::at(header.start, format!("{label}: missing key `kind`; valid kinds: {}", registry::kind_list())));
            return done(None, problems);
        }
        Some(v) => match v.get_ref().as_str() {
            None => {
                problems.push(Problem::at(v.span().start, format!("{label}: key `kind` must be a string, found {}", v.get_ref().type_str())));
                return done(None, problems);
            }
            Some(kind) => match REGISTRY.iter().find(|e| e.kind == kind) {
                Some(e) => e,
                None => {
                    let hint = registry::suggest(kind).map(|s| format!(" (did you mean \"{s}\"?)")).unwrap_or_default();
                    problems.push(Problem::at(v.span().start, format!("{label}: unknown kind \"{kind}\"{hint}; valid kinds: {}", registry::kind_list())));
                    return done(None, problems);
                }
            },
        },
    };
    let label = format!("{label} \"{}\"", entry.kind);
    let mut keys: Vec<(&Spanned<_>, &Spanned<DeValue<'_>>)> = table.iter().filter(|(k, _)| k.get_ref() != "kind").collect();
    keys.sort_by_key(|(k, _)| k.span().start);

    // Each key alone: unknown names and wrong types show up here, one per key.
    let mut good = DeTable::new();
    let mut rejected = Vec::new();
    for (key, value) in &keys {
        let name = key.get_ref().as_ref();
        let mut single = DeTable::new();
        single.insert((*key).clone(), (*value).clone());
        match (entry.parse)(Spanned::new(header.clone(), DeValue::Table(single))) {
            Err(e) if e.message().starts_with("unknown field") => {
                let valid = backticked(e.message()).into_iter().skip(1).collect::<Vec<_>>();
                let hint = nearest(name, valid.iter().map(String::as_str)).map(|s| format!(" (did you mean `{s}`?)")).unwrap_or_default();
                let list = if valid.is_empty() { "this stage takes no options".to_string() } else { format!("valid keys: {}", valid.join(", ")) };
                problems.push(Problem::at(key.span().start, format!("{label}: unknown key `{name}`{hint}; {list}")));
                rejected.push(name.to_string());
            }
            Err(e) if !e.message().starts_with("missing field") => {
                let at = e.span().filter(|s| s.start >= value.span().start).map_or(value.span().start, |s| s.start);
                problems.push(Problem::at(at, format!("{label}: key `{name}`: {}", e.message())));
                rejected.push(name.to_string());
            }
            _ => {
                good.insert((*key).clone(), (*value).clone());
            }
        }
    }

    // The keys together: missing required keys, then the stage's own range checks.
    let config = match (entry.parse)(Spanned::new(header.clone(), DeValue::Table(good))) {
        Ok(c) => c,
        Err(e) => {
            let missing = backticked(e.message()).into_iter().next().unwrap_or_default();
            if !(e.message().starts_with("missing field") && rejected.contains(&missing)) {
                let msg = e.message().strip_prefix("missing field").map_or_else(|| e.message().to_string(), |rest| format!("missing key{rest}"));
                problems.push(Problem::at(header.start, format!("{label}: {msg}")));
            }
            return done(Some(entry), problems);
        }
    };
    for (key, msg) in config.validate() {
        let at = keys.iter().find(|(k, _)| k.get_ref().as_ref() == key).map_or(header.start, |(_, v)| v.span().start);
        let default = if keys.iter().any(|(k, _)| k.get_ref().as_ref() == key) { "" } else { " (default)" };
        problems.push(Problem::at(at, format!("{label}: key `{key}`{default}: {msg}")));
    }
    if problems.is_empty() { TableCheck { entry: Some(entry), stage: Some(CheckedStage { entry, config }), problems } } else { done(Some(entry), problems) }
}

/// The words between backticks in a serde message, in order.
fn backticked(message: &str) -> Vec<String> {
    message.split('`').skip(1).step_by(2).map(str::to_string).collect()
}
