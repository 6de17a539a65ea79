//! The validated, typed configuration handed to the rest of stilt.
//!
//! Field names carry their units. Values here are already checked: finite, in range,
//! and consistent with each other (see `validate.rs` for every rule).

use std::fmt;
use std::net::SocketAddr;
use std::path::PathBuf;

use crate::materials::Material;

/// A whole validated configuration.
#[derive(Debug, Clone, PartialEq)]
pub struct Config {
    /// Human name of the stage, for summaries and file metadata.
    pub stage_name: String,
    /// The legs, in file order; at least three, not all on one line.
    pub legs: Vec<Leg>,
    /// The two-axis tiltmeter.
    pub tiltmeter: Tiltmeter,
    /// The control cascade.
    pub control: Control,
    /// Hard software limits.
    pub limits: Limits,
    /// Where and how samples are recorded.
    pub recording: Recording,
    /// The HTTP API.
    pub network: Network,
    /// The simulated stage used by `stiltd demo` and the tests.
    pub simulation: Simulation,
    /// Safety interlocks, evaluated on every tick.
    pub interlocks: Interlocks,
    /// The serial instruments (`[instruments]`), if the file describes them; required by
    /// `stiltd run`, unused by `stiltd demo`.
    pub instruments: Option<Instruments>,
    /// The exact text this configuration was read from (recorded with each run).
    pub source_text: String,
}

/// One leg of the stage, with its heater and thermometer.
#[derive(Debug, Clone, PartialEq)]
pub struct Leg {
    /// Short name (`A`, `north` …), unique.
    pub name: String,
    /// Position of the leg's top on the plate, metres from the plate's reference point.
    pub x_m: f64,
    /// See `x_m`.
    pub y_m: f64,
    /// Length of the part of the leg whose temperature is controlled, metres.
    pub length_m: f64,
    /// The leg's material and expansion coefficient.
    pub material: Material,
    /// Heater element resistance, ohm.
    pub heater_resistance_ohm: f64,
    /// Heater power limit, watts (heaters only heat: commands are clamped to 0…this).
    pub heater_max_power_w: f64,
    /// The thermometer channel that reads this leg.
    pub thermometer_channel: usize,
}

impl Leg {
    /// Leg length change per kelvin, metres per kelvin (α·L).
    pub fn expansion_m_per_k(&self) -> f64 {
        self.material.cte_per_k * self.length_m
    }
}

/// The two-axis tiltmeter and its calibration: `tilt = M · (scale ⊙ (raw − offset))`.
#[derive(Debug, Clone, PartialEq)]
pub struct Tiltmeter {
    /// Sampling rate, Hz; an integer multiple of the control rate.
    pub rate_hz: f64,
    /// Usable range, ± microradians.
    pub range_urad: f64,
    /// Per-axis scale, microradians per raw unit.
    pub scale_urad_per_unit: [f64; 2],
    /// Per-axis offset, raw units.
    pub offset_unit: [f64; 2],
    /// 2×2 matrix for axis misalignment and cross-coupling (identity when absent).
    pub cross_coupling: [[f64; 2]; 2],
}

impl Tiltmeter {
    /// Applies the calibration to one raw reading, giving microradians.
    pub fn calibrate(&self, raw: [f64; 2]) -> [f64; 2] {
        let s = [
            (raw[0] - self.offset_unit[0]) * self.scale_urad_per_unit[0],
            (raw[1] - self.offset_unit[1]) * self.scale_urad_per_unit[1],
        ];
        let m = &self.cross_coupling;
        [
            m[0][0] * s[0] + m[0][1] * s[1],
            m[1][0] * s[0] + m[1][1] * s[1],
        ]
    }
}

/// The controller's operating mode.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Mode {
    /// Heaters at zero.
    Off,
    /// Fixed heater powers.
    Manual,
    /// Inner loops hold each leg at its temperature setpoint.
    Temperature,
    /// The full cascade: tilt loops set leg temperature setpoints.
    Level,
}

impl Mode {
    /// Every mode, in the order of increasing automation.
    pub const ALL: [Mode; 4] = [Mode::Off, Mode::Manual, Mode::Temperature, Mode::Level];

    /// The configuration and API spelling.
    pub fn as_str(self) -> &'static str {
        match self {
            Mode::Off => "off",
            Mode::Manual => "manual",
            Mode::Temperature => "temperature",
            Mode::Level => "level",
        }
    }

    /// Parses the configuration and API spelling.
    pub fn parse(s: &str) -> Option<Mode> {
        Mode::ALL.into_iter().find(|m| m.as_str() == s)
    }

    /// A small integer for recording (0 off, 1 manual, 2 temperature, 3 level).
    pub fn code(self) -> u8 {
        self as u8
    }
}

