//! `stiltd tune`: a step test (and optionally a relay test) of one loop on the simulated
//! stage, or a step test of a leg or a tilt axis through a running daemon (`--daemon
//! URL`), with the model fit and the tuning rules' proposals; `--apply RULE` puts a proposal into the daemon
//! after a `[y/N]` confirmation. The engines are [`crate::tune`] (simulated) and
//! [`crate::tune::remote`] (through the API); the analysis is shared.

use std::io::IsTerminal;
use std::path::PathBuf;
use std::process::ExitCode;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Duration;

use super::config_errors;
use crate::api::client::Client;
use crate::tune::remote::{self, RemoteOptions};
use crate::tune::{self, RelayOptions, StepOptions, Target, TuneResult};

/// Arguments of `stiltd tune`.
#[derive(clap::Args, Debug)]
pub struct TuneArgs {
    /// The loop: `tilt:x`, `tilt:y`, or `leg:NAME` / `leg:N` (1-based). With --daemon a
    /// tilt axis is stepped through its held tilt correction in temperature mode.
    #[arg(long = "loop", value_name = "LOOP", default_value = "tilt:x")]
    pub target: String,
    /// A scenario of your own (TOML); default: the built-in demo scenario.
    #[arg(long, short, conflicts_with = "daemon")]
    pub config: Option<PathBuf>,
    /// Test through the running daemon at this address (e.g. http://127.0.0.1:8040)
    /// instead of on the simulated stage: its mode, manual power, setpoints and held tilt
    /// correction are read first and put back at the end, whatever happens.
    #[arg(long, value_name = "URL")]
    pub daemon: Option<String>,
    /// With --daemon: a file holding the access token (else STILT_TOKEN).
    #[arg(long, value_name = "FILE", requires = "daemon")]
    pub token_file: Option<PathBuf>,
    /// With --daemon: PEM file of the certificate authority to trust for https://.
    #[arg(long, value_name = "PEM", requires = "daemon")]
    pub ca_file: Option<PathBuf>,
    /// Step size in the plant's input unit (W for a leg, µrad of tilt correction for an
    /// axis); default: a quarter of the heater headroom, or 2 µrad. Checked against every
    /// limit. With --daemon a leg's step is one of the manual power of every heater, a
    /// tilt axis's one of the held tilt correction (within control.tilt_output_limit_urad).
    #[arg(long, allow_negative_numbers = true)]
    pub step: Option<f64>,
    /// Warm-up from a cold start before the baseline (simulated stage).
    #[arg(long, default_value = "3h", value_parser = crate::demo::parse_duration_s)]
    pub warmup: f64,
    /// With --daemon: hold the daemon in the test's mode this long before the baseline
    /// (daemon time; a leg: manual mode at the present power; a tilt axis: temperature
    /// mode). Give the stage time to become steady: the baseline's straight line is
    /// removed as drift, and a leg still warming biases the fit.
    #[arg(long, default_value = "10m", value_parser = crate::demo::parse_duration_s)]
    pub settle: f64,
    /// With --daemon: at most one progress line on stderr this often, seconds.
    #[arg(long, value_name = "SECONDS", default_value_t = 10.0)]
    pub progress_every: f64,
    /// After the proposals, apply this one: `simc`, `zn-pi`, `zn-pid`, `relay-pi`,
    /// `relay-pid`. With --daemon it asks `[y/N]` on the terminal, then PUTs the gains;
    /// on the simulated stage nothing is applied and its TOML lines are printed.
    #[arg(long, value_name = "RULE")]
    pub apply: Option<String>,
    /// Apply without asking (needed when standard input is not a terminal).
    #[arg(long, requires = "apply")]
    pub yes: bool,
    /// Baseline before the step; default 30m for a leg, 10m for a tilt axis.
    #[arg(long, value_parser = crate::demo::parse_duration_s)]
    pub baseline: Option<f64>,
    /// Record after the step; default 3h for a leg, 30m for a tilt axis.
    #[arg(long, value_parser = crate::demo::parse_duration_s)]
    pub record: Option<f64>,
    /// Also run an Åström–Hägglund relay test (bounded amplitude) for Ku and Pu; with
    /// --daemon after the step test, switching the manual power between p0 ± amplitude
    /// (so the heaters must be held above the amplitude), at most 6 h; with --daemon a
    /// leg only.
    #[arg(long)]
    pub relay: bool,
    /// Relay amplitude (input unit); default: the step size.
    #[arg(long)]
    pub relay_amplitude: Option<f64>,
    /// Relay hysteresis (output unit); default 3 mK for a leg, 0.05 µrad for tilt.
    #[arg(long)]
    pub relay_hysteresis: Option<f64>,
    /// Override the scenario's random seed.
    #[arg(long, conflicts_with = "daemon")]
    pub seed: Option<u64>,
    /// Print the result as one JSON object instead of a table.
    #[arg(long)]
    pub json: bool,
}

