//! `GET /metrics`: the daemon's health in the Prometheus text format, or OpenMetrics
//! when the scraper asks for it (`Accept: application/openmetrics-text`).
//!
//! Hand-written: a few dozen series do not need a metrics library. Units are base
//! units (seconds, radians, celsius, watts, ratio 0–1); counters end in `_total`; labels
//! are few and bounded (axis, leg name, instrument channel and its port, mode).
//! Values the daemon does not have (no usable reading) are left out rather than sent as
//! NaN. Every family has `# HELP` and `# TYPE`; OpenMetrics adds `# UNIT` and ends with
//! `# EOF`. Main items: [`render`], [`content_type`], [`ApiCounters`].

use std::fmt::Write;
use std::sync::atomic::{AtomicU64, Ordering};

use stilt_config::{Config, Mode};

use crate::status::Status;

/// Content type of the Prometheus text format 0.0.4.
pub const PROMETHEUS_TEXT: &str = "text/plain; version=0.0.4; charset=utf-8";
/// Content type of OpenMetrics 1.0.0 text.
pub const OPENMETRICS_TEXT: &str = "application/openmetrics-text; version=1.0.0; charset=utf-8";

/// Whether an `Accept` header asks for OpenMetrics.
pub fn wants_openmetrics(accept: &str) -> bool {
    accept
        .split(',')
        .any(|p| p.trim().starts_with("application/openmetrics-text"))
}

/// The content type for the chosen format.
pub fn content_type(open_metrics: bool) -> &'static str {
    if open_metrics {
        OPENMETRICS_TEXT
    } else {
        PROMETHEUS_TEXT
    }
}

/// The API's own counters.
#[derive(Debug, Default)]
pub struct ApiCounters {
    /// Changes the loop applied.
    pub applied: AtomicU64,
    /// Changes the loop refused.
    pub refused: AtomicU64,
    /// Changes refused before reaching the loop (bad value).
    pub invalid: AtomicU64,
    /// Requests refused for want of a token or role.
    pub denied: AtomicU64,
    /// Changes the loop did not answer in time (or was not running).
    pub unanswered: AtomicU64,
    /// Rows live-stream clients missed by falling behind.
    pub stream_lagged_rows: AtomicU64,
    /// Live streams open now.
    pub stream_clients: AtomicU64,
}

impl ApiCounters {
    /// Adds one to a counter.
    pub fn inc(c: &AtomicU64) {
        c.fetch_add(1, Ordering::Relaxed);
    }
}

#[derive(Clone, Copy, PartialEq)]
enum Kind {
    Gauge,
    Counter,
}

struct W {
    out: String,
    om: bool,
}

fn escape(v: &str) -> String {
    let mut s = String::with_capacity(v.len());
    for c in v.chars() {
        match c {
            '\\' => s.push_str("\\\\"),
            '"' => s.push_str("\\\""),
            '\n' => s.push_str("\\n"),
            c => s.push(c),
        }
    }
    s
}

fn num(v: f64) -> String {
    if v.is_nan() {
        "NaN".into()
    } else if v == f64::INFINITY {
        "+Inf".into()
    } else if v == f64::NEG_INFINITY {
        "-Inf".into()
    } else {
        format!("{v}")
    }
}

impl W {
    /// Starts a family. `name` is the family name (without `_total` for counters);
    /// `unit` must be its suffix when given.
    fn family(&mut self, name: &str, kind: Kind, unit: Option<&str>, help: &str) -> Family<'_> {
        let shown = if kind == Kind::Counter && !self.om {
            format!("{name}_total")
        } else {
            name.to_string()
        };
        let _ = writeln!(self.out, "# HELP {shown} {help}");
        let t = match kind {
            Kind::Gauge => "gauge",
            Kind::Counter => "counter",
        };
        let _ = writeln!(self.out, "# TYPE {shown} {t}");
        if let (true, Some(u)) = (self.om, unit) {
            let _ = writeln!(self.out, "# UNIT {shown} {u}");
        }
        let sample = if kind == Kind::Counter {
            format!("{name}_total")
        } else {
            name.to_string()
        };
        Family { w: self, sample }
    }
}

struct Family<'a> {
    w: &'a mut W,
    sample: String,
}

impl Family<'_> {
    fn put(&mut self, labels: &[(&str, &str)], v: f64) -> &mut Self {
        let out = &mut self.w.out;
        out.push_str(&self.sample);
        if !labels.is_empty() {
            out.push('{');
            for (i, (k, val)) in labels.iter().enumerate() {
                if i > 0 {
                    out.push(',');
                }
                let _ = write!(out, "{k}=\"{}\"", escape(val));
            }
            out.push('}');
        }
        let _ = writeln!(out, " {}", num(v));
        self
    }

    fn int(&mut self, labels: &[(&str, &str)], v: u64) -> &mut Self {
        self.put(labels, v as f64)
    }

    fn opt(&mut self, labels: &[(&str, &str)], v: Option<f64>) -> &mut Self {
        if let Some(v) = v.filter(|v| v.is_finite()) {
            self.put(labels, v);
        }
        self
    }
}

