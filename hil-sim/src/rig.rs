//! [`Rig`]: the simulated stage with its three instruments and the fault schedule, sans-IO.
//!
//! The rig owns one [`SimStage`]; the tiltmeter and the thermometer read it, the heater
//! supply writes it. [`Rig::advance`] moves simulated time on, sampling the tiltmeter at its
//! configured rate and scanning the thermometer at its scan rate (both in simulated time), and
//! switching faults on and off at their scheduled simulated times. The I/O side feeds each
//! instrument's bytes to [`Rig::handle_input`] with the line time `now` (wall-clock time since
//! an arbitrary origin, for the Modbus silences and for late replies), calls
//! [`Rig::handle_timeout`] at [`Rig::poll_timeout`], and sends what [`Rig::poll_transmit`]
//! gives. Reply faults (lost, late, garbled, bad CRC, disconnect) are applied here, on the way
//! out, so the instruments themselves stay fault-free except for `stuck_value` and
//! `open_circuit`, which change what they measure.
//!
//! The thermometer line is a bus: it holds the units of the stage's
//! `[instruments.thermometer]` (one by default), each a [`Thermometer`] reading its own legs.
//! Every unit hears every frame and answers only its own address; a frame for no unit on
//! the bus gets silence, as a Modbus server must. Reply faults naming a `unit` apply to that
//! unit's replies only (recognised by their address byte).
//!
//! Main types: [`Rig`], [`Summary`], [`LinkCounters`], [`UnitSummary`].

use std::collections::VecDeque;
use std::time::Duration;

use serde::Serialize;
use stilt_config::Config;
use stilt_protocol::modbus::timing::{self, CharFormat};

use crate::SimStage;
use crate::devices::heater::{HeaterState, HeaterSupply};
use crate::devices::thermometer::Thermometer;
use crate::devices::tiltmeter::Tiltmeter;
use crate::devices::{DeviceKind, garble, invert_crc};
use crate::faults::{ActiveFaults, FaultError, FaultSchedule};

/// The tiltmeter line's baud rate, as written in the port map (a pty ignores it).
pub const TILTMETER_BAUD: u32 = 115_200;
/// The thermometer line's baud rate; it also sets the Modbus silences (t3.5 ≈ 2.0 ms).
pub const THERMOMETER_BAUD: u32 = 19_200;
/// The heater line's baud rate.
pub const HEATER_BAUD: u32 = 115_200;
/// The thermometer's Modbus unit address unless told otherwise.
pub const DEFAULT_THERMOMETER_UNIT: u8 = 1;
/// Most replies queued per instrument (late replies); older ones are dropped beyond it.
pub const MAX_QUEUED_REPLIES: usize = 64;

/// What went over one instrument's line.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize)]
pub struct LinkCounters {
    /// Bytes received from the master.
    pub bytes_in: u64,
    /// Bytes handed out for sending.
    pub bytes_out: u64,
    /// Request messages or frames received (whether answered or not).
    pub requests: u64,
    /// Requests the instrument rejected (unknown command, bad frame, SCPI error).
    pub rejected: u64,
    /// Replies handed out for sending.
    pub replies_sent: u64,
    /// Replies lost to `no_reply` or `disconnect` faults (or the queue bound).
    pub replies_lost: u64,
    /// Replies delayed by `late_reply`.
    pub replies_delayed: u64,
    /// Replies garbled.
    pub replies_garbled: u64,
    /// Replies sent with an inverted CRC.
    pub replies_bad_crc: u64,
    /// Input bytes thrown away while disconnected.
    pub input_discarded: u64,
}

/// What the rig served, for the binary's exit line.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Summary {
    /// Simulated time reached, s.
    pub sim_time_s: f64,
    /// Per instrument, in port-map order.
    pub tiltmeter: LinkCounters,
    /// The thermometer's line.
    pub thermometer: LinkCounters,
    /// The heater supply's line.
    pub heater: LinkCounters,
    /// Per unit of the thermometer bus, in address order.
    pub thermometer_units: Vec<UnitSummary>,
    /// The power the master last commanded per channel (V²/R with the output on), W.
    pub heater_power_w: Vec<f64>,
    /// The supply's full state.
    pub heater_state: HeaterState,
}

/// What one thermometer unit of the bus served, for the exit line.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize)]
pub struct UnitSummary {
    /// The unit's Modbus address.
    pub unit: u8,
    /// Frames for this unit that it answered.
    pub answered: u64,
    /// Frames for other units (heard on the bus, not answered).
    pub not_for_us: u64,
    /// Replies of this unit lost to `no_reply` faults (or the queue bound).
    pub replies_lost: u64,
}

/// One Modbus unit on the thermometer bus: the device and which leg each channel reads.
struct ThermoUnit {
    dev: Thermometer,
    /// (channel, leg index) of every leg this unit reads.
    legs: Vec<(u8, usize)>,
    replies_lost: u64,
}

