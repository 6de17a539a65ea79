//! OUR OWN invented Modbus register map for a multi-channel RTD thermometer.
//!
//! This map is invented for stilt and its simulator; it copies no real instrument. Register
//! addresses are the 0-based addresses carried in the frame.
//!
//! Input registers (function 04, read-only):
//!
//! | address | content |
//! | --- | --- |
//! | `0x0000 + 2·ch`, `+1` | channel `ch` (0-based, 0..8) resistance, `u32` in units of 0.1 mΩ; high word first (big-endian word order), each word big-endian as always in Modbus; `0xFFFF_FFFF` = no valid reading |
//! | `0x0020 + ch` | channel status bits, see [`ChannelStatus`] |
//! | `0x0030` | scan counter, +1 per completed scan of all enabled channels (wraps at 65535) |
//! | `0x0040 + 3·ch`, `+1`, `+2` | channel `ch`'s scan record: its resistance (high word, low word) and its status, the same values as at `0x0000 + 2·ch` and `0x0020 + ch`, laid out so that one read returns a run of channels' readings with their status (see [`read_scan_records`]) |
//! | `0x00F0` | model code [`MODEL_CODE`] |
//! | `0x00F1` | firmware version (major·256 + minor) |
//! | `0x00F2` | number of channels |
//!
//! Holding registers (functions 03, 06, 16):
//!
//! | address | content | allowed |
//! | --- | --- | --- |
//! | `0x0000` | channel enable mask, bit `ch` enables channel `ch` | `0..=0x00FF` |
//! | `0x0001` | averaging: conversions averaged per reading | `1..=64` |
//!
//! The resistance range is 0 to [`MAX_OHMS`] (covers a Pt1000 up to +850 °C, 3904.8 Ω).
//!
//! Main items: request builders ([`read_scan_records`], [`read_resistances`], [`read_status`], [`read_scan_counter`],
//! [`read_config`], [`write_enable_mask`], [`write_averaging`], [`write_config`]) and reply
//! parsers ([`parse_scan_records`], [`parse_resistances`], [`parse_status`], [`parse_scan_counter`],
//! [`parse_config`]); device-side [`encode_resistance`] and [`scan_record_alias`].

use super::{ExceptionCode, Request, Response};

/// Number of channels in the map.
pub const CHANNELS: u8 = 8;
/// First resistance input register.
pub const RESISTANCE_BASE: u16 = 0x0000;
/// First status input register.
pub const STATUS_BASE: u16 = 0x0020;
/// Scan counter input register.
pub const SCAN_COUNTER: u16 = 0x0030;
/// First scan-record input register; channel `ch`'s record starts at `SCAN_RECORD_BASE + 3·ch`.
pub const SCAN_RECORD_BASE: u16 = 0x0040;
/// Registers per scan record: resistance high word, low word, status.
pub const SCAN_RECORD_LEN: u16 = 3;
/// Model code input register.
pub const MODEL_REGISTER: u16 = 0x00F0;
/// Firmware version input register.
pub const FIRMWARE_REGISTER: u16 = 0x00F1;
/// Channel count input register.
pub const CHANNEL_COUNT_REGISTER: u16 = 0x00F2;
/// Channel enable mask holding register.
pub const ENABLE_MASK: u16 = 0x0000;
/// Averaging holding register.
pub const AVERAGING: u16 = 0x0001;
/// Largest averaging count.
pub const MAX_AVERAGING: u16 = 64;
/// Invented model code, "ST" in ASCII.
pub const MODEL_CODE: u16 = 0x5354;
/// Resistance units per ohm (0.1 mΩ per unit).
pub const UNITS_PER_OHM: f64 = 10_000.0;
/// Largest resistance the invented instrument reports.
pub const MAX_OHMS: f64 = 5_000.0;
/// The raw value meaning "no valid reading".
pub const NO_READING: u32 = 0xFFFF_FFFF;

/// Errors of the RTD map helpers.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum RtdError {
    /// A channel range outside 0..8.
    #[error("channels {first}..{end} out of range: the map has channels 0 to 7")]
    Channels {
        /// First channel asked.
        first: u8,
        /// One past the last channel asked.
        end: u16,
    },
    /// A setting outside its allowed range.
    #[error("{what} = {value} out of range: allowed {allowed}")]
    Setting {
        /// The setting.
        what: &'static str,
        /// The value given.
        value: f64,
        /// What is allowed.
        allowed: &'static str,
    },
    /// The server answered with an exception.
    #[error("server answered exception {0}")]
    Exception(ExceptionCode),
    /// The reply does not fit the request (wrong function or count).
    #[error("reply does not match the request: expected {expected}, got {got}")]
    Mismatch {
        /// What was expected.
        expected: &'static str,
        /// What came (debug form, truncated).
        got: String,
    },
}

