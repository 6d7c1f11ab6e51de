//! The `steps` group of a capture: reading its columns and checking every step's metadata.
//!
//! Rules (those of the run file's `steps` group, without `n_averages`, which the averaging
//! produces): every column is a 1-D numeric dataset of length n_steps; frequencies, loaded Q,
//! coupling and noise temperature are finite and > 0; `timestamp_s` is finite, >= 0 and
//! strictly increasing (acquisition order, no duplicate step).

use super::IqStepMeta;
use crate::runfile::steps::{FieldProblem, read_column};

/// Column names in the `steps` group, in the order of [`IqStepMeta`]'s fields.
pub const COLUMNS: [&str; 6] = ["lo_freq_hz", "cavity_freq_hz", "loaded_q", "coupling_beta", "noise_temp_k", "timestamp_s"];

/// Reads and checks all columns of `group` for `n_steps` steps.
pub fn read_steps(group: &hdf5::Group, n_steps: usize) -> Result<Vec<IqStepMeta>, FieldProblem> {
    let cols = COLUMNS.iter().map(|name| read_column(group, name, n_steps, "iq")).collect::<Result<Vec<_>, _>>()?;
    let mut steps: Vec<IqStepMeta> = Vec::with_capacity(n_steps);
    for i in 0..n_steps {
        let meta = IqStepMeta {
            lo_freq_hz: cols[0][i],
            cavity_freq_hz: cols[1][i],
            loaded_q: cols[2][i],
            coupling_beta: cols[3][i],
            noise_temp_k: cols[4][i],
            timestamp_s: cols[5][i],
        };
        check_step(i, &meta, steps.last())?;
        steps.push(meta);
    }
    Ok(steps)
}

fn check_step(i: usize, m: &IqStepMeta, previous: Option<&IqStepMeta>) -> Result<(), FieldProblem> {
    let fail = |name: &str, m: String| (format!("steps/{name}"), Some(i), m);
    for (name, v) in COLUMNS.iter().zip([m.lo_freq_hz, m.cavity_freq_hz, m.loaded_q, m.coupling_beta, m.noise_temp_k]) {
        if !v.is_finite() {
            return Err(fail(name, format!("value {v} is not a finite number")));
        }
        if v <= 0.0 {
            return Err(fail(name, format!("value {v} must be > 0")));
        }
    }
    let t = m.timestamp_s;
    if !(t.is_finite() && t >= 0.0) {
        return Err(fail("timestamp_s", format!("value {t} must be finite Unix seconds >= 0")));
    }
    if let Some(p) = previous.filter(|p| t <= p.timestamp_s) {
        return Err(fail(
            "timestamp_s",
            format!("value {t} is not later than step {}'s {}: steps must be stored in acquisition order, once each", i - 1, p.timestamp_s),
        ));
    }
    Ok(())
}