/// The simulated stage, its instruments and their faults.
pub struct Rig {
    stage: SimStage,
    faults: FaultSchedule,
    tilt: Tiltmeter,
    /// The thermometer bus: one or more units, all hearing every frame on the one line.
    thermos: Vec<ThermoUnit>,
    heater: HeaterSupply,
    tilt_period_s: f64,
    tilt_n: u64,
    next_scan_s: f64,
    outbox: [VecDeque<(Duration, Vec<u8>)>; 3],
    links: [LinkCounters; 3],
    disconnected: [bool; 3],
}

impl Rig {
    /// A rig for the stage `cfg` describes, with its `[simulation]` physics and faults.
    /// The thermometer bus holds the units of `cfg`'s `[instruments.thermometer]` (each
    /// leg on its `thermometer_unit`), or, for a stage without `[instruments]`, one unit
    /// at `thermometer_unit` reading every leg. Fails if a fault names a heater channel
    /// or a thermometer unit the stage lacks.
    pub fn new(
        cfg: &Config,
        faults: FaultSchedule,
        thermometer_unit: u8,
    ) -> Result<Rig, FaultError> {
        let stage = SimStage::new(cfg);
        let resistances: Vec<f64> = cfg.legs.iter().map(|l| l.heater_resistance_ohm).collect();
        let heater = HeaterSupply::new(&resistances);
        faults.check_heater_channels(heater.channels(), "fault schedule")?;
        let th = cfg.instruments.as_ref().map(|i| &i.thermometer);
        let (units, leg_units): (Vec<u8>, Vec<u8>) = match th {
            Some(t) => (t.units.clone(), t.leg_units.clone()),
            None => (
                vec![thermometer_unit],
                vec![thermometer_unit; cfg.legs.len()],
            ),
        };
        faults.check_units(&units, "fault schedule")?;
        let framing = th.map_or(CharFormat::RTU_DEFAULT, |t| t.link.framing);
        let silences = timing::silences(THERMOMETER_BAUD, framing).unwrap_or(timing::Silences {
            char_time: Duration::from_micros(573),
            inter_char: timing::FIXED_INTER_CHAR,
            inter_frame: timing::FIXED_INTER_FRAME,
        });
        let mut sorted = units.clone();
        sorted.sort_unstable();
        let thermos = sorted
            .iter()
            .map(|&u| {
                let legs: Vec<(u8, usize)> = cfg
                    .legs
                    .iter()
                    .enumerate()
                    .filter(|(i, _)| leg_units.get(*i) == Some(&u))
                    .filter_map(|(i, l)| Some((u8::try_from(l.thermometer_channel).ok()?, i)))
                    .collect();
                let wired: Vec<usize> = legs.iter().map(|(c, _)| usize::from(*c)).collect();
                ThermoUnit {
                    dev: Thermometer::new(u, silences, &wired),
                    legs,
                    replies_lost: 0,
                }
            })
            .collect();
        let rate = stage.tilt_rate_hz();
        let mut rig = Rig {
            tilt_period_s: if rate > 0.0 && rate.is_finite() {
                1.0 / rate
            } else {
                0.1
            },
            stage,
            faults,
            tilt: Tiltmeter::new(),
            thermos,
            heater,
            tilt_n: 0,
            next_scan_s: 0.0,
            outbox: Default::default(),
            links: [LinkCounters::default(); 3],
            disconnected: [false; 3],
        };
        rig.refresh_faults();
        rig.take_due_samples();
        Ok(rig)
    }

    /// Simulated time, s.
    pub fn time_s(&self) -> f64 {
        self.stage.time_s()
    }

    /// The stage, for checks.
    pub fn stage(&self) -> &SimStage {
        &self.stage
    }

    /// The heater supply's state.
    pub fn heater_state(&self) -> HeaterState {
        self.heater.state()
    }

    /// True once after the heater settings (or an open circuit) changed.
    pub fn take_heater_changed(&mut self) -> bool {
        self.heater.take_changed()
    }

    /// The tiltmeter's current sample (what a query would get).
    pub fn tiltmeter(&self) -> &Tiltmeter {
        &self.tilt
    }

    /// The thermometer with the lowest address (for its reported values).
    pub fn thermometer(&self) -> &Thermometer {
        &self.thermos[0].dev
    }

    /// The thermometer unit at Modbus address `unit`, if the bus holds it.
    pub fn thermometer_unit(&self, unit: u8) -> Option<&Thermometer> {
        self.thermos
            .iter()
            .map(|t| &t.dev)
            .find(|d| d.unit() == unit)
    }

    /// The bus's unit addresses, ascending.
    pub fn thermometer_units(&self) -> Vec<u8> {
        self.thermos.iter().map(|t| t.dev.unit()).collect()
    }

