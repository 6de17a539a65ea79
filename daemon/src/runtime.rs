//! The running daemon's control loop: a tokio task that ticks at the control rate.
//!
//! [`start`] spawns the loop over a [`Backend`] (where readings come from and commands go:
//! the in-process [`SimBackend`], or the serial instruments) and a [`RowSink`], and returns
//! the [`Handles`] the outside talks through plus a [`Shutdown`] switch. Each tick:
//!
//! 1. `backend.poll(now)` hands over every tilt reading since the last tick and the latest
//!    leg temperatures (it never blocks: serial tasks run on their own);
//! 2. the [`Pipeline`] averages, runs the controller and writes the row;
//! 3. `backend.apply(now, …)` sends the heater commands out;
//! 4. a fresh [`Status`] goes on the watch channel and the row on the broadcast channel.
//!
//! Requests ([`crate::status::Request`]) are applied between ticks as they arrive, checked
//! against the configuration first; a refused request changes nothing.
//!
//! Timing: a `tokio::time::interval` at the control period (divided by the speed factor
//! for simulated stages). On real hardware it uses `MissedTickBehavior::Skip`: if the
//! process stalls, the missed ticks are *not* run back to back on stale readings; the
//! loop resumes on the period grid and counts the late tick as an overrun. A simulated
//! stage at a speed factor uses `Burst` instead ([`RuntimeOptions::catch_up`]): its
//! readings are computed for the tick's own run time, so catching up loses nothing and
//! every tick of simulated time is run even when the period is below the timer's
//! millisecond resolution. Jitter is measured as |actual interval − period| over the
//! last 600 ticks.
//!
//! On shutdown (the [`Shutdown`] switch, SIGTERM/SIGINT in the binary, or the end of a
//! set duration) the loop commands zero on every heater (`Backend::safe_off`), then
//! writes the end event and closes the sink.
//!
//! Under systemd (`NOTIFY_SOCKET` set; a no-op otherwise) the loop itself says
//! `READY=1` after its first tick, a one-line `STATUS=` every minute, `WATCHDOG=1` every
//! half watchdog period *from the tick* — so a loop that stops ticking stops feeding the
//! watchdog and gets the service restarted — and `STOPPING=1` on shutdown.

use std::collections::VecDeque;
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

use stilt_config::{Config, LoopGains, Mode, Tiltmeter};
use stilt_hil_sim::SimStage;
use tokio::sync::{broadcast, mpsc, watch};
use tokio::time::{Instant, MissedTickBehavior};

use crate::core::cascade::Outputs;
use crate::pipeline::{Command, Pipeline, PipelineCounters};
use crate::rows::{ControlRow, EventKind, Quality, RowSink, SinkReport};
use crate::sim::TickReport;
use crate::status::{
    AlarmStatus, Applied, AxisStatus, ChannelStatus, ControlRequest, Handles, LegStatus,
    LoopTiming, RecordingStatus, Refused, Request, Settings, Status,
};

/// Readings gathered since the last tick, and instrument counters.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Readings {
    /// Every tilt reading since the last poll: (run time s, raw, quality), in time order.
    pub tilt: Vec<(f64, [f64; 2], Quality)>,
    /// Latest temperature of each leg, °C, with its quality (configuration order).
    pub leg_temps: Vec<(f64, Quality)>,
    /// Age of each leg's latest usable temperature, s.
    pub leg_temp_age_s: Vec<Option<f64>>,
    /// Heater power read back from the supply, W, where it reads back.
    pub readback_power_w: Vec<Option<f64>>,
    /// Instrument counters.
    pub channels: Vec<ChannelStatus>,
}

/// Where readings come from and commands go. Methods never block; they are called from
/// the control loop task once per tick.
pub trait Backend: Send {
    /// Everything read since the last call, at run time `now_s`.
    fn poll(&mut self, now_s: f64) -> Readings;
    /// Sends the heater commands of this tick.
    fn apply(&mut self, now_s: f64, power_w: &[f64], drive_v: &[f64]);
    /// Heaters to zero, best effort, as fast as possible.
    fn safe_off(&mut self);
    /// Sees the whole tick's outputs after `apply` (the simulated stage uses it to report
    /// its truth beside them). Default: nothing.
    fn after_tick(&mut self, _now_s: f64, _out: &Outputs) {}
}

