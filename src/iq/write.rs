//! Writing IQ captures (used by the simulator and by tests), step by step to a temporary path
//! renamed into place by [`IqWriter::finish`].

use super::{FORMAT_NAME, FORMAT_VERSION, IqHeader, IqStepMeta, SampleKind, Samples};
use crate::runfile::RunFileError;
use hdf5::types::VarLenUnicode;
use std::path::{Path, PathBuf};
use std::str::FromStr;

/// A capture being written.
pub struct IqWriter {
    final_path: PathBuf,
    tmp_path: PathBuf,
    file: hdf5::File,
    iq: hdf5::Dataset,
    steps: Vec<IqStepMeta>,
    n_steps: usize,
    n_samples: usize,
}

impl IqWriter {
    /// Creates a capture of `n_steps` steps of `n_samples` complex samples stored as `kind`.
    pub fn create(path: &Path, header: &IqHeader, kind: SampleKind, n_steps: usize, n_samples: usize) -> Result<Self, RunFileError> {
        let tmp_path = path.with_extension("h5.tmp");
        let err = |what: &str| {
            let (p, w) = (path.to_path_buf(), what.to_string());
            move |source| RunFileError::Hdf5 { path: p, what: w, source }
        };
        let file = hdf5::File::with_options().with_fapl(|p| p.libver_v110()).create(&tmp_path).map_err(err("create"))?;
        let text = |name: &str, value: &str| -> Result<(), RunFileError> {
            let value = VarLenUnicode::from_str(value).map_err(|e| RunFileError::Invalid {
                path: path.to_path_buf(),
                field: name.into(),
                step: None,
                message: e.to_string(),
            })?;
            file.new_attr::<VarLenUnicode>().create(name).and_then(|a| a.write_scalar(&value)).map_err(err(name))
        };
        text("format", FORMAT_NAME)?;
        text("run_label", &header.run_label)?;
        file.new_attr::<u32>().create("format_version").and_then(|a| a.write_scalar(&FORMAT_VERSION)).map_err(err("format_version"))?;
        let mut numbers = vec![
            ("sample_rate_hz", header.sample_rate_hz),
            ("magnet_field_t", header.magnet_field_t),
            ("cavity_volume_m3", header.cavity_volume_m3),
            ("form_factor", header.form_factor),
        ];
        if let SampleKind::I16 { iq_scale_v } = kind {
            numbers.push(("iq_scale", iq_scale_v));
        }
        for (name, value) in numbers {
            file.new_attr::<f64>().create(name).and_then(|a| a.write_scalar(&value)).map_err(err(name))?;
        }
        let shape = (n_steps, n_samples, 2);
        let iq = match kind {
            SampleKind::F32 => file.new_dataset::<f32>().shape(shape).create("iq"),
            SampleKind::I16 { .. } => file.new_dataset::<i16>().shape(shape).create("iq"),
        }
        .map_err(err("iq"))?;
        Ok(Self { final_path: path.to_path_buf(), tmp_path, file, iq, steps: Vec::with_capacity(n_steps), n_steps, n_samples })
    }

    /// Appends the next step: its metadata and its `n_samples` samples, I and Q interleaved, of
    /// the kind the file was created with.
    pub fn push_step(&mut self, meta: IqStepMeta, samples: &Samples) -> Result<(), RunFileError> {
        let row = self.steps.len();
        let shape = (self.n_samples, 2);
        let err = |source| RunFileError::Hdf5 { path: self.final_path.clone(), what: format!("writing step {row}"), source };
        let written = match samples {
            Samples::F32(v) => {
                ndarray::ArrayView2::from_shape(shape, v).map_err(|e| hdf5::Error::from(e.to_string())).and_then(|a| self.iq.write_slice(a, (row, .., ..)))
            }
            Samples::I16(v) => {
                ndarray::ArrayView2::from_shape(shape, v).map_err(|e| hdf5::Error::from(e.to_string())).and_then(|a| self.iq.write_slice(a, (row, .., ..)))
            }
        };
        written.map_err(err)?;
        self.steps.push(meta);
        Ok(())
    }

    /// Writes the `steps` group and renames the file into place.
    pub fn finish(self) -> Result<(), RunFileError> {
        let err = |what: &str| {
            let (p, w) = (self.final_path.clone(), what.to_string());
            move |source| RunFileError::Hdf5 { path: p, what: w, source }
        };
        if self.steps.len() != self.n_steps {
            let message = format!("{} of {} steps written", self.steps.len(), self.n_steps);
            return Err(RunFileError::Invalid { path: self.final_path.clone(), field: "iq".into(), step: None, message });
        }
        let group = self.file.create_group("steps").map_err(err("steps"))?;
        let columns: [(&str, fn(&IqStepMeta) -> f64); 6] = [
            ("lo_freq_hz", |s| s.lo_freq_hz),
            ("cavity_freq_hz", |s| s.cavity_freq_hz),
            ("loaded_q", |s| s.loaded_q),
            ("coupling_beta", |s| s.coupling_beta),
            ("noise_temp_k", |s| s.noise_temp_k),
            ("timestamp_s", |s| s.timestamp_s),
        ];
        for (name, get) in columns {
            let values: Vec<f64> = self.steps.iter().map(get).collect();
            group.new_dataset_builder().with_data(&values).create(name).map_err(err(name))?;
        }
        crate::runfile::write::close_and_rename(self.file, &self.tmp_path, &self.final_path)
    }
}
