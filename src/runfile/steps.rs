//! The `steps` group: reading its columns and checking every step's metadata.
//!
//! Rules: every column is a 1-D numeric dataset of length n_steps. Frequencies, loaded Q,
//! coupling and noise temperature are finite and > 0; `n_averages` is a whole number >= 1;
//! `timestamp_s` is finite and >= 0 and strictly increasing: steps are stored in
//! acquisition order, and a step whose timestamp equals the one before is a duplicate.
//! Frequencies may go up, down or revisit a band (rescans), so they are not ordered.

use super::StepMeta;
use super::attrs::{is_number, type_name};

/// Column names in the `steps` group, in the order of [`StepMeta`]'s fields.
pub const COLUMNS: [&str; 7] = ["start_freq_hz", "cavity_freq_hz", "loaded_q", "coupling_beta", "noise_temp_k", "n_averages", "timestamp_s"];

/// A problem with one field: (field, step, message).
pub type FieldProblem = (String, Option<usize>, String);

/// Reads and checks all columns of `group` for `n_steps` steps.
pub fn read_steps(group: &hdf5::Group, n_steps: usize) -> Result<Vec<StepMeta>, FieldProblem> {
    let mut cols = Vec::with_capacity(COLUMNS.len());
    for name in COLUMNS {
        cols.push(read_column(group, name, n_steps, "spectra")?);
    }
    let mut steps = Vec::with_capacity(n_steps);
    for i in 0..n_steps {
        let meta = StepMeta {
            start_freq_hz: cols[0][i],
            cavity_freq_hz: cols[1][i],
            loaded_q: cols[2][i],
            coupling_beta: cols[3][i],
            noise_temp_k: cols[4][i],
            n_averages: cols[5][i] as u64,
            timestamp_s: cols[6][i],
        };
        check_step(i, &meta, cols[5][i], steps.last())?;
        steps.push(meta);
    }
    Ok(steps)
}

/// Reads the 1-D numeric column `name` of `group`, which must hold one value per step (row) of
/// the dataset `rows_of`.
pub(crate) fn read_column(group: &hdf5::Group, name: &str, n_steps: usize, rows_of: &str) -> Result<Vec<f64>, FieldProblem> {
    let field = format!("steps/{name}");
    let fail = |m: String| (field.clone(), None, m);
    let ds = group.dataset(name).map_err(|_| fail("dataset is missing".into()))?;
    let shape = ds.shape();
    if shape != [n_steps] {
        return Err(fail(format!("has shape {shape:?}, expected [{n_steps}] (one value per step of `{rows_of}`)")));
    }
    let t = ds.dtype().and_then(|d| d.to_descriptor()).map_err(|e| fail(format!("type cannot be read: {e}")))?;
    if !is_number(&t) {
        return Err(fail(format!("is a {}, expected numbers", type_name(&t))));
    }
    ds.read_raw::<f64>().map_err(|e| fail(format!("cannot be read (corrupted file?): {e}")))
}

fn check_step(i: usize, m: &StepMeta, n_avg_raw: f64, previous: Option<&StepMeta>) -> Result<(), FieldProblem> {
    let fail = |name: &str, m: String| (format!("steps/{name}"), Some(i), m);
    let positive = [
        ("start_freq_hz", m.start_freq_hz),
        ("cavity_freq_hz", m.cavity_freq_hz),
        ("loaded_q", m.loaded_q),
        ("coupling_beta", m.coupling_beta),
        ("noise_temp_k", m.noise_temp_k),
    ];
    for (name, v) in positive {
        if !v.is_finite() {
            return Err(fail(name, format!("value {v} is not a finite number")));
        }
        if v <= 0.0 {
            return Err(fail(name, format!("value {v} must be > 0")));
        }
    }
    if !(n_avg_raw.is_finite() && n_avg_raw >= 1.0 && n_avg_raw.fract() == 0.0 && n_avg_raw < 2f64.powi(53)) {
        return Err(fail("n_averages", format!("value {n_avg_raw} must be a whole number >= 1 (spectra averaged in the step)")));
    }
    let t = m.timestamp_s;
    if !(t.is_finite() && t >= 0.0) {
        return Err(fail("timestamp_s", format!("value {t} must be finite Unix seconds >= 0")));
    }
    if let Some(p) = previous {
        if t == p.timestamp_s {
            return Err(fail("timestamp_s", format!("value {t} equals step {}'s: duplicate step (steps must have distinct, increasing timestamps)", i - 1)));
        }
        if t < p.timestamp_s {
            return Err(fail(
                "timestamp_s",
                format!("value {t} is earlier than step {}'s {}: steps must be stored in acquisition order", i - 1, p.timestamp_s),
            ));
        }
    }
    Ok(())
}
