//! `stiltd check`: every shipped example passes; every broken config gives its precise
//! error (file:line:column, key path, value found, problem) and exit code 2.

use stilt_tests::{command, workspace};

#[test]
fn every_shipped_example_config_passes() {
    let dir = workspace().join("config/examples");
    let mut n = 0;
    for e in std::fs::read_dir(&dir).unwrap() {
        let p = e.unwrap().path();
        if p.extension().is_some_and(|x| x == "toml") {
            let out = command("stiltd", &dir)
                .args(["check", "--config"])
                .arg(&p)
                .output()
                .unwrap();
            let stdout = String::from_utf8_lossy(&out.stdout);
            assert!(
                out.status.success(),
                "{}: {}",
                p.display(),
                String::from_utf8_lossy(&out.stderr)
            );
            assert!(
                stdout.contains("legs (3):") && stdout.contains(": OK"),
                "{stdout}"
            );
            n += 1;
        }
    }
    assert!(n >= 2, "expected the demo and the template, found {n}");
}

#[test]
fn every_broken_config_gives_its_precise_error() {
    let dir = workspace().join("tests/data/broken");
    let expected = std::fs::read_to_string(dir.join("expected.txt")).unwrap();
    let mut by_file: std::collections::BTreeMap<&str, Vec<&str>> = Default::default();
    for line in expected.lines().filter(|l| !l.trim().is_empty()) {
        let file = line.split(':').next().unwrap();
        by_file.entry(file).or_default().push(line);
    }
    assert!(by_file.len() >= 8);
    for (file, lines) in by_file {
        let out = command("stiltd", &dir)
            .args(["check", "--config", file])
            .output()
            .unwrap();
        assert_eq!(
            out.status.code(),
            Some(2),
            "{file} must be refused with exit code 2"
        );
        let stderr = String::from_utf8_lossy(&out.stderr);
        for l in &lines {
            assert!(stderr.contains(l), "{file}: expected\n  {l}\nin\n{stderr}");
        }
        // Exactly these errors, no more.
        let n = stderr.lines().filter(|l| l.starts_with("  ")).count();
        assert_eq!(n, lines.len(), "{file}: {stderr}");
    }
}

#[test]
fn a_missing_file_is_a_clear_error() {
    let out = command("stiltd", &workspace())
        .args(["check", "--config", "no/such/file.toml"])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.contains("no/such/file.toml") && stderr.contains("cannot read"),
        "{stderr}"
    );
}

#[test]
fn the_summary_lists_each_instrument_line_and_the_thermometer_units() {
    // The shipped HIL stage: its ports come from the port map beside it.
    let dir = workspace().join("config/examples/hil");
    let out = command("stiltd", &dir)
        .args(["check", "--config", "stage.toml"])
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(out.status.success(), "{stdout}");
    assert!(stdout.contains("instruments (port map "), "{stdout}");
    assert!(
        stdout.contains(
            "thermometer  /dev/pts/102 (from the port map), 19200 baud 8E1, poll 2 Hz, timeout 150 ms, 1 retry"
        ),
        "{stdout}"
    );
    assert!(
        stdout.contains("tiltmeter    /dev/pts/101 (from the port map), 115200 baud 8N1, poll 10 Hz, timeout 80 ms, 0 retries"),
        "{stdout}"
    );
    assert!(
        stdout.contains("unit 1 (default): A ch 0, B ch 1, C ch 2"),
        "{stdout}"
    );

    // A two-unit bus with its own port and an odd-parity line, in a scratch folder.
    let scratch = stilt_tests::scratch("check-bus");
    let text = std::fs::read_to_string(workspace().join("config/examples/hardware-template.toml"))
        .unwrap()
        .replacen(
            "thermometer_channel = 2\n",
            "thermometer_channel = 0\nthermometer_unit = 7\n",
            1,
        )
        .replace(
            "unit = 1                          # Modbus",
            "units = [1, 7]\nparity = \"odd\"\nunit = 1                          # Modbus",
        );
    std::fs::write(scratch.join("bus.toml"), &text).unwrap();
    let out = command("stiltd", &scratch)
        .args(["check", "--config", "bus.toml"])
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{stdout}{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(
        stdout.contains("thermometer  /dev/serial/by-id/usb-thermometer-if00, 19200 baud 8O1"),
        "{stdout}"
    );
    assert!(stdout.contains("2 unit(s):"), "{stdout}");
    assert!(
        stdout.contains("unit 1 (default): A ch 0, B ch 1\n"),
        "{stdout}"
    );
    assert!(stdout.contains("unit 7: C ch 0\n"), "{stdout}");
    assert!(!stdout.contains("from the port map"), "{stdout}");
}
