//! Broken configurations each give their precise error: key path, line:column, the
//! value found and what is allowed. Every case is the demo scenario with one or more
//! edits, so the expected position is found in the edited text itself.

use stilt_config::{ConfigError, DEMO_SCENARIO, HARDWARE_TEMPLATE, load_str};

/// Replaces the `nth` (0-based) occurrence of `from` with `to`.
fn edit(text: &str, from: &str, to: &str, nth: usize) -> String {
    let (i, _) = text
        .match_indices(from)
        .nth(nth)
        .unwrap_or_else(|| panic!("`{from}` #{nth} not in text"));
    format!("{}{}{}", &text[..i], to, &text[i + from.len()..])
}

/// 1-based line and column of the first occurrence of `needle`.
fn pos(text: &str, needle: &str) -> (usize, usize) {
    let i = text
        .find(needle)
        .unwrap_or_else(|| panic!("`{needle}` not in text"));
    let line = text[..i].matches('\n').count() + 1;
    let col = text[..i].rsplit('\n').next().unwrap().chars().count() + 1;
    (line, col)
}

fn errors(text: &str) -> Vec<ConfigError> {
    match load_str(text, "case.toml") {
        Ok(_) => panic!("expected errors"),
        Err(e) => e.0,
    }
}

fn find<'a>(errs: &'a [ConfigError], path: &str) -> &'a ConfigError {
    errs.iter()
        .find(|e| e.path == path)
        .unwrap_or_else(|| panic!("no error for `{path}` in {errs:#?}"))
}

#[test]
fn shipped_examples_are_valid() {
    for (name, text) in [("demo", DEMO_SCENARIO), ("template", HARDWARE_TEMPLATE)] {
        if let Err(e) = load_str(text, name) {
            panic!("{name}: {e}");
        }
    }
}

#[test]
fn out_of_range_value_names_path_position_value_and_range() {
    let t = edit(DEMO_SCENARIO, "length_m = 0.30", "length_m = -0.30", 1);
    let errs = errors(&t);
    let e = find(&errs, "legs[1].length_m");
    // The value's position: the `-0.30` on the second leg's line.
    let (line, _) = pos(
        &edit(DEMO_SCENARIO, "length_m = 0.30", "length_m = @@", 1),
        "@@",
    );
    assert_eq!(e.line, line);
    assert_eq!(e.column, "length_m = ".len() + 1);
    assert_eq!(e.found, "-0.30");
    assert!(e.allowed.contains("> 0"), "{}", e.allowed);
    let shown = e.to_string();
    assert!(
        shown.starts_with(&format!("case.toml:{line}:12: `legs[1].length_m` = -0.30")),
        "{shown}"
    );
}

#[test]
fn errors_are_collected_not_stopped_at_the_first() {
    let mut t = edit(
        DEMO_SCENARIO,
        "heater_resistance_ohm = 50.0",
        "heater_resistance_ohm = 0.0",
        0,
    );
    t = edit(&t, "rate_hz = 1.0", "rate_hz = 0.0", 0);
    t = edit(&t, "mode = \"level\"", "mode = \"levelling\"", 0);
    t = edit(&t, "flush_interval_s = 5.0", "flush_interval_s = 60.0", 0);
    let errs = errors(&t);
    let paths: Vec<&str> = errs.iter().map(|e| e.path.as_str()).collect();
    for p in [
        "legs[0].heater_resistance_ohm",
        "control.rate_hz",
        "control.mode",
        "recording.flush_interval_s",
    ] {
        assert!(paths.contains(&p), "{p} missing from {paths:?}");
    }
    // In file order.
    let lines: Vec<usize> = errs.iter().map(|e| e.line).collect();
    let mut sorted = lines.clone();
    sorted.sort();
    assert_eq!(lines, sorted);
    assert!(
        find(&errs, "control.mode")
            .allowed
            .contains("\"temperature\"")
    );
}

#[test]
fn every_unknown_key_is_reported_with_the_allowed_ones() {
    let mut t = edit(DEMO_SCENARIO, "length_m = 0.30", "lenght_m = 0.30", 2);
    t = edit(&t, "[network]", "[network]\nport = 8040", 0);
    t = edit(
        &t,
        "range_urad = 500.0",
        "range_urad = 500.0\nrange_mrad = 0.5",
        0,
    );
    let errs = errors(&t);
    let e = find(&errs, "legs[2].lenght_m");
    assert_eq!((e.line, e.column), pos(&t, "lenght_m"));
    assert!(e.allowed.contains("length_m"), "{}", e.allowed);
    let e = find(&errs, "network.port");
    assert_eq!((e.line, e.column), pos(&t, "port = 8040"));
    assert!(e.allowed.starts_with("bind, "), "{}", e.allowed);
    assert!(e.allowed.contains("token_file"), "{}", e.allowed);
    find(&errs, "tiltmeter.range_mrad");
    // The missing length of leg 2 is reported too.
    find(&errs, "legs[2].length_m");
}

#[test]
fn missing_required_key_points_at_its_table() {
    let t = edit(DEMO_SCENARIO, "kp_w_per_k = 8.0\n", "", 0);
    let errs = errors(&t);
    let e = find(&errs, "control.leg_loop.kp_w_per_k");
    assert!(e.problem.contains("missing"));
    assert_eq!(e.line, pos(&t, "[control.leg_loop]").0);
}

#[test]
fn wrong_type_is_located() {
    let t = edit(
        DEMO_SCENARIO,
        "heater_max_power_w = 2.0",
        "heater_max_power_w = \"2 W\"",
        2,
    );
    let errs = errors(&t);
    assert_eq!(errs.len(), 1);
    let e = &errs[0];
    assert_eq!(e.line, pos(&t, "\"2 W\"").0);
    assert_eq!(e.path, "legs[2].heater_max_power_w");
    assert!(e.problem.contains("invalid type"), "{}", e.problem);
}

