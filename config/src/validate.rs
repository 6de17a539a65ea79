//! Stage two: raw structs → typed [`Config`], collecting every problem.
//!
//! Each rule says in its error what is allowed. Rules that involve several keys (rates
//! that must divide, legs that must not be collinear) are checked after the single
//! keys, and only when those keys were themselves valid, so one typo gives one error.

use std::net::SocketAddr;
use std::path::PathBuf;

use crate::errors::{ConfigError, ConfigErrors};
use crate::materials::{self, Material};
use crate::raw::*;
use crate::spans::SpanIndex;
use crate::types::*;

pub(crate) struct V<'a> {
    pub(crate) spans: &'a SpanIndex,
    pub(crate) errors: Vec<ConfigError>,
}

/// An allowed numeric range, inclusive or exclusive at each end.
#[derive(Clone, Copy)]
pub(crate) struct Range {
    min: f64,
    min_incl: bool,
    max: f64,
    max_incl: bool,
}

pub(crate) const fn between(min: f64, max: f64) -> Range {
    Range {
        min,
        min_incl: true,
        max,
        max_incl: true,
    }
}
pub(crate) const fn above(min: f64, max: f64) -> Range {
    Range {
        min,
        min_incl: false,
        max,
        max_incl: true,
    }
}

impl Range {
    fn contains(&self, v: f64) -> bool {
        let lo = if self.min_incl {
            v >= self.min
        } else {
            v > self.min
        };
        let hi = if self.max_incl {
            v <= self.max
        } else {
            v < self.max
        };
        lo && hi
    }
    fn describe(&self) -> String {
        let lo = if self.min_incl { "≥" } else { ">" };
        let hi = if self.max_incl { "≤" } else { "<" };
        match (self.min.is_finite(), self.max.is_finite()) {
            (true, true) => format!("a number {lo} {} and {hi} {}", g(self.min), g(self.max)),
            (true, false) => format!("a finite number {lo} {}", g(self.min)),
            (false, true) => format!("a finite number {hi} {}", g(self.max)),
            (false, false) => "a finite number".into(),
        }
    }
}

fn g(v: f64) -> String {
    format!("{v}")
}

impl<'a> V<'a> {
    pub(crate) fn err(
        &mut self,
        path: &str,
        problem: impl Into<String>,
        allowed: impl Into<String>,
    ) {
        let e = self.spans.error(path, problem.into(), allowed.into());
        self.errors.push(e);
    }

    /// An error about a whole table or array, where echoing the value would not help.
    pub(crate) fn err_table(
        &mut self,
        path: &str,
        problem: impl Into<String>,
        allowed: impl Into<String>,
    ) {
        let mut e = self.spans.error(path, problem.into(), allowed.into());
        e.found.clear();
        self.errors.push(e);
    }

    pub(crate) fn missing(&mut self, path: &str, allowed: &str) {
        let mut e = self
            .spans
            .error(path, "required key is missing".into(), allowed.into());
        e.found.clear();
        self.errors.push(e);
    }

    /// A number: required when `default` is `None`.
    pub(crate) fn num(
        &mut self,
        path: &str,
        v: Option<f64>,
        default: Option<f64>,
        r: Range,
    ) -> Option<f64> {
        match v {
            None => {
                if default.is_none() {
                    self.missing(path, &r.describe());
                }
                default
            }
            Some(x) if !x.is_finite() => {
                self.err(path, "value is not a finite number", r.describe());
                None
            }
            Some(x) if !r.contains(x) => {
                self.err(path, "value is out of range", r.describe());
                None
            }
            Some(x) => Some(x),
        }
    }

    pub(crate) fn int(
        &mut self,
        path: &str,
        v: Option<i64>,
        default: Option<i64>,
        min: i64,
        max: i64,
    ) -> Option<i64> {
        let allowed = format!("an integer from {min} to {max}");
        match v {
            None => {
                if default.is_none() {
                    self.missing(path, &allowed);
                }
                default
            }
            Some(x) if x < min || x > max => {
                self.err(path, "value is out of range", allowed);
                None
            }
            Some(x) => Some(x),
        }
    }
}

