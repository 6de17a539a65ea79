//! The acquisition tasks against in-test fake devices over real pseudo-terminals
//! (`tokio_serial::SerialStream::pair()`), in real time, each test bounded to a few seconds
//! (paused time with real I/O fires timeouts early: ecosystem notes §6).
//!
//! The fake devices speak the device side of the protocol crate's codecs; their behaviour
//! (silent, garbled, open circuit, values) is switched from the test.

use std::sync::{Arc, Mutex};
use std::time::Duration;

use stilt_protocol::line::tilt::{self, TiltCommand, TiltSample as DevTilt};
use stilt_protocol::modbus::{self, ExceptionCode, RegisterBank, rtd};
use stilt_protocol::scpi::Terminator;
use stilt_protocol::scpi::heater::{self, HeaterReply, HeaterRequest};
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio_serial::SerialStream;

use super::link::Outcome;
use super::*;
use crate::rows::MemorySink;

/// The demo stage with three instruments on fake ports, short timeouts, no retries.
fn config() -> Config {
    let text = format!(
        "{}\n{}",
        stilt_config::DEMO_SCENARIO,
        r#"
[instruments.tiltmeter]
port = "fake-tilt"
poll_hz = 20.0
timeout_ms = 60
retries = 0

[instruments.thermometer]
port = "fake-thermo"
poll_hz = 10.0
timeout_ms = 60
retries = 0
stale_after_s = 0.4

[instruments.heater]
port = "fake-heater"
timeout_ms = 60
retries = 0
readback_tolerance_w = 0.05
"#
    );
    stilt_config::load_str(&text, "test").unwrap()
}

/// Hands out the slave ends the test pushes; fails (like a missing device) when none waits.
struct PairOpener {
    name: String,
    rx: std::sync::mpsc::Receiver<SerialStream>,
}

impl Opener for PairOpener {
    fn open(&mut self) -> std::io::Result<BoxPort> {
        self.rx
            .try_recv()
            .map(|s| Box::pin(s) as BoxPort)
            .map_err(|_| std::io::Error::from(std::io::ErrorKind::NotFound))
    }
    fn name(&self) -> String {
        self.name.clone()
    }
}

/// What the fake devices do; shared with the test.
#[derive(Debug, Default, Clone)]
struct Behaviour {
    silent: bool,
    garble: bool,
    tilt_raw: [f64; 2],
    tilt_status: u8,
    ohms: [f64; 3],
    open_sensor: bool,
    open_heater: bool,
    volts: [f64; 3],
    requests: u64,
    /// Units the fake thermometer answers as (empty: any).
    units: Vec<u8>,
    /// A unit that stays silent (the others answer).
    silent_unit: Option<u8>,
    /// What unit 2 reads on its channels, Ω.
    ohms_unit2: [f64; 3],
}

type B = Arc<Mutex<Behaviour>>;

fn b(f: &B) -> std::sync::MutexGuard<'_, Behaviour> {
    f.lock().unwrap()
}

async fn tilt_device(mut m: SerialStream, beh: B) {
    let mut buf = Vec::new();
    let mut chunk = [0u8; 256];
    loop {
        let n = match m.read(&mut chunk).await {
            Ok(0) | Err(_) => return,
            Ok(n) => n,
        };
        buf.extend_from_slice(&chunk[..n]);
        while let Some((cmd, used)) = tilt::decode_command(&buf) {
            buf.drain(..used);
            let bh = {
                let mut g = b(&beh);
                g.requests += 1;
                g.clone()
            };
            if bh.silent || cmd != TiltCommand::Read {
                continue;
            }
            let mut out = Vec::new();
            if bh.garble {
                out.extend_from_slice(b"T,+00x1.23,zz\r\n");
            } else {
                DevTilt {
                    x_urad: bh.tilt_raw[0] / tilt::RAW_PER_URAD,
                    y_urad: bh.tilt_raw[1] / tilt::RAW_PER_URAD,
                    temperature_c: 21.0,
                    status: bh.tilt_status,
                }
                .encode(&mut out)
                .unwrap();
            }
            if m.write_all(&out).await.is_err() {
                return;
            }
        }
    }
}

struct Bank(Behaviour, u8);

