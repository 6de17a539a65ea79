//! The on-disk layout of a recording segment: wire row types, dataset names, the
//! `units` and `description` texts, and small helpers (FNV-1a, ISO 8601 UTC).
//!
//! This file *is* the contract described in `docs/recording.md`; change the two
//! together and bump [`LAYOUT_VERSION`] when a reader would notice.
//!
//! Main types: [`TiltWire`], [`ControlWire`], [`LegWire`], [`EventWire`],
//! [`StateWire`] (the HDF5 compound rows), and [`LayoutOptions`] (chunking and filters).

use std::str::FromStr;

use hdf5::H5Type;
use hdf5::types::{FixedUnicode, VarLenUnicode};

use crate::rows::{ControlRow, EventKind, EventRow, LegRow, LoopTerms, Quality, Stamp, TiltSample};
use stilt_config::Mode;

use super::RecordError;

/// Version of this layout, stored in the root attribute `layout_version`.
pub const LAYOUT_VERSION: u32 = 1;

/// Bytes available for an event's `source` (UTF-8, NUL-padded).
pub const SOURCE_LEN: usize = 32;
/// Bytes available for an event's `detail` (UTF-8, NUL-padded).
pub const DETAIL_LEN: usize = 256;
/// Appended to text that had to be cut to fit its fixed-size field.
pub const TRUNCATION_MARK: &str = "…";

/// Dataset of tiltmeter readings.
pub const DS_TILT: &str = "tilt";
/// Dataset of control ticks (scalar part).
pub const DS_CONTROL: &str = "control";
/// Dataset of per-leg values per control tick, shape (ticks, legs).
pub const DS_CONTROL_LEGS: &str = "control_legs";
/// Dataset of events.
pub const DS_EVENTS: &str = "events";
/// One-row dataset overwritten at every flush and at close.
pub const DS_STATE: &str = "segment_state";

/// `segment_state.state`: the writer had the segment open at its last flush.
pub const STATE_OPEN: u8 = 0;
/// `segment_state.state`: the writer closed the segment cleanly.
pub const STATE_CLOSED: u8 = 1;

/// Chunking and compression of the row datasets.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct LayoutOptions {
    /// Rows per chunk of `tilt` (48 bytes a row).
    pub tilt_chunk_rows: usize,
    /// Rows per chunk of `control` and `control_legs`.
    pub control_chunk_rows: usize,
    /// Rows per chunk of `events`.
    pub event_chunk_rows: usize,
    /// zlib level of the deflate filter, 0…9 (applied after the shuffle filter).
    pub deflate_level: u8,
}

impl Default for LayoutOptions {
    fn default() -> Self {
        // Chunks of 192 KiB (tilt), ~90 KiB (control) and ~38 KiB (events): within the
        // 64 KiB–1 MiB range the HDF5 chunk cache handles well. Level 1 is the fastest
        // deflate; on these rows it compresses almost as well as level 6 (BENCHMARKS-record.md).
        LayoutOptions {
            tilt_chunk_rows: 4096,
            control_chunk_rows: 512,
            event_chunk_rows: 128,
            deflate_level: 1,
        }
    }
}

/// One `tilt` row as stored.
#[derive(H5Type, Debug, Clone, Copy, PartialEq)]
#[repr(C)]
pub struct TiltWire {
    /// Seconds since the run started, on the run's clock.
    pub t_mono_s: f64,
    /// UTC, ns since the Unix epoch.
    pub t_utc_ns: i64,
    /// Raw reading, x axis.
    pub raw_x: f64,
    /// Raw reading, y axis.
    pub raw_y: f64,
    /// Calibrated tilt, x axis, µrad.
    pub tilt_x_urad: f64,
    /// Calibrated tilt, y axis, µrad.
    pub tilt_y_urad: f64,
    /// Quality code.
    pub quality: u8,
}