/// Runs `stiltd tune`.
pub fn run(a: &TuneArgs) -> ExitCode {
    if a.daemon.is_some() {
        return run_daemon(a);
    }
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
    if let Err(code) = print_result(a, &result) {
        return code;
    }
    if let Some(key) = &a.apply {
        let p = match tune::find_proposal(&result, key) {
            Ok(p) => p,
            Err(e) => {
                eprintln!("stiltd tune: --apply: {e}");
                return ExitCode::from(2);
            }
        };
        let current = match target {
            Target::Leg(_) => cfg.control.leg_loop,
            Target::TiltAxis(_) => cfg.control.tilt_loop,
        };
        eprintln!(
            "stiltd tune: --apply {key}: this was the simulated stage, so nothing was applied; to use `{key}`, paste these lines into the configuration (or run with --daemon URL):"
        );
        eprint!("{}", tune::toml_for(target, &tune::gains_of(p, &current)));
    }
    ExitCode::SUCCESS
}

fn print_result(a: &TuneArgs, result: &TuneResult) -> Result<(), ExitCode> {
    if a.json {
        match serde_json::to_string_pretty(result) {
            Ok(s) => println!("{s}"),
            Err(e) => {
                eprintln!("stiltd tune: cannot encode the result: {e}");
                return Err(ExitCode::FAILURE);
            }
        }
    } else {
        print!("{}", tune::render(result));
    }
    Ok(())
}

/// Reads the token as stiltctl does: `--token-file`, else `STILT_TOKEN`.
fn token(a: &TuneArgs) -> Result<Option<String>, String> {
    if let Some(p) = &a.token_file {
        let t = std::fs::read_to_string(p)
            .map_err(|e| format!("--token-file: cannot read {}: {e}", p.display()))?;
        let t = t.trim().to_string();
        if t.is_empty() {
            return Err(format!("--token-file: {} is empty", p.display()));
        }
        return Ok(Some(t));
    }
    Ok(std::env::var("STILT_TOKEN")
        .ok()
        .map(|t| t.trim().to_string())
        .filter(|t| !t.is_empty()))
}

/// Sets `flag` on SIGINT or SIGTERM, from a thread of its own.
fn catch_signals(flag: Arc<AtomicBool>) -> Result<(), String> {
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .map_err(|e| format!("cannot start the signal watcher: {e}"))?;
    let (ready_tx, ready_rx) = std::sync::mpsc::channel();
    std::thread::Builder::new()
        .name("stiltd-tune-signals".into())
        .spawn(move || {
            rt.block_on(async move {
                use tokio::signal::unix::{SignalKind, signal};
                let term = signal(SignalKind::terminate());
                let int = signal(SignalKind::interrupt());
                let (Ok(mut term), Ok(mut int)) = (term, int) else {
                    let _ = ready_tx.send(false);
                    return;
                };
                let _ = ready_tx.send(true);
                loop {
                    tokio::select! {
                        _ = term.recv() => {}
                        _ = int.recv() => {}
                    }
                    flag.store(true, Ordering::SeqCst);
                    eprintln!("stiltd tune: signal received: stopping the test and restoring the daemon's state");
                }
            });
        })
        .map_err(|e| format!("cannot start the signal watcher: {e}"))?;
    match ready_rx.recv_timeout(Duration::from_secs(5)) {
        Ok(true) => Ok(()),
        _ => Err("cannot catch SIGINT and SIGTERM".into()),
    }
}

