//! Validation of `[instruments]`: the serial lines of a real stage, and the port map file
//! that fills them in (the HIL simulator writes one).
//!
//! Precedence for a port, a baud rate or the thermometer's unit: the key in the
//! instrument's own table, then the port map, then (baud and unit only) the default.
//! The port map's unit is not used when the table lists `units` (a bus of several units:
//! the list's first is then the default unit of legs that name none).
//!
//! Also here: each line's character format (`parity`, `data_bits`, `stop_bits`) and the
//! thermometer bus rules (unit addresses, `legs[].thermometer_unit`).
//! Errors in the port map file are located in that file.

use std::path::{Path, PathBuf};

use stilt_protocol::line::{FieldSpec, LineSpec};

use crate::errors::ConfigError;
use crate::raw::*;
use crate::spans::SpanIndex;
use crate::types::*;
use crate::validate::{V, above, between};

/// Baud rates accepted (any integer in this range; the OS refuses what the port cannot do).
const BAUD: (i64, i64) = (300, 4_000_000);

/// The port map's contents, once read.
#[derive(Default)]
struct PortMap {
    tiltmeter: Option<String>,
    thermometer: Option<String>,
    heater: Option<String>,
    tiltmeter_baud: Option<i64>,
    thermometer_baud: Option<i64>,
    heater_baud: Option<i64>,
    thermometer_unit: Option<i64>,
}

/// Reads and checks a port map file; problems become errors located in that file.
fn read_port_map(path: &Path, errors: &mut Vec<ConfigError>) -> Option<PortMap> {
    let origin = path.display().to_string();
    let text = match std::fs::read_to_string(path) {
        Ok(t) => t,
        Err(e) => {
            errors.push(ConfigError {
                origin,
                path: String::new(),
                line: 0,
                column: 0,
                found: String::new(),
                problem: format!("cannot read the port map: {e}"),
                allowed:
                    "a readable TOML file with [ports] and [serial] (the HIL simulator writes one)"
                        .into(),
            });
            return None;
        }
    };
    let spans = match SpanIndex::build(&text, &origin) {
        Ok(s) => s,
        Err(e) => {
            errors.extend(e.0);
            return None;
        }
    };
    let raw: RawPortMap = match toml::from_str(&text) {
        Ok(r) => r,
        Err(e) => {
            let span = e.span().unwrap_or(0..0);
            let path = spans.innermost_containing(&span);
            errors.push(
                spans.error_at(
                    span,
                    &path,
                    spans.found(&path),
                    e.message().trim().to_string(),
                    "[ports] tiltmeter, thermometer, heater (paths); [serial] tiltmeter_baud, \
                 thermometer_baud, heater_baud, thermometer_unit (integers)"
                        .into(),
                ),
            );
            return None;
        }
    };
    let ports = raw.ports.unwrap_or_default();
    let serial = raw.serial.unwrap_or_default();
    Some(PortMap {
        tiltmeter: ports.tiltmeter,
        thermometer: ports.thermometer,
        heater: ports.heater,
        tiltmeter_baud: serial.tiltmeter_baud,
        thermometer_baud: serial.thermometer_baud,
        heater_baud: serial.heater_baud,
        thermometer_unit: serial.thermometer_unit,
    })
}

/// The serial keys every instrument table shares, as read.
struct RawSerial {
    port: Option<String>,
    baud: Option<i64>,
    parity: Option<String>,
    data_bits: Option<i64>,
    stop_bits: Option<i64>,
    timeout_ms: Option<i64>,
    retries: Option<i64>,
}

/// Defaults and the port map's values for one line.
struct LinkDefaults {
    map_port: Option<String>,
    map_baud: Option<i64>,
    baud: i64,
    timeout_ms: i64,
    /// Modbus RTU: 8 data bits, 11-bit characters, 8E1 by default.
    modbus: bool,
}

