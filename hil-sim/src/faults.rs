//! The fault schedule: which instrument misbehaves how, and when (in simulated seconds).
//!
//! A scenario file is TOML of our own design: a list of `[[fault]]` tables, each with
//! `device`, `kind`, `at_s` and `duration_s` (simulated seconds from the start of the run) and
//! the fields its kind needs:
//!
//! ```toml
//! [[fault]]
//! device = "tiltmeter"     # tiltmeter | thermometer | heater
//! kind = "late_reply"
//! at_s = 30.0
//! duration_s = 10.0
//! delay_ms = 400           # wall-clock delay of every reply during the fault
//!
//! [[fault]]
//! device = "heater"
//! kind = "open_circuit"
//! at_s = 60.0
//! duration_s = 20.0
//! channel = 2              # supply channel (1-based); channel n drives leg n-1
//! ```
//!
//! | kind | devices | extra keys | effect while active |
//! | --- | --- | --- | --- |
//! | `no_reply` | all | – | requests are received and acted on, replies are lost (a broken transmit wire) |
//! | `late_reply` | all | `delay_ms` (1 to 60000) | each reply leaves `delay_ms` of wall-clock time late |
//! | `garbled` | all | `bytes` (1 to 16, default 1) | that many reply bytes get their top bit flipped (never the line terminator), so the master's decoder must reject the reply |
//! | `bad_crc` | thermometer | – | the reply's CRC is inverted |
//! | `stuck_value` | all | – | the instrument keeps reporting its last values (counters and status keep going) |
//! | `disconnect` | all | – | nothing gets through: input is discarded, nothing is sent, queued replies are dropped |
//! | `open_circuit` | heater | `channel` | that channel delivers no power and reads back 0 A |
//!
//! A thermometer fault may name one Modbus unit of the bus (`unit = 2`): then only that
//! unit's replies (or values, for `stuck_value`) are affected, and the others answer as
//! usual; without `unit` every unit is. A `disconnect` takes the whole line, so it takes no
//! `unit`; a unit the stage's bus does not hold is refused when the rig starts.
//!
//! Faults end after `duration_s`; several may overlap. Errors name the fault's index
//! (`fault[2]`, counted from 0 in file order), the key and what is allowed; parsing never panics.
//!
//! Main types: [`FaultSchedule`], [`Fault`], [`FaultKind`], [`ActiveFaults`], [`FaultError`].

use std::fmt;
use std::time::Duration;

use crate::devices::DeviceKind;

/// Longest `late_reply` delay accepted, ms.
pub const MAX_DELAY_MS: u64 = 60_000;
/// Most bytes a `garbled` fault flips per reply.
pub const MAX_GARBLED_BYTES: usize = 16;

/// What goes wrong.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FaultKind {
    /// Replies are lost; requests still act.
    NoReply,
    /// Replies leave late by this much wall-clock time.
    LateReply {
        /// The delay.
        delay: Duration,
    },
    /// This many reply bytes are corrupted.
    Garbled {
        /// Bytes flipped per reply.
        bytes: usize,
    },
    /// The thermometer's reply CRC is wrong.
    BadCrc,
    /// The instrument repeats its last values.
    StuckValue,
    /// Nothing gets through in either direction.
    Disconnect,
    /// A heater channel is open: no power, no current.
    OpenCircuit {
        /// Supply channel, 1-based.
        channel: u8,
    },
}

impl FaultKind {
    /// The kind's name in the scenario file.
    pub fn name(&self) -> &'static str {
        match self {
            FaultKind::NoReply => "no_reply",
            FaultKind::LateReply { .. } => "late_reply",
            FaultKind::Garbled { .. } => "garbled",
            FaultKind::BadCrc => "bad_crc",
            FaultKind::StuckValue => "stuck_value",
            FaultKind::Disconnect => "disconnect",
            FaultKind::OpenCircuit { .. } => "open_circuit",
        }
    }
}

/// Every kind name, for error messages.
pub const KIND_NAMES: &str =
    "no_reply, late_reply, garbled, bad_crc, stuck_value, disconnect, open_circuit";

