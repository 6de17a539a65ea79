//! `stiltd tune` on the simulated stage, end to end in virtual time:
//! - a leg step test recovers the stage's thermal physics (gain and time constant of the
//!   two-node leg model, from its own parameters);
//! - a tuning round trip: the demo scenario with a tilt loop 10× too weak, a tilt step
//!   test, the proposed SIMC gains pasted into the configuration as the TOML lines the
//!   command prints, and the settled closed-loop tilt RMS improves;
//! - a relay test stays within its amplitude and the heater limits.

use stilt_config::Config;
use stilt_daemon::pipeline::Pipeline;
use stilt_daemon::rows::CountingSink;
use stilt_daemon::sim::SimLoop;
use stilt_daemon::tune::{self, RelayOptions, StepOptions, Target};
use stilt_hil_sim::SimStage;
use stilt_hil_sim::thermal::LegThermalParams;

fn demo() -> Config {
    stilt_config::load_str(stilt_config::DEMO_SCENARIO, "demo.toml").expect("demo config")
}

/// Eigen time constants (slow, fast) of the 2×2 continuous system matrix, s.
fn time_constants(p: &LegThermalParams) -> (f64, f64) {
    let (a, _) = p.continuous();
    let tr = a[0][0] + a[1][1];
    let det = a[0][0] * a[1][1] - a[0][1] * a[1][0];
    let disc = (tr * tr - 4.0 * det).sqrt();
    let (l1, l2) = ((tr + disc) / 2.0, (tr - disc) / 2.0);
    (-1.0 / l1, -1.0 / l2)
}

#[test]
fn leg_step_test_recovers_the_thermal_model() {
    let cfg = demo();
    let rec = tune::run_step_test(&cfg, &StepOptions::new(Target::Leg(0)), &mut |_, _| {})
        .expect("step test");
    // The step stays inside every limit.
    assert!(rec.peak_power_w.0 <= rec.peak_power_w.1);
    assert!(rec.peak_total_power_w.0 <= rec.peak_total_power_w.1);
    assert!(rec.peak_leg_temp_c.0 < rec.peak_leg_temp_c.1);
    let r = tune::analyse(&cfg, &rec, None).expect("analyse");
    let s = &cfg.simulation;
    // The nominal leg of the scenario; each leg's five parameters are spread by up to
    // ±leg_spread_ratio (±5 % in the demo).
    let nominal = LegThermalParams {
        heater_capacity_j_per_k: s.heater_heat_capacity_j_per_k,
        leg_capacity_j_per_k: s.leg_heat_capacity_j_per_k,
        coupling_w_per_k: s.heater_coupling_w_per_k,
        heater_loss_w_per_k: s.heater_loss_w_per_k,
        leg_conductance_w_per_k: s.leg_conductance_w_per_k,
    };
    let k = nominal.body_gain_k_per_w();
    // Gain: the body gain is dominated by 1/G_ba, so a ±5 % spread moves it by about ±5 %;
    // allow 3 % more for the fit and the room's residual drift.
    let tol_k = s.leg_spread_ratio + 0.03;
    assert!(
        (r.model.gain / k - 1.0).abs() < tol_k,
        "gain {} K/W vs the model's body gain {k} K/W (±{tol_k})",
        r.model.gain
    );
    // Time constant: Skogestad's half rule (Skogestad 2003) approximates a two-lag plant
    // τ1 > τ2 by FOPDT with τ ≈ τ1 + τ2/2, θ ≈ τ2/2. τ1 = C/G scales with two spread
    // parameters (±10 %); allow 15 %. θ of a least-squares fit is larger than the half
    // rule's; check it is of the order of the fast lag (plus one control period).
    let (t1, t2) = time_constants(&nominal);
    let tau = t1 + t2 / 2.0;
    assert!(
        (r.model.time_constant_s / tau - 1.0).abs() < 0.15,
        "τ {} s vs half-rule {tau} s",
        r.model.time_constant_s
    );
    assert!(
        r.model.dead_time_s > 0.0 && r.model.dead_time_s < 3.0 * t2 + 2.0,
        "θ {} s vs fast lag {t2} s",
        r.model.dead_time_s
    );
    assert_eq!(r.model.quality, "good");
    // Proposals name their rules; SIMC first.
    assert!(r.proposals[0].rule.contains("SIMC"));
    assert!(
        r.proposals
            .iter()
            .any(|p| p.rule.contains("Ziegler–Nichols"))
    );
    assert!(r.toml.starts_with("[control.leg_loop]\nkp_w_per_k = "));
}

