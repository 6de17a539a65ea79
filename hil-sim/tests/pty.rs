//! The `stilt-hil-sim` binary over real pseudo-terminals, in real time.
//!
//! Each test spawns the binary, waits for its `ready` line, reads the port map, opens the
//! slave paths with tokio-serial as the daemon would, and talks to the instruments with the
//! protocol crate's master-side encoders and decoders. Timeouts are bounded; the tests run in
//! real time because a paused tokio clock jumps ahead whenever the runtime waits on real I/O
//! (see the project's ecosystem notes).

use std::io::{BufRead, BufReader};
use std::path::PathBuf;
use std::process::{Child, Command, Stdio};
use std::sync::mpsc;
use std::time::{Duration, Instant};

use stilt_hil_sim::portmap::PortMap;
use stilt_protocol::convert::PlatinumRtd;
use stilt_protocol::line::tilt::{self, TiltSample};
use stilt_protocol::modbus::{self, decode_response, encode_request, rtd};
use stilt_protocol::scpi::heater::{HeaterReply, HeaterRequest};
use stilt_protocol::scpi::{MAX_MESSAGE_LEN, Terminator, split_message};
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio_serial::{SerialPortBuilderExt, SerialStream};

/// A running simulator; killed on drop if the test did not stop it.
struct Sim {
    child: Child,
    lines: mpsc::Receiver<String>,
    dir: PathBuf,
    ready_at: Instant,
}

