//! `stiltd report RUN...`: statistics, spectra, Allan deviations, coupling, duty, events
//! and timing of recorded runs, as a table, a JSON file and plots. The engine is
//! [`crate::report`].

use std::path::PathBuf;
use std::process::ExitCode;

use super::config_errors;
use crate::record::{SegmentSet, TimeWindow, find_segments};
use crate::report::{self, ReportOptions};

/// Arguments of `stiltd report`.
#[derive(clap::Args, Debug)]
pub struct ReportArgs {
    /// Segment files (`.h5`) or folders holding them.
    #[arg(required = true, value_name = "RUN")]
    pub runs: Vec<PathBuf>,
    /// Start of the window: UTC `2024-03-01T06:00:00Z`, or `+6h` after the first segment's start.
    #[arg(long)]
    pub from: Option<String>,
    /// End of the window (exclusive), in the same forms.
    #[arg(long)]
    pub to: Option<String>,
    /// Write the report as JSON to this file.
    #[arg(long, value_name = "PATH")]
    pub json: Option<PathBuf>,
    /// Write the plots (PNG and SVG) into this folder.
    #[arg(long, value_name = "DIR")]
    pub plots: Option<PathBuf>,
    /// Take heater limits and rates from this configuration instead of the recorded one.
    #[arg(long, short)]
    pub config: Option<PathBuf>,
    /// Welch segment length for the spectral density.
    #[arg(long, default_value = "1h", value_parser = crate::demo::parse_duration_s)]
    pub asd_segment: f64,
}

/// Runs `stiltd report`.
pub fn run(a: &ReportArgs) -> ExitCode {
    let mut files = Vec::new();
    for p in &a.runs {
        if p.is_dir() {
            match find_segments(p) {
                Ok(v) if v.is_empty() => {
                    eprintln!(
                        "stiltd report: {}: no .h5 segments in this folder",
                        p.display()
                    );
                    return ExitCode::from(2);
                }
                Ok(v) => files.extend(v),
                Err(e) => {
                    eprintln!("stiltd report: {e}");
                    return ExitCode::from(2);
                }
            }
        } else if p.is_file() {
            files.push(p.clone());
        } else {
            eprintln!(
                "stiltd report: {}: no such file or folder (give segment files or folders)",
                p.display()
            );
            return ExitCode::from(2);
        }
    }
    let set = match SegmentSet::open(&files) {
        Ok(s) => s,
        Err(e) => {
            eprintln!("stiltd report: {e}");
            return ExitCode::from(2);
        }
    };
    let origin = set.segments().first().map_or(0, |s| s.segment_start_utc_ns);
    let mut window = TimeWindow::ALL;
    for (arg, slot, name) in [
        (&a.from, &mut window.from_utc_ns, "--from"),
        (&a.to, &mut window.to_utc_ns, "--to"),
    ] {
        if let Some(s) = arg {
            match report::parse_time(s, origin) {
                Ok(t) => *slot = Some(t),
                Err(e) => {
                    eprintln!("stiltd report: {name}: {e}");
                    return ExitCode::from(2);
                }
            }
        }
    }
    let config = match &a.config {
        Some(p) => match stilt_config::load_file(p) {
            Ok(c) => Some(c),
            Err(e) => return config_errors(&e),
        },
        None => None,
    };
    let opts = ReportOptions {
        window,
        asd_segment_s: a.asd_segment,
        config,
        ..ReportOptions::default()
    };
    let bar = super::tune::progress_bar("reading rows");
    let mut progress = |done: u64, total: u64| {
        if let Some(b) = &bar {
            b.set_length(total.max(1));
            b.set_position(done);
        }
    };
    let r = match report::compute(&set, &opts, &mut progress) {
        Ok(r) => r,
        Err(e) => {
            if let Some(b) = &bar {
                b.finish_and_clear();
            }
            eprintln!("stiltd report: {e}");
            return ExitCode::FAILURE;
        }
    };
    if let Some(b) = &bar {
        b.finish_and_clear();
    }
    print!("{}", report::render(&r));
    if let Some(path) = &a.json {
        let text = match serde_json::to_string_pretty(&r) {
            Ok(t) => t,
            Err(e) => {
                eprintln!("stiltd report: cannot encode the report: {e}");
                return ExitCode::FAILURE;
            }
        };
        if let Err(e) = std::fs::write(path, text) {
            eprintln!("stiltd report: {}: cannot write: {e}", path.display());
            return ExitCode::FAILURE;
        }
        println!("JSON: {}", path.display());
    }
    if let Some(dir) = &a.plots {
        match report::plot::write_all(&r, dir) {
            Ok(files) => {
                println!("plots:");
                for f in files {
                    println!("  {}", f.display());
                }
            }
            Err(e) => {
                eprintln!("stiltd report: {e}");
                return ExitCode::FAILURE;
            }
        }
    }
    ExitCode::SUCCESS
}