/// Validates a raw configuration. `text` is kept in the result for the recording.
pub(crate) fn validate(
    raw: RawConfig,
    text: &str,
    spans: &SpanIndex,
    earlier: Vec<ConfigError>,
    opts: &crate::LoadOptions,
) -> Result<Config, ConfigErrors> {
    let mut v = V {
        spans,
        errors: earlier,
    };
    let stage_name = raw
        .stage
        .and_then(|s| s.name)
        .unwrap_or_else(|| "unnamed stage".into());

    let raw_legs = raw.legs.unwrap_or_default();
    let leg_units = crate::instruments::leg_units(&mut v, &raw_legs);
    let legs = legs(&mut v, raw_legs, leg_units.as_deref());
    let limits = limits(&mut v, raw.limits.unwrap_or_default());
    let tiltmeter = tiltmeter(&mut v, raw.tiltmeter);
    let control = control(&mut v, raw.control);
    let recording = recording(&mut v, raw.recording.unwrap_or_default());
    let network = network(&mut v, raw.network.unwrap_or_default());
    let simulation = simulation(&mut v, raw.simulation.unwrap_or_default());
    let interlocks = interlocks(&mut v, raw.interlocks.unwrap_or_default());
    let instruments = match raw.instruments {
        None => Some(None),
        Some(i) => crate::instruments::instruments(
            &mut v,
            i,
            tiltmeter.as_ref(),
            legs.as_deref(),
            leg_units.as_deref(),
            opts,
        )
        .map(Some),
    };

    // Rules across sections, checked only when their parts were valid.
    if let (Some(tm), Some(c)) = (&tiltmeter, &control) {
        let ratio = tm.rate_hz / c.rate_hz;
        if (ratio - ratio.round()).abs() > 1e-9 || ratio < 1.0 {
            v.err(
                "tiltmeter.rate_hz",
                format!(
                    "the tiltmeter rate must be a whole multiple of control.rate_hz = {}",
                    c.rate_hz
                ),
                format!("{} × n Hz for a whole n ≥ 1", c.rate_hz),
            );
        }
    }
    if let (Some(l), Some(c)) = (&limits, &control) {
        if c.leg_bias_c >= l.max_leg_temp_c {
            v.err(
                "control.leg_bias_c",
                format!(
                    "the leg bias must be below limits.max_leg_temp_c = {}",
                    l.max_leg_temp_c
                ),
                format!("a temperature < {} °C", l.max_leg_temp_c),
            );
        }
        for (i, sp) in c.setpoint_urad.iter().enumerate() {
            if sp.abs() >= l.tilt_range_urad {
                let key = if i == 0 {
                    "control.setpoint_x_urad"
                } else {
                    "control.setpoint_y_urad"
                };
                v.err(
                    key,
                    format!(
                        "the setpoint lies outside limits.tilt_range_urad = ±{}",
                        l.tilt_range_urad
                    ),
                    format!("|setpoint| < {} µrad", l.tilt_range_urad),
                );
            }
        }
    }
    if let (Some(tm), Some(l)) = (&tiltmeter, &limits) {
        if l.tilt_range_urad > tm.range_urad {
            v.err(
                "limits.tilt_range_urad",
                format!(
                    "the limit exceeds the tiltmeter's own range of ±{} µrad",
                    tm.range_urad
                ),
                format!("a range ≤ tiltmeter.range_urad = {}", tm.range_urad),
            );
        }
    }
    if let (Some(legs), Some(c)) = (&legs, &control) {
        if let Some(max) = legs.iter().map(|l| l.heater_max_power_w).reduce(f64::min) {
            if c.manual_power_w > max {
                v.err(
                    "control.manual_power_w",
                    format!("manual power exceeds the smallest heater_max_power_w = {max}"),
                    format!("0 … {max} W"),
                );
            }
        }
    }

    if !v.errors.is_empty() {
        return Err(ConfigErrors(v.errors).sorted());
    }
    let (
        Some(legs),
        Some(tiltmeter),
        Some(control),
        Some(limits),
        Some(recording),
        Some(network),
        Some(simulation),
        Some(interlocks),
        Some(instruments),
    ) = (
        legs,
        tiltmeter,
        control,
        limits,
        recording,
        network,
        simulation,
        interlocks,
        instruments,
    )
    else {
        // Every `None` above pushed an error, so this branch is unreachable in practice;
        // it still returns an error rather than panicking.
        return Err(ConfigErrors(vec![spans.error(
            "",
            "configuration incomplete".into(),
            String::new(),
        )]));
    };
    Ok(Config {
        stage_name,
        legs,
        tiltmeter,
        control,
        limits,
        recording,
        network,
        simulation,
        interlocks,
        instruments,
        source_text: text.to_string(),
    })
}

