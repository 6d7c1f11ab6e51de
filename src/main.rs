//! The axsift command line: a thin layer over the library.

use anyhow::Context;
use axsift::{calib, config, output, pipeline, progress, runfile, sim};
use clap::{Parser, Subcommand};
use std::path::{Path, PathBuf};
use std::process::ExitCode;

/// The demo's scenario and pipeline, built into the binary so `demo` needs no files.
const DEMO_SCENARIO: &str = include_str!("../fixtures/demo_night.toml");
const DEFAULT_PIPELINE: &str = include_str!("../pipeline.toml");

#[derive(Parser)]
#[command(
    name = "axsift",
    version,
    about = "Nightly reduction of axion haloscope data",
    after_help = "Exit status: 0 success, 1 a failure while running, 2 bad input (config, scenario, run file or state).\nLog colours only on a terminal; NO_COLOR=1 turns them off there too. RUST_LOG overrides -v/--quiet."
)]
struct Cli {
    /// More log detail (-v debug, -vv trace).
    #[arg(short, long, action = clap::ArgAction::Count, global = true)]
    verbose: u8,
    /// Only warnings and errors; no progress bar.
    #[arg(short, long, global = true)]
    quiet: bool,
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Simulate a night of an invented haloscope into a run file.
    /// Example: axsift simulate --scenario fixtures/demo_night.toml --out night.h5
    Simulate {
        /// Scenario TOML (facility, scan, interference, injected axions).
        #[arg(long)]
        scenario: PathBuf,
        /// Run file to write.
        #[arg(long)]
        out: PathBuf,
        /// Write the night as an IQ capture (int16, one segment of n_bins samples per average)
        /// instead of a run file: `axsift average --fft-bins <n_bins>` turns it into spectra.
        #[arg(long)]
        capture: bool,
    },
    /// Average IQ captures into a run file of power spectra: per step, the mean periodogram
    /// of windowed segments (Welch), bins in increasing frequency.
    /// Example: axsift average --fft-bins 4096 --out night.h5 capture.h5
    Average {
        /// Samples per segment, and bins per spectrum before --keep-fraction (even).
        #[arg(long)]
        fft_bins: usize,
        /// Window of each segment.
        #[arg(long, value_enum, default_value = "hann")]
        window: axsift::iq::welch::Window,
        /// Fraction of each segment shared with the next, 0 <= overlap < 1; n_averages then
        /// holds the effective number of independent averages (Welch 1967).
        #[arg(long, default_value_t = 0.0)]
        overlap: f64,
        /// Central fraction of the bins kept (0 < f <= 1), dropping the anti-alias roll-off.
        #[arg(long, default_value_t = 1.0)]
        keep_fraction: f64,
        /// Run file to write.
        #[arg(long)]
        out: PathBuf,
        /// IQ captures (format "axsift-iq"), in acquisition order.
        #[arg(required = true)]
        captures: Vec<PathBuf>,
    },
    /// Reduce run files into the grand spectrum and rescan candidates.
    /// Example: axsift reduce --config pipeline.toml --out results/ night.h5
    Reduce {
        /// Pipeline TOML.
        #[arg(long)]
        config: PathBuf,
        /// Output folder (created if needed; earlier results are replaced only on success).
        #[arg(long)]
        out: PathBuf,
        /// Calibration file from `axsift calibrate` made with the same pipeline: adds eta,
        /// implied couplings and the measured efficiency to the outputs.
        #[arg(long)]
        calibration: Option<PathBuf>,
        /// Also write the morning report, report.html (one self-contained page).
        #[arg(long)]
        report: bool,
        /// Analysis state folder: add this night to all earlier ones (created if new); the
        /// outputs then describe every night so far.
        #[arg(long)]
        state: Option<PathBuf>,
        /// Run files of the night, in acquisition order.
        #[arg(required = true)]
        runs: Vec<PathBuf>,
    },
    /// Measure the chain's efficiency by injecting synthetic axions into many realisations,
    /// either of a simulated night (--scenario) or of recorded run files.
    /// Example: axsift calibrate --config pipeline.toml --scenario fixtures/demo_night.toml --out calib/
    Calibrate {
        /// Pipeline TOML.
        #[arg(long)]
        config: PathBuf,
        /// Output folder for calibration.json, efficiency.csv and the efficiency plot.
        #[arg(long)]
        out: PathBuf,
        /// Scenario TOML: simulate fresh noise for every realisation.
        #[arg(long, conflicts_with = "runs")]
        scenario: Option<PathBuf>,
        /// Seed of the injected frequencies (and of the simulated noise).
        #[arg(long, default_value_t = 1)]
        seed: u64,
        /// TOML with the campaign size and seed (fields of calibration.json's `spec`); default
        /// the standard campaign with --seed.
        #[arg(long)]
        spec: Option<PathBuf>,
        /// Recorded run files to inject into (the same noise every realisation).
        runs: Vec<PathBuf>,
    },
    /// Forecast the reach and scan rate of a planned run through this pipeline.
    /// Example: axsift forecast --config pipeline.toml --run-plan fixtures/demo_run_plan.toml --calibration calib/calibration.json --out forecast/
    Forecast {
        /// Pipeline TOML (its filter, baseline and threshold are used).
        #[arg(long)]
        config: PathBuf,
        /// Planned run parameters (TOML).
        #[arg(long)]
        run_plan: PathBuf,
        /// Calibration made with the same pipeline (for eta).
        #[arg(long)]
        calibration: PathBuf,
        /// Output folder for forecast.csv and the reach plot.
        #[arg(long)]
        out: PathBuf,
    },
    /// Simulate an invented night and reduce it with the default pipeline.
    /// Example: axsift demo --out out/demo
    Demo {
        /// Output folder for the simulated run file and the results.
        #[arg(long, default_value = "out/demo")]
        out: PathBuf,
    },
    /// Rebuild the morning report (report.html) of an output folder written by `reduce`.
    /// Example: axsift report results/ --calibration calib/calibration.json
    Report {
        /// Output folder of `reduce` (holding summary.json and results.h5).
        dir: PathBuf,
        /// The calibration that reduction used: adds the full calibration section.
        #[arg(long)]
        calibration: Option<PathBuf>,
        /// The analysis state folder that reduction updated: adds the section across nights.
        #[arg(long)]
        state: Option<PathBuf>,
    },
    /// Print the resolved pipeline with every default filled in.
    /// Example: axsift plan --config pipeline.toml
    Plan {
        /// Pipeline TOML.
        #[arg(long)]
        config: PathBuf,
    },
    /// Print an analysis state: nights and files, coverage, candidates by class (new,
    /// persists, cleared, interference), the IF lines of each night and the limit range.
    /// Example: axsift status --state state/ --json
    Status {
        /// Analysis state folder.
        #[arg(long)]
        state: PathBuf,
        /// Print machine-readable JSON instead of text.
        #[arg(long)]
        json: bool,
    },
    /// Write the whole campaign's grand spectrum of an analysis state to one HDF5 file,
    /// computed block by block (the output folder of a nightly update holds only the span
    /// that night changed).
    /// Example: axsift export --config pipeline.toml --state state/ --out campaign.h5
    Export {
        /// The state's pipeline TOML.
        #[arg(long)]
        config: PathBuf,
        /// Analysis state folder.
        #[arg(long)]
        state: PathBuf,
        /// HDF5 file to write (replaced only when complete).
        #[arg(long)]
        out: PathBuf,
    },
    /// Validate a run file and summarise it. Example: axsift inspect night.h5
    Inspect {
        /// The run file.
        file: PathBuf,
        /// Print machine-readable JSON instead of text.
        #[arg(long)]
        json: bool,
    },
    /// Divide a reprocessing (by nights) or a calibration campaign (by realisation ranges)
    /// into shards for a cluster; writes WORK/plan.json with the resources per shard.
    /// Example: axsift shard-plan --config pipeline.toml --work work/ --shards 3 --night a.h5 --night b1.h5,b2.h5
    /// Example: axsift shard-plan --config pipeline.toml --work camp/ --shards 8 --campaign --scenario fixtures/demo_night.toml
    ShardPlan {
        /// Pipeline TOML (its text is copied into the plan).
        #[arg(long)]
        config: PathBuf,
        /// Work folder for the plan, the shard files and the Slurm scripts (must be new).
        #[arg(long)]
        work: PathBuf,
        /// Largest number of shards (a reduction has at most one per night).
        #[arg(long)]
        shards: usize,
        /// Cores per shard.
        #[arg(long, default_value_t = 2)]
        cpus: usize,
        /// One night's run files, comma-separated in acquisition order; repeat per night.
        #[arg(long = "night", conflicts_with = "campaign")]
        nights: Vec<String>,
        /// Plan a calibration campaign instead of a reduction.
        #[arg(long)]
        campaign: bool,
        /// Campaign: scenario TOML to simulate for every realisation.
        #[arg(long, requires = "campaign", conflicts_with = "runs")]
        scenario: Option<PathBuf>,
        /// Campaign: seed of the injections (and of the simulated noise).
        #[arg(long, default_value_t = 1, requires = "campaign")]
        seed: u64,
        /// Campaign: TOML with the campaign size (fields of the calibration's `spec`);
        /// default the size `calibrate` runs.
        #[arg(long, requires = "campaign")]
        spec: Option<PathBuf>,
        /// Campaign: recorded run files to inject into.
        #[arg(requires = "campaign")]
        runs: Vec<PathBuf>,
    },
    /// Run one shard of a plan; the index comes from --index or SLURM_ARRAY_TASK_ID.
    /// Example: axsift shard-run --plan work/plan.json --index 2
    ShardRun {
        /// The plan file.
        #[arg(long)]
        plan: PathBuf,
        /// Shard index (default: the Slurm array task id).
        #[arg(long)]
        index: Option<usize>,
    },
    /// Merge the finished shards of a plan: a reduction into a new state folder and an output
    /// folder, a campaign into a calibration folder.
    /// Example: axsift shard-merge --plan work/plan.json --out results/ --state state/
    ShardMerge {
        #[command(flatten)]
        target: MergeTarget,
    },
    /// Write the Slurm job-array and merge scripts of a plan (and with --submit, submit them).
    /// Example: axsift shard-slurm --plan work/plan.json --out results/ --state state/ --submit
    ShardSlurm {
        #[command(flatten)]
        target: MergeTarget,
        /// Slurm partition.
        #[arg(long)]
        partition: Option<String>,
        /// Submit with sbatch: the array(s), then the merge depending on them.
        #[arg(long)]
        submit: bool,
    },
}

