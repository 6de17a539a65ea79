//! The whole path over real serial I/O: `stiltd hil` runs `stilt-hil-sim` and the daemon
//! together in real time (≤ 15 s each), with faults from the simulator's fault file
//! (hil-sim/README.md, "The fault file"). Each fault must be survived (exit 0, no panic),
//! flagged (qualities, counters, fault events) and recovered from when it clears; on the way
//! out the heaters are confirmed at zero.

use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use serde_json::Value;
use stilt_tests::{bin, channel, count, json_lines, scratch};

/// Runs `stiltd hil` with `faults` (TOML text) and extra arguments; returns the status lines
/// and the summary.
fn hil(
    name: &str,
    faults: &str,
    extra: &[&str],
    stop_after: Option<Duration>,
) -> (Vec<Value>, Value, String) {
    let dir = scratch(name);
    let f = dir.join("faults.toml");
    std::fs::write(&f, faults).unwrap();
    // The simulator must exist beside stiltd (bin() builds both when missing).
    assert!(bin("stilt-hil-sim").exists());
    let mut c = Command::new(bin("stiltd"));
    c.current_dir(&dir)
        .arg("hil")
        .arg("--faults")
        .arg(&f)
        .arg("--work-dir")
        .arg(dir.join("work"))
        .args([
            "--status-every",
            "0.5",
            "--summary-json",
            "--listen",
            "127.0.0.1:0",
        ])
        .args(extra)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped());
    let child = c.spawn().unwrap();
    if let Some(d) = stop_after {
        let pid = child.id();
        std::thread::spawn(move || {
            std::thread::sleep(d);
            let _ = Command::new("kill")
                .arg("-TERM")
                .arg(pid.to_string())
                .status();
        });
    }
    let t0 = Instant::now();
    let out = child.wait_with_output().unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr).into_owned();
    assert!(
        t0.elapsed() < Duration::from_secs(30),
        "took {:?}",
        t0.elapsed()
    );
    assert_eq!(out.status.code(), Some(0), "stderr:\n{stderr}");
    assert!(!stderr.contains("panicked"), "{stderr}");
    let lines = json_lines(&out.stdout);
    let (summary, status) = lines.split_last().expect("a summary line");
    (status.to_vec(), summary.clone(), stderr)
}

#[test]
fn reply_faults_are_flagged_counted_and_recovered_from() {
    // Invented schedule (simulated seconds): the tiltmeter is silent from 2 s to 5 s and
    // the thermometer's CRCs are wrong from 2 s to 7 s; leg B's heater is open from 8 s to
    // 11 s, while the tiltmeter repeats its last value and the thermometer answers 400 ms
    // late (its timeout is 150 ms); 3 s of normal running follow.
    let faults = r#"
[[fault]]
device = "tiltmeter"
kind = "no_reply"
at_s = 2
duration_s = 3

[[fault]]
device = "thermometer"
kind = "bad_crc"
at_s = 2
duration_s = 5

[[fault]]
device = "heater"
kind = "open_circuit"
at_s = 8
duration_s = 3
channel = 2

[[fault]]
device = "tiltmeter"
kind = "stuck_value"
at_s = 8
duration_s = 3

[[fault]]
device = "thermometer"
kind = "late_reply"
at_s = 8
duration_s = 3
delay_ms = 400
"#;
    let (status, summary, stderr) = hil(
        "hil-reply-faults",
        faults,
        &["--duration", "14", "--no-record"],
        None,
    );
    assert_eq!(summary["reason"], "run complete", "{stderr}");
    assert_eq!(summary["heaters_zeroed"], true);
    // Counters moved.
    assert!(count(&summary, "tiltmeter", "timeouts") >= 15, "{summary}");
    assert!(
        count(&summary, "thermometer", "bad_frames") >= 4,
        "{summary}"
    );
    assert!(
        count(&summary, "heater_readback", "bad_frames") >= 1,
        "{summary}"
    );
    assert!(summary["fault_events"].as_u64().unwrap() >= 1, "{summary}");
    assert!(summary["tilt_bad"].as_u64().unwrap() >= 15, "{summary}");
    // Flags were set during the faults.
    let tilt_q = |s: &Value| s["tilt"][0]["quality"].as_str().unwrap().to_owned();
    let leg = |s: &Value, i: usize, k: &str| s["legs"][i][k].clone();
    // Unanswered tilt queries are counted as timeouts (above); the control row marks the
    // tick's tilt unusable (the pipeline files a sample without a value as a bad frame).
    assert!(
        status
            .iter()
            .any(|s| tilt_q(s) == "timeout" || tilt_q(s) == "bad_frame"),
        "{status:#?}"
    );
    assert!(
        status.iter().any(|s| leg(s, 0, "quality") == "bad_frame"),
        "{status:#?}"
    );
    assert!(
        status
            .iter()
            .any(|s| leg(s, 1, "readback_mismatch") == true),
        "{status:#?}"
    );
    // A value repeating for stuck_after_s (1 s in the HIL stage) is stale.
    assert!(status.iter().any(|s| tilt_q(s) == "stale"), "{status:#?}");
    // While a leg temperature is unusable the loop holds that leg's output.
    let held: Vec<f64> = status
        .iter()
        .filter(|s| leg(s, 0, "quality") == "bad_frame")
        .map(|s| leg(s, 0, "power_w").as_f64().unwrap())
        .collect();
    assert!(held.len() >= 2, "{status:#?}");
    assert!(held.iter().all(|p| *p == held[0]), "{held:?}");
    // The loop's outputs stayed within the heater's range the whole time (demo: 0 … 2 W).
    for s in &status {
        for i in 0..3 {
            let p = leg(s, i, "power_w").as_f64().unwrap();
            assert!((0.0..=2.0).contains(&p), "{s}");
        }
        assert_eq!(s["mode"], "level");
    }
    // Recovered: the last status has fresh, usable readings and no mismatch.
    let last = status.last().unwrap();
    assert_eq!(tilt_q(last), "ok", "{last}");
    for i in 0..3 {
        assert_eq!(leg(last, i, "quality"), "ok", "{last}");
        assert_eq!(leg(last, i, "readback_mismatch"), false, "{last}");
    }
    assert!(channel(last, "tiltmeter")["connected"] == true);
}