/// One scheduled fault.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Fault {
    /// Which instrument.
    pub device: DeviceKind,
    /// What goes wrong.
    pub kind: FaultKind,
    /// Start, simulated seconds.
    pub at_s: f64,
    /// Length, simulated seconds.
    pub duration_s: f64,
    /// On the thermometer bus: only this Modbus unit is affected (`unit = N`); `None`: every
    /// unit on the line.
    pub unit: Option<u8>,
}

impl Fault {
    /// True while the fault is active at simulated time `t_s` (start included, end excluded).
    pub fn is_active(&self, t_s: f64) -> bool {
        t_s >= self.at_s && t_s < self.at_s + self.duration_s
    }
}

/// A problem in a scenario file.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct FaultError {
    /// Where the text came from.
    pub origin: String,
    /// The fault's index in file order (from 0), if the problem is inside one.
    pub index: Option<usize>,
    /// The key, if the problem is with one key.
    pub key: String,
    /// What is wrong.
    pub problem: String,
    /// What is allowed.
    pub allowed: String,
}

impl fmt::Display for FaultError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}: ", self.origin)?;
        match (self.index, self.key.is_empty()) {
            (Some(i), false) => write!(f, "`fault[{i}].{}`: ", self.key)?,
            (Some(i), true) => write!(f, "`fault[{i}]`: ")?,
            (None, false) => write!(f, "`{}`: ", self.key)?,
            (None, true) => {}
        }
        write!(f, "{} (allowed: {})", self.problem, self.allowed)
    }
}

impl std::error::Error for FaultError {}

/// Which faults act on one device at one moment, merged.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct ActiveFaults {
    /// Replies are lost.
    pub no_reply: bool,
    /// Nothing gets through.
    pub disconnect: bool,
    /// The longest active reply delay.
    pub delay: Option<Duration>,
    /// The most bytes to garble.
    pub garble_bytes: Option<usize>,
    /// The CRC is to be inverted.
    pub bad_crc: bool,
    /// Values are frozen.
    pub stuck: bool,
    /// Open heater channels (1-based).
    pub open_channels: Vec<u8>,
}

/// The whole schedule.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct FaultSchedule {
    faults: Vec<Fault>,
}

impl FaultSchedule {
    /// A schedule from faults already built (tests, demos).
    pub fn new(faults: Vec<Fault>) -> Self {
        FaultSchedule { faults }
    }

    /// The faults in file order.
    pub fn faults(&self) -> &[Fault] {
        &self.faults
    }

    /// Parses a scenario file. `origin` names it in errors.
    pub fn parse(text: &str, origin: &str) -> Result<FaultSchedule, FaultError> {
        let err = |index, key: &str, problem: String, allowed: &str| FaultError {
            origin: origin.to_owned(),
            index,
            key: key.to_owned(),
            problem,
            allowed: allowed.to_owned(),
        };
        let table: toml::Table = toml::from_str(text).map_err(|e| {
            err(
                None,
                "",
                format!("not valid TOML: {}", e.to_string().trim()),
                "TOML with a list of [[fault]] tables",
            )
        })?;
        let mut faults = Vec::new();
        for (key, value) in &table {
            if key != "fault" {
                return Err(err(
                    None,
                    key,
                    "unknown top-level key".into(),
                    "only [[fault]] tables",
                ));
            }
            let toml::Value::Array(list) = value else {
                return Err(err(
                    None,
                    key,
                    "must be a list of tables".into(),
                    "[[fault]] tables",
                ));
            };
            for (i, item) in list.iter().enumerate() {
                let toml::Value::Table(t) = item else {
                    return Err(err(Some(i), "", "not a table".into(), "a [[fault]] table"));
                };
                faults.push(parse_fault(t, i, &err)?);
            }
        }
        Ok(FaultSchedule { faults })
    }