/// What a shard merge reads and writes.
#[derive(clap::Args)]
struct MergeTarget {
    /// The plan file.
    #[arg(long)]
    plan: PathBuf,
    /// Output folder (the reduction's results or the calibration).
    #[arg(long)]
    out: PathBuf,
    /// Reduction: new analysis state folder.
    #[arg(long)]
    state: Option<PathBuf>,
    /// Reduction: calibration made with the same pipeline; adds the limits to the merged
    /// results, as `reduce --calibration` does.
    #[arg(long)]
    calibration: Option<PathBuf>,
}

/// Exit status: 0 success, 1 failure while running, 2 bad input (config, scenario, run file).
#[derive(Debug)]
enum Failure {
    BadInput(anyhow::Error),
    Run(anyhow::Error),
}

impl From<anyhow::Error> for Failure {
    fn from(e: anyhow::Error) -> Self {
        Failure::Run(e)
    }
}

fn main() -> ExitCode {
    restore_default_sigpipe();
    keep_freed_memory();
    let cli = Cli::parse();
    init_logging(cli.verbose, cli.quiet);
    let result = match cli.command {
        Command::Simulate { scenario, out, capture } => simulate(&scenario, &out, capture),
        Command::Average { fft_bins, window, overlap, keep_fraction, out, captures } => {
            average(&captures, &out, &axsift::iq::average::AverageOptions { fft_bins, window, overlap, keep_fraction }, cli.quiet)
        }
        Command::Reduce { config, out, calibration, state, runs, report } => read_text(&config)
            .and_then(|text| match &state {
                Some(state) => reduce_into_state(&text, &config.display().to_string(), &runs, calibration.as_deref(), state, &out, cli.quiet),
                None => reduce(&text, &config.display().to_string(), &runs, calibration.as_deref(), &out, cli.quiet),
            })
            .and_then(|()| if report { write_report(&out, calibration.as_deref(), state.as_deref(), cli.quiet) } else { Ok(()) }),
        Command::Status { state, json } => status(&state, json),
        Command::Export { config, state, out } => export(&config, &state, &out, cli.quiet),
        Command::Calibrate { config, out, scenario, seed, spec, runs } => {
            campaign_spec(spec.as_deref(), seed).and_then(|spec| calibrate(&config, &out, scenario.as_deref(), &spec, &runs, cli.quiet))
        }
        Command::Forecast { config, run_plan, calibration, out } => forecast(&config, &run_plan, &calibration, &out, cli.quiet),
        Command::Demo { out } => demo(&out, cli.quiet),
        Command::Report { dir, calibration, state } => write_report(&dir, calibration.as_deref(), state.as_deref(), cli.quiet),
        Command::Plan { config } => read_text(&config).and_then(|text| {
            let plan = config::load(&text, &config.display().to_string()).map_err(|e| Failure::BadInput(e.into()))?;
            print!("{}", plan.describe());
            Ok(())
        }),
        Command::Inspect { file, json } => inspect(&file, json),
        Command::ShardPlan { config, work, shards, cpus, nights, campaign, scenario, seed, spec, runs } => {
            shard_plan(&config, &work, shards, cpus, &nights, campaign.then_some((scenario.as_deref(), seed, spec.as_deref(), runs.as_slice())))
        }
        Command::ShardRun { plan, index } => shard_run(&plan, index, cli.quiet),
        Command::ShardMerge { target } => shard_merge(&target, cli.quiet),
        Command::ShardSlurm { target, partition, submit } => shard_slurm(&target, partition.as_deref(), submit),
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(Failure::BadInput(e)) => {
            eprintln!("error: {e:#}");
            ExitCode::from(2)
        }
        Err(Failure::Run(e)) => {
            eprintln!("error: {e:#}");
            ExitCode::from(1)
        }
    }
}

