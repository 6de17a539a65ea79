//! `stiltd hil`: the whole daemon against the hardware-in-the-loop simulator, over real
//! serial I/O, in one command.
//!
//! Starts `stilt-hil-sim` (found next to `stiltd`'s own executable; `cargo build --bins`
//! builds both) with its port map in a fresh scratch folder, waits for its `ready` line,
//! then runs exactly what `stiltd run` runs, with the built-in HIL stage
//! (`config/examples/hil/stage.toml`) or `--config`, and the port map the simulator just
//! wrote. When the daemon stops (SIGTERM, Ctrl-C or `--duration`) the simulator is stopped
//! too, and its one-line JSON summary is passed through on stderr. `--sim-speed N` runs
//! the simulated stage N times faster than the wall clock (a step test of a leg, whose
//! time constant is tens of minutes, then takes seconds).

use std::io::BufRead;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, ExitCode, Stdio};
use std::time::Duration;

use super::config_errors;
use super::run::{RunOptions, run_daemon};

/// Arguments of `stiltd hil`.
#[derive(clap::Args, Debug)]
pub struct HilArgs {
    /// A stage file of your own with `[instruments]` (default: the built-in HIL stage).
    #[arg(long, short)]
    pub config: Option<PathBuf>,
    /// A fault schedule for the simulator (see hil-sim/README.md, "The fault file").
    #[arg(long, value_name = "FILE")]
    pub faults: Option<PathBuf>,
    /// The simulator binary (default: `stilt-hil-sim` beside `stiltd`).
    #[arg(long, value_name = "FILE")]
    pub sim: Option<PathBuf>,
    /// Simulated seconds per wall-clock second (the simulator's `--speed`): the stage's
    /// time constants shrink by this factor as the daemon sees them (above 0, at most 100000).
    #[arg(long, value_name = "N", default_value_t = 1.0)]
    pub sim_speed: f64,
    /// Folder for the port map and the simulator's log (default: a fresh one under the
    /// system's temporary folder).
    #[arg(long, value_name = "DIR")]
    pub work_dir: Option<PathBuf>,
    /// Common options.
    #[command(flatten)]
    pub common: RunOptions,
}

/// How long the simulator may take to print `ready`.
const READY_TIMEOUT: Duration = Duration::from_secs(15);

/// Runs `stiltd hil`.
pub fn run(a: &HilArgs) -> ExitCode {
    let sim = match a.sim.clone().or_else(|| sibling("stilt-hil-sim")) {
        Some(p) if p.exists() => p,
        other => {
            eprintln!(
                "stiltd: cannot find the simulator{}; build it with `cargo build --bins` (it lands next to stiltd) or name it with --sim",
                other.map_or(String::new(), |p| format!(" at {}", p.display()))
            );
            return ExitCode::FAILURE;
        }
    };
    if !(a.sim_speed.is_finite() && a.sim_speed > 0.0 && a.sim_speed <= 100_000.0) {
        eprintln!(
            "stiltd: --sim-speed {}: allowed a factor above 0 and at most 100000",
            a.sim_speed
        );
        return ExitCode::from(2);
    }
    let dir = a
        .work_dir
        .clone()
        .unwrap_or_else(|| std::env::temp_dir().join(format!("stiltd-hil-{}", std::process::id())));
    if let Err(e) = std::fs::create_dir_all(&dir) {
        eprintln!("stiltd: cannot create {}: {e}", dir.display());
        return ExitCode::FAILURE;
    }
    let map = dir.join("hil-ports.toml");
    let _ = std::fs::remove_file(&map);
    let mut child = match start_sim(
        &sim,
        a.config.as_deref(),
        &map,
        a.faults.as_deref(),
        a.sim_speed,
        &dir,
    ) {
        Ok(c) => c,
        Err(e) => {
            eprintln!("stiltd: {e}");
            return ExitCode::FAILURE;
        }
    };
    let opts = stilt_config::LoadOptions {
        base_dir: None,
        port_map: Some(map.clone()),
    };
    let cfg = match &a.config {
        Some(p) => stilt_config::load_file_with(p, Some(&map)),
        None => stilt_config::load_str_with(
            stilt_config::HIL_EXAMPLE,
            "built-in HIL stage (config/examples/hil/stage.toml)",
            &opts,
        ),
    };
    let code = match cfg {
        Ok(cfg) => {
            eprintln!(
                "stiltd: simulator ready (port map {}), starting the daemon",
                map.display()
            );
            run_daemon(cfg, a.config.clone(), &a.common)
        }
        Err(e) => config_errors(&e),
    };
    stop_sim(&mut child, &dir);
    if a.work_dir.is_none() {
        let _ = std::fs::remove_dir_all(&dir);
    }
    code
}