/// `units`: each leg's `thermometer_unit` as written (`None` if one was invalid); two legs
/// share a channel only if they name the same unit the same way (the instruments' rules
/// resolve the default unit and check the rest).
fn legs(v: &mut V<'_>, raw: Vec<RawLeg>, units: Option<&[Option<u8>]>) -> Option<Vec<Leg>> {
    if raw.len() < 3 {
        v.err_table(
            "legs",
            format!(
                "{} leg(s) given; a plate needs at least three to define its tilt",
                raw.len()
            ),
            "three or more [[legs]] tables",
        );
        return None;
    }
    let mut out = Vec::new();
    let mut ok = true;
    for (i, l) in raw.into_iter().enumerate() {
        let p = |k: &str| format!("legs[{i}].{k}");
        let name = match l.name {
            Some(n) if !n.trim().is_empty() && n.len() <= 32 => Some(n),
            Some(_) => {
                v.err(
                    &p("name"),
                    "leg name is empty or too long",
                    "1 to 32 characters",
                );
                None
            }
            None => Some(format!("leg{}", i + 1)),
        };
        let x = v.num(&p("x_m"), l.x_m, None, between(-10.0, 10.0));
        let y = v.num(&p("y_m"), l.y_m, None, between(-10.0, 10.0));
        let len = v.num(&p("length_m"), l.length_m, None, above(0.0, 10.0));
        let material = match (l.material, l.cte_per_k) {
            (Some(_), Some(_)) => {
                v.err(
                    &p("cte_per_k"),
                    "give either `material` or `cte_per_k`, not both",
                    "one of the two",
                );
                None
            }
            (Some(m), None) => match materials::lookup(&m) {
                Some(mat) => Some(mat),
                None => {
                    v.err(&p("material"), "unknown material", materials::names());
                    None
                }
            },
            (None, Some(c)) => v
                .num(&p("cte_per_k"), Some(c), None, between(-1e-4, 1e-3))
                .map(|c| Material {
                    name: "custom".into(),
                    cte_per_k: c,
                }),
            (None, None) => {
                v.missing(
                    &p("material"),
                    &format!("one of {}, or `cte_per_k` in 1/K", materials::names()),
                );
                None
            }
        };
        let r = v.num(
            &p("heater_resistance_ohm"),
            l.heater_resistance_ohm,
            None,
            above(0.0, 1e6),
        );
        let pmax = v.num(
            &p("heater_max_power_w"),
            l.heater_max_power_w,
            None,
            above(0.0, 1000.0),
        );
        let ch = v.int(
            &p("thermometer_channel"),
            l.thermometer_channel,
            None,
            0,
            255,
        );
        match (name, x, y, len, material, r, pmax, ch) {
            (
                Some(name),
                Some(x_m),
                Some(y_m),
                Some(length_m),
                Some(material),
                Some(r),
                Some(pm),
                Some(ch),
            ) => out.push(Leg {
                name,
                x_m,
                y_m,
                length_m,
                material,
                heater_resistance_ohm: r,
                heater_max_power_w: pm,
                thermometer_channel: ch as usize,
            }),
            _ => ok = false,
        }
    }
    if !ok {
        return None;
    }
    for i in 0..out.len() {
        for j in 0..i {
            if out[i].name == out[j].name {
                v.err(
                    &format!("legs[{i}].name"),
                    format!("leg name repeats legs[{j}]"),
                    "a name used by no other leg",
                );
                ok = false;
            }
            if out[i].thermometer_channel == out[j].thermometer_channel
                && units.is_some_and(|u| u.get(i) == u.get(j))
            {
                v.err(
                    &format!("legs[{i}].thermometer_channel"),
                    format!("channel already read by legs[{j}]"),
                    "a channel no other leg uses",
                );
                ok = false;
            }
        }
    }
    // Non-collinear: the plane fit needs a full-rank [x y 1] matrix.
    let n = out.len() as f64;
    let (mx, my) = (
        out.iter().map(|l| l.x_m).sum::<f64>() / n,
        out.iter().map(|l| l.y_m).sum::<f64>() / n,
    );
    let (sxx, syy, sxy) = out.iter().fold((0.0, 0.0, 0.0), |(a, b, c), l| {
        let (dx, dy) = (l.x_m - mx, l.y_m - my);
        (a + dx * dx, b + dy * dy, c + dx * dy)
    });
    let det = sxx * syy - sxy * sxy;
    let scale = (sxx + syy).powi(2);
    if !(det > 1e-6 * scale && scale > 1e-12) {
        v.err_table(
            "legs",
            "the legs lie on (or very near) one line, so the plate's tilt about that line cannot be controlled",
            "leg positions spanning a plane, e.g. three legs 120° apart",
        );
        ok = false;
    }
    ok.then_some(out)
}

