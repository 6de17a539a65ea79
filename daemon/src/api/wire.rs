//! The API's JSON wire types, converted explicitly from the domain types.
//!
//! Wire types are not domain types: a field renamed in `status.rs` must not silently
//! change what clients receive, so every JSON body is its own struct here. Numbers that
//! can be missing (no usable reading) are `null`, never NaN. Request bodies refuse
//! unknown fields, so a misspelt key is a 400 naming it, not a silent no-op.
//!
//! Main types: [`StatusWire`] (`GET /v1/status`), [`ConfigWire`] (`GET /v1/config`),
//! [`SampleWire`] (each `sample` event of `GET /v1/stream`), the request bodies
//! ([`TiltSetpointBody`], [`LegBiasBody`], [`ManualPowerBody`], [`ModeBody`],
//! [`GainsBody`], [`AckBody`]) and [`ChangeReply`].

use serde::{Deserialize, Serialize};
use stilt_config::{Config, LoopGains};

use crate::rows::{ControlRow, LoopTerms};
use crate::status::{
    AlarmStatus, AxisStatus, ChannelStatus, LegStatus, LoopTiming, RecordingStatus, Status,
};

fn finite(v: f64) -> Option<f64> {
    v.is_finite().then_some(v)
}

/// A PID loop's terms at the last tick.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[allow(missing_docs)]
pub struct TermsWire {
    pub p: Option<f64>,
    pub i: Option<f64>,
    pub d: Option<f64>,
    pub out: Option<f64>,
}

impl From<&LoopTerms> for TermsWire {
    fn from(t: &LoopTerms) -> Self {
        TermsWire {
            p: finite(t.p),
            i: finite(t.i),
            d: finite(t.d),
            out: finite(t.out),
        }
    }
}

/// One tilt axis.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct AxisWire {
    /// `x` or `y`.
    pub axis: String,
    /// Mean tilt over the last tick, µrad (`null` when unusable).
    pub measured_urad: Option<f64>,
    /// `ok`, `stale`, `timeout`, `bad_frame`, `out_of_range`, `missing`.
    pub quality: String,
    /// Seconds since the last usable reading.
    pub age_s: Option<f64>,
    /// Setpoint in use (ramped), µrad.
    pub setpoint_urad: f64,
    /// Target the setpoint ramps towards, µrad.
    pub target_urad: f64,
    /// The axis loop's terms.
    pub terms: TermsWire,
}

impl AxisWire {
    fn new(name: &str, a: &AxisStatus) -> Self {
        AxisWire {
            axis: name.into(),
            measured_urad: a.measured_urad.and_then(finite),
            quality: a.quality.as_str().into(),
            age_s: a.age_s.and_then(finite),
            setpoint_urad: a.setpoint_urad,
            target_urad: a.target_urad,
            terms: (&a.terms).into(),
        }
    }
}

/// One leg.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct LegWire {
    /// Leg name.
    pub name: String,
    /// Latest temperature, °C.
    pub temp_c: Option<f64>,
    /// Quality of that reading.
    pub quality: String,
    /// Seconds since the last usable reading.
    pub age_s: Option<f64>,
    /// Temperature setpoint in use, °C.
    pub setpoint_c: f64,
    /// Commanded heater power, W.
    pub power_w: f64,
    /// The heater's power limit, W (from the configuration).
    pub max_power_w: Option<f64>,
    /// Commanded heater drive, V.
    pub drive_v: f64,
    /// Power read back from the supply, W.
    pub readback_power_w: Option<f64>,
    /// The leg loop's terms.
    pub terms: TermsWire,
}

impl LegWire {
    fn new(l: &LegStatus, max_power_w: Option<f64>) -> Self {
        LegWire {
            name: l.name.clone(),
            temp_c: l.temp_c.and_then(finite),
            quality: l.quality.as_str().into(),
            age_s: l.age_s.and_then(finite),
            setpoint_c: l.setpoint_c,
            power_w: l.power_w,
            max_power_w,
            drive_v: l.drive_v,
            readback_power_w: l.readback_power_w.and_then(finite),
            terms: (&l.terms).into(),
        }
    }
}

