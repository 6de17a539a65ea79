//! The raw configuration: serde structs that mirror the TOML file key for key.
//!
//! Every leaf is an `Option` so that a missing key is reported by validation, together
//! with every other problem, instead of stopping serde at the first one. Unknown keys
//! are collected with `serde_ignored` and reported as errors (the effect of
//! `deny_unknown_fields`, but all of them at once). Only a value of the wrong TOML type
//! stops parsing early, and that error still carries its line and column.

use serde::Deserialize;

use crate::errors::{ConfigError, ConfigErrors};
use crate::spans::SpanIndex;

/// The whole file.
#[derive(Debug, Default, Deserialize)]
#[allow(missing_docs)]
pub struct RawConfig {
    pub stage: Option<RawStage>,
    pub legs: Option<Vec<RawLeg>>,
    pub tiltmeter: Option<RawTiltmeter>,
    pub control: Option<RawControl>,
    pub limits: Option<RawLimits>,
    pub recording: Option<RawRecording>,
    pub network: Option<RawNetwork>,
    pub simulation: Option<RawSimulation>,
    pub interlocks: Option<RawInterlocks>,
    pub instruments: Option<RawInstruments>,
}

/// `[instruments]`: the serial instruments of a real stage (or of the HIL simulator).
#[derive(Debug, Default, Deserialize)]
#[allow(missing_docs)]
pub struct RawInstruments {
    /// A port map file (path relative to the configuration file) whose `[ports]` and
    /// `[serial]` fill in the ports, baud rates and thermometer unit not given here.
    pub port_map: Option<String>,
    pub tiltmeter: Option<RawTiltmeterLink>,
    pub thermometer: Option<RawThermometerLink>,
    pub heater: Option<RawHeaterLink>,
}

/// `[instruments.tiltmeter]`: the tiltmeter's line and its configurable line protocol.
#[derive(Debug, Default, Deserialize)]
#[allow(missing_docs)]
pub struct RawTiltmeterLink {
    pub port: Option<String>,
    pub baud: Option<i64>,
    pub parity: Option<String>,
    pub data_bits: Option<i64>,
    pub stop_bits: Option<i64>,
    pub poll_hz: Option<f64>,
    pub timeout_ms: Option<i64>,
    pub retries: Option<i64>,
    pub query: Option<String>,
    pub reply_terminator: Option<String>,
    pub reply_prefix: Option<String>,
    pub max_reply_len: Option<i64>,
    pub x: Option<RawLineField>,
    pub y: Option<RawLineField>,
    pub status: Option<RawLineField>,
    pub bad_status_mask: Option<i64>,
    pub stuck_after_s: Option<f64>,
}

/// One value of a line-protocol reply: by delimiter and index, or by pattern.
#[derive(Debug, Default, Deserialize)]
#[allow(missing_docs)]
pub struct RawLineField {
    pub delimiter: Option<String>,
    pub index: Option<i64>,
    pub pattern: Option<String>,
    pub scale: Option<f64>,
    pub offset: Option<f64>,
}

/// `[instruments.thermometer]`: the Modbus RTU RTD thermometer.
#[derive(Debug, Default, Deserialize)]
#[allow(missing_docs)]
pub struct RawThermometerLink {
    pub port: Option<String>,
    pub baud: Option<i64>,
    pub parity: Option<String>,
    pub data_bits: Option<i64>,
    pub stop_bits: Option<i64>,
    pub unit: Option<i64>,
    pub units: Option<Vec<i64>>,
    pub sensor: Option<String>,
    pub poll_hz: Option<f64>,
    pub timeout_ms: Option<i64>,
    pub retries: Option<i64>,
    pub stale_after_s: Option<f64>,
    pub stuck_after_s: Option<f64>,
}