fn tiltmeter(v: &mut V<'_>, raw: Option<RawTiltmeter>) -> Option<Tiltmeter> {
    let Some(t) = raw else {
        v.missing(
            "tiltmeter",
            "a [tiltmeter] table with at least rate_hz and range_urad",
        );
        return None;
    };
    let rate = v.num("tiltmeter.rate_hz", t.rate_hz, None, above(0.0, 1000.0));
    let range = v.num("tiltmeter.range_urad", t.range_urad, None, above(0.0, 1e6));
    let sx = v.num(
        "tiltmeter.scale_x_urad_per_unit",
        t.scale_x_urad_per_unit,
        Some(1.0),
        between(-1e9, 1e9),
    );
    let sy = v.num(
        "tiltmeter.scale_y_urad_per_unit",
        t.scale_y_urad_per_unit,
        Some(1.0),
        between(-1e9, 1e9),
    );
    for (k, s) in [
        ("tiltmeter.scale_x_urad_per_unit", sx),
        ("tiltmeter.scale_y_urad_per_unit", sy),
    ] {
        if s == Some(0.0) {
            v.err(k, "a zero scale discards the axis", "a non-zero number");
        }
    }
    let ox = v.num(
        "tiltmeter.offset_x_unit",
        t.offset_x_unit,
        Some(0.0),
        between(-1e12, 1e12),
    );
    let oy = v.num(
        "tiltmeter.offset_y_unit",
        t.offset_y_unit,
        Some(0.0),
        between(-1e12, 1e12),
    );
    let m = match t.cross_coupling {
        None => Some([[1.0, 0.0], [0.0, 1.0]]),
        Some(rows) => {
            let shape_ok = rows.len() == 2 && rows.iter().all(|r| r.len() == 2);
            let finite = rows.iter().flatten().all(|x| x.is_finite());
            if !shape_ok || !finite {
                v.err(
                    "tiltmeter.cross_coupling",
                    "not a 2×2 matrix of finite numbers",
                    "[[a, b], [c, d]]",
                );
                None
            } else {
                let m = [[rows[0][0], rows[0][1]], [rows[1][0], rows[1][1]]];
                let det = m[0][0] * m[1][1] - m[0][1] * m[1][0];
                if det.abs() < 1e-6 {
                    v.err(
                        "tiltmeter.cross_coupling",
                        "the matrix is singular, so the axes cannot be separated",
                        "a matrix with non-zero determinant",
                    );
                    None
                } else {
                    Some(m)
                }
            }
        }
    };
    Some(Tiltmeter {
        rate_hz: rate?,
        range_urad: range?,
        scale_urad_per_unit: [sx.filter(|s| *s != 0.0)?, sy.filter(|s| *s != 0.0)?],
        offset_unit: [ox?, oy?],
        cross_coupling: m?,
    })
}

fn gains_common(
    v: &mut V<'_>,
    prefix: &str,
    ti: Option<f64>,
    td: Option<f64>,
    tf: Option<f64>,
    b: Option<f64>,
    tt: Option<f64>,
) -> Option<(Option<f64>, f64, f64, f64, f64)> {
    // ti_s = 0 is refused rather than read as "no integral": say so in the message.
    let ti = match ti {
        None => Some(None),
        Some(x) => v
            .num(&format!("{prefix}.ti_s"), Some(x), None, above(0.0, 1e7))
            .map(Some),
    };
    let td = v.num(&format!("{prefix}.td_s"), td, Some(0.0), between(0.0, 1e6));
    let tf = v.num(
        &format!("{prefix}.derivative_filter_s"),
        tf,
        Some(0.0),
        between(0.0, 1e6),
    );
    let b = v.num(
        &format!("{prefix}.setpoint_weight"),
        b,
        Some(1.0),
        between(0.0, 1.0),
    );
    let tt_default = match (ti, td) {
        // Common practice: Tt = sqrt(Ti·Td) when both act, else Ti (Åström & Hägglund).
        (Some(Some(ti)), Some(td)) if td > 0.0 => Some((ti * td).sqrt()),
        (Some(Some(ti)), _) => Some(ti),
        _ => Some(1.0),
    };
    let tt = v.num(
        &format!("{prefix}.tracking_time_s"),
        tt,
        tt_default,
        above(0.0, 1e7),
    );
    Some((ti?, td?, tf?, b?, tt?))
}

