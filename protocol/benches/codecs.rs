//! Throughput of every decoder in `stilt-protocol` (frames/s and bytes/s).
//!
//! Each benchmark decodes a buffer holding [`N`] messages back to back, the way a reader
//! drains a serial buffer. Run with `cargo bench -p stilt-protocol --bench codecs`.

use std::time::Duration;

use divan::counter::{BytesCount, ItemsCount};
use divan::{Bencher, black_box};
use stilt_protocol::convert::PlatinumRtd;
use stilt_protocol::line::tilt::{self, TiltSample};
use stilt_protocol::modbus::timing::{CharFormat, FrameAssembler, silences};
use stilt_protocol::modbus::{self, Request, Response};
use stilt_protocol::scpi::heater::{HeaterReply, HeaterRequest, parse_heater_message};
use stilt_protocol::scpi::{self, Terminator};

fn main() {
    divan::main();
}

/// Messages per benchmark iteration.
const N: usize = 1000;

fn counters<'a, 'b>(b: Bencher<'a, 'b>, bytes: usize) -> Bencher<'a, 'b> {
    b.counter(BytesCount::new(bytes))
        .counter(ItemsCount::new(N))
}

#[divan::bench]
fn scpi_master_decode_reply(b: Bencher) {
    let req = HeaterRequest::MeasureCurrent { channel: 1 };
    let mut buf = Vec::new();
    for i in 0..N {
        HeaterReply::Amps(i as f64 * 1e-3).encode_unit(&mut buf);
        buf.extend_from_slice(Terminator::Lf.bytes());
    }
    counters(b, buf.len()).bench(|| {
        let mut rest = black_box(&buf[..]);
        let mut n = 0;
        while let Ok(Some((line, used))) = scpi::split_message(rest, scpi::MAX_MESSAGE_LEN) {
            if req.decode_reply(line).is_ok() {
                n += 1;
            }
            rest = &rest[used..];
        }
        assert_eq!(n, N);
    });
}

#[divan::bench]
fn scpi_device_parse_program(b: Bencher) {
    let mut buf = Vec::new();
    for i in 0..N {
        let set = HeaterRequest::SetVoltage {
            channel: (i % 8) as u8 + 1,
            volts: (i % 24) as f64,
        };
        set.encode_unit(&mut buf);
        buf.push(b';');
        HeaterRequest::MeasureCurrent { channel: 1 }.encode(Terminator::Lf, &mut buf);
    }
    counters(b, buf.len()).bench(|| {
        let mut rest = black_box(&buf[..]);
        let mut n = 0;
        while let Ok(Some((line, used))) = scpi::split_message(rest, scpi::MAX_MESSAGE_LEN) {
            let m = parse_heater_message(line, 8);
            n += usize::from(m.error.is_none() && m.requests.len() == 2);
            rest = &rest[used..];
        }
        assert_eq!(n, N);
    });
}

#[divan::bench]
fn modbus_master_decode_response(b: Bencher) {
    // A full 8-channel RTD resistance read: 16 registers, 37-byte frames.
    let req = Request::ReadInputRegisters {
        start: 0,
        count: 16,
    };
    let mut buf = Vec::new();
    for i in 0..N {
        let values: Vec<u16> = (0..16).map(|k| (i + k) as u16).collect();
        modbus::encode_response(7, &Response::ReadInputRegisters(values), &mut buf).unwrap();
    }
    counters(b, buf.len()).bench(|| {
        let mut rest = black_box(&buf[..]);
        let mut n = 0;
        while let Ok(Some((_, used))) = modbus::decode_response(rest, 7, &req) {
            n += 1;
            rest = &rest[used..];
        }
        assert_eq!(n, N);
    });
}

fn modbus_requests() -> (Vec<u8>, Vec<usize>) {
    let mut buf = Vec::new();
    let mut ends = Vec::new();
    for i in 0..N {
        let r = if i % 2 == 0 {
            Request::ReadInputRegisters {
                start: 0,
                count: 16,
            }
        } else {
            Request::WriteMultipleRegisters {
                start: 0,
                values: vec![0x00FF, (i % 64) as u16 + 1],
            }
        };
        modbus::encode_request(7, &r, &mut buf).unwrap();
        ends.push(buf.len());
    }
    (buf, ends)
}

#[divan::bench]
fn modbus_device_parse_request_frame(b: Bencher) {
    let (buf, ends) = modbus_requests();
    counters(b, buf.len()).bench(|| {
        let mut start = 0;
        let mut n = 0;
        for &end in &ends {
            n += usize::from(modbus::parse_request_frame(black_box(&buf[start..end])).is_ok());
            start = end;
        }
        assert_eq!(n, N);
    });
}

#[divan::bench]
fn modbus_frame_assembler(b: Bencher) {
    // Bytes arrive one read() per frame, each followed by a 5 ms silence (115200 baud).
    let (buf, ends) = modbus_requests();
    let s = silences(115_200, CharFormat::RTU_DEFAULT).unwrap();
    counters(b, buf.len()).bench(|| {
        let mut a = FrameAssembler::new(s, modbus::MAX_ADU, false);
        let mut start = 0;
        let mut n = 0;
        for (i, &end) in ends.iter().enumerate() {
            let now = Duration::from_millis(5 * i as u64);
            a.handle_bytes(now, black_box(&buf[start..end]));
            a.handle_timeout(now + Duration::from_millis(2));
            while a.poll_frame().is_some() {
                n += 1;
            }
            start = end;
        }
        assert_eq!(n, N);
    });
}

#[divan::bench]
fn line_master_decode_tilt(b: Bencher) {
    let spec = tilt::default_spec().unwrap();
    let mut buf = Vec::new();
    for i in 0..N {
        TiltSample {
            x_urad: i as f64 * 0.01,
            y_urad: -(i as f64) * 0.02,
            temperature_c: 21.5,
            status: 0,
        }
        .encode(&mut buf)
        .unwrap();
    }
    counters(b, buf.len()).bench(|| {
        let mut rest = black_box(&buf[..]);
        let mut n = 0;
        while let Ok(Some((_, used))) = spec.decode(rest) {
            n += 1;
            rest = &rest[used..];
        }
        assert_eq!(n, N);
    });
}

#[divan::bench]
fn line_device_decode_tilt_command(b: Bencher) {
    let buf: Vec<u8> = tilt::QUERY.repeat(N);
    counters(b, buf.len()).bench(|| {
        let mut rest = black_box(&buf[..]);
        let mut n = 0;
        while let Some((_, used)) = tilt::decode_command(rest) {
            n += 1;
            rest = &rest[used..];
        }
        assert_eq!(n, N);
    });
}

#[divan::bench]
fn convert_pt100_temperature(b: Bencher) {
    // Half below 0 degC (Newton), half above (closed form).
    let rs: Vec<f64> = (0..N).map(|i| 20.0 + 360.0 * i as f64 / N as f64).collect();
    b.counter(ItemsCount::new(N)).bench(|| {
        let mut acc = 0.0;
        for &r in black_box(&rs) {
            acc += PlatinumRtd::PT100.temperature(r).unwrap_or(0.0);
        }
        acc
    });
}