impl RegisterBank for Bank {
    fn read_holding(&self, _: u16) -> Result<u16, ExceptionCode> {
        Err(ExceptionCode::IllegalDataAddress)
    }
    fn read_input(&self, a: u16) -> Result<u16, ExceptionCode> {
        if let Some(m) = rtd::scan_record_alias(a) {
            return self.read_input(m);
        }
        if a < rtd::STATUS_BASE {
            let ch = usize::from(a / 2);
            let table = if self.1 == 2 {
                &self.0.ohms_unit2
            } else {
                &self.0.ohms
            };
            let ohms = table.get(ch).copied().unwrap_or(100.0);
            let w = rtd::encode_resistance(ohms).map_err(|_| ExceptionCode::ServerDeviceFailure)?;
            Ok(w[usize::from(a % 2)])
        } else if a < rtd::STATUS_BASE + 8 {
            let ch = a - rtd::STATUS_BASE;
            Ok(if self.0.open_sensor && ch == 1 {
                rtd::ChannelStatus::OPEN
            } else {
                0
            })
        } else {
            Err(ExceptionCode::IllegalDataAddress)
        }
    }
    fn write_holding(&mut self, _: u16, _: u16) {}
}

async fn thermo_device(mut m: SerialStream, beh: B) {
    let mut buf = Vec::new();
    let mut chunk = [0u8; 256];
    loop {
        let n = match m.read(&mut chunk).await {
            Ok(0) | Err(_) => return,
            Ok(n) => n,
        };
        buf.extend_from_slice(&chunk[..n]);
        while let Ok(Some((frame, used))) = modbus::decode_request(&buf) {
            buf.drain(..used);
            let bh = {
                let mut g = b(&beh);
                g.requests += 1;
                g.clone()
            };
            // A server answers only its own address (Modbus over Serial Line §2.2).
            let ours = bh.units.is_empty() || bh.units.contains(&frame.unit);
            if bh.silent || !ours || bh.silent_unit == Some(frame.unit) {
                continue;
            }
            let resp = modbus::serve(&frame.request, &mut Bank(bh.clone(), frame.unit));
            let mut out = Vec::new();
            modbus::encode_response(frame.unit, &resp, &mut out).unwrap();
            if bh.garble {
                let last = out.len() - 1;
                out[last] ^= 0xFF; // wrong CRC
            }
            if m.write_all(&out).await.is_err() {
                return;
            }
        }
        if buf.len() > 512 {
            buf.clear();
        }
    }
}

const R_HEATER: f64 = 50.0;

async fn heater_device(mut m: SerialStream, beh: B) {
    let mut buf = Vec::new();
    let mut chunk = [0u8; 256];
    loop {
        let n = match m.read(&mut chunk).await {
            Ok(0) | Err(_) => return,
            Ok(n) => n,
        };
        buf.extend_from_slice(&chunk[..n]);
        while let Some(i) = buf.iter().position(|&c| c == b'\n') {
            let line: Vec<u8> = buf.drain(..=i).collect();
            let msg = heater::parse_heater_message(&line[..line.len() - 1], 8);
            let mut replies = Vec::new();
            {
                let mut g = b(&beh);
                g.requests += 1;
                for r in &msg.requests {
                    match *r {
                        HeaterRequest::SetVoltage { channel, volts } => {
                            if let Some(v) = g.volts.get_mut(usize::from(channel) - 1) {
                                *v = volts;
                            }
                        }
                        HeaterRequest::MeasureCurrent { channel } => {
                            let v = g
                                .volts
                                .get(usize::from(channel) - 1)
                                .copied()
                                .unwrap_or(0.0);
                            let a = if g.open_heater && channel == 2 {
                                0.0
                            } else {
                                v / R_HEATER
                            };
                            replies.push(HeaterReply::Amps(a));
                        }
                        _ => {}
                    }
                }
            }
            let mut out = Vec::new();
            heater::encode_response(&replies, Terminator::Lf, &mut out);
            if !out.is_empty() && m.write_all(&out).await.is_err() {
                return;
            }
        }
    }
}

struct Rig {
    backend: SerialBackend,
    beh: B,
    tx: [std::sync::mpsc::Sender<SerialStream>; 3],
}

/// Pairs a fresh pty for instrument `k` (0 tilt, 1 thermo, 2 heater), starts its device.
fn plug(k: usize, tx: &std::sync::mpsc::Sender<SerialStream>, beh: &B) {
    let (master, slave) = SerialStream::pair().expect("pty pair");
    tx.send(slave).unwrap();
    let beh = beh.clone();
    match k {
        0 => tokio::spawn(tilt_device(master, beh)),
        1 => tokio::spawn(thermo_device(master, beh)),
        _ => tokio::spawn(heater_device(master, beh)),
    };
}

