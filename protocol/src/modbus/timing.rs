//! Modbus RTU timing: the 1.5- and 3.5-character silences, and a frame assembler that splits
//! a timestamped byte stream into frames at those silences.
//!
//! Rule (MODBUS over Serial Line V1.02 §2.5.1.1, from memory): frames are separated by a
//! silence of at least 3.5 character times (t3.5); inside a frame no gap may exceed 1.5
//! character times (t1.5). Above 19200 baud fixed values are used: t1.5 = 750 µs and
//! t3.5 = 1750 µs. A character is start bit + data bits + parity bit (if any) + stop bits;
//! RTU's normal framing is 8 data bits, even parity, 1 stop bit = 11 bits.
//!
//! Main items: [`CharFormat`], [`silences`], [`Silences`], [`FrameAssembler`].

use std::collections::VecDeque;
use std::time::Duration;

/// Parity of a serial character.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Parity {
    /// No parity bit.
    None,
    /// Even parity (the RTU default).
    Even,
    /// Odd parity.
    Odd,
}

/// How one character is framed on the wire.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct CharFormat {
    /// Data bits (RTU uses 8).
    pub data_bits: u8,
    /// Parity.
    pub parity: Parity,
    /// Stop bits, 1 or 2.
    pub stop_bits: u8,
}

impl CharFormat {
    /// 8 data bits, even parity, 1 stop bit: RTU's default (serial line spec §2.5.1).
    pub const RTU_DEFAULT: CharFormat = CharFormat {
        data_bits: 8,
        parity: Parity::Even,
        stop_bits: 1,
    };

    /// 8 data bits, no parity, 1 stop bit: the usual format of ASCII instruments (common
    /// practice).
    pub const EIGHT_N_1: CharFormat = CharFormat {
        data_bits: 8,
        parity: Parity::None,
        stop_bits: 1,
    };

    /// Bits per character including the start bit.
    pub fn bits(&self) -> u32 {
        1 + u32::from(self.data_bits)
            + u32::from(self.parity != Parity::None)
            + u32::from(self.stop_bits)
    }
}

impl Parity {
    /// The letter of the usual short notation (`N`, `E`, `O`).
    pub fn letter(self) -> char {
        match self {
            Parity::None => 'N',
            Parity::Even => 'E',
            Parity::Odd => 'O',
        }
    }
}

impl std::fmt::Display for CharFormat {
    /// The usual short notation: data bits, parity letter, stop bits (`8E1`).
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "{}{}{}",
            self.data_bits,
            self.parity.letter(),
            self.stop_bits
        )
    }
}

/// A baud rate or framing that cannot be used.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum TimingError {
    /// Zero baud.
    #[error("baud rate must be positive")]
    ZeroBaud,
    /// Framing outside 5–8 data bits or 1–2 stop bits.
    #[error(
        "unsupported character format: {data_bits} data bits, {stop_bits} stop bits (allowed 5-8 and 1-2)"
    )]
    Format {
        /// Data bits given.
        data_bits: u8,
        /// Stop bits given.
        stop_bits: u8,
    },
}

/// The silences of one line setting.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Silences {
    /// Time to transmit one character.
    pub char_time: Duration,
    /// t1.5: the longest allowed gap inside a frame.
    pub inter_char: Duration,
    /// t3.5: the shortest silence between frames.
    pub inter_frame: Duration,
}

/// Above this baud rate the fixed silences apply.
pub const FIXED_TIMING_ABOVE_BAUD: u32 = 19_200;
/// Fixed t1.5 above 19200 baud.
pub const FIXED_INTER_CHAR: Duration = Duration::from_micros(750);
/// Fixed t3.5 above 19200 baud.
pub const FIXED_INTER_FRAME: Duration = Duration::from_micros(1750);

/// The silences for `baud` and `format` (a pure function; see the module docs for the rule).
pub fn silences(baud: u32, format: CharFormat) -> Result<Silences, TimingError> {
    if baud == 0 {
        return Err(TimingError::ZeroBaud);
    }
    if !(5..=8).contains(&format.data_bits) || !(1..=2).contains(&format.stop_bits) {
        return Err(TimingError::Format {
            data_bits: format.data_bits,
            stop_bits: format.stop_bits,
        });
    }
    let bits = u64::from(format.bits());
    let ns = |tenths: u64| Duration::from_nanos(bits * tenths * 100_000_000 / u64::from(baud));
    let char_time = ns(10);
    if baud > FIXED_TIMING_ABOVE_BAUD {
        Ok(Silences {
            char_time,
            inter_char: FIXED_INTER_CHAR,
            inter_frame: FIXED_INTER_FRAME,
        })
    } else {
        Ok(Silences {
            char_time,
            inter_char: ns(15),
            inter_frame: ns(35),
        })
    }
}