/// The character format of one line. Modbus RTU (MODBUS over Serial Line V1.02 §2.5.1,
/// from memory) sends 11-bit characters: 1 start bit, 8 data bits, a parity bit and 1 stop
/// bit, or no parity and 2 stop bits; even parity is the default. Other formats are refused
/// on the Modbus line rather than warned about: the t1.5/t3.5 silences are defined in such
/// characters, every device sold as Modbus RTU must offer the default 8E1, and a line set
/// to the wrong format fails in ways (parity errors, frames split or merged) that are much
/// harder to read than this error. The ASCII lines default to 8N1 (common practice).
fn framing(
    v: &mut V<'_>,
    table: &str,
    raw: &RawSerial,
    modbus: bool,
) -> Option<stilt_protocol::modbus::timing::CharFormat> {
    use stilt_protocol::modbus::timing::{CharFormat, Parity};
    let key = |k: &str| format!("instruments.{table}.{k}");
    let parity = match raw.parity.as_deref() {
        None if modbus => Some(Parity::Even),
        None => Some(Parity::None),
        Some("none") => Some(Parity::None),
        Some("even") => Some(Parity::Even),
        Some("odd") => Some(Parity::Odd),
        Some(_) => {
            v.err(
                &key("parity"),
                "unknown parity",
                "\"none\", \"even\" or \"odd\"",
            );
            None
        }
    };
    let data_bits = match (modbus, raw.data_bits) {
        (true, Some(b)) if b != 8 => {
            v.err(
                &key("data_bits"),
                "Modbus RTU sends 8 data bits per character (MODBUS over Serial Line §2.5.1)",
                "8",
            );
            None
        }
        (true, b) => b.or(Some(8)),
        (false, b) => v.int(&key("data_bits"), b, Some(8), 7, 8),
    };
    // No parity on the Modbus line takes a second stop bit (§2.5.1).
    let default_stop = if modbus && parity == Some(Parity::None) {
        2
    } else {
        1
    };
    let stop_bits = v.int(&key("stop_bits"), raw.stop_bits, Some(default_stop), 1, 2);
    let f = CharFormat {
        data_bits: data_bits? as u8,
        parity: parity?,
        stop_bits: stop_bits? as u8,
    };
    if modbus && f.bits() != 11 {
        let at = if raw.stop_bits.is_some() {
            "stop_bits"
        } else {
            "parity"
        };
        v.err(
            &key(at),
            format!(
                "{f} is a {}-bit character; Modbus RTU characters are 11 bits (MODBUS over \
                 Serial Line §2.5.1: no parity takes 2 stop bits)",
                f.bits()
            ),
            "8E1 (the default), 8O1, or parity = \"none\" with stop_bits = 2",
        );
        return None;
    }
    Some(f)
}

/// The shared serial keys of one instrument table.
fn link(v: &mut V<'_>, table: &str, raw: RawSerial, d: LinkDefaults) -> Option<SerialLink> {
    let key = |k: &str| format!("instruments.{table}.{k}");
    let framing = framing(v, table, &raw, d.modbus);
    let port_from_map = raw.port.is_none() && d.map_port.is_some();
    let port = match raw.port.or(d.map_port) {
        Some(p) if p.trim().is_empty() => {
            v.err(
                &key("port"),
                "empty port path",
                "a device path, e.g. \"/dev/ttyUSB0\"",
            );
            None
        }
        Some(p) => Some(p),
        None => {
            v.missing(
                &key("port"),
                "a device path, e.g. \"/dev/serial/by-id/…\", here or in the port map's [ports]",
            );
            None
        }
    };
    let baud = v.int(
        &key("baud"),
        raw.baud.or(d.map_baud),
        Some(d.baud),
        BAUD.0,
        BAUD.1,
    );
    let timeout = v.int(
        &key("timeout_ms"),
        raw.timeout_ms,
        Some(d.timeout_ms),
        1,
        60_000,
    );
    let retries = v.int(&key("retries"), raw.retries, Some(1), 0, 10);
    Some(SerialLink {
        port: port?,
        port_from_map,
        baud: baud? as u32,
        framing: framing?,
        timeout_ms: timeout? as u64,
        retries: retries? as u8,
    })
}

