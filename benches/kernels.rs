//! Kernel timings: the planned Savitzky-Golay fit of one 32768-bin step (window 401, order 4),
//! the same by direct convolution, and the lineshape filter's FFT correlation against its
//! direct sum. Run: cargo bench --bench kernels

use axsift::dsp::correlate::{CorrelationScratch, Correlator};
use axsift::dsp::savgol::{SavitzkyGolay, SmoothingScratch};
use axsift::physics::lineshape::HaloModel;
use criterion::{Criterion, Throughput, criterion_group, criterion_main};
use std::hint::black_box;

const N_BINS: usize = 32_768;

fn input(n: usize) -> Vec<f64> {
    (0..n).map(|k| 1.0 + 0.01 * ((k as f64 * 0.618_034).fract() - 0.5)).collect()
}

fn smoothing(c: &mut Criterion) {
    let sg = SavitzkyGolay::new(401, 4).unwrap();
    let plan = sg.plan(N_BINS).unwrap();
    let x = input(N_BINS);
    let mut out = vec![0.0; N_BINS];
    let mut scratch: SmoothingScratch = SmoothingScratch::default();
    let mut g = c.benchmark_group("savgol_w401_d4_32768");
    g.throughput(Throughput::Elements(N_BINS as u64));
    g.bench_function("planned_fft", |b| b.iter(|| plan.smooth_with(black_box(&x), &mut out, &mut scratch).unwrap()));
    let h = sg.coefficients();
    g.bench_function("direct_interior", |b| {
        b.iter(|| {
            for (p, o) in out.iter_mut().enumerate().take(N_BINS - 400).skip(200) {
                *o = h.iter().zip(&x[p - 200..]).map(|(a, y)| a * y).sum();
            }
        })
    });
    g.finish();
}

fn lineshape(c: &mut Criterion) {
    let kernel = HaloModel::default().bin_fractions(5.2e9, 100.0, 1e-3);
    let corr = Correlator::new(&kernel);
    let n = 1 << 16;
    let x = input(n);
    let mut out = vec![0.0; n];
    let mut scratch: CorrelationScratch = CorrelationScratch::default();
    let mut g = c.benchmark_group(format!("lineshape_k{}_65536", kernel.len()));
    g.throughput(Throughput::Elements(n as u64));
    g.bench_function("fft", |b| b.iter(|| corr.correlate_with(black_box(&x), &mut out, &mut scratch)));
    g.bench_function("direct", |b| {
        b.iter(|| {
            for (j, o) in out.iter_mut().enumerate() {
                *o = kernel.iter().zip(&x[j..]).map(|(l, y)| l * y).sum();
            }
        })
    });
    g.finish();
}

criterion_group!(benches, smoothing, lineshape);
criterion_main!(benches);
