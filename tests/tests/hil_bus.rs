//! A thermometer bus over real serial I/O: `stilt-hil-sim` emulates two Modbus units on one
//! pty (taking them from the stage file it is given), and `stiltd run` polls both in turn on
//! that one line, in real time (≈ 10 s). A `no_reply` fault on unit 2 must mark only the leg
//! unit 2 reads and move only unit 2's counters (`thermometer@2`, in the status lines, the
//! summary and `/metrics`); unit 1's legs stay usable and the line stays open; everything
//! recovers when the fault clears.

use std::io::{BufRead, BufReader, Read, Write};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use serde_json::Value;
use stilt_tests::{bin, channel, count, json_lines, scratch, workspace};

/// The shipped HIL stage with leg C moved to channel 0 of unit 2 (legs A and B stay on
/// unit 1), and readings stale after 1 s so that a silent unit shows within the run.
fn bus_stage() -> String {
    let text = std::fs::read_to_string(workspace().join("config/examples/hil/stage.toml")).unwrap();
    let th = "[instruments.thermometer]         # Modbus RTU, our own invented RTD register map\n";
    let out = text
        .replace(
            "thermometer_channel = 2\n",
            "thermometer_channel = 0\nthermometer_unit = 2\n",
        )
        .replace(th, &format!("{th}units = [1, 2]\n"))
        .replace("stale_after_s = 3.0", "stale_after_s = 1.0");
    assert!(out.contains("units = [1, 2]") && out.contains("thermometer_unit = 2"));
    assert!(out.contains("stale_after_s = 1.0"));
    out
}

#[test]
fn a_silent_unit_on_the_thermometer_bus_marks_only_its_leg_and_recovers() {
    let dir = scratch("hil-bus");
    let stage = dir.join("stage.toml");
    std::fs::write(&stage, bus_stage()).unwrap();
    // Invented schedule (simulated seconds): unit 2 stops answering from 2 s to 6 s.
    let faults = dir.join("faults.toml");
    std::fs::write(
        &faults,
        "[[fault]]\ndevice = \"thermometer\"\nkind = \"no_reply\"\nunit = 2\nat_s = 2\nduration_s = 4\n",
    )
    .unwrap();
    let map = dir.join("hil-ports.toml");
    let t0 = Instant::now();
    let mut sim = Command::new(bin("stilt-hil-sim"))
        .arg(&stage)
        .arg("--port-map")
        .arg(&map)
        .arg("--faults")
        .arg(&faults)
        .arg("--duration")
        .arg("14")
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let mut sim_out = BufReader::new(sim.stdout.take().unwrap());
    let mut ready = String::new();
    sim_out.read_line(&mut ready).unwrap();
    assert_eq!(ready.trim(), "ready", "the simulator did not start");
    // The simulator wrote the map with the unit its stage file gives.
    let m = std::fs::read_to_string(&map).unwrap();
    assert!(m.contains("thermometer_unit = 1"), "{m}");

    let mut daemon = Command::new(bin("stiltd"))
        .current_dir(&dir)
        .args(["run", "--config"])
        .arg(&stage)
        .arg("--port-map")
        .arg(&map)
        .args([
            "--duration",
            "10",
            "--no-record",
            "--status-every",
            "0.5",
            "--summary-json",
            "--listen",
            "127.0.0.1:0",
        ])
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let started = Instant::now();
    let daemon_err = daemon.stderr.take().unwrap();
    let (tx, rx) = std::sync::mpsc::channel();
    let relay = std::thread::spawn(move || {
        let mut all = String::new();
        for line in BufReader::new(daemon_err).lines().map_while(Result::ok) {
            let _ = tx.send(line.clone());
            all.push_str(&line);
            all.push('\n');
        }
        all
    });
    let addr = loop {
        let line = rx
            .recv_timeout(Duration::from_secs(10))
            .expect("the daemon announces its API");
        if let Some(u) = line.split("API on http://").nth(1) {
            break u.trim().to_string();
        }
    };
    // After unit 2's silence (simulated 2 s to 6 s), its counters show in the metrics too.
    std::thread::sleep(Duration::from_secs(8).saturating_sub(started.elapsed()));
    let metrics = get(&addr, "/metrics");
    let out = daemon.wait_with_output().unwrap();
    let stderr = relay.join().unwrap();
    let _ = Command::new("kill")
        .arg("-TERM")
        .arg(sim.id().to_string())
        .status();
    let mut sim_rest = String::new();
    sim_out.read_to_string(&mut sim_rest).unwrap();
    let mut sim_err = String::new();
    sim.stderr
        .take()
        .unwrap()
        .read_to_string(&mut sim_err)
        .unwrap();
    assert!(sim.wait().unwrap().success(), "{sim_err}");
    assert!(t0.elapsed() < Duration::from_secs(15), "{:?}", t0.elapsed());

    assert_eq!(out.status.code(), Some(0), "stderr:\n{stderr}");
    assert!(!stderr.contains("panicked"), "{stderr}");
    let lines = json_lines(&out.stdout);
    let (summary, status) = lines.split_last().expect("a summary line");
    assert_eq!(summary["reason"], "run complete", "{stderr}");
    let q = |s: &Value, i: usize| s["legs"][i]["quality"].as_str().unwrap().to_owned();

    // While unit 2 was silent, leg C timed out while A and B (unit 1) were fine.
    assert!(
        status
            .iter()
            .any(|s| q(s, 2) == "timeout" && q(s, 0) == "ok" && q(s, 1) == "ok"),
        "{status:#?}"
    );
    // Unit 1's legs were never marked by unit 2's fault.
    for s in status {
        for i in 0..2 {
            assert!(
                !["timeout", "bad_frame", "stale"].contains(&q(s, i).as_str()),
                "{s}"
            );
        }
    }
    // Only unit 2's counters moved; the line's totals include them; the line stayed open.
    // 4 s of silence at 2 Hz with one retry each: ≈ 8 polls, each 2 timed-out attempts.
    assert!(
        count(summary, "thermometer@2", "timeouts") >= 4,
        "{summary}"
    );
    assert_eq!(count(summary, "thermometer@1", "timeouts"), 0, "{summary}");
    assert_eq!(
        count(summary, "thermometer@1", "bad_frames"),
        0,
        "{summary}"
    );
    // 8 s at 2 Hz, one scan-record transaction per unit per scan: ≈ 16; at least 15 scans,
    // as the two-transaction scan's 30 requests asked.
    assert!(
        count(summary, "thermometer@1", "requests") >= 15,
        "{summary}"
    );
    assert_eq!(
        count(summary, "thermometer", "timeouts"),
        count(summary, "thermometer@2", "timeouts")
    );
    assert_eq!(count(summary, "thermometer", "reconnects"), 0, "{summary}");
    // Recovered: the last status has every leg usable, and unit 2 is polled again.
    let last = status.last().unwrap();
    for i in 0..3 {
        assert_eq!(q(last, i), "ok", "{last}");
    }
    assert!(
        channel(last, "thermometer@2")["connected"] == true,
        "{last}"
    );

    // The same counters in the metrics, one series per unit (labels channel and port).
    let series = |name: &str, channel: &str| -> f64 {
        metrics
            .lines()
            .find(|l| l.starts_with(&format!("{name}{{channel=\"{channel}\"")))
            .and_then(|l| l.rsplit(' ').next())
            .and_then(|v| v.parse().ok())
            .unwrap_or_else(|| panic!("no {name} for {channel} in\n{metrics}"))
    };
    assert!(series("stiltd_channel_timeouts_total", "thermometer@2") >= 4.0);
    assert_eq!(
        series("stiltd_channel_timeouts_total", "thermometer@1"),
        0.0
    );
    // Scraped ≈ 8 s after the start at 2 Hz, one transaction per scan: ≈ 16, minus start-up.
    assert!(series("stiltd_channel_requests_total", "thermometer@1") >= 10.0);

    // The simulator's own account: unit 2 lost replies, unit 1 none; each heard the other.
    let sim_summary: Value = serde_json::from_str(sim_rest.lines().last().unwrap()).unwrap();
    let unit = |u: u64| {
        sim_summary["thermometer_units"]
            .as_array()
            .unwrap()
            .iter()
            .find(|x| x["unit"] == u)
            .unwrap_or_else(|| panic!("no unit {u} in {sim_summary}"))
            .clone()
    };
    assert!(
        unit(2)["replies_lost"].as_u64().unwrap() >= 4,
        "{sim_summary}"
    );
    assert_eq!(unit(1)["replies_lost"], 0, "{sim_summary}");
    assert!(
        unit(1)["not_for_us"].as_u64().unwrap() >= 10,
        "{sim_summary}"
    );
    assert!(unit(2)["answered"].as_u64().unwrap() >= 4, "{sim_summary}");
}

