//! Helpers for stilt's system tests, which run the real binaries as a user would.
//!
//! [`bin`] finds a workspace binary next to the test executable (cargo builds every
//! binary of the workspace before running `cargo test --workspace`), building it once
//! if it is missing; [`workspace`] gives paths inside the repository; [`json_lines`],
//! [`channel`] and [`count`] read the JSON lines `stiltd run --status-json` prints.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::Once;

use serde_json::Value;

/// The repository root.
pub fn workspace() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .map(Path::to_path_buf)
        .unwrap_or_default()
}

static BUILD: Once = Once::new();

/// Path of a workspace binary (`stiltd`, `stilt-hil-sim`, …), built if needed.
pub fn bin(name: &str) -> PathBuf {
    let exe = std::env::current_exe().expect("test executable path");
    // target/<profile>/deps/<test> → target/<profile>/<name>
    let dir = exe
        .parent()
        .and_then(Path::parent)
        .expect("target dir")
        .to_path_buf();
    let path = dir.join(name);
    if !path.exists() {
        BUILD.call_once(|| {
            let release = dir.ends_with("release");
            let mut c = Command::new(env!("CARGO"));
            c.current_dir(workspace()).args([
                "build",
                "-p",
                "stilt-daemon",
                "-p",
                "stilt-hil-sim",
                "--bins",
            ]);
            if release {
                c.arg("--release");
            }
            let ok = c.status().map(|s| s.success()).unwrap_or(false);
            assert!(ok, "building the stilt binaries failed");
        });
    }
    path
}

/// A command for a workspace binary, run from `dir`.
pub fn command(name: &str, dir: &Path) -> Command {
    let mut c = Command::new(bin(name));
    c.current_dir(dir);
    c
}

/// A fresh scratch directory under the target dir (removed and recreated).
pub fn scratch(name: &str) -> PathBuf {
    let d = workspace().join("target").join("scratch").join(name);
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).expect("scratch dir");
    d
}

/// Every line of `stdout` parsed as JSON (a line that is not JSON fails the test, naming it).
pub fn json_lines(stdout: &[u8]) -> Vec<Value> {
    String::from_utf8_lossy(stdout)
        .lines()
        .map(|l| serde_json::from_str(l).unwrap_or_else(|e| panic!("{e}: {l}")))
        .collect()
}

/// The channel called `name` in a status or summary's `channels` list.
pub fn channel<'a>(v: &'a Value, name: &str) -> &'a Value {
    v["channels"]
        .as_array()
        .and_then(|a| a.iter().find(|c| c["name"] == name))
        .unwrap_or_else(|| panic!("no channel {name} in {v}"))
}

/// Counter `key` (`requests`, `timeouts`, …) of channel `name`.
pub fn count(v: &Value, name: &str, key: &str) -> u64 {
    channel(v, name)[key]
        .as_u64()
        .unwrap_or_else(|| panic!("no counter {key} for {name} in {v}"))
}
