//! `stiltd report` on a segment recorded with the recorder from injected signals of
//! known properties (invented test data): the figures are checked against theory and
//! against direct in-memory computation with the analysis module; the command line
//! writes JSON and non-trivial PNG and SVG plots.

use std::path::{Path, PathBuf};
use std::time::Duration;

use rand_chacha::ChaCha8Rng;
use rand_chacha::rand_core::{Rng, SeedableRng};
use stilt_config::{Config, Mode};
use stilt_daemon::analysis::allan::{modified_adev, overlapping_adev};
use stilt_daemon::record::{Recorder, RecorderOptions, SegmentSet, TimeWindow};
use stilt_daemon::report::{self, ReportOptions};
use stilt_daemon::rows::{
    ControlRow, EventKind, EventRow, LegRow, LoopTerms, Quality, RowSink, Stamp, TiltSample,
};

/// 2024-03-01T00:00:00Z.
const T0_UTC_NS: i64 = 1_709_251_200_000_000_000;
const FS_HZ: f64 = 10.0;
/// Two hours of 10 Hz tilt.
const N_TILT: u64 = 72_000;
/// Sine on x: amplitude and frequency (bin-centred for the 16384-sample segments used:
/// 82 · 10/16384 Hz).
const SINE_URAD: f64 = 0.5;
const F0_HZ: f64 = 82.0 * FS_HZ / 16_384.0;
/// White noise on both axes, µrad.
const SIGMA_URAD: f64 = 0.02;
/// Injected tilt–temperature coupling in the control rows, µrad/K.
const COUPLING_URAD_PER_K: f64 = 18.0;

struct Gauss(ChaCha8Rng);
impl Gauss {
    fn u(&mut self) -> f64 {
        ((self.0.next_u64() >> 11) as f64 + 1.0) / (1u64 << 53) as f64
    }
    /// Box–Muller (one of the pair).
    fn g(&mut self) -> f64 {
        let (a, b) = (self.u(), self.u());
        (-2.0 * a.ln()).sqrt() * (std::f64::consts::TAU * b).cos()
    }
}

fn config() -> Config {
    stilt_config::load_str(stilt_config::DEMO_SCENARIO, "demo.toml").expect("demo config")
}

fn stamp(t: f64) -> Stamp {
    Stamp {
        t_mono_s: t,
        t_utc_ns: T0_UTC_NS + (t * 1e9).round() as i64,
    }
}