fn control(v: &mut V<'_>, raw: Option<RawControl>) -> Option<Control> {
    let Some(c) = raw else {
        v.missing("control", "a [control] table");
        return None;
    };
    let rate = v.num("control.rate_hz", c.rate_hz, None, above(0.0, 100.0));
    let mode = match c.mode.as_deref() {
        None => Some(Mode::Level),
        Some(s) => match Mode::parse(s) {
            Some(m) => Some(m),
            None => {
                v.err(
                    "control.mode",
                    "unknown mode",
                    "\"off\", \"manual\", \"temperature\" or \"level\"",
                );
                None
            }
        },
    };
    let spx = v.num(
        "control.setpoint_x_urad",
        c.setpoint_x_urad,
        Some(0.0),
        between(-1e6, 1e6),
    );
    let spy = v.num(
        "control.setpoint_y_urad",
        c.setpoint_y_urad,
        Some(0.0),
        between(-1e6, 1e6),
    );
    let ramp = v.num(
        "control.setpoint_ramp_urad_per_s",
        c.setpoint_ramp_urad_per_s,
        Some(0.01),
        above(0.0, 1e3),
    );
    let bias = v.num(
        "control.leg_bias_c",
        c.leg_bias_c,
        None,
        between(-50.0, 150.0),
    );
    let bias_ramp = v.num(
        "control.leg_bias_ramp_k_per_s",
        c.leg_bias_ramp_k_per_s,
        Some(0.002),
        above(0.0, 10.0),
    );
    let manual = v.num(
        "control.manual_power_w",
        c.manual_power_w,
        Some(0.0),
        between(0.0, 1000.0),
    );

    let tl = c.tilt_loop.unwrap_or_default();
    let tkp = v.num(
        "control.tilt_loop.kp_urad_per_urad",
        tl.kp_urad_per_urad,
        None,
        between(0.0, 1e3),
    );
    let tcommon = gains_common(
        v,
        "control.tilt_loop",
        tl.ti_s,
        tl.td_s,
        tl.derivative_filter_s,
        tl.setpoint_weight,
        tl.tracking_time_s,
    );
    let tlimit = v.num(
        "control.tilt_loop.output_limit_urad",
        tl.output_limit_urad,
        Some(100.0),
        above(0.0, 1e6),
    );
    let tslew = match tl.slew_urad_per_s {
        None => Some(None),
        Some(x) => v
            .num(
                "control.tilt_loop.slew_urad_per_s",
                Some(x),
                None,
                above(0.0, 1e6),
            )
            .map(Some),
    };

    let ll = c.leg_loop.unwrap_or_default();
    let lkp = v.num(
        "control.leg_loop.kp_w_per_k",
        ll.kp_w_per_k,
        None,
        between(0.0, 1e4),
    );
    let lcommon = gains_common(
        v,
        "control.leg_loop",
        ll.ti_s,
        ll.td_s,
        ll.derivative_filter_s,
        ll.setpoint_weight,
        ll.tracking_time_s,
    );
    let lslew = match ll.slew_w_per_s {
        None => Some(None),
        Some(x) => v
            .num(
                "control.leg_loop.slew_w_per_s",
                Some(x),
                None,
                above(0.0, 1e4),
            )
            .map(Some),
    };

    let (tti, ttd, ttf, tb, ttt) = tcommon?;
    let (lti, ltd, ltf, lb, ltt) = lcommon?;
    Some(Control {
        rate_hz: rate?,
        mode: mode?,
        setpoint_urad: [spx?, spy?],
        setpoint_ramp_urad_per_s: ramp?,
        leg_bias_c: bias?,
        leg_bias_ramp_k_per_s: bias_ramp?,
        manual_power_w: manual?,
        tilt_loop: LoopGains {
            kp: tkp?,
            ti_s: tti,
            td_s: ttd,
            derivative_filter_s: ttf,
            setpoint_weight: tb,
            tracking_time_s: ttt,
            slew_per_s: tslew?,
        },
        tilt_output_limit_urad: tlimit?,
        leg_loop: LoopGains {
            kp: lkp?,
            ti_s: lti,
            td_s: ltd,
            derivative_filter_s: ltf,
            setpoint_weight: lb,
            tracking_time_s: ltt,
            slew_per_s: lslew?,
        },
    })
}

