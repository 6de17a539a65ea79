//! The simulated RTD thermometer: a Modbus RTU server with our own invented register map.
//!
//! The map is [`stilt_protocol::modbus::rtd`] (invented; copies no real instrument). Frames
//! are split at the RTU inter-frame silence (t3.5) by the protocol crate's
//! [`FrameAssembler`], so a request is answered once the line has been quiet for t3.5 after
//! its last byte ([`Thermometer::poll_timeout`]). A frame with a bad CRC, a bad length or
//! another unit's address gets no reply, as the serial-line rules require; a request for an
//! address outside the map gets exception 02, a bad setting exception 03.
//!
//! The instrument scans all enabled channels once per [`Thermometer::scan_period_s`] of
//! simulated time (12.5 ms × averaging, an invented conversion time: 0.1 s at the default
//! averaging of 8). Each scan converts the leg's temperature to a Pt100 resistance (IEC 60751,
//! through `stilt_protocol::convert`); a channel with no leg reads "open", a disabled one
//! "disabled", one enabled or reconfigured since the last scan "not ready". Averaging changes
//! the scan rate only; the noise comes from the stage. A stuck instrument
//! ([`Thermometer::set_stuck`]) keeps its last resistances while the scan counter goes on.
//!
//! Main types: [`Thermometer`], [`ThermoCounters`].

use std::time::Duration;

use stilt_protocol::convert::PlatinumRtd;
use stilt_protocol::modbus::rtd::{self, ChannelStatus, RtdConfig};
use stilt_protocol::modbus::timing::{Assembled, FrameAssembler, Silences};
use stilt_protocol::modbus::{self, ExceptionCode, RegisterBank};

/// Simulated conversion time per averaged conversion, s (invented).
pub const CONVERSION_S: f64 = 0.0125;
/// Firmware version reported (invented): 1.0.
pub const FIRMWARE: u16 = 0x0100;
/// Averaging after power-up.
pub const DEFAULT_AVERAGING: u16 = 8;

/// Counters of what the thermometer received.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct ThermoCounters {
    /// Frames for this unit that were answered (normal or exception replies).
    pub answered: u64,
    /// Frames dropped: bad CRC or length, unknown function for another unit, overlong.
    pub bad_frames: u64,
    /// Frames for other units or broadcasts (no reply due).
    pub not_for_us: u64,
    /// Completed scans.
    pub scans: u64,
}

/// The register image the Modbus server reads and writes.
#[derive(Debug, Clone)]
struct Image {
    raw: [u32; rtd::CHANNELS as usize],
    status: [u16; rtd::CHANNELS as usize],
    scan_counter: u16,
    enable_mask: u8,
    averaging: u16,
    /// Channels that have a sensor wired (a leg uses them).
    wired: u8,
    /// Set by a settings write: every channel is "not ready" until the next scan.
    reconfigured: bool,
}

impl Image {
    fn refresh_status(&mut self) {
        for ch in 0..rtd::CHANNELS {
            let bit = 1u8 << ch;
            let c = usize::from(ch);
            if self.enable_mask & bit == 0 {
                self.status[c] = ChannelStatus::DISABLED;
                self.raw[c] = rtd::NO_READING;
            } else if self.reconfigured {
                self.status[c] = ChannelStatus::NOT_READY;
                self.raw[c] = rtd::NO_READING;
            }
        }
    }
}

impl RegisterBank for Image {
    fn read_holding(&self, address: u16) -> Result<u16, ExceptionCode> {
        match address {
            rtd::ENABLE_MASK => Ok(u16::from(self.enable_mask)),
            rtd::AVERAGING => Ok(self.averaging),
            _ => Err(ExceptionCode::IllegalDataAddress),
        }
    }

    fn read_input(&self, address: u16) -> Result<u16, ExceptionCode> {
        let n = u16::from(rtd::CHANNELS);
        match address {
            a if (rtd::RESISTANCE_BASE..rtd::RESISTANCE_BASE + 2 * n).contains(&a) => {
                let i = a - rtd::RESISTANCE_BASE;
                let raw = self.raw[usize::from(i / 2)];
                Ok(if i % 2 == 0 {
                    (raw >> 16) as u16
                } else {
                    raw as u16
                })
            }
            a if (rtd::STATUS_BASE..rtd::STATUS_BASE + n).contains(&a) => {
                Ok(self.status[usize::from(a - rtd::STATUS_BASE)])
            }
            rtd::SCAN_COUNTER => Ok(self.scan_counter),
            rtd::MODEL_REGISTER => Ok(rtd::MODEL_CODE),
            rtd::FIRMWARE_REGISTER => Ok(FIRMWARE),
            rtd::CHANNEL_COUNT_REGISTER => Ok(n),
            a => match rtd::scan_record_alias(a) {
                Some(m) => self.read_input(m),
                None => Err(ExceptionCode::IllegalDataAddress),
            },
        }
    }

