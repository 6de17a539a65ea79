//! Validation of `[instruments]`: the serial lines of a real stage, and the port map file
//! that fills them in (the HIL simulator writes one).
//!
//! Precedence for a port, a baud rate or the thermometer's unit: the key in the
//! instrument's own table, then the port map, then (baud and unit only) the default.
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

/// The shared serial keys of one instrument table.
#[allow(clippy::too_many_arguments)]
fn link(
    v: &mut V<'_>,
    table: &str,
    port: Option<String>,
    map_port: Option<String>,
    baud: Option<i64>,
    map_baud: Option<i64>,
    default_baud: i64,
    timeout_ms: Option<i64>,
    default_timeout_ms: i64,
    retries: Option<i64>,
) -> Option<SerialLink> {
    let key = |k: &str| format!("instruments.{table}.{k}");
    let port = match port.or(map_port) {
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
        baud.or(map_baud),
        Some(default_baud),
        BAUD.0,
        BAUD.1,
    );
    let timeout = v.int(
        &key("timeout_ms"),
        timeout_ms,
        Some(default_timeout_ms),
        1,
        60_000,
    );
    let retries = v.int(&key("retries"), retries, Some(1), 0, 10);
    Some(SerialLink {
        port: port?,
        baud: baud? as u32,
        timeout_ms: timeout? as u64,
        retries: retries? as u8,
    })
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
        t.port,
        map.tiltmeter.clone(),
        t.baud,
        map.tiltmeter_baud,
        115_200,
        t.timeout_ms,
        100,
        t.retries,
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
    Some(TiltmeterLink {
        link: link?,
        poll_hz: poll?,
        spec: spec?,
        bad_status_mask: mask? as u32,
    })
}

fn thermometer(
    v: &mut V<'_>,
    t: RawThermometerLink,
    map: &PortMap,
    legs: Option<&[Leg]>,
) -> Option<ThermometerLink> {
    let link = link(
        v,
        "thermometer",
        t.port,
        map.thermometer.clone(),
        t.baud,
        map.thermometer_baud,
        19_200,
        t.timeout_ms,
        200,
        t.retries,
    );
    let unit = v.int(
        "instruments.thermometer.unit",
        t.unit.or(map.thermometer_unit),
        Some(1),
        1,
        i64::from(stilt_protocol::modbus::MAX_UNIT),
    );
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
    Some(ThermometerLink {
        link: link?,
        unit: unit? as u8,
        sensor: sensor?,
        poll_hz: poll?,
        stale_after_s: stale?,
    })
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
        h.port,
        map.heater.clone(),
        h.baud,
        map.heater_baud,
        115_200,
        h.timeout_ms,
        200,
        h.retries,
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
    let map = match &map_path {
        Some(p) => {
            let before = v.errors.len();
            match read_port_map(p, &mut v.errors) {
                Some(m) => m,
                None => {
                    // Say where the port map was named, too.
                    if v.errors.len() > before && opts.port_map.is_none() {
                        v.err(
                            "instruments.port_map",
                            format!("the port map {} could not be used", p.display()),
                            "an existing port map file, relative to this configuration file",
                        );
                    }
                    return None;
                }
            }
        }
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
        Some(t) => thermometer(v, t, &map, legs),
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