/// One alarm.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[allow(missing_docs)]
pub struct AlarmWire {
    pub id: String,
    pub message: String,
    pub since_utc_ns: i64,
    pub active: bool,
    pub latched: bool,
    pub acknowledged_by: Option<String>,
}

impl From<&AlarmStatus> for AlarmWire {
    fn from(a: &AlarmStatus) -> Self {
        AlarmWire {
            id: a.id.clone(),
            message: a.message.clone(),
            since_utc_ns: a.since_utc_ns,
            active: a.active,
            latched: a.latched,
            acknowledged_by: a.acknowledged_by.clone(),
        }
    }
}

/// Loop timing.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[allow(missing_docs)]
pub struct TimingWire {
    pub period_s: f64,
    pub ticks: u64,
    pub overruns: u64,
    pub jitter_p50_s: f64,
    pub jitter_p99_s: f64,
    pub jitter_max_s: f64,
    pub last_tick_work_s: f64,
}

impl From<&LoopTiming> for TimingWire {
    fn from(t: &LoopTiming) -> Self {
        TimingWire {
            period_s: t.period_s,
            ticks: t.ticks,
            overruns: t.overruns,
            jitter_p50_s: t.jitter_p50_s,
            jitter_p99_s: t.jitter_p99_s,
            jitter_max_s: t.jitter_max_s,
            last_tick_work_s: t.last_tick_work_s,
        }
    }
}

/// Recording health.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[allow(missing_docs)]
pub struct RecordingWire {
    pub enabled: bool,
    pub segment: Option<String>,
    pub rows_written: u64,
    pub dropped_rows: u64,
    pub last_flush_utc_ns: Option<i64>,
    pub alarm: Option<String>,
}

impl From<&RecordingStatus> for RecordingWire {
    fn from(r: &RecordingStatus) -> Self {
        RecordingWire {
            enabled: r.enabled,
            segment: r.segment.as_ref().map(|p| p.display().to_string()),
            rows_written: r.rows_written,
            dropped_rows: r.dropped_rows,
            last_flush_utc_ns: r.last_flush_utc_ns,
            alarm: r.alarm.clone(),
        }
    }
}

/// One instrument channel.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[allow(missing_docs)]
pub struct ChannelWire {
    pub name: String,
    pub port: String,
    pub connected: bool,
    pub requests: u64,
    pub timeouts: u64,
    pub bad_frames: u64,
    pub reconnects: u64,
}

impl From<&ChannelStatus> for ChannelWire {
    fn from(c: &ChannelStatus) -> Self {
        ChannelWire {
            name: c.name.clone(),
            port: c.port.clone(),
            connected: c.connected,
            requests: c.requests,
            timeouts: c.timeouts,
            bad_frames: c.bad_frames,
            reconnects: c.reconnects,
        }
    }
}

/// `GET /v1/status`.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct StatusWire {
    /// Software version.
    pub version: String,
    /// Stage name.
    pub stage_name: String,
    /// UTC when the daemon started, ns since the Unix epoch.
    pub started_utc_ns: i64,
    /// UTC of this snapshot, ns.
    pub now_utc_ns: i64,
    /// Seconds since start.
    pub uptime_s: f64,
    /// `off`, `manual`, `temperature` or `level`.
    pub mode: String,
    /// Whether every sensor the mode needs has a usable reading.
    pub ready: bool,
    /// Tilt axes x and y.
    pub axes: Vec<AxisWire>,
    /// Common leg bias in use, °C.
    pub leg_bias_c: f64,
    /// The bias target, °C.
    pub leg_bias_target_c: f64,
    /// Legs in configuration order.
    pub legs: Vec<LegWire>,
    /// Active and latched alarms.
    pub alarms: Vec<AlarmWire>,
    /// Loop timing.
    pub timing: TimingWire,
    /// Recording health.
    pub recording: RecordingWire,
    /// Instrument channels.
    pub channels: Vec<ChannelWire>,
}

