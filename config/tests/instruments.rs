//! `[instruments]` and port maps: the shipped HIL example loads with its port map, the
//! port map fills in ports, and every mistake is reported at its key (in the config file
//! or in the port map file).

use std::path::{Path, PathBuf};

use stilt_config::{
    ConfigError, HARDWARE_TEMPLATE, HIL_EXAMPLE, LoadOptions, RtdSensor, load_str, load_str_with,
};

fn examples() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("examples/hil")
}

fn opts() -> LoadOptions {
    LoadOptions {
        base_dir: Some(examples()),
        port_map: None,
    }
}

fn errors_with(text: &str, o: &LoadOptions) -> Vec<ConfigError> {
    match load_str_with(text, "case.toml", o) {
        Ok(_) => panic!("expected errors"),
        Err(e) => e.0,
    }
}

fn find<'a>(errs: &'a [ConfigError], path: &str) -> &'a ConfigError {
    errs.iter()
        .find(|e| e.path == path)
        .unwrap_or_else(|| panic!("no error for `{path}` in {errs:#?}"))
}

fn line_of(text: &str, needle: &str) -> usize {
    let i = text.find(needle).unwrap_or_else(|| panic!("{needle}"));
    text[..i].matches('\n').count() + 1
}

#[test]
fn the_hil_example_takes_its_ports_from_the_port_map() {
    let cfg = load_str_with(HIL_EXAMPLE, "hil/stage.toml", &opts()).unwrap();
    let i = cfg.instruments.unwrap();
    assert_eq!(i.tiltmeter.link.port, "/dev/pts/101");
    assert_eq!(i.thermometer.link.port, "/dev/pts/102");
    assert_eq!(i.heater.link.port, "/dev/pts/103");
    assert_eq!(i.thermometer.link.baud, 19_200);
    assert_eq!(i.thermometer.unit, 1);
    assert_eq!(i.thermometer.sensor, RtdSensor::Pt100);
    assert_eq!(i.tiltmeter.poll_hz, 10.0);
    assert_eq!(i.tiltmeter.link.timeout_ms, 80);
    assert_eq!(i.tiltmeter.stuck_after_s, Some(1.0));
    assert_eq!(i.thermometer.stuck_after_s, Some(5.0));
    // The default line protocol reads our invented tiltmeter format in raw units.
    let spec = &i.tiltmeter.spec;
    assert_eq!(spec.query(), b"TLT?\r");
    let (r, _) = spec
        .decode(b"T,+0012.3456,-0003.2100,21.52,1\r\n")
        .unwrap()
        .unwrap();
    assert_eq!(spec.value(&r, "x"), Some(12.3456));
    assert_eq!(spec.value(&r, "y"), Some(-3.21));
    assert_eq!(spec.value(&r, "status"), Some(1.0));
}

#[test]
fn the_template_describes_every_instrument_key() {
    let cfg = load_str(HARDWARE_TEMPLATE, "hardware-template.toml").unwrap();
    let i = cfg.instruments.unwrap();
    assert!(i.port_map.is_none());
    assert_eq!(i.heater.readback_tolerance_w, 0.1);
    assert_eq!(i.tiltmeter.bad_status_mask, 1);
    assert_eq!(i.tiltmeter.spec.fields().len(), 3);
    assert_eq!(
        i.tiltmeter.stuck_after_s, None,
        "commented out in the template: no check"
    );
}