    /// Advances simulated time by `dt_s`, taking samples and switching faults on the way.
    pub fn advance(&mut self, dt_s: f64) {
        if !(dt_s > 0.0 && dt_s.is_finite()) {
            return;
        }
        let end = self.stage.time_s() + dt_s;
        // Events are at most one per tilt period, scan period or fault edge; the bound only
        // guards against a pathological configuration looping forever.
        for _ in 0..10_000_000u32 {
            let t = self.stage.time_s();
            let next = self.next_tilt_s().min(self.next_scan_s).min(
                self.faults
                    .next_change_after(t + 1e-9)
                    .unwrap_or(f64::INFINITY),
            );
            if next > end {
                self.stage.advance(end - t);
                break;
            }
            self.stage.advance(next - t);
            self.refresh_faults();
            self.take_due_samples();
        }
        self.refresh_faults();
    }

    fn next_tilt_s(&self) -> f64 {
        self.tilt_n as f64 * self.tilt_period_s
    }

    fn take_due_samples(&mut self) {
        // Tolerance for the sum of steps not landing exactly on the event time.
        let now = self.stage.time_s() + 1e-9;
        while self.next_tilt_s() <= now {
            let reading = self.stage.read_tilt();
            let air = self.stage.truth().air_c;
            self.tilt.sample(reading, air);
            self.tilt_n += 1;
        }
        if self.next_scan_s <= now {
            // Every unit scans at the first unit's rate (they are set alike in practice).
            let stage = &mut self.stage;
            for t in &mut self.thermos {
                let legs = &t.legs;
                t.dev.scan(&mut |ch| {
                    let &(_, leg) = legs.iter().find(|(c, _)| *c == ch)?;
                    stage.read_leg_thermometer(leg)
                });
            }
            let period = self.thermos[0].dev.scan_period_s();
            self.next_scan_s += period;
            if self.next_scan_s <= now {
                self.next_scan_s = now + period;
            }
        }
    }

    /// Applies the faults active now to the instruments, and heater power to the stage.
    fn refresh_faults(&mut self) {
        let t = self.stage.time_s();
        for d in DeviceKind::ALL {
            let a = self.faults.active(d, t);
            match d {
                DeviceKind::Tiltmeter => self.tilt.set_stuck(a.stuck),
                DeviceKind::Thermometer => {
                    for th in &mut self.thermos {
                        let u = Some(th.dev.unit());
                        th.dev.set_stuck(self.faults.active_for(d, u, t).stuck);
                    }
                }
                DeviceKind::Heater => {
                    self.heater.set_stuck(a.stuck);
                    for i in 0..usize::from(self.heater.channels()) {
                        self.heater
                            .set_open_circuit(i, a.open_channels.contains(&(i as u8 + 1)));
                    }
                }
            }
            let i = d.index();
            if a.disconnect && !self.disconnected[i] {
                // The cable is pulled: whatever was half-received is lost.
                match d {
                    DeviceKind::Tiltmeter => self.tilt.reset_input(),
                    DeviceKind::Thermometer => {
                        self.thermos.iter_mut().for_each(|t| t.dev.reset_input())
                    }
                    DeviceKind::Heater => self.heater.reset_input(),
                }
                let lost = self.outbox[i].len() as u64;
                self.links[i].replies_lost += lost;
                self.outbox[i].clear();
            }
            self.disconnected[i] = a.disconnect;
        }
        self.apply_heater_power();
    }

    fn apply_heater_power(&mut self) {
        for i in 0..usize::from(self.heater.channels()) {
            self.stage
                .set_heater_power(i, self.heater.delivered_power_w(i));
        }
    }

    /// Bytes from the master of `device`, the last of them received at line time `now`.
    pub fn handle_input(&mut self, device: DeviceKind, now: Duration, bytes: &[u8]) {
        self.refresh_faults();
        let i = device.index();
        self.links[i].bytes_in += bytes.len() as u64;
        if self.disconnected[i] {
            self.links[i].input_discarded += bytes.len() as u64;
            return;
        }
        let mut replies = Vec::new();
        match device {
            DeviceKind::Tiltmeter => {
                let before = self.tilt.counters();
                self.tilt.handle_bytes(bytes, &mut replies);
                let after = self.tilt.counters();
                self.links[i].requests +=
                    after.queries - before.queries + after.unknown - before.unknown;
                self.links[i].rejected += after.unknown - before.unknown;
            }
            DeviceKind::Thermometer => self.thermo_turn(now, Some(bytes), &mut replies),
            DeviceKind::Heater => {
                let before = self.heater.counters();
                self.heater.handle_bytes(bytes, &mut replies);
                let after = self.heater.counters();
                self.links[i].requests += after.messages - before.messages;
                self.links[i].rejected += after.errors - before.errors;
                self.apply_heater_power();
            }
        }
        self.queue_replies(device, now, replies);
    }