/// Output piped into `head` or a closed pager ends the process quietly, as Unix tools do,
/// instead of a panic at the next print (Rust ignores SIGPIPE by default).
fn restore_default_sigpipe() {
    #[cfg(unix)]
    // SAFETY: called first in `main`, before any thread exists; SIG_DFL is a valid disposition.
    unsafe {
        libc::signal(libc::SIGPIPE, libc::SIG_DFL);
    }
}

/// Buffers freed and allocated again chunk after chunk stay with the process: the reduction
/// allocates and frees a chunk's rows (about 0.5 MB on 2 cores, more with more threads) and
/// other buffers of up to a few MB, and with glibc's defaults each
/// would be a fresh mapping whose pages are faulted in and zeroed again (on virtual machines,
/// memory handed back to the host is slower still to touch again). Allocations below 4 MB come
/// from the heap, which keeps up to 64 MB free before giving memory back; larger ones (the
/// RF-grid arrays of a long night) are mappings of their own, returned when freed, so the peak
/// memory stays that of the largest phase.
fn keep_freed_memory() {
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    // SAFETY: called first in `main`, before any thread or allocation that could race with it;
    // both parameters are documented mallopt options taking a byte count.
    unsafe {
        libc::mallopt(libc::M_MMAP_THRESHOLD, 4 << 20);
        libc::mallopt(libc::M_TRIM_THRESHOLD, 64 << 20);
    }
}