/// Options of one run.
pub struct RuntimeOptions {
    /// Run-clock seconds per wall-clock second (1 on real hardware).
    pub speed: f64,
    /// Stop after this much run time, s (None: until shutdown).
    pub duration_s: Option<f64>,
    /// The configuration file, for reloads (None: reload is refused).
    pub config_path: Option<PathBuf>,
    /// Reads the recorder's health for status.
    pub recording: Option<Box<dyn Fn() -> RecordingStatus + Send + Sync>>,
    /// UTC of run time 0, ns.
    pub start_utc_ns: i64,
    /// Run missed ticks back to back (simulated stages) instead of skipping them (hardware).
    pub catch_up: bool,
}

impl RuntimeOptions {
    /// Real time, no end, no reload, no recorder health, missed ticks skipped.
    pub fn real_time(start_utc_ns: i64) -> Self {
        RuntimeOptions {
            speed: 1.0,
            duration_s: None,
            config_path: None,
            recording: None,
            start_utc_ns,
            catch_up: false,
        }
    }
}

/// Ends a run: heaters to zero, recording closed.
#[derive(Debug, Clone)]
pub struct Shutdown(watch::Sender<bool>);

impl Shutdown {
    /// Asks the loop to stop after the current tick.
    pub fn trigger(&self) {
        let _ = self.0.send(true);
    }
}

/// How a run ended.
#[derive(Debug, Clone, PartialEq)]
pub struct RunEnd {
    /// Why it ended.
    pub reason: String,
    /// The sink's final report.
    pub report: SinkReport,
    /// The pipeline's counters.
    pub counters: PipelineCounters,
    /// Run time reached, s.
    pub run_time_s: f64,
}

/// The control loop failed to close its sink.
#[derive(Debug, thiserror::Error)]
#[error("closing the recording failed: {0}")]
pub struct RuntimeError(String);

/// Capacity of the live row broadcast: 10 minutes at 1 Hz before a slow reader lags.
const ROWS_CAPACITY: usize = 600;
/// Requests waiting for the loop.
const REQUESTS_CAPACITY: usize = 32;
/// Ticks over which jitter percentiles are computed.
const JITTER_WINDOW: usize = 600;

/// Starts the control loop on the current tokio runtime.
pub fn start(
    cfg: Config,
    backend: Box<dyn Backend>,
    sink: Box<dyn RowSink>,
    opts: RuntimeOptions,
) -> (
    Handles,
    Shutdown,
    tokio::task::JoinHandle<Result<RunEnd, RuntimeError>>,
) {
    let pipeline = Pipeline::new(cfg.clone(), sink, opts.start_utc_ns);
    let status0 = Arc::new(initial_status(&cfg, opts.start_utc_ns));
    let (status_tx, status_rx) = watch::channel(status0);
    let (settings_tx, settings_rx) =
        watch::channel(Arc::new(Settings::from_config(Arc::new(cfg.clone()))));
    let (rows_tx, _) = broadcast::channel(ROWS_CAPACITY);
    let (req_tx, req_rx) = mpsc::channel(REQUESTS_CAPACITY);
    let (stop_tx, stop_rx) = watch::channel(false);
    let handles = Handles {
        status: status_rx,
        settings: settings_rx,
        rows: rows_tx.clone(),
        requests: req_tx,
    };
    let lp = Loop {
        notifier: Notifier::new(),
        cfg,
        pipeline,
        backend,
        opts,
        status_tx,
        settings_tx,
        rows_tx,
        jitter: VecDeque::with_capacity(JITTER_WINDOW),
        jitter_scratch: Vec::with_capacity(JITTER_WINDOW),
        timing: LoopTiming::default(),
        last_tilt_ok_s: None,
        last_readings: Readings::default(),
    };
    let task = tokio::spawn(lp.run(req_rx, stop_rx));
    (handles, Shutdown(stop_tx), task)
}

/// systemd notifications, sent from the control loop itself.
struct Notifier {
    watchdog_every: Option<Duration>,
    last_ping: Option<std::time::Instant>,
    last_status: Option<std::time::Instant>,
    ready: bool,
}

impl Notifier {
    fn new() -> Self {
        Notifier {
            watchdog_every: sd_notify::watchdog_enabled().map(|w| w / 2),
            last_ping: None,
            last_status: None,
            ready: false,
        }
    }