/// One `control` row as stored (the per-leg part is in [`LegWire`]).
#[derive(H5Type, Debug, Clone, Copy, PartialEq)]
#[repr(C)]
#[allow(missing_docs)] // each field is documented in CONTROL_FIELDS
pub struct ControlWire {
    pub tick: u64,
    pub t_mono_s: f64,
    pub t_utc_ns: i64,
    pub mode: u8,
    pub tilt_quality: u8,
    pub tilt_count: u32,
    pub tilt_raw_x: f64,
    pub tilt_raw_y: f64,
    pub tilt_x_urad: f64,
    pub tilt_y_urad: f64,
    pub setpoint_x_urad: f64,
    pub setpoint_y_urad: f64,
    pub target_x_urad: f64,
    pub target_y_urad: f64,
    pub x_p: f64,
    pub x_i: f64,
    pub x_d: f64,
    pub x_out: f64,
    pub y_p: f64,
    pub y_i: f64,
    pub y_d: f64,
    pub y_out: f64,
}

/// One element of `control_legs` (row = tick, column = leg).
#[derive(H5Type, Debug, Clone, Copy, PartialEq)]
#[repr(C)]
#[allow(missing_docs)] // each field is documented in LEG_FIELDS
pub struct LegWire {
    pub temp_c: f64,
    pub setpoint_c: f64,
    pub power_w: f64,
    pub drive_v: f64,
    pub p: f64,
    pub i: f64,
    pub d: f64,
    pub out_w: f64,
    pub temp_quality: u8,
}

/// One `events` row as stored.
#[derive(H5Type, Debug, Clone, PartialEq)]
#[repr(C)]
#[allow(missing_docs)] // each field is documented in EVENT_FIELDS
pub struct EventWire {
    pub t_mono_s: f64,
    pub t_utc_ns: i64,
    pub kind: u8,
    pub source: FixedUnicode<SOURCE_LEN>,
    pub detail: FixedUnicode<DETAIL_LEN>,
}

/// The single row of `segment_state`, overwritten at every flush and at close.
#[derive(H5Type, Debug, Clone, Copy, PartialEq, Default)]
#[repr(C)]
#[allow(missing_docs)] // each field is documented in STATE_FIELDS
pub struct StateWire {
    pub state: u8,
    pub tilt_rows: u64,
    pub control_rows: u64,
    pub event_rows: u64,
    pub dropped_rows_run: u64,
    pub first_utc_ns: i64,
    pub last_utc_ns: i64,
    pub updated_utc_ns: i64,
}