fn rig() -> Rig {
    rig_with(config(), Vec::new())
}

/// [`rig`] on `cfg`, the fake thermometer answering as `units` (empty: any).
fn rig_with(cfg: Config, units: Vec<u8>) -> Rig {
    let beh: B = Arc::new(Mutex::new(Behaviour {
        tilt_raw: [123.4567, -45.6789],
        // IEC 60751:2008 table values for Pt100 (from memory): 0 °C → 100.000 Ω,
        // 25 °C → 109.735 Ω, 100 °C → 138.506 Ω.
        ohms: [100.0, 109.735, 138.5055],
        // IEC 60751 (from memory): 50 °C → 119.397 Ω.
        ohms_unit2: [119.397, 100.0, 100.0],
        units,
        ..Behaviour::default()
    }));
    let mk = |name: &str| {
        let (tx, rx) = std::sync::mpsc::channel();
        (
            tx,
            Box::new(PairOpener {
                name: name.into(),
                rx,
            }) as Box<dyn Opener>,
        )
    };
    let (t0, o0) = mk("fake-tilt");
    let (t1, o1) = mk("fake-thermo");
    let (t2, o2) = mk("fake-heater");
    for (k, tx) in [&t0, &t1, &t2].into_iter().enumerate() {
        plug(k, tx, &beh);
    }
    let backend = SerialBackend::start_with(
        &cfg,
        Openers {
            tiltmeter: o0,
            thermometer: o1,
            heater: o2,
        },
    )
    .unwrap();
    Rig {
        backend,
        beh,
        tx: [t0, t1, t2],
    }
}

/// Polls every 50 ms until `done` holds (or `limit` passes); returns every tilt sample seen
/// and the last readings.
async fn poll_until(
    r: &mut SerialBackend,
    limit: Duration,
    mut done: impl FnMut(&AcqReadings, &[(f64, [f64; 2], Quality)]) -> bool,
) -> (Vec<(f64, [f64; 2], Quality)>, AcqReadings) {
    let start = Instant::now();
    let mut all = Vec::new();
    loop {
        tokio::time::sleep(Duration::from_millis(50)).await;
        let rd = r.poll(secs_since(start) + 1000.0);
        all.extend(rd.tilt.iter().copied());
        if done(&rd, &all) || start.elapsed() > limit {
            return (all, rd);
        }
    }
}

#[tokio::test]
async fn tilt_samples_flow_and_timeouts_and_garbage_are_flagged_and_recovered() {
    let mut r = rig();
    let (all, rd) = poll_until(&mut r.backend, Duration::from_secs(3), |_, all| {
        all.iter().filter(|s| s.2 == Quality::Ok).count() >= 5
    })
    .await;
    let ok: Vec<_> = all.iter().filter(|s| s.2 == Quality::Ok).collect();
    assert!(ok.len() >= 5, "{all:?}");
    // The raw values arrive as the device formats them (4 decimals of 0.1 µrad units).
    assert!((ok[0].1[0] - 123.4567).abs() < 1e-9, "{:?}", ok[0]);
    assert!((ok[0].1[1] + 45.6789).abs() < 1e-9, "{:?}", ok[0]);
    // Run-clock times are increasing and near the poll's clock (offset 1000 s).
    assert!(ok.windows(2).all(|w| w[1].0 > w[0].0));
    assert!(ok[0].0 > 999.0 && ok[0].0 < 1010.0, "{:?}", ok[0]);
    assert!(rd.channels[TILTMETER].connected);

    b(&r.beh).silent = true;
    let before = r.backend.poll(0.0).channels[TILTMETER].timeouts;
    let (all, rd) = poll_until(&mut r.backend, Duration::from_secs(3), |_, all| {
        all.iter().filter(|s| s.2 == Quality::Timeout).count() >= 3
    })
    .await;
    assert!(all.iter().filter(|s| s.2 == Quality::Timeout).count() >= 3);
    assert!(
        all.iter()
            .filter(|s| s.2 == Quality::Timeout)
            .all(|s| s.1[0].is_nan())
    );
    assert!(
        rd.channels[TILTMETER].timeouts >= before + 3,
        "{:?}",
        rd.channels
    );

    {
        let mut g = b(&r.beh);
        g.silent = false;
        g.garble = true;
    }
    let (all, rd) = poll_until(&mut r.backend, Duration::from_secs(3), |_, all| {
        all.iter().filter(|s| s.2 == Quality::BadFrame).count() >= 2
    })
    .await;
    assert!(all.iter().any(|s| s.2 == Quality::BadFrame), "{all:?}");
    assert!(rd.channels[TILTMETER].bad_frames >= 2);

    {
        let mut g = b(&r.beh);
        g.garble = false;
        g.tilt_status = tilt::STATUS_OUT_OF_RANGE;
    }
    let (all, _) = poll_until(&mut r.backend, Duration::from_secs(3), |_, all| {
        all.iter().any(|s| s.2 == Quality::OutOfRange)
    })
    .await;
    assert!(all.iter().any(|s| s.2 == Quality::OutOfRange), "{all:?}");

    b(&r.beh).tilt_status = 0;
    let (all, _) = poll_until(&mut r.backend, Duration::from_secs(3), |_, all| {
        all.iter().rev().take(3).all(|s| s.2 == Quality::Ok) && all.len() >= 3
    })
    .await;
    assert!(
        all.iter().rev().take(3).all(|s| s.2 == Quality::Ok),
        "{all:?}"
    );
}