/// True-tilt RMS from the target after `settle_s`, per axis, closed loop for `dur_s`.
fn settled_rms(cfg: &Config, dur_s: f64, settle_s: f64) -> [f64; 2] {
    let stage = SimStage::new(cfg);
    let p = Pipeline::new(cfg.clone(), Box::new(CountingSink::default()), 0);
    let mut sim = SimLoop::new(stage, p);
    let (mut s2, mut n) = ([0.0; 2], 0u64);
    sim.advance_to(dur_s, &mut |r| {
        if r.t_s >= settle_s {
            for k in 0..2 {
                s2[k] += (r.true_tilt_urad[k] - r.outputs.tilt_target_urad[k]).powi(2);
            }
            n += 1;
        }
    });
    s2.map(|v| (v / n as f64).sqrt())
}

#[test]
fn tuning_round_trip_improves_the_closed_loop() {
    let text = stilt_config::DEMO_SCENARIO;
    let good_kp = "kp_urad_per_urad = 1.5\nti_s = 60.0\n";
    assert!(
        text.contains(good_kp),
        "the demo scenario's tilt loop changed"
    );
    // Poor gains: the tilt loop's Kp 10× too small.
    let poor_text = text.replace(good_kp, "kp_urad_per_urad = 0.15\nti_s = 60.0\n");
    let poor = stilt_config::load_str(&poor_text, "poor").expect("poor config");

    let rec = tune::run_step_test(
        &poor,
        &StepOptions::new(Target::TiltAxis(0)),
        &mut |_, _| {},
    )
    .expect("step test");
    let r = tune::analyse(&poor, &rec, None).expect("analyse");
    // The plant from correction to tilt has unit gain when geometry and expansion are
    // right: the leg pattern for c µrad tilts the plate by c µrad once the legs settle
    // (the simulator and the controller share the stage's geometry; 5 % for noise/drift).
    assert!(
        (r.model.gain - 1.0).abs() < 0.05,
        "tilt plant gain {}",
        r.model.gain
    );

    // Apply: paste the printed TOML lines over the poor ones.
    let tuned_text = poor_text.replace(
        "[control.tilt_loop]\nkp_urad_per_urad = 0.15\nti_s = 60.0\n",
        &r.toml,
    );
    assert_ne!(
        tuned_text, poor_text,
        "the TOML lines replaced the old ones"
    );
    let tuned = stilt_config::load_str(&tuned_text, "tuned")
        .expect("the pasted lines are a valid configuration");
    assert!((tuned.control.tilt_loop.kp - r.proposals[0].kp).abs() < 1e-3 * r.proposals[0].kp);

    let (dur, settle) = (18.0 * 3600.0, 6.0 * 3600.0);
    let before = settled_rms(&poor, dur, settle);
    let after = settled_rms(&tuned, dur, settle);
    eprintln!(
        "settled tilt RMS: poor {before:?} µrad, tuned {after:?} µrad; gains {:?}",
        r.proposals[0]
    );
    for k in 0..2 {
        assert!(
            after[k] < 0.5 * before[k],
            "axis {k}: tuned RMS {} µrad is not below half the poor {} µrad",
            after[k],
            before[k]
        );
    }
}