impl fmt::Display for Mode {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// Gains and limits of one PID loop, in the ideal (ISA) form
/// `u = Kp·(b·r − y) + Kp/Ti ∫e dt − Kp·Td·dy_f/dt`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LoopGains {
    /// Proportional gain, in output units per input unit.
    pub kp: f64,
    /// Integral time, seconds; `None` disables integral action.
    pub ti_s: Option<f64>,
    /// Derivative time, seconds (0 disables derivative action).
    pub td_s: f64,
    /// Time constant of the first-order filter on the derivative, seconds.
    pub derivative_filter_s: f64,
    /// Setpoint weight `b` on the proportional term, 0…1.
    pub setpoint_weight: f64,
    /// Tracking time for back-calculation anti-windup, seconds.
    pub tracking_time_s: f64,
    /// Output slew limit, output units per second; `None` for no limit.
    pub slew_per_s: Option<f64>,
}

/// The control cascade.
#[derive(Debug, Clone, PartialEq)]
pub struct Control {
    /// Control tick rate, Hz.
    pub rate_hz: f64,
    /// Mode at start.
    pub mode: Mode,
    /// Tilt setpoint per axis, microradians.
    pub setpoint_urad: [f64; 2],
    /// How fast the tilt setpoint in use moves towards a new target, µrad/s.
    pub setpoint_ramp_urad_per_s: f64,
    /// Common leg temperature setpoint, °C (the bias that lets the loop push both ways).
    pub leg_bias_c: f64,
    /// Ramp limit on leg temperature setpoints, K/s.
    pub leg_bias_ramp_k_per_s: f64,
    /// Heater power in `manual` mode, watts per leg.
    pub manual_power_w: f64,
    /// Outer loops (tilt → leg temperature pattern), output in µrad of correction.
    pub tilt_loop: LoopGains,
    /// Symmetric limit on each tilt loop's output, microradians.
    pub tilt_output_limit_urad: f64,
    /// Inner loops (leg temperature → heater power), output in watts.
    pub leg_loop: LoopGains,
}

impl Control {
    /// The control period, seconds.
    pub fn period_s(&self) -> f64 {
        1.0 / self.rate_hz
    }
}

/// Software limits.
#[derive(Debug, Clone, PartialEq)]
pub struct Limits {
    /// Highest allowed leg temperature, °C.
    pub max_leg_temp_c: f64,
    /// Highest allowed sum of heater powers, watts.
    pub max_total_power_w: f64,
    /// Tilt beyond which the reading is treated as out of range, ± µrad.
    pub tilt_range_urad: f64,
}

/// Recording settings.
#[derive(Debug, Clone, PartialEq)]
pub struct Recording {
    /// Whether samples are recorded at all.
    pub enabled: bool,
    /// Folder for run segments.
    pub dir: PathBuf,
    /// Longest time between flushes that reach the disk, seconds.
    pub flush_interval_s: f64,
    /// A new segment starts after this long, hours.
    pub segment_duration_h: f64,
    /// A new segment starts when the current one reaches this size, MiB.
    pub segment_max_mib: f64,
    /// Rows buffered between the control loop and the writer before rows are dropped.
    pub queue_capacity_rows: usize,
}

/// The HTTP API.
#[derive(Debug, Clone, PartialEq)]
pub struct Network {
    /// Address and port to listen on (loopback by default).
    pub bind: SocketAddr,
    /// Serve HTTPS with this certificate and key instead of plain HTTP.
    pub tls: Option<Tls>,
    /// The access-token file (names, roles and SHA-256 hashes of the tokens). Without one,
    /// reads are open and changes are accepted only when `bind` is a loopback address.
    pub token_file: Option<PathBuf>,
    /// Most live streams served at once; further clients are told to retry later.
    pub max_stream_clients: usize,
    /// How long a change may wait for the control loop to take and answer it, ms.
    pub change_timeout_ms: u64,
}

/// Certificate and private key for HTTPS, both PEM files.
#[derive(Debug, Clone, PartialEq)]
pub struct Tls {
    /// Certificate chain, PEM, leaf first.
    pub cert_file: PathBuf,
    /// Private key, PEM (PKCS#8, PKCS#1 or SEC1).
    pub key_file: PathBuf,
}