#[tokio::test]
async fn a_silent_port_is_dropped_by_the_watchdog_and_reopened() {
    let mut r = rig();
    poll_until(&mut r.backend, Duration::from_secs(3), |rd, _| {
        rd.channels[TILTMETER].requests >= 3
    })
    .await;
    // The device stops answering but its port stays open (no EOF, as on some drivers):
    // ten failed requests in a row drop the port anyway.
    b(&r.beh).silent = true;
    let (_, rd) = poll_until(&mut r.backend, Duration::from_secs(4), |rd, _| {
        !rd.channels[TILTMETER].connected
    })
    .await;
    assert!(!rd.channels[TILTMETER].connected, "{:?}", rd.channels);
    assert!(rd.channels[TILTMETER].timeouts >= u64::from(link::REOPEN_AFTER_FAILURES));
    b(&r.beh).silent = false;
    plug(0, &r.tx[0], &r.beh);
    let (all, rd) = poll_until(&mut r.backend, Duration::from_secs(4), |rd, all| {
        rd.channels[TILTMETER].connected && all.iter().any(|s| s.2 == Quality::Ok)
    })
    .await;
    assert!(rd.channels[TILTMETER].connected);
    assert_eq!(rd.channels[TILTMETER].reconnects, 1, "{:?}", rd.channels);
    assert!(all.iter().any(|s| s.2 == Quality::Ok));
}

#[tokio::test]
async fn eof_on_the_port_reconnects_and_the_fault_sink_writes_both_events() {
    let cfg = config();
    let beh: B = Arc::new(Mutex::new(Behaviour::default()));
    let (tx, rx) = std::sync::mpsc::channel();
    let (master, slave) = SerialStream::pair().unwrap();
    tx.send(slave).unwrap();
    let dev = tokio::spawn(tilt_device(master, beh.clone()));
    let none = |n: &str| {
        let (_t, rx) = std::sync::mpsc::channel();
        std::mem::forget(_t);
        Box::new(PairOpener { name: n.into(), rx }) as Box<dyn Opener>
    };
    let mut backend = SerialBackend::start_with(
        &cfg,
        Openers {
            tiltmeter: Box::new(PairOpener {
                name: "fake-tilt".into(),
                rx,
            }),
            thermometer: none("t"),
            heater: none("h"),
        },
    )
    .unwrap();
    let handle = backend.handle();
    poll_until(&mut backend, Duration::from_secs(3), |_, all| {
        all.iter().any(|s| s.2 == Quality::Ok)
    })
    .await;
    // Unplug: the device side closes, the daemon side reads EOF.
    dev.abort();
    let _ = dev.await;
    let (_, rd) = poll_until(&mut backend, Duration::from_secs(3), |rd, _| {
        !rd.channels[TILTMETER].connected
    })
    .await;
    assert!(!rd.channels[TILTMETER].connected);
    // Replug.
    let (master, slave) = SerialStream::pair().unwrap();
    tx.send(slave).unwrap();
    tokio::spawn(tilt_device(master, beh.clone()));
    let (_, rd) = poll_until(&mut backend, Duration::from_secs(4), |rd, all| {
        rd.channels[TILTMETER].reconnects == 1 && all.iter().any(|s| s.2 == Quality::Ok)
    })
    .await;
    assert_eq!(rd.channels[TILTMETER].reconnects, 1);
    assert!(rd.channels[TILTMETER].connected);

    struct Shared2(Arc<Mutex<MemorySink>>);
    impl RowSink for Shared2 {
        fn tilt(&mut self, s: &TiltSample) {
            self.0.lock().unwrap().tilt(s)
        }
        fn control(&mut self, r: &ControlRow) {
            self.0.lock().unwrap().control(r)
        }
        fn event(&mut self, e: &EventRow) {
            self.0.lock().unwrap().event(e)
        }
        fn finish(&mut self) -> Result<SinkReport, SinkError> {
            Ok(SinkReport::default())
        }
    }
    let mem = Arc::new(Mutex::new(MemorySink::default()));
    let mut sink = FaultSink::new(Box::new(Shared2(mem.clone())), &handle, now_utc_ns());
    sink.finish().unwrap();
    let ev = mem.lock().unwrap().events.clone();
    assert!(
        ev.iter()
            .any(|e| e.kind == EventKind::Fault && e.detail.contains("lost")),
        "{ev:?}"
    );
    assert!(
        ev.iter()
            .any(|e| e.detail.starts_with("cleared: reconnected")),
        "{ev:?}"
    );
    assert!(ev.iter().all(|e| e.source == "tiltmeter"));
}