/// `[instruments.heater]`: the SCPI heater supply.
#[derive(Debug, Default, Deserialize)]
#[allow(missing_docs)]
pub struct RawHeaterLink {
    pub port: Option<String>,
    pub baud: Option<i64>,
    pub parity: Option<String>,
    pub data_bits: Option<i64>,
    pub stop_bits: Option<i64>,
    pub timeout_ms: Option<i64>,
    pub retries: Option<i64>,
    pub readback: Option<bool>,
    pub readback_tolerance_w: Option<f64>,
}

/// A port map file, as the HIL simulator writes it.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(missing_docs)]
pub struct RawPortMap {
    pub ports: Option<RawPorts>,
    pub serial: Option<RawPortSerial>,
}

/// `[ports]` of a port map.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(missing_docs)]
pub struct RawPorts {
    pub tiltmeter: Option<String>,
    pub thermometer: Option<String>,
    pub heater: Option<String>,
}

/// `[serial]` of a port map.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(missing_docs)]
pub struct RawPortSerial {
    pub tiltmeter_baud: Option<i64>,
    pub thermometer_baud: Option<i64>,
    pub heater_baud: Option<i64>,
    pub thermometer_unit: Option<i64>,
}

/// `[stage]`
#[derive(Debug, Default, Deserialize)]
#[allow(missing_docs)]
pub struct RawStage {
    pub name: Option<String>,
}

/// One `[[legs]]` entry.
#[derive(Debug, Default, Deserialize)]
#[allow(missing_docs)]
pub struct RawLeg {
    pub name: Option<String>,
    pub x_m: Option<f64>,
    pub y_m: Option<f64>,
    pub length_m: Option<f64>,
    pub material: Option<String>,
    pub cte_per_k: Option<f64>,
    pub heater_resistance_ohm: Option<f64>,
    pub heater_max_power_w: Option<f64>,
    pub thermometer_channel: Option<i64>,
    pub thermometer_unit: Option<i64>,
}

/// `[tiltmeter]`
#[derive(Debug, Default, Deserialize)]
#[allow(missing_docs)]
pub struct RawTiltmeter {
    pub rate_hz: Option<f64>,
    pub range_urad: Option<f64>,
    pub scale_x_urad_per_unit: Option<f64>,
    pub scale_y_urad_per_unit: Option<f64>,
    pub offset_x_unit: Option<f64>,
    pub offset_y_unit: Option<f64>,
    pub cross_coupling: Option<Vec<Vec<f64>>>,
}

/// `[control]`
#[derive(Debug, Default, Deserialize)]
#[allow(missing_docs)]
pub struct RawControl {
    pub rate_hz: Option<f64>,
    pub mode: Option<String>,
    pub setpoint_x_urad: Option<f64>,
    pub setpoint_y_urad: Option<f64>,
    pub setpoint_ramp_urad_per_s: Option<f64>,
    pub leg_bias_c: Option<f64>,
    pub leg_bias_ramp_k_per_s: Option<f64>,
    pub manual_power_w: Option<f64>,
    pub tilt_loop: Option<RawTiltLoop>,
    pub leg_loop: Option<RawLegLoop>,
}

/// `[control.tilt_loop]`: the outer loops, one per axis, sharing gains.
#[derive(Debug, Default, Deserialize)]
#[allow(missing_docs)]
pub struct RawTiltLoop {
    pub kp_urad_per_urad: Option<f64>,
    pub ti_s: Option<f64>,
    pub td_s: Option<f64>,
    pub derivative_filter_s: Option<f64>,
    pub setpoint_weight: Option<f64>,
    pub tracking_time_s: Option<f64>,
    pub output_limit_urad: Option<f64>,
    pub slew_urad_per_s: Option<f64>,
}

/// `[control.leg_loop]`: the inner loops, one per leg, sharing gains.
#[derive(Debug, Default, Deserialize)]
#[allow(missing_docs)]
pub struct RawLegLoop {
    pub kp_w_per_k: Option<f64>,
    pub ti_s: Option<f64>,
    pub td_s: Option<f64>,
    pub derivative_filter_s: Option<f64>,
    pub setpoint_weight: Option<f64>,
    pub tracking_time_s: Option<f64>,
    pub slew_w_per_s: Option<f64>,
}