/// Why the assembler threw a frame away.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum DiscardReason {
    /// More than the limit arrived before a silence.
    TooLong {
        /// The limit in bytes.
        max: usize,
    },
    /// A gap longer than t1.5 (only in strict mode).
    InterCharacterGap {
        /// The gap seen.
        gap: Duration,
    },
}

/// The assembler's output.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Assembled {
    /// A frame, ended by a t3.5 silence (not yet CRC-checked).
    Frame(Vec<u8>),
    /// A frame that had to be thrown away.
    Discarded {
        /// How many bytes it had.
        len: usize,
        /// Why.
        reason: DiscardReason,
    },
}

/// Splits timestamped bytes into frames at t3.5 silences (sans-IO).
///
/// Feed it with [`Self::handle_bytes`]`(now, bytes)`, where `now` is when the last byte of the
/// chunk arrived; it subtracts the chunk's own transmission time to estimate the silence
/// before it. Call [`Self::handle_timeout`] at [`Self::poll_timeout`] to close the last frame,
/// and drain [`Self::poll_frame`]. Holds at most `max_len` bytes of the current frame and
/// [`Self::MAX_PENDING`] finished frames (older ones are dropped and counted).
///
/// The t1.5 rule is checked only in strict mode: OS scheduling and USB adapters' latency
/// timers routinely stretch gaps inside frames, so by default such frames are kept and the
/// CRC decides.
#[derive(Debug, Clone)]
pub struct FrameAssembler {
    silences: Silences,
    max_len: usize,
    strict: bool,
    buf: Vec<u8>,
    len: usize,
    broken: Option<DiscardReason>,
    last_at: Option<Duration>,
    done: VecDeque<Assembled>,
    dropped: u64,
}

impl FrameAssembler {
    /// Most finished frames held before the oldest is dropped.
    pub const MAX_PENDING: usize = 8;

    /// An assembler for these silences, frames of at most `max_len` bytes (usually
    /// [`super::MAX_ADU`]), t1.5 checked only if `strict`.
    pub fn new(silences: Silences, max_len: usize, strict: bool) -> Self {
        FrameAssembler {
            silences,
            max_len,
            strict,
            buf: Vec::with_capacity(max_len.min(super::MAX_ADU)),
            len: 0,
            broken: None,
            last_at: None,
            done: VecDeque::new(),
            dropped: 0,
        }
    }

    /// Frames dropped because [`Self::poll_frame`] was not drained.
    pub fn dropped(&self) -> u64 {
        self.dropped
    }

    /// Bytes of the frame being assembled.
    pub fn pending_len(&self) -> usize {
        self.len
    }

    /// Accepts `bytes` whose last byte arrived at `now`.
    pub fn handle_bytes(&mut self, now: Duration, bytes: &[u8]) {
        if bytes.is_empty() {
            return;
        }
        if let Some(last) = self.last_at {
            let chunk_time = self.silences.char_time.saturating_mul(bytes.len() as u32);
            let gap = now.saturating_sub(last).saturating_sub(chunk_time);
            if self.len > 0 && gap >= self.silences.inter_frame {
                self.finish();
            } else if self.len > 0
                && self.strict
                && gap > self.silences.inter_char
                && self.broken.is_none()
            {
                self.broken = Some(DiscardReason::InterCharacterGap { gap });
            }
        }
        self.last_at = Some(now);
        self.len = self.len.saturating_add(bytes.len());
        if self.len > self.max_len {
            if self.broken.is_none() {
                self.broken = Some(DiscardReason::TooLong { max: self.max_len });
            }
            self.buf.clear();
        } else if self.broken.is_none() {
            self.buf.extend_from_slice(bytes);
        }
    }

    /// Closes the current frame if the line has been silent for t3.5 by `now`.
    pub fn handle_timeout(&mut self, now: Duration) {
        if let Some(last) = self.last_at
            && self.len > 0
            && now.saturating_sub(last) >= self.silences.inter_frame
        {
            self.finish();
        }
    }

