//! The simulated heater supply: SCPI-style, one channel per leg.
//!
//! The command set is our own invention ([`stilt_protocol::scpi::heater`]; copies no real
//! instrument). Channel `n` (1-based) drives leg `n − 1`'s heater, a resistor of the leg's
//! `heater_resistance_ohm`: with the output on at setpoint V it delivers V²/R to the stage,
//! `MEASure<n>:VOLTage?` reads V and `MEASure<n>:CURRent?` reads V/R. With the output off
//! both read 0. An open-circuit channel ([`HeaterSupply::set_open_circuit`]) still shows V
//! at its terminals but passes 0 A and delivers nothing. A stuck supply
//! ([`HeaterSupply::set_stuck`]) repeats the readbacks it had when the fault began.
//!
//! Program messages end with LF (a CR before it is white space); each message's queries are
//! answered in one response message, units joined by `;`. Errors go on the SCPI error queue
//! (read with `SYSTem:ERRor?`); a message longer than 1024 bytes is discarded up to its LF
//! with error −363 "Input buffer overrun". `*RST` turns every output off at 0 V.
//!
//! Main types: [`HeaterSupply`], [`HeaterState`], [`HeaterChannelState`].

use serde::Serialize;
use stilt_protocol::scpi::heater::{
    self, HeaterReply, HeaterRequest, MAX_CHANNELS, encode_response, parse_heater_message,
};
use stilt_protocol::scpi::{ErrorQueue, MAX_MESSAGE_LEN, Terminator, split_message};

/// The invented serial number in `*IDN?`.
pub const SERIAL: &str = "SIM-0001";
/// The invented firmware version in `*IDN?`.
pub const FIRMWARE: &str = "1.0";

/// One channel's state, as written to the state file and the summary.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct HeaterChannelState {
    /// Channel, 1-based (drives leg `channel − 1`).
    pub channel: u8,
    /// Voltage setpoint, V.
    pub volts: f64,
    /// Output on.
    pub on: bool,
    /// The heater's resistance, Ω.
    pub resistance_ohm: f64,
    /// What the master commanded: V²/R with the output on, else 0, W.
    pub commanded_power_w: f64,
    /// What reaches the leg (0 while open-circuit), W.
    pub delivered_power_w: f64,
    /// The channel is open-circuit (fault).
    pub open_circuit: bool,
}

/// The whole supply's state.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct HeaterState {
    /// Per channel.
    pub channels: Vec<HeaterChannelState>,
    /// Setting commands received (voltage, output state, `*RST`).
    pub commands: u64,
}

/// Counters of what the supply received.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct HeaterCounters {
    /// Program messages received.
    pub messages: u64,
    /// Queries answered.
    pub queries: u64,
    /// Setting commands executed.
    pub commands: u64,
    /// Errors put on the error queue.
    pub errors: u64,
}

/// The device side of the heater supply.
#[derive(Debug, Clone)]
pub struct HeaterSupply {
    resistance_ohm: Vec<f64>,
    volts: Vec<f64>,
    on: Vec<bool>,
    open: Vec<bool>,
    frozen: Option<Vec<(f64, f64)>>,
    errors: ErrorQueue,
    rx: Vec<u8>,
    discarding: bool,
    changed: bool,
    counters: HeaterCounters,
}

impl HeaterSupply {
    /// A supply with one channel per heater resistance (at most 8; at least 1), all off.
    pub fn new(resistance_ohm: &[f64]) -> Self {
        let mut r: Vec<f64> = resistance_ohm
            .iter()
            .take(usize::from(MAX_CHANNELS))
            .map(|&r| {
                if r.is_finite() && r > 0.0 {
                    r
                } else {
                    f64::INFINITY
                }
            })
            .collect();
        if r.is_empty() {
            r.push(f64::INFINITY);
        }
        let n = r.len();
        HeaterSupply {
            resistance_ohm: r,
            volts: vec![0.0; n],
            on: vec![false; n],
            open: vec![false; n],
            frozen: None,
            errors: ErrorQueue::default(),
            rx: Vec::new(),
            discarding: false,
            changed: false,
            counters: HeaterCounters::default(),
        }
    }

    /// Number of channels.
    pub fn channels(&self) -> u8 {
        self.volts.len() as u8
    }