impl StatusWire {
    /// Converts a status snapshot; `cfg` adds each heater's power limit.
    pub fn new(s: &Status, cfg: &Config) -> Self {
        StatusWire {
            version: s.version.to_string(),
            stage_name: s.stage_name.clone(),
            started_utc_ns: s.started_utc_ns,
            now_utc_ns: s.now_utc_ns,
            uptime_s: s.uptime_s,
            mode: s.mode.as_str().into(),
            ready: s.ready,
            axes: vec![
                AxisWire::new("x", &s.axes[0]),
                AxisWire::new("y", &s.axes[1]),
            ],
            leg_bias_c: s.leg_bias_c,
            leg_bias_target_c: s.leg_bias_target_c,
            legs: s
                .legs
                .iter()
                .map(|l| {
                    let max = cfg
                        .legs
                        .iter()
                        .find(|c| c.name == l.name)
                        .map(|c| c.heater_max_power_w);
                    LegWire::new(l, max)
                })
                .collect(),
            alarms: s.alarms.iter().map(AlarmWire::from).collect(),
            timing: (&s.timing).into(),
            recording: (&s.recording).into(),
            channels: s.channels.iter().map(ChannelWire::from).collect(),
        }
    }
}

/// One leg in a streamed sample.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[allow(missing_docs)]
pub struct SampleLegWire {
    pub temp_c: Option<f64>,
    pub quality: String,
    pub setpoint_c: f64,
    pub power_w: f64,
}

/// One `sample` event of the live stream: a control row.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct SampleWire {
    /// Tick counter since start.
    pub tick: u64,
    /// Run clock, s.
    pub t_s: f64,
    /// UTC, ns.
    pub t_utc_ns: i64,
    /// Mode during the tick.
    pub mode: String,
    /// Mean tilt over the tick per axis, µrad.
    pub tilt_urad: [Option<f64>; 2],
    /// Quality of that tilt.
    pub tilt_quality: String,
    /// Setpoint in use (ramped), µrad.
    pub setpoint_urad: [f64; 2],
    /// Target the setpoint ramps towards, µrad.
    pub target_urad: [f64; 2],
    /// Legs in configuration order.
    pub legs: Vec<SampleLegWire>,
}

impl From<&ControlRow> for SampleWire {
    fn from(r: &ControlRow) -> Self {
        SampleWire {
            tick: r.tick,
            t_s: r.stamp.t_mono_s,
            t_utc_ns: r.stamp.t_utc_ns,
            mode: r.mode.as_str().into(),
            tilt_urad: [finite(r.tilt_urad[0]), finite(r.tilt_urad[1])],
            tilt_quality: r.tilt_quality.as_str().into(),
            setpoint_urad: r.tilt_setpoint_urad,
            target_urad: r.tilt_target_urad,
            legs: r
                .legs
                .iter()
                .map(|l| SampleLegWire {
                    temp_c: finite(l.temp_c),
                    quality: l.temp_quality.as_str().into(),
                    setpoint_c: l.setpoint_c,
                    power_w: l.power_w,
                })
                .collect(),
        }
    }
}

/// The first event of a stream (`start`): what follows.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct StreamStartWire {
    /// Every how many control ticks a sample is sent.
    pub every: u64,
    /// The control period, s.
    pub period_s: f64,
    /// Leg names, in the order of each sample's `legs`.
    pub legs: Vec<String>,
}

/// A `lagged` event: the client fell behind and missed rows.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct LaggedWire {
    /// Control rows skipped.
    pub missed: u64,
}