#[test]
fn an_override_port_map_replaces_the_named_one() {
    let dir = std::env::temp_dir().join(format!("stilt-config-pm-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let pm = dir.join("ports.toml");
    std::fs::write(
        &pm,
        "[ports]\ntiltmeter = \"/dev/pts/7\"\nthermometer = \"/dev/pts/8\"\nheater = \"/dev/pts/9\"\n\
         [serial]\nthermometer_unit = 5\n",
    )
    .unwrap();
    let o = LoadOptions {
        base_dir: Some(examples()),
        port_map: Some(pm.clone()),
    };
    let cfg = load_str_with(HIL_EXAMPLE, "stage.toml", &o).unwrap();
    let i = cfg.instruments.unwrap();
    assert_eq!(i.heater.link.port, "/dev/pts/9");
    assert_eq!(i.thermometer.unit, 5);
    // Not in the map: the default baud.
    assert_eq!(i.tiltmeter.link.baud, 115_200);

    // An unknown key in the port map is located in the port map file.
    std::fs::write(
        &pm,
        "[ports]\ntiltmeter = \"/dev/pts/7\"\nheaters = \"x\"\n",
    )
    .unwrap();
    let errs = errors_with(HIL_EXAMPLE, &o);
    let e = errs
        .iter()
        .find(|e| e.origin == pm.display().to_string())
        .unwrap_or_else(|| panic!("{errs:#?}"));
    assert_eq!(e.line, 3, "{e}");
    assert!(e.problem.contains("heaters"), "{e}");
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn a_missing_port_map_is_reported_at_its_key() {
    let text = HIL_EXAMPLE.replace("\"hil-ports.toml\"", "\"no-such-ports.toml\"");
    let errs = errors_with(&text, &opts());
    let e = find(&errs, "instruments.port_map");
    assert_eq!(e.line, line_of(&text, "port_map ="));
    assert!(e.found.contains("no-such-ports.toml"), "{e}");
    assert!(
        errs.iter()
            .any(|e| e.problem.contains("cannot read the port map"))
    );
}

#[test]
fn instrument_mistakes_are_each_located() {
    let text = HARDWARE_TEMPLATE
        .replace("baud = 19200", "baud = 12")
        .replace("sensor = \"pt100\"", "sensor = \"pt42\"")
        .replace("poll_hz = 10.0", "poll_hz = -1.0\npoll_rate = 3")
        .replace(
            "x = { delimiter = \",\", index = 1, scale = 1.0, offset = 0.0 }",
            "x = { pattern = \"X=\", scale = 1.0 }",
        )
        .replace("readback_tolerance_w = 0.1", "readback_tolerance_w = 0.0");
    let errs = match load_str(&text, "case.toml") {
        Ok(_) => panic!("expected errors"),
        Err(e) => e.0,
    };
    let baud = find(&errs, "instruments.thermometer.baud");
    assert_eq!(baud.line, line_of(&text, "baud = 12"));
    assert!(baud.allowed.contains("300"), "{baud}");
    let s = find(&errs, "instruments.thermometer.sensor");
    assert!(s.allowed.contains("pt1000"), "{s}");
    assert_eq!(
        find(&errs, "instruments.tiltmeter.poll_hz").line,
        line_of(&text, "poll_hz = -1.0")
    );
    let unknown = find(&errs, "instruments.tiltmeter.poll_rate");
    assert_eq!(unknown.problem, "unknown key");
    assert!(unknown.allowed.contains("poll_hz"), "{unknown}");
    let p = find(&errs, "instruments.tiltmeter.x.pattern");
    assert!(p.problem.contains("exactly one {}"), "{p}");
    find(&errs, "instruments.heater.readback_tolerance_w");
    assert_eq!(errs.len(), 6, "{errs:#?}");
}

#[test]
fn ports_must_be_given_and_distinct() {
    let text = HARDWARE_TEMPLATE
        .replace(
            "port = \"/dev/serial/by-id/usb-heater-supply-if00\"",
            "port = \"/dev/serial/by-id/usb-tiltmeter-if00\"",
        )
        .replace("port = \"/dev/serial/by-id/usb-thermometer-if00\"\n", "");
    let errs = match load_str(&text, "case.toml") {
        Ok(_) => panic!("expected errors"),
        Err(e) => e.0,
    };
    let m = find(&errs, "instruments.thermometer.port");
    assert_eq!(m.problem, "required key is missing");
    assert_eq!(m.line, line_of(&text, "[instruments.thermometer]"));
    // Both ports are only compared once each is valid, so fix the missing one and retry.
    let text = text.replace(
        "[instruments.thermometer]\n",
        "[instruments.thermometer]\nport = \"/dev/ttyS1\"\n",
    );
    let errs = match load_str(&text, "case.toml") {
        Ok(_) => panic!("expected errors"),
        Err(e) => e.0,
    };
    let d = find(&errs, "instruments.heater.port");
    assert!(d.problem.contains("instruments.tiltmeter"), "{d}");
}

#[test]
fn a_config_without_instruments_still_loads() {
    let cfg = load_str(stilt_config::DEMO_SCENARIO, "demo.toml").unwrap();
    assert!(cfg.instruments.is_none());
}

/// The HIL example with leg C moved to unit 2 (channel 0) of a two-unit bus.
fn two_unit_bus() -> String {
    HIL_EXAMPLE
        .replace(
            "thermometer_channel = 2\n",
            "thermometer_channel = 0\nthermometer_unit = 2\n",
        )
        .replace(
            "[instruments.thermometer]         # Modbus RTU, our own invented RTD register map\n",
            "[instruments.thermometer]         # Modbus RTU, our own invented RTD register map\nunits = [1, 2]\n",
        )
}

#[test]
fn a_thermometer_bus_maps_each_leg_to_its_unit() {
    let text = two_unit_bus();
    assert!(text.contains("units = [1, 2]") && text.contains("thermometer_unit = 2"));
    let cfg = load_str_with(&text, "bus.toml", &opts()).unwrap();
    let th = cfg.instruments.unwrap().thermometer;
    assert_eq!(th.units, vec![1, 2]);
    assert_eq!(th.unit, 1);
    assert_eq!(th.leg_units, vec![1, 1, 2]);
    // Legs A and C both use channel 0, on different units.
    assert_eq!(
        cfg.legs[0].thermometer_channel,
        cfg.legs[2].thermometer_channel
    );
    // Modbus RTU's default character format (serial line spec §2.5.1): 8E1.
    assert_eq!(th.link.framing.to_string(), "8E1");
    // The unchanged example still means one unit, 1, for every leg.
    let one = load_str_with(HIL_EXAMPLE, "hil/stage.toml", &opts()).unwrap();
    let th1 = one.instruments.unwrap().thermometer;
    assert_eq!((th1.units, th1.leg_units), (vec![1], vec![1, 1, 1]));
}

#[test]
fn wrong_units_are_located_and_say_what_is_allowed() {
    // Leg A on unit 0 (broadcast), leg B on 5 (not on the line), 300 in the list.
    let text = two_unit_bus()
        .replacen(
            "thermometer_channel = 0\n",
            "thermometer_channel = 0\nthermometer_unit = 0\n",
            1,
        )
        .replace("units = [1, 2]", "units = [1, 2, 300]");
    let errs = errors_with(&text, &opts());
    let a = find(&errs, "legs[0].thermometer_unit");
    assert!(a.problem.contains("broadcast"), "{a}");
    assert_eq!(a.allowed, "an integer from 1 to 247");
    assert_eq!(a.line, line_of(&text, "thermometer_unit = 0"));
    let l = find(&errs, "instruments.thermometer.units");
    assert!(l.problem.contains("reserved"), "{l}");
    assert_eq!(l.line, line_of(&text, "units = [1, 2, 300]"));
    assert_eq!(errs.len(), 2, "{errs:#?}");

    // With valid addresses: a leg's unit not declared, and a unit no leg reads.
    let text = two_unit_bus()
        .replace("thermometer_unit = 2", "thermometer_unit = 5")
        .replace("units = [1, 2]", "units = [1, 2, 3]");
    let errs = errors_with(&text, &opts());
    let c = find(&errs, "legs[2].thermometer_unit");
    assert_eq!(c.problem, "unit 5 is not on the thermometer line");
    assert!(c.allowed.contains("1, 2, 3"), "{c}");
    assert_eq!(errs.len(), 1, "{errs:#?}");
    let text = two_unit_bus().replace("units = [1, 2]", "units = [1, 2, 3]");
    let errs = errors_with(&text, &opts());
    let u = find(&errs, "instruments.thermometer.units");
    assert_eq!(u.problem, "no leg is read by unit 3");

    // Without a list, a leg naming another unit is refused, saying how to declare it.
    let text = two_unit_bus().replace("units = [1, 2]\n", "");
    let errs = errors_with(&text, &opts());
    let c = find(&errs, "legs[2].thermometer_unit");
    assert!(c.allowed.contains("instruments.thermometer.units"), "{c}");

    // Two legs on the same unit and channel, spelled differently (default vs explicit).
    let text = two_unit_bus().replace("thermometer_unit = 2", "thermometer_unit = 1");
    let text = text.replace("units = [1, 2]\n", "");
    let errs = errors_with(&text, &opts());
    let d = find(&errs, "legs[2].thermometer_channel");
    assert_eq!(d.problem, "unit 1 channel 0 is already read by legs[0]");
    assert_eq!(errs.len(), 1, "{errs:#?}");

    // The default unit must be on the list.
    let text = two_unit_bus().replace("units = [1, 2]", "unit = 7\nunits = [1, 2]");
    let errs = errors_with(&text, &opts());
    let d = find(&errs, "instruments.thermometer.unit");
    assert_eq!(d.allowed, "one of 1, 2");
}

#[test]
fn character_formats_are_configurable_and_modbus_needs_eleven_bits() {
    let th = "[instruments.thermometer]         # Modbus RTU, our own invented RTD register map\n";
    let with = |extra: &str| HIL_EXAMPLE.replace(th, &format!("{th}{extra}\n"));
    // No parity on the Modbus line defaults to 2 stop bits (serial line spec §2.5.1).
    let cfg = load_str_with(&with("parity = \"none\""), "c.toml", &opts()).unwrap();
    let i = cfg.instruments.unwrap();
    assert_eq!(i.thermometer.link.framing.to_string(), "8N2");
    assert_eq!(i.thermometer.link.framing.bits(), 11);
    assert_eq!(i.tiltmeter.link.framing.to_string(), "8N1");
    assert_eq!(i.heater.link.framing.to_string(), "8N1");
    let cfg = load_str_with(&with("parity = \"odd\""), "c.toml", &opts()).unwrap();
    assert_eq!(
        cfg.instruments
            .unwrap()
            .thermometer
            .link
            .framing
            .to_string(),
        "8O1"
    );
    // 8N1 is 10 bits: refused, located at stop_bits, naming the allowed formats.
    let text = with("parity = \"none\"\nstop_bits = 1");
    let errs = errors_with(&text, &opts());
    let e = find(&errs, "instruments.thermometer.stop_bits");
    assert!(e.problem.contains("8N1 is a 10-bit character"), "{e}");
    assert!(e.allowed.contains("8E1"), "{e}");
    // 8E2 (12 bits) is refused at parity when stop_bits is the one given... at stop_bits.
    let errs = errors_with(&with("stop_bits = 2"), &opts());
    assert!(
        find(&errs, "instruments.thermometer.stop_bits")
            .problem
            .contains("12-bit")
    );
    // 7 data bits are not RTU; an unknown parity and 3 stop bits are errors on any line.
    let errs = errors_with(
        &with("data_bits = 7\nparity = \"mark\"").replace(
            "[instruments.heater]",
            "[instruments.heater]\nstop_bits = 3",
        ),
        &opts(),
    );
    assert_eq!(
        find(&errs, "instruments.thermometer.data_bits").allowed,
        "8"
    );
    let p = find(&errs, "instruments.thermometer.parity");
    assert_eq!(p.allowed, "\"none\", \"even\" or \"odd\"");
    assert_eq!(
        find(&errs, "instruments.heater.stop_bits").allowed,
        "an integer from 1 to 2"
    );
    assert_eq!(errs.len(), 3, "{errs:#?}");
    // ASCII lines accept 7E1 (common practice for ASCII instruments).
    let text = HIL_EXAMPLE.replace(
        "[instruments.heater]",
        "[instruments.heater]\ndata_bits = 7\nparity = \"even\"",
    );
    let cfg = load_str_with(&text, "c.toml", &opts()).unwrap();
    assert_eq!(
        cfg.instruments.unwrap().heater.link.framing.to_string(),
        "7E1"
    );
}