    /// Called after every tick.
    fn tick(&mut self, status: &Status) {
        use sd_notify::NotifyState;
        let now = std::time::Instant::now();
        let line = || {
            let tilt = |k: usize| {
                status.axes[k].measured_urad.map_or("—".to_string(), |v| {
                    format!("{:+.1} nrad", (v - status.axes[k].setpoint_urad) * 1e3)
                })
            };
            let active = status.alarms.iter().filter(|a| a.active).count();
            format!(
                "mode {}, tilt error x {} y {}, {} alarm(s) active, tick {}",
                status.mode,
                tilt(0),
                tilt(1),
                active,
                status.timing.ticks
            )
        };
        if !self.ready {
            self.ready = true;
            let _ = sd_notify::notify(&[NotifyState::Ready, NotifyState::Status(&line())]);
            self.last_status = Some(now);
        } else if self
            .last_status
            .is_none_or(|t| now - t >= Duration::from_secs(60))
        {
            let _ = sd_notify::notify(&[NotifyState::Status(&line())]);
            self.last_status = Some(now);
        }
        if let Some(every) = self.watchdog_every {
            if self.last_ping.is_none_or(|t| now - t >= every) {
                let _ = sd_notify::notify(&[NotifyState::Watchdog]);
                self.last_ping = Some(now);
            }
        }
    }

    fn stopping(&self) {
        let _ = sd_notify::notify(&[sd_notify::NotifyState::Stopping]);
    }
}

struct Loop {
    notifier: Notifier,
    cfg: Config,
    pipeline: Pipeline,
    backend: Box<dyn Backend>,
    opts: RuntimeOptions,
    status_tx: watch::Sender<Arc<Status>>,
    settings_tx: watch::Sender<Arc<Settings>>,
    rows_tx: broadcast::Sender<Arc<ControlRow>>,
    jitter: VecDeque<f64>,
    jitter_scratch: Vec<f64>,
    timing: LoopTiming,
    last_tilt_ok_s: Option<f64>,
    last_readings: Readings,
}

impl Loop {
    async fn run(
        mut self,
        mut req_rx: mpsc::Receiver<Request>,
        mut stop_rx: watch::Receiver<bool>,
    ) -> Result<RunEnd, RuntimeError> {
        let speed = if self.opts.speed > 0.0 && self.opts.speed.is_finite() {
            self.opts.speed
        } else {
            1.0
        };
        let period_wall = Duration::from_secs_f64(self.cfg.control.period_s() / speed);
        let t0 = Instant::now();
        let mut iv = tokio::time::interval_at(t0 + period_wall, period_wall);
        iv.set_missed_tick_behavior(if self.opts.catch_up {
            MissedTickBehavior::Burst
        } else {
            MissedTickBehavior::Skip
        });
        self.timing.period_s = self.cfg.control.period_s();
        tracing::info!(stage = %self.cfg.stage_name, mode = %self.cfg.control.mode, rate_hz = self.cfg.control.rate_hz, speed, "control loop started");
        let mut last_tick: Option<Instant> = None;
        let reason = loop {
            tokio::select! {
                biased;
                changed = stop_rx.changed() => {
                    if changed.is_err() || *stop_rx.borrow() {
                        break "shutdown requested".to_string();
                    }
                }
                Some(req) = req_rx.recv() => {
                    let now_s = t0.elapsed().as_secs_f64() * speed;
                    let asked = format!("{:?}", req.change);
                    let answer = self.handle(now_s, req.change, &req.who);
                    match &answer {
                        // Published before the answer leaves: whoever asked reads it back.
                        Ok(_) => self.publish_settings(),
                        Err(r) => tracing::info!(who = %req.who, field = %r.field, "request refused: {asked}: {}", r.message),
                    }
                    let _ = req.reply.send(answer);
                }
                at = iv.tick() => {
                    // Run time is the tick's scheduled time (exact in simulation); jitter is
                    // measured on the actual wake-up time.
                    let now_s = (at - t0).as_secs_f64() * speed;
                    let woke = Instant::now();
                    if let Some(prev) = last_tick {
                        self.note_interval((woke - prev).as_secs_f64(), period_wall.as_secs_f64());
                    }
                    last_tick = Some(woke);
                    let work = std::time::Instant::now();
                    self.tick(now_s, t0);
                    self.timing.last_tick_work_s = work.elapsed().as_secs_f64();
                    if self.opts.duration_s.is_some_and(|d| now_s >= d - 1e-9) {
                        break "run complete".to_string();
                    }
                }
            }
        };
        tracing::info!(reason = %reason, ticks = self.pipeline.counters().ticks, "control loop stopping: heaters to zero");
        self.notifier.stopping();
        self.backend.safe_off();
        let run_time_s = t0.elapsed().as_secs_f64() * speed;
        self.pipeline.event(
            run_time_s,
            EventKind::Limit,
            "stiltd",
            "heaters commanded to zero for shutdown".into(),
        );
        let (report, counters) = self
            .pipeline
            .finish(run_time_s, &reason)
            .map_err(|e| RuntimeError(e.to_string()))?;
        Ok(RunEnd {
            reason,
            report,
            counters,
            run_time_s,
        })
    }

