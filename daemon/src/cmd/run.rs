//! `stiltd run --config FILE`: the daemon on real instruments (or the HIL simulator's ptys).
//!
//! Starts the serial acquisition ([`crate::acquire::SerialBackend`]), the HDF5 recorder
//! (unless `--no-record`) and the control loop ([`crate::runtime::start`]), then waits for
//! SIGTERM or SIGINT (or `--duration`). On the way out the loop commands zero on every
//! heater, the heater task writes it to the supply (confirmed or reported), the recording is
//! closed, and the exit code is 0. After a panic anywhere (see `install_panic_guard`) the
//! heaters are commanded to zero the same way and the exit code is 1.
//!
//! `--status-every S` prints one JSON status line per S seconds on stdout (for people and
//! tests); `--summary-json` prints one JSON object at the end (counters, channels).

use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Duration;

use stilt_config::Config;

use super::config_errors;
use crate::acquire::{AcqHandle, FaultSink, SerialBackend};
use crate::record::{Recorder, RecorderOptions};
use crate::rows::{CountingSink, RowSink};
use crate::runtime::{self, RuntimeOptions};
use crate::status::{RecordingStatus, Status};

/// Arguments of `stiltd run`.
#[derive(clap::Args, Debug)]
pub struct RunArgs {
    /// The stage file (TOML) with its `[instruments]`.
    #[arg(long, short)]
    pub config: PathBuf,
    /// A port map to use instead of `instruments.port_map`.
    #[arg(long, value_name = "FILE")]
    pub port_map: Option<PathBuf>,
    /// Common options.
    #[command(flatten)]
    pub common: RunOptions,
}

/// Options shared by `stiltd run` and `stiltd hil`.
#[derive(clap::Args, Debug, Clone)]
pub struct RunOptions {
    /// Stop after this many seconds (default: run until SIGTERM or SIGINT).
    #[arg(long, value_name = "SECONDS")]
    pub duration: Option<f64>,
    /// Record into this folder instead of `recording.dir`.
    #[arg(long, value_name = "DIR")]
    pub out: Option<PathBuf>,
    /// Do not record.
    #[arg(long)]
    pub no_record: bool,
    /// Print a one-line JSON status every this many seconds on stdout (0: never).
    #[arg(long, value_name = "SECONDS", default_value_t = 0.0)]
    pub status_every: f64,
    /// Print a JSON summary (counters, instrument channels) on stdout at the end.
    #[arg(long)]
    pub summary_json: bool,
    /// Serve the HTTP API here instead of `network.bind` (`127.0.0.1:0` picks a free port).
    #[arg(long, value_name = "ADDR:PORT")]
    pub listen: Option<std::net::SocketAddr>,
    /// Do not serve the HTTP API.
    #[arg(long)]
    pub no_api: bool,
}

/// Runs `stiltd run`.
pub fn run(a: &RunArgs) -> ExitCode {
    let cfg = match stilt_config::load_file_with(&a.config, a.port_map.as_deref()) {
        Ok(c) => c,
        Err(e) => return config_errors(&e),
    };
    run_daemon(cfg, Some(a.config.clone()), &a.common)
}

/// The daemon on serial instruments, until a signal or `duration`. Exit 0 after a clean
/// stop, 1 if something failed, 2 for a configuration without instruments.
pub fn run_daemon(cfg: Config, config_path: Option<PathBuf>, o: &RunOptions) -> ExitCode {
    // Logging is set up by the binary (`crate::logging::init`: the journal under systemd).
    if cfg.instruments.is_none() {
        eprintln!(
            "stiltd: {} has no [instruments] section, so there is nothing to read (see config/examples/hardware-template.toml)",
            config_path
                .as_ref()
                .map_or("the configuration".into(), |p| p.display().to_string())
        );
        return ExitCode::from(2);
    }
    if let Some(d) = o.duration
        && !(d.is_finite() && d > 0.0)
    {
        eprintln!("stiltd: --duration {d}: allowed a positive number of seconds");
        return ExitCode::from(2);
    }
    let rt = match super::current_thread_runtime() {
        Ok(rt) => rt,
        Err(code) => return code,
    };
    match rt.block_on(serve(cfg, config_path, o)) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("stiltd: {e:#}");
            ExitCode::FAILURE
        }
    }
}