    /// Every unit hears every byte on the bus; each answers only frames for its own address.
    fn thermo_turn(&mut self, now: Duration, bytes: Option<&[u8]>, replies: &mut Vec<Vec<u8>>) {
        // Every unit sees the same frames, so the line's counts are the first unit's.
        let before = self.thermos[0].dev.counters();
        for t in &mut self.thermos {
            match bytes {
                Some(b) => t.dev.handle_bytes(now, b, replies),
                None => t.dev.handle_timeout(now, replies),
            }
        }
        let after = self.thermos[0].dev.counters();
        let l = &mut self.links[DeviceKind::Thermometer.index()];
        l.requests += (after.answered - before.answered)
            + (after.bad_frames - before.bad_frames)
            + (after.not_for_us - before.not_for_us);
        l.rejected += after.bad_frames - before.bad_frames;
    }

    /// Applies the reply faults active now and queues what survives.
    fn queue_replies(&mut self, device: DeviceKind, now: Duration, replies: Vec<Vec<u8>>) {
        if replies.is_empty() {
            return;
        }
        let i = device.index();
        let line: ActiveFaults = self.faults.active(device, self.stage.time_s());
        for mut r in replies {
            // On the thermometer bus a reply's first byte is its unit's address: faults for
            // that unit apply to it, as well as those for the whole line.
            let unit = (device == DeviceKind::Thermometer)
                .then(|| r.first().copied())
                .flatten();
            let a = match unit {
                Some(u) => self.faults.active_for(device, Some(u), self.stage.time_s()),
                None => line.clone(),
            };
            let link = &mut self.links[i];
            if a.no_reply || a.disconnect {
                link.replies_lost += 1;
                if let Some(t) = self.thermos.iter_mut().find(|t| Some(t.dev.unit()) == unit) {
                    t.replies_lost += 1;
                }
                continue;
            }
            if let Some(n) = a.garble_bytes
                && garble(device, &mut r, n) > 0
            {
                link.replies_garbled += 1;
            }
            if a.bad_crc && device == DeviceKind::Thermometer {
                invert_crc(&mut r);
                link.replies_bad_crc += 1;
            }
            let mut due = now;
            if let Some(d) = a.delay {
                due += d;
                link.replies_delayed += 1;
            }
            // A serial line is first in, first out: never overtake a reply queued earlier.
            if let Some((last, _)) = self.outbox[i].back() {
                due = due.max(*last);
            }
            if self.outbox[i].len() >= MAX_QUEUED_REPLIES {
                self.outbox[i].pop_front();
                link.replies_lost += 1;
            }
            self.outbox[i].push_back((due, r));
        }
    }

    /// When [`Self::handle_timeout`] or [`Self::poll_transmit`] next has work for `device`.
    pub fn poll_timeout(&self, device: DeviceKind) -> Option<Duration> {
        let frame = match device {
            DeviceKind::Thermometer => self
                .thermos
                .iter()
                .filter_map(|t| t.dev.poll_timeout())
                .min(),
            _ => None,
        };
        let reply = self.outbox[device.index()].front().map(|(d, _)| *d);
        match (frame, reply) {
            (Some(a), Some(b)) => Some(a.min(b)),
            (a, b) => a.or(b),
        }
    }

    /// Lets time-driven work happen at line time `now` (closing a Modbus frame).
    pub fn handle_timeout(&mut self, device: DeviceKind, now: Duration) {
        if device == DeviceKind::Thermometer {
            self.refresh_faults();
            if self.disconnected[device.index()] {
                return;
            }
            let mut replies = Vec::new();
            self.thermo_turn(now, None, &mut replies);
            self.queue_replies(device, now, replies);
        }
    }

    /// The next reply due by line time `now`, if any.
    pub fn poll_transmit(&mut self, device: DeviceKind, now: Duration) -> Option<Vec<u8>> {
        let i = device.index();
        if self.disconnected[i] {
            return None;
        }
        if self.outbox[i].front().is_some_and(|(due, _)| *due <= now) {
            let (_, r) = self.outbox[i].pop_front()?;
            self.links[i].replies_sent += 1;
            self.links[i].bytes_out += r.len() as u64;
            return Some(r);
        }
        None
    }

    /// True while a `disconnect` fault holds `device`.
    pub fn is_disconnected(&self, device: DeviceKind) -> bool {
        self.disconnected[device.index()]
    }

    /// What went over `device`'s line so far.
    pub fn link(&self, device: DeviceKind) -> LinkCounters {
        self.links[device.index()]
    }

