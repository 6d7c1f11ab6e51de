pub mod savgol;
