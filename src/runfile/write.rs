//! Writing run files (used by the simulator and by tests).

use super::{FORMAT_NAME, FORMAT_VERSION, RunFileError, RunHeader, StepMeta};
use hdf5::types::VarLenUnicode;
use ndarray::ArrayView1;
use std::path::{Path, PathBuf};
use std::str::FromStr;

/// Writes a run file row by row to a temporary path, renamed into place by [`RunWriter::finish`].
pub struct RunWriter {
    final_path: PathBuf,
    tmp_path: PathBuf,
    file: hdf5::File,
    spectra: hdf5::Dataset,
    steps: Vec<StepMeta>,
    n_steps: usize,
}

impl RunWriter {
    /// Creates a file for `n_steps` x `n_bins` f32 spectra with the given header.
    pub fn create(
        path: &Path,
        header: &RunHeader,
        n_steps: usize,
        n_bins: usize,
    ) -> Result<Self, RunFileError> {
        let tmp_path = path.with_extension("h5.tmp");
        let err = |what: &str| {
            let (p, w) = (path.to_path_buf(), what.to_string());
            move |source| RunFileError::Hdf5 {
                path: p,
                what: w,
                source,
            }
        };
        let file = hdf5::File::create(&tmp_path).map_err(err("create"))?;
        let text = |s: &str| VarLenUnicode::from_str(s).unwrap_or_default();
        file.new_attr::<VarLenUnicode>()
            .create("format")
            .and_then(|a| a.write_scalar(&text(FORMAT_NAME)))
            .map_err(err("format"))?;
        file.new_attr::<u32>()
            .create("format_version")
            .and_then(|a| a.write_scalar(&FORMAT_VERSION))
            .map_err(err("format_version"))?;
        for (name, value) in [
            ("bin_width_hz", header.bin_width_hz),
            ("magnet_field_t", header.magnet_field_t),
            ("cavity_volume_m3", header.cavity_volume_m3),
            ("form_factor", header.form_factor),
        ] {
            file.new_attr::<f64>()
                .create(name)
                .and_then(|a| a.write_scalar(&value))
                .map_err(err(name))?;
        }
        file.new_attr::<VarLenUnicode>()
            .create("run_label")
            .and_then(|a| a.write_scalar(&text(&header.run_label)))
            .map_err(err("run_label"))?;
        let spectra = file
            .new_dataset::<f32>()
            .shape((n_steps, n_bins))
            .chunk((1, n_bins))
            .create("spectra")
            .map_err(err("spectra"))?;
        Ok(Self {
            final_path: path.to_path_buf(),
            tmp_path,
            file,
            spectra,
            steps: Vec::with_capacity(n_steps),
            n_steps,
        })
    }

    /// Appends the next step: its metadata and raw power (W per bin, any gain).
    pub fn push_step(
        &mut self,
        meta: StepMeta,
        power: ArrayView1<f32>,
    ) -> Result<(), RunFileError> {
        let row = self.steps.len();
        self.spectra
            .write_slice(&power, (row, ..))
            .map_err(|source| RunFileError::Hdf5 {
                path: self.final_path.clone(),
                what: format!("writing step {row}"),
                source,
            })?;
        self.steps.push(meta);
        Ok(())
    }

    /// Writes the `steps` group and renames the file into place.
    pub fn finish(self) -> Result<(), RunFileError> {
        let err = |what: &str| {
            let (p, w) = (self.final_path.clone(), what.to_string());
            move |source| RunFileError::Hdf5 {
                path: p,
                what: w,
                source,
            }
        };
        if self.steps.len() != self.n_steps {
            return Err(RunFileError::Invalid {
                path: self.final_path.clone(),
                field: "spectra".into(),
                step: None,
                message: format!("{} of {} steps written", self.steps.len(), self.n_steps),
            });
        }
        let group = self.file.create_group("steps").map_err(err("steps"))?;
        let columns: [(&str, fn(&StepMeta) -> f64); 6] = [
            ("start_freq_hz", |s| s.start_freq_hz),
            ("cavity_freq_hz", |s| s.cavity_freq_hz),
            ("loaded_q", |s| s.loaded_q),
            ("coupling_beta", |s| s.coupling_beta),
            ("noise_temp_k", |s| s.noise_temp_k),
            ("timestamp_s", |s| s.timestamp_s),
        ];
        for (name, get) in columns {
            let values: Vec<f64> = self.steps.iter().map(get).collect();
            group
                .new_dataset_builder()
                .with_data(&values)
                .create(name)
                .map_err(err(name))?;
        }
        let n_avg: Vec<u64> = self.steps.iter().map(|s| s.n_averages).collect();
        group
            .new_dataset_builder()
            .with_data(&n_avg)
            .create("n_averages")
            .map_err(err("n_averages"))?;
        self.file.close().map_err(err("close"))?;
        std::fs::rename(&self.tmp_path, &self.final_path).map_err(|e| RunFileError::Invalid {
            path: self.final_path.clone(),
            field: "file".into(),
            step: None,
            message: format!("cannot rename into place: {e}"),
        })
    }
}