fn channels(first: u8, count: u8) -> Result<(), RtdError> {
    let end = u16::from(first) + u16::from(count);
    if count == 0 || end > u16::from(CHANNELS) {
        return Err(RtdError::Channels { first, end });
    }
    Ok(())
}

fn registers(resp: &Response, input: bool, n: usize) -> Result<&[u16], RtdError> {
    let values = match (resp, input) {
        (Response::ReadInputRegisters(v), true) | (Response::ReadHoldingRegisters(v), false) => v,
        (Response::Exception { code, .. }, _) => return Err(RtdError::Exception(*code)),
        (other, _) => {
            return Err(RtdError::Mismatch {
                expected: if input {
                    "input registers"
                } else {
                    "holding registers"
                },
                got: format!("{other:?}").chars().take(80).collect(),
            });
        }
    };
    if values.len() != n {
        return Err(RtdError::Mismatch {
            expected: "one register per requested value",
            got: format!("{} registers", values.len()),
        });
    }
    Ok(values)
}

/// Request for the resistances of `count` channels starting at `first`.
pub fn read_resistances(first: u8, count: u8) -> Result<Request, RtdError> {
    channels(first, count)?;
    Ok(Request::ReadInputRegisters {
        start: RESISTANCE_BASE + 2 * u16::from(first),
        count: 2 * u16::from(count),
    })
}

/// Joins a high and a low word into the raw `u32` and converts it to ohms; `None` for
/// [`NO_READING`].
pub fn decode_resistance(high: u16, low: u16) -> Option<f64> {
    let raw = (u32::from(high) << 16) | u32::from(low);
    (raw != NO_READING).then(|| f64::from(raw) / UNITS_PER_OHM)
}

/// Device side: the two registers (high word first) for `ohms`, or an error outside
/// 0..=[`MAX_OHMS`] or for non-finite input. Rounds to the nearest 0.1 mΩ.
pub fn encode_resistance(ohms: f64) -> Result<[u16; 2], RtdError> {
    if !(0.0..=MAX_OHMS).contains(&ohms) {
        return Err(RtdError::Setting {
            what: "resistance in ohms",
            value: ohms,
            allowed: "0 to 5000",
        });
    }
    let raw = (ohms * UNITS_PER_OHM).round() as u32;
    Ok([(raw >> 16) as u16, raw as u16])
}

/// Parses the reply to [`read_resistances`]`(_, count)` into ohms per channel.
pub fn parse_resistances(resp: &Response, count: u8) -> Result<Vec<Option<f64>>, RtdError> {
    let regs = registers(resp, true, 2 * usize::from(count))?;
    Ok(regs
        .chunks_exact(2)
        .map(|w| decode_resistance(w[0], w[1]))
        .collect())
}

/// A channel's status register.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct ChannelStatus(pub u16);

impl ChannelStatus {
    /// Bit 0: sensor open (no current path).
    pub const OPEN: u16 = 1 << 0;
    /// Bit 1: resistance above [`MAX_OHMS`].
    pub const OVER_RANGE: u16 = 1 << 1;
    /// Bit 2: resistance below the measurable minimum (shorted sensor).
    pub const UNDER_RANGE: u16 = 1 << 2;
    /// Bit 3: channel disabled in the enable mask.
    pub const DISABLED: u16 = 1 << 3;
    /// Bit 4: no conversion completed since enabling or a settings change.
    pub const NOT_READY: u16 = 1 << 4;

    /// Sensor open.
    pub fn open(self) -> bool {
        self.0 & Self::OPEN != 0
    }
    /// Over range.
    pub fn over_range(self) -> bool {
        self.0 & Self::OVER_RANGE != 0
    }
    /// Under range.
    pub fn under_range(self) -> bool {
        self.0 & Self::UNDER_RANGE != 0
    }
    /// Disabled.
    pub fn disabled(self) -> bool {
        self.0 & Self::DISABLED != 0
    }
    /// Not ready.
    pub fn not_ready(self) -> bool {
        self.0 & Self::NOT_READY != 0
    }
    /// True if the channel's resistance can be used (no bit set).
    pub fn is_ok(self) -> bool {
        self.0 == 0
    }
}

/// Request for the status registers of `count` channels starting at `first`.
pub fn read_status(first: u8, count: u8) -> Result<Request, RtdError> {
    channels(first, count)?;
    Ok(Request::ReadInputRegisters {
        start: STATUS_BASE + u16::from(first),
        count: u16::from(count),
    })
}