    /// Marks channel `index` (0-based) open-circuit or mended.
    pub fn set_open_circuit(&mut self, index: usize, open: bool) {
        if let Some(o) = self.open.get_mut(index)
            && *o != open
        {
            *o = open;
            self.changed = true;
        }
    }

    /// Freezes (or thaws) the readbacks.
    pub fn set_stuck(&mut self, stuck: bool) {
        match (stuck, self.frozen.is_some()) {
            (true, false) => {
                self.frozen = Some(
                    (0..self.volts.len())
                        .map(|i| (self.measured_volts(i), self.measured_amps(i)))
                        .collect(),
                )
            }
            (false, true) => self.frozen = None,
            _ => {}
        }
    }

    /// The power channel `index` (0-based) delivers to its leg, W.
    pub fn delivered_power_w(&self, index: usize) -> f64 {
        if self.open.get(index).copied().unwrap_or(true) {
            0.0
        } else {
            self.commanded_power_w(index)
        }
    }

    /// The power the master's settings ask of channel `index`, W.
    pub fn commanded_power_w(&self, index: usize) -> f64 {
        match (self.on.get(index), self.volts.get(index)) {
            (Some(true), Some(v)) => v * v / self.resistance_ohm[index],
            _ => 0.0,
        }
    }

    fn measured_volts(&self, i: usize) -> f64 {
        if self.on[i] { self.volts[i] } else { 0.0 }
    }

    fn measured_amps(&self, i: usize) -> f64 {
        if self.on[i] && !self.open[i] {
            self.volts[i] / self.resistance_ohm[i]
        } else {
            0.0
        }
    }

    /// True once since the settings or an open circuit last changed.
    pub fn take_changed(&mut self) -> bool {
        std::mem::take(&mut self.changed)
    }

    /// The state of every channel.
    pub fn state(&self) -> HeaterState {
        HeaterState {
            channels: (0..self.volts.len())
                .map(|i| HeaterChannelState {
                    channel: i as u8 + 1,
                    volts: self.volts[i],
                    on: self.on[i],
                    resistance_ohm: self.resistance_ohm[i],
                    commanded_power_w: self.commanded_power_w(i),
                    delivered_power_w: self.delivered_power_w(i),
                    open_circuit: self.open[i],
                })
                .collect(),
            commands: self.counters.commands,
        }
    }

    /// What the supply received so far.
    pub fn counters(&self) -> HeaterCounters {
        self.counters
    }

    /// Forgets a partial message (after a disconnect).
    pub fn reset_input(&mut self) {
        self.rx.clear();
        self.discarding = false;
    }

    /// Accepts bytes from the master; appends one response message per program message
    /// that held queries.
    pub fn handle_bytes(&mut self, bytes: &[u8], replies: &mut Vec<Vec<u8>>) {
        self.rx.extend_from_slice(bytes);
        loop {
            if self.discarding {
                match self.rx.iter().position(|&b| b == b'\n') {
                    Some(p) => {
                        self.rx.drain(..=p);
                        self.discarding = false;
                    }
                    None => {
                        self.rx.clear();
                        return;
                    }
                }
            }
            match split_message(&self.rx, MAX_MESSAGE_LEN) {
                Ok(Some((msg, used))) => {
                    let msg = msg.to_vec();
                    self.rx.drain(..used);
                    if let Some(r) = self.execute(&msg) {
                        replies.push(r);
                    }
                }
                Ok(None) => return,
                Err(e) => {
                    self.errors.push_standard(e.standard());
                    self.counters.errors += 1;
                    self.discarding = true;
                }
            }
        }
    }

    fn execute(&mut self, msg: &[u8]) -> Option<Vec<u8>> {
        self.counters.messages += 1;
        let parsed = parse_heater_message(msg, self.channels());
        let mut replies = Vec::new();
        for req in parsed.requests {
            if let Some(r) = self.apply(req) {
                self.counters.queries += 1;
                replies.push(r);
            }
        }
        if let Some(e) = parsed.error {
            self.errors.push(e);
            self.counters.errors += 1;
        }
        let mut out = Vec::new();
        encode_response(&replies, Terminator::Lf, &mut out);
        (!out.is_empty()).then_some(out)
    }