    fn check_write(&self, start: u16, values: &[u16]) -> Result<(), ExceptionCode> {
        for (i, v) in values.iter().enumerate() {
            let a = u16::try_from(i)
                .ok()
                .and_then(|i| start.checked_add(i))
                .ok_or(ExceptionCode::IllegalDataAddress)?;
            RtdConfig::check_register(a, *v)?;
        }
        Ok(())
    }

    fn write_holding(&mut self, address: u16, value: u16) {
        match address {
            rtd::ENABLE_MASK => self.enable_mask = value as u8,
            rtd::AVERAGING => self.averaging = value,
            _ => return,
        }
        self.reconfigured = true;
        self.refresh_status();
    }
}

/// The device side of the thermometer.
#[derive(Debug, Clone)]
pub struct Thermometer {
    unit: u8,
    silences: Silences,
    assembler: FrameAssembler,
    image: Image,
    stuck: bool,
    counters: ThermoCounters,
}

impl Thermometer {
    /// A thermometer answering as `unit`, on a line with these silences, with sensors
    /// wired on the channels in `wired` (0-based; channels ≥ 8 are not in the map and ignored).
    pub fn new(unit: u8, silences: Silences, wired: &[usize]) -> Self {
        let wired = wired
            .iter()
            .filter(|&&c| c < usize::from(rtd::CHANNELS))
            .fold(0u8, |m, &c| m | (1 << c));
        let mut image = Image {
            raw: [rtd::NO_READING; rtd::CHANNELS as usize],
            status: [ChannelStatus::NOT_READY; rtd::CHANNELS as usize],
            scan_counter: 0,
            enable_mask: 0xFF,
            averaging: DEFAULT_AVERAGING,
            wired,
            reconfigured: false,
        };
        image.refresh_status();
        Thermometer {
            unit,
            silences,
            // Not strict: USB adapters and OS scheduling stretch gaps inside frames; the CRC decides.
            assembler: FrameAssembler::new(silences, modbus::MAX_ADU, false),
            image,
            stuck: false,
            counters: ThermoCounters::default(),
        }
    }

    /// The Modbus address this unit answers to.
    pub fn unit(&self) -> u8 {
        self.unit
    }

    /// Simulated seconds between scans at the current averaging.
    pub fn scan_period_s(&self) -> f64 {
        CONVERSION_S * f64::from(self.image.averaging.max(1))
    }

    /// Freezes (or thaws) the reported resistances.
    pub fn set_stuck(&mut self, stuck: bool) {
        self.stuck = stuck;
    }

    /// What the thermometer received so far.
    pub fn counters(&self) -> ThermoCounters {
        self.counters
    }

    /// The resistance channel `ch` reports now, Ω (`None`: no valid reading).
    pub fn reported_ohms(&self, ch: u8) -> Option<f64> {
        let raw = *self.image.raw.get(usize::from(ch))?;
        rtd::decode_resistance((raw >> 16) as u16, raw as u16)
    }

    /// One scan: `read(ch)` gives the temperature at channel `ch`'s sensor, °C.
    pub fn scan(&mut self, read: &mut dyn FnMut(u8) -> Option<f64>) {
        let img = &mut self.image;
        img.reconfigured = false;
        for ch in 0..rtd::CHANNELS {
            let bit = 1u8 << ch;
            let c = usize::from(ch);
            if img.enable_mask & bit == 0 {
                continue;
            }
            let t = if img.wired & bit != 0 { read(ch) } else { None };
            let Some(t) = t else {
                img.status[c] = ChannelStatus::OPEN;
                img.raw[c] = rtd::NO_READING;
                continue;
            };
            if self.stuck && img.status[c] == 0 {
                continue;
            }
            match PlatinumRtd::PT100
                .resistance(t)
                .ok()
                .and_then(|r| rtd::encode_resistance(r).ok())
            {
                Some([h, l]) => {
                    img.raw[c] = (u32::from(h) << 16) | u32::from(l);
                    img.status[c] = 0;
                }
                None => {
                    img.raw[c] = rtd::NO_READING;
                    img.status[c] = if t > 0.0 {
                        ChannelStatus::OVER_RANGE
                    } else {
                        ChannelStatus::UNDER_RANGE
                    };
                }
            }
        }
        img.scan_counter = img.scan_counter.wrapping_add(1);
        self.counters.scans += 1;
    }