#[test]
fn relay_test_stays_within_its_bounds() {
    let cfg = demo();
    let opts = RelayOptions::default();
    let rr = tune::run_relay_test(
        &cfg,
        Target::TiltAxis(1),
        3.0 * 3600.0,
        &opts,
        &mut |_, _| {},
    )
    .expect("relay test");
    let d = rr.amplitude;
    assert!(d > 0.0 && d <= cfg.control.tilt_output_limit_urad);
    assert!(
        rr.relay.iter().all(|u| (u.abs() - d).abs() < 1e-12),
        "a relay is ±d only"
    );
    let rec = tune::run_step_test(&cfg, &StepOptions::new(Target::TiltAxis(1)), &mut |_, _| {})
        .expect("step test");
    let r = tune::analyse(&cfg, &rec, Some(&rr)).expect("analyse");
    let rl = r.relay.expect("relay report");
    assert!(rl.cycles >= 4, "{} cycles", rl.cycles);
    // Ku = 4d/(π·√(a² − ε²)) (Åström & Hägglund 1984), recomputed from the reported a.
    let ku = 4.0 * d
        / (std::f64::consts::PI * (rl.output_amplitude.powi(2) - rl.hysteresis.powi(2)).sqrt());
    assert!((rl.ultimate_gain - ku).abs() < 1e-9 * ku);
    // The oscillation is slower than the control period and faster than the record.
    assert!(rl.ultimate_period_s > 4.0 && rl.ultimate_period_s < 3600.0);
    assert!(
        r.proposals
            .iter()
            .any(|p| p.rule.contains("ultimate gain PI"))
    );
    // A leg relay: ±d around the manual power, inside the heater's range by construction.
    let leg = tune::run_relay_test(&cfg, Target::Leg(0), 3.0 * 3600.0, &opts, &mut |_, _| {})
        .expect("leg relay test");
    assert!(leg.amplitude <= cfg.control.manual_power_w);
    assert!(cfg.control.manual_power_w + leg.amplitude <= cfg.legs[0].heater_max_power_w);
    let rec = tune::run_step_test(&cfg, &StepOptions::new(Target::Leg(0)), &mut |_, _| {})
        .expect("leg step");
    let lr = tune::analyse(&cfg, &rec, Some(&leg)).expect("leg analyse");
    assert!(lr.relay.expect("leg relay report").cycles >= 4);
    // Too large an amplitude is refused, naming the limit.
    let bad = RelayOptions {
        amplitude: Some(1e3),
        ..RelayOptions::default()
    };
    let e =
        tune::run_relay_test(&cfg, Target::TiltAxis(0), 600.0, &bad, &mut |_, _| {}).unwrap_err();
    assert!(e.to_string().contains("output limit"), "{e}");
}

#[test]
fn command_line_prints_json_and_refuses_bad_loops() {
    let run = |args: &[&str]| {
        std::process::Command::new(env!("CARGO_BIN_EXE_stiltd"))
            .args(args)
            .output()
            .expect("run stiltd")
    };
    let o = run(&["tune", "--loop", "leg:B", "--json"]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).expect("JSON");
    assert_eq!(v["loop_name"], "leg B temperature loop");
    assert_eq!(v["units"][0], "W");
    assert!(v["model"]["gain"].as_f64().unwrap() > 2.0);
    assert!(v["proposals"][0]["rule"].as_str().unwrap().contains("SIMC"));
    assert!(v["toml"].as_str().unwrap().contains("[control.leg_loop]"));
    let o = run(&["tune", "--loop", "tilt:y"]);
    let table = String::from_utf8_lossy(&o.stdout);
    assert!(table.contains("Ziegler–Nichols") && table.contains("[control.tilt_loop]"));
    assert!(table.contains("paste these lines"));
    // On the simulated stage `--apply` applies nothing and says so, with the rule's lines.
    let o = run(&["tune", "--loop", "leg:A", "--apply", "zn-pi"]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("nothing was applied") && err.contains("[control.leg_loop]"),
        "{err}"
    );
    let o = run(&["tune", "--loop", "leg:A", "--apply", "relay-pi"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("need --relay"));
    // Through a daemon: a tilt relay test is refused before connecting, an absent daemon
    // is named (port 9 on loopback: nothing listens there in the test environment).
    let o = run(&[
        "tune",
        "--daemon",
        "http://127.0.0.1:9",
        "--loop",
        "tilt:x",
        "--relay",
    ]);
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("relay test of a tilt axis"));
    for l in ["leg:A", "tilt:x"] {
        let o = run(&["tune", "--daemon", "http://127.0.0.1:9", "--loop", l]);
        assert_eq!(o.status.code(), Some(1));
        let err = String::from_utf8_lossy(&o.stderr);
        assert!(
            err.contains("cannot connect") && err.contains("127.0.0.1:9"),
            "{err}"
        );
    }
    for bad in [
        &["tune", "--loop", "leg:Q"][..],
        &["tune", "--loop", "leg:A", "--step", "3"],
        &["tune", "--record", "10s"],
    ] {
        let o = run(bad);
        assert_eq!(o.status.code(), Some(2), "{bad:?}");
        assert!(!o.stderr.is_empty());
    }
}
