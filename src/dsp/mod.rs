//! Numerical kernels: overlap-save FFT correlation with a fixed real kernel, the
//! Savitzky-Golay smoother built on it, and the null spread of a filter after it.

pub mod correlate;
pub mod savgol;
pub mod spread;
