//! Shared helpers of the recording tests and benchmark: invented rows (demo data, not
//! measurements), temporary folders, and a lock that serialises HDF5 file access.
#![allow(dead_code, unreachable_pub)]

use std::path::PathBuf;
use std::sync::{Mutex, MutexGuard};

use stilt_config::{Config, Mode};
use stilt_daemon::rows::{
    ControlRow, EventKind, EventRow, LegRow, LoopTerms, Quality, Stamp, TiltSample,
};

/// 2024-03-01T00:00:00Z, the invented start of every test run.
pub const T0_UTC_NS: i64 = 1_709_251_200_000_000_000;

/// The built-in demo configuration (three legs).
pub fn config() -> Config {
    stilt_config::load_str(stilt_config::DEMO_SCENARIO, "demo.toml").expect("demo config")
}

/// A small deterministic noise source (SplitMix64 finaliser), in [-0.5, 0.5).
pub fn noise(i: u64, salt: u64) -> f64 {
    let mut z = i.wrapping_mul(0x9e37_79b9_7f4a_7c15) ^ salt.wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^= z >> 31;
    (z >> 11) as f64 / (1u64 << 53) as f64 - 0.5
}

fn stamp(t_mono_s: f64) -> Stamp {
    Stamp {
        t_mono_s,
        t_utc_ns: T0_UTC_NS + (t_mono_s * 1e9).round() as i64,
    }
}

/// Invented tilt reading `i` at 10 Hz.
pub fn tilt(i: u64) -> TiltSample {
    let t = i as f64 * 0.1;
    let raw = [
        0.25 * (t * 0.01).sin() + 0.001 * noise(i, 1),
        -0.1 + 0.05 * (t * 0.003).cos() + 0.001 * noise(i, 2),
    ];
    TiltSample {
        stamp: stamp(t),
        raw,
        tilt_urad: [raw[0] * 40.0, raw[1] * 40.0],
        quality: if i % 997 == 3 {
            Quality::Stale
        } else {
            Quality::Ok
        },
    }
}

/// Invented control row `i` at 1 Hz with `legs` legs.
pub fn control(i: u64, legs: usize) -> ControlRow {
    let t = i as f64;
    let terms = |k: f64| LoopTerms {
        p: 0.1 * k,
        i: 0.01 * k * t,
        d: -0.001 * k,
        out: 0.2 * k + noise(i, 7),
    };
    ControlRow {
        tick: i,
        stamp: stamp(t),
        mode: Mode::ALL[(i / 50 % 4) as usize],
        tilt_raw: [0.1 + noise(i, 3), noise(i, 4)],
        tilt_urad: [4.0 + noise(i, 5), noise(i, 6)],
        tilt_quality: if i % 13 == 0 {
            Quality::Timeout
        } else {
            Quality::Ok
        },
        tilt_count: 10,
        tilt_setpoint_urad: [1.5, -0.5],
        tilt_target_urad: [2.0, -0.5],
        axis_terms: [terms(1.0), terms(-2.0)],
        legs: (0..legs)
            .map(|j| LegRow {
                temp_c: 25.0 + j as f64 + noise(i, 10 + j as u64),
                temp_quality: if (i + j as u64) % 17 == 0 {
                    Quality::BadFrame
                } else {
                    Quality::Ok
                },
                setpoint_c: 25.5 + j as f64,
                power_w: 2.0 + noise(i, 20 + j as u64),
                drive_v: 5.0 + noise(i, 30 + j as u64),
                terms: terms(j as f64 + 0.5),
            })
            .collect(),
    }
}

/// Invented event `i`, with non-ASCII text and, every fifth, a detail too long to keep.
pub fn event(i: u64) -> EventRow {
    let kind = EventKind::ALL[(i % EventKind::ALL.len() as u64) as usize];
    let detail = if i % 5 == 4 {
        format!("{i}: {}", "long text → ".repeat(40))
    } else {
        format!("setpoint_x_urad: {i} → {}", i + 1)
    };
    EventRow {
        stamp: stamp(i as f64 * 3.0 + 0.05),
        kind,
        source: format!("api:tester{i}"),
        detail,
    }
}