/// `(field, unit, description)` for one dataset.
pub type FieldDoc = (&'static str, &'static str, &'static str);

/// Fields of `tilt`.
pub const TILT_FIELDS: &[FieldDoc] = &[
    (
        "t_mono_s",
        "s",
        "time since the run started, on the run's own clock (monotonic or virtual)",
    ),
    (
        "t_utc_ns",
        "ns",
        "UTC as nanoseconds since 1970-01-01T00:00:00Z",
    ),
    ("raw_x", "instrument unit", "raw tiltmeter reading, x axis"),
    ("raw_y", "instrument unit", "raw tiltmeter reading, y axis"),
    ("tilt_x_urad", "urad", "calibrated tilt, x axis"),
    ("tilt_y_urad", "urad", "calibrated tilt, y axis"),
    ("quality", "code", QUALITY_CODES),
];

/// Fields of `control`.
pub const CONTROL_FIELDS: &[FieldDoc] = &[
    (
        "tick",
        "1",
        "control tick counter since the run started; a gap is a missed tick",
    ),
    (
        "t_mono_s",
        "s",
        "time of the tick since the run started, on the run's own clock",
    ),
    (
        "t_utc_ns",
        "ns",
        "UTC of the tick, nanoseconds since 1970-01-01T00:00:00Z",
    ),
    (
        "mode",
        "code",
        "controller mode: 0 off, 1 manual, 2 temperature, 3 level",
    ),
    ("tilt_quality", "code", QUALITY_CODES),
    (
        "tilt_count",
        "1",
        "tiltmeter readings averaged into this tick",
    ),
    (
        "tilt_raw_x",
        "instrument unit",
        "mean raw reading over the tick, x axis",
    ),
    (
        "tilt_raw_y",
        "instrument unit",
        "mean raw reading over the tick, y axis",
    ),
    (
        "tilt_x_urad",
        "urad",
        "mean calibrated tilt over the tick, x (NaN: no usable reading)",
    ),
    (
        "tilt_y_urad",
        "urad",
        "mean calibrated tilt over the tick, y (NaN: no usable reading)",
    ),
    (
        "setpoint_x_urad",
        "urad",
        "tilt setpoint in use (ramped), x",
    ),
    (
        "setpoint_y_urad",
        "urad",
        "tilt setpoint in use (ramped), y",
    ),
    (
        "target_x_urad",
        "urad",
        "tilt target the setpoint ramps towards, x",
    ),
    (
        "target_y_urad",
        "urad",
        "tilt target the setpoint ramps towards, y",
    ),
    ("x_p", "urad", "x tilt loop: proportional term"),
    ("x_i", "urad", "x tilt loop: integral term"),
    ("x_d", "urad", "x tilt loop: derivative term"),
    (
        "x_out",
        "urad",
        "x tilt loop: output (commanded correction) after limits",
    ),
    ("y_p", "urad", "y tilt loop: proportional term"),
    ("y_i", "urad", "y tilt loop: integral term"),
    ("y_d", "urad", "y tilt loop: derivative term"),
    (
        "y_out",
        "urad",
        "y tilt loop: output (commanded correction) after limits",
    ),
];

/// Fields of `control_legs`.
pub const LEG_FIELDS: &[FieldDoc] = &[
    (
        "temp_c",
        "degC",
        "measured leg temperature (NaN: no usable reading)",
    ),
    ("setpoint_c", "degC", "leg temperature setpoint in use"),
    (
        "power_w",
        "W",
        "commanded heater power, within 0 and the leg's maximum",
    ),
    ("drive_v", "V", "commanded heater drive, sqrt(P*R)"),
    ("p", "W", "leg loop: proportional term"),
    ("i", "W", "leg loop: integral term"),
    ("d", "W", "leg loop: derivative term"),
    ("out_w", "W", "leg loop: output after limits"),
    ("temp_quality", "code", QUALITY_CODES),
];

/// Fields of `events`.
pub const EVENT_FIELDS: &[FieldDoc] = &[
    (
        "t_mono_s",
        "s",
        "time since the run started, on the run's own clock",
    ),
    (
        "t_utc_ns",
        "ns",
        "UTC, nanoseconds since 1970-01-01T00:00:00Z",
    ),
    ("kind", "code", EVENT_KIND_CODES),
    (
        "source",
        "text",
        "who or what: controller, api:<user>, tiltmeter, recorder ... (UTF-8, 32 bytes, cut text ends in …)",
    ),
    (
        "detail",
        "text",
        "free text, e.g. 'level -> off' (UTF-8, 256 bytes, cut text ends in …)",
    ),
];

/// Fields of `segment_state`.
pub const STATE_FIELDS: &[FieldDoc] = &[
    (
        "state",
        "code",
        "0 open (live, or the writer died: see docs/recording.md), 1 closed cleanly",
    ),
    ("tilt_rows", "1", "rows in tilt at the last update"),
    (
        "control_rows",
        "1",
        "rows in control and control_legs at the last update",
    ),
    ("event_rows", "1", "rows in events at the last update"),
    (
        "dropped_rows_run",
        "1",
        "rows the run had dropped so far (whole run, all segments)",
    ),
    (
        "first_utc_ns",
        "ns",
        "smallest t_utc_ns of any row in this segment (0 if none)",
    ),
    (
        "last_utc_ns",
        "ns",
        "largest t_utc_ns of any row in this segment (0 if none)",
    ),
    ("updated_utc_ns", "ns", "wall-clock UTC of the last update"),
];

/// The code table of quality fields.
pub const QUALITY_CODES: &str =
    "reading quality: 0 ok, 1 stale, 2 timeout, 3 bad_frame, 4 out_of_range, 5 missing";

/// The code table of `events.kind`.
pub const EVENT_KIND_CODES: &str = "event kind: 0 run_start, 1 run_end, 2 mode, 3 setpoint, \
4 gains, 5 limit, 6 fault, 7 alarm, 8 acknowledge, 9 rotation, 10 dropped, 11 recording";

/// Summary line of each dataset's `description`.
pub const DATASET_SUMMARIES: &[(&str, &str)] = &[
    (DS_TILT, "every tiltmeter reading, in time order"),
    (
        DS_CONTROL,
        "one row per control tick: inputs, setpoints, tilt loop terms, mode",
    ),
    (
        DS_CONTROL_LEGS,
        "per-leg values per control tick; shape (ticks, legs); row i belongs to control row i; \
         column j is leg j of the root attribute leg_names",
    ),
    (
        DS_EVENTS,
        "everything that is not a sample: mode, setpoint and gain changes, faults, alarms, rotations, drops",
    ),
    (
        DS_STATE,
        "one row, overwritten at every flush and at close: row counts and whether the segment was closed cleanly",
    ),
];

/// The `units` attribute text: one `field: unit` line per field.
pub fn units_text(fields: &[FieldDoc]) -> String {
    fields
        .iter()
        .map(|(f, u, _)| format!("{f}: {u}\n"))
        .collect()
}

/// The `description` attribute text: the summary, then one `field: text` line per field.
pub fn description_text(summary: &str, fields: &[FieldDoc]) -> String {
    let mut s = format!("{summary}\n");
    for (f, _, d) in fields {
        s.push_str(&format!("{f}: {d}\n"));
    }
    s
}

/// The stored code of an event kind (see [`EVENT_KIND_CODES`]).
pub fn event_kind_code(k: EventKind) -> u8 {
    match k {
        EventKind::RunStart => 0,
        EventKind::RunEnd => 1,
        EventKind::Mode => 2,
        EventKind::Setpoint => 3,
        EventKind::Gains => 4,
        EventKind::Limit => 5,
        EventKind::Fault => 6,
        EventKind::Alarm => 7,
        EventKind::Acknowledge => 8,
        EventKind::Rotation => 9,
        EventKind::Dropped => 10,
        EventKind::Recording => 11,
    }
}

/// Inverse of [`event_kind_code`].
pub fn event_kind_from_code(c: u8) -> Option<EventKind> {
    EventKind::ALL
        .into_iter()
        .find(|k| event_kind_code(*k) == c)
}

/// Inverse of `Mode::code`.
pub fn mode_from_code(c: u8) -> Option<Mode> {
    Mode::ALL.into_iter().find(|m| m.code() == c)
}

impl From<&TiltSample> for TiltWire {
    fn from(s: &TiltSample) -> Self {
        TiltWire {
            t_mono_s: s.stamp.t_mono_s,
            t_utc_ns: s.stamp.t_utc_ns,
            raw_x: s.raw[0],
            raw_y: s.raw[1],
            tilt_x_urad: s.tilt_urad[0],
            tilt_y_urad: s.tilt_urad[1],
            quality: s.quality.code(),
        }
    }
}

fn quality(code: u8, what: &str) -> Result<Quality, RecordError> {
    Quality::from_code(code).ok_or_else(|| {
        RecordError::BadData(format!(
            "{what}: quality code {code}; allowed 0..=5 ({QUALITY_CODES})"
        ))
    })
}

impl TiltWire {
    /// Back to the domain type; fails on an unknown quality code.
    pub fn to_sample(&self) -> Result<TiltSample, RecordError> {
        Ok(TiltSample {
            stamp: Stamp {
                t_mono_s: self.t_mono_s,
                t_utc_ns: self.t_utc_ns,
            },
            raw: [self.raw_x, self.raw_y],
            tilt_urad: [self.tilt_x_urad, self.tilt_y_urad],
            quality: quality(self.quality, "tilt row")?,
        })
    }
}

impl From<&ControlRow> for ControlWire {
    fn from(r: &ControlRow) -> Self {
        let [x, y] = r.axis_terms;
        ControlWire {
            tick: r.tick,
            t_mono_s: r.stamp.t_mono_s,
            t_utc_ns: r.stamp.t_utc_ns,
            mode: r.mode.code(),
            tilt_quality: r.tilt_quality.code(),
            tilt_count: r.tilt_count,
            tilt_raw_x: r.tilt_raw[0],
            tilt_raw_y: r.tilt_raw[1],
            tilt_x_urad: r.tilt_urad[0],
            tilt_y_urad: r.tilt_urad[1],
            setpoint_x_urad: r.tilt_setpoint_urad[0],
            setpoint_y_urad: r.tilt_setpoint_urad[1],
            target_x_urad: r.tilt_target_urad[0],
            target_y_urad: r.tilt_target_urad[1],
            x_p: x.p,
            x_i: x.i,
            x_d: x.d,
            x_out: x.out,
            y_p: y.p,
            y_i: y.i,
            y_d: y.d,
            y_out: y.out,
        }
    }
}

impl LegWire {
    /// The value stored for a leg missing from a row (NaN everywhere, quality `missing`).
    pub const MISSING: LegWire = LegWire {
        temp_c: f64::NAN,
        setpoint_c: f64::NAN,
        power_w: f64::NAN,
        drive_v: f64::NAN,
        p: f64::NAN,
        i: f64::NAN,
        d: f64::NAN,
        out_w: f64::NAN,
        temp_quality: 5,
    };

    /// Back to the domain type; fails on an unknown quality code.
    pub fn to_leg(&self) -> Result<LegRow, RecordError> {
        Ok(LegRow {
            temp_c: self.temp_c,
            temp_quality: quality(self.temp_quality, "control_legs element")?,
            setpoint_c: self.setpoint_c,
            power_w: self.power_w,
            drive_v: self.drive_v,
            terms: LoopTerms {
                p: self.p,
                i: self.i,
                d: self.d,
                out: self.out_w,
            },
        })
    }
}

impl From<&LegRow> for LegWire {
    fn from(l: &LegRow) -> Self {
        LegWire {
            temp_c: l.temp_c,
            setpoint_c: l.setpoint_c,
            power_w: l.power_w,
            drive_v: l.drive_v,
            p: l.terms.p,
            i: l.terms.i,
            d: l.terms.d,
            out_w: l.terms.out,
            temp_quality: l.temp_quality.code(),
        }
    }
}

impl ControlWire {
    /// Back to the domain type, with the row's legs; fails on unknown codes.
    pub fn to_row(&self, legs: &[LegWire]) -> Result<ControlRow, RecordError> {
        let t = |p, i, d, out| LoopTerms { p, i, d, out };
        Ok(ControlRow {
            tick: self.tick,
            stamp: Stamp {
                t_mono_s: self.t_mono_s,
                t_utc_ns: self.t_utc_ns,
            },
            mode: mode_from_code(self.mode).ok_or_else(|| {
                RecordError::BadData(format!(
                    "control row {}: mode code {}; allowed 0 off, 1 manual, 2 temperature, 3 level",
                    self.tick, self.mode
                ))
            })?,
            tilt_raw: [self.tilt_raw_x, self.tilt_raw_y],
            tilt_urad: [self.tilt_x_urad, self.tilt_y_urad],
            tilt_quality: quality(self.tilt_quality, "control row")?,
            tilt_count: self.tilt_count,
            tilt_setpoint_urad: [self.setpoint_x_urad, self.setpoint_y_urad],
            tilt_target_urad: [self.target_x_urad, self.target_y_urad],
            axis_terms: [
                t(self.x_p, self.x_i, self.x_d, self.x_out),
                t(self.y_p, self.y_i, self.y_d, self.y_out),
            ],
            legs: legs.iter().map(LegWire::to_leg).collect::<Result<_, _>>()?,
        })
    }
}

/// Cuts `s` to at most `max` bytes at a character boundary; text that had to be cut
/// ends in [`TRUNCATION_MARK`]. NUL characters (which would end the string early in
/// a fixed-size HDF5 string) become U+FFFD.
pub fn fit_text(s: &str, max: usize) -> String {
    let s = if s.contains('\0') {
        s.replace('\0', "\u{fffd}")
    } else {
        s.to_owned()
    };
    if s.len() <= max {
        return s;
    }
    let mut end = max.saturating_sub(TRUNCATION_MARK.len());
    while !s.is_char_boundary(end) {
        end -= 1;
    }
    format!("{}{TRUNCATION_MARK}", &s[..end])
}

/// A fixed-size UTF-8 string holding `s`, cut with [`fit_text`] when too long.
pub fn fixed<const N: usize>(s: &str) -> FixedUnicode<N> {
    let t = fit_text(s, N);
    // Cannot fail: `fit_text` returns at most N bytes.
    FixedUnicode::<N>::from_str(&t).unwrap_or_default()
}

impl From<&EventRow> for EventWire {
    fn from(e: &EventRow) -> Self {
        EventWire {
            t_mono_s: e.stamp.t_mono_s,
            t_utc_ns: e.stamp.t_utc_ns,
            kind: event_kind_code(e.kind),
            source: fixed(&e.source),
            detail: fixed(&e.detail),
        }
    }
}

impl EventWire {
    /// Back to the domain type; fails on an unknown kind code.
    pub fn to_event(&self) -> Result<EventRow, RecordError> {
        Ok(EventRow {
            stamp: Stamp {
                t_mono_s: self.t_mono_s,
                t_utc_ns: self.t_utc_ns,
            },
            kind: event_kind_from_code(self.kind).ok_or_else(|| {
                RecordError::BadData(format!(
                    "event: kind code {}; allowed 0..=11 ({EVENT_KIND_CODES})",
                    self.kind
                ))
            })?,
            source: self.source.as_str().to_owned(),
            detail: self.detail.as_str().to_owned(),
        })
    }
}

/// A variable-length UTF-8 string for attributes (NUL becomes U+FFFD).
pub fn varlen(s: &str) -> VarLenUnicode {
    let s = s.replace('\0', "\u{fffd}");
    // Cannot fail: the only rejected input (an internal NUL) was replaced.
    VarLenUnicode::from_str(&s).unwrap_or_default()
}

/// FNV-1a, 64-bit (Fowler, Noll, Vo; offset basis 0xcbf29ce484222325, prime 2^40 + 2^8 + 0xb3).
pub fn fnv1a64(bytes: &[u8]) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for b in bytes {
        h ^= u64::from(*b);
        h = h.wrapping_mul(0x0000_0100_0000_01b3);
    }
    h
}