async fn serve(cfg: Config, config_path: Option<PathBuf>, o: &RunOptions) -> anyhow::Result<()> {
    use anyhow::Context;
    let start_utc_ns = crate::acquire::now_utc_ns();
    let (inner, recorder): (Box<dyn RowSink>, _) = if o.no_record || !cfg.recording.enabled {
        (Box::new(CountingSink::default()), None)
    } else {
        let mut ro = RecorderOptions::from_config(&cfg);
        if let Some(d) = &o.out {
            ro.dir = d.clone();
        }
        ro.start_utc_ns = Some(start_utc_ns);
        let (sink, handle) = Recorder::start(&cfg, ro).context("cannot start the recording")?;
        eprintln!(
            "stiltd: recording run {} into {}",
            handle.run_id(),
            handle.dir().display()
        );
        (Box::new(sink), Some(handle))
    };
    let backend = SerialBackend::start(&cfg)?;
    let acq = backend.handle();
    let sink = FaultSink::new(inner, &acq, start_utc_ns);
    let mut opts = RuntimeOptions::real_time(start_utc_ns);
    opts.duration_s = o.duration;
    opts.config_path = config_path;
    if let Some(h) = recorder.clone() {
        opts.recording = Some(Box::new(move || RecordingStatus::from_health(&h.health())));
    }
    let mut api_cfg = cfg.clone();
    if let Some(l) = o.listen {
        api_cfg.network.bind = l;
    }
    let (handles, shutdown, task) = runtime::start(cfg, Box::new(backend), Box::new(sink), opts);
    // Best effort on a panic anywhere (the API thread, the recorder, the loop): command zero
    // through the heater task and stop the loop, then let the default hook report it.
    let panicked = install_panic_guard(&acq, &shutdown);
    #[cfg(debug_assertions)]
    debug_panic_injection();
    // The HTTP API on a thread and runtime of its own: HTTP work never queues behind or
    // ahead of the control loop.
    let api = if o.no_api {
        None
    } else {
        match crate::api::spawn_thread(&api_cfg, handles.clone(), 1) {
            Ok(a) => {
                eprintln!("stiltd: API on http://{}", a.local_addr());
                Some(a)
            }
            Err(e) => {
                shutdown.trigger();
                let _ = task.await;
                let _ = acq.zero_heaters(Duration::from_secs(2)).await;
                anyhow::bail!("cannot serve the API on {}: {e}", api_cfg.network.bind);
            }
        }
    };
    eprintln!("stiltd: running (SIGTERM or Ctrl-C stops it; heaters go to zero)");

    let mut term = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate())
        .context("cannot catch SIGTERM")?;
    // SIGHUP (systemctl reload) rereads the stage file through the same checked path as
    // the API's reload: what may change while running is applied bumplessly, anything
    // else (or a file that fails validation) is refused and the running configuration stays.
    let mut hup = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::hangup())
        .context("cannot catch SIGHUP")?;
    let requests = handles.requests.clone();
    let mut status_rx = handles.status.clone();
    let every = (o.status_every > 0.0 && o.status_every.is_finite())
        .then(|| Duration::from_secs_f64(o.status_every));
    let mut printer = tokio::time::interval(every.unwrap_or(Duration::from_secs(3600)));
    printer.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Skip);
    printer.tick().await;
    let mut task = task;
    let end = loop {
        tokio::select! {
            _ = term.recv() => { eprintln!("stiltd: SIGTERM, stopping"); shutdown.trigger(); }
            _ = tokio::signal::ctrl_c() => { eprintln!("stiltd: SIGINT, stopping"); shutdown.trigger(); }
            _ = hup.recv() => {
                let (tx, rx) = tokio::sync::oneshot::channel();
                let req = crate::status::Request { change: crate::status::ControlRequest::Reload, who: "sighup".into(), reply: tx };
                if requests.send(req).await.is_ok() {
                    match rx.await {
                        Ok(Ok(a)) => tracing::info!(detail = %a.detail, "reload (SIGHUP) applied"),
                        Ok(Err(r)) => tracing::error!("reload (SIGHUP) refused, running configuration kept: {}", r.message),
                        Err(_) => {}
                    }
                }
            }
            _ = printer.tick(), if every.is_some() => {
                let st = status_rx.borrow_and_update().clone();
                println!("{}", status_json(&st, &acq));
            }
            r = &mut task => break r,
        }
    };
    if let Some(a) = api {
        if let Err(e) = a.stop() {
            tracing::warn!("the API server stopped with an error: {e}");
        }
    }
    // Whether the loop ended normally (it has commanded zero) or panicked (it could not),
    // the heater task is still alive: command zero through it and confirm the supply took it.
    let zeroed = acq.zero_heaters(Duration::from_secs(2)).await;
    if !zeroed {
        tracing::error!("could not confirm heaters at zero: check the supply");
    }
    let end = end.context("the control loop panicked (heaters commanded to zero)")?;
    if panicked.load(std::sync::atomic::Ordering::SeqCst) {
        // Exit 1, so that systemd's Restart=on-failure brings the service back.
        anyhow::bail!(
            "a panic stopped the daemon (see above); heaters {}",
            if zeroed {
                "confirmed at zero"
            } else {
                "NOT confirmed at zero"
            }
        );
    }
    let end = end.map_err(|e| anyhow::anyhow!("{e}"))?;
    let last = handles.status.borrow().clone();
    if o.summary_json {
        let c = &end.counters;
        let v = serde_json::json!({
            "reason": end.reason,
            "run_time_s": end.run_time_s,
            "ticks": c.ticks,
            "tilt_samples": c.tilt_samples,
            "tilt_bad": c.tilt_bad,
            "ticks_without_tilt": c.ticks_without_tilt,
            "ticks_missing_leg_temp": c.ticks_missing_leg_temp,
            "rows": { "tilt": end.report.tilt_rows, "control": end.report.control_rows,
                      "events": end.report.events, "dropped": end.report.dropped_rows },
            "fault_events": acq.fault_events(),
            "heaters_zeroed": zeroed,
            "channels": channels_json(&acq),
            "last_status": status_json(&last, &acq),
        });
        println!("{v}");
    }
    eprintln!(
        "stiltd: stopped ({}) after {:.1} s: {} ticks, {} tilt samples ({} unusable), heaters {}",
        end.reason,
        end.run_time_s,
        end.counters.ticks,
        end.counters.tilt_samples,
        end.counters.tilt_bad,
        if zeroed {
            "at zero"
        } else {
            "NOT confirmed at zero"
        }
    );
    Ok(())
}

