//! The axsift command line: a thin layer over the library.

use anyhow::Context;
use axsift::{config, output, pipeline, runfile, sim};
use clap::{Parser, Subcommand};
use std::path::{Path, PathBuf};
use std::process::ExitCode;

/// The demo's scenario and pipeline, built into the binary so `demo` needs no files.
const DEMO_SCENARIO: &str = include_str!("../fixtures/demo_night.toml");
const DEFAULT_PIPELINE: &str = include_str!("../pipeline.toml");

#[derive(Parser)]
#[command(name = "axsift", version, about = "Nightly reduction of axion haloscope data")]
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
        /// Run files of the night, in acquisition order.
        #[arg(required = true)]
        runs: Vec<PathBuf>,
    },
    /// Simulate an invented night and reduce it with the default pipeline.
    /// Example: axsift demo --out out/demo
    Demo {
        /// Output folder for the simulated run file and the results.
        #[arg(long, default_value = "out/demo")]
        out: PathBuf,
    },
    /// Print the resolved pipeline with every default filled in.
    /// Example: axsift plan --config pipeline.toml
    Plan {
        /// Pipeline TOML.
        #[arg(long)]
        config: PathBuf,
    },
    /// Validate a run file and summarise it. Example: axsift inspect night.h5
    Inspect {
        /// The run file.
        file: PathBuf,
    },
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
    let cli = Cli::parse();
    init_logging(cli.verbose, cli.quiet);
    let result = match cli.command {
        Command::Simulate { scenario, out } => simulate(&scenario, &out),
        Command::Reduce { config, out, runs } => read_text(&config).and_then(|text| reduce(&text, &config.display().to_string(), &runs, &out, cli.quiet)),
        Command::Demo { out } => demo(&out, cli.quiet),
        Command::Plan { config } => read_text(&config).and_then(|text| {
            let plan = config::load(&text, &config.display().to_string()).map_err(|e| Failure::BadInput(e.into()))?;
            print!("{}", plan.describe());
            Ok(())
        }),
        Command::Inspect { file } => inspect(&file),
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

fn init_logging(verbose: u8, quiet: bool) {
    let level = match (quiet, verbose) {
        (true, _) => "warn",
        (false, 0) => "info",
        (false, 1) => "debug",
        _ => "trace",
    };
    let filter = tracing_subscriber::EnvFilter::try_from_default_env().unwrap_or_else(|_| tracing_subscriber::EnvFilter::new(format!("axsift={level}")));
    tracing_subscriber::fmt().with_env_filter(filter).with_target(false).with_writer(std::io::stderr).init();
}

fn read_text(path: &Path) -> Result<String, Failure> {
    std::fs::read_to_string(path).with_context(|| format!("cannot read {}", path.display())).map_err(Failure::BadInput)
}

fn simulate(scenario: &Path, out: &Path) -> Result<(), Failure> {
    let text = read_text(scenario)?;
    let sc = sim::Scenario::from_toml(&text).map_err(|e| Failure::BadInput(anyhow::anyhow!("{}: {e}", scenario.display())))?;
    write_simulation(&sc, out)
}

fn write_simulation(sc: &sim::Scenario, out: &Path) -> Result<(), Failure> {
    if let Some(dir) = out.parent().filter(|d| !d.as_os_str().is_empty()) {
        std::fs::create_dir_all(dir).with_context(|| format!("cannot create {}", dir.display()))?;
    }
    sim::simulate(sc, out).map_err(|e| Failure::BadInput(e.into()))?;
    tracing::info!("wrote {} ({} steps x {} bins)", out.display(), sc.scan.n_steps, sc.scan.n_bins);
    Ok(())
}

fn reduce(config_text: &str, config_name: &str, runs: &[PathBuf], out: &Path, quiet: bool) -> Result<(), Failure> {
    let plan = config::load(config_text, config_name).map_err(|e| Failure::BadInput(e.into()))?;
    let bar = output::progress::StepBar::new(quiet);
    let reduction = pipeline::reduce(&plan, runs, &|done, total| bar.update(done, total)).map_err(|e| match e {
        pipeline::ReduceError::RunFile(_) => Failure::BadInput(e.into()),
        pipeline::ReduceError::Night(_) => Failure::Run(e.into()),
    })?;
    bar.finish();
    let provenance = output::Provenance::new(config_text, runs).context("hashing the inputs")?;
    let written = reduction.write(out, config_text, &provenance)?;
    if !quiet {
        print!("{}", output::console::night_report(&reduction, &provenance, &written));
    }
    Ok(())
}

fn demo(out: &Path, quiet: bool) -> Result<(), Failure> {
    let sc = sim::Scenario::from_toml(DEMO_SCENARIO).map_err(|e| Failure::Run(anyhow::anyhow!("built-in demo scenario: {e}")))?;
    let run = out.join("night.h5");
    tracing::info!("simulating the demo night \"{}\"", sc.run_label);
    write_simulation(&sc, &run)?;
    reduce(DEFAULT_PIPELINE, "pipeline.toml (built in)", &[run], out, quiet)
}

fn inspect(file: &Path) -> Result<(), Failure> {
    let r = runfile::RunReader::open(file).map_err(|e| Failure::BadInput(e.into()))?;
    print!("{}", output::console::run_file_report(&r));
    Ok(())
}