/// An optional `stuck_after_s` (absent: no check).
fn stuck_after(v: &mut V<'_>, key: &str, raw: Option<f64>) -> Option<Option<f64>> {
    match raw {
        None => Some(None),
        Some(x) => v.num(key, Some(x), None, above(0.0, 86_400.0)).map(Some),
    }
}

/// One line-protocol field; `default` is used when the table is absent.
fn field(
    v: &mut V<'_>,
    name: &str,
    raw: Option<RawLineField>,
    default: Option<FieldSpec>,
) -> Option<Option<FieldSpec>> {
    let path = format!("instruments.tiltmeter.{name}");
    let Some(f) = raw else {
        return Some(default);
    };
    let scale = v.num(
        &format!("{path}.scale"),
        f.scale,
        Some(1.0),
        between(-1e12, 1e12),
    );
    if scale == Some(0.0) {
        v.err(
            &format!("{path}.scale"),
            "a zero scale discards the value",
            "a non-zero number",
        );
    }
    let offset = v.num(
        &format!("{path}.offset"),
        f.offset,
        Some(0.0),
        between(-1e12, 1e12),
    );
    let (scale, offset) = (scale.filter(|s| *s != 0.0)?, offset?);
    let built = match (f.delimiter, f.index, f.pattern) {
        (Some(d), idx, None) => {
            let index = v.int(&format!("{path}.index"), idx, None, 0, 255)?;
            FieldSpec::delimited(name, &d, index as usize, scale, offset)
                .map_err(|e| (format!("{path}.delimiter"), e))
        }
        (None, None, Some(p)) => {
            FieldSpec::pattern(name, &p, scale, offset).map_err(|e| (format!("{path}.pattern"), e))
        }
        (None, Some(_), Some(_)) | (Some(_), _, Some(_)) => {
            v.err_table(
                &path,
                "give either `delimiter` and `index`, or `pattern`, not both",
                "delimiter = \",\" with index = N, or pattern = \"X={}\"",
            );
            return None;
        }
        (None, _, None) => {
            v.missing(
                &format!("{path}.delimiter"),
                "delimiter = \",\" with index = N (0-based), or pattern = \"X={}\"",
            );
            return None;
        }
    };
    match built {
        Ok(f) => Some(Some(f)),
        Err((key, e)) => {
            v.err(
                &key,
                e.to_string(),
                "see [instruments.tiltmeter] in the hardware template",
            );
            None
        }
    }
}