/// Parses the reply to [`read_status`]`(_, count)`.
pub fn parse_status(resp: &Response, count: u8) -> Result<Vec<ChannelStatus>, RtdError> {
    Ok(registers(resp, true, usize::from(count))?
        .iter()
        .map(|&v| ChannelStatus(v))
        .collect())
}

/// Request for the scan records of `count` channels starting at `first`: each channel's
/// resistance and status in one transaction (a poll costs the line one exchange, not two).
pub fn read_scan_records(first: u8, count: u8) -> Result<Request, RtdError> {
    channels(first, count)?;
    Ok(Request::ReadInputRegisters {
        start: SCAN_RECORD_BASE + SCAN_RECORD_LEN * u16::from(first),
        count: SCAN_RECORD_LEN * u16::from(count),
    })
}

/// Parses the reply to [`read_scan_records`]`(_, count)`: ohms (`None` for
/// [`NO_READING`]) and status per channel.
pub fn parse_scan_records(
    resp: &Response,
    count: u8,
) -> Result<Vec<(Option<f64>, ChannelStatus)>, RtdError> {
    let regs = registers(
        resp,
        true,
        usize::from(SCAN_RECORD_LEN) * usize::from(count),
    )?;
    Ok(regs
        .chunks_exact(usize::from(SCAN_RECORD_LEN))
        .map(|w| (decode_resistance(w[0], w[1]), ChannelStatus(w[2])))
        .collect())
}

/// Device side: the register a scan-record register mirrors (in the resistance or the
/// status block), or `None` outside the records.
pub fn scan_record_alias(address: u16) -> Option<u16> {
    let i = address.checked_sub(SCAN_RECORD_BASE)?;
    let (ch, field) = (i / SCAN_RECORD_LEN, i % SCAN_RECORD_LEN);
    if ch >= u16::from(CHANNELS) {
        return None;
    }
    Some(match field {
        2 => STATUS_BASE + ch,
        w => RESISTANCE_BASE + 2 * ch + w,
    })
}

/// Request for the scan counter.
pub fn read_scan_counter() -> Request {
    Request::ReadInputRegisters {
        start: SCAN_COUNTER,
        count: 1,
    }
}

/// Parses the reply to [`read_scan_counter`].
pub fn parse_scan_counter(resp: &Response) -> Result<u16, RtdError> {
    Ok(registers(resp, true, 1)?[0])
}

/// The thermometer's settings (holding registers 0 and 1).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct RtdConfig {
    /// Bit `ch` enables channel `ch`.
    pub enable_mask: u8,
    /// Conversions averaged per reading, 1 to 64.
    pub averaging: u16,
}

impl RtdConfig {
    /// Checks the averaging count.
    pub fn validate(&self) -> Result<(), RtdError> {
        if !(1..=MAX_AVERAGING).contains(&self.averaging) {
            return Err(RtdError::Setting {
                what: "averaging",
                value: f64::from(self.averaging),
                allowed: "1 to 64",
            });
        }
        Ok(())
    }

    /// Device side: validates one holding-register write (for [`super::RegisterBank::check_write`]).
    pub fn check_register(address: u16, value: u16) -> Result<(), ExceptionCode> {
        match address {
            ENABLE_MASK if value <= 0xFF => Ok(()),
            AVERAGING if (1..=MAX_AVERAGING).contains(&value) => Ok(()),
            ENABLE_MASK | AVERAGING => Err(ExceptionCode::IllegalDataValue),
            _ => Err(ExceptionCode::IllegalDataAddress),
        }
    }
}

/// Request for both settings.
pub fn read_config() -> Request {
    Request::ReadHoldingRegisters {
        start: ENABLE_MASK,
        count: 2,
    }
}

/// Parses the reply to [`read_config`].
pub fn parse_config(resp: &Response) -> Result<RtdConfig, RtdError> {
    let r = registers(resp, false, 2)?;
    let enable_mask = u8::try_from(r[0]).map_err(|_| RtdError::Setting {
        what: "enable mask",
        value: f64::from(r[0]),
        allowed: "0 to 255",
    })?;
    let cfg = RtdConfig {
        enable_mask,
        averaging: r[1],
    };
    cfg.validate()?;
    Ok(cfg)
}

/// Request writing the enable mask.
pub fn write_enable_mask(mask: u8) -> Request {
    Request::WriteSingleRegister {
        address: ENABLE_MASK,
        value: u16::from(mask),
    }
}