    /// Checks that every fault's `unit` is one the thermometer bus holds.
    pub fn check_units(&self, units: &[u8], origin: &str) -> Result<(), FaultError> {
        for (i, f) in self.faults.iter().enumerate() {
            if let Some(u) = f.unit
                && !units.contains(&u)
            {
                let list: Vec<String> = units.iter().map(u8::to_string).collect();
                return Err(FaultError {
                    origin: origin.to_owned(),
                    index: Some(i),
                    key: "unit".into(),
                    problem: format!("unit {u} is not on this stage's thermometer bus"),
                    allowed: format!("one of {}", list.join(", ")),
                });
            }
        }
        Ok(())
    }

    /// Checks heater channels against the supply's channel count.
    pub fn check_heater_channels(&self, channels: u8, origin: &str) -> Result<(), FaultError> {
        for (i, f) in self.faults.iter().enumerate() {
            if let FaultKind::OpenCircuit { channel } = f.kind
                && !(1..=channels).contains(&channel)
            {
                return Err(FaultError {
                    origin: origin.to_owned(),
                    index: Some(i),
                    key: "channel".into(),
                    problem: format!("channel {channel} does not exist on this stage's supply"),
                    allowed: format!("1 to {channels} (one channel per leg)"),
                });
            }
        }
        Ok(())
    }

    /// The merged faults acting on `device` at simulated time `t_s` (on the thermometer:
    /// only those for every unit).
    pub fn active(&self, device: DeviceKind, t_s: f64) -> ActiveFaults {
        self.active_for(device, None, t_s)
    }

    /// The merged faults acting on `device` at `t_s` for Modbus unit `unit` (faults for every
    /// unit and those naming this one); `None`: only faults for every unit.
    pub fn active_for(&self, device: DeviceKind, unit: Option<u8>, t_s: f64) -> ActiveFaults {
        let mut a = ActiveFaults::default();
        for f in self.faults.iter().filter(|f| {
            f.device == device && f.is_active(t_s) && (f.unit.is_none() || f.unit == unit)
        }) {
            match f.kind {
                FaultKind::NoReply => a.no_reply = true,
                FaultKind::LateReply { delay } => a.delay = a.delay.max(Some(delay)),
                FaultKind::Garbled { bytes } => a.garble_bytes = a.garble_bytes.max(Some(bytes)),
                FaultKind::BadCrc => a.bad_crc = true,
                FaultKind::StuckValue => a.stuck = true,
                FaultKind::Disconnect => a.disconnect = true,
                FaultKind::OpenCircuit { channel } => {
                    if !a.open_channels.contains(&channel) {
                        a.open_channels.push(channel);
                    }
                }
            }
        }
        a
    }

    /// The first start or end of any fault strictly after `t_s`, if any.
    pub fn next_change_after(&self, t_s: f64) -> Option<f64> {
        self.faults
            .iter()
            .flat_map(|f| [f.at_s, f.at_s + f.duration_s])
            .filter(|&c| c > t_s)
            .min_by(f64::total_cmp)
    }
}

type ErrFn<'a> = dyn Fn(Option<usize>, &str, String, &str) -> FaultError + 'a;