fn tiltmeter(
    v: &mut V<'_>,
    t: RawTiltmeterLink,
    map: &PortMap,
    tm: Option<&Tiltmeter>,
) -> Option<TiltmeterLink> {
    use stilt_protocol::line::tilt;
    let link = link(
        v,
        "tiltmeter",
        RawSerial {
            port: t.port,
            baud: t.baud,
            parity: t.parity,
            data_bits: t.data_bits,
            stop_bits: t.stop_bits,
            timeout_ms: t.timeout_ms,
            retries: t.retries,
        },
        LinkDefaults {
            map_port: map.tiltmeter.clone(),
            map_baud: map.tiltmeter_baud,
            baud: 115_200,
            timeout_ms: 100,
            modbus: false,
        },
    );
    let poll = v.num(
        "instruments.tiltmeter.poll_hz",
        t.poll_hz,
        tm.map(|t| t.rate_hz).or(Some(10.0)),
        above(0.0, 1000.0),
    );
    // Defaults: our own invented tiltmeter format (protocol::line::tilt), read in raw units.
    let dx = FieldSpec::delimited("x", ",", 1, 1.0, 0.0).ok();
    let dy = FieldSpec::delimited("y", ",", 2, 1.0, 0.0).ok();
    let ds = FieldSpec::delimited("status", ",", 4, 1.0, 0.0).ok();
    let custom_format = t.query.is_some() || t.reply_prefix.is_some();
    let x = field(v, "x", t.x, dx);
    let y = field(v, "y", t.y, dy);
    let status = field(
        v,
        "status",
        t.status,
        (!custom_format).then_some(ds).flatten(),
    );
    let mask = v.int(
        "instruments.tiltmeter.bad_status_mask",
        t.bad_status_mask,
        Some(i64::from(tilt::STATUS_OUT_OF_RANGE)),
        0,
        i64::from(u32::MAX),
    );
    let max_len = v.int(
        "instruments.tiltmeter.max_reply_len",
        t.max_reply_len,
        Some(64),
        1,
        stilt_protocol::line::MAX_REPLY_LEN_LIMIT as i64,
    );
    let (x, y, status, max_len) = (x??, y??, status?, max_len?);
    let mut fields = vec![x, y];
    fields.extend(status);
    let query = t.query.unwrap_or_else(|| tilt::QUERY_TEMPLATE.into());
    let term = t
        .reply_terminator
        .unwrap_or_else(|| tilt::REPLY_TERMINATOR_TEMPLATE.into());
    let prefix = t.reply_prefix.unwrap_or_else(|| {
        if custom_format {
            String::new()
        } else {
            "T,".into()
        }
    });
    let spec = LineSpec::new(&query, &term, fields)
        .map_err(|e| ("instruments.tiltmeter.query", e))
        .and_then(|s| {
            s.with_reply_prefix(&prefix)
                .map_err(|e| ("instruments.tiltmeter.reply_prefix", e))
        })
        .and_then(|s| {
            s.with_max_reply_len(max_len as usize)
                .map_err(|e| ("instruments.tiltmeter.max_reply_len", e))
        });
    let spec = match spec {
        Ok(s) => Some(s),
        Err((key, e)) => {
            // A terminator problem is reported at the terminator when it was given.
            let key = match e {
                stilt_protocol::line::SpecError::Escape {
                    what: "reply terminator",
                    ..
                }
                | stilt_protocol::line::SpecError::Empty {
                    what: "reply terminator",
                } => "instruments.tiltmeter.reply_terminator",
                _ => key,
            };
            v.err(
                key,
                e.to_string(),
                "see [instruments.tiltmeter] in the hardware template",
            );
            None
        }
    };
    let stuck = stuck_after(v, "instruments.tiltmeter.stuck_after_s", t.stuck_after_s);
    Some(TiltmeterLink {
        link: link?,
        poll_hz: poll?,
        spec: spec?,
        bad_status_mask: mask? as u32,
        stuck_after_s: stuck?,
    })
}

/// A Modbus unit address at `path`: 1 to 247 (MODBUS over Serial Line §2.2, from memory:
/// 0 is the broadcast address, which no unit answers; 248–255 are reserved).
fn unit_address(v: &mut V<'_>, path: &str, raw: i64) -> Option<u8> {
    let max = i64::from(stilt_protocol::modbus::MAX_UNIT);
    if (1..=max).contains(&raw) {
        return Some(raw as u8);
    }
    let why = if raw == 0 {
        "0 is the broadcast address, which no unit answers"
    } else {
        "not a Modbus unit address (248 to 255 are reserved)"
    };
    v.err(path, why, format!("an integer from 1 to {max}"));
    None
}

/// Checks every `legs[].thermometer_unit` given (1 to 247). `None` if any is wrong (already
/// reported); else the unit each leg names, if it names one.
pub(crate) fn leg_units(v: &mut V<'_>, raw: &[RawLeg]) -> Option<Vec<Option<u8>>> {
    let mut ok = true;
    let out = raw
        .iter()
        .enumerate()
        .map(|(i, l)| match l.thermometer_unit {
            None => None,
            Some(u) => {
                let r = unit_address(v, &format!("legs[{i}].thermometer_unit"), u);
                ok &= r.is_some();
                r
            }
        })
        .collect();
    ok.then_some(out)
}

