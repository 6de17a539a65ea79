//! Benchmark of `stiltd report` over long recordings: run time and peak memory for 1 and
//! 3 days of 10 Hz tilt (3 days ≈ 2.6 million tilt rows), to show that memory does not
//! grow with the length of the run.
//!
//! Setup (once, cached in the target folder): the demo scenario (invented) runs in virtual
//! time through `SimLoop` into the HDF5 recorder. Then `stiltd report` (the real binary,
//! with `--json` and `--plots`) runs as a child process per recording; its wall time and
//! its peak resident set (`ru_maxrss` from `wait4`, the child's own) are printed. Last,
//! divan times the in-process report over the 1-day recording.
//!
//! Run: `cargo bench -p stilt-daemon --bench report` (STILT_BENCH_DAYS=1,3 by default).
#![allow(unsafe_code)] // wait4(2): the only way to get one child's own rusage.

use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use stilt_config::Config;
use stilt_daemon::pipeline::Pipeline;
use stilt_daemon::record::{Recorder, RecorderOptions, SegmentSet};
use stilt_daemon::report::{self, ReportOptions};
use stilt_daemon::sim::SimLoop;
use stilt_hil_sim::SimStage;

/// 2024-03-01T00:00:00Z.
const T0_UTC_NS: i64 = 1_709_251_200_000_000_000;

fn config() -> Config {
    stilt_config::load_str(stilt_config::DEMO_SCENARIO, "demo.toml").expect("demo config")
}

fn bench_root() -> PathBuf {
    // benches run with the package folder as working directory; keep data in the target dir.
    let exe = PathBuf::from(env!("CARGO_BIN_EXE_stiltd"));
    exe.parent()
        .and_then(Path::parent)
        .unwrap_or(Path::new("."))
        .join("bench-report-data")
}

/// The recording of `days` days, generated once.
fn recording(days: f64) -> PathBuf {
    let dir = bench_root().join(format!("{days}d"));
    let done = dir.join("complete");
    if done.exists() {
        return dir;
    }
    let _ = std::fs::remove_dir_all(&dir);
    let cfg = config();
    let mut o = RecorderOptions::from_config(&cfg);
    o.dir = dir.clone();
    o.run_id = Some(format!("bench{days}d"));
    o.start_utc_ns = Some(T0_UTC_NS);
    o.blocking = true;
    o.fsync = false;
    o.flush_interval = Duration::from_secs(5);
    let started = Instant::now();
    let (sink, _h) = Recorder::start(&cfg, o).expect("recorder");
    let stage = SimStage::new(&cfg);
    let mut sim = SimLoop::new(stage, Pipeline::new(cfg, Box::new(sink), T0_UTC_NS));
    sim.advance_to(days * 86_400.0, &mut |_| {});
    let t = sim.time_s();
    let (rep, _) = sim.into_pipeline().finish(t, "bench").expect("finish");
    eprintln!(
        "generated {days} d: {} tilt rows, {} control rows, {} segment(s) in {:.1} s",
        rep.tilt_rows,
        rep.control_rows,
        rep.files.len(),
        started.elapsed().as_secs_f64()
    );
    std::fs::write(&done, format!("{}\n", rep.tilt_rows)).expect("marker");
    dir
}

/// Runs `stiltd report` on `dir`; returns (wall s, peak RSS KiB of the child).
fn run_report(dir: &Path) -> (f64, i64) {
    let out = bench_root().join("out");
    std::fs::create_dir_all(&out).expect("output folder");
    #[allow(clippy::zombie_processes)] // reaped by wait4 below
    let child = std::process::Command::new(env!("CARGO_BIN_EXE_stiltd"))
        .arg("report")
        .arg(dir)
        .arg("--json")
        .arg(out.join("report.json"))
        .arg("--plots")
        .arg(out.join("plots"))
        .stdout(std::process::Stdio::null())
        .spawn()
        .expect("spawn stiltd report");
    let t = Instant::now();
    let pid = child.id() as libc::pid_t;
    let mut status = 0;
    // SAFETY: an all-zero rusage is a valid value of this plain C struct.
    let mut ru: libc::rusage = unsafe { std::mem::zeroed() };
    // SAFETY: wait4 on our own child's pid with valid out-pointers; `child` is not waited on
    // elsewhere (dropping a std Child does not wait).
    let r = unsafe { libc::wait4(pid, &mut status, 0, &mut ru) };
    let wall = t.elapsed().as_secs_f64();
    assert_eq!(r, pid, "wait4 failed");
    assert!(
        libc::WIFEXITED(status) && libc::WEXITSTATUS(status) == 0,
        "stiltd report failed: {status}"
    );
    (wall, ru.ru_maxrss)
}

fn main() {
    let days: Vec<f64> = std::env::var("STILT_BENCH_DAYS")
        .unwrap_or_else(|_| "1,3".into())
        .split(',')
        .filter_map(|s| s.trim().parse().ok())
        .collect();
    println!(
        "stiltd report over 10 Hz recordings of the demo scenario (child process, with --json and --plots):"
    );
    println!(
        "{:>6} {:>12} {:>10} {:>14}",
        "days", "tilt rows", "wall s", "peak RSS MiB"
    );
    for &d in &days {
        let dir = recording(d);
        let rows: u64 = SegmentSet::open_dir(&dir)
            .expect("open")
            .segments()
            .iter()
            .map(|s| s.rows_at_last_update.0)
            .sum();
        let (wall, rss_kib) = run_report(&dir);
        println!(
            "{d:>6} {rows:>12} {wall:>10.2} {:>14.1}",
            rss_kib as f64 / 1024.0
        );
    }
    divan::main();
}

/// In-process report over the 1-day recording (no plots).
#[divan::bench(sample_count = 3, sample_size = 1)]
fn report_one_day(b: divan::Bencher) {
    let dir = recording(1.0);
    let set = SegmentSet::open_dir(&dir).expect("open");
    b.bench(|| report::compute(&set, &ReportOptions::default(), &mut |_, _| {}).expect("report"));
}
