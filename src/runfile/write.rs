//! Writing run files (used by the simulator and by tests).

use super::{FORMAT_NAME, FORMAT_VERSION, RunFileError, RunHeader, StepMeta};
use hdf5::types::{FixedUnicode, TypeDescriptor};
use ndarray::ArrayView1;
use std::path::{Path, PathBuf};
use std::str::FromStr;

/// Longest string attribute the writer stores, in bytes of UTF-8 (the reader accepts the same).
const MAX_TEXT_BYTES: usize = super::attrs::MAX_FIXED_STRING_BYTES;

/// Writes `value` as a scalar fixed-length UTF-8 string attribute sized to the text. Fixed-length
/// strings live in the attribute's own (checksummed) object header; a variable-length string
/// would live in the global heap, which carries no checksum and which the HDF5 library follows
/// without checks when the file is corrupted.
fn write_text(object: &hdf5::Location, name: &str, value: &str) -> hdf5::Result<()> {
    let buffer = FixedUnicode::<MAX_TEXT_BYTES>::from_str(value).map_err(|e| hdf5::Error::from(e.to_string()))?;
    object.new_attr_builder().empty_as(TypeDescriptor::FixedUnicode(value.len().max(1))).create(name)?.write_scalar(&buffer)
}

/// Gives a dataset the `units` and `description` attributes every axsift output carries (the
/// reader does not require them: files from an acquisition system may lack them).
fn describe(ds: &hdf5::Dataset, units: &str, description: &str) -> hdf5::Result<()> {
    write_text(ds, "units", units)?;
    write_text(ds, "description", description)
}

/// How a column of the `steps` group is taken from the step metadata.
enum Column {
    Float(fn(&StepMeta) -> f64),
    Count(fn(&StepMeta) -> u64),
}