/// `instruments.thermometer.units`: a non-empty list of distinct addresses, if given.
fn unit_list(v: &mut V<'_>, raw: Option<Vec<i64>>) -> Option<Option<Vec<u8>>> {
    let path = "instruments.thermometer.units";
    let Some(list) = raw else {
        return Some(None);
    };
    if list.is_empty() {
        v.err(
            path,
            "an empty list: the line would have no unit to read",
            "one or more unit addresses from 1 to 247, e.g. [1, 2]",
        );
        return None;
    }
    let mut out: Vec<u8> = Vec::new();
    let mut ok = true;
    for u in list {
        match unit_address(v, path, u) {
            Some(a) if out.contains(&a) => {
                v.err(
                    path,
                    format!("unit {a} is listed twice"),
                    "each unit address once",
                );
                ok = false;
            }
            Some(a) => out.push(a),
            None => ok = false,
        }
    }
    ok.then_some(Some(out))
}

fn join_units(units: &[u8]) -> String {
    units
        .iter()
        .map(u8::to_string)
        .collect::<Vec<_>>()
        .join(", ")
}

fn thermometer(
    v: &mut V<'_>,
    t: RawThermometerLink,
    map: &PortMap,
    legs: Option<&[Leg]>,
    leg_units: Option<&[Option<u8>]>,
) -> Option<ThermometerLink> {
    let link = link(
        v,
        "thermometer",
        RawSerial {
            port: t.port,
            baud: t.baud,
            parity: t.parity,
            data_bits: t.data_bits,
            stop_bits: t.stop_bits,
            timeout_ms: t.timeout_ms,
            retries: t.retries,
        },
        LinkDefaults {
            map_port: map.thermometer.clone(),
            map_baud: map.thermometer_baud,
            baud: 19_200,
            timeout_ms: 200,
            modbus: true,
        },
    );
    let listed = t.units.is_some();
    let units = unit_list(v, t.units);
    // The default unit: the key, else (when no list is given) the port map's, else the
    // list's first, else 1.
    let unit = match (t.unit, &units) {
        (Some(u), _) => unit_address(v, "instruments.thermometer.unit", u),
        (None, Some(None)) => match map.thermometer_unit {
            Some(u) => unit_address(v, "instruments.thermometer.unit", u),
            None => Some(1),
        },
        (None, Some(Some(list))) => list.first().copied(),
        (None, None) => None,
    };
    let units = match (units, unit) {
        (Some(None), Some(u)) => Some(vec![u]),
        (Some(Some(list)), Some(u)) => {
            if !list.contains(&u) {
                v.err(
                    "instruments.thermometer.unit",
                    format!("unit {u} is not in instruments.thermometer.units"),
                    format!("one of {}", join_units(&list)),
                );
                None
            } else {
                Some(list)
            }
        }
        _ => None,
    };
    let names: Vec<&str> = RtdSensor::ALL.iter().map(|(_, n)| *n).collect();
    let sensor = match t.sensor.as_deref() {
        None => Some(RtdSensor::Pt100),
        Some(s) => match RtdSensor::ALL.iter().find(|(_, n)| *n == s) {
            Some((k, _)) => Some(*k),
            None => {
                v.err(
                    "instruments.thermometer.sensor",
                    "unknown sensor",
                    names.join(", "),
                );
                None
            }
        },
    };
    let poll = v.num(
        "instruments.thermometer.poll_hz",
        t.poll_hz,
        Some(2.0),
        above(0.0, 100.0),
    );
    let stale = v.num(
        "instruments.thermometer.stale_after_s",
        t.stale_after_s,
        poll.map(|p| (3.0 / p).max(1.0)),
        above(0.0, 3600.0),
    );
    if let Some(legs) = legs {
        let max = stilt_protocol::modbus::rtd::CHANNELS as usize;
        for (i, l) in legs.iter().enumerate() {
            if l.thermometer_channel >= max {
                v.err(
                    &format!("legs[{i}].thermometer_channel"),
                    format!("the thermometer has channels 0 to {}", max - 1),
                    format!("an integer from 0 to {}", max - 1),
                );
            }
        }
    }
    let per_leg = match (legs, leg_units, &units, unit) {
        (Some(legs), Some(given), Some(units), Some(unit)) => {
            leg_unit_rules(v, legs, given, units, unit, listed)
        }
        _ => None,
    };
    let stuck = stuck_after(v, "instruments.thermometer.stuck_after_s", t.stuck_after_s);
    Some(ThermometerLink {
        link: link?,
        unit: unit?,
        units: units?,
        leg_units: per_leg?,
        sensor: sensor?,
        poll_hz: poll?,
        stale_after_s: stale?,
        stuck_after_s: stuck?,
    })
}

