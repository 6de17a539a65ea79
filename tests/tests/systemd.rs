//! The unit file: the directives that matter are present, and `systemd-analyze verify`
//! (the outside reference) accepts it with nothing on stderr — it exits 0 even on unknown
//! keys, so stderr is what tells. Exposure is checked with `systemd-analyze security`.

use std::process::Command;

use stilt_tests::{bin, workspace};

fn unit() -> String {
    std::fs::read_to_string(workspace().join("systemd/stiltd.service")).unwrap()
}

fn has(u: &str, line: &str) -> bool {
    u.lines().any(|l| l.trim() == line)
}

#[test]
fn the_directives_that_matter_are_present() {
    let u = unit();
    for line in [
        "Type=notify",
        "WatchdogSec=10s",
        "Restart=on-failure",
        "User=stiltd",
        "SupplementaryGroups=dialout",
        "StateDirectory=stiltd",
        "ConfigurationDirectory=stilt",
        "ProtectSystem=strict",
        "NoNewPrivileges=yes",
        "DevicePolicy=closed",
        "DeviceAllow=char-ttyUSB rw",
        "PrivateDevices=no",
        "ExecReload=/bin/kill -HUP $MAINPID",
    ] {
        assert!(has(&u, line), "missing `{line}`");
    }
    assert!(
        u.lines()
            .any(|l| l.starts_with("ExecStart=/usr/local/bin/stiltd run --config "))
    );
    // PrivateDevices=yes would hide the serial ports.
    assert!(!has(&u, "PrivateDevices=yes"));
}

fn analyze() -> Option<std::path::PathBuf> {
    let p = std::path::PathBuf::from("/usr/bin/systemd-analyze");
    if p.exists() {
        Some(p)
    } else {
        assert!(
            std::env::var("CI").is_err(),
            "CI must have systemd-analyze (apt-get install systemd)"
        );
        eprintln!("systemd-analyze not found: unit verification not run here");
        None
    }
}

#[test]
fn systemd_analyze_verify_and_security_accept_the_unit() {
    let Some(sa) = analyze() else { return };
    let dir = stilt_tests::scratch("systemd");
    let stiltd = bin("stiltd");
    let text = unit().replace("/usr/local/bin/stiltd", &stiltd.display().to_string());
    let path = dir.join("stiltd.service");
    std::fs::write(&path, text).unwrap();
    let out = Command::new(&sa).arg("verify").arg(&path).output().unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        out.status.success() && stderr.trim().is_empty(),
        "verify: {stderr}"
    );
    // Exposure on the 0–100 scale: 20 = 2.0; the unit scores 1.7 on systemd 252.
    let out = Command::new(&sa)
        .args(["security", "--offline=true", "--threshold=20"])
        .arg(&path)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "security: {}",
        String::from_utf8_lossy(&out.stdout)
    );
}