/// The columns of the `steps` group: name, values, units, description.
const STEP_COLUMNS: [(&str, Column, &str, &str); 7] = [
    ("start_freq_hz", Column::Float(|s| s.start_freq_hz), "Hz", "RF frequency of the centre of the step's bin 0"),
    ("cavity_freq_hz", Column::Float(|s| s.cavity_freq_hz), "Hz", "resonance frequency of the cavity mode during the step"),
    ("loaded_q", Column::Float(|s| s.loaded_q), "1", "loaded quality factor Q_L of the cavity mode"),
    ("coupling_beta", Column::Float(|s| s.coupling_beta), "1", "antenna coupling beta of the cavity mode (1 = critical coupling)"),
    ("noise_temp_k", Column::Float(|s| s.noise_temp_k), "K", "system noise temperature referred to the cavity output"),
    ("timestamp_s", Column::Float(|s| s.timestamp_s), "s", "start of the step, Unix time"),
    ("n_averages", Column::Count(|s| s.n_averages), "1", "number of power spectra averaged into the step's spectrum"),
];

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
    pub fn create(path: &Path, header: &RunHeader, n_steps: usize, n_bins: usize) -> Result<Self, RunFileError> {
        let tmp_path = path.with_extension("h5.tmp");
        let err = |what: &str| {
            let (p, w) = (path.to_path_buf(), what.to_string());
            move |source| RunFileError::Hdf5 { path: p, what: w, source }
        };
        for (field, value) in [("format", FORMAT_NAME), ("run_label", header.run_label.as_str())] {
            let problem = if value.len() > MAX_TEXT_BYTES {
                format!("is {} bytes long, at most {MAX_TEXT_BYTES} are stored", value.len())
            } else if value.contains('\0') {
                format!("{value:?} contains a NUL character, which a stored string cannot hold")
            } else {
                continue;
            };
            return Err(RunFileError::Invalid { path: path.to_path_buf(), field: field.into(), step: None, message: problem });
        }
        // The 1.10 file format: superblock, object headers (with the attributes) and the chunk
        // index of `spectra` carry checksums, so a damaged file is refused instead of parsed.
        let file = hdf5::File::with_options().with_fapl(|p| p.libver_v110()).create(&tmp_path).map_err(err("create"))?;
        write_text(&file, "format", FORMAT_NAME).map_err(err("format"))?;
        file.new_attr::<u32>().create("format_version").and_then(|a| a.write_scalar(&FORMAT_VERSION)).map_err(err("format_version"))?;
        for (name, value) in [
            ("bin_width_hz", header.bin_width_hz),
            ("magnet_field_t", header.magnet_field_t),
            ("cavity_volume_m3", header.cavity_volume_m3),
            ("form_factor", header.form_factor),
        ] {
            file.new_attr::<f64>().create(name).and_then(|a| a.write_scalar(&value)).map_err(err(name))?;
        }
        write_text(&file, "run_label", &header.run_label).map_err(err("run_label"))?;
        if !header.bin_correlation.is_empty() {
            file.new_attr::<f64>()
                .shape(header.bin_correlation.len())
                .create("bin_correlation")
                .and_then(|a| a.write_raw(&header.bin_correlation))
                .map_err(err("bin_correlation"))?;
        }
        let spectra = file.new_dataset::<f32>().shape((n_steps, n_bins)).chunk((1, n_bins)).create("spectra").map_err(err("spectra"))?;
        describe(
            &spectra,
            "arbitrary (linear power per bin, receiver gain included)",
            "raw averaged power spectrum of each tuning step: row = step, column = bin, bin k at start_freq_hz + k * bin_width_hz",
        )
        .map_err(err("spectra"))?;
        Ok(Self { final_path: path.to_path_buf(), tmp_path, file, spectra, steps: Vec::with_capacity(n_steps), n_steps })
    }

    /// Appends the next step: its metadata and raw power (W per bin, any gain).
    pub fn push_step(&mut self, meta: StepMeta, power: ArrayView1<f32>) -> Result<(), RunFileError> {
        let row = self.steps.len();
        self.spectra.write_slice(&power, (row, ..)).map_err(|source| RunFileError::Hdf5 {
            path: self.final_path.clone(),
            what: format!("writing step {row}"),
            source,
        })?;
        self.steps.push(meta);
        Ok(())
    }

    /// Gives up: closes and removes the temporary file, leaving any file at the final path as
    /// it was.
    pub fn abandon(self) {
        let tmp_path = self.tmp_path.clone();
        drop(self);
        let _ = std::fs::remove_file(tmp_path);
    }

    /// Writes the `steps` group and renames the file into place.
    pub fn finish(self) -> Result<(), RunFileError> {
        let err = |what: &str| {
            let (p, w) = (self.final_path.clone(), what.to_string());
            move |source| RunFileError::Hdf5 { path: p, what: w, source }
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
        for (name, column, units, description) in STEP_COLUMNS {
            let builder = group.new_dataset_builder();
            let ds = match column {
                Column::Float(get) => builder.with_data(&self.steps.iter().map(get).collect::<Vec<f64>>()).create(name),
                Column::Count(get) => builder.with_data(&self.steps.iter().map(get).collect::<Vec<u64>>()).create(name),
            }
            .map_err(err(name))?;
            describe(&ds, units, description).map_err(err(name))?;
        }
        close_and_rename(self.file, &self.tmp_path, &self.final_path)
    }
}

