//! OUR OWN invented tiltmeter protocol, spoken by the simulator and read through a [`LineSpec`].
//!
//! This format is invented for stilt; it copies no real instrument. The master sends the
//! query `TLT?` ended by CR; the device answers one line ended by CR LF:
//!
//! ```text
//! T,+0012.3456,-0003.2100,21.52,0\r\n
//! ```
//!
//! Fields (comma-separated): `T` (reply tag), x and y tilt in raw units of 0.1 µrad as
//! sign + 4 integer digits + 4 decimals (range ±9999.9999 raw = ±999.99999 µrad), the sensor
//! temperature in °C with 2 decimals (−40 to 85), and a status byte in decimal:
//! bit 0 = x or y at the end of range, bit 1 = settling after power-up, bit 2 = temperature
//! sensor fault (all invented). Any other command gets `E,1\r\n` (unknown command).
//!
//! [`default_spec`] reads it as `x_urad`, `y_urad` (scale 0.1), `temperature_c` and `status`.
//! Device side: [`decode_command`] and [`TiltSample::encode`].

use super::{FieldSpec, LineSpec, SpecError};

/// The query, as a template.
pub const QUERY_TEMPLATE: &str = "TLT?\\r";
/// The query bytes.
pub const QUERY: &[u8] = b"TLT?\r";
/// The reply terminator, as a template.
pub const REPLY_TERMINATOR_TEMPLATE: &str = "\\r\\n";
/// Raw units per µrad.
pub const RAW_PER_URAD: f64 = 10.0;
/// Largest raw magnitude that fits the format.
pub const MAX_RAW: f64 = 9999.9999;
/// Status bit 0: x or y at the end of range.
pub const STATUS_OUT_OF_RANGE: u8 = 1 << 0;
/// Status bit 1: settling after power-up.
pub const STATUS_SETTLING: u8 = 1 << 1;
/// Status bit 2: temperature sensor fault.
pub const STATUS_TEMPERATURE_FAULT: u8 = 1 << 2;
/// The reply to an unknown command.
pub const UNKNOWN_COMMAND_REPLY: &[u8] = b"E,1\r\n";
/// Longest command line the device buffers.
pub const MAX_COMMAND_LEN: usize = 32;

/// The [`LineSpec`] for this format. Built from constants, so it does not fail in
/// practice (a test checks it); it returns a `Result` rather than panic.
pub fn default_spec() -> Result<LineSpec, SpecError> {
    LineSpec::new(
        QUERY_TEMPLATE,
        REPLY_TERMINATOR_TEMPLATE,
        vec![
            FieldSpec::delimited("x_urad", ",", 1, 1.0 / RAW_PER_URAD, 0.0)?,
            FieldSpec::delimited("y_urad", ",", 2, 1.0 / RAW_PER_URAD, 0.0)?,
            FieldSpec::delimited("temperature_c", ",", 3, 1.0, 0.0)?,
            FieldSpec::delimited("status", ",", 4, 1.0, 0.0)?,
        ],
    )?
    .with_reply_prefix("T,")?
    .with_max_reply_len(64)
}

/// One tiltmeter sample, as the device formats it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TiltSample {
    /// x tilt in µrad.
    pub x_urad: f64,
    /// y tilt in µrad.
    pub y_urad: f64,
    /// Sensor temperature in °C.
    pub temperature_c: f64,
    /// Status bits.
    pub status: u8,
}

/// A sample that cannot be formatted.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum TiltError {
    /// A value outside the format's range.
    #[error("{what} = {value} cannot be sent: allowed {allowed}")]
    Range {
        /// Which value.
        what: &'static str,
        /// The value.
        value: f64,
        /// The allowed range.
        allowed: &'static str,
    },
}

impl TiltSample {
    /// Device side: appends the reply line. Tilt beyond the range is an error; the simulator
    /// should clamp and set [`STATUS_OUT_OF_RANGE`] itself, as a real sensor saturates.
    pub fn encode(&self, out: &mut Vec<u8>) -> Result<(), TiltError> {
        let raw = |what, v: f64| {
            let r = v * RAW_PER_URAD;
            if r.is_finite() && r.abs() <= MAX_RAW {
                Ok(r)
            } else {
                Err(TiltError::Range {
                    what,
                    value: v,
                    allowed: "-999.99999 to +999.99999 urad",
                })
            }
        };
        let x = raw("x_urad", self.x_urad)?;
        let y = raw("y_urad", self.y_urad)?;
        if !(-40.0..=85.0).contains(&self.temperature_c) {
            return Err(TiltError::Range {
                what: "temperature_c",
                value: self.temperature_c,
                allowed: "-40 to 85",
            });
        }
        let line = format!(
            "T,{x:+010.4},{y:+010.4},{:.2},{}\r\n",
            self.temperature_c, self.status
        );
        out.extend_from_slice(line.as_bytes());
        Ok(())
    }

    /// Master side: the sample from a [`LineSpec`] reading made with [`default_spec`].
    pub fn from_reading(spec: &LineSpec, reading: &super::Reading) -> Option<TiltSample> {
        let status = spec.value(reading, "status")?;
        Some(TiltSample {
            x_urad: spec.value(reading, "x_urad")?,
            y_urad: spec.value(reading, "y_urad")?,
            temperature_c: spec.value(reading, "temperature_c")?,
            status: ((0.0..=255.0).contains(&status) && status.fract() == 0.0)
                .then_some(status as u8)?,
        })
    }
}

