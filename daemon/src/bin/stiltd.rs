//! `stiltd`: the tilt stabilisation daemon's command line.
//!
//! Subcommands: `check` (validate a configuration), `demo` (the whole pipeline on the
//! simulated stage). Exit codes: 0 success, 1 runtime failure, 2 bad usage or bad
//! configuration.

use std::io::IsTerminal;
use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Parser, Subcommand};
use stilt_config::{Config, ConfigErrors};
use stilt_daemon::demo::{self, DemoOptions, Speed};
use stilt_daemon::rows::CountingSink;

#[derive(Parser)]
#[command(
    name = "stiltd",
    version,
    about = "Keeps a precision stage level by heating its legs"
)]
struct Cli {
    #[command(subcommand)]
    cmd: Cmd,
}

#[derive(Subcommand)]
enum Cmd {
    /// Validate a configuration file and print a summary of the stage it describes.
    Check {
        /// The stage or scenario file (TOML).
        #[arg(long, short)]
        config: PathBuf,
    },
    /// Run the full pipeline on the built-in simulated stage (no hardware needed).
    Demo {
        /// A scenario of your own (TOML); default: the built-in basement breadboard.
        #[arg(long, short)]
        config: Option<PathBuf>,
        /// Simulated duration: `90m`, `6h`, `1.5d` …
        #[arg(long, default_value = "36h", value_parser = demo::parse_duration_s)]
        duration: f64,
        /// `max` (virtual time, as fast as the CPU allows) or a factor N (N× real time).
        #[arg(long, default_value = "max")]
        speed: Speed,
        /// Time after which the loop counts as settled: statistics are split there.
        #[arg(long, default_value = "6h", value_parser = demo::parse_duration_s)]
        settle: f64,
        /// Print the summary as one JSON object instead of a table.
        #[arg(long)]
        json: bool,
        /// Override the scenario's random seed.
        #[arg(long)]
        seed: Option<u64>,
    },
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    match cli.cmd {
        Cmd::Check { config } => check(&config),
        Cmd::Demo {
            config,
            duration,
            speed,
            settle,
            json,
            seed,
        } => {
            let cfg = match config {
                Some(p) => match stilt_config::load_file(&p) {
                    Ok(c) => c,
                    Err(e) => return config_errors(&e),
                },
                None => match stilt_config::load_str(
                    stilt_config::DEMO_SCENARIO,
                    "built-in demo scenario",
                ) {
                    Ok(c) => c,
                    Err(e) => return config_errors(&e),
                },
            };
            run_demo(cfg, duration, speed, settle, json, seed)
        }
    }
}

fn config_errors(e: &ConfigErrors) -> ExitCode {
    eprint!("{e}");
    ExitCode::from(2)
}

fn check(path: &std::path::Path) -> ExitCode {
    match stilt_config::load_file(path) {
        Ok(cfg) => {
            print!("{}", summary(&cfg));
            println!("{}: OK", path.display());
            ExitCode::SUCCESS
        }
        Err(e) => config_errors(&e),
    }
}

fn summary(cfg: &Config) -> String {
    use std::fmt::Write;
    let mut o = String::new();
    let _ = writeln!(o, "stage: {}", cfg.stage_name);
    let _ = writeln!(o, "legs ({}):", cfg.legs.len());
    for l in &cfg.legs {
        let _ = writeln!(
            o,
            "  {:<8} at ({:+.3}, {:+.3}) m, {:.3} m of {} (α = {:.2e}/K → {:.2} µm/K), heater {} Ω ≤ {} W, thermometer ch {}",
            l.name,
            l.x_m,
            l.y_m,
            l.length_m,
            l.material.name,
            l.material.cte_per_k,
            l.expansion_m_per_k() * 1e6,
            l.heater_resistance_ohm,
            l.heater_max_power_w,
            l.thermometer_channel
        );
    }
    let t = &cfg.tiltmeter;
    let _ = writeln!(o, "tiltmeter: {} Hz, ±{} µrad", t.rate_hz, t.range_urad);
    let c = &cfg.control;
    let _ = writeln!(
        o,
        "control: {} Hz, mode {}, setpoint ({}, {}) µrad ramped at {} µrad/s, leg bias {} °C",
        c.rate_hz,
        c.mode,
        c.setpoint_urad[0],
        c.setpoint_urad[1],
        c.setpoint_ramp_urad_per_s,
        c.leg_bias_c
    );
    let _ = writeln!(
        o,
        "  tilt loop: Kp {} µrad/µrad, Ti {:?} s, Td {} s, output ±{} µrad",
        c.tilt_loop.kp, c.tilt_loop.ti_s, c.tilt_loop.td_s, c.tilt_output_limit_urad
    );
    let _ = writeln!(
        o,
        "  leg loop:  Kp {} W/K, Ti {:?} s, Td {} s, slew {:?} W/s",
        c.leg_loop.kp, c.leg_loop.ti_s, c.leg_loop.td_s, c.leg_loop.slew_per_s
    );
    let l = &cfg.limits;
    let _ = writeln!(
        o,
        "limits: leg ≤ {} °C, total power ≤ {} W, tilt within ±{} µrad",
        l.max_leg_temp_c, l.max_total_power_w, l.tilt_range_urad
    );
    let r = &cfg.recording;
    let _ = writeln!(
        o,
        "recording: {} into {}, flush every {} s, new segment every {} h or {} MiB",
        if r.enabled { "on" } else { "off" },
        r.dir.display(),
        r.flush_interval_s,
        r.segment_duration_h,
        r.segment_max_mib
    );
    let _ = writeln!(o, "network: {}", cfg.network.bind);
    o
}

fn run_demo(
    mut cfg: Config,
    duration_s: f64,
    speed: Speed,
    settle_s: f64,
    json: bool,
    seed: Option<u64>,
) -> ExitCode {
    if let Some(s) = seed {
        cfg.simulation.seed = s;
    }
    let start_utc_ns = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_nanos() as i64);
    let bar = progress_bar(duration_s);
    let progress: Option<Box<dyn FnMut(f64, f64)>> = bar.clone().map(|b| {
        Box::new(move |done: f64, _total: f64| b.set_position(done as u64))
            as Box<dyn FnMut(f64, f64)>
    });
    let opts = DemoOptions {
        duration_s,
        settle_s,
        speed,
        progress,
        start_utc_ns,
    };
    let sink = Box::new(CountingSink::default());
    let rt = match tokio::runtime::Builder::new_current_thread()
        .enable_time()
        .build()
    {
        Ok(rt) => rt,
        Err(e) => {
            eprintln!("stiltd: cannot start the runtime: {e}");
            return ExitCode::FAILURE;
        }
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

/// A progress bar on stderr in simulated hours, only when stderr is a terminal.
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