/// `stiltd tune --daemon URL`.
fn run_daemon(a: &TuneArgs) -> ExitCode {
    let url = a.daemon.as_deref().unwrap_or_default();
    let usage = |m: String| {
        eprintln!("stiltd tune: {m}");
        ExitCode::from(2)
    };
    if a.target.starts_with("tilt:") && a.relay {
        // Refused before connecting: the reason does not depend on the daemon.
        return usage(
            "--relay: a relay test of a tilt axis through the daemon is not available (its step test is); drop --relay, or run the tilt relay test on the simulated stage (without --daemon)".into(),
        );
    }
    if !(a.progress_every.is_finite() && a.progress_every > 0.0 && a.progress_every <= 3600.0) {
        return usage(format!(
            "--progress-every {}: give more than 0 and at most 3600 seconds",
            a.progress_every
        ));
    }
    let token = match token(a) {
        Ok(t) => t,
        Err(e) => return usage(e),
    };
    let ca = match &a.ca_file {
        Some(p) => match std::fs::read(p) {
            Ok(b) => Some(b),
            Err(e) => return usage(format!("--ca-file: cannot read {}: {e}", p.display())),
        },
        None => None,
    };
    let client = match Client::new(url, token, ca.as_deref(), Duration::from_secs(10)) {
        Ok(c) => c,
        Err(e) => return usage(format!("--daemon {url}: {e}")),
    };
    // The loop's name is checked against the daemon's own legs.
    let cfg = match remote::DaemonApi::config(&client) {
        Ok(c) => c,
        Err(e) => {
            eprintln!("stiltd tune: cannot read the daemon's configuration: {e}");
            return ExitCode::FAILURE;
        }
    };
    let target = match parse_loop(
        &a.target,
        &cfg.legs.iter().map(|l| l.name.as_str()).collect::<Vec<_>>(),
    ) {
        Ok(t) => t,
        Err(e) => return usage(format!("--loop: {e}")),
    };
    let defaults = RemoteOptions::new(target);
    let opts = RemoteOptions {
        step: a.step,
        settle_s: a.settle,
        baseline_s: a.baseline.unwrap_or(defaults.baseline_s),
        record_s: a.record.unwrap_or(defaults.record_s),
        progress_every: Duration::from_secs_f64(a.progress_every),
        ..defaults
    };
    let cancel = Arc::new(AtomicBool::new(false));
    if let Err(e) = catch_signals(cancel.clone()) {
        eprintln!("stiltd tune: {e}");
        return ExitCode::FAILURE;
    }
    let run = match remote::run_remote_step_test(&client, &opts, &cancel, &mut |l| eprintln!("{l}"))
    {
        Ok(r) => r,
        Err(e) => {
            eprintln!("stiltd tune: {e}");
            return ExitCode::FAILURE;
        }
    };
    for r in &run.restored {
        eprintln!("tune: restored {r}");
    }
    let relay = if a.relay {
        let ro = RelayOptions {
            amplitude: a.relay_amplitude.or(a.step),
            hysteresis: a.relay_hysteresis,
            ..RelayOptions::default()
        };
        match remote::run_remote_relay_test(&client, &opts, &ro, &cancel, &mut |l| eprintln!("{l}"))
        {
            Ok(r) => {
                for x in &r.restored {
                    eprintln!("tune: restored {x}");
                }
                Some(r.record)
            }
            Err(e) => {
                eprintln!("stiltd tune: relay test: {e}");
                return ExitCode::FAILURE;
            }
        }
    } else {
        None
    };
    let result = match tune::analyse_with(&run.context, &run.record, relay.as_ref()) {
        Ok(r) => r,
        Err(e) => {
            eprintln!("stiltd tune: {e}");
            return ExitCode::FAILURE;
        }
    };
    if let Err(code) = print_result(a, &result) {
        return code;
    }
    let Some(key) = &a.apply else {
        return ExitCode::SUCCESS;
    };
    let p = match tune::find_proposal(&result, key) {
        Ok(p) => p,
        Err(e) => return usage(format!("--apply: {e}")),
    };
    let which = match target {
        Target::Leg(_) => "the leg loop of every leg",
        Target::TiltAxis(_) => "the tilt loop (both axes share its gains)",
    };
    let question = format!(
        "apply {} (Kp {:.4}, Ti {} s, Td {:.4} s) to {which} of the daemon at {url}?",
        p.rule,
        p.kp,
        p.ti_s.map_or("none".into(), |t| format!("{t:.4}")),
        p.td_s
    );
    let stdin = std::io::stdin();
    let tty = stdin.is_terminal();
    let mut input = stdin.lock();
    match remote::confirm(&question, a.yes, tty, &mut input, &mut std::io::stderr()) {
        Ok(true) => {}
        Ok(false) => {
            eprintln!("stiltd tune: not applied (the answer was not yes)");
            return ExitCode::SUCCESS;
        }
        Err(e) => {
            eprintln!("stiltd tune: {e}");
            return ExitCode::FAILURE;
        }
    }
    match remote::apply_proposal(&client, result.target, p) {
        Ok((reply, now)) => {
            eprintln!(
                "stiltd tune: applied; the daemon answered \"{}\" (by {}); the {} loop now has kp = {}, ti_s = {}, td_s = {}",
                reply.detail,
                reply.by,
                match target {
                    Target::Leg(_) => "leg",
                    Target::TiltAxis(_) => "tilt",
                },
                now.kp,
                now.ti_s.map_or("none".into(), |t| t.to_string()),
                now.td_s
            );
            eprintln!(
                "stiltd tune: the change lasts until the daemon restarts; the TOML lines above keep it"
            );
            ExitCode::SUCCESS
        }
        Err(e) => {
            eprintln!("stiltd tune: --apply {key}: {e}");
            ExitCode::FAILURE
        }
    }
}