/// A command the simulated tiltmeter received.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum TiltCommand {
    /// `TLT?`: send a sample.
    Read,
    /// Anything else (answer [`UNKNOWN_COMMAND_REPLY`]); the bytes are kept for logging.
    Unknown(Vec<u8>),
}

/// Device side: one command ended by CR (an LF before or after is ignored), from the start
/// of `buf`. A line longer than [`MAX_COMMAND_LEN`] is returned as `Unknown` with the bytes
/// consumed up to there, so the device answers and resynchronises.
pub fn decode_command(buf: &[u8]) -> Option<(TiltCommand, usize)> {
    let skip = buf.iter().take_while(|&&b| b == b'\n').count();
    let rest = &buf[skip..];
    match rest
        .iter()
        .take(MAX_COMMAND_LEN + 1)
        .position(|&b| b == b'\r')
    {
        Some(i) => {
            let cmd = &rest[..i];
            let c = if cmd.eq_ignore_ascii_case(b"TLT?") {
                TiltCommand::Read
            } else {
                TiltCommand::Unknown(cmd.to_vec())
            };
            Some((c, skip + i + 1))
        }
        None if rest.len() > MAX_COMMAND_LEN => Some((
            TiltCommand::Unknown(rest[..MAX_COMMAND_LEN].to_vec()),
            skip + MAX_COMMAND_LEN,
        )),
        None => None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    #[test]
    fn default_spec_is_valid() {
        let s = default_spec().unwrap();
        assert_eq!(s.fields().len(), 4);
        assert_eq!(s.query(), QUERY);
    }

    #[test]
    fn example_reply_decodes() {
        // The format's own example line (invented data).
        let s = default_spec().unwrap();
        let (r, n) = s
            .decode(b"T,+0012.3456,-0003.2100,21.52,0\r\n")
            .unwrap()
            .unwrap();
        assert_eq!(n, 33);
        let t = TiltSample::from_reading(&s, &r).unwrap();
        assert!((t.x_urad - 1.23456).abs() < 1e-12);
        assert!((t.y_urad + 0.32100).abs() < 1e-12);
        assert_eq!((t.temperature_c, t.status), (21.52, 0));
        assert!(s.decode(b"E,1\r\n").is_err());
    }

    #[test]
    fn encode_formats_and_checks_range() {
        let mut out = Vec::new();
        TiltSample {
            x_urad: 1.23456,
            y_urad: -0.321,
            temperature_c: 21.52,
            status: 0,
        }
        .encode(&mut out)
        .unwrap();
        assert_eq!(out, b"T,+0012.3456,-0003.2100,21.52,0\r\n");
        let bad = TiltSample {
            x_urad: 1000.0,
            y_urad: 0.0,
            temperature_c: 20.0,
            status: 0,
        };
        assert!(bad.encode(&mut out).is_err());
        let bad = TiltSample {
            x_urad: 0.0,
            temperature_c: f64::NAN,
            ..bad
        };
        assert!(bad.encode(&mut out).is_err());
    }

    #[test]
    fn device_commands() {
        assert_eq!(decode_command(b"TLT?\r"), Some((TiltCommand::Read, 5)));
        assert_eq!(decode_command(b"\ntlt?\rX"), Some((TiltCommand::Read, 6)));
        assert_eq!(decode_command(b"TLT"), None);
        assert_eq!(
            decode_command(b"FOO\r"),
            Some((TiltCommand::Unknown(b"FOO".to_vec()), 4))
        );
        let long = [b'A'; 40];
        assert_eq!(decode_command(&long).map(|(_, n)| n), Some(MAX_COMMAND_LEN));
    }

    proptest! {
        #[test]
        fn samples_round_trip(
            x in -999.99999f64..=999.99999, y in -999.99999f64..=999.99999,
            t in -40.0f64..=85.0, status in any::<u8>(),
        ) {
            let s = default_spec().unwrap();
            let mut out = Vec::new();
            TiltSample { x_urad: x, y_urad: y, temperature_c: t, status }.encode(&mut out).unwrap();
            let (r, n) = s.decode(&out).unwrap().unwrap();
            prop_assert_eq!(n, out.len());
            let back = TiltSample::from_reading(&s, &r).unwrap();
            // 4 decimals of 0.1 urad raw units: 5e-6 urad half-step; 2 decimals for temperature.
            prop_assert!((back.x_urad - x).abs() <= 5.1e-6);
            prop_assert!((back.y_urad - y).abs() <= 5.1e-6);
            prop_assert!((back.temperature_c - t).abs() <= 0.0051);
            prop_assert_eq!(back.status, status);
        }

        #[test]
        fn device_decoder_never_panics(buf in proptest::collection::vec(any::<u8>(), 0..80)) {
            if let Some((_, n)) = decode_command(&buf) {
                prop_assert!(n <= buf.len() && n > 0);
            } else {
                let rest: Vec<u8> = buf.iter().copied().skip_while(|&b| b == b'\n').collect();
                prop_assert!(rest.len() <= MAX_COMMAND_LEN && !rest.contains(&b'\r'));
            }
        }
    }
}
