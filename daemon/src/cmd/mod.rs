//! `stiltd`'s subcommands, one module each: its clap `Args` struct and its `run`.
//!
//! To add a subcommand: a module here with `pub struct XArgs` (derive `clap::Args`) and
//! `pub fn run(&XArgs) -> ExitCode`, and one variant in `Command` below.
//! Exit codes: 0 success, 1 runtime failure, 2 bad usage or bad configuration.

use std::process::ExitCode;

use stilt_config::ConfigErrors;

pub mod check;
pub mod demo;
pub mod export;
pub mod hil;
pub mod report;
pub mod run;
pub mod tune;

/// Every `stiltd` subcommand.
#[derive(clap::Subcommand, Debug)]
pub enum Command {
    /// Validate a configuration file and print a summary of the stage it describes.
    Check(check::CheckArgs),
    /// Run the full pipeline on the built-in simulated stage (no hardware needed).
    Demo(demo::DemoArgs),
    /// Write recorded segments out as CSV.
    Export(export::ExportArgs),
    /// Summarise recorded runs: tilt statistics, spectra, Allan deviation, coupling, plots.
    Report(report::ReportArgs),
    /// Step-test one loop (simulated stage, or a leg or tilt axis through a running
    /// daemon), fit a model, propose gains and optionally apply them.
    Tune(tune::TuneArgs),
    /// Run the daemon on the serial instruments of a stage file (`[instruments]`).
    Run(run::RunArgs),
    /// Run the daemon against the hardware-in-the-loop simulator over real ptys.
    Hil(hil::HilArgs),
}

impl Command {
    /// Runs the subcommand.
    pub fn run(&self) -> ExitCode {
        match self {
            Command::Check(a) => check::run(a),
            Command::Demo(a) => demo::run(a),
            Command::Export(a) => export::run(a),
            Command::Report(a) => report::run(a),
            Command::Tune(a) => tune::run(a),
            Command::Run(a) => run::run(a),
            Command::Hil(a) => hil::run(a),
        }
    }
}

/// Prints configuration errors and returns exit code 2.
pub fn config_errors(e: &ConfigErrors) -> ExitCode {
    eprint!("{e}");
    ExitCode::from(2)
}

/// The single-threaded tokio runtime the subcommands run on, or exit code 1 after saying
/// why it could not be started.
pub fn current_thread_runtime() -> Result<tokio::runtime::Runtime, ExitCode> {
    tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .map_err(|e| {
            eprintln!("stiltd: cannot start the runtime: {e}");
            ExitCode::FAILURE
        })
}