fn init_logging(verbose: u8, quiet: bool) {
    let level = match (quiet, verbose) {
        (true, _) => "warn",
        (false, 0) => "info",
        (false, 1) => "debug",
        _ => "trace",
    };
    let filter = tracing_subscriber::EnvFilter::try_from_default_env().unwrap_or_else(|_| tracing_subscriber::EnvFilter::new(format!("axsift={level}")));
    tracing_subscriber::fmt().with_env_filter(filter).with_target(false).with_ansi(log_colours()).with_writer(std::io::stderr).init();
}

/// Colours in the log only when it goes to a terminal and `NO_COLOR` is unset (no-color.org).
fn log_colours() -> bool {
    use std::io::IsTerminal;
    std::io::stderr().is_terminal() && std::env::var_os("NO_COLOR").is_none_or(|v| v.is_empty())
}

fn read_text(path: &Path) -> Result<String, Failure> {
    std::fs::read_to_string(path).with_context(|| format!("cannot read {}", path.display())).map_err(Failure::BadInput)
}

fn simulate(scenario: &Path, out: &Path, capture: bool) -> Result<(), Failure> {
    let text = read_text(scenario)?;
    let sc = sim::Scenario::from_toml(&text).map_err(|e| Failure::BadInput(anyhow::anyhow!("{}: {e}", scenario.display())))?;
    if !capture {
        return write_simulation(&sc, out);
    }
    create_parent(out)?;
    sim::capture::simulate_capture(&sc, out).map_err(|e| Failure::BadInput(e.into()))?;
    tracing::info!("wrote {} ({} steps x {} samples)", out.display(), sc.scan.n_steps, sc.scan.n_averages as usize * sc.scan.n_bins);
    Ok(())
}

/// Creates the folder `path` is to be written in, if it has one.
fn create_parent(path: &Path) -> Result<(), Failure> {
    match path.parent().filter(|d| !d.as_os_str().is_empty()) {
        Some(dir) => std::fs::create_dir_all(dir).with_context(|| format!("cannot create {}", dir.display())).map_err(Failure::Run),
        None => Ok(()),
    }
}

fn average(captures: &[PathBuf], out: &Path, opts: &axsift::iq::average::AverageOptions, quiet: bool) -> Result<(), Failure> {
    use axsift::iq::average::AverageError;
    create_parent(out)?;
    let bar = progress::Bar::new(quiet, "averaging", "steps");
    let done = axsift::iq::average::average(captures, out, opts, &|done, total| bar.update(done, total)).map_err(|e| match e {
        AverageError::Options(_) | AverageError::Input(_) => Failure::BadInput(e.into()),
        AverageError::Output(_) => Failure::Run(e.into()),
    })?;
    bar.finish();
    let per_file: Vec<String> = done.per_file.iter().map(|(k, n)| format!("{k} segments, n_averages {n}")).collect();
    tracing::info!("wrote {} ({} steps x {} bins; {})", out.display(), done.n_steps, done.n_bins, per_file.join("; "));
    Ok(())
}

