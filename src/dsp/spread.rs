//! Null spread of a linear filter applied to baseline-removed noise.
//!
//! A filter that sums `line[k] * delta[j + k]` over residuals delta = x - h * x (h the
//! Savitzky-Golay smoothing kernel, * convolution, x unit-variance noise) sees the noise
//! through the effective kernel g = line - h * line (h is symmetric). With the noise power of
//! bins d apart correlated by rho_d (rho_0 = 1), the filter output's variance is
//! sum_jk g_j g_k rho_|j-k| = A_g(0) + 2 sum_d rho_d A_g(d), A_g the autocorrelation of g.
//! Valid where the weights vary slowly across the kernel.

/// Spread of the filter `line` applied to residuals of unit-variance noise after the
/// smoothing kernel `h` (none: no baseline removed), relative to ||line||, for bins whose
/// noise powers d = 1, 2, ... bins apart correlate by `bin_correlation[d - 1]` (empty:
/// independent bins). With independent bins and no baseline it is exactly 1; with
/// `line = [1.0]` it is the residual spread of one bin, sqrt(1 - h_0) for independent bins
/// and a least-squares kernel.
pub fn filtered_noise_spread(line: &[f64], h: Option<&[f64]>, bin_correlation: &[f64]) -> f64 {
    if h.is_none() && bin_correlation.is_empty() {
        return 1.0;
    }
    let g = match h {
        None => line.to_vec(),
        Some(h) => {
            let half = h.len() / 2;
            let mut g = vec![0.0; line.len() + h.len() - 1];
            for (i, &l) in line.iter().enumerate() {
                g[i + half] += l;
                for (j, &hj) in h.iter().enumerate() {
                    g[i + j] -= hj * l;
                }
            }
            g
        }
    };
    let lagged = |d: usize| -> f64 { g.iter().zip(&g[d.min(g.len())..]).map(|(a, b)| a * b).sum() };
    let variance = lagged(0) + 2.0 * bin_correlation.iter().enumerate().map(|(i, rho)| rho * lagged(i + 1)).sum::<f64>();
    let norm2: f64 = line.iter().map(|l| l * l).sum();
    (variance.max(0.0) / norm2).sqrt()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::dsp::savgol::SavitzkyGolay;

    /// Independent bins: the variance of a sum of unit-variance terms is the sum of the
    /// squared weights (Bienayme's identity), so without a baseline the spread is 1.
    #[test]
    fn independent_bins_without_baseline_give_one() {
        assert_eq!(filtered_noise_spread(&[0.2, 0.5, 0.3], None, &[]), 1.0);
    }

    /// Var(sum_k a_k x_k) = sum_jk a_j a_k Cov(x_j, x_k) (the variance of a linear
    /// combination). Checked against the sum written out for a three-tap filter on bins
    /// correlated by 0.4 at one bin and 0.1 at two.
    #[test]
    fn correlated_bins_without_baseline_follow_the_covariance_sum() {
        let (a, rho) = ([0.2, 0.5, 0.3], [0.4, 0.1]);
        let cov = |j: usize, k: usize| match j.abs_diff(k) {
            0 => 1.0,
            d => rho[d - 1],
        };
        let mut variance = 0.0;
        for j in 0..3 {
            for k in 0..3 {
                variance += a[j] * a[k] * cov(j, k);
            }
        }
        let expected = (variance / 0.38f64).sqrt();
        assert!((filtered_noise_spread(&a, None, &rho) - expected).abs() < 1e-15);
    }

    /// A least-squares smoother is a projection: sum_k h_k^2 = h_0, so one bin's residual
    /// spread is sqrt(1 - h_0) for independent bins (Savitzky & Golay 1964, the fit's hat
    /// matrix).
    #[test]
    fn one_bin_residual_is_sqrt_one_minus_h0() {
        let sg = SavitzkyGolay::new(31, 4).unwrap();
        let h = sg.coefficients();
        let h0 = h[h.len() / 2];
        assert!((filtered_noise_spread(&[1.0], Some(h), &[]) - (1.0 - h0).sqrt()).abs() < 1e-12);
    }
}