/// `[limits]`
#[derive(Debug, Default, Deserialize)]
#[allow(missing_docs)]
pub struct RawLimits {
    pub max_leg_temp_c: Option<f64>,
    pub max_total_power_w: Option<f64>,
    pub tilt_range_urad: Option<f64>,
}

/// `[recording]`
#[derive(Debug, Default, Deserialize)]
#[allow(missing_docs)]
pub struct RawRecording {
    pub enabled: Option<bool>,
    pub dir: Option<String>,
    pub flush_interval_s: Option<f64>,
    pub segment_duration_h: Option<f64>,
    pub segment_max_mib: Option<f64>,
    pub queue_capacity_rows: Option<i64>,
}

/// `[network]`
#[derive(Debug, Default, Deserialize)]
#[allow(missing_docs)]
pub struct RawNetwork {
    pub bind: Option<String>,
    pub tls_cert_file: Option<String>,
    pub tls_key_file: Option<String>,
    pub token_file: Option<String>,
    pub max_stream_clients: Option<i64>,
    pub change_timeout_ms: Option<i64>,
}

/// `[simulation]`: the simulated stage's physics and disturbances (demo and tests only).
#[derive(Debug, Default, Deserialize)]
#[allow(missing_docs)]
pub struct RawSimulation {
    pub seed: Option<i64>,
    pub ambient_mean_c: Option<f64>,
    pub ambient_daily_swing_k: Option<f64>,
    pub ambient_walk_k: Option<f64>,
    pub ambient_walk_correlation_h: Option<f64>,
    pub gradient_x_k_per_m: Option<f64>,
    pub gradient_y_k_per_m: Option<f64>,
    pub gradient_daily_x_k_per_m: Option<f64>,
    pub gradient_daily_y_k_per_m: Option<f64>,
    pub floor_drift_x_urad_per_day: Option<f64>,
    pub floor_drift_y_urad_per_day: Option<f64>,
    pub floor_wobble_x_urad: Option<f64>,
    pub floor_wobble_y_urad: Option<f64>,
    pub tilt_noise_nrad_per_sqrt_hz: Option<f64>,
    pub tilt_walk_nrad_per_sqrt_h: Option<f64>,
    pub tilt_quantum_nrad: Option<f64>,
    pub thermometer_noise_mk: Option<f64>,
    pub leg_heat_capacity_j_per_k: Option<f64>,
    pub leg_conductance_w_per_k: Option<f64>,
    pub heater_heat_capacity_j_per_k: Option<f64>,
    pub heater_coupling_w_per_k: Option<f64>,
    pub heater_loss_w_per_k: Option<f64>,
    pub leg_spread_ratio: Option<f64>,
}

/// `[interlocks]`: one table per interlock.
#[derive(Debug, Default, Deserialize)]
#[allow(missing_docs)]
pub struct RawInterlocks {
    pub leg_over_temperature: Option<RawInterlock>,
    pub heater_over_power: Option<RawInterlock>,
    pub total_power: Option<RawInterlock>,
    pub sensor_stale: Option<RawInterlock>,
    pub tilt_out_of_range: Option<RawInterlock>,
    pub thermometer_disagreement: Option<RawInterlock>,
    pub heater_open_circuit: Option<RawInterlock>,
    pub loop_overrun: Option<RawInterlock>,
}

/// One interlock's settings (which extra keys apply depends on the interlock).
#[derive(Debug, Default, Deserialize)]
#[allow(missing_docs)]
pub struct RawInterlock {
    pub action: Option<String>,
    pub after_ticks: Option<i64>,
    pub margin_ratio: Option<f64>,
    pub max_spread_k: Option<f64>,
    pub min_ratio: Option<f64>,
    pub min_power_w: Option<f64>,
}

