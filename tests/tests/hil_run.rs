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