/// Which unit reads each leg; every leg's unit declared, every declared unit read, and no
/// two legs on one unit and channel. `listed`: whether `units` was written in the file.
fn leg_unit_rules(
    v: &mut V<'_>,
    legs: &[Leg],
    given: &[Option<u8>],
    units: &[u8],
    unit: u8,
    listed: bool,
) -> Option<Vec<u8>> {
    let mut ok = true;
    let resolved: Vec<u8> = legs
        .iter()
        .enumerate()
        .map(|(i, _)| given.get(i).copied().flatten().unwrap_or(unit))
        .collect();
    for (i, u) in resolved.iter().enumerate() {
        if !units.contains(u) {
            let allowed = if listed {
                format!(
                    "one of instruments.thermometer.units: {}",
                    join_units(units)
                )
            } else {
                format!(
                    "the line's only unit {unit}, or list every unit in instruments.thermometer.units = [..]"
                )
            };
            v.err(
                &format!("legs[{i}].thermometer_unit"),
                format!("unit {u} is not on the thermometer line"),
                allowed,
            );
            ok = false;
        }
    }
    if ok {
        for u in units {
            if !resolved.contains(u) {
                v.err(
                    "instruments.thermometer.units",
                    format!("no leg is read by unit {u}"),
                    "only units that a leg's thermometer_unit names (or the default unit)",
                );
                ok = false;
            }
        }
    }
    // Legs naming the same unit the same way were compared with the legs themselves.
    for i in 0..legs.len() {
        for j in 0..i {
            let same_spelling = given.get(i) == given.get(j);
            if !same_spelling
                && resolved[i] == resolved[j]
                && legs[i].thermometer_channel == legs[j].thermometer_channel
            {
                v.err(
                    &format!("legs[{i}].thermometer_channel"),
                    format!(
                        "unit {} channel {} is already read by legs[{j}]",
                        resolved[i], legs[i].thermometer_channel
                    ),
                    "a unit and channel no other leg uses",
                );
                ok = false;
            }
        }
    }
    ok.then_some(resolved)
}

fn heater(
    v: &mut V<'_>,
    h: RawHeaterLink,
    map: &PortMap,
    legs: Option<&[Leg]>,
) -> Option<HeaterLink> {
    let link = link(
        v,
        "heater",
        RawSerial {
            port: h.port,
            baud: h.baud,
            parity: h.parity,
            data_bits: h.data_bits,
            stop_bits: h.stop_bits,
            timeout_ms: h.timeout_ms,
            retries: h.retries,
        },
        LinkDefaults {
            map_port: map.heater.clone(),
            map_baud: map.heater_baud,
            baud: 115_200,
            timeout_ms: 200,
            modbus: false,
        },
    );
    let tol = v.num(
        "instruments.heater.readback_tolerance_w",
        h.readback_tolerance_w,
        Some(0.1),
        above(0.0, 1000.0),
    );
    if let Some(legs) = legs {
        let max = usize::from(stilt_protocol::scpi::heater::MAX_CHANNELS);
        if legs.len() > max {
            v.err_table(
                "instruments.heater",
                format!(
                    "{} legs, but the supply drives at most {max} channels",
                    legs.len()
                ),
                format!("at most {max} [[legs]]"),
            );
        }
        for (i, l) in legs.iter().enumerate() {
            let volts = (l.heater_max_power_w * l.heater_resistance_ohm).sqrt();
            if volts > stilt_protocol::scpi::heater::MAX_VOLTS {
                v.err(
                    &format!("legs[{i}].heater_max_power_w"),
                    format!(
                        "reaching it needs {volts:.1} V across {} Ω, above the supply's {} V",
                        l.heater_resistance_ohm,
                        stilt_protocol::scpi::heater::MAX_VOLTS
                    ),
                    "a power whose √(P·R) fits the supply",
                );
            }
        }
    }
    Some(HeaterLink {
        link: link?,
        readback: h.readback.unwrap_or(true),
        readback_tolerance_w: tol?,
    })
}