/// Closes a file written at `tmp_path` and renames it to `final_path`.
pub(crate) fn close_and_rename(file: hdf5::File, tmp_path: &Path, final_path: &Path) -> Result<(), RunFileError> {
    file.close().map_err(|source| RunFileError::Hdf5 { path: final_path.to_path_buf(), what: "close".into(), source })?;
    std::fs::rename(tmp_path, final_path).map_err(|e| RunFileError::Invalid {
        path: final_path.to_path_buf(),
        field: "file".into(),
        step: None,
        message: format!("cannot rename into place: {e}"),
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::runfile::RunReader;

    fn header(label: &str) -> RunHeader {
        RunHeader { bin_width_hz: 100.0, magnet_field_t: 8.0, cavity_volume_m3: 0.02, form_factor: 0.45, run_label: label.into(), bin_correlation: Vec::new() }
    }

    fn write(path: &Path, label: &str) -> Result<(), RunFileError> {
        let mut w = RunWriter::create(path, &header(label), 2, 16)?;
        for i in 0..2 {
            let meta = StepMeta {
                start_freq_hz: 5.0e9 + 1600.0 * i as f64,
                cavity_freq_hz: 5.0e9 + 800.0,
                loaded_q: 3.0e4,
                coupling_beta: 1.0,
                noise_temp_k: 1.5,
                n_averages: 1000,
                timestamp_s: 1.0e9 + 100.0 * i as f64,
            };
            w.push_step(meta, ndarray::Array1::from_elem(16, 1.0e-20f32).view())?;
        }
        w.finish()
    }

    #[test]
    fn strings_are_fixed_length_in_a_checksummed_format() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("fixed.h5");
        write(&path, "night 2, cavity ½ tuned").unwrap();
        let file = hdf5::File::open(&path).unwrap();
        let kind = |name: &str| file.attr(name).unwrap().dtype().unwrap().to_descriptor().unwrap();
        assert_eq!(kind("format"), TypeDescriptor::FixedUnicode(FORMAT_NAME.len()));
        assert_eq!(kind("run_label"), TypeDescriptor::FixedUnicode("night 2, cavity ½ tuned".len()));
        drop(file);
        // Byte 8 is the superblock version: 3 is the 1.10 format, whose metadata has checksums.
        assert_eq!(std::fs::read(&path).unwrap()[8], 3);
        let r = RunReader::open(&path).unwrap();
        assert_eq!(r.header().run_label, "night 2, cavity ½ tuned");
    }

    #[test]
    fn every_dataset_carries_units_and_a_description() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("described.h5");
        write(&path, "described").unwrap();
        let file = hdf5::File::open(&path).unwrap();
        let text = |ds: &hdf5::Dataset, name: &str| -> String {
            let attr = ds.attr(name).unwrap_or_else(|e| panic!("{}: no `{name}`: {e}", ds.name()));
            match attr.dtype().unwrap().to_descriptor().unwrap() {
                TypeDescriptor::FixedUnicode(_) => attr.read_scalar::<FixedUnicode<MAX_TEXT_BYTES>>().unwrap().as_str().to_string(),
                other => panic!("{}: `{name}` is {other:?}", ds.name()),
            }
        };
        let mut datasets = vec![file.dataset("spectra").unwrap()];
        datasets.extend(file.group("steps").unwrap().datasets().unwrap());
        assert_eq!(datasets.len(), 1 + STEP_COLUMNS.len());
        for ds in &datasets {
            assert!(!text(ds, "units").is_empty() && !text(ds, "description").is_empty(), "{}", ds.name());
        }
        assert_eq!(text(&file.dataset("steps/noise_temp_k").unwrap(), "units"), "K");
    }

    #[test]
    fn empty_label_round_trips_and_unstorable_labels_are_refused() {
        let dir = tempfile::tempdir().unwrap();
        let empty = dir.path().join("empty.h5");
        write(&empty, "").unwrap();
        assert_eq!(RunReader::open(&empty).unwrap().header().run_label, "");
        let long = write(&dir.path().join("long.h5"), &"x".repeat(MAX_TEXT_BYTES + 1)).unwrap_err().to_string();
        assert!(long.contains("long.h5") && long.contains("`run_label`") && long.contains("4097 bytes"), "{long}");
        let nul = write(&dir.path().join("nul.h5"), "a\0b").unwrap_err().to_string();
        assert!(nul.contains("`run_label`") && nul.contains("NUL"), "{nul}");
        assert!(!dir.path().join("long.h5.tmp").exists() && !dir.path().join("long.h5").exists());
    }
}
