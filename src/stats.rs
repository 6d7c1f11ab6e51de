//! Small statistics helpers shared by the outputs and the calibration.

/// Mean and standard deviation of the finite values.
pub fn mean_std(x: &[f64]) -> (f64, f64) {
    let v: Vec<f64> = x.iter().copied().filter(|v| v.is_finite()).collect();
    let n = v.len().max(1) as f64;
    let mean = v.iter().sum::<f64>() / n;
    let var = v.iter().map(|x| (x - mean) * (x - mean)).sum::<f64>() / n;
    (mean, var.sqrt())
}
