//! The HTTP API of the real daemon: `stiltd hil` (the daemon on the simulator's ptys)
//! serves on a free loopback port and `stiltctl` reads and changes it; the change is
//! audited in the recording.

use std::io::{BufRead, BufReader};
use std::process::Stdio;
use std::time::{Duration, Instant};

use stilt_tests::{command, scratch};

#[test]
fn stiltctl_talks_to_the_running_daemon_over_http() {
    let dir = scratch("api-hil");
    let mut child = command("stiltd", &dir)
        .args([
            "hil",
            "--duration",
            "10",
            "--out",
            "rec",
            "--listen",
            "127.0.0.1:0",
        ])
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let stderr = child.stderr.take().unwrap();
    let (tx, rx) = std::sync::mpsc::channel();
    std::thread::spawn(move || {
        for line in BufReader::new(stderr).lines().map_while(Result::ok) {
            let _ = tx.send(line);
        }
    });
    let t0 = Instant::now();
    let url = loop {
        let line = rx
            .recv_timeout(Duration::from_secs(10))
            .expect("the daemon announces its API");
        if let Some(u) = line.split("API on ").nth(1) {
            break u.trim().to_string();
        }
        assert!(t0.elapsed() < Duration::from_secs(10));
    };
    std::thread::sleep(Duration::from_secs(2));
    let ctl = |args: &[&str]| {
        command("stiltctl", &dir)
            .args(["--url", &url])
            .args(args)
            .output()
            .unwrap()
    };
    let st = ctl(&["status", "--json"]);
    assert!(
        st.status.success(),
        "{}",
        String::from_utf8_lossy(&st.stderr)
    );
    let s: serde_json::Value = serde_json::from_slice(&st.stdout).unwrap();
    assert_eq!(s["mode"], "level");
    assert_eq!(s["legs"].as_array().unwrap().len(), 3);
    let set = ctl(&["set", "tilt", "--x-urad", "1.25"]);
    assert!(
        set.status.success(),
        "{}",
        String::from_utf8_lossy(&set.stderr)
    );
    let bad = ctl(&["set", "tilt", "--x-urad", "5000"]);
    assert!(!bad.status.success());
    assert!(child.wait().unwrap().success());
    let ev = command("stiltd", &dir)
        .args(["export", "rec", "--stream", "events"])
        .output()
        .unwrap();
    let ev = String::from_utf8_lossy(&ev.stdout);
    assert!(
        ev.contains("1.25"),
        "the change is in the recording's events: {ev}"
    );
}
