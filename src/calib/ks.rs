//! The one-sample Kolmogorov-Smirnov test against the unit normal.
//!
//! D = sup |F_n(x) - Phi(x)| and the asymptotic p-value Q(lambda) = 2 sum_{k>=1} (-1)^(k-1)
//! exp(-2 k^2 lambda^2) with lambda = (sqrt(n) + 0.12 + 0.11 / sqrt(n)) D (Kolmogorov 1933;
//! the small-n correction of Stephens, J. R. Stat. Soc. B 32, 115 (1970)). The samples must be
//! independent: callers thin correlated spectra first.

use statrs::distribution::{ContinuousCDF, Normal};

/// Result of a KS test.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct KsResult {
    /// Number of samples.
    pub n: usize,
    /// The statistic D.
    pub statistic: f64,
    /// Asymptotic p-value.
    pub p_value: f64,
}

/// Tests `samples` (finite values only are used) against N(0, 1).
pub fn ks_unit_normal(samples: &[f64]) -> KsResult {
    let mut x: Vec<f64> = samples.iter().copied().filter(|v| v.is_finite()).collect();
    x.sort_by(f64::total_cmp);
    let n = x.len();
    let normal = Normal::standard();
    let statistic = x.iter().enumerate().fold(0.0f64, |d, (i, &v)| {
        let f = normal.cdf(v);
        d.max(f - i as f64 / n as f64).max((i + 1) as f64 / n as f64 - f)
    });
    let root_n = (n as f64).sqrt();
    KsResult { n, statistic, p_value: kolmogorov_q((root_n + 0.12 + 0.11 / root_n) * statistic) }
}

/// The Kolmogorov survival function Q(lambda) (1 at lambda = 0).
pub fn kolmogorov_q(lambda: f64) -> f64 {
    if lambda < 0.2 {
        return 1.0;
    }
    let mut sum = 0.0;
    for k in 1..=100 {
        let term = (-2.0 * (k * k) as f64 * lambda * lambda).exp();
        sum += if k % 2 == 1 { term } else { -term };
        if term < 1e-12 {
            break;
        }
    }
    (2.0 * sum).clamp(0.0, 1.0)
}
