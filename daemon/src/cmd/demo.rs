//! `stiltd demo`: the full pipeline on the simulated stage, with a summary.

use std::io::IsTerminal;
use std::path::PathBuf;
use std::process::ExitCode;

use stilt_config::Config;

use super::config_errors;
use crate::demo::{self, DemoOptions, Speed};
use crate::record::{Recorder, RecorderOptions};
use crate::rows::{CountingSink, RowSink};

/// Arguments of `stiltd demo`.
#[derive(clap::Args, Debug)]
pub struct DemoArgs {
    /// A scenario of your own (TOML); default: the built-in basement breadboard.
    #[arg(long, short)]
    pub config: Option<PathBuf>,
    /// Simulated duration: `90m`, `6h`, `1.5d` …
    #[arg(long, default_value = "36h", value_parser = demo::parse_duration_s)]
    pub duration: f64,
    /// `max` (virtual time, as fast as the CPU allows) or a factor N (N× real time).
    #[arg(long, default_value = "max")]
    pub speed: Speed,
    /// Time after which the loop counts as settled: statistics are split there.
    #[arg(long, default_value = "6h", value_parser = demo::parse_duration_s)]
    pub settle: f64,
    /// Print the summary as one JSON object instead of a table.
    #[arg(long)]
    pub json: bool,
    /// Override the scenario's random seed.
    #[arg(long)]
    pub seed: Option<u64>,
    /// Folder for the recording (HDF5 segments); default: `runs` under the current folder.
    #[arg(long, default_value = "runs")]
    pub out: PathBuf,
    /// Do not record; only print the summary.
    #[arg(long)]
    pub no_record: bool,
}

/// Runs `stiltd demo`.
pub fn run(a: &DemoArgs) -> ExitCode {
    let cfg = match &a.config {
        Some(p) => match stilt_config::load_file(p) {
            Ok(c) => c,
            Err(e) => return config_errors(&e),
        },
        None => match stilt_config::load_str(stilt_config::DEMO_SCENARIO, "built-in demo scenario")
        {
            Ok(c) => c,
            Err(e) => return config_errors(&e),
        },
    };
    let out = (!a.no_record).then(|| a.out.clone());
    run_demo(cfg, a.duration, a.speed, a.settle, a.json, a.seed, out)
}

fn run_demo(
    mut cfg: Config,
    duration_s: f64,
    speed: Speed,
    settle_s: f64,
    json: bool,
    seed: Option<u64>,
    out: Option<PathBuf>,
) -> ExitCode {
    if let Some(s) = seed {
        cfg.simulation.seed = s;
    }
    let start_utc_ns = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_nanos() as i64);
    let bar = progress_bar(duration_s);
    let progress: Option<Box<dyn FnMut(f64, f64) + Send>> = bar.clone().map(|b| {
        Box::new(move |done: f64, _total: f64| b.set_position(done as u64))
            as Box<dyn FnMut(f64, f64) + Send>
    });
    let opts = DemoOptions {
        duration_s,
        settle_s,
        speed,
        progress,
        start_utc_ns,
    };
    let sink: Box<dyn RowSink> = match out {
        None => Box::new(CountingSink::default()),
        Some(dir) => {
            let mut ro = RecorderOptions::from_config(&cfg);
            ro.dir = dir;
            ro.start_utc_ns = Some(start_utc_ns);
            // In virtual time nothing may be dropped: the sink waits for the disk instead.
            ro.blocking = matches!(speed, Speed::Max);
            if ro.blocking {
                ro.batch_rows = 4096;
            }
            match Recorder::start(&cfg, ro) {
                Ok((sink, handle)) => {
                    if !json {
                        eprintln!(
                            "stiltd: recording run {} into {}",
                            handle.run_id(),
                            handle.dir().display()
                        );
                    }
                    Box::new(sink)
                }
                Err(e) => {
                    eprintln!("stiltd: cannot start the recording: {e}");
                    return ExitCode::FAILURE;
                }
            }
        }
    };
    let rt = match super::current_thread_runtime() {
        Ok(rt) => rt,
        Err(code) => return code,
    };
    let result = rt.block_on(demo::run_demo(&cfg, sink, opts));
    if let Some(b) = bar {
        b.finish_and_clear();
    }
    match result {
        Ok(summary) => {
            if json {
                match serde_json::to_string_pretty(&summary) {
                    Ok(s) => println!("{s}"),
                    Err(e) => {
                        eprintln!("stiltd: cannot encode the summary: {e}");
                        return ExitCode::FAILURE;
                    }
                }
            } else {
                print!("{}", demo::render_table(&summary));
            }
            ExitCode::SUCCESS
        }
        Err(e) => {
            eprintln!("stiltd: demo failed: {e:#}");
            ExitCode::FAILURE
        }
    }
}

/// A progress bar on stderr in simulated seconds, only when stderr is a terminal.
fn progress_bar(total_s: f64) -> Option<indicatif::ProgressBar> {
    if !std::io::stderr().is_terminal() {
        return None;
    }
    let b = indicatif::ProgressBar::new(total_s as u64);
    b.set_draw_target(indicatif::ProgressDrawTarget::stderr());
    if let Ok(style) = indicatif::ProgressStyle::with_template(
        "{spinner} simulating [{bar:40}] {percent:>3}% ({elapsed} elapsed, about {eta} left)",
    ) {
        b.set_style(style.progress_chars("=> "));
    }
    Some(b)
}