#[tokio::test]
async fn leg_temperatures_follow_iec_60751_and_go_stale_then_timeout() {
    let mut r = rig();
    let (_, rd) = poll_until(&mut r.backend, Duration::from_secs(3), |rd, _| {
        rd.leg_temps.iter().all(|t| t.1 == Quality::Ok)
    })
    .await;
    // IEC 60751 table (from memory): 109.735 Ω ↔ 25.00 °C, 138.506 Ω ↔ 100.00 °C.
    let t: Vec<f64> = rd.leg_temps.iter().map(|t| t.0).collect();
    assert!(t[0].abs() < 1e-6, "{t:?}");
    assert!((t[1] - 25.0).abs() < 0.005, "{t:?}");
    assert!((t[2] - 100.0).abs() < 0.005, "{t:?}");
    assert!(rd.leg_temp_age_s.iter().all(|a| a.is_some_and(|a| a < 0.4)));

    // An open sensor is out of range at once (a positive statement of the device).
    b(&r.beh).open_sensor = true;
    let (_, rd) = poll_until(&mut r.backend, Duration::from_secs(3), |rd, _| {
        rd.leg_temps[1].1 == Quality::OutOfRange
    })
    .await;
    assert_eq!(rd.leg_temps[1].1, Quality::OutOfRange);
    assert_eq!(rd.leg_temps[0].1, Quality::Ok);
    b(&r.beh).open_sensor = false;

    // A silent device: the last value stays usable until stale_after_s, then the failure shows.
    b(&r.beh).silent = true;
    let (_, rd) = poll_until(&mut r.backend, Duration::from_secs(3), |rd, _| {
        rd.leg_temps[0].1 == Quality::Timeout
    })
    .await;
    assert_eq!(rd.leg_temps[0].1, Quality::Timeout, "{rd:?}");
    assert!(rd.leg_temp_age_s[0].is_some_and(|a| a > 0.4));
    assert!(rd.channels[THERMOMETER].timeouts >= 1);

    // A wrong CRC is a bad frame.
    {
        let mut g = b(&r.beh);
        g.silent = false;
        g.garble = true;
    }
    let (_, rd) = poll_until(&mut r.backend, Duration::from_secs(3), |rd, _| {
        rd.leg_temps[0].1 == Quality::BadFrame
    })
    .await;
    assert_eq!(rd.leg_temps[0].1, Quality::BadFrame);
    assert!(rd.channels[THERMOMETER].bad_frames >= 1);

    b(&r.beh).garble = false;
    let (_, rd) = poll_until(&mut r.backend, Duration::from_secs(3), |rd, _| {
        rd.leg_temps.iter().all(|t| t.1 == Quality::Ok)
    })
    .await;
    assert!(rd.leg_temps.iter().all(|t| t.1 == Quality::Ok), "{rd:?}");
}

