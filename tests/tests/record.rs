//! Recording through the real binary: `stiltd demo` writes HDF5 segments that the
//! standard HDF5 tools read (h5dump as the outside reference), `stiltd export` streams
//! them to CSV, and a daemon killed with SIGKILL leaves a readable segment while the
//! next start writes a fresh one.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Duration;

use stilt_tests::{command, scratch, workspace};

fn h5_files(dir: &Path) -> Vec<PathBuf> {
    let mut v: Vec<PathBuf> = std::fs::read_dir(dir)
        .map(|d| {
            d.filter_map(|e| e.ok().map(|e| e.path()))
                .filter(|p| p.extension().is_some_and(|x| x == "h5"))
                .collect()
        })
        .unwrap_or_default();
    v.sort();
    v
}

fn export(dir: &Path, args: &[&str]) -> String {
    let out = command("stiltd", dir)
        .arg("export")
        .args(args)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "export {args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).unwrap()
}

#[test]
fn demo_records_segments_that_h5dump_and_export_read() {
    let dir = scratch("record-demo");
    let out = command("stiltd", &dir)
        .args([
            "demo",
            "--duration",
            "2h",
            "--settle",
            "1h",
            "--json",
            "--out",
            "rec",
        ])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let s: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(s["recorded"]["control_rows"], 7200);
    assert_eq!(s["recorded"]["tilt_rows"], 72_000);
    assert_eq!(s["recorded"]["dropped_rows"], 0);
    let files = h5_files(&dir.join("rec"));
    assert_eq!(files.len(), 1, "{files:?}");

    // Outside reference: h5dump sees the datasets with their sizes and filters.
    let dump = Command::new("h5dump")
        .args(["-H", "-p"])
        .arg(&files[0])
        .output()
        .expect("h5dump (apt-get install hdf5-tools)");
    assert!(
        dump.status.success(),
        "{}",
        String::from_utf8_lossy(&dump.stderr)
    );
    let h = String::from_utf8_lossy(&dump.stdout);
    assert!(
        h.contains("DATASET \"tilt\"")
            && h.contains("DATASET \"control\"")
            && h.contains("DATASET \"events\"")
    );
    assert!(h.contains("( 72000 ) / ( H5S_UNLIMITED )"), "tilt extent");
    assert!(h.contains("( 7200 ) / ( H5S_UNLIMITED )"), "control extent");
    assert!(h.contains("SHUFFLE") && h.contains("DEFLATE"));

    // The project's reader, through `stiltd export`.
    let csv = export(&dir, &["rec", "--stream", "control"]);
    let lines: Vec<&str> = csv.lines().collect();
    assert_eq!(lines.len(), 7201, "header + one line per tick");
    let tilt = export(&dir, &["rec", "--stream", "tilt"]);
    assert_eq!(tilt.lines().count(), 72_001);
    let ev = export(&dir, &["rec", "--stream", "events"]);
    assert!(ev.contains("run_start") && ev.contains("run_end"), "{ev}");
    // A time window selects a subset.
    let first = lines[1].split(',').next().unwrap().to_string();
    let from_h = &first[..13]; // YYYY-MM-DDTHH
    let windowed = export(
        &dir,
        &[
            "rec",
            "--stream",
            "control",
            "--from",
            &format!("{from_h}:59:59Z"),
        ],
    );
    assert!(windowed.lines().count() < 7201);

    // Bad input to export is refused with what is allowed.
    let bad = command("stiltd", &dir)
        .args(["export", "rec", "--stream", "samples"])
        .output()
        .unwrap();
    assert_eq!(bad.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&bad.stderr).contains("tilt, control or events"));
    let bad = command("stiltd", &dir)
        .args(["export", "no-such-run"])
        .output()
        .unwrap();
    assert_eq!(bad.status.code(), Some(2));
}

#[test]
fn sigkill_mid_run_leaves_every_flushed_row_readable_and_the_next_run_starts_fresh() {
    let dir = scratch("record-sigkill");
    // The demo scenario with a fast flush, so a kill after two seconds has flushed data.
    let scen = std::fs::read_to_string(workspace().join("config/examples/demo.toml"))
        .unwrap()
        .replace("flush_interval_s = 5.0", "flush_interval_s = 0.3");
    std::fs::write(dir.join("fast-flush.toml"), scen).unwrap();
    let mut child = command("stiltd", &dir)
        .args([
            "demo",
            "--config",
            "fast-flush.toml",
            "--speed",
            "600",
            "--duration",
            "6h",
            "--out",
            "rec",
        ])
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::null())
        .spawn()
        .unwrap();
    std::thread::sleep(Duration::from_secs(3));
    child.kill().unwrap(); // SIGKILL
    let _ = child.wait();
    let files = h5_files(&dir.join("rec"));
    assert_eq!(files.len(), 1);
    let killed = files[0].clone();
    let before = std::fs::read(&killed).unwrap();

    // h5dump refuses the crashed file (its SWMR status flags are still set) …
    let dump = Command::new("h5dump")
        .arg("-H")
        .arg(&killed)
        .output()
        .unwrap();
    assert!(
        !dump.status.success(),
        "h5dump opened a file that was never closed"
    );
    // … while our reader (SWMR) reads every flushed row: ticks 0, 1, 2 … without a gap.
    let csv = export(&dir, &["rec", "--stream", "control"]);
    let n = csv.lines().count() - 1;
    assert!(
        n >= 600,
        "3 s at 600× with 0.3 s flushes must have flushed ≥ 600 ticks, got {n}"
    );
    let header: Vec<&str> = csv.lines().next().unwrap().split(',').collect();
    let tick_col = header
        .iter()
        .position(|h| *h == "tick")
        .expect("tick column");
    for (i, line) in csv.lines().skip(1).enumerate() {
        let tick: u64 = line.split(',').nth(tick_col).unwrap().parse().unwrap();
        assert_eq!(
            tick, i as u64,
            "rows must be contiguous up to the last flush"
        );
    }
    // HDF5's prescribed recovery for other tools: h5clear -s on a copy, then h5dump works.
    let copy = dir.join("copy.h5");
    std::fs::copy(&killed, &copy).unwrap();
    assert!(
        Command::new("h5clear")
            .arg("-s")
            .arg(&copy)
            .status()
            .unwrap()
            .success()
    );
    assert!(
        Command::new("h5dump")
            .arg("-H")
            .arg(&copy)
            .output()
            .unwrap()
            .status
            .success()
    );

    // The next start writes a fresh segment and leaves the killed one byte for byte.
    let out = command("stiltd", &dir)
        .args([
            "demo",
            "--duration",
            "30m",
            "--settle",
            "10m",
            "--out",
            "rec",
        ])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let files = h5_files(&dir.join("rec"));
    assert_eq!(files.len(), 2, "{files:?}");
    assert_eq!(std::fs::read(&killed).unwrap(), before);
}
