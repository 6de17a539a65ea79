//! `stiltd check --config FILE`: validate a configuration and summarise the stage, and,
//! when it has `[instruments]`, each serial line (port and whether the port map gave it,
//! baud, character format, poll rate, timeout, retries) and the thermometer bus's units with
//! the legs and channels each reads.

use std::path::PathBuf;
use std::process::ExitCode;

use stilt_config::Config;

use super::config_errors;

/// Arguments of `stiltd check`.
#[derive(clap::Args, Debug)]
pub struct CheckArgs {
    /// The stage or scenario file (TOML).
    #[arg(long, short)]
    pub config: PathBuf,
}

/// Runs `stiltd check`.
pub fn run(args: &CheckArgs) -> ExitCode {
    check(&args.config)
}

fn check(path: &std::path::Path) -> ExitCode {
    match stilt_config::load_file(path) {
        Ok(cfg) => {
            print!("{}", summary(&cfg));
            println!("{}: OK", path.display());
            ExitCode::SUCCESS
        }
        Err(e) => config_errors(&e),
    }
}

/// A short human summary of a resolved stage.
pub fn summary(cfg: &Config) -> String {
    use std::fmt::Write;
    let mut o = String::new();
    let _ = writeln!(o, "stage: {}", cfg.stage_name);
    let _ = writeln!(o, "legs ({}):", cfg.legs.len());
    for l in &cfg.legs {
        let _ = writeln!(
            o,
            "  {:<8} at ({:+.3}, {:+.3}) m, {:.3} m of {} (α = {:.2e}/K → {:.2} µm/K), heater {} Ω ≤ {} W, thermometer ch {}",
            l.name,
            l.x_m,
            l.y_m,
            l.length_m,
            l.material.name,
            l.material.cte_per_k,
            l.expansion_m_per_k() * 1e6,
            l.heater_resistance_ohm,
            l.heater_max_power_w,
            l.thermometer_channel
        );
    }
    let t = &cfg.tiltmeter;
    let _ = writeln!(o, "tiltmeter: {} Hz, ±{} µrad", t.rate_hz, t.range_urad);
    let c = &cfg.control;
    let _ = writeln!(
        o,
        "control: {} Hz, mode {}, setpoint ({}, {}) µrad ramped at {} µrad/s, leg bias {} °C",
        c.rate_hz,
        c.mode,
        c.setpoint_urad[0],
        c.setpoint_urad[1],
        c.setpoint_ramp_urad_per_s,
        c.leg_bias_c
    );
    let _ = writeln!(
        o,
        "  tilt loop: Kp {} µrad/µrad, Ti {:?} s, Td {} s, output ±{} µrad",
        c.tilt_loop.kp, c.tilt_loop.ti_s, c.tilt_loop.td_s, c.tilt_output_limit_urad
    );
    let _ = writeln!(
        o,
        "  leg loop:  Kp {} W/K, Ti {:?} s, Td {} s, slew {:?} W/s",
        c.leg_loop.kp, c.leg_loop.ti_s, c.leg_loop.td_s, c.leg_loop.slew_per_s
    );
    let l = &cfg.limits;
    let _ = writeln!(
        o,
        "limits: leg ≤ {} °C, total power ≤ {} W, tilt within ±{} µrad",
        l.max_leg_temp_c, l.max_total_power_w, l.tilt_range_urad
    );
    let r = &cfg.recording;
    let _ = writeln!(
        o,
        "recording: {} into {}, flush every {} s, new segment every {} h or {} MiB",
        if r.enabled { "on" } else { "off" },
        r.dir.display(),
        r.flush_interval_s,
        r.segment_duration_h,
        r.segment_max_mib
    );
    let _ = writeln!(o, "network: {}", cfg.network.bind);
    if let Some(i) = &cfg.instruments {
        instruments(&mut o, cfg, i);
    }
    o
}

/// The `instruments:` part of the summary: each line's port (and where it came from), baud,
/// character format, poll rate, timeout and retries; the thermometer's units and legs.
fn instruments(o: &mut String, cfg: &Config, i: &stilt_config::Instruments) {
    use std::fmt::Write;
    match &i.port_map {
        Some(m) => {
            let _ = writeln!(o, "instruments (port map {}):", m.display());
        }
        None => {
            let _ = writeln!(o, "instruments:");
        }
    }
    let line = |o: &mut String, name: &str, l: &stilt_config::SerialLink, poll: Option<f64>| {
        let retries = match l.retries {
            1 => "1 retry".to_string(),
            n => format!("{n} retries"),
        };
        let _ = writeln!(
            o,
            "  {name:<12} {}{}, {} baud {}, {}timeout {} ms, {retries}",
            l.port,
            if l.port_from_map {
                " (from the port map)"
            } else {
                ""
            },
            l.baud,
            l.framing,
            poll.map_or(String::new(), |p| format!("poll {p} Hz, ")),
            l.timeout_ms,
        );
    };
    line(o, "tiltmeter", &i.tiltmeter.link, Some(i.tiltmeter.poll_hz));
    let th = &i.thermometer;
    line(o, "thermometer", &th.link, Some(th.poll_hz));
    let _ = writeln!(
        o,
        "    Modbus RTU, {} sensors, stale after {} s, {} unit(s):",
        th.sensor.as_str(),
        th.stale_after_s,
        th.units.len()
    );
    for u in &th.units {
        let legs: Vec<String> = cfg
            .legs
            .iter()
            .zip(&th.leg_units)
            .filter(|(_, lu)| *lu == u)
            .map(|(l, _)| format!("{} ch {}", l.name, l.thermometer_channel))
            .collect();
        let _ = writeln!(
            o,
            "    unit {u}{}: {}",
            if *u == th.unit { " (default)" } else { "" },
            legs.join(", ")
        );
    }
    line(o, "heater", &i.heater.link, None);
    let _ = writeln!(
        o,
        "    set every control tick ({} Hz), readback {}",
        cfg.control.rate_hz,
        if i.heater.readback {
            format!("on, tolerance {} W", i.heater.readback_tolerance_w)
        } else {
            "off".into()
        }
    );
}
