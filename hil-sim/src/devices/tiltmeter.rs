//! The simulated tiltmeter: answers `TLT?\r` with its latest sample.
//!
//! The protocol is our own invention ([`stilt_protocol::line::tilt`]). The instrument
//! samples at its own rate in simulated time ([`Tiltmeter::sample`], called by the rig) and
//! answers each query at once with the latest sample, as a free-running sensor with a
//! reply buffer does. Any other command gets `E,1\r\n`. Tilt beyond the format's ±999.99999
//! µrad (or flagged out of range by the stage) is clamped and sets status bit 0; the
//! sensor's temperature field is the air temperature at the stage's centre, clamped to the
//! format's −40 to 85 °C. A stuck sensor ([`Tiltmeter::set_stuck`]) keeps its last sample.
//!
//! Main type: [`Tiltmeter`].

use stilt_protocol::line::tilt::{
    self, MAX_COMMAND_LEN, MAX_RAW, RAW_PER_URAD, STATUS_OUT_OF_RANGE, TiltCommand, TiltSample,
};

use crate::TiltReading;

/// Largest tilt the format carries, µrad.
pub const MAX_URAD: f64 = MAX_RAW / RAW_PER_URAD;

/// Counters of what the tiltmeter received.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct TiltCounters {
    /// `TLT?` queries answered.
    pub queries: u64,
    /// Unknown commands (answered `E,1`).
    pub unknown: u64,
    /// Samples taken.
    pub samples: u64,
}

/// The device side of the tiltmeter.
#[derive(Debug, Clone)]
pub struct Tiltmeter {
    rx: Vec<u8>,
    latest: TiltSample,
    stuck: bool,
    counters: TiltCounters,
}

impl Default for Tiltmeter {
    fn default() -> Self {
        Self::new()
    }
}

impl Tiltmeter {
    /// A tiltmeter whose first sample is not taken yet (it reports 0, 0 with the settling bit).
    pub fn new() -> Self {
        Tiltmeter {
            rx: Vec::with_capacity(MAX_COMMAND_LEN + 2),
            latest: TiltSample {
                x_urad: 0.0,
                y_urad: 0.0,
                temperature_c: 20.0,
                status: tilt::STATUS_SETTLING,
            },
            stuck: false,
            counters: TiltCounters::default(),
        }
    }

    /// Takes one sample from the stage's reading and the sensor's temperature.
    /// Ignored while stuck (the sensor repeats its last sample).
    pub fn sample(&mut self, reading: TiltReading, temperature_c: f64) {
        self.counters.samples += 1;
        if self.stuck {
            return;
        }
        let mut status = 0;
        if !reading.in_range {
            status |= STATUS_OUT_OF_RANGE;
        }
        let mut clamp = |v: f64| {
            if !v.is_finite() {
                status |= STATUS_OUT_OF_RANGE;
                0.0
            } else if v.abs() > MAX_URAD {
                status |= STATUS_OUT_OF_RANGE;
                v.clamp(-MAX_URAD, MAX_URAD)
            } else {
                v
            }
        };
        let x_urad = clamp(reading.raw[0]);
        let y_urad = clamp(reading.raw[1]);
        let temperature_c = if temperature_c.is_finite() {
            temperature_c.clamp(-40.0, 85.0)
        } else {
            status |= tilt::STATUS_TEMPERATURE_FAULT;
            20.0
        };
        self.latest = TiltSample {
            x_urad,
            y_urad,
            temperature_c,
            status,
        };
    }

    /// The sample a query would get now.
    pub fn latest(&self) -> TiltSample {
        self.latest
    }

    /// Freezes (or thaws) the reported value.
    pub fn set_stuck(&mut self, stuck: bool) {
        self.stuck = stuck;
    }

    /// What the tiltmeter received so far.
    pub fn counters(&self) -> TiltCounters {
        self.counters
    }

