//! `stiltd tune --daemon`: a leg step test through a running daemon's HTTP API, on the
//! hardware-in-the-loop simulator at 200× speed, then `--apply simc --yes`.
//!
//! `stilt-hil-sim --speed 200` plays the stage over ptys and `stiltd run` drives it in wall
//! time, so the daemon sees every time constant divided by 200. The test computes the
//! leg's heater → body static gain and dominant time constant from the two-node model
//! (hil-sim/src/thermal.rs) and the `[simulation]` parameters it writes into the stage
//! file, and checks the fit against them; then that the SIMC gains were applied (read back
//! from `/v1/config` with a plain HTTP GET, not through stilt's own client), that the
//! daemon's mode and manual power were restored, and that no alarm was raised.

use std::io::{BufRead, BufReader, Read, Write};
use std::net::TcpStream;
use std::process::{Child, Command, Stdio};
use std::sync::mpsc;
use std::time::{Duration, Instant};

use serde_json::Value;
use stilt_tests::{bin, command, scratch, workspace};

/// Simulated seconds per wall-clock second.
const SPEED: f64 = 200.0;

// The stage's thermal parameters, written into the stage file below (the defaults of
// config/src/validate.rs, with the legs' random spread switched off so that each leg has
// exactly these values).
const LEG_C_J_PER_K: f64 = 400.0;
const LEG_G_W_PER_K: f64 = 0.3;
const HEATER_C_J_PER_K: f64 = 15.0;
const COUPLING_W_PER_K: f64 = 1.0;
const HEATER_LOSS_W_PER_K: f64 = 0.02;

/// Static gain body temperature / heater power, K/W, of the two-node model at steady state
/// (set both derivatives of hil-sim/src/thermal.rs's equations to zero):
/// P = G_ba·T_b + G_ha·T_h and T_h = T_b·(G_hb + G_ba)/G_hb.
fn model_gain_k_per_w() -> f64 {
    1.0 / (LEG_G_W_PER_K
        + HEATER_LOSS_W_PER_K * (COUPLING_W_PER_K + LEG_G_W_PER_K) / COUPLING_W_PER_K)
}

/// The model's two time constants (slow, fast), s: −1/λ for the eigenvalues λ of its
/// 2×2 system matrix A (thermal.rs, `continuous`), from λ = tr/2 ± √(tr²/4 − det)
/// (the characteristic polynomial of a 2×2 matrix, common practice).
fn model_time_constants_s() -> (f64, f64) {
    let (ch, cb) = (HEATER_C_J_PER_K, LEG_C_J_PER_K);
    let (ghb, gha, gba) = (COUPLING_W_PER_K, HEATER_LOSS_W_PER_K, LEG_G_W_PER_K);
    let a = [[-(ghb + gha) / ch, ghb / ch], [ghb / cb, -(ghb + gba) / cb]];
    let tr = a[0][0] + a[1][1];
    let det = a[0][0] * a[1][1] - a[0][1] * a[1][0];
    let w = (tr * tr / 4.0 - det).sqrt();
    let (slow, fast) = (tr / 2.0 + w, tr / 2.0 - w);
    (-1.0 / slow, -1.0 / fast)
}

/// The HIL stage file with the settings this test needs: the daemon starts in `off`
/// (heaters at 0 W: the stage sits at the room temperature, so no warm-up is needed), a
/// 5 Hz control loop and thermometer poll (enough samples per time constant at 200×),
/// a still room (no daily swing, wander or gradient swing: the fit is checked against the
/// model alone), and the thermal parameters above with no spread between legs.
fn stage_file() -> String {
    let src = std::fs::read_to_string(workspace().join("config/examples/hil/stage.toml"))
        .expect("the HIL stage file");
    let swaps = [
        (
            "rate_hz = 1.0\nmode = \"level\"",
            "rate_hz = 5.0\nmode = \"off\"",
        ),
        (
            "poll_hz = 2.0\ntimeout_ms = 150",
            "poll_hz = 5.0\ntimeout_ms = 150",
        ),
        (
            "[simulation]\nseed = 20261201",
            "[simulation]\nseed = 20261201\nambient_daily_swing_k = 0.0\nambient_walk_k = 0.0\n\
             gradient_daily_x_k_per_m = 0.0\ngradient_daily_y_k_per_m = 0.0\nleg_spread_ratio = 0.0\n\
             leg_heat_capacity_j_per_k = 400.0\nleg_conductance_w_per_k = 0.3\n\
             heater_heat_capacity_j_per_k = 15.0\nheater_coupling_w_per_k = 1.0\nheater_loss_w_per_k = 0.02",
        ),
    ];
    let mut s = src;
    for (from, to) in swaps {
        assert!(
            s.contains(from),
            "the HIL stage file no longer has {from:?}"
        );
        s = s.replace(from, to);
    }
    s
}

/// Kills a child on drop (a failed assertion must not leave the simulator running).
struct Reaper(Child);

