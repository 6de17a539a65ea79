//! Safe by default, over the hardware-in-the-loop ptys: the simulator runs on its own (as a
//! real supply would, it keeps its last setting when the daemon dies) and `stiltd run` is
//! started, killed and restarted against it. The simulator's state file (rewritten before
//! any reply leaves, see hil-sim/README.md) shows what the supply was last told.
//!
//! - SIGKILL leaves the heaters at their last power (nothing in the daemon runs); the next
//!   start takes every channel to zero before any channel's power rises, and only then,
//!   once its sensors are valid, resumes control.
//! - A panic on a thread of the daemon (debug builds: `STILTD_DEBUG_PANIC_AFTER_S`) goes
//!   through the panic guard: heaters to zero, exit status 1 so that systemd restarts it.

use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use serde_json::Value;
use stilt_tests::{bin, scratch, workspace};

/// The simulator on its own, with a state file; stopped (SIGTERM) when dropped.
struct Sim {
    child: Child,
    state: PathBuf,
}

impl Drop for Sim {
    fn drop(&mut self) {
        let _ = Command::new("kill")
            .args(["-TERM", &self.child.id().to_string()])
            .status();
        let t0 = Instant::now();
        while t0.elapsed() < Duration::from_secs(3) {
            if let Ok(Some(_)) = self.child.try_wait() {
                return;
            }
            std::thread::sleep(Duration::from_millis(20));
        }
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// Starts `stilt-hil-sim` at `speed` in `dir` (port map and state file there) and copies
/// the HIL stage file beside them; waits for `ready`.
fn start_sim(dir: &Path, speed: &str) -> Sim {
    std::fs::copy(
        workspace().join("config/examples/hil/stage.toml"),
        dir.join("stage.toml"),
    )
    .unwrap();
    let state = dir.join("heater.json");
    let mut child = Command::new(bin("stilt-hil-sim"))
        .current_dir(dir)
        .args(["--speed", speed, "--port-map", "hil-ports.toml", "--state"])
        .arg(&state)
        .stdout(Stdio::piped())
        .stderr(std::fs::File::create(dir.join("sim.log")).unwrap())
        .spawn()
        .unwrap();
    let out = child.stdout.take().unwrap();
    let (tx, rx) = std::sync::mpsc::channel();
    std::thread::spawn(move || {
        for l in BufReader::new(out).lines().map_while(Result::ok) {
            if l.trim() == "ready" {
                let _ = tx.send(());
            }
        }
    });
    rx.recv_timeout(Duration::from_secs(20))
        .expect("the simulator prints `ready`");
    Sim { child, state }
}

/// `stiltd run` on the copied stage file, without recording, API on a free loopback port.
fn start_daemon(dir: &Path, envs: &[(&str, &str)]) -> Child {
    let mut c = Command::new(bin("stiltd"));
    c.current_dir(dir)
        .args([
            "run",
            "--config",
            "stage.toml",
            "--no-record",
            "--listen",
            "127.0.0.1:0",
        ])
        .stdout(Stdio::null())
        .stderr(Stdio::piped());
    for (k, v) in envs {
        c.env(k, v);
    }
    c.spawn().unwrap()
}

/// Commanded power per channel and the supply's count of setting commands, from the state
/// file; `None` while it is being replaced or not yet written.
fn supply(state: &Path) -> Option<(Vec<f64>, u64)> {
    let v: Value = serde_json::from_str(&std::fs::read_to_string(state).ok()?).ok()?;
    let p = v["channels"]
        .as_array()?
        .iter()
        .map(|c| c["commanded_power_w"].as_f64())
        .collect::<Option<Vec<f64>>>()?;
    Some((p, v["commands"].as_u64()?))
}

/// Polls the state file every 2 ms until `done` holds (or `within` passes); returns every
/// distinct reading seen, in order.
fn watch_supply(
    state: &Path,
    within: Duration,
    mut done: impl FnMut(&[f64]) -> bool,
) -> Vec<(Vec<f64>, u64)> {
    let t0 = Instant::now();
    let mut seen: Vec<(Vec<f64>, u64)> = Vec::new();
    while t0.elapsed() < within {
        if let Some(s) = supply(state) {
            if seen.last() != Some(&s) {
                let stop = done(&s.0);
                seen.push(s);
                if stop {
                    return seen;
                }
            }
        }
        std::thread::sleep(Duration::from_millis(2));
    }
    panic!("the supply did not reach the expected state within {within:?}: {seen:?}");
}

fn any_on(p: &[f64]) -> bool {
    p.iter().any(|w| *w > 0.0)
}

fn all_zero(p: &[f64]) -> bool {
    p.iter().all(|w| *w == 0.0)
}

fn kill(child: &Child, signal: &str) {
    assert!(
        Command::new("kill")
            .args([signal, &child.id().to_string()])
            .status()
            .unwrap()
            .success()
    );
}

#[test]
fn after_sigkill_the_next_start_zeroes_every_heater_before_any_rises() {
    let dir = scratch("hil-sigkill");
    let sim = start_sim(&dir, "20");
    let mut first = start_daemon(&dir, &[]);
    // Control running: some heater is on.
    watch_supply(&sim.state, Duration::from_secs(20), any_on);
    kill(&first, "-KILL");
    let _ = first.wait();
    // Nothing ran on the way out: the supply still holds the last setting.
    std::thread::sleep(Duration::from_millis(300));
    let (held, held_commands) = supply(&sim.state).unwrap();
    assert!(any_on(&held), "the supply kept {held:?} after SIGKILL");

    let second = start_daemon(&dir, &[]);
    let to_zero = watch_supply(&sim.state, Duration::from_secs(10), all_zero);
    // Until every channel read zero, no channel rose above what it held.
    for (p, _) in &to_zero {
        for (ch, (w, h)) in p.iter().zip(&held).enumerate() {
            assert!(
                *w <= *h,
                "channel {} rose to {w} W (held {h} W) before all were zero: {to_zero:?}",
                ch + 1
            );
        }
    }
    assert!(to_zero.last().unwrap().1 > held_commands, "{to_zero:?}");
    // And then the daemon controls again (sensors valid, heaters back on).
    watch_supply(&sim.state, Duration::from_secs(20), any_on);
    kill(&second, "-TERM");
    let out = second.wait_with_output().unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(all_zero(&supply(&sim.state).unwrap().0));
}

#[test]
fn a_panic_zeroes_the_heaters_and_exits_with_failure() {
    let dir = scratch("hil-panic");
    let sim = start_sim(&dir, "20");
    let daemon = start_daemon(&dir, &[("STILTD_DEBUG_PANIC_AFTER_S", "6")]);
    let t0 = Instant::now();
    watch_supply(&sim.state, Duration::from_secs(6), any_on);
    let out = daemon.wait_with_output().unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(t0.elapsed() < Duration::from_secs(30), "{stderr}");
    assert_eq!(out.status.code(), Some(1), "{stderr}");
    assert!(
        stderr.contains("deliberate panic") && stderr.contains("a panic stopped the daemon"),
        "{stderr}"
    );
    assert!(stderr.contains("heaters confirmed at zero"), "{stderr}");
    let (p, _) = supply(&sim.state).unwrap();
    assert!(all_zero(&p), "after the panic the supply holds {p:?}");
}
