//! `stilt-hil-sim`: the simulated stage's three instruments, each on its own pseudo-terminal.
//!
//! Loads a stage config (or the built-in demo), opens one pty pair per instrument, keeps the
//! master side and writes the slave paths to a port map for the daemon. Simulated time runs
//! at wall-clock rate times `--speed`. Prints `ready` once the map is written, and a one-line
//! JSON summary on exit (SIGTERM, SIGINT or `--duration`). See the crate docs and README.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex, MutexGuard};
use std::time::{Duration, Instant};

use anyhow::{Context, Result, bail};
use clap::Parser;
use serde::Serialize;
use stilt_hil_sim::Rig;
use stilt_hil_sim::devices::DeviceKind;
use stilt_hil_sim::faults::FaultSchedule;
use stilt_hil_sim::portmap::{PortMap, write_atomic};
use stilt_hil_sim::rig::{
    DEFAULT_THERMOMETER_UNIT, HEATER_BAUD, Summary, THERMOMETER_BAUD, TILTMETER_BAUD,
};
use tokio::io::AsyncWriteExt;
use tokio_serial::{SerialPort, SerialStream};
use tracing::Instrument;

/// Fastest simulated-time factor accepted.
const MAX_SPEED: f64 = 100_000.0;
/// How often simulated time is advanced (wall clock).
const TICK: Duration = Duration::from_millis(10);
/// Back-off while no one holds the slave side open (the master read fails with EIO).
const NO_PEER_BACKOFF: Duration = Duration::from_millis(50);

/// Simulated tiltmeter, RTD thermometer and heater supply on pseudo-terminals.
#[derive(Debug, Parser)]
#[command(name = "stilt-hil-sim", version)]
struct Args {
    /// Stage config (TOML); the built-in invented demo stage if omitted.
    config: Option<PathBuf>,
    /// Where to write the port map.
    #[arg(long, value_name = "PATH", default_value = "./hil-ports.toml")]
    port_map: PathBuf,
    /// Simulated seconds per wall-clock second.
    #[arg(long, value_name = "N", default_value_t = 1.0)]
    speed: f64,
    /// Fault schedule (TOML, `[[fault]]` tables).
    #[arg(long, value_name = "PATH")]
    faults: Option<PathBuf>,
    /// Also write the heater supply's state (JSON) here whenever it changes.
    #[arg(long, value_name = "PATH")]
    state: Option<PathBuf>,
    /// Stop after this many wall-clock seconds.
    #[arg(long, value_name = "SECONDS")]
    duration: Option<f64>,
    /// The thermometer's Modbus unit address (1 to 247) for a stage without
    /// `[instruments]` (a stage with them brings its own units, e.g. a bus of several).
    #[arg(long, value_name = "N", default_value_t = DEFAULT_THERMOMETER_UNIT)]
    thermometer_unit: u8,
}

/// The exit line.
#[derive(Serialize)]
struct ExitSummary {
    wall_time_s: f64,
    speed: f64,
    #[serde(flatten)]
    rig: Summary,
}

/// The state file.
#[derive(Serialize)]
struct StateFile<'a> {
    sim_time_s: f64,
    #[serde(flatten)]
    heater: &'a stilt_hil_sim::devices::heater::HeaterState,
}

type Shared = Arc<Mutex<Rig>>;

/// Locks the rig; a panic elsewhere while holding it leaves the data usable, so go on.
fn lock(rig: &Shared) -> MutexGuard<'_, Rig> {
    rig.lock().unwrap_or_else(|p| p.into_inner())
}

fn main() -> std::process::ExitCode {
    let args = Args::parse();
    let runtime = match tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
    {
        Ok(r) => r,
        Err(e) => {
            eprintln!("stilt-hil-sim: cannot start the runtime: {e}");
            return std::process::ExitCode::from(1);
        }
    };
    match runtime.block_on(run(args)) {
        Ok(()) => std::process::ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("stilt-hil-sim: {e:#}");
            std::process::ExitCode::from(1)
        }
    }
}

