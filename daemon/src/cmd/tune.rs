//! `stiltd tune`: a step test (and optionally a relay test) of one loop on the simulated
//! stage, with the model fit and the tuning rules' proposals. The engine is
//! [`crate::tune`].

use std::io::IsTerminal;
use std::path::PathBuf;
use std::process::ExitCode;

use super::config_errors;
use crate::tune::{self, RelayOptions, StepOptions, Target};

/// Arguments of `stiltd tune`.
#[derive(clap::Args, Debug)]
pub struct TuneArgs {
    /// The loop: `tilt:x`, `tilt:y`, or `leg:NAME` / `leg:N` (1-based).
    #[arg(long = "loop", value_name = "LOOP", default_value = "tilt:x")]
    pub target: String,
    /// A scenario of your own (TOML); default: the built-in demo scenario.
    #[arg(long, short)]
    pub config: Option<PathBuf>,
    /// Step size in the plant's input unit (W for a leg, µrad of tilt correction for an
    /// axis); default: a quarter of the heater headroom, or 2 µrad. Checked against every limit.
    #[arg(long, allow_negative_numbers = true)]
    pub step: Option<f64>,
    /// Warm-up from a cold start before the baseline.
    #[arg(long, default_value = "3h", value_parser = crate::demo::parse_duration_s)]
    pub warmup: f64,
    /// Baseline before the step; default 30m for a leg, 10m for a tilt axis.
    #[arg(long, value_parser = crate::demo::parse_duration_s)]
    pub baseline: Option<f64>,
    /// Record after the step; default 3h for a leg, 30m for a tilt axis.
    #[arg(long, value_parser = crate::demo::parse_duration_s)]
    pub record: Option<f64>,
    /// Also run an Åström–Hägglund relay test (bounded amplitude) for Ku and Pu.
    #[arg(long)]
    pub relay: bool,
    /// Relay amplitude (input unit); default: the step size.
    #[arg(long)]
    pub relay_amplitude: Option<f64>,
    /// Relay hysteresis (output unit); default 3 mK for a leg, 0.05 µrad for tilt.
    #[arg(long)]
    pub relay_hysteresis: Option<f64>,
    /// Override the scenario's random seed.
    #[arg(long)]
    pub seed: Option<u64>,
    /// Print the result as one JSON object instead of a table.
    #[arg(long)]
    pub json: bool,
}

/// Runs `stiltd tune`.
pub fn run(a: &TuneArgs) -> ExitCode {
    let cfg = match &a.config {
        Some(p) => stilt_config::load_file(p),
        None => stilt_config::load_str(stilt_config::DEMO_SCENARIO, "built-in demo scenario"),
    };
    let mut cfg = match cfg {
        Ok(c) => c,
        Err(e) => return config_errors(&e),
    };
    if let Some(s) = a.seed {
        cfg.simulation.seed = s;
    }
    let target = match Target::parse(&a.target, &cfg) {
        Ok(t) => t,
        Err(e) => {
            eprintln!("stiltd tune: --loop: {e}");
            return ExitCode::from(2);
        }
    };
    let defaults = StepOptions::new(target);
    let opts = StepOptions {
        step: a.step,
        warmup_s: a.warmup,
        baseline_s: a.baseline.unwrap_or(defaults.baseline_s),
        record_s: a.record.unwrap_or(defaults.record_s),
        ..defaults
    };
    let bar = progress_bar("simulating");
    let mut progress = |done: f64, total: f64| {
        if let Some(b) = &bar {
            b.set_length(total as u64);
            b.set_position(done as u64);
        }
    };
    let rec = match tune::run_step_test(&cfg, &opts, &mut progress) {
        Ok(r) => r,
        Err(e) => {
            eprintln!("stiltd tune: {e}");
            return ExitCode::from(2);
        }
    };
    let relay = if a.relay {
        let ro = RelayOptions {
            amplitude: a.relay_amplitude.or(a.step),
            hysteresis: a.relay_hysteresis,
            ..RelayOptions::default()
        };
        match tune::run_relay_test(&cfg, target, a.warmup, &ro, &mut progress) {
            Ok(r) => Some(r),
            Err(e) => {
                eprintln!("stiltd tune: relay test: {e}");
                return ExitCode::from(2);
            }
        }
    } else {
        None
    };
    if let Some(b) = &bar {
        b.finish_and_clear();
    }
    let result = match tune::analyse(&cfg, &rec, relay.as_ref()) {
        Ok(r) => r,
        Err(e) => {
            eprintln!("stiltd tune: {e}");
            return ExitCode::FAILURE;
        }
    };
    if a.json {
        match serde_json::to_string_pretty(&result) {
            Ok(s) => println!("{s}"),
            Err(e) => {
                eprintln!("stiltd tune: cannot encode the result: {e}");
                return ExitCode::FAILURE;
            }
        }
    } else {
        print!("{}", tune::render(&result));
    }
    ExitCode::SUCCESS
}

/// A progress bar on stderr, only when stderr is a terminal; its length is set by the caller.
pub(crate) fn progress_bar(what: &str) -> Option<indicatif::ProgressBar> {
    if !std::io::stderr().is_terminal() {
        return None;
    }
    let b = indicatif::ProgressBar::new(1);
    b.set_draw_target(indicatif::ProgressDrawTarget::stderr());
    if let Ok(style) = indicatif::ProgressStyle::with_template(&format!(
        "{{spinner}} {what} [{{bar:40}}] {{percent:>3}}% ({{elapsed}} elapsed, about {{eta}} left)"
    )) {
        b.set_style(style.progress_chars("=> "));
    }
    Some(b)
}
