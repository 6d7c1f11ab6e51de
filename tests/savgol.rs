//! Tests of the Savitzky–Golay smoother against published tables, a direct
//! convolution, exact polynomial reproduction, and scipy reference output.

use axsift::dsp::savgol::{SavgolError, SavitzkyGolay, SmoothingPlan};

/// Savitzky & Golay, Anal. Chem. 36, 1627 (1964), Table I: convolution
/// integers and normalising factor for the smoothed centre value.
const TABLE_I: &[(usize, usize, &[f64], f64)] = &[
    (5, 2, &[-3.0, 12.0, 17.0, 12.0, -3.0], 35.0),
    (7, 2, &[-2.0, 3.0, 6.0, 7.0, 6.0, 3.0, -2.0], 21.0),
    (9, 3, &[-21.0, 14.0, 39.0, 54.0, 59.0, 54.0, 39.0, 14.0, -21.0], 231.0),
];

/// Minimal 64-bit linear congruential generator (Knuth's MMIX constants),
/// returning values uniform in [-1, 1).
struct Lcg(u64);

impl Lcg {
    fn next(&mut self) -> f64 {
        self.0 = self.0.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
        (self.0 >> 11) as f64 / (1u64 << 53) as f64 * 2.0 - 1.0
    }
}

fn max_abs(values: &[f64]) -> f64 {
    values.iter().fold(0.0, |m, v| m.max(v.abs()))
}

fn load(name: &str) -> Vec<f64> {
    let path = format!("{}/fixtures/{name}", env!("CARGO_MANIFEST_DIR"));
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{path}: {e}"));
    text.split_whitespace().map(|s| s.parse().unwrap_or_else(|e| panic!("{path}: {s:?}: {e}"))).collect()
}

#[test]
fn coefficients_match_savitzky_golay_1964_table_i() {
    for &(window, order, integers, norm) in TABLE_I {
        let sg = SavitzkyGolay::new(window, order).unwrap();
        let h = sg.coefficients();
        assert_eq!(h.len(), window);
        for (j, (&got, &num)) in h.iter().zip(integers).enumerate() {
            let want = num / norm;
            assert!((got - want).abs() <= 1e-12, "W={window} d={order} j={j}: {got} vs {want}");
        }
        let centre = integers[window / 2] / norm;
        assert!((sg.center_weight() - centre).abs() <= 1e-12);
    }
}

#[test]
fn center_weight_is_sum_of_squared_weights() {
    // Projector identity: the centre row r of a symmetric idempotent P has
    // r·r = P_cc, so the smoothed white-noise variance is h_0 σ².
    for (window, order) in [(5, 2), (31, 4), (301, 4), (101, 10)] {
        let sg = SavitzkyGolay::new(window, order).unwrap();
        let sum_sq: f64 = sg.coefficients().iter().map(|h| h * h).sum();
        assert!((sum_sq - sg.center_weight()).abs() <= 1e-13, "W={window} d={order}");
        let sum: f64 = sg.coefficients().iter().sum();
        assert!((sum - 1.0).abs() <= 1e-13);
    }
}

#[test]
fn fft_smoothing_equals_direct_convolution() {
    let (window, order, n) = (301, 4, 4096);
    let sg = SavitzkyGolay::new(window, order).unwrap();
    let mut rng = Lcg(0x5eed_1234_abcd_0001);
    let input: Vec<f64> = (0..n).map(|_| 10.0 + rng.next()).collect();
    let out = sg.smooth(&input).unwrap();

    let h = sg.coefficients();
    let half = window / 2;
    let scale = max_abs(&input);
    for p in half..n - half {
        let direct: f64 = (0..window).map(|j| h[j] * input[p - half + j]).sum();
        assert!((out[p] - direct).abs() <= 1e-12 * scale, "bin {p}: fft {} vs direct {direct}", out[p]);
    }
}

#[test]
fn polynomials_up_to_the_order_are_reproduced_including_edges() {
    let n = 1000;
    let mut rng = Lcg(42);
    for (window, order) in [(5, 2), (31, 4), (101, 4), (301, 4), (51, 7)] {
        let sg = SavitzkyGolay::new(window, order).unwrap();
        let plan = sg.plan(n).unwrap();
        for degree in 0..=order {
            let c: Vec<f64> = (0..=degree).map(|_| rng.next()).collect();
            let input: Vec<f64> = (0..n)
                .map(|i| {
                    let t = i as f64 / n as f64 * 2.0 - 1.0;
                    c.iter().rev().fold(0.0, |acc, &ck| acc * t + ck)
                })
                .collect();
            let mut out = vec![0.0; n];
            plan.smooth(&input, &mut out).unwrap();
            for (i, (a, b)) in out.iter().zip(&input).enumerate() {
                assert!((a - b).abs() <= 1e-9, "W={window} d={order} degree {degree} bin {i}: {a} vs {b}");
            }
        }
    }
}