    /// Accepts bytes from the master; appends one reply message per complete command.
    pub fn handle_bytes(&mut self, bytes: &[u8], replies: &mut Vec<Vec<u8>>) {
        self.rx.extend_from_slice(bytes);
        while let Some((cmd, used)) = tilt::decode_command(&self.rx) {
            self.rx.drain(..used);
            let mut out = Vec::with_capacity(40);
            match cmd {
                TiltCommand::Read => {
                    self.counters.queries += 1;
                    if self.latest.encode(&mut out).is_err() {
                        // Cannot happen after `sample`'s clamps; answer as a broken sensor would.
                        out.clear();
                        out.extend_from_slice(tilt::UNKNOWN_COMMAND_REPLY);
                    }
                }
                TiltCommand::Unknown(_) => {
                    self.counters.unknown += 1;
                    out.extend_from_slice(tilt::UNKNOWN_COMMAND_REPLY);
                }
            }
            replies.push(out);
        }
        // decode_command consumes overlong lines, so at most MAX_COMMAND_LEN + LFs stay;
        // a flood of bare LFs is dropped here to keep the buffer bounded.
        if self.rx.len() > 4 * MAX_COMMAND_LEN {
            self.rx.clear();
        }
    }

    /// Forgets a partial command (after a disconnect).
    pub fn reset_input(&mut self) {
        self.rx.clear();
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use stilt_protocol::line::tilt::default_spec;

    /// The master's view: decode one reply with the protocol crate's line spec.
    fn master_decode(reply: &[u8]) -> TiltSample {
        let spec = default_spec().unwrap();
        let (r, n) = spec.decode(reply).unwrap().unwrap();
        assert_eq!(n, reply.len());
        TiltSample::from_reading(&spec, &r).unwrap()
    }

    #[test]
    fn answers_queries_with_the_latest_sample() {
        let mut t = Tiltmeter::new();
        t.sample(
            TiltReading {
                raw: [12.34567, -0.5],
                in_range: true,
            },
            21.5,
        );
        let mut out = Vec::new();
        // A query split across two reads, then a second query in the same chunk.
        t.handle_bytes(b"TL", &mut out);
        assert!(out.is_empty());
        t.handle_bytes(b"T?\rtlt?\r", &mut out);
        assert_eq!(out.len(), 2);
        let s = master_decode(&out[0]);
        // 4 decimals of 0.1 µrad: resolution 1e-5 µrad.
        assert!((s.x_urad - 12.34567).abs() < 6e-6 && (s.y_urad + 0.5).abs() < 6e-6);
        assert_eq!((s.temperature_c, s.status), (21.5, 0));
        assert_eq!(t.counters().queries, 2);
    }

    #[test]
    fn unknown_commands_get_an_error_line_the_master_rejects() {
        let mut t = Tiltmeter::new();
        let mut out = Vec::new();
        t.handle_bytes(b"ZERO\r", &mut out);
        assert_eq!(out, vec![tilt::UNKNOWN_COMMAND_REPLY.to_vec()]);
        assert!(default_spec().unwrap().decode(&out[0]).is_err());
        // An overlong line is answered and the device resynchronises on the next query.
        out.clear();
        t.handle_bytes(&[b'A'; 50], &mut out);
        t.handle_bytes(b"\rTLT?\r", &mut out);
        assert_eq!(out.last().map(|r| r[0]), Some(b'T'));
        assert_eq!(t.counters().unknown, 3);
    }

    #[test]
    fn saturates_and_flags_out_of_range() {
        let mut t = Tiltmeter::new();
        t.sample(
            TiltReading {
                raw: [2000.0, -3.0],
                in_range: true,
            },
            120.0,
        );
        let mut out = Vec::new();
        t.handle_bytes(b"TLT?\r", &mut out);
        let s = master_decode(&out[0]);
        assert!((s.x_urad - MAX_URAD).abs() < 1e-9);
        assert_eq!(s.status & STATUS_OUT_OF_RANGE, STATUS_OUT_OF_RANGE);
        assert_eq!(s.temperature_c, 85.0);
    }

    #[test]
    fn stuck_sensor_repeats_itself() {
        let mut t = Tiltmeter::new();
        let r = |x| TiltReading {
            raw: [x, 0.0],
            in_range: true,
        };
        t.sample(r(1.0), 20.0);
        t.set_stuck(true);
        t.sample(r(2.0), 20.0);
        assert_eq!(t.latest().x_urad, 1.0);
        t.set_stuck(false);
        t.sample(r(3.0), 20.0);
        assert_eq!(t.latest().x_urad, 3.0);
    }
}
