//! Reading and validating run files, step rows by hyperslab.

use super::{FORMAT_NAME, FORMAT_VERSION, MAX_BINS_PER_STEP, MAX_STEPS_PER_FILE};
use super::{RunFileError, RunHeader, StepMeta};
use hdf5::types::VarLenUnicode;
use ndarray::Array2;
use std::ops::Range;
use std::path::{Path, PathBuf};

/// An open, validated run file. Metadata is held in memory; spectra are read on demand.
pub struct RunReader {
    path: PathBuf,
    spectra: hdf5::Dataset,
    mask: Option<hdf5::Dataset>,
    header: RunHeader,
    steps: Vec<StepMeta>,
    n_bins: usize,
}

impl RunReader {
    /// Opens `path`, checks the format attributes, shapes and per-step metadata ranges.
    pub fn open(path: &Path) -> Result<Self, RunFileError> {
        let p = path.to_path_buf();
        let h5 = |what: &str| {
            let p = p.clone();
            let what = what.to_string();
            move |source| RunFileError::Hdf5 {
                path: p,
                what,
                source,
            }
        };
        let invalid = |field: &str, step: Option<usize>, message: String| RunFileError::Invalid {
            path: p.clone(),
            field: field.to_string(),
            step,
            message,
        };
        let file = hdf5::File::open(path).map_err(h5("cannot open as HDF5"))?;
        let format: String =
            read_string_attr(&file, "format").map_err(|m| invalid("format", None, m))?;
        if format != FORMAT_NAME {
            return Err(invalid(
                "format",
                None,
                format!("is \"{format}\", expected \"{FORMAT_NAME}\""),
            ));
        }
        let version = read_f64_attr(&file, "format_version")
            .map_err(|m| invalid("format_version", None, m))?;
        if version != f64::from(FORMAT_VERSION) {
            return Err(invalid(
                "format_version",
                None,
                format!("is {version}, this build reads {FORMAT_VERSION}"),
            ));
        }
        let positive = |name: &str| -> Result<f64, RunFileError> {
            let v = read_f64_attr(&file, name).map_err(|m| invalid(name, None, m))?;
            if v.is_finite() && v > 0.0 {
                Ok(v)
            } else {
                Err(invalid(
                    name,
                    None,
                    format!("is {v}, must be finite and > 0"),
                ))
            }
        };
        let header = RunHeader {
            bin_width_hz: positive("bin_width_hz")?,
            magnet_field_t: positive("magnet_field_t")?,
            cavity_volume_m3: positive("cavity_volume_m3")?,
            form_factor: positive("form_factor")?,
            run_label: read_string_attr(&file, "run_label")
                .map_err(|m| invalid("run_label", None, m))?,
        };
        let spectra = file
            .dataset("spectra")
            .map_err(|_| invalid("spectra", None, "dataset is missing".into()))?;
        let shape = spectra.shape();
        if shape.len() != 2 {
            return Err(invalid(
                "spectra",
                None,
                format!(
                    "has {} dimensions, expected 2 [n_steps, n_bins]",
                    shape.len()
                ),
            ));
        }
        let (n_steps, n_bins) = (shape[0], shape[1]);
        if n_steps == 0 || n_steps > MAX_STEPS_PER_FILE || n_bins < 16 || n_bins > MAX_BINS_PER_STEP
        {
            return Err(invalid(
                "spectra",
                None,
                format!(
                    "shape [{n_steps}, {n_bins}] is outside 1..={MAX_STEPS_PER_FILE} steps, 16..={MAX_BINS_PER_STEP} bins"
                ),
            ));
        }
        let mask = match file.dataset("mask") {
            Ok(m) if m.shape() == shape => Some(m),
            Ok(m) => {
                return Err(invalid(
                    "mask",
                    None,
                    format!("shape {:?} differs from spectra {:?}", m.shape(), shape),
                ));
            }
            Err(_) => None,
        };
        let group = file
            .group("steps")
            .map_err(|_| invalid("steps", None, "group is missing".into()))?;
        let column = |name: &str| -> Result<Vec<f64>, RunFileError> {
            let field = format!("steps/{name}");
            let ds = group
                .dataset(name)
                .map_err(|_| invalid(&field, None, "dataset is missing".into()))?;
            if ds.shape() != [n_steps] {
                return Err(invalid(
                    &field,
                    None,
                    format!("shape {:?}, expected [{n_steps}]", ds.shape()),
                ));
            }
            ds.read_raw::<f64>().map_err(h5(&field))
        };
        let start = column("start_freq_hz")?;
        let cavity = column("cavity_freq_hz")?;
        let q = column("loaded_q")?;
        let beta = column("coupling_beta")?;
        let temp = column("noise_temp_k")?;
        let n_avg = column("n_averages")?;
        let time = column("timestamp_s")?;
        let mut steps = Vec::with_capacity(n_steps);
        for i in 0..n_steps {
            let checks: [(&str, f64, bool); 6] = [
                ("steps/start_freq_hz", start[i], start[i] > 0.0),
                ("steps/cavity_freq_hz", cavity[i], cavity[i] > 0.0),
                ("steps/loaded_q", q[i], q[i] > 0.0),
                ("steps/coupling_beta", beta[i], beta[i] > 0.0),
                ("steps/noise_temp_k", temp[i], temp[i] > 0.0),
                (
                    "steps/n_averages",
                    n_avg[i],
                    n_avg[i] >= 1.0 && n_avg[i].fract() == 0.0,
                ),
            ];
            for (field, value, ok) in checks {
                if !(value.is_finite() && ok) {
                    return Err(invalid(
                        field,
                        Some(i),
                        format!(
                            "value {value} is not valid (must be finite and positive; n_averages a whole number >= 1)"
                        ),
                    ));
                }
            }
            steps.push(StepMeta {
                start_freq_hz: start[i],
                cavity_freq_hz: cavity[i],
                loaded_q: q[i],
                coupling_beta: beta[i],
                noise_temp_k: temp[i],
                n_averages: n_avg[i] as u64,
                timestamp_s: time[i],
            });
        }
        Ok(Self {
            path: p,
            spectra,
            mask,
            header,
            steps,
            n_bins,
        })
    }