#[test]
fn full_order_fit_is_the_identity() {
    // A degree W-1 polynomial interpolates all W samples, so nothing changes.
    let sg = SavitzkyGolay::new(21, 20).unwrap();
    for (j, &h) in sg.coefficients().iter().enumerate() {
        let want = if j == 10 { 1.0 } else { 0.0 };
        assert!((h - want).abs() <= 1e-10, "j={j}: {h}");
    }
    let mut rng = Lcg(7);
    let input: Vec<f64> = (0..64).map(|_| rng.next()).collect();
    let out = sg.smooth(&input).unwrap();
    for (a, b) in out.iter().zip(&input) {
        assert!((a - b).abs() <= 1e-10);
    }
}

/// Compares the smoother with a scipy fixture: the first and last half-window
/// (polynomial fits) to `edge_rel`, the rest (fixed-weight convolution) to
/// `interior_rel`, both relative to max|reference|.
fn check_scipy_fixture(window: usize, file: &str, edge_rel: f64, interior_rel: f64) {
    let input = load("savgol_input.txt");
    let reference = load(file);
    assert_eq!(input.len(), reference.len());
    let out = SavitzkyGolay::new(window, 4).unwrap().smooth(&input).unwrap();
    let scale = max_abs(&reference);
    let (half, n) = (window / 2, input.len());
    for (i, (a, b)) in out.iter().zip(&reference).enumerate() {
        let rel = if i < half || i >= n - half { edge_rel } else { interior_rel };
        assert!((a - b).abs() <= rel * scale, "bin {i}: {a} vs scipy {b}");
    }
}

/// scipy.signal.savgol_filter(x, 31, 4), mode='interp'; see fixtures/README_savgol.md.
#[test]
fn matches_scipy_savgol_filter_w31_d4() {
    check_scipy_fixture(31, "savgol_scipy_w31_d4.txt", 1e-10, 1e-10);
}

/// scipy.signal.savgol_filter(x, 101, 4), mode='interp'; see fixtures/README_savgol.md.
///
/// scipy's own interior weights for W = 101, d = 4 (`savgol_coeffs`, a
/// least-squares solve on integer abscissae) differ from the exact rational
/// least-squares weights by up to 2.8e-11 each, which `check_savgol.py` reports;
/// summed over 101 weights this moves its interior output by up to ~8e-10 of
/// the signal scale. The interior is therefore held to 2e-9 here, the edges
/// (where scipy fits the polynomial directly) to 1e-10.
#[test]
fn matches_scipy_savgol_filter_w101_d4() {
    check_scipy_fixture(101, "savgol_scipy_w101_d4.txt", 1e-10, 2e-9);
}

#[test]
fn invalid_parameters_are_rejected_with_named_values() {
    assert_eq!(SavitzkyGolay::new(1, 0).unwrap_err(), SavgolError::WindowTooShort { window: 1 });
    let even = SavitzkyGolay::new(30, 4).unwrap_err();
    assert_eq!(even, SavgolError::EvenWindow { window: 30 });
    assert!(even.to_string().contains("30"));
    let high = SavitzkyGolay::new(7, 7).unwrap_err();
    assert_eq!(high, SavgolError::OrderTooHigh { order: 7, window: 7 });
    assert!(high.to_string().contains("less than window_bins = 7"));

    let sg = SavitzkyGolay::new(31, 4).unwrap();
    assert_eq!(sg.smooth(&[0.0; 30]).unwrap_err(), SavgolError::InputTooShort { len: 30, window: 31 });
    let plan = sg.plan(100).unwrap();
    let mut out = vec![0.0; 100];
    assert!(matches!(plan.smooth(&[0.0; 99], &mut out), Err(SavgolError::LengthMismatch { buffer: "input", len: 99, expected: 100 })));
    // The shortest valid input is exactly one window.
    let one_window = sg.smooth(&[2.5; 31]).unwrap();
    assert!(one_window.iter().all(|v| (v - 2.5).abs() <= 1e-12));
}

#[test]
fn plan_is_send_and_sync() {
    fn assert_send_sync<T: Send + Sync>() {}
    assert_send_sync::<SmoothingPlan>();
    assert_send_sync::<SavitzkyGolay>();
}