fn write_simulation(sc: &sim::Scenario, out: &Path) -> Result<(), Failure> {
    if let Some(dir) = out.parent().filter(|d| !d.as_os_str().is_empty()) {
        std::fs::create_dir_all(dir).with_context(|| format!("cannot create {}", dir.display()))?;
    }
    sim::simulate(sc, out).map_err(|e| Failure::BadInput(e.into()))?;
    tracing::info!("wrote {} ({} steps x {} bins)", out.display(), sc.scan.n_steps, sc.scan.n_bins);
    Ok(())
}

fn reduce(config_text: &str, config_name: &str, runs: &[PathBuf], calibration: Option<&Path>, out: &Path, quiet: bool) -> Result<(), Failure> {
    let plan = config::load(config_text, config_name).map_err(|e| Failure::BadInput(e.into()))?;
    let calibration = calibration.map(|path| calib::Calibration::load_for(path, &plan)).transpose().map_err(|e| Failure::BadInput(anyhow::anyhow!(e)))?;
    let failure = |e: pipeline::ReduceError| match e {
        pipeline::ReduceError::RunFile(_) => Failure::BadInput(e.into()),
        pipeline::ReduceError::Night(_) => Failure::Run(e.into()),
    };
    let bar = progress::Bar::new(quiet, "reducing", "steps");
    // The outputs are written block by block as the RF grid is finished, the limits too (a
    // bin's limit needs only its own values in a single night): memory stays bounded by the
    // steps in flight, whatever the night's span.
    let mut outputs = match limit_basis(&plan, config_name, calibration.as_ref())? {
        None => output::BlockOutputs::new(out)?,
        Some(basis) => output::BlockOutputs::calibrated(out, basis)?,
    };
    let mut results = outputs.results_sink();
    let (reduction, provenance) = with_provenance(config_text, runs, || {
        pipeline::reduce_streamed(
            &plan,
            runs,
            &|done, total| bar.update(done, total),
            &mut |block| outputs.take(&output::Bins::of_block(block)).map(Some).map_err(|e| format!("{e:#}")),
            &mut |values| results.write(values).map_err(|e| e.to_string()),
        )
        .map_err(failure)
    })?;
    bar.finish();
    warn_no_data(&reduction);
    let done = outputs.finish(&reduction, results, config_text, &provenance, calibration.as_ref())?;
    if !quiet {
        let summary = reduction.summary_with(&done.stats, &provenance, calibration.as_ref(), done.limits);
        print!("{}", output::console::night_report_for(&reduction, &summary, calibration.as_ref().map(|c| (c, &done.peaks)), &done.written));
    }
    Ok(())
}

/// What the limits of a reduction with `calibration` assume (None without one); the plan
/// needs a flag stage, whose threshold they use.
fn limit_basis(plan: &config::Plan, config_name: &str, calibration: Option<&calib::Calibration>) -> Result<Option<axsift::limits::LimitBasis>, Failure> {
    let Some(cal) = calibration else { return Ok(None) };
    if !plan.stages.iter().any(|s| s.entry.kind == "flag") {
        return Err(Failure::BadInput(anyhow::anyhow!("{config_name}: limits need a flag stage (its threshold)")));
    }
    axsift::limits::LimitBasis::new(plan, cal, axsift::limits::DEFAULT_CONFIDENCE).map(Some).map_err(|e| Failure::BadInput(anyhow::anyhow!(e)))
}

/// Warns, one line per run file, of bins without data that the file's mask does not mark.
fn warn_no_data(reduction: &pipeline::Reduction) {
    for line in reduction.no_data.warnings() {
        tracing::warn!("{line}");
    }
}

/// Runs `work` (a reduction of `runs`) while the run files are hashed for the provenance on
/// another thread: the hash reads every file once more, and overlapping it with the
/// reduction keeps it off the wall time.
fn with_provenance<T>(config_text: &str, runs: &[PathBuf], work: impl FnOnce() -> Result<T, Failure>) -> Result<(T, output::Provenance), Failure> {
    std::thread::scope(|scope| {
        let hashing = scope.spawn(|| output::Provenance::new(config_text, runs));
        let result = work();
        let provenance = hashing.join().unwrap_or_else(|panic| std::panic::resume_unwind(panic));
        Ok((result?, provenance.context("hashing the inputs")?))
    })
}