/// [`config`] with leg C moved to channel 0 of unit 2 (a two-unit bus).
fn bus_config() -> Config {
    let text = format!(
        "{}\n{}",
        stilt_config::DEMO_SCENARIO.replace(
            "thermometer_channel = 2\n",
            "thermometer_channel = 0\nthermometer_unit = 2\n"
        ),
        r#"
[instruments.tiltmeter]
port = "fake-tilt"
poll_hz = 20.0
timeout_ms = 60
retries = 0

[instruments.thermometer]
port = "fake-thermo"
units = [1, 2]
poll_hz = 10.0
timeout_ms = 60
retries = 0
stale_after_s = 0.4

[instruments.heater]
port = "fake-heater"
timeout_ms = 60
retries = 0
readback_tolerance_w = 0.05
"#
    );
    stilt_config::load_str(&text, "test").unwrap()
}

fn named<'a>(rd: &'a AcqReadings, name: &str) -> &'a ChannelStatus {
    rd.channels
        .iter()
        .find(|c| c.name == name)
        .unwrap_or_else(|| panic!("no channel {name}: {:?}", rd.channels))
}

#[tokio::test]
async fn a_silent_unit_on_a_bus_marks_only_its_legs_and_counters() {
    let cfg = bus_config();
    assert_eq!(thermo_slots(&cfg), vec![0, 1, CHANNELS_PER_UNIT]);
    let mut r = rig_with(cfg, vec![1, 2]);
    let (_, rd) = poll_until(&mut r.backend, Duration::from_secs(3), |rd, _| {
        rd.leg_temps.iter().all(|t| t.1 == Quality::Ok)
    })
    .await;
    // IEC 60751 table (from memory): 109.735 Ω ↔ 25.00 °C; 119.397 Ω ↔ 50.00 °C.
    assert!((rd.leg_temps[1].0 - 25.0).abs() < 0.005, "{rd:?}");
    assert!((rd.leg_temps[2].0 - 50.0).abs() < 0.005, "{rd:?}");
    // One scan-record transaction per unit per scan: each unit was read at least once.
    assert!(named(&rd, "thermometer@1").requests >= 1);
    assert!(named(&rd, "thermometer@2").requests >= 1);
    assert!(named(&rd, "thermometer@2").connected);
    // The line's channel keeps the totals.
    let total = named(&rd, "thermometer").requests;
    assert!(
        total >= named(&rd, "thermometer@1").requests + named(&rd, "thermometer@2").requests - 2
    );

    // Unit 2 goes silent: leg C times out; legs A and B (unit 1) stay ok.
    b(&r.beh).silent_unit = Some(2);
    let (_, rd) = poll_until(&mut r.backend, Duration::from_secs(3), |rd, _| {
        rd.leg_temps[2].1 == Quality::Timeout
    })
    .await;
    assert_eq!(rd.leg_temps[2].1, Quality::Timeout, "{rd:?}");
    assert_eq!(rd.leg_temps[0].1, Quality::Ok, "{rd:?}");
    assert_eq!(rd.leg_temps[1].1, Quality::Ok, "{rd:?}");
    assert!(rd.leg_temp_age_s[0].is_some_and(|a| a < 0.4), "{rd:?}");
    assert!(named(&rd, "thermometer@2").timeouts >= 1);
    assert_eq!(named(&rd, "thermometer@1").timeouts, 0);
    // Unit 1's replies keep the line open: a silent unit is not a dead line.
    assert!(named(&rd, "thermometer").connected);
    assert_eq!(named(&rd, "thermometer").reconnects, 0);

    b(&r.beh).silent_unit = None;
    let (_, rd) = poll_until(&mut r.backend, Duration::from_secs(3), |rd, _| {
        rd.leg_temps.iter().all(|t| t.1 == Quality::Ok)
    })
    .await;
    assert!(rd.leg_temps.iter().all(|t| t.1 == Quality::Ok), "{rd:?}");
}

#[test]
fn serial_settings_follow_the_configured_framing() {
    use stilt_protocol::modbus::timing::{CharFormat, Parity};
    let f = |data_bits, parity, stop_bits| CharFormat {
        data_bits,
        parity,
        stop_bits,
    };
    assert_eq!(
        link::serial_settings(CharFormat::RTU_DEFAULT),
        (
            tokio_serial::DataBits::Eight,
            tokio_serial::Parity::Even,
            tokio_serial::StopBits::One
        )
    );
    assert_eq!(
        link::serial_settings(f(7, Parity::Odd, 2)),
        (
            tokio_serial::DataBits::Seven,
            tokio_serial::Parity::Odd,
            tokio_serial::StopBits::Two
        )
    );
    assert_eq!(
        link::serial_settings(f(8, Parity::None, 2)).1,
        tokio_serial::Parity::None
    );
}

