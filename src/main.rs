//! The axsift command line.

use clap::{Parser, Subcommand};
use std::path::PathBuf;
use std::process::ExitCode;

#[derive(Parser)]
#[command(
    name = "axsift",
    version,
    about = "Nightly reduction of axion haloscope data"
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Validate a run file and summarise it. Example: axsift inspect night.h5
    Inspect {
        /// The run file.
        file: PathBuf,
    },
}

fn main() -> ExitCode {
    match Cli::parse().command {
        Command::Inspect { file } => match axsift::runfile::RunReader::open(&file) {
            Ok(r) => {
                let steps = r.steps();
                let first = steps.first().map_or(0.0, |s| s.start_freq_hz);
                let last = steps.last().map_or(0.0, |s| s.start_freq_hz);
                println!("{}: run \"{}\"", file.display(), r.header().run_label);
                println!(
                    "  {} steps x {} bins of {} Hz",
                    steps.len(),
                    r.n_bins(),
                    r.header().bin_width_hz
                );
                println!("  first step starts at {first} Hz, last at {last} Hz");
                ExitCode::SUCCESS
            }
            Err(e) => {
                eprintln!("error: {e}");
                ExitCode::from(2)
            }
        },
    }
}