/// Physics and disturbances of the simulated stage (invented demo values by default).
#[derive(Debug, Clone, PartialEq)]
#[allow(missing_docs)]
pub struct Simulation {
    /// Seed of the portable random generator; equal seeds give equal runs.
    pub seed: u64,
    pub ambient_mean_c: f64,
    /// Amplitude of the daily sinusoidal swing of the room air, K.
    pub ambient_daily_swing_k: f64,
    /// RMS of the slow random wander of the room air, K.
    pub ambient_walk_k: f64,
    pub ambient_walk_correlation_h: f64,
    /// Static air temperature gradient across the stage, K/m.
    pub gradient_k_per_m: [f64; 2],
    /// Amplitude of the daily part of the gradient, K/m.
    pub gradient_daily_k_per_m: [f64; 2],
    pub floor_drift_urad_per_day: [f64; 2],
    /// Amplitude of the floor's daily tilt wobble, µrad.
    pub floor_wobble_urad: [f64; 2],
    pub tilt_noise_nrad_per_sqrt_hz: f64,
    pub tilt_walk_nrad_per_sqrt_h: f64,
    pub tilt_quantum_nrad: f64,
    pub thermometer_noise_mk: f64,
    pub leg_heat_capacity_j_per_k: f64,
    pub leg_conductance_w_per_k: f64,
    pub heater_heat_capacity_j_per_k: f64,
    pub heater_coupling_w_per_k: f64,
    pub heater_loss_w_per_k: f64,
    /// Relative spread of the legs' thermal properties (0.05 = ±5 %).
    pub leg_spread_ratio: f64,
}

/// What an interlock does when it trips.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum InterlockAction {
    /// Freeze the heater outputs at their last values while the condition holds.
    Hold,
    /// Clamp the offending quantity (the leg's heater, the total power) while it holds;
    /// for conditions with nothing to clamp, the same as `hold`.
    Limit,
    /// Heaters to zero and the mode to `off`, until a person changes the mode.
    Safe,
}

impl InterlockAction {
    /// Configuration spelling.
    pub fn as_str(self) -> &'static str {
        match self {
            InterlockAction::Hold => "hold",
            InterlockAction::Limit => "limit",
            InterlockAction::Safe => "safe",
        }
    }
    /// Parses the configuration spelling.
    pub fn parse(s: &str) -> Option<Self> {
        [
            InterlockAction::Hold,
            InterlockAction::Limit,
            InterlockAction::Safe,
        ]
        .into_iter()
        .find(|a| a.as_str() == s)
    }
}

/// One interlock: its action and how many consecutive ticks the condition must hold.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct InterlockRule {
    /// What to do.
    pub action: InterlockAction,
    /// Consecutive ticks the condition must hold before it trips (≥ 1).
    pub after_ticks: u32,
}

/// Every interlock. Thresholds not listed here come from `[limits]`.
#[derive(Debug, Clone, PartialEq)]
pub struct Interlocks {
    /// A leg above `limits.max_leg_temp_c`.
    pub leg_over_temperature: InterlockRule,
    /// A heater reading back more than its maximum × `heater_over_power_margin_ratio`.
    pub heater_over_power: InterlockRule,
    /// Margin on a heater's maximum before its read-back power counts as too high.
    pub heater_over_power_margin_ratio: f64,
    /// The heaters' total above `limits.max_total_power_w`.
    pub total_power: InterlockRule,
    /// A sensor the mode needs unusable (stale, timed out, garbled, missing).
    pub sensor_stale: InterlockRule,
    /// The tilt outside ±`limits.tilt_range_urad`.
    pub tilt_out_of_range: InterlockRule,
    /// Leg thermometers spread more than `thermometer_max_spread_k` from their median.
    pub thermometer_disagreement: InterlockRule,
    /// Largest allowed distance of a leg's temperature from the legs' median, K.
    pub thermometer_max_spread_k: f64,
    /// A heater commanded ≥ `heater_open_min_power_w` that reads back less than
    /// `heater_open_min_ratio` of it.
    pub heater_open_circuit: InterlockRule,
    /// See `heater_open_circuit`.
    pub heater_open_min_ratio: f64,
    /// See `heater_open_circuit`, W.
    pub heater_open_min_power_w: f64,
    /// The control loop late for its period.
    pub loop_overrun: InterlockRule,
}