fn check_args(a: &Args) -> Result<()> {
    if !(a.speed.is_finite() && a.speed > 0.0 && a.speed <= MAX_SPEED) {
        bail!(
            "--speed {}: allowed a factor above 0 and at most {MAX_SPEED}",
            a.speed
        );
    }
    if let Some(d) = a.duration
        && !(d.is_finite() && d > 0.0)
    {
        bail!("--duration {d}: allowed a positive number of seconds");
    }
    if !(1..=stilt_protocol::modbus::MAX_UNIT).contains(&a.thermometer_unit) {
        bail!(
            "--thermometer-unit {}: allowed 1 to 247",
            a.thermometer_unit
        );
    }
    Ok(())
}

async fn run(args: Args) -> Result<()> {
    tracing_subscriber::fmt()
        .with_writer(std::io::stderr)
        .with_ansi(std::io::IsTerminal::is_terminal(&std::io::stderr()))
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_default_env()
                .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info")),
        )
        .init();
    check_args(&args)?;
    let faults = match &args.faults {
        Some(p) => {
            let text = std::fs::read_to_string(p)
                .with_context(|| format!("cannot read the fault schedule {}", p.display()))?;
            FaultSchedule::parse(&text, &p.display().to_string())?
        }
        None => FaultSchedule::default(),
    };
    let mut masters = Vec::new();
    let mut paths = Vec::new();
    for d in DeviceKind::ALL {
        let (master, slave) = SerialStream::pair()
            .with_context(|| format!("cannot open a pty for the {}", d.name()))?;
        let path = slave
            .name()
            .with_context(|| format!("the {}'s pty has no name", d.name()))?;
        // Close our slave fd: the daemon opens the path itself, exclusively.
        drop(slave);
        masters.push(master);
        paths.push(path);
    }
    let mut map = PortMap {
        tiltmeter: paths[0].clone(),
        thermometer: paths[1].clone(),
        heater: paths[2].clone(),
        tiltmeter_baud: TILTMETER_BAUD,
        thermometer_baud: THERMOMETER_BAUD,
        heater_baud: HEATER_BAUD,
        thermometer_unit: args.thermometer_unit,
    };
    map.write_atomic(&args.port_map)
        .with_context(|| format!("cannot write the port map {}", args.port_map.display()))?;
    // The stage is read with the map just written, so a stage with [instruments] resolves
    // exactly as the daemon will: its thermometer units are the ones the bus emulates.
    let loaded = match &args.config {
        Some(p) => stilt_config::load_file_with(p, Some(&args.port_map)),
        None => stilt_config::load_str(stilt_config::DEMO_SCENARIO, "built-in demo"),
    }
    .map_err(|e| anyhow::anyhow!("{e}"))
    .and_then(|cfg| {
        let rig = Rig::new(&cfg, faults, args.thermometer_unit)?;
        Ok((cfg, rig))
    });
    let (cfg, rig) = match loaded {
        Ok(x) => x,
        Err(e) => {
            // No daemon may follow a map whose ptys are about to close.
            let _ = std::fs::remove_file(&args.port_map);
            return Err(e);
        }
    };
    let units = rig.thermometer_units();
    if let Some(i) = &cfg.instruments
        && i.thermometer.unit != map.thermometer_unit
    {
        map.thermometer_unit = i.thermometer.unit;
        map.write_atomic(&args.port_map)
            .with_context(|| format!("cannot write the port map {}", args.port_map.display()))?;
    }
    let rig: Shared = Arc::new(Mutex::new(rig));
    if let Some(p) = &args.state {
        write_state(&rig, p);
    }
    tracing::info!(
        tiltmeter = %map.tiltmeter, thermometer = %map.thermometer, heater = %map.heater,
        thermometer_units = ?units,
        speed = args.speed, port_map = %args.port_map.display(), "ptys open"
    );
    {
        let mut out = std::io::stdout().lock();
        writeln!(out, "ready")?;
        out.flush()?;
    }

    let start = Instant::now();
    let mut tasks = tokio::task::JoinSet::new();
    tasks.spawn(tick(rig.clone(), args.speed));
    for (d, m) in DeviceKind::ALL.into_iter().zip(masters) {
        let state = (d == DeviceKind::Heater)
            .then(|| args.state.clone())
            .flatten();
        let span = tracing::info_span!("device", name = d.name());
        tasks.spawn(serve(d, m, rig.clone(), start, state).instrument(span));
    }

    shutdown(args.duration).await;
    tasks.abort_all();
    while tasks.join_next().await.is_some() {}

    if let Some(p) = &args.state {
        write_state(&rig, p);
    }
    let summary = ExitSummary {
        wall_time_s: start.elapsed().as_secs_f64(),
        speed: args.speed,
        rig: lock(&rig).summary(),
    };
    let mut out = std::io::stdout().lock();
    writeln!(out, "{}", serde_json::to_string(&summary)?)?;
    out.flush()?;
    Ok(())
}