/// PID gains on the wire.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[allow(missing_docs)]
pub struct GainsWire {
    pub kp: f64,
    /// `null` when integral action is off.
    pub ti_s: Option<f64>,
    pub td_s: f64,
    pub derivative_filter_s: f64,
    pub setpoint_weight: f64,
    pub tracking_time_s: f64,
    /// `null` for no slew limit.
    pub slew_per_s: Option<f64>,
}

impl From<&LoopGains> for GainsWire {
    fn from(g: &LoopGains) -> Self {
        GainsWire {
            kp: g.kp,
            ti_s: g.ti_s,
            td_s: g.td_s,
            derivative_filter_s: g.derivative_filter_s,
            setpoint_weight: g.setpoint_weight,
            tracking_time_s: g.tracking_time_s,
            slew_per_s: g.slew_per_s,
        }
    }
}

/// A leg in the configuration.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[allow(missing_docs)]
pub struct ConfigLegWire {
    pub name: String,
    pub x_m: f64,
    pub y_m: f64,
    pub length_m: f64,
    pub material: String,
    pub cte_per_k: f64,
    pub heater_resistance_ohm: f64,
    pub heater_max_power_w: f64,
    pub thermometer_channel: usize,
}

/// The control section of the configuration, with API changes applied.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[allow(missing_docs)]
pub struct ConfigControlWire {
    pub rate_hz: f64,
    pub initial_mode: String,
    pub initial_setpoint_urad: [f64; 2],
    pub setpoint_ramp_urad_per_s: f64,
    pub initial_leg_bias_c: f64,
    pub leg_bias_ramp_k_per_s: f64,
    pub manual_power_w: f64,
    pub tilt_loop: GainsWire,
    pub tilt_output_limit_urad: f64,
    pub leg_loop: GainsWire,
}

/// The limits section.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[allow(missing_docs)]
pub struct ConfigLimitsWire {
    pub max_leg_temp_c: f64,
    pub max_total_power_w: f64,
    pub tilt_range_urad: f64,
}

/// The network section, secrets left out: whether TLS and tokens are on, not the files.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[allow(missing_docs)]
pub struct ConfigNetworkWire {
    pub bind: String,
    pub tls: bool,
    pub tokens_required: bool,
    pub max_stream_clients: usize,
    pub change_timeout_ms: u64,
}

/// `GET /v1/config`: the running configuration without secrets.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[allow(missing_docs)]
pub struct ConfigWire {
    pub stage_name: String,
    pub legs: Vec<ConfigLegWire>,
    pub tiltmeter_rate_hz: f64,
    pub tiltmeter_range_urad: f64,
    pub control: ConfigControlWire,
    pub limits: ConfigLimitsWire,
    pub recording_enabled: bool,
    pub recording_flush_interval_s: f64,
    pub recording_segment_duration_h: f64,
    pub network: ConfigNetworkWire,
    /// Where the gains and manual power differ from the file: changed through this API.
    pub changed_through_api: Vec<String>,
}