fn limits(v: &mut V<'_>, l: RawLimits) -> Option<Limits> {
    let t = v.num(
        "limits.max_leg_temp_c",
        l.max_leg_temp_c,
        Some(40.0),
        between(-50.0, 200.0),
    );
    let p = v.num(
        "limits.max_total_power_w",
        l.max_total_power_w,
        None,
        above(0.0, 1e4),
    );
    let r = v.num(
        "limits.tilt_range_urad",
        l.tilt_range_urad,
        None,
        above(0.0, 1e6),
    );
    Some(Limits {
        max_leg_temp_c: t?,
        max_total_power_w: p?,
        tilt_range_urad: r?,
    })
}

fn recording(v: &mut V<'_>, r: RawRecording) -> Option<Recording> {
    let dir = match r.dir {
        Some(d) if d.trim().is_empty() => {
            v.err("recording.dir", "empty folder name", "a folder path");
            None
        }
        Some(d) => Some(PathBuf::from(d)),
        None => Some(PathBuf::from("runs")),
    };
    let flush = v.num(
        "recording.flush_interval_s",
        r.flush_interval_s,
        Some(5.0),
        between(0.1, 10.0),
    );
    let dur = v.num(
        "recording.segment_duration_h",
        r.segment_duration_h,
        Some(12.0),
        between(0.001, 168.0),
    );
    let size = v.num(
        "recording.segment_max_mib",
        r.segment_max_mib,
        Some(1024.0),
        between(0.01, 1e6),
    );
    let q = v.int(
        "recording.queue_capacity_rows",
        r.queue_capacity_rows,
        Some(1 << 16),
        64,
        1 << 26,
    );
    Some(Recording {
        enabled: r.enabled.unwrap_or(true),
        dir: dir?,
        flush_interval_s: flush?,
        segment_duration_h: dur?,
        segment_max_mib: size?,
        queue_capacity_rows: q? as usize,
    })
}

fn network(v: &mut V<'_>, n: RawNetwork) -> Option<Network> {
    let s = n.bind.unwrap_or_else(|| "127.0.0.1:8040".into());
    let bind = match s.parse::<SocketAddr>() {
        Ok(bind) => Some(bind),
        Err(_) => {
            v.err(
                "network.bind",
                "not an address and port",
                "IP:port, e.g. \"127.0.0.1:8040\" or \"[::1]:8040\"",
            );
            None
        }
    };
    let mut path = |key: &str, p: Option<String>| -> Option<Option<PathBuf>> {
        match p {
            None => Some(None),
            Some(p) if p.trim().is_empty() => {
                v.err(
                    key,
                    "the path is empty",
                    "a file path (absolute is clearest)",
                );
                None
            }
            Some(p) => Some(Some(PathBuf::from(p))),
        }
    };
    let cert = path("network.tls_cert_file", n.tls_cert_file);
    let key = path("network.tls_key_file", n.tls_key_file);
    let token_file = path("network.token_file", n.token_file);
    let tls = match (cert, key) {
        (Some(Some(cert_file)), Some(Some(key_file))) => Some(Some(Tls {
            cert_file,
            key_file,
        })),
        (Some(None), Some(None)) => Some(None),
        (Some(Some(_)), Some(None)) => {
            v.err(
                "network.tls_cert_file",
                "a certificate without network.tls_key_file",
                "both tls_cert_file and tls_key_file, or neither",
            );
            None
        }
        (Some(None), Some(Some(_))) => {
            v.err(
                "network.tls_key_file",
                "a key without network.tls_cert_file",
                "both tls_cert_file and tls_key_file, or neither",
            );
            None
        }
        _ => None,
    };
    let streams = v.int(
        "network.max_stream_clients",
        n.max_stream_clients,
        Some(16),
        1,
        1024,
    );
    let timeout = v.int(
        "network.change_timeout_ms",
        n.change_timeout_ms,
        Some(2000),
        10,
        60_000,
    );
    Some(Network {
        bind: bind?,
        tls: tls?,
        token_file: token_file?,
        max_stream_clients: streams? as usize,
        change_timeout_ms: timeout? as u64,
    })
}