#[test]
fn syntax_error_is_located() {
    let t = edit(DEMO_SCENARIO, "x_m = 0.25", "x_m = = 0.25", 0);
    let errs = errors(&t);
    assert_eq!(errs.len(), 1);
    assert_eq!(errs[0].line, pos(&t, "x_m = = 0.25").0);
    assert!(errs[0].problem.contains("syntax"));
}

#[test]
fn collinear_legs_are_refused() {
    let mut t = edit(DEMO_SCENARIO, "y_m = 0.216506", "y_m = 0.0", 0);
    t = edit(&t, "y_m = -0.216506", "y_m = 0.0", 0);
    let e = find(&errors(&t), "legs").clone();
    assert!(e.problem.contains("one line"), "{}", e.problem);
}

#[test]
fn too_few_legs_duplicate_names_and_channels() {
    let i = DEMO_SCENARIO.match_indices("[[legs]]").nth(2).unwrap().0;
    let j = DEMO_SCENARIO.find("[tiltmeter]").unwrap();
    let two = format!("{}{}", &DEMO_SCENARIO[..i], &DEMO_SCENARIO[j..]);
    assert!(
        find(&errors(&two), "legs")
            .problem
            .contains("at least three")
    );
    let mut t = edit(DEMO_SCENARIO, "name = \"B\"", "name = \"A\"", 0);
    t = edit(&t, "thermometer_channel = 2", "thermometer_channel = 0", 0);
    let errs = errors(&t);
    find(&errs, "legs[1].name");
    find(&errs, "legs[2].thermometer_channel");
}

#[test]
fn cross_section_rules() {
    // Tiltmeter rate must be a whole multiple of the control rate.
    let t = edit(DEMO_SCENARIO, "rate_hz = 10.0", "rate_hz = 2.5", 0);
    let t = edit(&t, "rate_hz = 1.0", "rate_hz = 2.0", 0);
    assert!(
        find(&errors(&t), "tiltmeter.rate_hz")
            .problem
            .contains("whole multiple")
    );
    // Leg bias above the temperature limit.
    let t = edit(DEMO_SCENARIO, "leg_bias_c = 24.0", "leg_bias_c = 36.0", 0);
    find(&errors(&t), "control.leg_bias_c");
    // Setpoint outside the tilt range.
    let t = edit(
        DEMO_SCENARIO,
        "setpoint_x_urad = 0.0",
        "setpoint_x_urad = 451.0",
        0,
    );
    find(&errors(&t), "control.setpoint_x_urad");
    // Manual power above a heater's maximum.
    let t = edit(
        DEMO_SCENARIO,
        "manual_power_w = 1.0",
        "manual_power_w = 2.5",
        0,
    );
    find(&errors(&t), "control.manual_power_w");
}

#[test]
fn non_finite_and_bad_addresses() {
    let t = edit(DEMO_SCENARIO, "x_m = 0.25", "x_m = nan", 0);
    assert!(find(&errors(&t), "legs[0].x_m").problem.contains("finite"));
    let t = edit(DEMO_SCENARIO, "leg_bias_c = 24.0", "leg_bias_c = inf", 0);
    find(&errors(&t), "control.leg_bias_c");
    let t = edit(
        DEMO_SCENARIO,
        "bind = \"127.0.0.1:8040\"",
        "bind = \"localhost\"",
        0,
    );
    assert!(
        find(&errors(&t), "network.bind")
            .allowed
            .contains("IP:port")
    );
}

#[test]
fn material_table_matches_the_crc_handbook() {
    // CRC Handbook of Chemistry and Physics, linear thermal expansion coefficients at
    // 25 °C (×10⁻⁶/K), quoted from memory: Al 23.1, Cu 16.5, Fe 11.8, Ti 8.6. The alloys
    // (stainless 304 ≈ 17.3, Invar 36 ≈ 1.2, fused silica ≈ 0.55) are typical handbook
    // values and vary with treatment; they are checked only for their order of magnitude.
    let table = stilt_config::MATERIALS;
    let get = |n: &str| table.iter().find(|(m, _)| *m == n).unwrap().1;
    for (n, v) in [
        ("aluminium", 23.1),
        ("copper", 16.5),
        ("iron", 11.8),
        ("titanium", 8.6),
    ] {
        assert!((get(n) * 1e6 - v).abs() < 1e-9, "{n}");
    }
    assert!((15.0..19.0).contains(&(get("stainless_304") * 1e6)));
    assert!((0.5..2.0).contains(&(get("invar_36") * 1e6)));
    assert!((0.4..0.7).contains(&(get("fused_silica") * 1e6)));
}

#[test]
fn arbitrary_text_never_panics() {
    // A cheap fuzz: every prefix of the demo, and byte-level damage, gives Ok or Err.
    for cut in (0..DEMO_SCENARIO.len()).step_by(37) {
        if DEMO_SCENARIO.is_char_boundary(cut) {
            let _ = load_str(&DEMO_SCENARIO[..cut], "cut");
        }
    }
    for (k, c) in ["]", "[", "=", "\"", "\n", "[[legs]]\n"].iter().enumerate() {
        for at in (0..DEMO_SCENARIO.len()).step_by(53 + k) {
            if DEMO_SCENARIO.is_char_boundary(at) {
                let t = format!("{}{}{}", &DEMO_SCENARIO[..at], c, &DEMO_SCENARIO[at..]);
                let _ = load_str(&t, "damaged");
            }
        }
    }
}
