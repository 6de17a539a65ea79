//! Tests of the SCPI layer and of the invented heater command set.

use super::heater::*;
use super::*;
use proptest::prelude::*;

fn compound(unit: &ProgramUnit) -> (Vec<(String, Option<u32>)>, bool) {
    match &unit.header {
        Header::Compound { nodes, query } => (
            nodes
                .iter()
                .map(|n| (n.mnemonic.to_ascii_uppercase(), n.suffix))
                .collect(),
            *query,
        ),
        h => panic!("not compound: {h:?}"),
    }
}

#[test]
fn short_and_long_forms() {
    // SCPI 1999.0 Vol 1 §6.2.1 (from memory): short form = upper-case part, case-insensitive.
    assert!(mnemonic_matches("VOLTage", "VOLT"));
    assert!(mnemonic_matches("VOLTage", "voltage"));
    assert!(mnemonic_matches("VOLTage", "Volt"));
    assert!(!mnemonic_matches("VOLTage", "VOLTA"));
    assert!(!mnemonic_matches("VOLTage", "VOL"));
    assert!(mnemonic_matches("STATe", "STAT"));
    assert!(mnemonic_matches("CURRent", "curr"));
    assert!(!mnemonic_matches("CURRent", "VOLT"));
}

#[test]
fn terminators_lf_and_crlf() {
    // IEEE 488.2 §7.5 (from memory): LF terminates; CR is white space, so CR LF works too.
    assert_eq!(
        split_message(b"*IDN?\n", 100).unwrap(),
        Some((&b"*IDN?"[..], 6))
    );
    assert_eq!(
        split_message(b"*IDN?\r\nX", 100).unwrap(),
        Some((&b"*IDN?"[..], 7))
    );
    assert_eq!(split_message(b"*IDN?", 100).unwrap(), None);
    assert!(matches!(
        split_message(&[b'A'; 20], 10),
        Err(ScpiError::MessageTooLong { max: 10, .. })
    ));
}

#[test]
fn multiple_units_and_the_current_path_rule() {
    // SCPI 1999.0 Vol 1 §6.2.4 (from memory): after a compound command the path stays at the
    // parent of its leaf, so "SOUR:FREQ:STAR 100;STOP 200" sets SOUR:FREQ:STOP.
    let m = parse_program_message(b"SOUR:FREQ:STAR 100;STOP 200");
    assert!(m.error.is_none(), "{:?}", m.error);
    assert_eq!(m.units.len(), 2);
    let (nodes, q) = compound(&m.units[1]);
    assert!(!q);
    let names: Vec<&str> = nodes.iter().map(|(n, _)| n.as_str()).collect();
    assert_eq!(names, ["SOUR", "FREQ", "STOP"]);
    assert_eq!(m.units[1].params, vec![Param::Numeric(200.0)]);

    // A leading colon goes back to the root; a common command leaves the path alone.
    let m = parse_program_message(b"OUTP2:VOLT 1.5;*OPC?;STAT ON;:MEAS2:CURR?\r");
    assert!(m.error.is_none(), "{:?}", m.error);
    assert_eq!(m.units.len(), 4);
    assert_eq!(
        compound(&m.units[2]).0,
        vec![("OUTP".into(), Some(2)), ("STAT".into(), None)]
    );
    assert_eq!(
        compound(&m.units[3]),
        (vec![("MEAS".into(), Some(2)), ("CURR".into(), None)], true)
    );
    assert_eq!(m.units[2].params, vec![Param::Character("ON".into())]);
}

#[test]
fn common_commands_are_recognised() {
    // IEEE 488.2 §10 common commands.
    let m = parse_program_message(b"*RST;*CLS;*IDN?;*OPC?");
    let cmds: Vec<_> = m
        .units
        .iter()
        .map(|u| CommonCommand::from_header(&u.header))
        .collect();
    assert_eq!(
        cmds,
        vec![
            Some(CommonCommand::Reset),
            Some(CommonCommand::ClearStatus),
            Some(CommonCommand::IdentifyQuery),
            Some(CommonCommand::OperationCompleteQuery)
        ]
    );
}