fn simulation(v: &mut V<'_>, s: RawSimulation) -> Option<Simulation> {
    let p = |k: &str| format!("simulation.{k}");
    let nonneg = between(0.0, 1e6);
    let any = between(-1e6, 1e6);
    // Every key is checked before any `?`, so all problems are reported together.
    let seed = v.int(&p("seed"), s.seed, Some(1), 0, i64::MAX);
    let ambient_mean_c = v.num(
        &p("ambient_mean_c"),
        s.ambient_mean_c,
        Some(21.0),
        between(-50.0, 100.0),
    );
    let ambient_daily_swing_k = v.num(
        &p("ambient_daily_swing_k"),
        s.ambient_daily_swing_k,
        Some(0.4),
        between(0.0, 50.0),
    );
    let ambient_walk_k = v.num(
        &p("ambient_walk_k"),
        s.ambient_walk_k,
        Some(0.05),
        between(0.0, 50.0),
    );
    let ambient_walk_correlation_h = v.num(
        &p("ambient_walk_correlation_h"),
        s.ambient_walk_correlation_h,
        Some(6.0),
        above(0.0, 1e4),
    );
    let gx = v.num(
        &p("gradient_x_k_per_m"),
        s.gradient_x_k_per_m,
        Some(0.05),
        any,
    );
    let gy = v.num(
        &p("gradient_y_k_per_m"),
        s.gradient_y_k_per_m,
        Some(0.0),
        any,
    );
    let gdx = v.num(
        &p("gradient_daily_x_k_per_m"),
        s.gradient_daily_x_k_per_m,
        Some(0.05),
        any,
    );
    let gdy = v.num(
        &p("gradient_daily_y_k_per_m"),
        s.gradient_daily_y_k_per_m,
        Some(0.02),
        any,
    );
    let fdx = v.num(
        &p("floor_drift_x_urad_per_day"),
        s.floor_drift_x_urad_per_day,
        Some(1.0),
        any,
    );
    let fdy = v.num(
        &p("floor_drift_y_urad_per_day"),
        s.floor_drift_y_urad_per_day,
        Some(-0.4),
        any,
    );
    let fwx = v.num(
        &p("floor_wobble_x_urad"),
        s.floor_wobble_x_urad,
        Some(0.5),
        nonneg,
    );
    let fwy = v.num(
        &p("floor_wobble_y_urad"),
        s.floor_wobble_y_urad,
        Some(0.3),
        nonneg,
    );
    let tilt_noise = v.num(
        &p("tilt_noise_nrad_per_sqrt_hz"),
        s.tilt_noise_nrad_per_sqrt_hz,
        Some(10.0),
        nonneg,
    );
    let tilt_walk = v.num(
        &p("tilt_walk_nrad_per_sqrt_h"),
        s.tilt_walk_nrad_per_sqrt_h,
        Some(0.2),
        nonneg,
    );
    let tilt_quantum = v.num(
        &p("tilt_quantum_nrad"),
        s.tilt_quantum_nrad,
        Some(1.0),
        nonneg,
    );
    let thermo_noise = v.num(
        &p("thermometer_noise_mk"),
        s.thermometer_noise_mk,
        Some(1.0),
        nonneg,
    );
    let leg_c = v.num(
        &p("leg_heat_capacity_j_per_k"),
        s.leg_heat_capacity_j_per_k,
        Some(400.0),
        above(0.0, 1e9),
    );
    let leg_g = v.num(
        &p("leg_conductance_w_per_k"),
        s.leg_conductance_w_per_k,
        Some(0.3),
        above(0.0, 1e6),
    );
    let heater_c = v.num(
        &p("heater_heat_capacity_j_per_k"),
        s.heater_heat_capacity_j_per_k,
        Some(15.0),
        above(0.0, 1e9),
    );
    let heater_g = v.num(
        &p("heater_coupling_w_per_k"),
        s.heater_coupling_w_per_k,
        Some(1.0),
        above(0.0, 1e6),
    );
    let heater_loss = v.num(
        &p("heater_loss_w_per_k"),
        s.heater_loss_w_per_k,
        Some(0.02),
        nonneg,
    );
    let spread = v.num(
        &p("leg_spread_ratio"),
        s.leg_spread_ratio,
        Some(0.05),
        between(0.0, 0.5),
    );
    Some(Simulation {
        seed: seed? as u64,
        ambient_mean_c: ambient_mean_c?,
        ambient_daily_swing_k: ambient_daily_swing_k?,
        ambient_walk_k: ambient_walk_k?,
        ambient_walk_correlation_h: ambient_walk_correlation_h?,
        gradient_k_per_m: [gx?, gy?],
        gradient_daily_k_per_m: [gdx?, gdy?],
        floor_drift_urad_per_day: [fdx?, fdy?],
        floor_wobble_urad: [fwx?, fwy?],
        tilt_noise_nrad_per_sqrt_hz: tilt_noise?,
        tilt_walk_nrad_per_sqrt_h: tilt_walk?,
        tilt_quantum_nrad: tilt_quantum?,
        thermometer_noise_mk: thermo_noise?,
        leg_heat_capacity_j_per_k: leg_c?,
        leg_conductance_w_per_k: leg_g?,
        heater_heat_capacity_j_per_k: heater_c?,
        heater_coupling_w_per_k: heater_g?,
        heater_loss_w_per_k: heater_loss?,
        leg_spread_ratio: spread?,
    })
}