    /// Everything served so far, and the last heater settings.
    pub fn summary(&self) -> Summary {
        let heater_state = self.heater.state();
        Summary {
            sim_time_s: self.stage.time_s(),
            tiltmeter: self.links[0],
            thermometer: self.links[1],
            heater: self.links[2],
            thermometer_units: self
                .thermos
                .iter()
                .map(|t| {
                    let c = t.dev.counters();
                    UnitSummary {
                        unit: t.dev.unit(),
                        answered: c.answered,
                        not_for_us: c.not_for_us,
                        replies_lost: t.replies_lost,
                    }
                })
                .collect(),
            heater_power_w: heater_state
                .channels
                .iter()
                .map(|c| c.commanded_power_w)
                .collect(),
            heater_state,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::faults::{Fault, FaultKind};
    use stilt_protocol::line::tilt::{self, TiltSample};
    use stilt_protocol::modbus::{ModbusError, decode_response, encode_request, rtd};
    use stilt_protocol::scpi::heater::{HeaterReply, HeaterRequest};
    use stilt_protocol::scpi::{MAX_MESSAGE_LEN, split_message};

    fn demo() -> Config {
        stilt_config::load_str(stilt_config::DEMO_SCENARIO, "demo").unwrap()
    }

    fn rig(faults: Vec<Fault>) -> Rig {
        Rig::new(&demo(), FaultSchedule::new(faults), 1).unwrap()
    }

    fn fault(device: DeviceKind, kind: FaultKind, at_s: f64, duration_s: f64) -> Fault {
        Fault {
            device,
            kind,
            at_s,
            duration_s,
            unit: None,
        }
    }

    fn ms(v: u64) -> Duration {
        Duration::from_millis(v)
    }

    /// Sends `TLT?` at line time `now` and returns what is due at once.
    fn tilt_query(r: &mut Rig, now: Duration) -> Option<Vec<u8>> {
        r.handle_input(DeviceKind::Tiltmeter, now, tilt::QUERY);
        r.poll_transmit(DeviceKind::Tiltmeter, now)
    }

    /// One Modbus read of the scan counter at `now`, answered after the t3.5 silence.
    fn thermo_raw(r: &mut Rig, now: Duration) -> Option<Vec<u8>> {
        let mut tx = Vec::new();
        encode_request(1, &rtd::read_resistances(0, 3).unwrap(), &mut tx).unwrap();
        r.handle_input(DeviceKind::Thermometer, now, &tx);
        let due = r.poll_timeout(DeviceKind::Thermometer)?;
        r.handle_timeout(DeviceKind::Thermometer, due);
        r.poll_transmit(DeviceKind::Thermometer, due)
    }

    fn heater(r: &mut Rig, now: Duration, msg: &[u8]) -> Option<Vec<u8>> {
        r.handle_input(DeviceKind::Heater, now, msg);
        r.poll_transmit(DeviceKind::Heater, now)
    }

    fn amps(reply: &[u8]) -> f64 {
        let (unit, _) = split_message(reply, MAX_MESSAGE_LEN).unwrap().unwrap();
        match (HeaterRequest::MeasureCurrent { channel: 2 }).decode_reply(unit) {
            Ok(HeaterReply::Amps(a)) => a,
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn tiltmeter_samples_at_its_rate_in_simulated_time() {
        let mut r = rig(vec![]);
        for _ in 0..100 {
            r.advance(0.01);
        }
        // Demo rate 10 Hz: samples at t = 0, 0.1, …, 1.0.
        assert_eq!(r.tiltmeter().counters().samples, 11);
        r.advance(9.0);
        assert_eq!(r.tiltmeter().counters().samples, 101);
        let reply = tilt_query(&mut r, ms(0)).unwrap();
        let spec = tilt::default_spec().unwrap();
        let (reading, _) = spec.decode(&reply).unwrap().unwrap();
        let s = TiltSample::from_reading(&spec, &reading).unwrap();
        let truth = r.stage().truth().plate_tilt_urad;
        // Noise is ≈ 22 nrad per sample in the demo (10 nrad/√Hz at 10 Hz).
        assert!((s.x_urad - truth[0]).abs() < 0.5 && (s.y_urad - truth[1]).abs() < 0.5);
        assert_eq!(s.status, 0);
    }

    #[test]
    fn thermometer_reports_the_leg_temperature_as_pt100_resistance() {
        let mut r = rig(vec![]);
        r.advance(1.0);
        let raw = thermo_raw(&mut r, ms(0)).unwrap();
        let req = rtd::read_resistances(0, 3).unwrap();
        let (resp, _) = decode_response(&raw, 1, &req).unwrap().unwrap();
        let ohms = rtd::parse_resistances(&resp, 3).unwrap();
        let legs = r.stage().truth().leg_temp_c;
        for (o, t) in ohms.iter().zip(legs) {
            let back = stilt_protocol::convert::PlatinumRtd::PT100
                .temperature(o.unwrap())
                .unwrap();
            // 1 mK noise in the demo; 0.1 mΩ quantum ≈ 0.26 mK.
            assert!((back - t).abs() < 0.01, "{back} vs {t}");
        }
    }

    /// The demo stage with leg C on channel 0 of unit 2, on a two-unit thermometer bus.
    fn bus() -> Config {
        let text = format!(
            "{}\n{}",
            stilt_config::DEMO_SCENARIO.replace(
                "thermometer_channel = 2\n",
                "thermometer_channel = 0\nthermometer_unit = 2\n"
            ),
            "[instruments.tiltmeter]\nport = \"a\"\n\
             [instruments.thermometer]\nport = \"b\"\nunit = 1\nunits = [2, 1]\n\
             [instruments.heater]\nport = \"c\"\n"
        );
        stilt_config::load_str(&text, "bus").unwrap()
    }

    /// Reads `count` resistances from `unit` at `now`; the reply (if any) after t3.5.
    fn unit_read(r: &mut Rig, unit: u8, count: u8, now: Duration) -> Option<Vec<f64>> {
        let req = rtd::read_resistances(0, count).unwrap();
        let mut tx = Vec::new();
        encode_request(unit, &req, &mut tx).unwrap();
        r.handle_input(DeviceKind::Thermometer, now, &tx);
        let due = r.poll_timeout(DeviceKind::Thermometer)?;
        r.handle_timeout(DeviceKind::Thermometer, due);
        let raw = r.poll_transmit(DeviceKind::Thermometer, due)?;
        // Exactly one unit answered: nothing else is queued.
        assert_eq!(
            r.poll_transmit(DeviceKind::Thermometer, due + ms(100)),
            None
        );
        let (resp, _) = decode_response(&raw, unit, &req).unwrap().unwrap();
        let ohms = rtd::parse_resistances(&resp, count).unwrap();
        Some(
            ohms.iter()
                .map(|o| {
                    o.map_or(f64::NAN, |o| {
                        stilt_protocol::convert::PlatinumRtd::PT100
                            .temperature(o)
                            .unwrap()
                    })
                })
                .collect(),
        )
    }

    #[test]
    fn a_bus_answers_only_its_own_units_and_a_unit_fault_hits_only_that_unit() {
        let silent = Fault {
            unit: Some(2),
            ..fault(DeviceKind::Thermometer, FaultKind::NoReply, 2.0, 1.0)
        };
        let mut r = Rig::new(&bus(), FaultSchedule::new(vec![silent]), 9).unwrap();
        assert_eq!(r.thermometer_units(), vec![1, 2]);
        r.advance(1.0);
        let legs = r.stage().truth().leg_temp_c;
        // Unit 1 reads legs A and B on channels 0 and 1; unit 2 reads leg C on channel 0
        // and has nothing wired on channel 1 ("open": no reading).
        let u1 = unit_read(&mut r, 1, 2, ms(0)).unwrap();
        let u2 = unit_read(&mut r, 2, 2, ms(10)).unwrap();
        // 1 mK noise in the demo; 0.1 mΩ quantum ≈ 0.26 mK.
        assert!((u1[0] - legs[0]).abs() < 0.01 && (u1[1] - legs[1]).abs() < 0.01);
        assert!((u2[0] - legs[2]).abs() < 0.01 && u2[1].is_nan(), "{u2:?}");
        // A frame for a unit the bus lacks (the CLI's unit 9 is not used: the stage has
        // its own) gets silence from every unit (Modbus over Serial Line §2.2).
        assert_eq!(unit_read(&mut r, 9, 2, ms(20)), None);
        // While unit 2's no_reply fault is active, unit 1 still answers.
        r.advance(1.5);
        assert!(unit_read(&mut r, 1, 2, ms(30)).is_some());
        assert_eq!(unit_read(&mut r, 2, 2, ms(40)), None);
        r.advance(1.0);
        assert!(unit_read(&mut r, 2, 2, ms(50)).is_some());
        let s = r.summary();
        let by = |u: u8| *s.thermometer_units.iter().find(|x| x.unit == u).unwrap();
        assert_eq!((by(1).answered, by(1).replies_lost), (2, 0));
        assert_eq!((by(2).answered, by(2).replies_lost), (3, 1));
        // Each unit heard the other's frames and the stray one without answering.
        assert_eq!(by(1).not_for_us, 4);
        assert_eq!(s.thermometer.requests, 6);
        assert_eq!(s.thermometer.replies_lost, 1);
        // A fault naming a unit the bus lacks is refused when the rig starts.
        let stray = Fault {
            unit: Some(3),
            ..fault(DeviceKind::Thermometer, FaultKind::NoReply, 0.0, 1.0)
        };
        let e = Rig::new(&bus(), FaultSchedule::new(vec![stray]), 1)
            .err()
            .unwrap();
        assert_eq!(e.key, "unit");
    }

    #[test]
    fn heater_power_reaches_the_stage_and_open_circuit_cuts_it() {
        let oc = FaultKind::OpenCircuit { channel: 2 };
        let mut r = rig(vec![fault(DeviceKind::Heater, oc, 10.0, 5.0)]);
        assert_eq!(
            heater(&mut r, ms(0), b"OUTP2:VOLT 8;:OUTP2:STAT ON\n"),
            None
        );
        assert!(r.take_heater_changed());
        // P = V²/R = 64/50 W (demo heaters are 50 Ω).
        assert!((r.stage().truth().heater_power_w[1] - 1.28).abs() < 1e-12);
        assert!((amps(&heater(&mut r, ms(1), b"MEAS2:CURR?\n").unwrap()) - 0.16).abs() < 1e-9);
        r.advance(11.0);
        assert_eq!(r.stage().truth().heater_power_w[1], 0.0);
        assert_eq!(amps(&heater(&mut r, ms(2), b"MEAS2:CURR?\n").unwrap()), 0.0);
        assert!(r.summary().heater_state.channels[1].open_circuit);
        assert!(
            (r.summary().heater_power_w[1] - 1.28).abs() < 1e-12,
            "commanded stays"
        );
        r.advance(5.0);
        assert!((r.stage().truth().heater_power_w[1] - 1.28).abs() < 1e-12);
        assert!((amps(&heater(&mut r, ms(3), b"MEAS2:CURR?\n").unwrap()) - 0.16).abs() < 1e-9);
    }

    #[test]
    fn no_reply_loses_replies_until_the_fault_ends() {
        let mut r = rig(vec![fault(
            DeviceKind::Tiltmeter,
            FaultKind::NoReply,
            1.0,
            2.0,
        )]);
        assert!(tilt_query(&mut r, ms(0)).is_some());
        r.advance(1.5);
        assert!(tilt_query(&mut r, ms(10)).is_none());
        assert_eq!(
            r.poll_timeout(DeviceKind::Tiltmeter),
            None,
            "nothing queued"
        );
        r.advance(1.5);
        assert!(tilt_query(&mut r, ms(20)).is_some());
        let l = r.link(DeviceKind::Tiltmeter);
        assert_eq!((l.requests, l.replies_sent, l.replies_lost), (3, 2, 1));
    }

    #[test]
    fn late_reply_waits_in_wall_clock_time_and_keeps_order() {
        let late = FaultKind::LateReply { delay: ms(300) };
        let mut r = rig(vec![fault(DeviceKind::Heater, late, 0.0, 1.0)]);
        assert_eq!(heater(&mut r, ms(100), b"*OPC?\n"), None);
        assert_eq!(r.poll_timeout(DeviceKind::Heater), Some(ms(400)));
        assert_eq!(r.poll_transmit(DeviceKind::Heater, ms(399)), None);
        assert_eq!(
            r.poll_transmit(DeviceKind::Heater, ms(400)),
            Some(b"1\n".to_vec())
        );
        // A reply made after the fault ends still waits behind one queued during it.
        r.handle_input(DeviceKind::Heater, ms(500), b"*OPC?\n");
        r.advance(2.0);
        r.handle_input(DeviceKind::Heater, ms(600), b"SYST:CHAN?\n");
        assert_eq!(r.poll_transmit(DeviceKind::Heater, ms(700)), None);
        assert_eq!(
            r.poll_transmit(DeviceKind::Heater, ms(800)),
            Some(b"1\n".to_vec())
        );
        assert_eq!(
            r.poll_transmit(DeviceKind::Heater, ms(800)),
            Some(b"3\n".to_vec())
        );
    }

    #[test]
    fn garbled_and_bad_crc_replies_are_caught_by_the_master_decoders() {
        let g = FaultKind::Garbled { bytes: 2 };
        let mut r = rig(vec![
            fault(DeviceKind::Tiltmeter, g, 0.0, 1.0),
            fault(DeviceKind::Thermometer, g, 0.0, 1.0),
            fault(DeviceKind::Heater, g, 0.0, 1.0),
            fault(DeviceKind::Thermometer, FaultKind::BadCrc, 2.0, 1.0),
        ]);
        let spec = tilt::default_spec().unwrap();
        let t = tilt_query(&mut r, ms(0)).unwrap();
        assert!(spec.decode(&t).is_err(), "{t:?}");
        let req = rtd::read_resistances(0, 3).unwrap();
        let raw = thermo_raw(&mut r, ms(10)).unwrap();
        assert!(matches!(
            decode_response(&raw, 1, &req),
            Err(ModbusError::Crc { .. })
        ));
        let h = heater(&mut r, ms(20), b"MEAS2:CURR?\n").unwrap();
        let (unit, _) = split_message(&h, MAX_MESSAGE_LEN).unwrap().unwrap();
        assert!(
            (HeaterRequest::MeasureCurrent { channel: 2 })
                .decode_reply(unit)
                .is_err()
        );
        r.advance(2.5);
        let raw = thermo_raw(&mut r, ms(30)).unwrap();
        assert!(matches!(
            decode_response(&raw, 1, &req),
            Err(ModbusError::Crc { .. })
        ));
        r.advance(1.0);
        let raw = thermo_raw(&mut r, ms(40)).unwrap();
        assert!(decode_response(&raw, 1, &req).unwrap().is_some());
        assert!(spec.decode(&tilt_query(&mut r, ms(50)).unwrap()).is_ok());
        let l = r.link(DeviceKind::Thermometer);
        assert_eq!((l.replies_garbled, l.replies_bad_crc), (1, 1));
    }

    #[test]
    fn disconnect_drops_everything_both_ways_then_recovers() {
        let late = FaultKind::LateReply { delay: ms(500) };
        let mut r = rig(vec![
            fault(DeviceKind::Tiltmeter, late, 0.0, 1.0),
            fault(DeviceKind::Tiltmeter, FaultKind::Disconnect, 1.0, 1.0),
        ]);
        // A late reply queued before the cable is pulled never arrives; a half command is lost.
        r.handle_input(DeviceKind::Tiltmeter, ms(0), tilt::QUERY);
        r.handle_input(DeviceKind::Tiltmeter, ms(1), b"TL");
        r.advance(1.2);
        assert!(r.is_disconnected(DeviceKind::Tiltmeter));
        assert_eq!(r.poll_transmit(DeviceKind::Tiltmeter, ms(600)), None);
        assert!(tilt_query(&mut r, ms(700)).is_none());
        r.advance(1.0);
        assert!(!r.is_disconnected(DeviceKind::Tiltmeter));
        // "T?\r" would complete the half command if it had been kept: it is answered E,1.
        let first = {
            r.handle_input(DeviceKind::Tiltmeter, ms(800), b"T?\r");
            r.poll_transmit(DeviceKind::Tiltmeter, ms(800))
        };
        assert_eq!(first, Some(tilt::UNKNOWN_COMMAND_REPLY.to_vec()));
        assert!(tilt_query(&mut r, ms(900)).unwrap().starts_with(b"T,"));
        let l = r.link(DeviceKind::Tiltmeter);
        assert_eq!(l.input_discarded, tilt::QUERY.len() as u64);
        assert_eq!(l.replies_lost, 1);
    }

    #[test]
    fn stuck_thermometer_repeats_while_the_leg_heats() {
        let mut r = rig(vec![fault(
            DeviceKind::Thermometer,
            FaultKind::StuckValue,
            5.0,
            100.0,
        )]);
        heater(&mut r, ms(0), b"OUTP1:VOLT 10;:OUTP1:STAT ON\n");
        r.advance(5.0);
        let stuck = r.thermometer().reported_ohms(0).unwrap();
        let t0 = r.stage().truth().leg_temp_c[0];
        r.advance(90.0);
        assert!(
            r.stage().truth().leg_temp_c[0] > t0 + 0.005,
            "2 W heats the leg"
        );
        assert_eq!(r.thermometer().reported_ohms(0), Some(stuck));
        r.advance(20.0);
        assert!(r.thermometer().reported_ohms(0).unwrap() > stuck);
    }
}

#[cfg(test)]
mod never_panic {
    use super::*;
    use crate::faults::{Fault, FaultKind};
    use proptest::prelude::*;

    proptest! {
        /// Any bytes, in any chunking, on any line, under every reply fault: no panic, and
        /// the queues stay bounded.
        #[test]
        fn any_bytes_on_any_line(
            chunks in proptest::collection::vec(
                (0usize..3, proptest::collection::vec(any::<u8>(), 0..300), 0u64..20),
                1..40,
            ),
            garble in 1usize..16,
        ) {
            let cfg = stilt_config::load_str(stilt_config::DEMO_SCENARIO, "demo").unwrap();
            let faults = DeviceKind::ALL
                .into_iter()
                .flat_map(|device| {
                    [
                        FaultKind::Garbled { bytes: garble },
                        FaultKind::LateReply { delay: Duration::from_millis(3) },
                        FaultKind::StuckValue,
                    ]
                    .map(|kind| Fault { device, kind, at_s: 0.5, duration_s: 1.0, unit: None })
                })
                .collect();
            let mut r = Rig::new(&cfg, FaultSchedule::new(faults), 1).unwrap();
            let mut now = Duration::ZERO;
            for (dev, bytes, gap_ms) in chunks {
                let d = DeviceKind::ALL[dev];
                now += Duration::from_millis(gap_ms);
                r.advance(gap_ms as f64 / 10.0);
                r.handle_input(d, now, &bytes);
                if let Some(t) = r.poll_timeout(d) {
                    r.handle_timeout(d, t.max(now));
                }
                while r.poll_transmit(d, now + Duration::from_millis(5)).is_some() {}
                prop_assert!(r.outbox[d.index()].len() <= MAX_QUEUED_REPLIES);
            }
            let s = r.summary();
            prop_assert!(s.heater_power_w.iter().all(|p| p.is_finite() && *p >= 0.0));
        }
    }
}