    fn apply(&mut self, req: HeaterRequest) -> Option<HeaterReply> {
        use HeaterRequest as R;
        let ix = |c: u8| usize::from(c) - 1; // from_unit checked 1..=channels
        let readback = |s: &Self, i: usize| match &s.frozen {
            Some(f) => f[i],
            None => (s.measured_volts(i), s.measured_amps(i)),
        };
        match req {
            R::Identify => Some(HeaterReply::Identity(heater::simulated_identity(
                SERIAL, FIRMWARE,
            ))),
            R::Reset => {
                self.volts.iter_mut().for_each(|v| *v = 0.0);
                self.on.iter_mut().for_each(|o| *o = false);
                self.errors.clear();
                self.setting();
                None
            }
            R::ClearStatus => {
                self.errors.clear();
                None
            }
            R::OperationComplete => Some(HeaterReply::OperationComplete),
            R::NextError => Some(HeaterReply::Error(self.errors.pop())),
            R::ChannelCount => Some(HeaterReply::ChannelCount(self.channels())),
            R::SetVoltage { channel, volts } => {
                self.volts[ix(channel)] = volts;
                self.setting();
                None
            }
            R::QueryVoltage { channel } => Some(HeaterReply::Volts(self.volts[ix(channel)])),
            R::SetOutput { channel, on } => {
                self.on[ix(channel)] = on;
                self.setting();
                None
            }
            R::QueryOutput { channel } => Some(HeaterReply::Output(self.on[ix(channel)])),
            R::MeasureVoltage { channel } => {
                Some(HeaterReply::Volts(readback(self, ix(channel)).0))
            }
            R::MeasureCurrent { channel } => Some(HeaterReply::Amps(readback(self, ix(channel)).1)),
        }
    }