    fn note_interval(&mut self, dt_wall: f64, period_wall: f64) {
        let j = (dt_wall - period_wall).abs();
        if self.jitter.len() == JITTER_WINDOW {
            self.jitter.pop_front();
        }
        self.jitter.push_back(j);
        self.timing.jitter_max_s = self.timing.jitter_max_s.max(j);
        // A simulated stage catching up (speed factor, sub-millisecond periods) is late by
        // design and loses nothing; only a real-time loop counts overruns and trips on them.
        if dt_wall > 1.5 * period_wall && !self.opts.catch_up {
            self.timing.overruns += 1;
            self.pipeline.note_overrun();
        }
        // Two selections on a reused buffer instead of a sort and an allocation per tick.
        let v = &mut self.jitter_scratch;
        v.clear();
        v.extend(self.jitter.iter().copied());
        let at = |p: f64| ((v.len() - 1) as f64 * p).round() as usize;
        let (i50, i99) = (at(0.5), at(0.99));
        let p99 = *v.select_nth_unstable_by(i99, f64::total_cmp).1;
        let p50 = if i50 < i99 {
            *v[..i99].select_nth_unstable_by(i50, f64::total_cmp).1
        } else {
            p99
        };
        // Timing is reported in run-clock seconds' wall equivalent: real seconds.
        self.timing.jitter_p50_s = p50;
        self.timing.jitter_p99_s = p99;
    }

    fn tick(&mut self, now_s: f64, t0: Instant) {
        let (out, r) = run_tick(&mut self.pipeline, self.backend.as_mut(), now_s);
        if let Some(&(t, _, _)) = r.tilt.iter().rev().find(|s| s.2.is_usable()) {
            self.last_tilt_ok_s = Some(t);
        }
        self.timing.ticks = self.pipeline.counters().ticks;
        self.last_readings = r;
        let status = self.status(now_s, t0, &out);
        self.notifier.tick(&status);
        let _ = self.status_tx.send(Arc::new(status));
        if let Some(row) = self.pipeline.last_row() {
            let _ = self.rows_tx.send(Arc::new(row.clone()));
        }
    }

    fn status(&self, now_s: f64, _t0: Instant, out: &Outputs) -> Status {
        let row = self.pipeline.last_row();
        let r = &self.last_readings;
        let axes = [0, 1].map(|k| {
            let m = row.map(|x| x.tilt_urad[k]).filter(|v| v.is_finite());
            AxisStatus {
                measured_urad: m,
                quality: row.map_or(Quality::Missing, |x| x.tilt_quality),
                age_s: self.last_tilt_ok_s.map(|t| (now_s - t).max(0.0)),
                setpoint_urad: out.tilt_setpoint_urad[k],
                target_urad: out.tilt_target_urad[k],
                terms: out.axis_terms[k],
            }
        });
        let legs = self
            .cfg
            .legs
            .iter()
            .enumerate()
            .map(|(i, l)| {
                let (t, q) = r
                    .leg_temps
                    .get(i)
                    .copied()
                    .unwrap_or((f64::NAN, Quality::Missing));
                LegStatus {
                    name: l.name.clone(),
                    temp_c: (q.is_usable() && t.is_finite()).then_some(t),
                    quality: q,
                    age_s: r.leg_temp_age_s.get(i).copied().flatten(),
                    setpoint_c: out.leg_setpoint_c[i],
                    power_w: out.power_w[i],
                    drive_v: out.drive_v[i],
                    readback_power_w: r.readback_power_w.get(i).copied().flatten(),
                    terms: out.leg_terms[i],
                }
            })
            .collect::<Vec<_>>();
        let mode = out.mode;
        let temps_ok = legs.iter().all(|l| l.temp_c.is_some());
        let tilt_ok = axes.iter().all(|a| a.measured_urad.is_some());
        let ready = match mode {
            Mode::Off | Mode::Manual => true,
            Mode::Temperature => temps_ok,
            Mode::Level => temps_ok && tilt_ok,
        };
        let c = self.pipeline.controller().control();
        Status {
            version: env!("CARGO_PKG_VERSION"),
            stage_name: self.cfg.stage_name.clone(),
            started_utc_ns: self.opts.start_utc_ns,
            now_utc_ns: self.opts.start_utc_ns.saturating_add((now_s * 1e9) as i64),
            uptime_s: now_s,
            mode,
            axes,
            leg_bias_c: out.leg_setpoint_c.iter().sum::<f64>()
                / out.leg_setpoint_c.len().max(1) as f64,
            leg_bias_target_c: c.leg_bias_c,
            legs,
            alarms: self
                .pipeline
                .alarms()
                .iter()
                .map(|a| AlarmStatus {
                    id: a.id.clone(),
                    message: a.message.clone(),
                    since_utc_ns: self
                        .opts
                        .start_utc_ns
                        .saturating_add((a.since_s * 1e9) as i64),
                    active: a.active,
                    latched: true,
                    acknowledged_by: a.acknowledged_by.clone(),
                })
                .collect(),
            timing: self.timing.clone(),
            recording: self
                .opts
                .recording
                .as_ref()
                .map(|f| f())
                .unwrap_or_default(),
            channels: r.channels.clone(),
            ready,
        }
    }

