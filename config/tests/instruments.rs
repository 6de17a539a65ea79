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
