//! Speed of the whole pipeline in virtual time (issue 2's target: 36 simulated hours at
//! 10 Hz sampling and 1 Hz control at ≥ 50,000× real time).
//!
//! `cargo bench -p stilt-daemon --bench pipeline`. The figure for BENCHMARKS.md is
//! 129 600 s ÷ the median time of `closed_loop_36h`.

use stilt_daemon::pipeline::Pipeline;
use stilt_daemon::rows::CountingSink;
use stilt_daemon::sim::SimLoop;

fn main() {
    divan::main();
}

fn demo() -> stilt_config::Config {
    stilt_config::load_str(stilt_config::DEMO_SCENARIO, "demo").expect("demo scenario")
}

/// 36 simulated hours, closed loop, rows counted (no disk).
#[divan::bench(sample_count = 7, sample_size = 1)]
fn closed_loop_36h() -> u64 {
    let cfg = demo();
    let stage = stilt_hil_sim::SimStage::new(&cfg);
    let mut sim = SimLoop::new(
        stage,
        Pipeline::new(cfg, Box::new(CountingSink::default()), 0),
    );
    let mut ticks = 0u64;
    sim.advance_to(36.0 * 3600.0, &mut |_| ticks += 1);
    divan::black_box(ticks)
}

/// One simulated hour of the stage alone (physics and instruments, no controller).
#[divan::bench(sample_count = 7, sample_size = 1)]
fn stage_only_1h() -> f64 {
    let cfg = demo();
    let mut stage = stilt_hil_sim::SimStage::new(&cfg);
    let mut acc = 0.0;
    for _ in 0..36_000 {
        stage.advance(0.1);
        acc += stage.read_tilt().raw[0];
    }
    divan::black_box(acc)
}

/// 36 simulated hours, closed loop, every row recorded to compressed HDF5 segments
/// (blocking sink as in `stiltd demo --speed max`: nothing dropped).
#[divan::bench(sample_count = 5, sample_size = 1)]
fn closed_loop_36h_recorded(b: divan::Bencher) {
    let dir = std::env::temp_dir().join(format!("stilt-bench-rec-{}", std::process::id()));
    b.bench_local(|| {
        let _ = std::fs::remove_dir_all(&dir);
        let cfg = demo();
        let mut ro = stilt_daemon::record::RecorderOptions::from_config(&cfg);
        ro.dir = dir.clone();
        ro.blocking = true;
        ro.batch_rows = 4096;
        let (sink, _h) = stilt_daemon::record::Recorder::start(&cfg, ro).expect("recorder");
        let stage = stilt_hil_sim::SimStage::new(&cfg);
        let mut sim = SimLoop::new(stage, Pipeline::new(cfg, Box::new(sink), 0));
        sim.advance_to(36.0 * 3600.0, &mut |_| {});
        let t = sim.time_s();
        let (report, _) = sim.into_pipeline().finish(t, "bench").expect("finish");
        divan::black_box(report.tilt_rows)
    });
    let _ = std::fs::remove_dir_all(&dir);
}