/// Formats UTC nanoseconds since the Unix epoch as ISO 8601 / RFC 3339,
/// `YYYY-MM-DDThh:mm:ss.nnnnnnnnnZ` (fraction omitted when `frac` is false).
pub fn iso8601_utc(t_utc_ns: i64, frac: bool) -> String {
    let secs = t_utc_ns.div_euclid(1_000_000_000);
    let nanos = t_utc_ns.rem_euclid(1_000_000_000);
    let days = secs.div_euclid(86_400);
    let sod = secs.rem_euclid(86_400);
    let (y, m, d) = civil_from_days(days);
    let (hh, mm, ss) = (sod / 3600, sod / 60 % 60, sod % 60);
    if frac {
        format!("{y:04}-{m:02}-{d:02}T{hh:02}:{mm:02}:{ss:02}.{nanos:09}Z")
    } else {
        format!("{y:04}-{m:02}-{d:02}T{hh:02}:{mm:02}:{ss:02}Z")
    }
}

/// A compact UTC stamp for file names, `YYYYMMDDThhmmssZ` (sorts by time).
pub fn compact_utc(t_utc_ns: i64) -> String {
    let s = iso8601_utc(t_utc_ns, false);
    s.chars().filter(|c| *c != '-' && *c != ':').collect()
}

