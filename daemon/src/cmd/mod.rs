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

/// Every `stiltd` subcommand.
#[derive(clap::Subcommand, Debug)]
pub enum Command {
    /// Validate a configuration file and print a summary of the stage it describes.
    Check(check::CheckArgs),
    /// Run the full pipeline on the built-in simulated stage (no hardware needed).
    Demo(demo::DemoArgs),
    /// Write recorded segments out as CSV.
    Export(export::ExportArgs),
}

impl Command {
    /// Runs the subcommand.
    pub fn run(&self) -> ExitCode {
        match self {
            Command::Check(a) => check::run(a),
            Command::Demo(a) => demo::run(a),
            Command::Export(a) => export::run(a),
        }
    }
}

/// Prints configuration errors and returns exit code 2.
pub fn config_errors(e: &ConfigErrors) -> ExitCode {
    eprint!("{e}");
    ExitCode::from(2)
}