fn reduce_into_state(
    config_text: &str,
    config_name: &str,
    runs: &[PathBuf],
    calibration: Option<&Path>,
    state_dir: &Path,
    out: &Path,
    quiet: bool,
) -> Result<(), Failure> {
    let bad = |e: String| Failure::BadInput(anyhow::anyhow!(e));
    let plan = config::load(config_text, config_name).map_err(|e| Failure::BadInput(e.into()))?;
    let calibration = calibration.map(|path| calib::Calibration::load_for(path, &plan)).transpose().map_err(bad)?;
    // Held until the update is saved: another update of the same folder waits its turn.
    let _lock = axsift::state::State::lock_folder(state_dir).map_err(|e| bad(e.to_string()))?;
    let mut st = match axsift::state::State::load(state_dir).map_err(|e| bad(e.to_string()))? {
        Some(st) => st,
        None => axsift::state::State::new(axsift::state::plan_hash(&plan)),
    };
    st.stage_in(state_dir).map_err(|e| Failure::Run(e.into()))?;
    // The recomputed span is written tile by tile as it is made, its limits too (in the
    // outputs every candidate of the span blocks its bins, so a bin's limit needs only its
    // own values); the limit range the state records is tallied on the way.
    let basis = limit_basis(&plan, config_name, calibration.as_ref())?;
    let mut tally = basis.clone().map(axsift::state::LimitTally::new);
    let mut outputs = match basis {
        None => output::BlockOutputs::new(out)?,
        Some(basis) => output::BlockOutputs::calibrated(out, basis)?,
    };
    let mut results = outputs.results_sink();
    let mut write_failure = None;
    let bar = progress::Bar::new(quiet, "reducing", "steps");
    let added = axsift::state::add_night(&mut st, &plan, runs, &|done, total| bar.update(done, total), &mut |block| {
        let bins = output::Bins::of_block(block);
        if let Some(tally) = tally.as_mut() {
            tally.add(&bins)?;
        }
        let written = outputs.take(&bins).and_then(|values| Ok(results.write(values)?));
        written.map_err(|e| {
            let message = format!("writing the outputs: {e:#}");
            write_failure = Some(message.clone());
            message
        })
    });
    bar.finish();
    let update = match (added, write_failure) {
        (Err(_), Some(message)) => return Err(Failure::Run(anyhow::anyhow!(message))),
        (added, _) => added.map_err(|e| bad(e.to_string()))?,
    };
    warn_no_data(&update.reduction);
    // Adding the night hashed its files; the state holds those hashes.
    let provenance = output::Provenance::of_hashed(config_text, st.nights[update.night].inputs());
    let done = outputs.finish(&update.reduction, results, config_text, &provenance, calibration.as_ref())?;
    if let Some(tally) = &tally {
        let span = &update.reduction.spectrum;
        st.record_limit_tally(tally, &span.candidates, span.rf_start_hz, update.match_hz).map_err(|e| Failure::BadInput(e.into()))?;
    }
    st.save(state_dir).map_err(|e| Failure::Run(e.into()))?;
    if !quiet {
        let summary = update.reduction.summary_with(&done.stats, &provenance, calibration.as_ref(), done.limits);
        print!("{}", output::console::night_report_for(&update.reduction, &summary, calibration.as_ref().map(|c| (c, &done.peaks)), &done.written));
        print!("{}", output::console::state_report(&st, &update.changes).map_err(|e| Failure::BadInput(e.into()))?);
    }
    Ok(())
}

fn status(state_dir: &Path, json: bool) -> Result<(), Failure> {
    let st = axsift::state::State::load(state_dir)
        .map_err(|e| Failure::BadInput(e.into()))?
        .ok_or_else(|| Failure::BadInput(anyhow::anyhow!("{}: no state.json here", state_dir.display())))?;
    if json {
        println!(
            "{}",
            serde_json::to_string_pretty(&axsift::state::StatusSummary::of(&st).map_err(|e| Failure::BadInput(e.into()))?).context("formatting JSON")?
        );
        return Ok(());
    }
    print!("{}", output::console::state_report(&st, &[]).map_err(|e| Failure::BadInput(e.into()))?);
    if st.limit.is_none() {
        println!("  limit: none recorded (no update of this state was made with --calibration)");
    }
    Ok(())
}

fn export(config: &Path, state_dir: &Path, out: &Path, quiet: bool) -> Result<(), Failure> {
    let plan = config::load(&read_text(config)?, &config.display().to_string()).map_err(|e| Failure::BadInput(e.into()))?;
    let st = axsift::state::State::load(state_dir)
        .map_err(|e| Failure::BadInput(e.into()))?
        .ok_or_else(|| Failure::BadInput(anyhow::anyhow!("{}: no state.json here", state_dir.display())))?;
    // A file of the state folder that cannot be read is bad input; failing to write is not.
    let bins = axsift::state::export_grand(&st, &plan, out).map_err(|e| match &e {
        axsift::state::StateError::Io { path, .. } if !path.starts_with(state_dir) => Failure::Run(e.into()),
        _ => Failure::BadInput(e.into()),
    })?;
    if !quiet {
        println!("{}: grand spectrum of {bins} RF bins", out.display());
    }
    Ok(())
}

