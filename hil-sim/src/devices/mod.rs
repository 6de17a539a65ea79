//! The device side of the three simulated instruments, sans-IO: bytes in, bytes out.
//!
//! Each instrument is a plain struct fed with the bytes the master sent and returning whole
//! reply messages; none does I/O or reads a clock. Where timing matters (the Modbus
//! inter-frame silence) the line time is a parameter, `now: Duration` since an arbitrary
//! origin. What they report comes from the simulated stage through the [`crate::rig::Rig`],
//! which samples the stage in simulated time and hands the values over.
//!
//! Every command set and register map here is our own invention (defined in
//! `stilt_protocol`), copying no real instrument:
//! - [`tiltmeter::Tiltmeter`]: ASCII line `TLT?\r` → `T,<x>,<y>,<temp>,<status>\r\n`;
//! - [`thermometer::Thermometer`]: Modbus RTU server with the invented RTD register map;
//! - [`heater::HeaterSupply`]: SCPI-style multi-channel heater supply.
//!
//! Main items: [`DeviceKind`], [`garble`], [`invert_crc`].

pub mod heater;
pub mod thermometer;
pub mod tiltmeter;

/// One of the three instruments.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum DeviceKind {
    /// The two-axis tiltmeter (ASCII line protocol).
    Tiltmeter,
    /// The RTD thermometer (Modbus RTU).
    Thermometer,
    /// The heater supply (SCPI-style).
    Heater,
}

impl DeviceKind {
    /// All three, in port-map order.
    pub const ALL: [DeviceKind; 3] = [
        DeviceKind::Tiltmeter,
        DeviceKind::Thermometer,
        DeviceKind::Heater,
    ];

    /// The name used in the port map and the scenario file.
    pub fn name(self) -> &'static str {
        match self {
            DeviceKind::Tiltmeter => "tiltmeter",
            DeviceKind::Thermometer => "thermometer",
            DeviceKind::Heater => "heater",
        }
    }

    /// The kind called `name`.
    pub fn from_name(name: &str) -> Option<DeviceKind> {
        DeviceKind::ALL.into_iter().find(|d| d.name() == name)
    }

    /// Index into per-device arrays (port-map order).
    pub fn index(self) -> usize {
        self as usize
    }

    /// Bytes at the end of a reply that garbling leaves alone: the line terminator, so the
    /// master still sees a complete (but wrong) message rather than a timeout.
    fn protected_tail(self, reply: &[u8]) -> usize {
        match self {
            DeviceKind::Tiltmeter if reply.ends_with(b"\r\n") => 2,
            DeviceKind::Heater if reply.ends_with(b"\n") => 1,
            _ => 0,
        }
    }
}

/// Flips the top bit of `n` bytes spread evenly over the reply's body (terminator excepted).
///
/// On the ASCII lines this yields non-ASCII bytes that no field parser accepts; on Modbus the
/// CRC catches it, since CRC-16 detects every error burst of at most 16 bits (common
/// practice for cyclic codes of degree 16). Returns how many bytes were flipped.
pub fn garble(device: DeviceKind, reply: &mut [u8], n: usize) -> usize {
    let body = reply.len() - device.protected_tail(reply);
    let n = n.min(body);
    for j in 0..n {
        // Positions (j+1)·body/(n+1): distinct for n ≤ body, never the first byte when n < body.
        let pos = ((j + 1) * body / (n + 1)).min(body - 1);
        reply[pos] ^= 0x80;
    }
    n
}

/// Inverts the two CRC bytes at the end of a Modbus frame (no-op on shorter buffers).
pub fn invert_crc(frame: &mut [u8]) {
    if frame.len() >= 4 {
        let n = frame.len();
        frame[n - 2] ^= 0xFF;
        frame[n - 1] ^= 0xFF;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_round_trip() {
        for d in DeviceKind::ALL {
            assert_eq!(DeviceKind::from_name(d.name()), Some(d));
        }
        assert_eq!(DeviceKind::from_name("Tiltmeter"), None);
    }

    #[test]
    fn garble_keeps_terminators_and_flips_distinct_bytes() {
        let mut r = b"T,+0001.0000,-0002.0000,21.00,0\r\n".to_vec();
        let orig = r.clone();
        assert_eq!(garble(DeviceKind::Tiltmeter, &mut r, 3), 3);
        assert!(r.ends_with(b"\r\n"));
        let changed = r.iter().zip(&orig).filter(|(a, b)| a != b).count();
        assert_eq!(changed, 3);
        let mut short = b"\n".to_vec();
        assert_eq!(garble(DeviceKind::Heater, &mut short, 4), 0);
        let mut frame = vec![1, 4, 2, 0, 1, 0x78, 0xF0];
        assert_eq!(garble(DeviceKind::Thermometer, &mut frame, 1), 1);
        assert_eq!(frame[3], 0x80);
    }
}
