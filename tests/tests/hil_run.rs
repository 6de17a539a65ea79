//! `stiltd run` and `stiltd hil` refuse what they cannot do, with a clear message and the
//! documented exit code (2 for a configuration problem, 1 for a runtime failure).

use stilt_tests::{command, workspace};

#[test]
fn run_refuses_a_stage_without_instruments() {
    let out = command("stiltd", &workspace())
        .args([
            "run",
            "--config",
            "config/examples/demo.toml",
            "--no-record",
        ])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.contains("no [instruments] section") && stderr.contains("hardware-template"),
        "{stderr}"
    );
}

#[test]
fn run_reports_a_bad_port_map_at_its_key() {
    let out = command("stiltd", &workspace())
        .args([
            "run",
            "--config",
            "config/examples/hil/stage.toml",
            "--port-map",
            "no/such/ports.toml",
        ])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.contains("no/such/ports.toml") && stderr.contains("cannot read the port map"),
        "{stderr}"
    );
}

#[test]
fn hil_without_the_simulator_says_how_to_build_it() {
    let out = command("stiltd", &workspace())
        .args(["hil", "--sim", "no/such/stilt-hil-sim", "--duration", "1"])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(1));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.contains("cannot find the simulator") && stderr.contains("cargo build --bins"),
        "{stderr}"
    );
}

#[test]
fn sighup_reloads_the_stage_file_and_a_bad_file_is_refused() {
    use std::process::{Command, Stdio};
    use std::time::Duration;
    let dir = stilt_tests::scratch("hil-sighup");
    let src = std::fs::read_to_string(workspace().join("config/examples/hil/stage.toml")).unwrap();
    std::fs::copy(
        workspace().join("config/examples/hil/hil-ports.toml"),
        dir.join("hil-ports.toml"),
    )
    .unwrap();
    let stage = dir.join("stage.toml");
    std::fs::write(&stage, &src).unwrap();
    let child = command("stiltd", &dir)
        .args([
            "hil",
            "--config",
            "stage.toml",
            "--duration",
            "9",
            "--out",
            "rec",
            "--listen",
            "127.0.0.1:0",
        ])
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let pid = child.id().to_string();
    let hup = || {
        assert!(
            Command::new("kill")
                .args(["-HUP", &pid])
                .status()
                .unwrap()
                .success()
        )
    };
    std::thread::sleep(Duration::from_secs(3));
    // A file that fails validation: refused, the running configuration stays.
    std::fs::write(&stage, src.replace("kp_w_per_k = 8.0", "kp_w_per_k = -1.0")).unwrap();
    hup();
    std::thread::sleep(Duration::from_secs(1));
    // A good change: applied.
    std::fs::write(&stage, src.replace("kp_w_per_k = 8.0", "kp_w_per_k = 6.5")).unwrap();
    hup();
    let out = child.wait_with_output().unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let ev = command("stiltd", &dir)
        .args(["export", "rec", "--stream", "events"])
        .output()
        .unwrap();
    let ev = String::from_utf8_lossy(&ev.stdout);
    assert!(
        ev.contains("reload refused") && ev.contains("control.leg_loop.kp_w_per_k"),
        "{ev}"
    );
    assert!(ev.contains("api:sighup") && ev.contains("kp=6.5"), "{ev}");
}