    /// Accepts bytes whose last one arrived at line time `now`; replies to frames that a
    /// silence before these bytes closed are appended.
    pub fn handle_bytes(&mut self, now: Duration, bytes: &[u8], replies: &mut Vec<Vec<u8>>) {
        self.assembler.handle_bytes(now, bytes);
        self.drain(replies);
    }

    /// When the frame being received will be complete if nothing else arrives.
    pub fn poll_timeout(&self) -> Option<Duration> {
        self.assembler.poll_timeout()
    }

    /// Closes the frame if the line has been silent for t3.5 at `now`, answering it.
    pub fn handle_timeout(&mut self, now: Duration, replies: &mut Vec<Vec<u8>>) {
        self.assembler.handle_timeout(now);
        self.drain(replies);
    }

    /// Forgets a partial frame (after a disconnect).
    pub fn reset_input(&mut self) {
        self.assembler = FrameAssembler::new(self.silences, modbus::MAX_ADU, false);
    }

    fn drain(&mut self, replies: &mut Vec<Vec<u8>>) {
        while let Some(a) = self.assembler.poll_frame() {
            let Assembled::Frame(frame) = a else {
                self.counters.bad_frames += 1;
                continue;
            };
            let mut out = Vec::new();
            match modbus::handle_frame(&frame, self.unit, &mut self.image, &mut out) {
                Ok(true) => {
                    self.counters.answered += 1;
                    replies.push(out);
                }
                Ok(false) => self.counters.not_for_us += 1,
                Err(_) => self.counters.bad_frames += 1,
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use stilt_protocol::modbus::{Request, Response, decode_response, encode_request};

    const UNIT: u8 = 1;

    fn dev() -> Thermometer {
        let s = modbus::timing::silences(19_200, modbus::timing::CharFormat::RTU_DEFAULT).unwrap();
        Thermometer::new(UNIT, s, &[0, 1, 2])
    }

    fn ms(v: u64) -> Duration {
        Duration::from_millis(v)
    }

    /// One exchange as the daemon's master side would do it: encode, send, wait t3.5, decode.
    fn exchange(d: &mut Thermometer, t_ms: u64, req: &Request) -> Option<Response> {
        let mut tx = Vec::new();
        encode_request(UNIT, req, &mut tx).unwrap();
        let mut replies = Vec::new();
        d.handle_bytes(ms(t_ms), &tx, &mut replies);
        assert!(replies.is_empty(), "no reply before the silence");
        let due = d.poll_timeout().unwrap();
        assert!(
            due > ms(t_ms) && due <= ms(t_ms) + ms(3),
            "t3.5 at 19200 baud ≈ 2 ms"
        );
        d.handle_timeout(due, &mut replies);
        let rx = replies.pop()?;
        let (resp, used) = decode_response(&rx, UNIT, req).unwrap().unwrap();
        assert_eq!(used, rx.len());
        Some(resp)
    }

    #[test]
    fn reports_pt100_resistances_of_the_iec_60751_table() {
        // IEC 60751 Pt100 table (from memory): 0 °C = 100.00 Ω, 100 °C = 138.51 Ω,
        // −100 °C = 60.26 Ω. The resistances are rounded to 0.1 mΩ on the wire.
        let mut d = dev();
        let temps = [0.0, 100.0, -100.0];
        d.scan(&mut |ch| temps.get(usize::from(ch)).copied());
        let resp = exchange(&mut d, 0, &rtd::read_resistances(0, 4).unwrap()).unwrap();
        let ohms = rtd::parse_resistances(&resp, 4).unwrap();
        assert!((ohms[0].unwrap() - 100.00).abs() < 0.005);
        assert!((ohms[1].unwrap() - 138.51).abs() < 0.005);
        assert!((ohms[2].unwrap() - 60.26).abs() < 0.005);
        assert_eq!(ohms[3], None, "no sensor wired on channel 3");
        let st = exchange(&mut d, 10, &rtd::read_status(0, 4).unwrap()).unwrap();
        let st = rtd::parse_status(&st, 4).unwrap();
        assert!(st[0].is_ok() && st[2].is_ok() && st[3].open());
        // The scan records hold the same readings and status in one reply.
        let rec = exchange(&mut d, 15, &rtd::read_scan_records(0, 4).unwrap()).unwrap();
        let rec = rtd::parse_scan_records(&rec, 4).unwrap();
        assert_eq!(rec, ohms.iter().copied().zip(st).collect::<Vec<_>>());
        let n = exchange(&mut d, 20, &rtd::read_scan_counter()).unwrap();
        assert_eq!(rtd::parse_scan_counter(&n), Ok(1));
    }

    #[test]
    fn settings_change_scan_rate_and_channel_states() {
        let mut d = dev();
        assert!((d.scan_period_s() - 0.1).abs() < 1e-12);
        let cfg = RtdConfig {
            enable_mask: 0b011,
            averaging: 16,
        };
        let w = exchange(&mut d, 0, &rtd::write_config(&cfg).unwrap()).unwrap();
        assert_eq!(w, Response::WriteMultipleRegisters { start: 0, count: 2 });
        assert!((d.scan_period_s() - 0.2).abs() < 1e-12);
        let st = exchange(&mut d, 10, &rtd::read_status(0, 3).unwrap()).unwrap();
        let st = rtd::parse_status(&st, 3).unwrap();
        assert!(st[0].not_ready() && st[2].disabled());
        d.scan(&mut |_| Some(20.0));
        let st = exchange(&mut d, 20, &rtd::read_status(0, 3).unwrap()).unwrap();
        let st = rtd::parse_status(&st, 3).unwrap();
        assert!(st[0].is_ok() && st[1].is_ok() && st[2].disabled());
        let back = exchange(&mut d, 30, &rtd::read_config()).unwrap();
        assert_eq!(rtd::parse_config(&back), Ok(cfg));
    }

    #[test]
    fn bad_frames_get_no_reply_and_bad_requests_get_exceptions() {
        let mut d = dev();
        // Illegal address (the first past channel 7's scan record): exception 02 (Modbus
        // Application Protocol V1.1b3 §7).
        let r = exchange(
            &mut d,
            0,
            &Request::ReadInputRegisters {
                start: 0x0058,
                count: 1,
            },
        );
        assert_eq!(
            r,
            Some(Response::Exception {
                function: 0x04,
                code: ExceptionCode::IllegalDataAddress
            })
        );
        // Bad averaging: exception 03.
        let r = exchange(
            &mut d,
            10,
            &Request::WriteSingleRegister {
                address: rtd::AVERAGING,
                value: 0,
            },
        );
        assert!(matches!(
            r,
            Some(Response::Exception {
                code: ExceptionCode::IllegalDataValue,
                ..
            })
        ));
        // A corrupted CRC, and a frame for unit 9: silence.
        let mut replies = Vec::new();
        let mut tx = Vec::new();
        encode_request(UNIT, &rtd::read_scan_counter(), &mut tx).unwrap();
        let n = tx.len();
        tx[n - 1] ^= 1;
        d.handle_bytes(ms(20), &tx, &mut replies);
        d.handle_timeout(ms(25), &mut replies);
        let mut other = Vec::new();
        encode_request(9, &rtd::read_scan_counter(), &mut other).unwrap();
        d.handle_bytes(ms(30), &other, &mut replies);
        d.handle_timeout(ms(35), &mut replies);
        assert!(replies.is_empty());
        assert_eq!(d.counters().bad_frames, 1);
        assert_eq!(d.counters().not_for_us, 1);
        assert_eq!(d.counters().answered, 2);
    }

    #[test]
    fn two_frames_separated_by_a_silence_are_both_answered() {
        let mut d = dev();
        let mut tx = Vec::new();
        encode_request(UNIT, &rtd::read_scan_counter(), &mut tx).unwrap();
        let mut replies = Vec::new();
        d.handle_bytes(ms(0), &tx, &mut replies);
        // The second frame arrives 10 ms later: the silence closes the first.
        d.handle_bytes(ms(10), &tx, &mut replies);
        assert_eq!(replies.len(), 1);
        d.handle_timeout(ms(15), &mut replies);
        assert_eq!(replies.len(), 2);
    }

    #[test]
    fn stuck_instrument_keeps_its_resistances() {
        let mut d = dev();
        d.scan(&mut |_| Some(20.0));
        let before = d.reported_ohms(0).unwrap();
        d.set_stuck(true);
        d.scan(&mut |_| Some(30.0));
        assert_eq!(d.reported_ohms(0), Some(before));
        d.set_stuck(false);
        d.scan(&mut |_| Some(30.0));
        assert!(
            d.reported_ohms(0).unwrap() > before + 3.0,
            "≈0.39 Ω/K for Pt100"
        );
        assert_eq!(d.counters().scans, 3);
    }
}