/// Validates `[instruments]`.
pub(crate) fn instruments(
    v: &mut V<'_>,
    raw: RawInstruments,
    tm: Option<&Tiltmeter>,
    legs: Option<&[Leg]>,
    leg_units: Option<&[Option<u8>]>,
    opts: &crate::LoadOptions,
) -> Option<Instruments> {
    let map_path: Option<PathBuf> = match (&opts.port_map, raw.port_map) {
        (Some(p), _) => Some(p.clone()),
        (None, Some(p)) if p.trim().is_empty() => {
            v.err(
                "instruments.port_map",
                "empty path",
                "a file path relative to this configuration file",
            );
            return None;
        }
        (None, Some(p)) => Some(match &opts.base_dir {
            Some(base) => base.join(&p),
            None => PathBuf::from(&p),
        }),
        (None, None) => None,
    };
    // A port map that cannot be used is reported, and the rest is still checked (without it).
    let mut map_ok = true;
    let map = match &map_path {
        Some(p) => match read_port_map(p, &mut v.errors) {
            Some(m) => m,
            None => {
                map_ok = false;
                // Say where the port map was named, too.
                if opts.port_map.is_none() {
                    v.err(
                        "instruments.port_map",
                        format!("the port map {} could not be used", p.display()),
                        "an existing port map file, relative to this configuration file",
                    );
                }
                PortMap::default()
            }
        },
        None => PortMap::default(),
    };
    let need = |v: &mut V<'_>, name: &str| {
        v.missing(
            &format!("instruments.{name}"),
            &format!("an [instruments.{name}] table (see the hardware template)"),
        )
    };
    let t = match raw.tiltmeter {
        Some(t) => tiltmeter(v, t, &map, tm),
        None => {
            need(v, "tiltmeter");
            None
        }
    };
    let th = match raw.thermometer {
        Some(t) => thermometer(v, t, &map, legs, leg_units),
        None => {
            need(v, "thermometer");
            None
        }
    };
    let h = match raw.heater {
        Some(h) => heater(v, h, &map, legs),
        None => {
            need(v, "heater");
            None
        }
    };
    let (t, th, h) = (t?, th?, h?);
    if !map_ok {
        return None;
    }
    // Ports are opened exclusively: two instruments cannot share one.
    let ports = [
        ("tiltmeter", &t.link.port),
        ("thermometer", &th.link.port),
        ("heater", &h.link.port),
    ];
    let mut ok = true;
    for i in 0..ports.len() {
        for j in 0..i {
            if ports[i].1 == ports[j].1 {
                v.err(
                    &format!("instruments.{}.port", ports[i].0),
                    format!("the same port as instruments.{}", ports[j].0),
                    "a port no other instrument uses (ports are opened exclusively)",
                );
                ok = false;
            }
        }
    }
    ok.then_some(Instruments {
        port_map: map_path,
        tiltmeter: t,
        thermometer: th,
        heater: h,
    })
}

/// The path a port map file gives for instrument `name` (`tiltmeter`, `thermometer`,
/// `heater`) now, or `None` if the file is unreadable or does not name it. Used when a
/// line is reopened: a restarted simulator writes new paths.
pub fn port_map_port(path: &Path, name: &str) -> Option<String> {
    let text = std::fs::read_to_string(path).ok()?;
    let raw: RawPortMap = toml::from_str(&text).ok()?;
    let p = raw.ports?;
    match name {
        "tiltmeter" => p.tiltmeter,
        "thermometer" => p.thermometer,
        "heater" => p.heater,
        _ => None,
    }
}