impl ConfigWire {
    /// The configuration with the gains and manual power now in force.
    pub fn new(cfg: &Config, running: &super::Running) -> Self {
        let c = &cfg.control;
        let mut changed = Vec::new();
        if running.tilt_loop != c.tilt_loop {
            changed.push("control.tilt_loop".into());
        }
        if running.leg_loop != c.leg_loop {
            changed.push("control.leg_loop".into());
        }
        if running.manual_power_w != c.manual_power_w {
            changed.push("control.manual_power_w".into());
        }
        ConfigWire {
            stage_name: cfg.stage_name.clone(),
            legs: cfg
                .legs
                .iter()
                .map(|l| ConfigLegWire {
                    name: l.name.clone(),
                    x_m: l.x_m,
                    y_m: l.y_m,
                    length_m: l.length_m,
                    material: l.material.name.clone(),
                    cte_per_k: l.material.cte_per_k,
                    heater_resistance_ohm: l.heater_resistance_ohm,
                    heater_max_power_w: l.heater_max_power_w,
                    thermometer_channel: l.thermometer_channel,
                })
                .collect(),
            tiltmeter_rate_hz: cfg.tiltmeter.rate_hz,
            tiltmeter_range_urad: cfg.tiltmeter.range_urad,
            control: ConfigControlWire {
                rate_hz: c.rate_hz,
                initial_mode: c.mode.as_str().into(),
                initial_setpoint_urad: c.setpoint_urad,
                setpoint_ramp_urad_per_s: c.setpoint_ramp_urad_per_s,
                initial_leg_bias_c: c.leg_bias_c,
                leg_bias_ramp_k_per_s: c.leg_bias_ramp_k_per_s,
                manual_power_w: running.manual_power_w,
                tilt_loop: (&running.tilt_loop).into(),
                tilt_output_limit_urad: c.tilt_output_limit_urad,
                leg_loop: (&running.leg_loop).into(),
            },
            limits: ConfigLimitsWire {
                max_leg_temp_c: cfg.limits.max_leg_temp_c,
                max_total_power_w: cfg.limits.max_total_power_w,
                tilt_range_urad: cfg.limits.tilt_range_urad,
            },
            recording_enabled: cfg.recording.enabled,
            recording_flush_interval_s: cfg.recording.flush_interval_s,
            recording_segment_duration_h: cfg.recording.segment_duration_h,
            network: ConfigNetworkWire {
                bind: cfg.network.bind.to_string(),
                tls: cfg.network.tls.is_some(),
                tokens_required: cfg.network.token_file.is_some(),
                max_stream_clients: cfg.network.max_stream_clients,
                change_timeout_ms: cfg.network.change_timeout_ms,
            },
            changed_through_api: changed,
        }
    }
}

/// `PUT /v1/tilt-correction`: either axis or both; a missing axis keeps its value.
#[derive(Debug, Clone, Default, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct TiltCorrectionBody {
    /// Held correction for x, µrad.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub x_urad: Option<f64>,
    /// Held correction for y, µrad.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub y_urad: Option<f64>,
}

/// `PUT /v1/setpoint/tilt`: either axis or both; a missing axis keeps its target.
#[derive(Debug, Clone, Default, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct TiltSetpointBody {
    /// New x target, µrad.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub x_urad: Option<f64>,
    /// New y target, µrad.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub y_urad: Option<f64>,
}

/// `PUT /v1/setpoint/leg-bias`.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct LegBiasBody {
    /// New common leg temperature bias, °C.
    pub bias_c: f64,
}

/// `PUT /v1/manual-power`.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct ManualPowerBody {
    /// Heater power per leg in manual mode, W.
    pub power_w: f64,
}

/// `PUT /v1/mode`.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct ModeBody {
    /// `off`, `manual`, `temperature` or `level`.
    pub mode: String,
}

/// `PUT /v1/gains/tilt` and `PUT /v1/gains/leg`: any subset; the rest keep their values.
#[derive(Debug, Clone, Default, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
#[allow(missing_docs)]
pub struct GainsBody {
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub kp: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub ti_s: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub td_s: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub derivative_filter_s: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub setpoint_weight: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub tracking_time_s: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub slew_per_s: Option<f64>,
}

/// `POST /v1/alarms/acknowledge`: one alarm by id, or all when `id` is absent.
#[derive(Debug, Clone, Default, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct AckBody {
    /// The alarm's id; absent acknowledges every alarm.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub id: Option<String>,
}

/// The answer to an accepted change.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct ChangeReply {
    /// What was done, `old → new`.
    pub detail: String,
    /// Who asked (as written to the audit trail).
    pub by: String,
}

/// `GET /v1/health/live` and `/v1/health/ready`.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct HealthWire {
    /// `alive`, `ready` or `not_ready`.
    pub status: String,
    /// Why not ready, if not.
    pub reasons: Vec<String>,
    /// Seconds since the daemon started.
    pub uptime_s: f64,
}