/// Installs a panic hook that commands zero through the heater task and stops the loop,
/// then runs the default hook (which prints the panic). Both actions are plain channel
/// sends, so they work from any thread, with or without a runtime. The returned flag tells
/// the caller, once the loop has ended, that a panic happened.
fn install_panic_guard(
    acq: &AcqHandle,
    shutdown: &runtime::Shutdown,
) -> std::sync::Arc<std::sync::atomic::AtomicBool> {
    let flag = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(false));
    let (zero, stop, seen) = (acq.clone(), shutdown.clone(), flag.clone());
    let default = std::panic::take_hook();
    std::panic::set_hook(Box::new(move |info| {
        zero.command_zero_now();
        stop.trigger();
        seen.store(true, std::sync::atomic::Ordering::SeqCst);
        default(info);
    }));
    flag
}

/// Debug builds only: `STILTD_DEBUG_PANIC_AFTER_S=S` panics on a thread of its own S
/// seconds after the start, so that the system tests can drive a real panic through the
/// guard above. Release builds do not contain this.
#[cfg(debug_assertions)]
fn debug_panic_injection() {
    let Some(after) = std::env::var("STILTD_DEBUG_PANIC_AFTER_S")
        .ok()
        .and_then(|v| v.parse::<f64>().ok())
        .filter(|s| s.is_finite() && *s >= 0.0)
    else {
        return;
    };
    let _ = std::thread::Builder::new()
        .name("debug-panic".into())
        .spawn(move || {
            std::thread::sleep(Duration::from_secs_f64(after));
            panic!(
                "deliberate panic after {after} s (STILTD_DEBUG_PANIC_AFTER_S, debug builds only)"
            );
        });
}

fn channels_json(acq: &AcqHandle) -> serde_json::Value {
    serde_json::Value::Array(
        acq.channels()
            .iter()
            .map(|c| {
                serde_json::json!({
                    "name": c.name, "port": c.port, "connected": c.connected,
                    "requests": c.requests, "timeouts": c.timeouts,
                    "bad_frames": c.bad_frames, "reconnects": c.reconnects,
                })
            })
            .collect(),
    )
}

/// One status line: the loop's view (mode, tilt, legs) and the instrument counters.
fn status_json(s: &Status, acq: &AcqHandle) -> serde_json::Value {
    let f = |v: Option<f64>| v.filter(|x| x.is_finite());
    serde_json::json!({
        "uptime_s": s.uptime_s,
        "mode": s.mode.as_str(),
        "ready": s.ready,
        "ticks": s.timing.ticks,
        "tilt": s.axes.iter().map(|a| serde_json::json!({
            "urad": f(a.measured_urad), "quality": a.quality.as_str(), "age_s": a.age_s,
        })).collect::<Vec<_>>(),
        "legs": s.legs.iter().zip(acq.mismatches().into_iter().chain(std::iter::repeat(false))).map(|(l, m)| serde_json::json!({
            "name": l.name, "temp_c": f(l.temp_c), "quality": l.quality.as_str(),
            "power_w": l.power_w, "drive_v": l.drive_v,
            "readback_power_w": f(l.readback_power_w), "readback_mismatch": m,
        })).collect::<Vec<_>>(),
        "channels": channels_json(acq),
    })
}