fn parse_fault(t: &toml::Table, i: usize, err: &ErrFn<'_>) -> Result<Fault, FaultError> {
    let ix = Some(i);
    let string = |key: &str, allowed: &str| -> Result<String, FaultError> {
        match t.get(key) {
            Some(toml::Value::String(s)) => Ok(s.clone()),
            Some(v) => Err(err(ix, key, format!("{v} is not a string"), allowed)),
            None => Err(err(ix, key, "missing".into(), allowed)),
        }
    };
    let number = |key: &str, allowed: &str| -> Result<Option<f64>, FaultError> {
        match t.get(key) {
            Some(toml::Value::Float(x)) => Ok(Some(*x)),
            Some(toml::Value::Integer(n)) => Ok(Some(*n as f64)),
            Some(v) => Err(err(ix, key, format!("{v} is not a number"), allowed)),
            None => Ok(None),
        }
    };
    let integer = |key: &str, lo: i64, hi: i64, allowed: &str| -> Result<Option<i64>, FaultError> {
        match t.get(key) {
            Some(toml::Value::Integer(n)) if (lo..=hi).contains(n) => Ok(Some(*n)),
            Some(v) => Err(err(ix, key, format!("{v} is out of range"), allowed)),
            None => Ok(None),
        }
    };
    let device_name = string("device", "tiltmeter, thermometer or heater")?;
    let device = DeviceKind::from_name(&device_name).ok_or_else(|| {
        err(
            ix,
            "device",
            format!("\"{device_name}\" is not an instrument"),
            "tiltmeter, thermometer or heater",
        )
    })?;
    let kind_name = string("kind", KIND_NAMES)?;
    let at_s = number("at_s", "a finite number of simulated seconds ≥ 0")?
        .ok_or_else(|| err(ix, "at_s", "missing".into(), "simulated seconds ≥ 0"))?;
    if !(at_s.is_finite() && at_s >= 0.0) {
        return Err(err(
            ix,
            "at_s",
            format!("{at_s} is not a start time"),
            "a finite number of simulated seconds ≥ 0",
        ));
    }
    let duration_s = number("duration_s", "simulated seconds > 0")?
        .ok_or_else(|| err(ix, "duration_s", "missing".into(), "simulated seconds > 0"))?;
    if !(duration_s.is_finite() && duration_s > 0.0) {
        return Err(err(
            ix,
            "duration_s",
            format!("{duration_s} is not a duration"),
            "a finite number of simulated seconds > 0",
        ));
    }
    let delay_allowed = "an integer number of milliseconds from 1 to 60000";
    let bytes_allowed = "an integer from 1 to 16";
    let channel_allowed = "an integer supply channel from 1 to 8";
    let (kind, extra): (FaultKind, &[&str]) = match kind_name.as_str() {
        "no_reply" => (FaultKind::NoReply, &[]),
        "late_reply" => {
            let ms = integer("delay_ms", 1, MAX_DELAY_MS as i64, delay_allowed)?
                .ok_or_else(|| err(ix, "delay_ms", "missing".into(), delay_allowed))?;
            (
                FaultKind::LateReply {
                    delay: Duration::from_millis(ms as u64),
                },
                &["delay_ms"],
            )
        }
        "garbled" => {
            let n = integer("bytes", 1, MAX_GARBLED_BYTES as i64, bytes_allowed)?.unwrap_or(1);
            (FaultKind::Garbled { bytes: n as usize }, &["bytes"])
        }
        "bad_crc" => (FaultKind::BadCrc, &[]),
        "stuck_value" => (FaultKind::StuckValue, &[]),
        "disconnect" => (FaultKind::Disconnect, &[]),
        "open_circuit" => {
            let c = integer("channel", 1, 8, channel_allowed)?
                .ok_or_else(|| err(ix, "channel", "missing".into(), channel_allowed))?;
            (FaultKind::OpenCircuit { channel: c as u8 }, &["channel"])
        }
        other => {
            return Err(err(
                ix,
                "kind",
                format!("\"{other}\" is not a fault kind"),
                KIND_NAMES,
            ));
        }
    };
    match (kind, device) {
        (FaultKind::BadCrc, d) if d != DeviceKind::Thermometer => {
            return Err(err(
                ix,
                "kind",
                format!("bad_crc does not apply to the {}", d.name()),
                "bad_crc only with device = \"thermometer\" (the only CRC-checked line)",
            ));
        }
        (FaultKind::OpenCircuit { .. }, d) if d != DeviceKind::Heater => {
            return Err(err(
                ix,
                "kind",
                format!("open_circuit does not apply to the {}", d.name()),
                "open_circuit only with device = \"heater\"",
            ));
        }
        _ => {}
    }
    let unit_allowed = "a Modbus unit address from 1 to 247 on the thermometer bus";
    let unit = integer("unit", 1, 247, unit_allowed)?.map(|u| u as u8);
    if unit.is_some() {
        if device != DeviceKind::Thermometer {
            return Err(err(
                ix,
                "unit",
                format!("the {} has no units", device.name()),
                "unit only with device = \"thermometer\"",
            ));
        }
        if kind == FaultKind::Disconnect {
            return Err(err(
                ix,
                "unit",
                "a disconnect takes the whole line, not one unit".into(),
                "no unit with kind = \"disconnect\" (use no_reply for one silent unit)",
            ));
        }
    }
    for key in t.keys() {
        let common = ["device", "kind", "at_s", "duration_s", "unit"];
        if !common.contains(&key.as_str()) && !extra.contains(&key.as_str()) {
            let mut allowed = common.join(", ");
            for e in extra {
                allowed.push_str(", ");
                allowed.push_str(e);
            }
            return Err(err(
                ix,
                key,
                format!("unknown key for kind {}", kind.name()),
                &allowed,
            ));
        }
    }
    Ok(Fault {
        device,
        kind,
        at_s,
        duration_s,
        unit,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parse(text: &str) -> Result<FaultSchedule, FaultError> {
        FaultSchedule::parse(text, "test.toml")
    }

    #[test]
    fn parses_every_kind() {
        let s = parse(
            r#"
            [[fault]]
            device = "tiltmeter"
            kind = "no_reply"
            at_s = 1
            duration_s = 2.5
            [[fault]]
            device = "tiltmeter"
            kind = "late_reply"
            at_s = 0
            duration_s = 10
            delay_ms = 300
            [[fault]]
            device = "heater"
            kind = "garbled"
            at_s = 0
            duration_s = 1
            bytes = 3
            [[fault]]
            device = "thermometer"
            kind = "bad_crc"
            at_s = 5
            duration_s = 1
            [[fault]]
            device = "thermometer"
            kind = "stuck_value"
            at_s = 5
            duration_s = 1
            [[fault]]
            device = "heater"
            kind = "disconnect"
            at_s = 5
            duration_s = 1
            [[fault]]
            device = "heater"
            kind = "open_circuit"
            at_s = 2
            duration_s = 1
            channel = 3
            "#,
        )
        .unwrap();
        let kinds: Vec<_> = s.faults().iter().map(|f| f.kind.name()).collect();
        assert_eq!(
            kinds.join(", "),
            KIND_NAMES,
            "every kind parsed, in file order"
        );
        assert_eq!(
            s.faults()[1].kind,
            FaultKind::LateReply {
                delay: Duration::from_millis(300)
            }
        );
        let a = s.active(DeviceKind::Tiltmeter, 1.0);
        assert!(a.no_reply && a.delay == Some(Duration::from_millis(300)));
        // The end is excluded.
        assert!(!s.active(DeviceKind::Tiltmeter, 3.5).no_reply);
        assert_eq!(s.active(DeviceKind::Heater, 2.0).open_channels, vec![3]);
        assert_eq!(s.active(DeviceKind::Heater, 0.5).garble_bytes, Some(3));
        assert_eq!(s.next_change_after(3.0), Some(3.5));
        assert_eq!(s.next_change_after(10.0), None);
        assert!(s.check_heater_channels(3, "x").is_ok());
        let e = s.check_heater_channels(2, "x").unwrap_err();
        assert_eq!((e.index, e.key.as_str()), (Some(6), "channel"));
    }

    #[test]
    fn the_shipped_scenario_parses_and_uses_every_kind() {
        let text = include_str!("../scenarios/every-fault.toml");
        let s = parse(text).unwrap();
        let mut kinds: Vec<_> = s.faults().iter().map(|f| f.kind.name()).collect();
        kinds.sort_unstable();
        let mut all: Vec<_> = KIND_NAMES.split(", ").collect();
        all.sort_unstable();
        assert_eq!(kinds, all);
        assert!(
            s.check_heater_channels(3, "demo").is_ok(),
            "the demo has 3 legs"
        );
    }

    #[test]
    fn empty_file_is_an_empty_schedule() {
        assert!(parse("").unwrap().faults().is_empty());
    }

    #[test]
    fn errors_name_index_key_and_what_is_allowed() {
        let base =
            "[[fault]]\ndevice = \"tiltmeter\"\nkind = \"no_reply\"\nat_s = 0\nduration_s = 1\n";
        let cases: &[(&str, usize, &str, &str)] = &[
            ("kind = \"melt\"", 1, "kind", "no_reply"),
            ("device = \"toaster\"", 1, "device", "thermometer"),
            ("kind = \"late_reply\"", 1, "delay_ms", "60000"),
            (
                "kind = \"late_reply\"\ndelay_ms = 0",
                1,
                "delay_ms",
                "60000",
            ),
            ("kind = \"bad_crc\"", 1, "kind", "thermometer"),
            ("kind = \"open_circuit\"\nchannel = 1", 1, "kind", "heater"),
            ("duration_s = -1.0", 1, "duration_s", "> 0"),
            ("at_s = nan", 1, "at_s", "≥ 0"),
            ("at_s = \"soon\"", 1, "at_s", "seconds"),
            ("colour = 3", 1, "colour", "duration_s"),
            ("kind = \"garbled\"\nbytes = 99", 1, "bytes", "1 to 16"),
            ("unit = 2", 1, "unit", "thermometer"),
            ("device = \"thermometer\"\nunit = 0", 1, "unit", "1 to 247"),
            (
                "device = \"thermometer\"\nkind = \"disconnect\"\nunit = 2",
                1,
                "unit",
                "no_reply",
            ),
        ];
        for (extra, index, key, allowed) in cases {
            // The second fault is the broken one: a base fault, then the base with `extra`
            // overriding (a TOML table may not repeat a key, so rebuild it).
            let mut t: toml::Table = toml::from_str(base).unwrap();
            let fault = t["fault"].as_array().unwrap()[0].clone();
            let mut broken = fault.as_table().unwrap().clone();
            let patch: toml::Table = toml::from_str(extra).unwrap();
            broken.extend(patch);
            t.insert(
                "fault".into(),
                toml::Value::Array(vec![fault, toml::Value::Table(broken)]),
            );
            let text = toml::to_string(&t).unwrap();
            let e = parse(&text).unwrap_err();
            assert_eq!(e.index, Some(*index), "{extra}: {e}");
            assert_eq!(e.key, *key, "{extra}: {e}");
            assert!(e.allowed.contains(allowed), "{extra}: {e}");
            let shown = e.to_string();
            assert!(shown.contains(&format!("fault[{index}].{key}")), "{shown}");
        }
    }

    #[test]
    fn a_thermometer_fault_can_target_one_unit() {
        let s = parse(
            "[[fault]]\ndevice = \"thermometer\"\nkind = \"no_reply\"\nat_s = 1\nduration_s = 2\nunit = 2\n\
             [[fault]]\ndevice = \"thermometer\"\nkind = \"bad_crc\"\nat_s = 5\nduration_s = 1\n",
        )
        .unwrap();
        assert_eq!(s.faults()[0].unit, Some(2));
        assert_eq!(s.faults()[1].unit, None);
        let th = DeviceKind::Thermometer;
        assert!(s.active_for(th, Some(2), 1.5).no_reply);
        assert!(!s.active_for(th, Some(1), 1.5).no_reply);
        assert!(
            !s.active(th, 1.5).no_reply,
            "a unit's fault is not the line's"
        );
        // A fault without a unit acts on every unit.
        assert!(s.active_for(th, Some(1), 5.5).bad_crc && s.active_for(th, Some(2), 5.5).bad_crc);
        assert!(s.check_units(&[1, 2], "t").is_ok());
        let e = s.check_units(&[1, 3], "t").unwrap_err();
        assert_eq!((e.index, e.key.as_str()), (Some(0), "unit"));
        assert!(e.allowed.contains("1, 3"), "{e}");
    }

    #[test]
    fn file_level_errors() {
        assert!(parse("[[fault]\n").unwrap_err().problem.contains("TOML"));
        assert_eq!(parse("speed = 3").unwrap_err().key, "speed");
        assert_eq!(parse("fault = 3").unwrap_err().key, "fault");
        assert_eq!(parse("fault = [1]").unwrap_err().index, Some(0));
    }
}