/// Deserializes the text into [`RawConfig`], collecting every unknown key as an error
/// beside the result (so validation can still report the rest).
pub(crate) fn parse(
    text: &str,
    spans: &SpanIndex,
) -> Result<(RawConfig, Vec<ConfigError>), ConfigErrors> {
    let de = toml::Deserializer::parse(text).map_err(|e| {
        ConfigErrors(vec![spans.error_at(
            e.span().unwrap_or(0..0),
            "",
            String::new(),
            format!("TOML syntax error: {}", e.message().trim()),
            "valid TOML".into(),
        )])
    })?;
    let mut unknown: Vec<String> = Vec::new();
    let result: Result<RawConfig, _> =
        serde_ignored::deserialize(de, |p| unknown.push(format_path(&p)));
    let raw = match result {
        Ok(r) => r,
        Err(e) => {
            let span = e.span().unwrap_or(0..0);
            let path = path_at(spans, &span);
            return Err(ConfigErrors(vec![spans.error_at(
                span.clone(),
                &path,
                spans.found(&path),
                e.message().trim().to_string(),
                "see config/examples/hardware-template.toml for every key and its type".into(),
            )]));
        }
    };
    let errs: Vec<ConfigError> = unknown
        .iter()
        .map(|p| {
            spans.error_at(
                spans.key_span_of(p),
                p,
                String::new(),
                "unknown key".into(),
                allowed_keys(p),
            )
        })
        .collect();
    Ok((raw, errs))
}

/// serde_ignored's path → our `table.key[index]` notation.
fn format_path(p: &serde_ignored::Path<'_>) -> String {
    use serde_ignored::Path;
    match p {
        Path::Root => String::new(),
        Path::Seq { parent, index } => format!("{}[{index}]", format_path(parent)),
        Path::Map { parent, key } => {
            let pre = format_path(parent);
            if pre.is_empty() {
                key.clone()
            } else {
                format!("{pre}.{key}")
            }
        }
        Path::Some { parent }
        | Path::NewtypeStruct { parent }
        | Path::NewtypeVariant { parent } => format_path(parent),
    }
}

/// The deepest known key whose value contains `span` (for serde's type errors).
fn path_at(spans: &SpanIndex, span: &std::ops::Range<usize>) -> String {
    spans.innermost_containing(span)
}