/// Days since 1970-01-01 to (year, month, day) in the proleptic Gregorian calendar
/// (H. Hinnant's `civil_from_days` algorithm).
fn civil_from_days(z: i64) -> (i64, u32, u32) {
    let z = z + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z.rem_euclid(146_097);
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let y = yoe + era * 400;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = (doy - (153 * mp + 2) / 5 + 1) as u32;
    let m = if mp < 10 { mp + 3 } else { mp - 9 } as u32;
    (if m <= 2 { y + 1 } else { y }, m, d)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fnv1a64_matches_published_vectors() {
        // Test vectors of the FNV reference test suite (isthe.com/chongo/tech/comp/fnv,
        // also in draft-eastlake-fnv): "" → offset basis, "a", "foobar" (from memory).
        assert_eq!(fnv1a64(b""), 0xcbf2_9ce4_8422_2325);
        assert_eq!(fnv1a64(b"a"), 0xaf63_dc4c_8601_ec8c);
        assert_eq!(fnv1a64(b"foobar"), 0x8594_4171_f739_67e8);
    }

    #[test]
    fn iso8601_matches_gnu_date() {
        // Outside reference: GNU coreutils `date -u -d @N +%Y-%m-%dT%H:%M:%SZ`.
        for secs in [
            0i64,
            951_782_400,
            1_700_000_000,
            4_102_444_800,
            -86_401,
            1_709_164_799,
        ] {
            let out = std::process::Command::new("date")
                .args(["-u", "-d", &format!("@{secs}"), "+%Y-%m-%dT%H:%M:%SZ"])
                .output()
                .expect("run date");
            let want = String::from_utf8(out.stdout).unwrap();
            assert_eq!(
                iso8601_utc(secs * 1_000_000_000, false),
                want.trim(),
                "t = {secs}"
            );
        }
        assert_eq!(
            iso8601_utc(1_500_000_000, true),
            "1970-01-01T00:00:01.500000000Z"
        );
        assert_eq!(compact_utc(951_782_400_000_000_000), "20000229T000000Z");
    }

    #[test]
    fn text_is_cut_at_char_boundary_with_marker() {
        assert_eq!(fit_text("short", 32), "short");
        let long = "é".repeat(40); // 80 bytes
        let cut = fit_text(&long, 32);
        assert!(cut.len() <= 32 && cut.ends_with(TRUNCATION_MARK), "{cut}");
        assert_eq!(fit_text("a\0b", 32), "a\u{fffd}b");
        let f: FixedUnicode<32> = fixed(&long);
        assert_eq!(f.as_str(), cut);
    }

    #[test]
    fn codes_round_trip() {
        for k in EventKind::ALL {
            assert_eq!(event_kind_from_code(event_kind_code(k)), Some(k));
            // The documented table names each code with the kind's stable name.
            let entry = format!("{} {}", event_kind_code(k), k.as_str());
            assert!(EVENT_KIND_CODES.contains(&entry), "{entry}");
        }
        assert_eq!(event_kind_from_code(12), None);
        for m in Mode::ALL {
            assert_eq!(mode_from_code(m.code()), Some(m));
        }
        let bad = TiltWire {
            quality: 9,
            ..TiltWire::from(&sample())
        };
        let err = bad.to_sample().unwrap_err().to_string();
        assert!(err.contains("quality code 9"), "{err}");
    }

    #[test]
    fn the_contract_document_lists_every_field_with_its_unit() {
        let doc = include_str!("../../../docs/recording.md");
        for (name, fields) in [
            (DS_TILT, TILT_FIELDS),
            (DS_CONTROL, CONTROL_FIELDS),
            (DS_CONTROL_LEGS, LEG_FIELDS),
            (DS_EVENTS, EVENT_FIELDS),
            (DS_STATE, STATE_FIELDS),
        ] {
            // The section of that dataset: from its heading to the next one.
            let head = format!("### `{name}`");
            let start = doc
                .find(&head)
                .unwrap_or_else(|| panic!("no section {head}"));
            let section = &doc[start..];
            let section = &section[..section[3..].find("\n### ").map_or(section.len(), |i| i + 3)];
            for (f, u, _) in fields {
                let ok = section
                    .lines()
                    .any(|l| l.contains(&format!("`{f}`")) && l.contains(&format!("| {u} |")));
                assert!(
                    ok,
                    "docs/recording.md, {head}: no row for `{f}` with unit {u}"
                );
            }
        }
        for q in 0..=5u8 {
            let name = Quality::from_code(q).unwrap().as_str();
            assert!(QUALITY_CODES.contains(&format!("{q} {name}")));
            assert!(
                doc.contains(&format!("{q} {name}")),
                "quality code {q} {name} not in the doc"
            );
        }
        for k in EventKind::ALL {
            assert!(doc.contains(&format!("{} {}", event_kind_code(k), k.as_str())));
        }
    }

    fn sample() -> TiltSample {
        TiltSample {
            stamp: Stamp {
                t_mono_s: 1.5,
                t_utc_ns: 7,
            },
            raw: [1.0, 2.0],
            tilt_urad: [3.0, 4.0],
            quality: Quality::Stale,
        }
    }
}