/// Waits for SIGTERM, SIGINT or the end of `duration`.
async fn shutdown(duration: Option<f64>) {
    use tokio::signal::unix::{SignalKind, signal};
    let until = async {
        match duration {
            Some(s) => tokio::time::sleep(Duration::from_secs_f64(s)).await,
            None => std::future::pending().await,
        }
    };
    let (term, int) = (
        signal(SignalKind::terminate()),
        signal(SignalKind::interrupt()),
    );
    match (term, int) {
        (Ok(mut term), Ok(mut int)) => tokio::select! {
            _ = term.recv() => tracing::info!("SIGTERM"),
            _ = int.recv() => tracing::info!("SIGINT"),
            _ = until => tracing::info!("duration reached"),
        },
        _ => {
            tracing::warn!("cannot catch signals; stopping only at --duration");
            until.await;
        }
    }
}

/// Advances simulated time at `speed` × wall clock.
async fn tick(rig: Shared, speed: f64) {
    let mut iv = tokio::time::interval(TICK);
    // Delay: after a stall, do not burst; the elapsed time is measured anyway, so simulated
    // time stays exactly speed × wall time whatever the tick jitter.
    iv.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    let mut last = Instant::now();
    loop {
        iv.tick().await;
        let now = Instant::now();
        let dt = now.duration_since(last).as_secs_f64() * speed;
        last = now;
        lock(&rig).advance(dt);
    }
}

/// What the reader thread of one pty master saw.
enum FromPort {
    /// Bytes from the peer.
    Data(Vec<u8>),
    /// No one holds the slave side open (the master reads EIO or hangs up).
    NoPeer,
}