/// `name` in the folder of the running executable.
fn sibling(name: &str) -> Option<PathBuf> {
    let exe = std::env::current_exe().ok()?;
    Some(exe.parent()?.join(name))
}

/// The running simulator and the thread that passes its stdout through.
struct Sim {
    child: Child,
    relay: Option<std::thread::JoinHandle<()>>,
}

/// Starts the simulator on the stage file the daemon will run (`None`: the built-in one,
/// which the simulator also has), so both see the same legs, units and physics.
fn start_sim(
    sim: &Path,
    config: Option<&Path>,
    map: &Path,
    faults: Option<&Path>,
    speed: f64,
    dir: &Path,
) -> Result<Sim, String> {
    let log = std::fs::File::create(dir.join("stilt-hil-sim.log")).map_err(|e| {
        format!(
            "cannot create the simulator's log in {}: {e}",
            dir.display()
        )
    })?;
    let mut c = Command::new(sim);
    if let Some(cfg) = config {
        c.arg(cfg);
    }
    c.arg("--port-map").arg(map);
    c.arg("--speed").arg(speed.to_string());
    if let Some(f) = faults {
        c.arg("--faults").arg(f);
    }
    let mut child = c
        .stdout(Stdio::piped())
        .stderr(Stdio::from(log))
        .stdin(Stdio::null())
        .spawn()
        .map_err(|e| format!("cannot start {}: {e}", sim.display()))?;
    let Some(out) = child.stdout.take() else {
        let _ = child.kill();
        return Err("the simulator's stdout is not available".into());
    };
    let (tx, rx) = std::sync::mpsc::channel();
    let relay = std::thread::spawn(move || {
        let mut lines = std::io::BufReader::new(out).lines();
        let mut sent = false;
        for l in lines.by_ref() {
            let Ok(l) = l else { break };
            if !sent && l.trim() == "ready" {
                let _ = tx.send(());
                sent = true;
            } else if sent {
                // The exit summary (one JSON line), passed through.
                eprintln!("stilt-hil-sim: {l}");
            }
        }
    });
    match rx.recv_timeout(READY_TIMEOUT) {
        Ok(()) => Ok(Sim {
            child,
            relay: Some(relay),
        }),
        Err(_) => {
            let _ = child.kill();
            let _ = child.wait();
            Err(format!(
                "the simulator did not get ready within {} s (its log: {})",
                READY_TIMEOUT.as_secs(),
                dir.join("stilt-hil-sim.log").display()
            ))
        }
    }
}

/// SIGTERM (through `kill`, as the workspace has no unsafe code), then SIGKILL after 3 s.
/// The simulator's exit summary is passed through before this returns.
fn stop_sim(sim: &mut Sim, dir: &Path) {
    stop_child(&mut sim.child, dir);
    // The relay ends at the simulator's end of output: wait for it so that its summary
    // line is printed before stiltd exits.
    if let Some(r) = sim.relay.take() {
        let _ = r.join();
    }
}

fn stop_child(child: &mut Child, dir: &Path) {
    let _ = Command::new("kill")
        .arg("-TERM")
        .arg(child.id().to_string())
        .status();
    for _ in 0..60 {
        if let Ok(Some(_)) = child.try_wait() {
            return;
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    let _ = child.kill();
    let _ = child.wait();
    eprintln!(
        "stiltd: the simulator did not stop on SIGTERM and was killed (log in {})",
        dir.display()
    );
}