/// The serial instruments of a stage: one line each (see `[instruments]` in the template).
#[derive(Debug, Clone, PartialEq)]
pub struct Instruments {
    /// The port map file that filled in ports, if one was named.
    pub port_map: Option<PathBuf>,
    /// The two-axis tiltmeter.
    pub tiltmeter: TiltmeterLink,
    /// The leg thermometer line (Modbus RTU: one or more units, RTD channel of each leg =
    /// `legs[].thermometer_channel` on unit `thermometer.leg_units[leg]`).
    pub thermometer: ThermometerLink,
    /// The heater supply (SCPI; channel n drives leg n−1 in file order).
    pub heater: HeaterLink,
}

/// Settings every serial line shares.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct SerialLink {
    /// Device path, e.g. `/dev/serial/by-id/…` or `/dev/pts/3`.
    pub port: String,
    /// Whether `port` came from the port map (the table named none).
    pub port_from_map: bool,
    /// Baud rate.
    pub baud: u32,
    /// Character format: data bits, parity, stop bits (`parity`, `data_bits`, `stop_bits`;
    /// 8E1 by default on the Modbus line, 8N1 on the others). It also sets the Modbus
    /// silences ([`stilt_protocol::modbus::timing::silences`]).
    pub framing: stilt_protocol::modbus::timing::CharFormat,
    /// Longest wait for a complete reply, milliseconds.
    pub timeout_ms: u64,
    /// Times a failed request is sent again (0 = once only).
    pub retries: u8,
}

/// The tiltmeter's line and its configurable line protocol.
#[derive(Debug, Clone, PartialEq)]
pub struct TiltmeterLink {
    /// The serial line.
    pub link: SerialLink,
    /// Queries per second.
    pub poll_hz: f64,
    /// The line protocol: fields `x` and `y` (raw units for [`Tiltmeter::calibrate`]) and,
    /// if configured, `status`.
    pub spec: stilt_protocol::line::LineSpec,
    /// Status bits that mark a reading out of range (0 = status ignored).
    pub bad_status_mask: u32,
    /// Readings that repeat exactly for this long are stale (a stuck sensor or firmware);
    /// `None`: not checked.
    pub stuck_after_s: Option<f64>,
}

/// A platinum RTD type (IEC 60751 coefficients, R0 at 0 °C).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum RtdSensor {
    /// R0 = 100 Ω.
    Pt100,
    /// R0 = 500 Ω.
    Pt500,
    /// R0 = 1000 Ω.
    Pt1000,
}

impl RtdSensor {
    /// Every sensor, with its configuration spelling.
    pub const ALL: [(RtdSensor, &'static str); 3] = [
        (RtdSensor::Pt100, "pt100"),
        (RtdSensor::Pt500, "pt500"),
        (RtdSensor::Pt1000, "pt1000"),
    ];

    /// Resistance at 0 °C, ohm.
    pub fn r0_ohm(self) -> f64 {
        match self {
            RtdSensor::Pt100 => 100.0,
            RtdSensor::Pt500 => 500.0,
            RtdSensor::Pt1000 => 1000.0,
        }
    }

    /// The configuration spelling.
    pub fn as_str(self) -> &'static str {
        Self::ALL
            .iter()
            .find(|(s, _)| *s == self)
            .map(|(_, n)| *n)
            .unwrap_or("pt100")
    }
}

/// The leg thermometer's line.
#[derive(Debug, Clone, PartialEq)]
pub struct ThermometerLink {
    /// The serial line.
    pub link: SerialLink,
    /// The Modbus server address of legs that name none (`unit`, 1–247).
    pub unit: u8,
    /// Every unit on this line (RS-485 multi-drop), in the order they are polled
    /// (`units`; default `[unit]`). Each is read by at least one leg.
    pub units: Vec<u8>,
    /// The unit that reads each leg, in `[[legs]]` order (`legs[].thermometer_unit`, else
    /// `unit`); the leg's channel on that unit is `legs[].thermometer_channel`.
    pub leg_units: Vec<u8>,
    /// The sensors on every channel.
    pub sensor: RtdSensor,
    /// Scans read per second.
    pub poll_hz: f64,
    /// A temperature older than this is stale, seconds.
    pub stale_after_s: f64,
    /// A channel whose resistance repeats exactly for this long is stale; `None`: not checked.
    pub stuck_after_s: Option<f64>,
}

/// The heater supply's line.
#[derive(Debug, Clone, PartialEq)]
pub struct HeaterLink {
    /// The serial line.
    pub link: SerialLink,
    /// Whether each output's current is measured back after it is set.
    pub readback: bool,
    /// Largest allowed |commanded − read-back power| per leg, watts.
    pub readback_tolerance_w: f64,
}