/// Reads one pty master on a plain thread: `poll(2)` for input, then `read(2)`, on a
/// duplicate of the master's descriptor. Rationale: once a master has reported a hang-up
/// (before the daemon first opens the slave), tokio's readiness for it keeps the
/// "read closed" bit for good, and an async read then spins on EAGAIN at full CPU. A
/// level-triggered `poll` has no such memory.
#[allow(unsafe_code)]
fn spawn_reader(port: &SerialStream) -> Result<tokio::sync::mpsc::Receiver<FromPort>> {
    use std::os::fd::{AsRawFd, FromRawFd, OwnedFd};
    let (tx, rx) = tokio::sync::mpsc::channel(64);
    // SAFETY: `dup` on a descriptor we own returns a new descriptor or -1; a new one is
    // owned by nobody else, so `OwnedFd` may take it (and closes it when the thread ends).
    let fd = unsafe { libc::dup(port.as_raw_fd()) };
    if fd < 0 {
        bail!(
            "cannot duplicate the pty master: {}",
            std::io::Error::last_os_error()
        );
    }
    let fd = unsafe { OwnedFd::from_raw_fd(fd) };
    std::thread::Builder::new()
        .name("pty-reader".into())
        .spawn(move || {
            let mut buf = [0u8; 512];
            loop {
                let mut p = libc::pollfd {
                    fd: fd.as_raw_fd(),
                    events: libc::POLLIN,
                    revents: 0,
                };
                // SAFETY: one valid pollfd, its length 1.
                let r = unsafe { libc::poll(&mut p, 1, 200) };
                if r == 0 {
                    if tx.is_closed() {
                        return;
                    }
                    continue;
                }
                if r < 0 || p.revents & libc::POLLIN == 0 {
                    if tx.blocking_send(FromPort::NoPeer).is_err() {
                        return;
                    }
                    std::thread::sleep(NO_PEER_BACKOFF);
                    continue;
                }
                // SAFETY: `buf` is valid for `buf.len()` bytes.
                let n = unsafe { libc::read(fd.as_raw_fd(), buf.as_mut_ptr().cast(), buf.len()) };
                let msg = match n {
                    n if n > 0 => FromPort::Data(buf[..n as usize].to_vec()),
                    0 => FromPort::NoPeer,
                    _ if std::io::Error::last_os_error().kind()
                        == std::io::ErrorKind::WouldBlock =>
                    {
                        continue;
                    }
                    _ => FromPort::NoPeer,
                };
                let no_peer = matches!(msg, FromPort::NoPeer);
                if tx.blocking_send(msg).is_err() {
                    return;
                }
                if no_peer {
                    std::thread::sleep(NO_PEER_BACKOFF);
                }
            }
        })?;
    Ok(rx)
}

/// Serves one instrument on its pty master until aborted.
async fn serve(
    device: DeviceKind,
    mut port: SerialStream,
    rig: Shared,
    start: Instant,
    state: Option<PathBuf>,
) {
    let mut from_port = match spawn_reader(&port) {
        Ok(rx) => rx,
        Err(e) => {
            tracing::error!("cannot read the port: {e:#}");
            return;
        }
    };
    let mut peer = false;
    let mut write_errors = 0u64;
    loop {
        let deadline = lock(&rig).poll_timeout(device);
        let wake = async {
            match deadline {
                Some(d) => tokio::time::sleep_until((start + d).into()).await,
                None => std::future::pending().await,
            }
        };
        tokio::select! {
            m = from_port.recv() => match m {
                Some(FromPort::Data(bytes)) => {
                    if !peer {
                        tracing::info!("peer opened the port");
                        peer = true;
                    }
                    lock(&rig).handle_input(device, start.elapsed(), &bytes);
                }
                // EIO (or EOF) while no slave fd is open: the daemon has not connected yet
                // or has let go; the reader thread waits and tries again.
                Some(FromPort::NoPeer) => {
                    if peer {
                        tracing::info!("peer closed the port; waiting for it to reopen");
                        peer = false;
                    }
                }
                None => return,
            },
            () = wake => lock(&rig).handle_timeout(device, start.elapsed()),
        }
        // The state file is updated before any reply leaves, so a master that has seen the
        // reply to a message can rely on the file showing that message's settings.
        if let Some(p) = &state
            && lock(&rig).take_heater_changed()
        {
            write_state(&rig, p);
        }
        loop {
            let next = lock(&rig).poll_transmit(device, start.elapsed());
            let Some(bytes) = next else { break };
            if let Err(e) = AsyncWriteExt::write_all(&mut port, &bytes).await {
                write_errors += 1;
                if write_errors.is_power_of_two() {
                    tracing::warn!(error = %e, write_errors, "reply not sent");
                }
            }
        }
    }
}

fn write_state(rig: &Shared, path: &Path) {
    let text = {
        let r = lock(rig);
        let heater = r.heater_state();
        serde_json::to_string(&StateFile {
            sim_time_s: r.time_s(),
            heater: &heater,
        })
    };
    let res = text
        .map_err(std::io::Error::other)
        .and_then(|t| write_atomic(path, format!("{t}\n").as_bytes()));
    if let Err(e) = res {
        tracing::warn!(path = %path.display(), error = %e, "cannot write the state file");
    }
}