#[test]
fn parameters_of_each_kind() {
    let m = parse_program_message(b"TEST:PAR 'it''s', \"x;y\" , -1.5E+3,ON");
    assert!(m.error.is_none(), "{:?}", m.error);
    assert_eq!(
        m.units[0].params,
        vec![
            Param::String("it's".into()),
            Param::String("x;y".into()),
            Param::Numeric(-1500.0),
            Param::Character("ON".into())
        ]
    );
}

#[test]
fn parser_errors_map_to_standard_numbers() {
    let cases: &[(&[u8], i16)] = &[
        (b"OUTP1:VOLT 5V", -121),
        (b"OUTP1:VOLT 5 V", -138),
        (b"OUTP1::VOLT 5", -102),
        (b"VOLT;;CURR", -102),
        (b"OUTP1:VOLT 1E999", -123),
        (b"ABCDEFGHIJKLMNOP", -112),
        (b"OUTP\xff", -101),
        (b"OUTP 'abc", -151),
        (b"OUTP99999999999", -114),
    ];
    for (msg, code) in cases {
        let m = parse_program_message(msg);
        let e = m.error.unwrap_or_else(|| panic!("no error for {msg:?}"));
        assert_eq!(e.standard().code(), *code, "{msg:?}: {e}");
    }
}

#[test]
fn units_before_an_error_are_kept() {
    // IEEE 488.2 §6.1.6 (from memory): units before a parser error are executed, the rest dropped.
    let m = parse_program_message(b"*CLS;OUTP1:VOLT 5V;*RST");
    assert_eq!(m.units.len(), 1);
    assert!(m.error.is_some());
}

#[test]
fn numeric_forms() {
    // IEEE 488.2 §8.7 NR1/NR2/NR3 and §7.7.2 NRf (from memory).
    assert_eq!(parse_nr1("+123").unwrap(), 123);
    assert_eq!(parse_nr1("-7").unwrap(), -7);
    assert!(parse_nr1("1.0").is_err());
    assert_eq!(parse_nr2("12.5").unwrap(), 12.5);
    assert_eq!(parse_nr2("-.5").unwrap(), -0.5);
    assert!(parse_nr2("12").is_err());
    assert!(parse_nr2("1.2E3").is_err());
    assert_eq!(parse_nr3("1.25E+01").unwrap(), 12.5);
    assert_eq!(parse_nr3("-2.5e-3").unwrap(), -0.0025);
    assert!(parse_nr3("125").is_err());
    for ok in ["1", "+1.", ".5", "1e3", "-1.5E-3", "00012.3400"] {
        assert!(parse_nrf(ok).is_ok(), "{ok}");
    }
    for bad in [
        "", "+", ".", "E5", "1e", "1.2.3", "1e+", "0x10", "inf", "NaN", "1 2",
    ] {
        assert!(parse_nrf(bad).is_err(), "{bad}");
    }
    assert!(matches!(
        parse_nrf(&"1".repeat(100)),
        Err(ScpiError::TooManyDigits { .. })
    ));
}

#[test]
fn nr3_formatting() {
    let f = |v: f64| {
        let mut o = Vec::new();
        format_nr3(v, 6, &mut o);
        String::from_utf8(o).unwrap()
    };
    assert_eq!(f(1.5), "+1.500000E+00");
    assert_eq!(f(-0.0025), "-2.500000E-03");
    assert_eq!(f(12345.0), "+1.234500E+04");
    assert_eq!(f(f64::NAN), "9.91E+37");
    assert!(parse_response_number(&f(f64::NAN)).unwrap().is_nan());
    assert_eq!(
        parse_response_number(&f(f64::NEG_INFINITY)).unwrap(),
        f64::NEG_INFINITY
    );
    assert_eq!(parse_nr3(&f(-0.0025)).unwrap(), -0.0025);
}