/// Request writing the averaging count (1 to 64).
pub fn write_averaging(n: u16) -> Result<Request, RtdError> {
    RtdConfig {
        enable_mask: 0,
        averaging: n,
    }
    .validate()?;
    Ok(Request::WriteSingleRegister {
        address: AVERAGING,
        value: n,
    })
}

/// Request writing both settings in one function-16 frame.
pub fn write_config(cfg: &RtdConfig) -> Result<Request, RtdError> {
    cfg.validate()?;
    Ok(Request::WriteMultipleRegisters {
        start: ENABLE_MASK,
        values: vec![u16::from(cfg.enable_mask), cfg.averaging],
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::modbus::{RegisterBank, decode_response, encode_request, handle_frame};
    use proptest::prelude::*;

    /// A toy device image for the tests (the simulator has its own).
    struct Dev {
        ohms: [f64; 8],
        status: [u16; 8],
        cfg: [u16; 2],
    }

    impl RegisterBank for Dev {
        fn read_holding(&self, a: u16) -> Result<u16, ExceptionCode> {
            self.cfg
                .get(usize::from(a))
                .copied()
                .ok_or(ExceptionCode::IllegalDataAddress)
        }
        fn read_input(&self, a: u16) -> Result<u16, ExceptionCode> {
            match a {
                0x00..=0x0F => {
                    let w = encode_resistance(self.ohms[usize::from(a / 2)])
                        .map_err(|_| ExceptionCode::ServerDeviceFailure)?;
                    Ok(w[usize::from(a % 2)])
                }
                0x20..=0x27 => Ok(self.status[usize::from(a - 0x20)]),
                MODEL_REGISTER => Ok(MODEL_CODE),
                _ => match scan_record_alias(a) {
                    Some(m) => self.read_input(m),
                    None => Err(ExceptionCode::IllegalDataAddress),
                },
            }
        }
        fn check_write(&self, start: u16, values: &[u16]) -> Result<(), ExceptionCode> {
            for (i, v) in values.iter().enumerate() {
                RtdConfig::check_register(start.wrapping_add(i as u16), *v)?;
            }
            Ok(())
        }
        fn write_holding(&mut self, a: u16, v: u16) {
            self.cfg[usize::from(a)] = v;
        }
    }

    fn dev() -> Dev {
        Dev {
            ohms: [
                100.0, 138.5055, 18.5201, 3904.8110, 0.0, 1000.0, 4999.9999, 60.2558,
            ],
            status: [
                0,
                0,
                0,
                0,
                ChannelStatus::OPEN,
                0,
                ChannelStatus::OVER_RANGE,
                0,
            ],
            cfg: [0xFF, 8],
        }
    }

    fn exchange(d: &mut Dev, req: &Request) -> Response {
        let mut tx = Vec::new();
        encode_request(7, req, &mut tx).unwrap();
        let mut rx = Vec::new();
        assert!(handle_frame(&tx, 7, d, &mut rx).unwrap());
        let (resp, used) = decode_response(&rx, 7, req).unwrap().unwrap();
        assert_eq!(used, rx.len());
        resp
    }

    #[test]
    fn resistances_round_trip_with_word_order() {
        // 138.5055 ohm = 1_385_055 units = 0x0015_225F: high word 0x0015 first.
        assert_eq!(encode_resistance(138.5055).unwrap(), [0x0015, 0x225F]);
        let mut d = dev();
        let r = exchange(&mut d, &read_resistances(0, 8).unwrap());
        let ohms = parse_resistances(&r, 8).unwrap();
        for (got, want) in ohms.iter().zip(d.ohms) {
            assert!((got.unwrap() - want).abs() < 0.5e-4, "{got:?} vs {want}");
        }
        assert_eq!(decode_resistance(0xFFFF, 0xFFFF), None);
        assert!(encode_resistance(5000.1).is_err());
        assert!(encode_resistance(f64::NAN).is_err());
        assert!(encode_resistance(-0.1).is_err());
    }

    #[test]
    fn scan_records_carry_the_same_values_as_the_separate_blocks() {
        let mut d = dev();
        // Channels 2..8: one read of 18 registers starting at 0x0046.
        let req = read_scan_records(2, 6).unwrap();
        assert_eq!(
            req,
            Request::ReadInputRegisters {
                start: 0x0046,
                count: 18
            }
        );
        let rec = parse_scan_records(&exchange(&mut d, &req), 6).unwrap();
        let ohms =
            parse_resistances(&exchange(&mut d, &read_resistances(2, 6).unwrap()), 6).unwrap();
        let st = parse_status(&exchange(&mut d, &read_status(2, 6).unwrap()), 6).unwrap();
        assert_eq!(rec, ohms.into_iter().zip(st).collect::<Vec<_>>());
        assert!(rec[2].1.open() && rec[4].1.over_range());
        assert!((rec[1].0.unwrap() - 3904.8110).abs() < 0.5e-4);
        // The map's edges: nothing below the records, nothing past channel 7's.
        assert_eq!(scan_record_alias(0x003F), None);
        assert_eq!(scan_record_alias(0x0040), Some(0x0000));
        assert_eq!(scan_record_alias(0x0041), Some(0x0001));
        assert_eq!(scan_record_alias(0x0042), Some(0x0020));
        assert_eq!(scan_record_alias(0x0057), Some(0x0027));
        assert_eq!(scan_record_alias(0x0058), None);
        assert!(read_scan_records(6, 3).is_err());
        assert!(read_scan_records(0, 0).is_err());
        // A reply with a register count that does not fit the request is refused.
        assert!(parse_scan_records(&Response::ReadInputRegisters(vec![0; 8]), 3).is_err());
    }

    #[test]
    fn status_and_config() {
        let mut d = dev();
        let st = parse_status(&exchange(&mut d, &read_status(3, 4).unwrap()), 4).unwrap();
        assert!(st[0].is_ok());
        assert!(st[1].open() && !st[1].over_range());
        assert!(st[3].over_range());
        let cfg = RtdConfig {
            enable_mask: 0b0101,
            averaging: 16,
        };
        let w = exchange(&mut d, &write_config(&cfg).unwrap());
        assert_eq!(w, Response::WriteMultipleRegisters { start: 0, count: 2 });
        assert_eq!(
            parse_config(&exchange(&mut d, &read_config())).unwrap(),
            cfg
        );
        exchange(&mut d, &write_enable_mask(0x80));
        assert_eq!(d.cfg[0], 0x80);
        exchange(&mut d, &write_averaging(64).unwrap());
        assert_eq!(d.cfg[1], 64);
    }

    #[test]
    fn bad_settings_are_refused_on_both_sides() {
        assert!(write_averaging(0).is_err());
        assert!(write_averaging(65).is_err());
        assert!(read_resistances(7, 2).is_err());
        assert!(read_status(0, 0).is_err());
        // The device answers exception 03 to an out-of-range averaging write, and keeps its value.
        let mut d = dev();
        let bad = Request::WriteSingleRegister {
            address: AVERAGING,
            value: 100,
        };
        let r = exchange(&mut d, &bad);
        assert_eq!(
            r,
            Response::Exception {
                function: 0x06,
                code: ExceptionCode::IllegalDataValue
            }
        );
        assert_eq!(d.cfg[1], 8);
        // Write-multiple is all-or-nothing.
        let bad = Request::WriteMultipleRegisters {
            start: 0,
            values: vec![0x0F, 0],
        };
        assert!(matches!(exchange(&mut d, &bad), Response::Exception { .. }));
        assert_eq!(d.cfg, [0xFF, 8]);
        assert!(matches!(
            parse_config(&exchange(&mut d, &read_status(0, 2).unwrap())),
            Err(RtdError::Mismatch { .. })
        ));
        let r = exchange(
            &mut d,
            &Request::ReadInputRegisters {
                start: 0x58,
                count: 1,
            },
        );
        assert_eq!(
            parse_scan_counter(&r),
            Err(RtdError::Exception(ExceptionCode::IllegalDataAddress))
        );
    }

    proptest! {
        #[test]
        fn parsers_never_panic(values in proptest::collection::vec(any::<u16>(), 0..30), n in 0u8..10, holding in any::<bool>()) {
            let r = if holding { Response::ReadHoldingRegisters(values) } else { Response::ReadInputRegisters(values) };
            let _ = parse_scan_records(&r, n);
            let _ = parse_resistances(&r, n);
            let _ = parse_status(&r, n);
            let _ = parse_config(&r);
            let _ = parse_scan_counter(&r);
        }

        #[test]
        fn scan_record_aliases_stay_in_the_map(address in any::<u16>()) {
            if let Some(m) = scan_record_alias(address) {
                let in_resistances = m < RESISTANCE_BASE + 2 * u16::from(CHANNELS);
                let in_status = (STATUS_BASE..STATUS_BASE + u16::from(CHANNELS)).contains(&m);
                prop_assert!(in_resistances || in_status, "{address:#06x} -> {m:#06x}");
            }
        }

        #[test]
        fn resistance_encoding_round_trips(ohms in 0.0f64..=5000.0) {
            let [h, l] = encode_resistance(ohms).unwrap();
            let back = decode_resistance(h, l).unwrap();
            prop_assert!((back - ohms).abs() <= 0.5e-4 + 1e-9);
        }
    }
}