/// The keys accepted in the table that holds `path`, for "unknown key" messages.
fn allowed_keys(path: &str) -> String {
    let table = match path.rfind('.') {
        Some(i) => &path[..i],
        None => "",
    };
    let table = strip_indices(table);
    let keys: &[&str] = match table.as_str() {
        "" => &[
            "stage",
            "legs",
            "tiltmeter",
            "control",
            "limits",
            "recording",
            "network",
            "simulation",
            "interlocks",
            "instruments",
        ],
        "instruments" => &["port_map", "tiltmeter", "thermometer", "heater"],
        "instruments.tiltmeter" => &[
            "port",
            "baud",
            "parity",
            "data_bits",
            "stop_bits",
            "poll_hz",
            "timeout_ms",
            "retries",
            "query",
            "reply_terminator",
            "reply_prefix",
            "max_reply_len",
            "x",
            "y",
            "status",
            "bad_status_mask",
            "stuck_after_s",
        ],
        "instruments.tiltmeter.x" | "instruments.tiltmeter.y" | "instruments.tiltmeter.status" => {
            &["delimiter", "index", "pattern", "scale", "offset"]
        }
        "instruments.thermometer" => &[
            "port",
            "baud",
            "parity",
            "data_bits",
            "stop_bits",
            "unit",
            "units",
            "sensor",
            "poll_hz",
            "timeout_ms",
            "retries",
            "stale_after_s",
            "stuck_after_s",
        ],
        "instruments.heater" => &[
            "port",
            "baud",
            "parity",
            "data_bits",
            "stop_bits",
            "timeout_ms",
            "retries",
            "readback",
            "readback_tolerance_w",
        ],
        "stage" => &["name"],
        "legs" => &[
            "name",
            "x_m",
            "y_m",
            "length_m",
            "material",
            "cte_per_k",
            "heater_resistance_ohm",
            "heater_max_power_w",
            "thermometer_channel",
            "thermometer_unit",
        ],
        "tiltmeter" => &[
            "rate_hz",
            "range_urad",
            "scale_x_urad_per_unit",
            "scale_y_urad_per_unit",
            "offset_x_unit",
            "offset_y_unit",
            "cross_coupling",
        ],
        "control" => &[
            "rate_hz",
            "mode",
            "setpoint_x_urad",
            "setpoint_y_urad",
            "setpoint_ramp_urad_per_s",
            "leg_bias_c",
            "leg_bias_ramp_k_per_s",
            "manual_power_w",
            "tilt_loop",
            "leg_loop",
        ],
        "control.tilt_loop" => &[
            "kp_urad_per_urad",
            "ti_s",
            "td_s",
            "derivative_filter_s",
            "setpoint_weight",
            "tracking_time_s",
            "output_limit_urad",
            "slew_urad_per_s",
        ],
        "control.leg_loop" => &[
            "kp_w_per_k",
            "ti_s",
            "td_s",
            "derivative_filter_s",
            "setpoint_weight",
            "tracking_time_s",
            "slew_w_per_s",
        ],
        "limits" => &["max_leg_temp_c", "max_total_power_w", "tilt_range_urad"],
        "recording" => &[
            "enabled",
            "dir",
            "flush_interval_s",
            "segment_duration_h",
            "segment_max_mib",
            "queue_capacity_rows",
        ],
        "network" => &[
            "bind",
            "tls_cert_file",
            "tls_key_file",
            "token_file",
            "max_stream_clients",
            "change_timeout_ms",
        ],
        "interlocks" => &[
            "leg_over_temperature",
            "heater_over_power",
            "total_power",
            "sensor_stale",
            "tilt_out_of_range",
            "thermometer_disagreement",
            "heater_open_circuit",
            "loop_overrun",
        ],
        "interlocks.heater_over_power" => &["action", "after_ticks", "margin_ratio"],
        "interlocks.thermometer_disagreement" => &["action", "after_ticks", "max_spread_k"],
        "interlocks.heater_open_circuit" => &["action", "after_ticks", "min_ratio", "min_power_w"],
        t if t.starts_with("interlocks.") => &["action", "after_ticks"],
        "simulation" => &[
            "seed",
            "ambient_mean_c",
            "ambient_daily_swing_k",
            "ambient_walk_k",
            "ambient_walk_correlation_h",
            "gradient_x_k_per_m",
            "gradient_y_k_per_m",
            "gradient_daily_x_k_per_m",
            "gradient_daily_y_k_per_m",
            "floor_drift_x_urad_per_day",
            "floor_drift_y_urad_per_day",
            "floor_wobble_x_urad",
            "floor_wobble_y_urad",
            "tilt_noise_nrad_per_sqrt_hz",
            "tilt_walk_nrad_per_sqrt_h",
            "tilt_quantum_nrad",
            "thermometer_noise_mk",
            "leg_heat_capacity_j_per_k",
            "leg_conductance_w_per_k",
            "heater_heat_capacity_j_per_k",
            "heater_coupling_w_per_k",
            "heater_loss_w_per_k",
            "leg_spread_ratio",
        ],
        _ => &[],
    };
    if keys.is_empty() {
        "no keys here".into()
    } else {
        keys.join(", ")
    }
}

fn strip_indices(p: &str) -> String {
    let mut out = String::with_capacity(p.len());
    let mut depth = 0;
    for c in p.chars() {
        match c {
            '[' => depth += 1,
            ']' => depth -= 1,
            _ if depth == 0 => out.push(c),
            _ => {}
        }
    }
    out
}