    /// When the current frame will be complete if nothing else arrives.
    pub fn poll_timeout(&self) -> Option<Duration> {
        match self.last_at {
            Some(last) if self.len > 0 => Some(last.saturating_add(self.silences.inter_frame)),
            _ => None,
        }
    }

    /// The next finished frame or discard notice.
    pub fn poll_frame(&mut self) -> Option<Assembled> {
        self.done.pop_front()
    }

    fn finish(&mut self) {
        let item = match self.broken.take() {
            Some(reason) => Assembled::Discarded {
                len: self.len,
                reason,
            },
            None => Assembled::Frame(std::mem::take(&mut self.buf)),
        };
        self.buf.clear();
        self.len = 0;
        if self.done.len() >= Self::MAX_PENDING {
            self.done.pop_front();
            self.dropped += 1;
        }
        self.done.push_back(item);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    fn us(v: u64) -> Duration {
        Duration::from_micros(v)
    }

    #[test]
    fn silences_follow_the_serial_line_rule() {
        // 11-bit characters at 9600 baud: t = 11/9600 s = 1145.83 µs; t1.5 = 1718.75 µs,
        // t3.5 = 4010.42 µs (arithmetic on the rule of serial line spec §2.5.1.1).
        let s = silences(9600, CharFormat::RTU_DEFAULT).unwrap();
        assert_eq!(s.char_time.as_nanos(), 1_145_833);
        assert_eq!(s.inter_char.as_nanos(), 1_718_750);
        assert_eq!(s.inter_frame.as_nanos(), 4_010_416);
        // 19200 still uses the formula: t3.5 = 3.5 * 11 / 19200 s = 2005.2 µs.
        let s = silences(19_200, CharFormat::RTU_DEFAULT).unwrap();
        assert_eq!(s.inter_frame.as_nanos(), 2_005_208);
        // Above 19200: fixed 750 µs / 1750 µs.
        for baud in [38_400, 115_200] {
            let s = silences(baud, CharFormat::RTU_DEFAULT).unwrap();
            assert_eq!((s.inter_char, s.inter_frame), (us(750), us(1750)));
        }
        // 8N1 is 10 bits: at 9600 baud t3.5 = 35/9600 s = 3645.8 µs.
        let f = CharFormat {
            data_bits: 8,
            parity: Parity::None,
            stop_bits: 1,
        };
        assert_eq!(silences(9600, f).unwrap().inter_frame.as_nanos(), 3_645_833);
        assert_eq!(silences(0, f), Err(TimingError::ZeroBaud));
        assert!(silences(9600, CharFormat { data_bits: 9, ..f }).is_err());
    }

    #[test]
    fn every_eleven_bit_rtu_format_has_the_same_silences() {
        // Serial line spec §2.5.1 (from memory): an RTU character is 11 bits, as 8E1, 8O1 or
        // 8N2 (no parity takes a second stop bit), so all three give the same t1.5 and t3.5:
        // at 9600 baud t3.5 = 3.5 · 11 / 9600 s = 4010.4 µs (arithmetic on §2.5.1.1).
        let f = |parity, stop_bits| CharFormat {
            data_bits: 8,
            parity,
            stop_bits,
        };
        for c in [f(Parity::Even, 1), f(Parity::Odd, 1), f(Parity::None, 2)] {
            assert_eq!(c.bits(), 11, "{c}");
            let s = silences(9600, c).unwrap();
            assert_eq!(s.inter_frame.as_nanos(), 4_010_416, "{c}");
            assert_eq!(s.inter_char.as_nanos(), 1_718_750, "{c}");
        }
        // 7E2 is 11 bits too; 7N1 is 9: t3.5 at 9600 = 3.5 · 9 / 9600 s = 3281.25 µs.
        let seven = CharFormat {
            data_bits: 7,
            ..CharFormat::EIGHT_N_1
        };
        assert_eq!(
            silences(9600, seven).unwrap().inter_frame.as_nanos(),
            3_281_250
        );
        assert_eq!(CharFormat::RTU_DEFAULT.to_string(), "8E1");
        assert_eq!(f(Parity::None, 2).to_string(), "8N2");
        assert_eq!(seven.to_string(), "7N1");
    }

    fn asm(strict: bool) -> FrameAssembler {
        FrameAssembler::new(
            silences(9600, CharFormat::RTU_DEFAULT).unwrap(),
            256,
            strict,
        )
    }

    #[test]
    fn splits_at_silences() {
        let mut a = asm(false);
        // A frame arriving byte by byte, one character time apart.
        let frame1 = [0x11, 0x03, 0x00, 0x6B, 0x00, 0x03, 0x76, 0x87];
        let mut t = 10_000;
        for b in frame1 {
            t += 1146;
            a.handle_bytes(us(t), &[b]);
        }
        assert!(a.poll_frame().is_none());
        assert_eq!(a.poll_timeout(), Some(us(t) + a.silences.inter_frame));
        // Second frame after a 5 ms silence closes the first.
        t += 5000 + 1146;
        a.handle_bytes(us(t), &[0x01]);
        assert_eq!(a.poll_frame(), Some(Assembled::Frame(frame1.to_vec())));
        a.handle_bytes(us(t + 1146 * 7), &[0x03, 0, 0, 0, 1, 0x84, 0x0A]);
        a.handle_timeout(us(t + 1146 * 7 + 4000));
        assert!(a.poll_frame().is_none(), "4.0 ms < t3.5 = 4.01 ms");
        a.handle_timeout(us(t + 1146 * 7 + 4011));
        assert_eq!(
            a.poll_frame(),
            Some(Assembled::Frame(vec![1, 3, 0, 0, 0, 1, 0x84, 0x0A]))
        );
    }

    #[test]
    fn chunk_transmission_time_is_not_silence() {
        let mut a = asm(false);
        a.handle_bytes(us(0), &[1]);
        // 8 bytes arriving 9.2 ms later in one chunk: 8 * 1146 µs of that was transmission,
        // so the silence was about 0 and they belong to the same frame.
        a.handle_bytes(us(9_200), &[2; 8]);
        a.handle_timeout(us(20_000));
        match a.poll_frame() {
            Some(Assembled::Frame(f)) => assert_eq!(f.len(), 9),
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn strict_mode_discards_frames_with_inner_gaps() {
        let mut a = asm(true);
        a.handle_bytes(us(0), &[1, 2, 3]);
        a.handle_bytes(us(1146 + 2500), &[4]); // gap 2.5 ms: > t1.5, < t3.5
        a.handle_timeout(us(20_000));
        assert!(matches!(
            a.poll_frame(),
            Some(Assembled::Discarded {
                len: 4,
                reason: DiscardReason::InterCharacterGap { .. }
            })
        ));
        let mut lax = asm(false);
        lax.handle_bytes(us(0), &[1, 2, 3]);
        lax.handle_bytes(us(1146 + 2500), &[4]);
        lax.handle_timeout(us(20_000));
        assert_eq!(lax.poll_frame(), Some(Assembled::Frame(vec![1, 2, 3, 4])));
    }

    #[test]
    fn overlong_frames_are_discarded_and_bounded() {
        let mut a = asm(false);
        for i in 0..100u64 {
            a.handle_bytes(us(i * 1146 * 10), &[0xAA; 10]);
            assert!(a.buf.len() <= 256);
        }
        a.handle_timeout(us(10_000_000));
        assert_eq!(
            a.poll_frame(),
            Some(Assembled::Discarded {
                len: 1000,
                reason: DiscardReason::TooLong { max: 256 }
            })
        );
    }

    proptest! {
        #[test]
        fn assembler_never_panics_and_stays_bounded(
            chunks in proptest::collection::vec(
                (0u64..20_000, proptest::collection::vec(any::<u8>(), 0..64)), 0..50),
            strict in any::<bool>(),
        ) {
            let mut a = asm(strict);
            let mut t = 0u64;
            let mut total_in = 0usize;
            let mut total_out = 0usize;
            for (dt, bytes) in &chunks {
                t += dt;
                total_in += bytes.len();
                a.handle_bytes(us(t), bytes);
                prop_assert!(a.buf.len() <= 256);
                prop_assert!(a.done.len() <= FrameAssembler::MAX_PENDING);
                while let Some(f) = a.poll_frame() {
                    total_out += match f { Assembled::Frame(f) => f.len(), Assembled::Discarded { len, .. } => len };
                }
            }
            a.handle_timeout(us(t + 1_000_000));
            while let Some(f) = a.poll_frame() {
                total_out += match f { Assembled::Frame(f) => f.len(), Assembled::Discarded { len, .. } => len };
            }
            // No byte is lost silently: every byte is in a frame or a discard notice.
            prop_assert_eq!(total_in, total_out);
        }
    }
}