    /// Publishes the configuration in force (see [`Settings`]).
    fn publish_settings(&self) {
        let s = Settings {
            file: Arc::new(self.cfg.clone()),
            control: self.pipeline.controller().control().clone(),
        };
        self.settings_tx.send_if_modified(|cur| {
            let changed = **cur != s;
            if changed {
                *cur = Arc::new(s);
            }
            changed
        });
    }

    /// Checks a request against the configuration and applies it, or refuses it
    /// without changing anything.
    fn handle(
        &mut self,
        now_s: f64,
        change: ControlRequest,
        who: &str,
    ) -> Result<Applied, Refused> {
        let source = format!("api:{who}");
        let refuse = |field: &str, message: String| {
            Err(Refused {
                field: field.into(),
                message,
            })
        };
        let range = self.cfg.limits.tilt_range_urad;
        let cmd = match change {
            ControlRequest::SetMode(m) => Command::SetMode(m),
            ControlRequest::SetTiltTarget(t) => {
                let cur = self.pipeline.controller().tilt_target_urad();
                let mut new = cur;
                for (k, name) in ["setpoint_x_urad", "setpoint_y_urad"].iter().enumerate() {
                    if let Some(v) = t[k] {
                        if !v.is_finite() || v.abs() >= range {
                            return refuse(
                                name,
                                format!(
                                    "{v} is outside the allowed tilt range: |setpoint| < {range} µrad"
                                ),
                            );
                        }
                        new[k] = v;
                    }
                }
                Command::SetTiltTarget(new)
            }
            ControlRequest::SetLegBias(b) => {
                let max = self.cfg.limits.max_leg_temp_c;
                if !b.is_finite() || b >= max || b < -50.0 {
                    return refuse(
                        "leg_bias_c",
                        format!(
                            "{b} is not allowed: −50 ≤ bias < limits.max_leg_temp_c = {max} °C"
                        ),
                    );
                }
                Command::SetLegBias(b)
            }
            ControlRequest::SetManualPower(p) => {
                let max = self
                    .cfg
                    .legs
                    .iter()
                    .map(|l| l.heater_max_power_w)
                    .fold(f64::INFINITY, f64::min);
                if !p.is_finite() || !(0.0..=max).contains(&p) {
                    return refuse(
                        "manual_power_w",
                        format!("{p} is not allowed: 0 … {max} W (the smallest heater maximum)"),
                    );
                }
                Command::SetManualPower(p)
            }
            ControlRequest::SetTiltCorrection(c) => {
                let mode = self.pipeline.controller().mode();
                if mode != Mode::Temperature {
                    return refuse(
                        "mode",
                        format!(
                            "a held tilt correction applies in temperature mode only (mode is {mode}); switch mode first"
                        ),
                    );
                }
                let lim = self.cfg.control.tilt_output_limit_urad;
                let mut new = self.pipeline.controller().held_correction_urad();
                for (k, name) in ["x_urad", "y_urad"].iter().enumerate() {
                    if let Some(v) = c[k] {
                        if !v.is_finite() || v.abs() > lim {
                            return refuse(
                                name,
                                format!(
                                    "{v} is not allowed: |correction| ≤ control.tilt_output_limit_urad = {lim} µrad"
                                ),
                            );
                        }
                        new[k] = v;
                    }
                }
                Command::SetTiltCorrection(new)
            }
            ControlRequest::SetTiltGains(g) => {
                check_gains(&g)?;
                Command::SetTiltGains(g)
            }
            ControlRequest::SetLegGains(g) => {
                check_gains(&g)?;
                Command::SetLegGains(g)
            }
            ControlRequest::Acknowledge(id) => {
                return match self.pipeline.acknowledge(now_s, id.as_deref(), &source) {
                    Ok(done) if done.is_empty() => Ok(Applied {
                        detail: "no alarms to acknowledge".into(),
                    }),
                    Ok(done) => Ok(Applied {
                        detail: format!("acknowledged {}", done.join(", ")),
                    }),
                    Err(message) => Err(Refused {
                        field: "id".into(),
                        message,
                    }),
                };
            }
            ControlRequest::Reload => return self.reload(now_s, who),
        };
        self.pipeline.command(now_s, cmd.clone(), &source);
        Ok(Applied {
            detail: describe(&cmd),
        })
    }