#[test]
fn heater_requests_round_trip_through_the_device_parser() {
    let reqs = [
        HeaterRequest::Identify,
        HeaterRequest::Reset,
        HeaterRequest::ClearStatus,
        HeaterRequest::OperationComplete,
        HeaterRequest::NextError,
        HeaterRequest::ChannelCount,
        HeaterRequest::SetVoltage {
            channel: 3,
            volts: 12.25,
        },
        HeaterRequest::QueryVoltage { channel: 4 },
        HeaterRequest::SetOutput {
            channel: 1,
            on: false,
        },
        HeaterRequest::QueryOutput { channel: 2 },
        HeaterRequest::MeasureVoltage { channel: 8 },
        HeaterRequest::MeasureCurrent { channel: 5 },
    ];
    // One message with all of them, joined by ';' as IEEE 488.2 allows.
    let mut msg = Vec::new();
    for (i, r) in reqs.iter().enumerate() {
        if i > 0 {
            msg.push(b';');
        }
        r.encode_unit(&mut msg);
    }
    let parsed = parse_heater_message(&msg, 8);
    assert_eq!(parsed.error, None);
    assert_eq!(parsed.requests, reqs);
}

#[test]
fn heater_batch_is_one_message_and_one_response() {
    use crate::session::Exchange;
    let batch = HeaterBatch(vec![
        HeaterRequest::SetVoltage {
            channel: 1,
            volts: 2.0,
        },
        HeaterRequest::MeasureCurrent { channel: 1 },
        HeaterRequest::MeasureCurrent { channel: 2 },
    ]);
    let mut out = Vec::new();
    batch.encode(&mut out);
    // Program message units joined by ';', each from the root, one terminator
    // (IEEE 488.2 §7.1 and §7.5); the device side parses it back unit for unit.
    assert_eq!(
        out,
        b":OUTP1:VOLT +2.000000E+00;:MEAS1:CURR?;:MEAS2:CURR?\n"
    );
    let parsed = parse_heater_message(&out[..out.len() - 1], 8);
    assert_eq!(parsed.requests, batch.0);
    assert!(batch.expects_reply());
    // One response unit per query, joined by ';' (§8.4), decoded in order.
    let (r, used) = batch
        .decode_reply(b"+1.0E-01;+2.5E-01\nX")
        .unwrap()
        .unwrap();
    assert_eq!(used, 18);
    assert_eq!(r, vec![HeaterReply::Amps(0.1), HeaterReply::Amps(0.25)]);
    // A response with a unit missing (or one too many) is an error, not a guess.
    assert!(batch.decode_reply(b"+1.0E-01\n").is_err());
    assert!(batch.decode_reply(b"+1;+2;+3\n").is_err());
    assert_eq!(batch.decode_reply(b"+1.0E-01;+2").unwrap(), None);
    // Sets only: no reply expected.
    assert!(!HeaterBatch(vec![HeaterRequest::ClearStatus]).expects_reply());
}

#[test]
fn heater_device_accepts_long_forms_and_default_suffix() {
    let m = parse_heater_message(
        b"output:voltage 2.5;state 1;:MEASure:CURRent?;:SYST:ERR:NEXT?",
        4,
    );
    assert_eq!(m.error, None);
    assert_eq!(
        m.requests,
        vec![
            HeaterRequest::SetVoltage {
                channel: 1,
                volts: 2.5
            },
            HeaterRequest::SetOutput {
                channel: 1,
                on: true
            },
            HeaterRequest::MeasureCurrent { channel: 1 },
            HeaterRequest::NextError,
        ]
    );
}