/// The campaign size: from a spec file if given, else the standard campaign with `seed`.
fn campaign_spec(spec: Option<&Path>, seed: u64) -> Result<calib::CampaignSpec, Failure> {
    match spec {
        Some(path) => toml::from_str(&read_text(path)?).map_err(|e| Failure::BadInput(anyhow::anyhow!("{}: {e}", path.display()))),
        None => Ok(calib::CampaignSpec::standard(seed)),
    }
}

fn calibrate(config: &Path, out: &Path, scenario: Option<&Path>, spec: &calib::CampaignSpec, runs: &[PathBuf], quiet: bool) -> Result<(), Failure> {
    let text = read_text(config)?;
    let plan = config::load(&text, &config.display().to_string()).map_err(|e| Failure::BadInput(e.into()))?;
    let bar = progress::Bar::new(quiet, "calibrating", "reductions");
    let tick = |done, total| bar.update(done, total);
    let cal = match (scenario, runs.is_empty()) {
        (Some(path), true) => {
            let sc = sim::Scenario::from_toml(&read_text(path)?).map_err(|e| Failure::BadInput(anyhow::anyhow!("{}: {e}", path.display())))?;
            std::fs::create_dir_all(out).with_context(|| format!("cannot create {}", out.display()))?;
            let scratch = out.join(".scratch");
            std::fs::create_dir_all(&scratch).with_context(|| format!("cannot create {}", scratch.display()))?;
            let cal = calib::calibrate(&plan, &calib::NoiseSource::Simulated { scenario: &sc, scratch: &scratch }, spec, &tick);
            let _ = std::fs::remove_dir_all(&scratch);
            cal
        }
        (None, false) => calib::calibrate(&plan, &calib::NoiseSource::Recorded(runs), spec, &tick),
        _ => return Err(Failure::BadInput(anyhow::anyhow!("give either --scenario FILE or recorded run files to inject into"))),
    }
    .map_err(|e| Failure::Run(e.into()))?;
    bar.finish();
    let written = cal.write(out)?;
    if !quiet {
        print!("{}", output::console::calibration_report(&cal, &written));
    }
    Ok(())
}

fn forecast(config: &Path, run_plan: &Path, calibration: &Path, out: &Path, quiet: bool) -> Result<(), Failure> {
    let bad = |e: String| Failure::BadInput(anyhow::anyhow!(e));
    let text = read_text(config)?;
    let plan = config::load(&text, &config.display().to_string()).map_err(|e| Failure::BadInput(e.into()))?;
    let cal = calib::Calibration::load_for(calibration, &plan).map_err(bad)?;
    let run: axsift::limits::forecast::RunPlan = toml::from_str(&read_text(run_plan)?).map_err(|e| bad(format!("{}: {e}", run_plan.display())))?;
    let chain = axsift::limits::forecast::ChainModel::from_plan(&plan, &cal, axsift::limits::DEFAULT_CONFIDENCE).map_err(bad)?;
    let fc = axsift::limits::forecast::forecast(&run, &chain).map_err(|e| bad(format!("{}: {e}", run_plan.display())))?;
    let written = fc.write(out)?;
    if !quiet {
        print!("{}", output::console::forecast_report(&fc, &written));
    }
    Ok(())
}

fn demo(out: &Path, quiet: bool) -> Result<(), Failure> {
    let sc = sim::Scenario::from_toml(DEMO_SCENARIO).map_err(|e| Failure::Run(anyhow::anyhow!("built-in demo scenario: {e}")))?;
    let run = out.join("night.h5");
    tracing::info!("simulating the demo night \"{}\"", sc.run_label);
    write_simulation(&sc, &run)?;
    reduce(DEFAULT_PIPELINE, "pipeline.toml (built in)", &[run], None, out, quiet)?;
    write_report(out, None, None, quiet)
}

/// Writes report.html into an output folder of `reduce`, from the files there.
fn write_report(dir: &Path, calibration: Option<&Path>, state_dir: Option<&Path>, quiet: bool) -> Result<(), Failure> {
    let mut data = axsift::report::ReportData::from_folder(dir, calibration).map_err(Failure::BadInput)?;
    if let Some(state_dir) = state_dir {
        let st = axsift::state::State::load(state_dir)
            .map_err(|e| Failure::BadInput(e.into()))?
            .ok_or_else(|| Failure::BadInput(anyhow::anyhow!("{}: no state.json here", state_dir.display())))?;
        data = data.with_state(&st).map_err(|e| Failure::BadInput(e.into()))?;
    }
    let path = axsift::report::write(dir, &data)?;
    if !quiet {
        println!("Report: {}", path.display());
    }
    Ok(())
}