/// A plain HTTP/1.0 GET on loopback; the body.
fn get(addr: &str, path: &str) -> String {
    let mut c = std::net::TcpStream::connect(addr).unwrap();
    c.set_read_timeout(Some(Duration::from_secs(5))).unwrap();
    write!(c, "GET {path} HTTP/1.0\r\nHost: {addr}\r\n\r\n").unwrap();
    let mut r = String::new();
    c.read_to_string(&mut r).unwrap();
    assert!(
        r.starts_with("HTTP/1.0 200") || r.starts_with("HTTP/1.1 200"),
        "{r}"
    );
    r.split_once("\r\n\r\n")
        .map(|(_, b)| b.to_string())
        .unwrap_or_default()
}

/// `stiltd hil --config` hands its stage file to the simulator too, so a bus of two units
/// is emulated as the daemon expects: both units answer.
#[test]
fn stiltd_hil_gives_its_stage_file_to_the_simulator() {
    let dir = scratch("hil-bus-config");
    std::fs::write(dir.join("bus.toml"), bus_stage()).unwrap();
    let out = Command::new(bin("stiltd"))
        .current_dir(&dir)
        .args([
            "hil",
            "--config",
            "bus.toml",
            "--work-dir",
            "work",
            "--duration",
            "5",
            "--no-record",
            "--summary-json",
            "--listen",
            "127.0.0.1:0",
        ])
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(out.status.success(), "{stderr}");
    let summary: Value = String::from_utf8_lossy(&out.stdout)
        .lines()
        .filter_map(|l| serde_json::from_str(l).ok())
        .find(|v: &Value| v.get("channels").is_some() && v.get("ticks").is_some())
        .unwrap_or_else(|| panic!("no summary: {stderr}"));
    for unit in ["thermometer@1", "thermometer@2"] {
        let c = channel(&summary, unit);
        assert!(c["requests"].as_u64().unwrap() >= 4, "{unit}: {c}");
        assert_eq!(c["timeouts"], 0, "{unit} must answer: {c}");
    }
}
