//! Numerical kernels: overlap-save FFT correlation with a fixed real kernel, and the
//! Savitzky-Golay smoother built on it.

pub mod correlate;
pub mod savgol;