    /// Rereads the configuration file and applies what can change while running
    /// (setpoints, bias, manual power, gains); anything else needs a restart and makes
    /// the reload refused, with the running configuration kept.
    fn reload(&mut self, now_s: f64, who: &str) -> Result<Applied, Refused> {
        let Some(path) = self.opts.config_path.clone() else {
            return Err(Refused {
                field: String::new(),
                message: "this run has no configuration file to reload".into(),
            });
        };
        let new = match stilt_config::load_file(&path) {
            Ok(c) => c,
            Err(e) => {
                let msg = e.to_string();
                self.pipeline.event(
                    now_s,
                    EventKind::Fault,
                    &format!("api:{who}"),
                    format!("reload refused: {}", msg.trim()),
                );
                return Err(Refused {
                    field: String::new(),
                    message: msg,
                });
            }
        };
        let old = &self.cfg;
        if new.legs != old.legs
            || new.tiltmeter != old.tiltmeter
            || new.control.rate_hz != old.control.rate_hz
            || new.limits != old.limits
        {
            return Err(Refused {
                field: String::new(),
                message: "legs, tiltmeter, control rate or limits changed: these need a restart"
                    .into(),
            });
        }
        let source = format!("api:{who}");
        let (oc, nc) = (old.control.clone(), new.control.clone());
        let mut changes = Vec::new();
        if nc.setpoint_urad != oc.setpoint_urad {
            changes.push(Command::SetTiltTarget(nc.setpoint_urad));
        }
        if nc.leg_bias_c != oc.leg_bias_c {
            changes.push(Command::SetLegBias(nc.leg_bias_c));
        }
        if nc.manual_power_w != oc.manual_power_w {
            changes.push(Command::SetManualPower(nc.manual_power_w));
        }
        if nc.tilt_loop != oc.tilt_loop {
            changes.push(Command::SetTiltGains(nc.tilt_loop));
        }
        if nc.leg_loop != oc.leg_loop {
            changes.push(Command::SetLegGains(nc.leg_loop));
        }
        let detail = if changes.is_empty() {
            "reload: nothing changed".to_string()
        } else {
            changes.iter().map(describe).collect::<Vec<_>>().join("; ")
        };
        for c in changes {
            self.pipeline.command(now_s, c, &source);
        }
        self.cfg = new;
        Ok(Applied { detail })
    }
}

/// One control tick over a backend: every reading since the last tick into the
/// pipeline, the tick, the commands out. The same in every world: the real-time loop
/// and the virtual-time [`crate::sim::SimLoop`] both call it.
pub fn run_tick(
    pipeline: &mut Pipeline,
    backend: &mut dyn Backend,
    now_s: f64,
) -> (Outputs, Readings) {
    let r = backend.poll(now_s);
    for &(t, raw, q) in &r.tilt {
        pipeline.on_tilt(t, raw, q);
    }
    pipeline.set_readback(&r.readback_power_w);
    let out = pipeline.on_tick(now_s, &r.leg_temps);
    backend.apply(now_s, &out.power_w, &out.drive_v);
    backend.after_tick(now_s, &out);
    (out, r)
}