#[test]
fn dead_lines_are_reopened_and_sigterm_stops_with_heaters_at_zero() {
    // Invented schedule: the tiltmeter and the heater supply lines go dead from 2 s to 6 s.
    let faults = r#"
[[fault]]
device = "tiltmeter"
kind = "disconnect"
at_s = 2
duration_s = 4

[[fault]]
device = "heater"
kind = "disconnect"
at_s = 2
duration_s = 4

[[fault]]
device = "thermometer"
kind = "garbled"
at_s = 2
duration_s = 4
bytes = 2
"#;
    let (status, summary, stderr) = hil(
        "hil-dead-lines",
        faults,
        &["--out", "rec"],
        Some(Duration::from_secs(12)),
    );
    assert_eq!(summary["reason"], "shutdown requested", "{stderr}");
    assert!(stderr.contains("SIGTERM"), "{stderr}");
    assert_eq!(summary["heaters_zeroed"], true, "{stderr}");
    // A dead line gives timeouts, and after ten in a row the port is dropped and reopened.
    assert!(count(&summary, "tiltmeter", "timeouts") >= 10, "{summary}");
    assert!(count(&summary, "tiltmeter", "reconnects") >= 1, "{summary}");
    assert!(
        count(&summary, "thermometer", "bad_frames") >= 1,
        "{summary}"
    );
    assert!(summary["fault_events"].as_u64().unwrap() >= 1);
    // Back to normal once the line is alive again.
    let last = status.last().unwrap();
    assert_eq!(last["tilt"][0]["quality"], "ok", "{last}");
    assert!(channel(last, "heater")["connected"] == true);
    // The recording was closed: one segment file in the folder.
    let rec = scratch_dir("hil-dead-lines").join("rec");
    let files: Vec<_> = std::fs::read_dir(&rec)
        .unwrap()
        .filter_map(|e| e.ok())
        .filter(|e| e.path().extension().is_some_and(|x| x == "h5"))
        .collect();
    assert!(!files.is_empty(), "no segment in {}", rec.display());
    // The simulator's exit summary shows the supply at zero.
    let sim = stderr
        .lines()
        .find_map(|l| l.strip_prefix("stilt-hil-sim: "))
        .expect("the simulator's summary");
    let sim: Value = serde_json::from_str(sim).unwrap();
    for p in sim["heater_power_w"].as_array().unwrap() {
        assert_eq!(p.as_f64(), Some(0.0), "{sim}");
    }
}

fn scratch_dir(name: &str) -> std::path::PathBuf {
    stilt_tests::workspace()
        .join("target")
        .join("scratch")
        .join(name)
}