fn interlocks(v: &mut V<'_>, r: RawInterlocks) -> Option<Interlocks> {
    use InterlockAction::{Hold, Limit, Safe};
    // (defaults) Over-temperature and over-power go safe at once; the rest hold the
    // outputs while a sensor or the loop is unreliable. Common practice, not a standard.
    let mut rule = |name: &str,
                    raw: &Option<RawInterlock>,
                    action: InterlockAction,
                    ticks: i64|
     -> Option<InterlockRule> {
        let p = format!("interlocks.{name}");
        let raw = raw.as_ref();
        let action = match raw.and_then(|x| x.action.as_deref()) {
            None => Some(action),
            Some(a) => match InterlockAction::parse(a) {
                Some(a) => Some(a),
                None => {
                    v.err(
                        &format!("{p}.action"),
                        "unknown interlock action",
                        "\"hold\", \"limit\" or \"safe\"",
                    );
                    None
                }
            },
        };
        let t = v.int(
            &format!("{p}.after_ticks"),
            raw.and_then(|x| x.after_ticks),
            Some(ticks),
            1,
            1_000_000,
        );
        Some(InterlockRule {
            action: action?,
            after_ticks: t? as u32,
        })
    };
    let lot = rule("leg_over_temperature", &r.leg_over_temperature, Safe, 1);
    let hop = rule("heater_over_power", &r.heater_over_power, Safe, 3);
    let tp = rule("total_power", &r.total_power, Limit, 1);
    let ss = rule("sensor_stale", &r.sensor_stale, Hold, 10);
    let tor = rule("tilt_out_of_range", &r.tilt_out_of_range, Hold, 5);
    let td = rule(
        "thermometer_disagreement",
        &r.thermometer_disagreement,
        Hold,
        10,
    );
    let hoc = rule("heater_open_circuit", &r.heater_open_circuit, Hold, 5);
    let lo = rule("loop_overrun", &r.loop_overrun, Hold, 3);
    let margin = v.num(
        "interlocks.heater_over_power.margin_ratio",
        r.heater_over_power.as_ref().and_then(|x| x.margin_ratio),
        Some(1.1),
        between(1.0, 10.0),
    );
    let spread = v.num(
        "interlocks.thermometer_disagreement.max_spread_k",
        r.thermometer_disagreement
            .as_ref()
            .and_then(|x| x.max_spread_k),
        Some(3.0),
        above(0.0, 1000.0),
    );
    let ratio = v.num(
        "interlocks.heater_open_circuit.min_ratio",
        r.heater_open_circuit.as_ref().and_then(|x| x.min_ratio),
        Some(0.2),
        above(0.0, 1.0),
    );
    let min_p = v.num(
        "interlocks.heater_open_circuit.min_power_w",
        r.heater_open_circuit.as_ref().and_then(|x| x.min_power_w),
        Some(0.1),
        above(0.0, 1e4),
    );
    Some(Interlocks {
        leg_over_temperature: lot?,
        heater_over_power: hop?,
        heater_over_power_margin_ratio: margin?,
        total_power: tp?,
        sensor_stale: ss?,
        tilt_out_of_range: tor?,
        thermometer_disagreement: td?,
        thermometer_max_spread_k: spread?,
        heater_open_circuit: hoc?,
        heater_open_min_ratio: ratio?,
        heater_open_min_power_w: min_p?,
        loop_overrun: lo?,
    })
}
