//! `stiltd`: the tilt stabilisation daemon's command line. Subcommands live in
//! `stilt_daemon::cmd`, one module each.

use std::process::ExitCode;

use clap::Parser;

#[derive(Parser)]
#[command(
    name = "stiltd",
    version,
    about = "Keeps a precision stage level by heating its legs"
)]
struct Cli {
    #[command(subcommand)]
    cmd: stilt_daemon::cmd::Command,
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    stilt_daemon::logging::init();
    cli.cmd.run()
}