#[test]
fn heater_device_errors() {
    let code = |msg: &[u8]| parse_heater_message(msg, 4).error.map(|e| e.code);
    assert_eq!(code(b"OUTP1:FREQ 5"), Some(-113));
    assert_eq!(code(b"OUTP5:VOLT 1"), Some(-114));
    assert_eq!(code(b"OUTP1:VOLT 30"), Some(-222));
    assert_eq!(code(b"OUTP1:VOLT -1"), Some(-222));
    assert_eq!(code(b"OUTP1:VOLT"), Some(-109));
    assert_eq!(code(b"OUTP1:VOLT 1,2"), Some(-108));
    assert_eq!(code(b"OUTP1:VOLT? 1"), Some(-108));
    assert_eq!(code(b"OUTP1:VOLT ON"), Some(-104));
    assert_eq!(code(b"OUTP1:STAT MAYBE"), Some(-224));
    assert_eq!(code(b"MEAS1:VOLT 3"), Some(-113));
    let m = parse_heater_message(b"OUTP1:VOLT 30", 4);
    assert!(m.error.unwrap().message.starts_with("Data out of range;"));
}

#[test]
fn heater_replies_round_trip() {
    let id = simulated_identity("SN0001", "0.1");
    let pairs = [
        (HeaterRequest::Identify, HeaterReply::Identity(id)),
        (
            HeaterRequest::OperationComplete,
            HeaterReply::OperationComplete,
        ),
        (
            HeaterRequest::NextError,
            HeaterReply::Error(ErrorEntry::standard(StandardError::UndefinedHeader)),
        ),
        (HeaterRequest::ChannelCount, HeaterReply::ChannelCount(4)),
        (
            HeaterRequest::QueryVoltage { channel: 1 },
            HeaterReply::Volts(12.5),
        ),
        (
            HeaterRequest::MeasureCurrent { channel: 1 },
            HeaterReply::Amps(0.1875),
        ),
        (
            HeaterRequest::QueryOutput { channel: 1 },
            HeaterReply::Output(true),
        ),
    ];
    let replies: Vec<HeaterReply> = pairs.iter().map(|(_, r)| r.clone()).collect();
    let mut out = Vec::new();
    encode_response(&replies, Terminator::Lf, &mut out);
    let (line, used) = split_message(&out, MAX_MESSAGE_LEN).unwrap().unwrap();
    assert_eq!(used, out.len());
    let units = split_response_units(line).unwrap();
    assert_eq!(units.len(), pairs.len());
    for ((req, reply), unit) in pairs.iter().zip(units) {
        assert_eq!(&req.decode_reply(unit).unwrap(), reply);
    }
    let mut idn = Vec::new();
    HeaterReply::Identity(simulated_identity("7", "1.0")).encode_unit(&mut idn);
    assert_eq!(idn, b"STILT-SIM,HSUP-8 (invented),7,1.0");
}

#[test]
fn open_circuit_rule() {
    // A 48 ohm heater at 12 V draws 0.25 A (Ohm's law); open if below a tenth of 1/48 S.
    let rule = OpenCircuitRule {
        min_volts: 0.5,
        min_siemens: 0.1 / 48.0,
    };
    assert_eq!(rule.is_open(12.0, 0.25), Some(false));
    assert_eq!(rule.is_open(12.0, 0.001), Some(true));
    assert_eq!(rule.is_open(0.1, 0.0), None);
    assert_eq!(rule.is_open(f64::NAN, 0.0), None);
}

fn any_request() -> impl Strategy<Value = HeaterRequest> {
    let ch = 1u8..=8;
    prop_oneof![
        Just(HeaterRequest::Identify),
        Just(HeaterRequest::NextError),
        Just(HeaterRequest::OperationComplete),
        Just(HeaterRequest::ChannelCount),
        ch.clone()
            .prop_map(|channel| HeaterRequest::QueryVoltage { channel }),
        ch.clone()
            .prop_map(|channel| HeaterRequest::QueryOutput { channel }),
        ch.clone()
            .prop_map(|channel| HeaterRequest::MeasureVoltage { channel }),
        ch.clone()
            .prop_map(|channel| HeaterRequest::MeasureCurrent { channel }),
        (ch.clone(), 0.0f64..=24.0)
            .prop_map(|(channel, volts)| HeaterRequest::SetVoltage { channel, volts }),
        (ch, any::<bool>()).prop_map(|(channel, on)| HeaterRequest::SetOutput { channel, on }),
    ]
}

