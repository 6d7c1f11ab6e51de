//! Per-step stage and accumulation timings on synthetic 32768-bin steps (the scale of the
//! whole-reduction benchmark): ingest, baseline (gain flattening, Savitzky-Golay fit window
//! 401 order 4, residual, spread check), rescale (into the standardised form), and the two
//! accumulations a chunk of steps goes through (combination onto the RF grid, the night's IF
//! profile).
//! Run: cargo bench --bench stages

use axsift::config::{BuildContext, Built, StageConfig};
use axsift::runfile::{RunHeader, StepMeta};
use axsift::stage::baseline::BaselineConfig;
use axsift::stage::combine::CombineConfig;
use axsift::stage::ingest::IngestConfig;
use axsift::stage::rescale::{Reference, RescaleConfig};
use axsift::stage::{NightInfo, Step, StepStage, Verdict};
use axsift::state::IfProfile;
use criterion::{BatchSize, Criterion, Throughput, criterion_group, criterion_main};
use rand::SeedableRng;
use rand::rngs::StdRng;
use rand_distr::{Distribution, StandardNormal};

const N_BINS: usize = 32_768;
/// Steps in one accumulation batch, as a chunk of the reduction on 2 cores (2 per thread).
const BATCH_STEPS: usize = 4;
/// LO move per step, bins (the demo scenario's).
const STEP_BINS: usize = 200;
const START_HZ: f64 = 5.2e9;
const BIN_HZ: f64 = 100.0;

fn night() -> NightInfo {
    let header = RunHeader {
        bin_width_hz: BIN_HZ,
        magnet_field_t: 8.0,
        cavity_volume_m3: 0.02,
        form_factor: 0.45,
        run_label: "bench".into(),
        bin_correlation: Vec::new(),
    };
    let span = (START_HZ, START_HZ + ((BATCH_STEPS - 1) * STEP_BINS + N_BINS - 1) as f64 * BIN_HZ);
    NightInfo { bin_width_hz: BIN_HZ, n_bins: N_BINS, rf_span_hz: span, headers: vec![header], bin_correlation: Vec::new() }
}

/// A raw step: unit power with a 5 % ripple and radiometer noise of 20000 averages.
fn raw_step(i: usize, rng: &mut StdRng) -> Step {
    let start_freq_hz = START_HZ + (i * STEP_BINS) as f64 * BIN_HZ;
    let meta = StepMeta {
        start_freq_hz,
        cavity_freq_hz: start_freq_hz + (N_BINS / 2) as f64 * BIN_HZ,
        loaded_q: 5e4,
        coupling_beta: 2.0,
        noise_temp_k: 0.6,
        n_averages: 20_000,
        timestamp_s: 1e9 + i as f64,
    };
    let noise = 1.0 / 20_000f64.sqrt();
    let values = (0..N_BINS)
        .map(|k| {
            let z: f64 = StandardNormal.sample(rng);
            (1.0 + 0.05 * (k as f64 / 1500.0).sin()) * (1.0 + noise * z)
        })
        .collect();
    Step { index: i, file: 0, index_in_file: i, meta, values, standard: Default::default(), no_data: Default::default() }
}

fn step_stage(config: &dyn StageConfig, night: &NightInfo) -> Box<dyn StepStage> {
    match config.build(night, &BuildContext { baseline_kernel: None }).unwrap() {
        Built::Step(s) => s,
        _ => unreachable!("a per-step stage"),
    }
}

fn stages(c: &mut Criterion) {
    let night = night();
    let mut rng = StdRng::seed_from_u64(7);
    let raw: Vec<Step> = (0..BATCH_STEPS).map(|i| raw_step(i, &mut rng)).collect();
    let ingest = step_stage(
        &IngestConfig { noise_temp_k_range: [0.05, 20.0], loaded_q_range: [1e3, 1e6], coupling_beta_range: [0.1, 10.0], max_no_data_fraction: 0.5 },
        &night,
    );
    let mut baseline = step_stage(&BaselineConfig { window_bins: 401, order: 4, max_spread_deviation: 0.2 }, &night);
    let rescale = step_stage(&RescaleConfig { reference: Reference::Model("ksvz".into()), dm_density_gev_per_cm3: 0.45 }, &night);
    baseline.survey_all(&raw.iter().collect::<Vec<_>>());
    baseline.finish_survey().unwrap();
    let flat: Vec<Step> = raw
        .iter()
        .map(|s| {
            let mut s = s.clone();
            assert_eq!(baseline.apply(&mut s, &night), Verdict::Keep);
            s
        })
        .collect();

    let mut g = c.benchmark_group("step_32768");
    g.throughput(Throughput::Elements(N_BINS as u64));
    let mut step = raw[0].clone();
    g.bench_function("ingest", |b| {
        b.iter_batched_ref(|| raw[0].clone(), |s| ingest.apply(s, &night), BatchSize::SmallInput);
    });
    g.bench_function("baseline", |b| {
        b.iter(|| {
            step.values.clone_from(&raw[0].values);
            baseline.apply(&mut step, &night)
        })
    });
    g.bench_function("rescale", |b| {
        b.iter(|| {
            step.values.clone_from(&flat[0].values);
            rescale.apply(&mut step, &night)
        })
    });
    g.bench_function("copy_only", |b| b.iter(|| step.values.clone_from(&flat[0].values)));
    g.finish();

    let rescaled: Vec<Step> = flat
        .iter()
        .map(|s| {
            let mut s = s.clone();
            rescale.apply(&mut s, &night);
            s
        })
        .collect();
    let batch: Vec<&Step> = rescaled.iter().collect();
    let mut g = c.benchmark_group(format!("accumulate_{BATCH_STEPS}x{N_BINS}"));
    g.throughput(Throughput::Elements((BATCH_STEPS * N_BINS) as u64));
    let combine = CombineConfig { max_misalignment_bins: 1e-3 };
    let mut combiner = match combine.build(&night, &BuildContext { baseline_kernel: None }).unwrap() {
        Built::Combine(c) => c,
        _ => unreachable!("a combining stage"),
    };
    g.bench_function("combine", |b| b.iter(|| combiner.add_all(&batch).unwrap()));
    let mut profile = IfProfile::new(&night);
    g.bench_function("if_profile", |b| b.iter(|| profile.add_all(&batch)));
    g.finish();
}

criterion_group! {
    name = benches;
    config = Criterion::default().sample_size(30).measurement_time(std::time::Duration::from_secs(3)).warm_up_time(std::time::Duration::from_secs(1));
    targets = stages
}
criterion_main!(benches);