/// A fresh, empty folder for one test (removed first if a previous run left it).
pub fn tmp_dir(name: &str) -> PathBuf {
    let base = option_env!("CARGO_TARGET_TMPDIR").map_or_else(std::env::temp_dir, PathBuf::from);
    let d = base.join(format!("stilt-record-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).expect("create test folder");
    d
}

static HDF5_FILES: Mutex<()> = Mutex::new(());

/// Serialises tests of one binary that open HDF5 files (file locks are per process).
pub fn serial() -> MutexGuard<'static, ()> {
    HDF5_FILES.lock().unwrap_or_else(|p| p.into_inner())
}

/// Whether `python3` can import h5py. Under `CI=true` a missing h5py fails the test;
/// elsewhere the caller skips the h5py part with a printed note.
pub fn have_h5py() -> bool {
    let ok = std::process::Command::new("python3")
        .args(["-c", "import h5py"])
        .output()
        .map(|o| o.status.success())
        .unwrap_or(false);
    if !ok {
        assert!(
            std::env::var("CI").as_deref() != Ok("true"),
            "CI=true but python3 cannot import h5py: install it (pip install h5py)"
        );
        println!("SKIPPED the h5py part: python3 with h5py not found (pip install h5py)");
    }
    ok
}

/// Re-runs this test binary as a child process running only `test_name`, with `env`
/// set (the test sees the variable and plays the child's part). Its stdout lines come
/// through the returned receiver; stdin is piped (closing it tells the child to stop).
pub fn spawn_child(
    test_name: &str,
    env: &[(&str, &str)],
) -> (std::process::Child, std::sync::mpsc::Receiver<String>) {
    use std::io::BufRead;
    use std::process::{Command, Stdio};
    let exe = std::env::current_exe().expect("current_exe");
    let mut child = Command::new(exe)
        .args([test_name, "--exact", "--nocapture", "--test-threads=1"])
        .envs(env.iter().copied())
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::inherit())
        .spawn()
        .expect("spawn child");
    let out = child.stdout.take().expect("stdout");
    let (tx, rx) = std::sync::mpsc::channel();
    std::thread::spawn(move || {
        for line in std::io::BufReader::new(out).lines() {
            let Ok(line) = line else { break };
            if tx.send(line).is_err() {
                break;
            }
        }
    });
    (child, rx)
}

/// Waits up to `secs` for a child line starting with `prefix`; returns the rest.
pub fn expect_line(rx: &std::sync::mpsc::Receiver<String>, prefix: &str, secs: u64) -> String {
    let deadline = std::time::Instant::now() + std::time::Duration::from_secs(secs);
    loop {
        let left = deadline.saturating_duration_since(std::time::Instant::now());
        match rx.recv_timeout(left) {
            Ok(l) if l.starts_with(prefix) => return l[prefix.len()..].trim().to_owned(),
            Ok(_) => {}
            Err(e) => {
                panic!("no line starting with {prefix:?} from the child within {secs} s: {e}")
            }
        }
    }
}

/// Parses `"a b c"` into three numbers.
pub fn three(s: &str) -> (u64, u64, u64) {
    let v: Vec<u64> = s
        .split_whitespace()
        .take(3)
        .map(|x| x.parse().expect("number"))
        .collect();
    (v[0], v[1], v[2])
}

/// Feeds invented rows paced at about `tilt_per_s` tilt rows per second of wall time
/// (a control row per 10 tilt rows, an event per 30), while `keep_going(pushed)` holds;
/// calls `each` about every 10 ms. Returns (tilt, control, events) pushed.
pub fn paced_feed(
    sink: &mut dyn stilt_daemon::rows::RowSink,
    legs: usize,
    tilt_per_s: u64,
    mut keep_going: impl FnMut((u64, u64, u64)) -> bool,
) -> (u64, u64, u64) {
    let start = std::time::Instant::now();
    let (mut t, mut c, mut e) = (0u64, 0u64, 0u64);
    while keep_going((t, c, e)) {
        let due = (start.elapsed().as_secs_f64() * tilt_per_s as f64) as u64;
        while t < due {
            sink.tilt(&tilt(t));
            t += 1;
            if t % 10 == 0 {
                sink.control(&control(c, legs));
                c += 1;
            }
            if t % 30 == 0 {
                sink.event(&event(e));
                e += 1;
            }
        }
        std::thread::sleep(std::time::Duration::from_millis(10));
    }
    (t, c, e)
}

/// Asserts that `rows` are exactly the invented tilt rows `0..rows.len()`, naming the
/// first difference (instead of printing thousands of rows).
pub fn assert_tilt_prefix(rows: &[TiltSample], what: &str) {
    for (i, r) in rows.iter().enumerate() {
        let want = tilt(i as u64);
        assert!(
            *r == want,
            "{what}: row {i} of {} differs: got {r:?}, want {want:?}",
            rows.len()
        );
    }
}

/// Ignores SIGXFSZ and sets the soft file-size limit (the hard limit stays).
#[allow(unsafe_code)]
pub fn set_file_size_limit(bytes: Option<u64>) {
    // SAFETY: plain libc calls on this process with valid arguments; `signal` installs
    // SIG_IGN (no handler code runs), and `lim` is a valid, initialised rlimit.
    unsafe {
        libc::signal(libc::SIGXFSZ, libc::SIG_IGN);
        let mut lim = libc::rlimit {
            rlim_cur: 0,
            rlim_max: 0,
        };
        assert_eq!(libc::getrlimit(libc::RLIMIT_FSIZE, &mut lim), 0);
        lim.rlim_cur = bytes.map_or(lim.rlim_max, |b| b as libc::rlim_t);
        assert_eq!(libc::setrlimit(libc::RLIMIT_FSIZE, &lim), 0);
    }
}