    /// The file's path.
    pub fn path(&self) -> &Path {
        &self.path
    }
    /// Facility parameters (root attributes).
    pub fn header(&self) -> &RunHeader {
        &self.header
    }
    /// Per-step metadata, in file order.
    pub fn steps(&self) -> &[StepMeta] {
        &self.steps
    }
    /// Bins per step.
    pub fn n_bins(&self) -> usize {
        self.n_bins
    }

    /// Reads raw power for `rows` (a hyperslab), as f64. Masked bins become NaN ("no data").
    pub fn read_rows(&self, rows: Range<usize>) -> Result<Array2<f64>, RunFileError> {
        let what = format!("reading spectra rows {}..{}", rows.start, rows.end);
        let mut power: Array2<f64> =
            self.spectra
                .read_slice_2d((rows.clone(), ..))
                .map_err(|source| RunFileError::Hdf5 {
                    path: self.path.clone(),
                    what: what.clone(),
                    source,
                })?;
        if let Some(mask) = &self.mask {
            let flags: Array2<u8> =
                mask.read_slice_2d((rows, ..))
                    .map_err(|source| RunFileError::Hdf5 {
                        path: self.path.clone(),
                        what: format!("{what} of mask"),
                        source,
                    })?;
            ndarray::Zip::from(&mut power)
                .and(&flags)
                .for_each(|p, &m| {
                    if m != 0 {
                        *p = f64::NAN;
                    }
                });
        }
        Ok(power)
    }
}

fn read_f64_attr(file: &hdf5::File, name: &str) -> Result<f64, String> {
    let attr = file
        .attr(name)
        .map_err(|_| "attribute is missing".to_string())?;
    attr.read_scalar::<f64>()
        .map_err(|e| format!("cannot be read as a number: {e}"))
}

fn read_string_attr(file: &hdf5::File, name: &str) -> Result<String, String> {
    let attr = file
        .attr(name)
        .map_err(|_| "attribute is missing".to_string())?;
    attr.read_scalar::<VarLenUnicode>()
        .map(|s| s.as_str().to_string())
        .map_err(|e| format!("cannot be read as a string: {e}"))
}
