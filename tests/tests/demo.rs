//! `stiltd demo` as a user runs it: the JSON summary of 36 simulated hours in virtual time.

use stilt_tests::{command, scratch};

#[test]
fn demo_36h_at_max_speed_meets_the_levelling_targets() {
    let dir = scratch("demo-36h");
    let out = command("stiltd", &dir)
        .args(["demo", "--speed", "max", "--duration", "36h", "--json"])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let s: serde_json::Value = serde_json::from_slice(&out.stdout).expect("one JSON object");
    assert_eq!(s["duration_s"], 129_600.0);
    assert_eq!(s["out_of_range_commands"], 0);
    for axis in s["axes"].as_array().unwrap() {
        let closed = axis["settled"]["rms_from_setpoint_urad"].as_f64().unwrap();
        let ratio = axis["rejection_ratio"].as_f64().unwrap();
        assert!(closed <= 0.050, "closed-loop RMS {closed} µrad");
        assert!(ratio >= 50.0, "rejection {ratio}");
    }
}

#[test]
fn bad_arguments_are_refused_with_what_is_allowed() {
    let dir = scratch("demo-bad-args");
    for (args, needle) in [
        (vec!["demo", "--duration", "3 weeks"], "s, m, h or d"),
        (vec!["demo", "--speed", "fast"], "max"),
        (vec!["demo", "--config", "missing.toml"], "cannot read"),
    ] {
        let out = command("stiltd", &dir).args(&args).output().unwrap();
        assert_eq!(out.status.code(), Some(2), "{args:?}");
        let stderr = String::from_utf8_lossy(&out.stderr);
        assert!(stderr.contains(needle), "{args:?}: {stderr}");
    }
}

#[test]
fn the_table_summary_names_what_a_lab_user_needs() {
    let dir = scratch("demo-table");
    let out = command("stiltd", &dir)
        .args(["demo", "--duration", "8h", "--settle", "2h"])
        .output()
        .unwrap();
    assert!(out.status.success());
    let t = String::from_utf8_lossy(&out.stdout);
    for needle in [
        "settled (closed loop)",
        "open loop, same window",
        "rejection",
        "heater power after settling",
        "limits",
        "outside 0 … max: 0",
    ] {
        assert!(t.contains(needle), "missing `{needle}` in\n{t}");
    }
}

#[test]
fn a_paced_run_advances_with_the_wall_clock() {
    // 10 simulated minutes at 600× take about one second of wall time.
    let dir = scratch("demo-paced");
    let t0 = std::time::Instant::now();
    let out = command("stiltd", &dir)
        .args([
            "demo",
            "--speed",
            "600",
            "--duration",
            "10m",
            "--settle",
            "5m",
            "--json",
        ])
        .output()
        .unwrap();
    let wall = t0.elapsed().as_secs_f64();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let s: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(s["ticks"], 600);
    // Paced, not virtual: it cannot finish much faster than 1 s (loose bound, shared machine).
    assert!(wall >= 0.9, "paced run finished in {wall} s");
}