#[tokio::test]
async fn heater_commands_go_out_are_read_back_and_a_mismatch_is_reported() {
    let mut r = rig();
    let handle = r.backend.handle();
    // 5 V across 50 Ω = 0.5 W; 7.0711 V = 1 W.
    let volts = [5.0, 7.0711, 0.0];
    r.backend.apply(0.0, &[0.5, 1.0, 0.0], &volts);
    let (_, rd) = poll_until(&mut r.backend, Duration::from_secs(3), |rd, _| {
        rd.readback_power_w.iter().all(|p| p.is_some())
    })
    .await;
    let got = b(&r.beh).volts;
    for k in 0..3 {
        assert!((got[k] - volts[k]).abs() < 1e-6, "{got:?}");
    }
    let p: Vec<f64> = rd.readback_power_w.iter().map(|p| p.unwrap()).collect();
    assert!(
        (p[0] - 0.5).abs() < 1e-3 && (p[1] - 1.0).abs() < 1e-3,
        "{p:?}"
    );
    assert!(handle.mismatches().iter().all(|m| !m));

    // Leg B's heater goes open circuit: no current, the mismatch is flagged and counted.
    b(&r.beh).open_heater = true;
    for _ in 0..40 {
        r.backend.apply(0.0, &[0.5, 1.0, 0.0], &volts);
        tokio::time::sleep(Duration::from_millis(50)).await;
        if handle.mismatches()[1] {
            break;
        }
    }
    assert_eq!(handle.mismatches(), vec![false, true, false]);
    let ch = handle.channels();
    assert!(ch[HEATER_READBACK].bad_frames >= 1, "{ch:?}");
    assert!(handle.shared().with(|s| {
        s.events
            .iter()
            .any(|e| e.fault && e.detail.contains("output 2"))
    }));

    // It clears when the heater works again.
    b(&r.beh).open_heater = false;
    for _ in 0..40 {
        r.backend.apply(0.0, &[0.5, 1.0, 0.0], &volts);
        tokio::time::sleep(Duration::from_millis(50)).await;
        if !handle.mismatches()[1] {
            break;
        }
    }
    assert!(!handle.mismatches()[1]);

    // Shutdown: every output to 0 V, confirmed by the task.
    assert!(handle.zero_heaters(Duration::from_secs(2)).await);
    assert_eq!(b(&r.beh).volts, [0.0; 3]);
}

#[test]
fn leg_temperature_rules() {
    let ok = |t: f64, q| {
        Some(Stamped {
            value: 20.0,
            quality: q,
            t_acq_s: t,
            t_utc_ns: 0,
        })
    };
    let slot = |last, failure| TempSlot { last, failure };
    // Fresh: its own quality.
    assert_eq!(
        leg_temp(&slot(ok(9.5, Quality::Ok), None), 10.0, 1.0).1,
        Quality::Ok
    );
    assert_eq!(
        leg_temp(&slot(ok(9.5, Quality::OutOfRange), None), 10.0, 1.0).1,
        Quality::OutOfRange
    );
    // A failure after a fresh reading does not hide it.
    assert_eq!(
        leg_temp(
            &slot(ok(9.5, Quality::Ok), Some((9.8, Quality::Timeout))),
            10.0,
            1.0
        )
        .1,
        Quality::Ok
    );
    // Old reading, later failure: the failure.
    let (v, q, age) = leg_temp(
        &slot(ok(5.0, Quality::Ok), Some((9.8, Quality::Timeout))),
        10.0,
        1.0,
    );
    assert_eq!((v, q, age), (20.0, Quality::Timeout, Some(5.0)));
    // Old reading, no failure since: stale.
    assert_eq!(
        leg_temp(
            &slot(ok(5.0, Quality::Ok), Some((4.0, Quality::Timeout))),
            10.0,
            1.0
        )
        .1,
        Quality::Stale
    );
    // Never read.
    let (v, q, age) = leg_temp(&slot(None, None), 10.0, 1.0);
    assert!(v.is_nan() && q == Quality::Missing && age.is_none());
    assert_eq!(
        leg_temp(&slot(None, Some((1.0, Quality::BadFrame))), 10.0, 1.0).1,
        Quality::BadFrame
    );
}