fn tmp_dir(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("stilt-report-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).expect("temp dir");
    d
}

/// The injected series, also kept in memory for the direct computations.
struct Injected {
    x_urad: Vec<f64>,
    y_urad: Vec<f64>,
}

/// Ticks skipped (not written) to make a 4 s interval: 3 missed ticks.
const SKIPPED: std::ops::Range<u64> = 1000..1003;

fn write_run(dir: &Path) -> Injected {
    let cfg = config();
    let mut o = RecorderOptions::from_config(&cfg);
    o.dir = dir.to_path_buf();
    o.start_utc_ns = Some(T0_UTC_NS);
    o.blocking = true;
    o.flush_interval = Duration::from_millis(200);
    let (mut sink, _h) = Recorder::start(&cfg, o).expect("start recorder");
    let mut g = Gauss(ChaCha8Rng::seed_from_u64(20_240_301));
    let mut inj = Injected {
        x_urad: Vec::new(),
        y_urad: Vec::new(),
    };
    let ev = |t: f64, kind: EventKind, detail: &str| EventRow {
        stamp: stamp(t),
        kind,
        source: "test".into(),
        detail: detail.into(),
    };
    sink.event(&ev(0.0, EventKind::RunStart, "invented test run"));
    for i in 0..N_TILT {
        let t = i as f64 / FS_HZ;
        let x = SINE_URAD * (std::f64::consts::TAU * F0_HZ * t).sin() + SIGMA_URAD * g.g();
        let y = SIGMA_URAD * g.g();
        inj.x_urad.push(x);
        inj.y_urad.push(y);
        sink.tilt(&TiltSample {
            stamp: stamp(t),
            raw: [x, y],
            tilt_urad: [x, y],
            quality: Quality::Ok,
        });
        if i % 10 == 9 {
            let tick = i / 10;
            if SKIPPED.contains(&tick) {
                continue;
            }
            let ts = t;
            // Leg temperatures: a slow common swing and a per-leg offset; tilt x follows
            // the mean with the injected coupling, plus noise.
            let common = 0.1 * (std::f64::consts::TAU * ts / 3600.0).sin();
            let temps = [24.0 + common, 24.2 + common, 23.9 + 1.2 * common];
            let mean = temps.iter().sum::<f64>() / 3.0;
            let tilt_x = COUPLING_URAD_PER_K * (mean - 24.0) + 0.05 * g.g();
            // Duty: A at 0 W on 10 % of the ticks, B at its 2 W maximum on 25 %, C at 1 W.
            let power = [
                if tick % 10 == 0 { 0.0 } else { 0.8 },
                if tick % 4 == 0 { 2.0 } else { 1.1 },
                1.0,
            ];
            let legs = (0..3)
                .map(|k| LegRow {
                    temp_c: temps[k],
                    temp_quality: Quality::Ok,
                    setpoint_c: 24.0,
                    power_w: power[k],
                    drive_v: (power[k] * 50.0_f64).sqrt(),
                    terms: LoopTerms::default(),
                })
                .collect();
            sink.control(&ControlRow {
                tick,
                stamp: stamp(ts),
                mode: Mode::Level,
                tilt_raw: [tilt_x, 0.0],
                tilt_urad: [tilt_x, 0.0],
                tilt_quality: Quality::Ok,
                tilt_count: 10,
                tilt_setpoint_urad: [0.0; 2],
                tilt_target_urad: [0.0; 2],
                axis_terms: [LoopTerms::default(); 2],
                legs,
            });
            if tick % 1800 == 5 {
                sink.event(&ev(ts, EventKind::Alarm, "invented alarm"));
            }
            if tick == 3000 {
                sink.event(&ev(ts, EventKind::Fault, "invented fault"));
            }
        }
    }
    sink.event(&ev(N_TILT as f64 / FS_HZ, EventKind::RunEnd, "done"));
    let rep = sink.finish().expect("finish");
    assert_eq!(rep.dropped_rows, 0);
    inj
}

/// HDF5 tests in one process run one at a time (the library is process-global).
fn serial() -> std::sync::MutexGuard<'static, ()> {
    static LOCK: std::sync::Mutex<()> = std::sync::Mutex::new(());
    LOCK.lock().unwrap_or_else(|e| e.into_inner())
}

fn rel(a: f64, b: f64) -> f64 {
    (a - b).abs() / b.abs()
}