fn scratch(name: &str) -> PathBuf {
    let dir = std::env::temp_dir().join(format!("stilt-hil-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

impl Sim {
    fn start(name: &str, extra: &[&str], faults: Option<&str>) -> Sim {
        let dir = scratch(name);
        let mut args: Vec<String> = vec![
            "--port-map".into(),
            dir.join("ports.toml").display().to_string(),
            "--state".into(),
            dir.join("state.json").display().to_string(),
            // A safety net: the simulator stops by itself even if a test forgets it.
            "--duration".into(),
            "30".into(),
        ];
        if let Some(f) = faults {
            let p = dir.join("faults.toml");
            std::fs::write(&p, f).unwrap();
            args.push("--faults".into());
            args.push(p.display().to_string());
        }
        args.extend(extra.iter().map(|s| s.to_string()));
        let mut child = Command::new(env!("CARGO_BIN_EXE_stilt-hil-sim"))
            .args(&args)
            .stdout(Stdio::piped())
            .stderr(Stdio::null())
            .spawn()
            .unwrap();
        let stdout = child.stdout.take().unwrap();
        let (tx, lines) = mpsc::channel();
        std::thread::spawn(move || {
            for line in BufReader::new(stdout).lines().map_while(Result::ok) {
                if tx.send(line).is_err() {
                    break;
                }
            }
        });
        let first = lines.recv_timeout(Duration::from_secs(10));
        assert_eq!(first.as_deref(), Ok("ready"));
        Sim {
            child,
            lines,
            dir,
            ready_at: Instant::now(),
        }
    }

    fn map(&self) -> PortMap {
        let p = self.dir.join("ports.toml");
        PortMap::parse(&std::fs::read_to_string(&p).unwrap(), "ports.toml").unwrap()
    }

    fn state(&self) -> serde_json::Value {
        let text = std::fs::read_to_string(self.dir.join("state.json")).unwrap();
        serde_json::from_str(&text).unwrap()
    }

    /// SIGTERM, then the exit summary.
    fn stop(mut self) -> serde_json::Value {
        let st = Command::new("kill")
            .args(["-TERM", &self.child.id().to_string()])
            .status()
            .unwrap();
        assert!(st.success());
        let line = self.lines.recv_timeout(Duration::from_secs(5)).unwrap();
        let status = self.child.wait().unwrap();
        assert!(status.success(), "{status:?}");
        serde_json::from_str(&line).unwrap()
    }
}

impl Drop for Sim {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
        let _ = std::fs::remove_dir_all(&self.dir);
    }
}

fn open(path: &str, baud: u32) -> SerialStream {
    tokio_serial::new(path, baud).open_native_async().unwrap()
}

/// Sends `tx`, then reads until `done` accepts the bytes or `limit` passes.
async fn exchange(
    port: &mut SerialStream,
    tx: &[u8],
    limit: Duration,
    done: impl Fn(&[u8]) -> bool,
) -> Result<Vec<u8>, Vec<u8>> {
    AsyncWriteExt::write_all(port, tx).await.unwrap();
    let mut got = Vec::new();
    let mut buf = [0u8; 256];
    let end = tokio::time::Instant::now() + limit;
    while !done(&got) {
        match tokio::time::timeout_at(end, port.read(&mut buf)).await {
            Ok(Ok(n)) if n > 0 => got.extend_from_slice(&buf[..n]),
            _ => return Err(got),
        }
    }
    Ok(got)
}

fn crlf(b: &[u8]) -> bool {
    b.ends_with(b"\r\n")
}

fn lf(b: &[u8]) -> bool {
    b.ends_with(b"\n")
}

const LIMIT: Duration = Duration::from_secs(2);

async fn tilt_sample(port: &mut SerialStream, limit: Duration) -> Result<TiltSample, Vec<u8>> {
    let reply = exchange(port, tilt::QUERY, limit, crlf).await?;
    let spec = tilt::default_spec().unwrap();
    let (r, _) = spec
        .decode(&reply)
        .map_err(|_| reply.clone())?
        .ok_or(reply)?;
    Ok(TiltSample::from_reading(&spec, &r).unwrap())
}

fn modbus_done(req: &modbus::Request) -> impl Fn(&[u8]) -> bool + '_ {
    // Complete once the decoder has an answer, good or bad (a CRC error is an answer).
    move |b: &[u8]| !matches!(decode_response(b, 1, req), Ok(None))
}

fn heater_amps(reply: &[u8], channel: u8) -> f64 {
    let (unit, _) = split_message(reply, MAX_MESSAGE_LEN).unwrap().unwrap();
    match (HeaterRequest::MeasureCurrent { channel }).decode_reply(unit) {
        Ok(HeaterReply::Amps(a)) => a,
        other => panic!("{other:?}"),
    }
}

fn heater_cmd(reqs: &[HeaterRequest]) -> Vec<u8> {
    let mut tx = Vec::new();
    for r in reqs {
        r.encode(Terminator::Lf, &mut tx);
    }
    tx
}

#[tokio::test]
async fn serves_each_instrument_over_its_pty() {
    let sim = Sim::start("serve", &[], None);
    let map = sim.map();
    assert_eq!(
        (
            map.tiltmeter_baud,
            map.thermometer_baud,
            map.heater_baud,
            map.thermometer_unit
        ),
        (115_200, 19_200, 115_200, 1)
    );

    // Tiltmeter: within the demo's ±500 µrad range, no status bits.
    let mut tilt_port = open(&map.tiltmeter, map.tiltmeter_baud);
    let s = tilt_sample(&mut tilt_port, LIMIT).await.unwrap();
    assert!(s.x_urad.abs() < 500.0 && s.y_urad.abs() < 500.0 && s.status == 0);
    // The daemon may let go and come back: the simulator survives the EIO in between.
    drop(tilt_port);
    tokio::time::sleep(Duration::from_millis(200)).await;
    let mut tilt_port = open(&map.tiltmeter, map.tiltmeter_baud);
    assert!(tilt_sample(&mut tilt_port, LIMIT).await.is_ok());

    // Thermometer: three Pt100 legs near the demo room's 21 °C mean.
    let mut thermo = open(&map.thermometer, map.thermometer_baud);
    let req = rtd::read_resistances(0, 3).unwrap();
    let mut tx = Vec::new();
    encode_request(1, &req, &mut tx).unwrap();
    let rx = exchange(&mut thermo, &tx, LIMIT, modbus_done(&req))
        .await
        .unwrap();
    let (resp, _) = decode_response(&rx, 1, &req).unwrap().unwrap();
    for ohms in rtd::parse_resistances(&resp, 3).unwrap() {
        let t = PlatinumRtd::PT100.temperature(ohms.unwrap()).unwrap();
        assert!((15.0..27.0).contains(&t), "{t} °C");
    }

    // Heater: 5 V on channel 1 of a 50 Ω heater reads back 0.1 A (Ohm's law).
    let mut heater = open(&map.heater, map.heater_baud);
    let set = heater_cmd(&[
        HeaterRequest::SetVoltage {
            channel: 1,
            volts: 5.0,
        },
        HeaterRequest::SetOutput {
            channel: 1,
            on: true,
        },
        HeaterRequest::MeasureCurrent { channel: 1 },
    ]);
    let rx = exchange(&mut heater, &set, LIMIT, lf).await.unwrap();
    assert!((heater_amps(&rx, 1) - 0.1).abs() < 1e-9);
    // The state file already shows what was commanded.
    let st = sim.state();
    assert_eq!(st["channels"][0]["volts"], 5.0);
    assert_eq!(st["channels"][0]["on"], true);

    let summary = sim.stop();
    // P = V²/R = 25/50 W.
    assert_eq!(summary["heater_power_w"][0], 0.5);
    assert_eq!(summary["heater_power_w"][1], 0.0);
    assert_eq!(summary["tiltmeter"]["replies_sent"], 2);
    assert_eq!(summary["thermometer"]["replies_sent"], 1);
    assert_eq!(summary["heater"]["requests"], 3);
}

#[tokio::test]
async fn faults_over_ptys_no_reply_then_recovery_garbled_and_open_circuit() {
    let faults = r#"
        [[fault]]
        device = "tiltmeter"
        kind = "no_reply"
        at_s = 0
        duration_s = 1.5

        [[fault]]
        device = "thermometer"
        kind = "garbled"
        at_s = 0
        duration_s = 1000

        [[fault]]
        device = "heater"
        kind = "open_circuit"
        channel = 1
        at_s = 0
        duration_s = 1000
    "#;
    let sim = Sim::start("faults", &[], Some(faults));
    let map = sim.map();
    let mut tilt_port = open(&map.tiltmeter, map.tiltmeter_baud);
    let lost = tilt_sample(&mut tilt_port, Duration::from_millis(400)).await;
    assert_eq!(lost, Err(Vec::new()), "no byte at all during no_reply");

    let mut thermo = open(&map.thermometer, map.thermometer_baud);
    let req = rtd::read_resistances(0, 3).unwrap();
    let mut tx = Vec::new();
    encode_request(1, &req, &mut tx).unwrap();
    let rx = exchange(&mut thermo, &tx, LIMIT, modbus_done(&req))
        .await
        .unwrap();
    assert!(
        matches!(
            decode_response(&rx, 1, &req),
            Err(modbus::ModbusError::Crc { .. })
        ),
        "the master's CRC check catches the garbled reply"
    );

    let mut heater = open(&map.heater, map.heater_baud);
    let set = heater_cmd(&[
        HeaterRequest::SetVoltage {
            channel: 1,
            volts: 5.0,
        },
        HeaterRequest::SetOutput {
            channel: 1,
            on: true,
        },
        HeaterRequest::MeasureCurrent { channel: 1 },
    ]);
    let rx = exchange(&mut heater, &set, LIMIT, lf).await.unwrap();
    assert_eq!(heater_amps(&rx, 1), 0.0, "an open heater passes no current");

    // After the no_reply window (1.5 simulated s at speed 1) the tiltmeter answers again.
    let wait = Duration::from_millis(2000).saturating_sub(sim.ready_at.elapsed());
    tokio::time::sleep(wait).await;
    let s = tilt_sample(&mut tilt_port, LIMIT).await.unwrap();
    assert_eq!(s.status, 0);

    let summary = sim.stop();
    assert_eq!(summary["tiltmeter"]["replies_lost"], 1);
    assert_eq!(summary["thermometer"]["replies_garbled"], 1);
    assert_eq!(
        summary["heater_state"]["channels"][0]["delivered_power_w"],
        0.0
    );
    assert_eq!(summary["heater_state"]["channels"][0]["open_circuit"], true);
}

#[test]
fn speed_factor_and_bad_arguments() {
    let dir = scratch("args");
    let map = dir.join("ports.toml").display().to_string();
    let out = Command::new(env!("CARGO_BIN_EXE_stilt-hil-sim"))
        .args(["--port-map", &map, "--speed", "50", "--duration", "0.5"])
        .stderr(Stdio::null())
        .output()
        .unwrap();
    assert!(out.status.success());
    let text = String::from_utf8(out.stdout).unwrap();
    let mut lines = text.lines();
    assert_eq!(lines.next(), Some("ready"));
    let summary: serde_json::Value = serde_json::from_str(lines.next().unwrap()).unwrap();
    let (sim, wall) = (
        summary["sim_time_s"].as_f64().unwrap(),
        summary["wall_time_s"].as_f64().unwrap(),
    );
    // Simulated time = 50 × the wall time the ticker ran (it starts just after `ready`).
    assert!(
        sim <= 50.0 * wall && sim > 50.0 * (wall - 0.2),
        "{sim} vs {wall}"
    );

    let run = |args: &[&str]| {
        let out = Command::new(env!("CARGO_BIN_EXE_stilt-hil-sim"))
            .args(["--port-map", &map])
            .args(args)
            .output()
            .unwrap();
        assert!(!out.status.success() && out.stdout.is_empty(), "{args:?}");
        String::from_utf8(out.stderr).unwrap()
    };
    assert!(run(&["--speed", "0"]).contains("--speed 0: allowed"));
    let faults = dir.join("bad.toml");
    std::fs::write(
        &faults,
        "[[fault]]\ndevice = \"heater\"\nkind = \"bad_crc\"\nat_s = 0\nduration_s = 1\n",
    )
    .unwrap();
    let e = run(&["--faults", &faults.display().to_string()]);
    assert!(
        e.contains("fault[0].kind") && e.contains("thermometer"),
        "{e}"
    );
    let e = run(&["/nonexistent/stage.toml"]);
    assert!(e.contains("cannot read"), "{e}");
    let _ = std::fs::remove_dir_all(&dir);
}