const AXES: [&str; 2] = ["x", "y"];
const URAD: f64 = 1e-6;

/// Renders the metrics for a status snapshot.
pub fn render(s: &Status, cfg: &Config, api: &ApiCounters, open_metrics: bool) -> String {
    let mut w = W {
        out: String::with_capacity(8192),
        om: open_metrics,
    };
    use Kind::*;
    w.family(
        "stiltd_version",
        Gauge,
        None,
        "Always 1; labels name the software version and the stage",
    )
    .put(&[("version", s.version), ("stage", &s.stage_name)], 1.0);
    w.family(
        "stiltd_uptime_seconds",
        Gauge,
        Some("seconds"),
        "Seconds since the daemon started",
    )
    .put(&[], s.uptime_s);
    w.family(
        "stiltd_ready",
        Gauge,
        None,
        "1 when every sensor the mode needs has a usable reading",
    )
    .put(&[], if s.ready { 1.0 } else { 0.0 });
    {
        let mut f = w.family(
            "stiltd_mode",
            Gauge,
            None,
            "1 for the controller mode in force, 0 for the others",
        );
        for m in Mode::ALL {
            f.put(&[("mode", m.as_str())], if m == s.mode { 1.0 } else { 0.0 });
        }
    }
    {
        let mut f = w.family(
            "stiltd_tilt_radians",
            Gauge,
            Some("radians"),
            "Measured tilt per axis, mean over the last control tick",
        );
        for (k, a) in s.axes.iter().enumerate() {
            f.opt(&[("axis", AXES[k])], a.measured_urad.map(|v| v * URAD));
        }
    }
    {
        let mut f = w.family(
            "stiltd_tilt_setpoint_radians",
            Gauge,
            Some("radians"),
            "Tilt setpoint in use per axis (ramped)",
        );
        for (k, a) in s.axes.iter().enumerate() {
            f.put(&[("axis", AXES[k])], a.setpoint_urad * URAD);
        }
    }
    {
        let mut f = w.family(
            "stiltd_tilt_target_radians",
            Gauge,
            Some("radians"),
            "Tilt target the setpoint ramps towards, per axis",
        );
        for (k, a) in s.axes.iter().enumerate() {
            f.put(&[("axis", AXES[k])], a.target_urad * URAD);
        }
    }
    {
        let mut f = w.family(
            "stiltd_tilt_reading_age_seconds",
            Gauge,
            Some("seconds"),
            "Seconds since the last usable tilt reading, per axis",
        );
        for (k, a) in s.axes.iter().enumerate() {
            f.opt(&[("axis", AXES[k])], a.age_s);
        }
    }
    {
        let mut f = w.family(
            "stiltd_leg_temperature_celsius",
            Gauge,
            Some("celsius"),
            "Latest usable leg temperature",
        );
        for l in &s.legs {
            f.opt(&[("leg", &l.name)], l.temp_c);
        }
    }
    {
        let mut f = w.family(
            "stiltd_leg_setpoint_celsius",
            Gauge,
            Some("celsius"),
            "Leg temperature setpoint in use",
        );
        for l in &s.legs {
            f.put(&[("leg", &l.name)], l.setpoint_c);
        }
    }
    w.family(
        "stiltd_leg_bias_celsius",
        Gauge,
        Some("celsius"),
        "Common leg temperature bias in use",
    )
    .put(&[], s.leg_bias_c);
    w.family(
        "stiltd_leg_bias_target_celsius",
        Gauge,
        Some("celsius"),
        "Common leg temperature bias target",
    )
    .put(&[], s.leg_bias_target_c);
    {
        let mut f = w.family(
            "stiltd_heater_power_watts",
            Gauge,
            Some("watts"),
            "Commanded heater power per leg",
        );
        for l in &s.legs {
            f.put(&[("leg", &l.name)], l.power_w);
        }
    }
    {
        let mut f = w.family(
            "stiltd_heater_output_ratio",
            Gauge,
            Some("ratio"),
            "Commanded heater power as a fraction of the heater's limit (0 to 1)",
        );
        for l in &s.legs {
            let max = cfg
                .legs
                .iter()
                .find(|c| c.name == l.name)
                .map(|c| c.heater_max_power_w);
            f.opt(
                &[("leg", &l.name)],
                max.filter(|m| *m > 0.0).map(|m| l.power_w / m),
            );
        }
    }
    {
        let active = s.alarms.iter().filter(|a| a.active).count() as u64;
        let latched = s.alarms.iter().filter(|a| a.latched).count() as u64;
        let unack = s
            .alarms
            .iter()
            .filter(|a| a.acknowledged_by.is_none())
            .count() as u64;
        w.family(
            "stiltd_alarms",
            Gauge,
            None,
            "Alarms listed, by state (an alarm may count in several)",
        )
        .int(&[("state", "active")], active)
        .int(&[("state", "latched")], latched)
        .int(&[("state", "unacknowledged")], unack);
    }
    let t = &s.timing;
    w.family(
        "stiltd_control_period_seconds",
        Gauge,
        Some("seconds"),
        "Configured control period",
    )
    .put(&[], t.period_s);
    w.family(
        "stiltd_control_ticks",
        Counter,
        None,
        "Control ticks run since start",
    )
    .int(&[], t.ticks);
    w.family(
        "stiltd_control_overruns",
        Counter,
        None,
        "Control ticks that started more than one period late",
    )
    .int(&[], t.overruns);
    w.family(
        "stiltd_control_jitter_p50_seconds",
        Gauge,
        Some("seconds"),
        "Median absolute deviation of the tick interval from the period, recent window",
    )
    .put(&[], t.jitter_p50_s);
    w.family(
        "stiltd_control_jitter_p99_seconds",
        Gauge,
        Some("seconds"),
        "99th percentile of the same",
    )
    .put(&[], t.jitter_p99_s);
    w.family(
        "stiltd_control_jitter_max_seconds",
        Gauge,
        Some("seconds"),
        "Largest tick interval deviation since start",
    )
    .put(&[], t.jitter_max_s);
    w.family(
        "stiltd_control_tick_work_seconds",
        Gauge,
        Some("seconds"),
        "Time the last tick's work took",
    )
    .put(&[], t.last_tick_work_s);
    let r = &s.recording;
    w.family(
        "stiltd_recording_enabled",
        Gauge,
        None,
        "1 when samples are being recorded",
    )
    .put(&[], if r.enabled { 1.0 } else { 0.0 });
    w.family(
        "stiltd_recording_rows_written",
        Counter,
        None,
        "Rows written to the recording (all streams)",
    )
    .int(&[], r.rows_written);
    w.family(
        "stiltd_recording_dropped_rows",
        Counter,
        None,
        "Rows dropped because the writer fell behind or the disk failed",
    )
    .int(&[], r.dropped_rows);
    w.family(
        "stiltd_recording_last_flush_timestamp_seconds",
        Gauge,
        Some("seconds"),
        "UTC of the last flush that reached the disk, seconds since the Unix epoch",
    )
    .opt(&[], r.last_flush_utc_ns.map(|ns| ns as f64 * 1e-9));
    {
        let mut f = w.family(
            "stiltd_channel_connected",
            Gauge,
            None,
            "1 when the instrument's port is open",
        );
        for c in &s.channels {
            f.put(
                &[("channel", &c.name), ("port", &c.port)],
                if c.connected { 1.0 } else { 0.0 },
            );
        }
    }
    for (name, help, get) in [
        (
            "stiltd_channel_requests",
            "Requests sent to the instrument",
            (|c| c.requests) as fn(&crate::status::ChannelStatus) -> u64,
        ),
        (
            "stiltd_channel_timeouts",
            "Instrument replies that did not come in time",
            |c| c.timeouts,
        ),
        (
            "stiltd_channel_bad_frames",
            "Instrument replies that could not be decoded",
            |c| c.bad_frames,
        ),
        (
            "stiltd_channel_reconnects",
            "Times the instrument's port was reopened",
            |c| c.reconnects,
        ),
    ] {
        let mut f = w.family(name, Counter, None, help);
        for c in &s.channels {
            f.int(&[("channel", &c.name), ("port", &c.port)], get(c));
        }
    }
    let ld = |c: &AtomicU64| c.load(Ordering::Relaxed);
    w.family(
        "stiltd_api_changes",
        Counter,
        None,
        "Changes asked through the API, by outcome",
    )
    .int(&[("result", "applied")], ld(&api.applied))
    .int(&[("result", "refused")], ld(&api.refused))
    .int(&[("result", "invalid")], ld(&api.invalid))
    .int(&[("result", "denied")], ld(&api.denied))
    .int(&[("result", "unanswered")], ld(&api.unanswered));
    w.family(
        "stiltd_api_stream_clients",
        Gauge,
        None,
        "Live streams open now",
    )
    .int(&[], ld(&api.stream_clients));
    w.family(
        "stiltd_api_stream_lagged_rows",
        Counter,
        None,
        "Rows live-stream clients missed by falling behind",
    )
    .int(&[], ld(&api.stream_lagged_rows));
    if open_metrics {
        w.out.push_str("# EOF\n");
    }
    w.out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn escaping_and_numbers() {
        // Prometheus exposition format: label values escape \, " and newline (from memory).
        assert_eq!(escape("a\"b\\c\nd"), "a\\\"b\\\\c\\nd");
        assert_eq!(num(f64::INFINITY), "+Inf");
        assert_eq!(num(1.5e-6), "0.0000015");
        assert!(wants_openmetrics(
            "application/openmetrics-text; version=1.0.0,text/plain;q=0.5"
        ));
        assert!(!wants_openmetrics("text/plain"));
    }
}