#[test]
fn report_figures_match_injected_signals_and_direct_computation() {
    let _g = serial();
    let dir = tmp_dir("signals");
    let inj = write_run(&dir);
    let set = SegmentSet::open_dir(&dir).expect("open");
    let r = report::compute(&set, &ReportOptions::default(), &mut |_, _| {}).expect("report");

    assert_eq!(r.tilt_rows, N_TILT);
    assert_eq!(r.tilt_rows_unusable, 0);
    assert_eq!(r.tilt_gaps, 0);
    assert!((r.tilt_rate_hz.unwrap() - FS_HZ).abs() < 1e-6);

    // RMS of a sine of amplitude A plus white noise σ: √(A²/2 + σ²) (definition of RMS).
    let x = r.axes[0].tilt_urad.expect("x stats");
    let want_rms = (SINE_URAD * SINE_URAD / 2.0 + SIGMA_URAD * SIGMA_URAD).sqrt();
    assert!(rel(x.rms, want_rms) < 0.005, "rms {} vs {want_rms}", x.rms);
    assert!(x.mean.abs() < 0.005, "mean {}", x.mean);
    assert!(
        x.peak_to_peak > 2.0 * SINE_URAD && x.peak_to_peak < 2.0 * SINE_URAD + 12.0 * SIGMA_URAD,
        "p2p {}",
        x.peak_to_peak
    );

    // ASD: segment 2^14 (a quarter of the run, rounded down to a power of two).
    let ax = r.axes[0].asd.as_ref().expect("x asd");
    assert_eq!(ax.segment_len, 16_384);
    assert_eq!(ax.unit, "rad/√Hz");
    let (peak_i, _) = ax
        .asd
        .iter()
        .enumerate()
        .max_by(|a, b| a.1.total_cmp(b.1))
        .unwrap();
    assert!(
        (ax.frequencies_hz[peak_i] - F0_HZ).abs() < 1e-12,
        "peak at {}",
        ax.frequencies_hz[peak_i]
    );
    // Parseval's theorem: the PSD integrated over the sine's lobe is its mean square A²/2
    // (in rad²: the report converts µrad to rad).
    let lobe: f64 = (peak_i - 4..=peak_i + 4)
        .map(|i| ax.asd[i] * ax.asd[i] * ax.resolution_hz)
        .sum();
    let want = (SINE_URAD * 1e-6).powi(2) / 2.0;
    assert!(rel(lobe, want) < 0.01, "lobe power {lobe:e} vs {want:e}");

    // White noise: one-sided PSD level 2σ²/fs (Welch's normalisation for a density; the
    // analytic level of white noise of variance σ² sampled at fs).
    let ay = r.axes[1].asd.as_ref().expect("y asd");
    let band: Vec<f64> = ay
        .frequencies_hz
        .iter()
        .zip(&ay.asd)
        .filter(|(f, _)| **f > 0.5 && **f < 4.5)
        .map(|(_, a)| a * a)
        .collect();
    let level = band.iter().sum::<f64>() / band.len() as f64;
    let want = 2.0 * (SIGMA_URAD * 1e-6).powi(2) / FS_HZ;
    assert!(rel(level, want) < 0.03, "white level {level:e} vs {want:e}");

    // Allan deviations: equal to the in-memory computation of the same rad series, and for
    // white frequency-like noise σ_y(τ) = σ/√m (NIST SP 1065, white FM: σ_y ∝ τ^-1/2).
    let y_rad: Vec<f64> = inj.y_urad.iter().map(|v| v * 1e-6).collect();
    for p in r.axes[1].allan.iter().filter(|p| p.stride == 1) {
        let m = (p.tau_s * FS_HZ).round() as u64;
        let direct = overlapping_adev(&y_rad, 0.1, m).expect("adev");
        assert!(
            rel(p.adev_rad, direct.value) < 1e-9,
            "m {m}: {} vs {}",
            p.adev_rad,
            direct.value
        );
        assert_eq!(p.adev_terms, direct.terms);
        if let Some(md) = p.mdev_rad {
            let direct = modified_adev(&y_rad, 0.1, m).expect("mdev");
            assert!(rel(md, direct.value) < 1e-9, "mdev m {m}");
        }
        if m <= 64 {
            let theory = SIGMA_URAD * 1e-6 / (m as f64).sqrt();
            assert!(
                rel(p.adev_rad, theory) < 0.1,
                "m {m}: {} vs white-FM {theory}",
                p.adev_rad
            );
        }
    }
    assert!(
        r.axes[1].allan.len() >= 14,
        "octaves up to 2^13·τ0 at least"
    );

    // Coupling: the injected 18 µrad/K within four standard errors.
    let c = r.coupling.on_mean_leg[0].as_ref().expect("coupling");
    assert!(
        (c.slope_urad_per_k - COUPLING_URAD_PER_K).abs() < 4.0 * c.std_err_urad_per_k + 1e-3,
        "{} ± {}",
        c.slope_urad_per_k,
        c.std_err_urad_per_k
    );
    assert!(c.std_err_urad_per_k > 0.0 && c.std_err_urad_per_k < 0.2);
    assert_eq!(r.coupling.ticks_used, N_TILT / 10 - 3);

    // Duty: counted exactly from the injected pattern (ticks 1000..1003 absent).
    let ticks: Vec<u64> = (0..N_TILT / 10).filter(|t| !SKIPPED.contains(t)).collect();
    let n = ticks.len() as f64;
    let zero_a = ticks.iter().filter(|t| *t % 10 == 0).count() as f64 / n;
    let max_b = ticks.iter().filter(|t| *t % 4 == 0).count() as f64 / n;
    assert!((r.heaters[0].fraction_at_zero - zero_a).abs() < 1e-12);
    assert_eq!(r.heaters[0].fraction_at_max, Some(0.0));
    assert!((r.heaters[1].fraction_at_max.unwrap() - max_b).abs() < 1e-12);
    assert_eq!(r.heaters[1].power_w.unwrap().max, 2.0);
    assert_eq!(r.heaters[2].power_w.unwrap().mean, 1.0);
    assert_eq!(r.heaters[1].max_allowed_w, Some(2.0));

    // Timing: one 4 s interval = 3 missed ticks.
    assert_eq!(r.timing.ticks, n as u64);
    assert_eq!(r.timing.missed_ticks, 3);
    assert_eq!(r.timing.late_intervals, 1);
    assert!((r.timing.interval_s.unwrap().max - 4.0).abs() < 1e-6);

    // Events by kind.
    assert_eq!(r.events.by_kind.get("alarm"), Some(&4));
    assert_eq!(r.events.by_kind.get("fault"), Some(&1));
    assert_eq!(r.events.notable.len(), 5);

    // A window selects rows: the second hour only.
    let w = ReportOptions {
        window: TimeWindow {
            from_utc_ns: Some(T0_UTC_NS + 3_600_000_000_000),
            to_utc_ns: None,
        },
        ..ReportOptions::default()
    };
    let r2 = report::compute(&set, &w, &mut |_, _| {}).expect("windowed report");
    assert_eq!(r2.tilt_rows, N_TILT / 2);
    // The Welch segment shrinks with the window (a quarter of its rows: 9000 → 8192).
    assert_eq!(r2.axes[0].asd.as_ref().expect("asd").segment_len, 8192);

    // The table names units.
    let t = report::render(&r);
    assert!(t.contains("rad/√Hz") && t.contains("µrad/K") && t.contains("missed tick"));

    // The command line: JSON and plots.
    let plots = dir.join("plots");
    let json = dir.join("report.json");
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_stiltd"))
        .arg("report")
        .arg(&dir)
        .arg("--json")
        .arg(&json)
        .arg("--plots")
        .arg(&plots)
        .output()
        .expect("run stiltd report");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let v: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&json).expect("json")).expect("parse");
    assert_eq!(v["tilt_rows"], N_TILT);
    assert_eq!(v["axes"][0]["asd"]["Ok"]["unit"], "rad/√Hz");
    for name in [
        "tilt_timeseries",
        "tilt_asd",
        "tilt_allan",
        "tilt_vs_temperature",
    ] {
        let png = std::fs::read(plots.join(format!("{name}.png"))).expect("png");
        assert_eq!(&png[..8], b"\x89PNG\r\n\x1a\n", "{name}.png signature");
        assert!(png.len() > 20_000, "{name}.png is only {} bytes", png.len());
        let svg = std::fs::read_to_string(plots.join(format!("{name}.svg"))).expect("svg");
        assert!(svg.contains("<svg") && svg.len() > 5_000, "{name}.svg");
        assert!(svg.contains("tilt"), "{name}.svg has labels");
    }
    // A window on the command line, as an offset from the first segment's start.
    let json2 = dir.join("second-hour.json");
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_stiltd"))
        .arg("report")
        .arg(&dir)
        .args(["--from", "+1h", "--json"])
        .arg(&json2)
        .output()
        .expect("run stiltd report --from");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let v2: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&json2).expect("json")).expect("parse");
    assert_eq!(v2["tilt_rows"], N_TILT / 2);
    assert_eq!(v2["window"][0], "2024-03-01T01:00:00.000000000Z");
    let asd_svg = std::fs::read_to_string(plots.join("tilt_asd.svg")).unwrap();
    assert!(asd_svg.contains("ASD (rad/√Hz)") && asd_svg.contains("frequency (Hz)"));
    let allan_svg = std::fs::read_to_string(plots.join("tilt_allan.svg")).unwrap();
    assert!(allan_svg.contains("modified ADEV") && allan_svg.contains("averaging time"));
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn bad_arguments_get_clear_errors() {
    let run = |args: &[&str]| {
        std::process::Command::new(env!("CARGO_BIN_EXE_stiltd"))
            .args(args)
            .output()
            .expect("run stiltd")
    };
    let o = run(&["report", "/nonexistent/stilt-run"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("no such file or folder"));
    let dir = tmp_dir("empty");
    let o = run(&["report", dir.to_str().unwrap()]);
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("no .h5 segments"));
    let junk = dir.join("junk.h5");
    std::fs::write(&junk, b"not hdf5 at all").unwrap();
    let o = run(&["report", junk.to_str().unwrap()]);
    assert_eq!(
        o.status.code(),
        Some(2),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(String::from_utf8_lossy(&o.stderr).contains("junk.h5"));
    let _ = std::fs::remove_dir_all(&dir);
}

/// A recording of the simulated stage (SimLoop → recorder): the ASD's white floor above
/// the loop's bandwidth is the simulated tiltmeter's noise density, which the simulator
/// draws as σ = S·√(fs/2) per sample (one-sided density S of white noise sampled at fs).
#[test]
fn simulated_stage_recording_shows_the_tiltmeter_noise_floor() {
    use stilt_daemon::pipeline::Pipeline;
    use stilt_daemon::sim::SimLoop;
    use stilt_hil_sim::SimStage;
    let _g = serial();
    let dir = tmp_dir("simloop");
    let cfg = config();
    let mut o = RecorderOptions::from_config(&cfg);
    o.dir = dir.clone();
    o.start_utc_ns = Some(T0_UTC_NS);
    o.blocking = true;
    o.fsync = false;
    let (sink, _h) = Recorder::start(&cfg, o).expect("start recorder");
    let mut sim = SimLoop::new(
        SimStage::new(&cfg),
        Pipeline::new(cfg.clone(), Box::new(sink), T0_UTC_NS),
    );
    sim.advance_to(3.0 * 3600.0, &mut |_| {});
    let t = sim.time_s();
    sim.into_pipeline().finish(t, "test").expect("finish");
    let set = SegmentSet::open_dir(&dir).expect("open");
    let opts = ReportOptions {
        window: TimeWindow {
            from_utc_ns: Some(T0_UTC_NS + 3_600_000_000_000),
            to_utc_ns: None,
        },
        asd_segment_s: 600.0,
        ..ReportOptions::default()
    };
    let r = report::compute(&set, &opts, &mut |_, _| {}).expect("report");
    let floor = cfg.simulation.tilt_noise_nrad_per_sqrt_hz * 1e-9;
    for a in &r.axes {
        let s = a.asd.as_ref().expect("asd");
        let m = report::band_median(s, 1.0, 4.5).expect("band");
        assert!(
            rel(m, floor) < 0.05,
            "axis {}: floor {m:e} vs {floor:e} rad/√Hz",
            a.axis
        );
    }
    assert_eq!(r.timing.missed_ticks, 0);
    assert_eq!(r.timing.nominal_period_s, Some(1.0));
    assert_eq!(r.heaters.len(), 3);
    let _ = std::fs::remove_dir_all(&dir);
}