fn check_gains(g: &LoopGains) -> Result<(), Refused> {
    let bad = |field: &str, message: &str| {
        Err(Refused {
            field: field.into(),
            message: message.into(),
        })
    };
    if !g.kp.is_finite() || g.kp < 0.0 {
        return bad("kp", "kp must be a finite number ≥ 0");
    }
    if let Some(ti) = g.ti_s {
        if !ti.is_finite() || ti <= 0.0 {
            return bad(
                "ti_s",
                "ti_s must be a finite number > 0 (omit it for no integral action)",
            );
        }
    }
    if !g.td_s.is_finite() || g.td_s < 0.0 {
        return bad("td_s", "td_s must be a finite number ≥ 0");
    }
    if !g.derivative_filter_s.is_finite() || g.derivative_filter_s < 0.0 {
        return bad(
            "derivative_filter_s",
            "derivative_filter_s must be a finite number ≥ 0",
        );
    }
    if !(0.0..=1.0).contains(&g.setpoint_weight) {
        return bad("setpoint_weight", "setpoint_weight must lie in 0 … 1");
    }
    if !g.tracking_time_s.is_finite() || g.tracking_time_s <= 0.0 {
        return bad(
            "tracking_time_s",
            "tracking_time_s must be a finite number > 0",
        );
    }
    if let Some(s) = g.slew_per_s {
        if !s.is_finite() || s <= 0.0 {
            return bad(
                "slew_per_s",
                "the slew limit must be a finite number > 0 (omit it for none)",
            );
        }
    }
    Ok(())
}

fn describe(c: &Command) -> String {
    match c {
        Command::SetMode(m) => format!("mode → {m}"),
        Command::SetTiltTarget(t) => format!("tilt target → [{}, {}] µrad", t[0], t[1]),
        Command::SetLegBias(b) => format!("leg bias → {b} °C"),
        Command::SetManualPower(p) => format!("manual power → {p} W"),
        Command::SetTiltCorrection(c) => {
            format!("held tilt correction → [{}, {}] µrad", c[0], c[1])
        }
        Command::SetTiltGains(g) => format!(
            "tilt loop gains → kp {} ti_s {:?} td_s {}",
            g.kp, g.ti_s, g.td_s
        ),
        Command::SetLegGains(g) => format!(
            "leg loop gains → kp {} ti_s {:?} td_s {}",
            g.kp, g.ti_s, g.td_s
        ),
    }
}

fn initial_status(cfg: &Config, start_utc_ns: i64) -> Status {
    let c = &cfg.control;
    Status {
        version: env!("CARGO_PKG_VERSION"),
        stage_name: cfg.stage_name.clone(),
        started_utc_ns: start_utc_ns,
        now_utc_ns: start_utc_ns,
        uptime_s: 0.0,
        mode: c.mode,
        axes: [0, 1].map(|k| AxisStatus {
            measured_urad: None,
            quality: Quality::Missing,
            age_s: None,
            setpoint_urad: c.setpoint_urad[k],
            target_urad: c.setpoint_urad[k],
            terms: Default::default(),
        }),
        leg_bias_c: c.leg_bias_c,
        leg_bias_target_c: c.leg_bias_c,
        legs: cfg
            .legs
            .iter()
            .map(|l| LegStatus {
                name: l.name.clone(),
                temp_c: None,
                quality: Quality::Missing,
                age_s: None,
                setpoint_c: c.leg_bias_c,
                power_w: 0.0,
                drive_v: 0.0,
                readback_power_w: None,
                terms: Default::default(),
            })
            .collect(),
        alarms: Vec::new(),
        timing: LoopTiming {
            period_s: c.period_s(),
            ..Default::default()
        },
        recording: RecordingStatus::default(),
        channels: Vec::new(),
        ready: false,
    }
}

/// The in-process simulated stage as a [`Backend`]: the stage advances to each poll's
/// run time in tiltmeter periods, producing one tilt reading per period.
pub struct SimBackend {
    stage: SimStage,
    tiltmeter: Tiltmeter,
    thermometer_channels: Vec<usize>,
    dt_s: f64,
    samples: u64,
    meas_acc: ([f64; 2], u32),
    last_measured: Option<[f64; 2]>,
    observer: Option<TickObserver>,
    pending: Vec<(f64, [f64; 2], Quality)>,
    tilt_fault: Option<Quality>,
}

/// A callback that sees every tick of a simulated run with the stage's truth.
pub type TickObserver = Box<dyn FnMut(&TickReport) + Send>;

impl SimBackend {
    /// A fresh simulated stage for `cfg` (its `[simulation]` section).
    pub fn new(cfg: &Config) -> Self {
        Self::with_stage(SimStage::new(cfg), cfg)
    }

