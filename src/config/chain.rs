//! The order check: each stage must consume the form of data the one before produces, and
//! the plan must end with flagged candidates on the grand spectrum.

use super::problem::Problem;
use super::registry::{Entry, REGISTRY};
use crate::stage::Form;

/// Problems with the order of `stages` (entry and header offset, in file order). Only the
/// first misplaced stage is reported: what follows it would mostly be echoes of that one.
pub fn check(stages: &[(&'static Entry, usize)], end_offset: usize) -> Vec<Problem> {
    let mut problems = Vec::new();
    let mut form = Form::Raw;
    for (pos, (entry, offset)) in stages.iter().enumerate() {
        if entry.input != form {
            let fitting: Vec<&str> = REGISTRY.iter().filter(|e| e.input == form).map(|e| e.kind).collect();
            problems.push(Problem::at(
                *offset,
                format!(
                    "stage {} \"{}\": is in the wrong place: it needs {:?} data but receives {:?}; stages that fit here: {} (stages run in the order {})",
                    pos + 1,
                    entry.kind,
                    entry.input,
                    form,
                    fitting.join(", "),
                    super::registry::kind_list()
                ),
            ));
            return problems;
        }
        form = entry.output;
    }
    if problems.is_empty() && (form != Form::Grand || !stages.iter().any(|(e, _)| e.kind == "flag")) {
        problems.push(Problem::at(end_offset, format!("the pipeline ends with {form:?} data; it must end with a \"flag\" stage on the grand spectrum")));
    }
    problems
}