fn inspect(file: &Path, json: bool) -> Result<(), Failure> {
    let r = runfile::RunReader::open(file).map_err(|e| Failure::BadInput(e.into()))?;
    if json {
        println!("{}", serde_json::to_string_pretty(&axsift::report::run_file::describe(&r)).context("formatting JSON")?);
        return Ok(());
    }
    print!("{}", output::console::run_file_report(&r));
    Ok(())
}

fn shard_failure(e: axsift::shard::ShardError) -> Failure {
    match e {
        axsift::shard::ShardError::BadInput(_) => Failure::BadInput(e.into()),
        _ => Failure::Run(e.into()),
    }
}

/// Campaign options of `shard-plan`: scenario, seed, spec file, recorded runs.
type CampaignArgs<'a> = (Option<&'a Path>, u64, Option<&'a Path>, &'a [PathBuf]);

fn shard_plan(config: &Path, work: &Path, shards: usize, cpus: usize, nights: &[String], campaign: Option<CampaignArgs>) -> Result<(), Failure> {
    use axsift::shard::{CampaignNoise, ShardPlan};
    let text = read_text(config)?;
    let name = config.display().to_string();
    let plan = match campaign {
        None => ShardPlan::reduction(&text, &name, nights.iter().map(|n| n.split(',').map(PathBuf::from).collect()).collect(), shards, cpus.max(1)),
        Some((scenario, seed, spec, runs)) => {
            let spec = campaign_spec(spec, seed)?;
            let noise = match (scenario, runs.is_empty()) {
                (Some(path), true) => CampaignNoise::Simulated { scenario_text: read_text(path)? },
                (None, false) => CampaignNoise::Recorded { runs: runs.to_vec() },
                _ => return Err(Failure::BadInput(anyhow::anyhow!("a campaign needs either --scenario FILE or recorded run files to inject into"))),
            };
            ShardPlan::campaign(&text, &name, spec, noise, shards, cpus.max(1))
        }
    }
    .map_err(shard_failure)?;
    let path = plan.save(work).map_err(shard_failure)?;
    let r = &plan.resources;
    println!("{}: {} shards, each {} MB, {} cpus, {} s", path.display(), plan.shards.len(), r.mem_mb, r.cpus, r.time_s);
    Ok(())
}

fn shard_run(plan: &Path, index: Option<usize>, quiet: bool) -> Result<(), Failure> {
    let index = axsift::shard::shard_index(index).map_err(shard_failure)?;
    let bar = progress::Bar::new(quiet, "shard", "items");
    let path = axsift::shard::run_shard(plan, index, &|done, total| bar.update(done, total)).map_err(shard_failure)?;
    bar.finish();
    tracing::info!("shard {index} written to {}", path.display());
    Ok(())
}

fn shard_merge(t: &MergeTarget, quiet: bool) -> Result<(), Failure> {
    let merged = axsift::shard::merge(&t.plan, &t.out, t.state.as_deref(), t.calibration.as_deref()).map_err(shard_failure)?;
    if let axsift::shard::Merged::Reduction { update, .. } = &merged {
        warn_no_data(&update.reduction);
    }
    if !quiet {
        match merged {
            axsift::shard::Merged::Reduction { state, update, provenance, calibrated, written } => {
                let calibrated = calibrated.as_ref().map(|(c, l)| (c.as_ref(), l.as_ref()));
                let summary = update.reduction.summary(&provenance, calibrated.map(|c| c.0), calibrated.map(|c| c.1));
                print!("{}", output::console::night_report(&update.reduction, &summary, calibrated, &written));
                print!("{}", output::console::state_report(&state, &update.changes).map_err(|e| Failure::BadInput(e.into()))?);
            }
            axsift::shard::Merged::Campaign { calibration, written } => print!("{}", output::console::calibration_report(&calibration, &written)),
        }
    }
    Ok(())
}

fn shard_slurm(t: &MergeTarget, partition: Option<&str>, submit: bool) -> Result<(), Failure> {
    use axsift::shard::slurm;
    let exe = std::env::current_exe().context("locating the axsift binary")?;
    let scripts = slurm::write_scripts(&t.plan, &exe, &t.out, t.state.as_deref(), t.calibration.as_deref(), partition).map_err(shard_failure)?;
    println!("wrote {} and {}", scripts.shard_script.display(), scripts.merge_script.display());
    if submit {
        let ids = slurm::submit(&scripts).map_err(shard_failure)?;
        println!("submitted jobs {}", ids.join(" "));
    } else {
        for args in slurm::submissions(&scripts) {
            println!("sbatch {}", args.join(" ").replace("{prev}", "<id printed by the sbatch above>"));
        }
    }
    println!("{}", slurm::rerun_hint(&scripts));
    Ok(())
}