    /// A backend over a stage built (and perhaps altered) by the caller for `cfg`.
    pub fn with_stage(stage: SimStage, cfg: &Config) -> Self {
        SimBackend {
            stage,
            tiltmeter: cfg.tiltmeter.clone(),
            thermometer_channels: cfg.legs.iter().map(|l| l.thermometer_channel).collect(),
            dt_s: 1.0 / cfg.tiltmeter.rate_hz,
            samples: 0,
            meas_acc: ([0.0; 2], 0),
            last_measured: None,
            observer: None,
            pending: Vec::new(),
            tilt_fault: None,
        }
    }

    /// Run time the stage has reached, s (whole tiltmeter periods).
    pub fn time_s(&self) -> f64 {
        self.samples as f64 * self.dt_s
    }

    /// The stage (for fault injection in tests).
    pub fn stage_mut(&mut self) -> &mut SimStage {
        &mut self.stage
    }

    /// Fault injection: every tilt reading arrives with this quality (e.g. `BadFrame`
    /// for garbled frames, `Timeout` for no reply) until set back to `None`.
    pub fn set_tilt_fault(&mut self, q: Option<Quality>) {
        self.tilt_fault = q;
    }

    /// Advances the stage to run time `t_s` in tiltmeter periods, keeping each reading
    /// for the next [`Backend::poll`].
    pub fn advance_samples_to(&mut self, t_s: f64) {
        // Compare in whole samples so that float steps never add an extra one.
        let end = (t_s / self.dt_s + 1e-9).floor() as u64;
        while self.samples < end {
            self.stage.advance(self.dt_s);
            self.samples += 1;
            let r = self.stage.read_tilt();
            let q = match self.tilt_fault {
                Some(f) => f,
                None if r.in_range => Quality::Ok,
                None => Quality::OutOfRange,
            };
            if q == Quality::Ok {
                let c = self.tiltmeter.calibrate(r.raw);
                self.meas_acc.0[0] += c[0];
                self.meas_acc.0[1] += c[1];
                self.meas_acc.1 += 1;
            }
            self.pending
                .push((self.samples as f64 * self.dt_s, r.raw, q));
        }
    }

    /// The tick's outputs with the stage's truth beside them.
    pub fn report(&self, now_s: f64, out: &Outputs) -> TickReport {
        TickReport {
            t_s: now_s,
            outputs: out.clone(),
            true_tilt_urad: self.stage.plate_tilt_urad(),
            measured_tilt_urad: self.last_measured,
        }
    }

    /// Calls `f` after every tick with the outputs and the stage's truth.
    pub fn with_observer(mut self, f: TickObserver) -> Self {
        self.observer = Some(f);
        self
    }

    /// The heater powers the stage is receiving now, W (for tests).
    pub fn heater_power_w(&self) -> Vec<f64> {
        self.stage.truth().heater_power_w
    }
}

impl Backend for SimBackend {
    fn poll(&mut self, now_s: f64) -> Readings {
        self.advance_samples_to(now_s);
        let tilt = std::mem::take(&mut self.pending);
        let (s, n) = std::mem::take(&mut self.meas_acc);
        self.last_measured = (n > 0).then(|| [s[0] / f64::from(n), s[1] / f64::from(n)]);
        let leg_temps: Vec<(f64, Quality)> = self
            .thermometer_channels
            .iter()
            .map(|&ch| match self.stage.read_thermometer(ch) {
                Some(t) => (t, Quality::Ok),
                None => (f64::NAN, Quality::Missing),
            })
            .collect();
        let n = leg_temps.len();
        Readings {
            tilt,
            leg_temps,
            leg_temp_age_s: vec![Some(0.0); n],
            readback_power_w: self
                .stage
                .truth()
                .heater_power_w
                .into_iter()
                .map(Some)
                .collect(),
            channels: vec![ChannelStatus {
                name: "simulated stage".into(),
                port: "simulated".into(),
                connected: true,
                ..Default::default()
            }],
        }
    }

    fn apply(&mut self, _now_s: f64, power_w: &[f64], _drive_v: &[f64]) {
        for (i, p) in power_w.iter().enumerate() {
            self.stage.set_heater_power(i, *p);
        }
    }

    fn safe_off(&mut self) {
        for i in 0..self.stage.leg_count() {
            self.stage.set_heater_power(i, 0.0);
        }
    }

    fn after_tick(&mut self, now_s: f64, out: &Outputs) {
        if self.observer.is_some() {
            let r = self.report(now_s, out);
            if let Some(f) = self.observer.as_mut() {
                f(&r);
            }
        }
    }
}