impl Drop for Reaper {
    fn drop(&mut self) {
        let _ = Command::new("kill")
            .arg("-TERM")
            .arg(self.0.id().to_string())
            .status();
        for _ in 0..60 {
            if let Ok(Some(_)) = self.0.try_wait() {
                return;
            }
            std::thread::sleep(Duration::from_millis(50));
        }
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

/// A plain HTTP/1.1 GET on loopback; returns the JSON body.
fn get_json(addr: &str, path: &str) -> Value {
    let mut s = TcpStream::connect(addr).expect("connect to the daemon");
    s.set_read_timeout(Some(Duration::from_secs(5))).unwrap();
    write!(
        s,
        "GET {path} HTTP/1.1\r\nHost: {addr}\r\nConnection: close\r\nAccept: application/json\r\n\r\n"
    )
    .unwrap();
    let mut text = String::new();
    s.read_to_string(&mut text).unwrap();
    let (head, body) = text.split_once("\r\n\r\n").expect("an HTTP answer");
    assert!(head.starts_with("HTTP/1.1 200"), "{head}");
    // The API answers with a length, not chunks, for these small documents.
    let body = if head
        .to_ascii_lowercase()
        .contains("transfer-encoding: chunked")
    {
        let mut out = String::new();
        let mut rest = body;
        while let Some((len, tail)) = rest.split_once("\r\n") {
            let n = usize::from_str_radix(len.trim(), 16).unwrap_or(0);
            if n == 0 {
                break;
            }
            out.push_str(&tail[..n]);
            rest = &tail[n + 2..];
        }
        out
    } else {
        body.to_string()
    };
    serde_json::from_str(&body).unwrap_or_else(|e| panic!("{e}: {body}"))
}

#[test]
fn tune_through_the_daemon_fits_the_stage_physics_applies_and_restores() {
    let t_start = Instant::now();
    let dir = scratch("tune-daemon");
    std::fs::write(dir.join("stage.toml"), stage_file()).unwrap();
    std::fs::copy(
        workspace().join("config/examples/hil/hil-ports.toml"),
        dir.join("hil-ports.toml"),
    )
    .unwrap();
    // The simulator, with this stage file, at 200×.
    let mut sim = Command::new(bin("stilt-hil-sim"));
    sim.current_dir(&dir)
        .arg("stage.toml")
        .args(["--port-map", "ports.toml", "--speed", &SPEED.to_string()])
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .stdin(Stdio::null());
    let mut sim = Reaper(sim.spawn().unwrap());
    let out = sim.0.stdout.take().unwrap();
    let (tx, rx) = mpsc::channel();
    std::thread::spawn(move || {
        for l in BufReader::new(out).lines().map_while(Result::ok) {
            if l.trim() == "ready" {
                let _ = tx.send(());
            }
        }
    });
    rx.recv_timeout(Duration::from_secs(15))
        .expect("the simulator prints ready");
    // The daemon on its ptys, API on a free loopback port.
    let mut daemon = command("stiltd", &dir);
    daemon
        .args([
            "run",
            "--config",
            "stage.toml",
            "--port-map",
            "ports.toml",
            "--no-record",
            "--listen",
            "127.0.0.1:0",
        ])
        .stdout(Stdio::null())
        .stderr(Stdio::piped());
    let mut daemon = Reaper(daemon.spawn().unwrap());
    let err = daemon.0.stderr.take().unwrap();
    let (tx, rx) = mpsc::channel();
    std::thread::spawn(move || {
        for l in BufReader::new(err).lines().map_while(Result::ok) {
            let _ = tx.send(l);
        }
    });
    let url = loop {
        let l = rx
            .recv_timeout(Duration::from_secs(10))
            .expect("the daemon announces its API");
        if let Some(u) = l.split("API on ").nth(1) {
            break u.trim().to_string();
        }
    };
    let addr = url.trim_start_matches("http://").to_string();
    // Wait until every leg has a temperature.
    let t0 = Instant::now();
    loop {
        let st = get_json(&addr, "/v1/status");
        if st["legs"]
            .as_array()
            .unwrap()
            .iter()
            .all(|l| l["temp_c"].is_number())
        {
            assert_eq!(st["mode"], "off");
            break;
        }
        assert!(
            t0.elapsed() < Duration::from_secs(10),
            "no leg readings: {st}"
        );
        std::thread::sleep(Duration::from_millis(200));
    }
    let before = get_json(&addr, "/v1/config");
    assert_eq!(before["control"]["manual_power_w"], 1.0);

    // SIGTERM during the test: it stops, puts the previous state back and says so.
    let victim = command("stiltd", &dir)
        .args([
            "tune",
            "--daemon",
            &url,
            "--loop",
            "leg:A",
            "--step",
            "0.5",
            "--settle",
            "60",
            "--baseline",
            "10",
            "--record",
            "30",
        ])
        .stdin(Stdio::null())
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let t_sig = Instant::now();
    loop {
        if get_json(&addr, "/v1/status")["mode"] == "manual" {
            break;
        }
        assert!(
            t_sig.elapsed() < Duration::from_secs(10),
            "the test never switched to manual"
        );
        std::thread::sleep(Duration::from_millis(100));
    }
    assert!(
        Command::new("kill")
            .args(["-TERM", &victim.id().to_string()])
            .status()
            .unwrap()
            .success()
    );
    let v = victim.wait_with_output().unwrap();
    let verr = String::from_utf8_lossy(&v.stderr);
    assert_eq!(v.status.code(), Some(1), "{verr}");
    assert!(
        verr.contains("stopped by a signal") && verr.contains("previous state was restored"),
        "{verr}"
    );
    assert_eq!(get_json(&addr, "/v1/status")["mode"], "off");
    assert_eq!(
        get_json(&addr, "/v1/config")["control"]["manual_power_w"],
        1.0
    );

    // The test: 0 W → 0.5 W on every heater, 4 s of baseline and 30 s of record in the
    // daemon's time (800 s and 6000 s of the stage's, about 4.6 slow time constants).
    let tune = command("stiltd", &dir)
        .args([
            "tune",
            "--daemon",
            &url,
            "--loop",
            "leg:1",
            "--step",
            "0.5",
            "--settle",
            "2",
            "--baseline",
            "4",
            "--record",
            "30",
            "--progress-every",
            "5",
            "--json",
            "--apply",
            "simc",
            "--yes",
        ])
        .stdin(Stdio::null())
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&tune.stderr);
    assert!(tune.status.success(), "stiltd tune failed:\n{stderr}");
    eprintln!("{stderr}");
    let r: Value = serde_json::from_slice(&tune.stdout)
        .unwrap_or_else(|e| panic!("{e}: {}", String::from_utf8_lossy(&tune.stdout)));

    // The fit against the physics. At speed S the daemon sees τ/S. The model is second
    // order with no zero (time constants τ1 ≫ τ2), which an FOPDT fit approximates with
    // τ ≈ τ1 + τ2/2 and θ ≈ τ2/2 (Skogestad 2003, the "half rule").
    let k = model_gain_k_per_w();
    let (tau1, tau2) = model_time_constants_s();
    let tau_expected_wall = (tau1 + tau2 / 2.0) / SPEED;
    let m = &r["model"];
    let gain = m["gain"].as_f64().unwrap();
    let tau = m["time_constant_s"].as_f64().unwrap();
    eprintln!(
        "fit: K = {gain} K/W (model {k}), τ = {tau} s wall = {} s stage (model τ1 + τ2/2 = {} s), θ = {} s wall",
        tau * SPEED,
        tau1 + tau2 / 2.0,
        m["dead_time_s"]
    );
    // Tolerances: 5 % on K, 10 % on τ (thermometer noise of 1 mK against a 1.5 K step,
    // timing jitter of the wall-clock loop, the thermometer's poll period in the delay).
    assert!(
        (gain - k).abs() < 0.05 * k,
        "fitted K = {gain} K/W, the model gives {k} K/W\n{stderr}"
    );
    assert!(
        (tau - tau_expected_wall).abs() < 0.10 * tau_expected_wall,
        "fitted τ = {tau} s (wall), the model gives {tau_expected_wall} s = ({tau1} + {tau2}/2) s / {SPEED}\n{stderr}"
    );
    assert!(r["world"].as_str().unwrap().contains(&url), "{r}");

    // The SIMC gains were applied: read back independently.
    let simc = r["proposals"]
        .as_array()
        .unwrap()
        .iter()
        .find(|p| p["key"] == "simc")
        .expect("a SIMC proposal");
    let after = get_json(&addr, "/v1/config");
    let leg_loop = &after["control"]["leg_loop"];
    let close = |a: &Value, b: &Value| {
        let (a, b) = (a.as_f64().unwrap(), b.as_f64().unwrap());
        (a - b).abs() <= 1e-9 * a.abs().max(b.abs())
    };
    assert!(close(&leg_loop["kp"], &simc["kp"]), "{leg_loop} vs {simc}");
    assert!(
        close(&leg_loop["ti_s"], &simc["ti_s"]),
        "{leg_loop} vs {simc}"
    );
    assert!(stderr.contains("applied; the daemon answered"), "{stderr}");
    // The mode and the manual power were restored; no alarm was raised.
    assert_eq!(after["control"]["manual_power_w"], 1.0, "{after}");
    let st = get_json(&addr, "/v1/status");
    assert_eq!(st["mode"], "off", "{st}");
    assert_eq!(st["alarms"].as_array().unwrap().len(), 0, "{st}");
    // Progress went to the terminal at a bounded rate.
    let progress = stderr.lines().filter(|l| l.starts_with("tune: ")).count();
    assert!(stderr.contains("tune: recording"), "{stderr}");
    assert!(progress < 40, "{progress} progress lines:\n{stderr}");
    drop(daemon);
    drop(sim);
    assert!(
        t_start.elapsed() < Duration::from_secs(90),
        "took {:?}",
        t_start.elapsed()
    );
}