/// `tilt:x`, `tilt:y`, or `leg:NAME` / `leg:N` (1-based) among the daemon's leg `names`.
fn parse_loop(s: &str, names: &[&str]) -> Result<Target, String> {
    let bad = || {
        format!(
            "`{s}` is not a loop of this daemon: give `tilt:x`, `tilt:y`, or `leg:NAME` / `leg:N` ({}; N = 1…{})",
            names.join(", "),
            names.len()
        )
    };
    match s.split_once(':') {
        Some(("tilt", "x")) => Ok(Target::TiltAxis(0)),
        Some(("tilt", "y")) => Ok(Target::TiltAxis(1)),
        Some(("leg", what)) => {
            if let Some(i) = names.iter().position(|n| *n == what) {
                return Ok(Target::Leg(i));
            }
            match what.parse::<usize>() {
                Ok(n) if (1..=names.len()).contains(&n) => Ok(Target::Leg(n - 1)),
                _ => Err(bad()),
            }
        }
        _ => Err(bad()),
    }
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

#[cfg(test)]
mod tests {
    use super::parse_loop;
    use crate::tune::Target;

    #[test]
    fn loops_parse_by_leg_name_or_number_or_tilt_axis() {
        let names = ["A", "B", "C"];
        assert_eq!(parse_loop("leg:B", &names), Ok(Target::Leg(1)));
        assert_eq!(parse_loop("leg:3", &names), Ok(Target::Leg(2)));
        assert_eq!(parse_loop("tilt:x", &names), Ok(Target::TiltAxis(0)));
        assert_eq!(parse_loop("tilt:y", &names), Ok(Target::TiltAxis(1)));
        for bad in ["leg:4", "leg:0", "leg:Z", "legs", "", "tilt:z", "tilt:"] {
            let e = parse_loop(bad, &names).unwrap_err();
            assert!(
                e.contains("A, B, C") && e.contains("N = 1…3") && e.contains("tilt:x"),
                "{bad}: {e}"
            );
        }
    }
}