    fn setting(&mut self) {
        self.counters.commands += 1;
        self.changed = true;
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use stilt_protocol::scpi::{ErrorEntry, StandardError, split_response_units};

    fn supply() -> HeaterSupply {
        HeaterSupply::new(&[50.0, 50.0, 25.0])
    }

    /// The master's view: encode requests with the protocol crate, decode the one reply.
    fn ask(d: &mut HeaterSupply, reqs: &[HeaterRequest]) -> Vec<HeaterReply> {
        let mut tx = Vec::new();
        for (i, r) in reqs.iter().enumerate() {
            if i > 0 {
                tx.push(b';');
            }
            r.encode_unit(&mut tx);
        }
        tx.push(b'\n');
        let mut out = Vec::new();
        d.handle_bytes(&tx, &mut out);
        let queries: Vec<_> = reqs.iter().filter(|r| r.is_query()).collect();
        if queries.is_empty() {
            assert!(out.is_empty());
            return Vec::new();
        }
        assert_eq!(out.len(), 1);
        let (msg, used) = split_message(&out[0], MAX_MESSAGE_LEN).unwrap().unwrap();
        assert_eq!(used, out[0].len());
        let units = split_response_units(msg).unwrap();
        assert_eq!(units.len(), queries.len());
        queries
            .iter()
            .zip(units)
            .map(|(q, u)| q.decode_reply(u).unwrap())
            .collect()
    }

    #[test]
    fn set_voltage_delivers_v_squared_over_r_and_reads_back_ohms_law() {
        use HeaterRequest as R;
        let mut d = supply();
        ask(
            &mut d,
            &[
                R::SetVoltage {
                    channel: 1,
                    volts: 5.0,
                },
                R::SetOutput {
                    channel: 1,
                    on: true,
                },
            ],
        );
        assert!(d.take_changed() && !d.take_changed());
        // Joule heating P = V²/R, Ohm's law I = V/R (textbook physics): 25/50 W, 5/50 A.
        assert!((d.delivered_power_w(0) - 0.5).abs() < 1e-12);
        let r = ask(
            &mut d,
            &[
                R::MeasureVoltage { channel: 1 },
                R::MeasureCurrent { channel: 1 },
                R::QueryOutput { channel: 2 },
            ],
        );
        assert_eq!(
            r,
            vec![
                HeaterReply::Volts(5.0),
                HeaterReply::Amps(0.1),
                HeaterReply::Output(false)
            ]
        );
        let id = ask(&mut d, &[R::Identify, R::ChannelCount]);
        assert_eq!(id[1], HeaterReply::ChannelCount(3));
        let HeaterReply::Identity(id) = &id[0] else {
            panic!("{id:?}")
        };
        assert_eq!(id.manufacturer, heater::MANUFACTURER);
        ask(&mut d, &[R::Reset]);
        assert_eq!(d.delivered_power_w(0), 0.0);
        assert_eq!(d.state().commands, 3);
    }

    #[test]
    fn open_circuit_reads_zero_current_and_delivers_nothing() {
        use HeaterRequest as R;
        let mut d = supply();
        d.handle_bytes(b"OUTP3:VOLT 10;:OUTP3:STAT ON\n", &mut Vec::new());
        assert!((d.delivered_power_w(2) - 4.0).abs() < 1e-12);
        d.set_open_circuit(2, true);
        assert_eq!(d.delivered_power_w(2), 0.0);
        assert!((d.commanded_power_w(2) - 4.0).abs() < 1e-12);
        let r = ask(
            &mut d,
            &[
                R::MeasureVoltage { channel: 3 },
                R::MeasureCurrent { channel: 3 },
            ],
        );
        assert_eq!(r, vec![HeaterReply::Volts(10.0), HeaterReply::Amps(0.0)]);
        // The protocol crate's own open-circuit rule agrees with what the supply reports.
        let rule = heater::OpenCircuitRule {
            min_volts: 0.5,
            min_siemens: 0.1 / 25.0,
        };
        assert_eq!(rule.is_open(10.0, 0.0), Some(true));
        d.set_open_circuit(2, false);
        let r = ask(&mut d, &[R::MeasureCurrent { channel: 3 }]);
        assert_eq!(r, vec![HeaterReply::Amps(0.4)]);
        assert_eq!(rule.is_open(10.0, 0.4), Some(false));
    }

    #[test]
    fn errors_go_on_the_queue() {
        use HeaterRequest as R;
        let mut d = supply();
        let mut out = Vec::new();
        // Unknown header, channel 4 of 3, 30 V of at most 24 V: SCPI standard codes
        // −113 Undefined header, −114 Header suffix out of range, −222 Data out of range
        // (SCPI 1999.0 Vol 2 §21.8, from memory).
        d.handle_bytes(b"FOO:BAR 1\n:OUTP4:VOLT 1\n:OUTP1:VOLT 30\n", &mut out);
        assert!(out.is_empty());
        let codes: Vec<i16> = (0..4)
            .map(|_| match ask(&mut d, &[R::NextError]).pop() {
                Some(HeaterReply::Error(ErrorEntry { code, .. })) => code,
                other => panic!("{other:?}"),
            })
            .collect();
        assert_eq!(codes, vec![-113, -114, -222, 0]);
        assert_eq!(d.delivered_power_w(0), 0.0);
        // An overlong message is dropped up to its LF, then the supply listens again.
        d.handle_bytes(&[b'A'; 1500], &mut out);
        d.handle_bytes(b"AAAA\n*OPC?\n", &mut out);
        assert_eq!(out, vec![b"1\n".to_vec()]);
        let e = ask(&mut d, &[R::NextError]);
        assert_eq!(
            e,
            vec![HeaterReply::Error(ErrorEntry::standard(
                StandardError::InputBufferOverrun
            ))]
        );
    }

    #[test]
    fn stuck_readbacks_repeat() {
        use HeaterRequest as R;
        let mut d = supply();
        d.handle_bytes(b"OUTP1:VOLT 5;:OUTP1:STAT ON\n", &mut Vec::new());
        d.set_stuck(true);
        d.handle_bytes(b"OUTP1:VOLT 10\n", &mut Vec::new());
        assert_eq!(
            ask(&mut d, &[R::MeasureCurrent { channel: 1 }]),
            vec![HeaterReply::Amps(0.1)]
        );
        assert!(
            (d.delivered_power_w(0) - 2.0).abs() < 1e-12,
            "power follows the setting"
        );
        d.set_stuck(false);
        assert_eq!(
            ask(&mut d, &[R::MeasureCurrent { channel: 1 }]),
            vec![HeaterReply::Amps(0.2)]
        );
    }
}