proptest! {
    #[test]
    fn program_parser_never_panics(msg in proptest::collection::vec(any::<u8>(), 0..200)) {
        let m = parse_program_message(&msg);
        prop_assert!(m.units.len() <= MAX_UNITS);
        for u in &m.units {
            prop_assert!(u.params.len() <= MAX_PARAMS);
        }
        let _ = parse_heater_message(&msg, 8);
    }

    #[test]
    fn program_parser_never_panics_on_scpi_like_text(
        msg in "[:;*?, 'A-Za-z0-9.+\\-\"]{0,80}"
    ) {
        let _ = parse_heater_message(msg.as_bytes(), 8);
    }

    #[test]
    fn heater_batch_decoder_never_panics(buf in proptest::collection::vec(any::<u8>(), 0..300)) {
        use crate::session::Exchange;
        let batch = HeaterBatch((1..=3).map(|channel| HeaterRequest::MeasureCurrent { channel }).collect());
        if let Ok(Some((r, used))) = batch.decode_reply(&buf) {
            prop_assert_eq!(r.len(), 3);
            prop_assert!(used <= buf.len());
        }
    }

    #[test]
    fn split_message_is_bounded(buf in proptest::collection::vec(any::<u8>(), 0..300)) {
        match split_message(&buf, 100) {
            Ok(Some((m, used))) => { prop_assert!(m.len() <= 100); prop_assert!(used <= buf.len()); }
            Ok(None) => prop_assert!(buf.len() <= 100),
            Err(_) => prop_assert!(buf.len() > 100),
        }
    }

    #[test]
    fn reply_decoders_never_panic(
        req in any_request(),
        buf in proptest::collection::vec(any::<u8>(), 0..100),
    ) {
        let _ = req.decode_reply(&buf);
        let _ = crate::session::Exchange::decode_reply(&req, &buf);
        let _ = ErrorEntry::parse(&buf);
        let _ = Identity::parse(&buf);
        let _ = split_response_units(&buf);
    }

    #[test]
    fn number_parsers_never_panic(s in "\\PC{0,40}") {
        let _ = parse_nr1(&s);
        let _ = parse_nr2(&s);
        let _ = parse_nr3(&s);
        let _ = parse_response_number(&s);
        if let Ok(v) = parse_nrf(&s) { prop_assert!(v.is_finite()); }
    }

    #[test]
    fn requests_round_trip(req in any_request()) {
        let mut msg = Vec::new();
        req.encode(Terminator::CrLf, &mut msg);
        let (line, _) = split_message(&msg, MAX_MESSAGE_LEN).unwrap().unwrap();
        let m = parse_heater_message(line, 8);
        prop_assert_eq!(m.error, None);
        prop_assert_eq!(m.requests.len(), 1);
        match (m.requests[0], req) {
            (HeaterRequest::SetVoltage { channel: a, volts: x },
             HeaterRequest::SetVoltage { channel: b, volts: y }) => {
                prop_assert_eq!(a, b);
                // NR3 with 6 digits after the point: relative error below 1e-6.
                prop_assert!((x - y).abs() <= 1e-6 * y.abs().max(1e-300) + 1e-300);
            }
            (got, want) => prop_assert_eq!(got, want),
        }
    }

    #[test]
    fn numeric_replies_round_trip(v in -1.0e6f64..1.0e6) {
        let mut out = Vec::new();
        HeaterReply::Volts(v).encode_unit(&mut out);
        match (HeaterRequest::MeasureVoltage { channel: 1 }).decode_reply(&out).unwrap() {
            HeaterReply::Volts(x) => prop_assert!((x - v).abs() <= 1e-6 * v.abs() + 1e-300),
            r => prop_assert!(false, "{:?}", r),
        }
    }
}
