pub mod constants;
pub mod lineshape;
pub mod signal;
pub mod units;