#[test]
fn readback_mismatch_rule() {
    // 10 V across 50 Ω is 2 W; 0.2 A through 50 Ω is 2 W.
    assert!(!super::heater::mismatch(10.0, 0.2, 50.0, 0.05));
    assert!(super::heater::mismatch(10.0, 0.0, 50.0, 0.05));
    assert!(super::heater::mismatch(10.0, f64::NAN, 50.0, 0.05));
    assert!(!super::heater::mismatch(0.0, 0.0, 50.0, 0.05));
}

#[test]
fn backoff_doubles_to_its_limit_and_resets() {
    let mut b = Backoff::default();
    let d: Vec<u64> = (0..8).map(|_| b.next_delay().as_millis() as u64).collect();
    assert_eq!(d, [100, 200, 400, 800, 1600, 3200, 5000, 5000]);
    b.reset();
    assert_eq!(b.next_delay().as_millis(), 100);
}

#[test]
fn a_repeating_value_is_timed_from_its_first_sighting() {
    let mut s = super::tilt::Stuck::default();
    assert_eq!(s.repeats_for([1.0, 2.0], 0.0), 0.0);
    assert_eq!(s.repeats_for([1.0, 2.0], 0.5), 0.5);
    assert_eq!(s.repeats_for([1.0, 2.0], 1.25), 1.25);
    // A new value starts over.
    assert_eq!(s.repeats_for([1.0, 2.01], 1.5), 0.0);
    assert_eq!(s.repeats_for([1.0, 2.01], 2.0), 0.5);
}

/// Hands out one in-memory stream, then reports the device missing.
struct DuplexOpener(Option<tokio::io::DuplexStream>);

impl Opener for DuplexOpener {
    fn open(&mut self) -> std::io::Result<BoxPort> {
        self.0
            .take()
            .map(|s| Box::pin(s) as BoxPort)
            .ok_or_else(|| std::io::Error::from(std::io::ErrorKind::NotFound))
    }
    fn name(&self) -> String {
        "duplex".into()
    }
}

/// The reply timeout and the retry, in virtual time over an in-memory pipe (paused time is
/// exact here, unlike with real I/O: ecosystem notes §6). The device answers each query
/// 150 ms and then 50 ms after reading it; the timeout is 100 ms with one retry.
#[tokio::test(start_paused = true)]
async fn a_late_reply_times_out_and_the_retry_gets_the_answer_in_virtual_time() {
    use stilt_protocol::line::LineQuery;
    use stilt_protocol::session::Session;
    let (daemon_end, mut dev) = tokio::io::duplex(256);
    let shared = Shared::default();
    shared.with(|s| s.channels = vec![ChannelStatus::default(); 4]);
    let origin = Instant::now();
    let mut line = link::Line::new(
        Box::new(DuplexOpener(Some(daemon_end))),
        shared.clone(),
        TILTMETER,
        origin,
    );
    let device = tokio::spawn(async move {
        let mut buf = [0u8; 64];
        for delay_ms in [150u64, 50] {
            let n = dev.read(&mut buf).await.unwrap();
            assert_eq!(&buf[..n], tilt::QUERY);
            tokio::time::sleep(Duration::from_millis(delay_ms)).await;
            dev.write_all(b"T,+0001.0000,-0002.0000,20.00,0\r\n")
                .await
                .unwrap();
        }
        dev
    });
    let spec = Arc::new(config().instruments.unwrap().tiltmeter.spec);
    let mut session =
        Session::<LineQuery>::new(link::session_config(100, 1, 128, Duration::from_millis(1)));
    let t0 = Instant::now();
    let out = line.request(&mut session, LineQuery(spec.clone())).await;
    let elapsed = t0.elapsed();
    let Outcome::Reply(r) = out else {
        panic!("{out:?}")
    };
    assert_eq!(spec.value(&r, "x"), Some(1.0));
    // The first attempt timed out at 100 ms and the retry left at 101 ms; the first reply,
    // 50 ms after its deadline, arrived while the retry was waiting and was taken as the
    // answer (these protocols carry no sequence numbers: a value can be up to one timeout
    // late, never wrong in kind). Virtual time makes this exact.
    assert_eq!(elapsed, Duration::from_millis(150), "{elapsed:?}");
    let c = shared.with(|s| s.channels[TILTMETER].clone());
    assert_eq!((c.requests, c.timeouts, c.bad_frames), (1, 1, 0));
    assert_eq!(session.stats().retries, 1);
    let _ = device.await.unwrap();
}
