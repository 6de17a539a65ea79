//! `stiltctl`: the command-line client of a running `stiltd`, for people at a terminal.
//!
//! Reads status as a table (or `--json`), changes setpoints, mode and gains,
//! acknowledges alarms, watches live values updating in place, and makes access tokens.
//! The token comes from `STILT_TOKEN` or `--token-file`. Exit codes: 0 success, 1 the
//! request failed (the message says why and what to do), 2 bad usage.

use std::io::{IsTerminal, Write};
use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Duration;

use clap::{Parser, Subcommand};
use stilt_daemon::api::auth::{Role, generate_token, hash_token, hex, token_entry_toml};
use stilt_daemon::api::client::{Client, ClientError};
use stilt_daemon::api::wire::{
    AckBody, ChangeReply, GainsBody, LegBiasBody, ManualPowerBody, ModeBody, SampleWire,
    StatusWire, StreamStartWire, TiltSetpointBody,
};

#[derive(Parser)]
#[command(name = "stiltctl", version, about = "Talks to a running stiltd")]
struct Cli {
    /// The daemon's address.
    #[arg(
        long,
        global = true,
        default_value = "http://127.0.0.1:8040",
        env = "STILT_URL"
    )]
    url: String,
    /// A file holding the access token (else the STILT_TOKEN environment variable).
    #[arg(long, global = true)]
    token_file: Option<PathBuf>,
    /// PEM file of the certificate authority to trust for https:// (a lab's own).
    #[arg(long, global = true)]
    ca_file: Option<PathBuf>,
    /// Seconds to wait for an answer.
    #[arg(long, global = true, default_value_t = 10.0)]
    timeout_s: f64,
    #[command(subcommand)]
    cmd: Cmd,
}

#[derive(Subcommand)]
enum Cmd {
    /// Show the daemon's status.
    Status {
        /// Print the JSON the daemon sent instead of a table.
        #[arg(long)]
        json: bool,
    },
    /// Change a setpoint.
    Set {
        #[command(subcommand)]
        what: SetCmd,
    },
    /// Switch the controller mode: off, manual, temperature or level.
    Mode {
        /// The new mode.
        mode: String,
    },
    /// Change the gains of the tilt loops or the leg loops (only the ones given).
    #[command(allow_negative_numbers = true)]
    Gains {
        /// `tilt` or `leg`.
        #[arg(value_parser = ["tilt", "leg"])]
        which: String,
        /// Proportional gain.
        #[arg(long)]
        kp: Option<f64>,
        /// Integral time, s.
        #[arg(long)]
        ti_s: Option<f64>,
        /// Derivative time, s.
        #[arg(long)]
        td_s: Option<f64>,
        /// Derivative filter time constant, s.
        #[arg(long)]
        derivative_filter_s: Option<f64>,
        /// Setpoint weight on the proportional term, 0 … 1.
        #[arg(long)]
        setpoint_weight: Option<f64>,
        /// Anti-windup tracking time, s.
        #[arg(long)]
        tracking_time_s: Option<f64>,
        /// Output slew limit per second.
        #[arg(long)]
        slew_per_s: Option<f64>,
    },
    /// Acknowledge an alarm by id, or every alarm.
    Ack {
        /// The alarm's id (as `status` lists it); all when left out.
        id: Option<String>,
    },
    /// Watch live values, updated in place.
    Watch {
        /// Show every N-th control tick.
        #[arg(long, default_value_t = 1)]
        every: u64,
        /// Stop after this many samples (default: until Ctrl-C).
        #[arg(long)]
        count: Option<u64>,
    },
    /// Print the daemon's metrics text.
    Metrics,
    /// Make or hash access tokens (no daemon needed).
    Token {
        #[command(subcommand)]
        what: TokenCmd,
    },
}

#[derive(Subcommand)]
enum SetCmd {
    /// New tilt target per axis, µrad (ramped at the configured rate).
    Tilt {
        /// x target, µrad.
        #[arg(long, allow_negative_numbers = true)]
        x_urad: Option<f64>,
        /// y target, µrad.
        #[arg(long, allow_negative_numbers = true)]
        y_urad: Option<f64>,
    },
    /// Hold a tilt correction per axis, µrad, applied at once (temperature mode only: an
    /// open-loop step of the tilt plant; cleared by a change of mode).
    Correction {
        /// x correction, µrad.
        #[arg(long, allow_negative_numbers = true)]
        x_urad: Option<f64>,
        /// y correction, µrad.
        #[arg(long, allow_negative_numbers = true)]
        y_urad: Option<f64>,
    },
    /// New common leg temperature bias, °C.
    Bias {
        /// °C.
        #[arg(allow_negative_numbers = true)]
        celsius: f64,
    },
    /// New per-leg heater power for manual mode, W.
    ManualPower {
        /// W.
        watts: f64,
    },
}

#[derive(Subcommand)]
enum TokenCmd {
    /// Make a new random token: prints the token (give it to its holder) and the line
    /// for the daemon's token file.
    New {
        /// Who holds it (shown in the audit trail).
        #[arg(long)]
        name: String,
        /// observer (read) or operator (read and change).
        #[arg(long, value_parser = ["observer", "operator"])]
        role: String,
    },
    /// Print the SHA-256 of a token read from standard input.
    Hash,
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    match run(&cli) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("stiltctl: {e}");
            ExitCode::FAILURE
        }
    }
}

fn token(cli: &Cli) -> Result<Option<String>, String> {
    if let Some(p) = &cli.token_file {
        let t = std::fs::read_to_string(p)
            .map_err(|e| format!("cannot read the token file {}: {e}", p.display()))?;
        #[cfg(unix)]
        {
            use std::os::unix::fs::PermissionsExt;
            if let Ok(m) = std::fs::metadata(p) {
                if m.permissions().mode() & 0o077 != 0 {
                    eprintln!(
                        "stiltctl: warning: {} is readable by others; run `chmod 600 {}`",
                        p.display(),
                        p.display()
                    );
                }
            }
        }
        let t = t.trim().to_string();
        if t.is_empty() {
            return Err(format!("the token file {} is empty", p.display()));
        }
        return Ok(Some(t));
    }
    Ok(std::env::var("STILT_TOKEN")
        .ok()
        .map(|t| t.trim().to_string())
        .filter(|t| !t.is_empty()))
}

fn client(cli: &Cli) -> Result<Client, String> {
    let ca = match &cli.ca_file {
        Some(p) => Some(
            std::fs::read(p)
                .map_err(|e| format!("cannot read the CA file {}: {e}", p.display()))?,
        ),
        None => None,
    };
    if !(cli.timeout_s.is_finite() && cli.timeout_s > 0.0 && cli.timeout_s <= 3600.0) {
        return Err("--timeout-s must be a number of seconds from 0 to 3600".into());
    }
    Client::new(
        &cli.url,
        token(cli)?,
        ca.as_deref(),
        Duration::from_secs_f64(cli.timeout_s),
    )
    .map_err(|e| e.to_string())
}

fn done(r: Result<ChangeReply, ClientError>) -> Result<(), String> {
    let r = r.map_err(|e| e.to_string())?;
    println!("{} (by {})", r.detail, r.by);
    Ok(())
}

fn run(cli: &Cli) -> Result<(), String> {
    match &cli.cmd {
        Cmd::Token { what } => return token_cmd(what),
        Cmd::Status { json } => {
            let c = client(cli)?;
            if *json {
                let (_, text) = c.get_text("/v1/status", None).map_err(|e| e.to_string())?;
                println!("{text}");
            } else {
                let s: StatusWire = c.get("/v1/status").map_err(|e| e.to_string())?;
                print!("{}", table(&s));
            }
        }
        Cmd::Set { what } => {
            let c = client(cli)?;
            match what {
                SetCmd::Tilt { x_urad, y_urad } => {
                    if x_urad.is_none() && y_urad.is_none() {
                        return Err("give --x-urad, --y-urad or both".into());
                    }
                    done(c.put(
                        "/v1/setpoint/tilt",
                        &TiltSetpointBody {
                            x_urad: *x_urad,
                            y_urad: *y_urad,
                        },
                    ))?;
                }
                SetCmd::Correction { x_urad, y_urad } => {
                    if x_urad.is_none() && y_urad.is_none() {
                        return Err("give --x-urad, --y-urad or both".into());
                    }
                    done(c.set_tilt_correction(*x_urad, *y_urad))?;
                }
                SetCmd::Bias { celsius } => {
                    done(c.put("/v1/setpoint/leg-bias", &LegBiasBody { bias_c: *celsius }))?
                }
                SetCmd::ManualPower { watts } => {
                    done(c.put("/v1/manual-power", &ManualPowerBody { power_w: *watts }))?
                }
            }
        }
        Cmd::Mode { mode } => {
            let c = client(cli)?;
            done(c.put("/v1/mode", &ModeBody { mode: mode.clone() }))?;
        }
        Cmd::Gains {
            which,
            kp,
            ti_s,
            td_s,
            derivative_filter_s,
            setpoint_weight,
            tracking_time_s,
            slew_per_s,
        } => {
            let body = GainsBody {
                kp: *kp,
                ti_s: *ti_s,
                td_s: *td_s,
                derivative_filter_s: *derivative_filter_s,
                setpoint_weight: *setpoint_weight,
                tracking_time_s: *tracking_time_s,
                slew_per_s: *slew_per_s,
            };
            if body == GainsBody::default() {
                return Err(
                    "give at least one of --kp, --ti-s, --td-s, --derivative-filter-s, \
                            --setpoint-weight, --tracking-time-s, --slew-per-s"
                        .into(),
                );
            }
            let c = client(cli)?;
            done(c.put(&format!("/v1/gains/{which}"), &body))?;
        }
        Cmd::Ack { id } => {
            let c = client(cli)?;
            done(c.post("/v1/alarms/acknowledge", &AckBody { id: id.clone() }))?;
        }
        Cmd::Metrics => {
            let c = client(cli)?;
            let (_, text) = c.get_text("/metrics", None).map_err(|e| e.to_string())?;
            print!("{text}");
        }
        Cmd::Watch { every, count } => {
            let c = client(cli)?;
            watch(&c, *every, *count)?;
        }
    }
    Ok(())
}

fn token_cmd(what: &TokenCmd) -> Result<(), String> {
    match what {
        TokenCmd::New { name, role } => {
            let role = Role::parse(role).ok_or("role must be observer or operator")?;
            let tok = generate_token()?;
            let entry = token_entry_toml(name, role, &tok);
            // Check the entry parses as the daemon will read it.
            stilt_daemon::api::auth::TokenSet::parse(&entry, "the new entry")
                .map_err(|e| e.to_string())?;
            println!("token (give this to {name}; it is shown only now):\n  {tok}\n");
            println!("add this to the daemon's token file (chmod 600):\n\n{entry}");
        }
        TokenCmd::Hash => {
            let mut s = String::new();
            std::io::stdin()
                .read_line(&mut s)
                .map_err(|e| format!("cannot read the token from standard input: {e}"))?;
            let t = s.trim();
            if t.is_empty() {
                return Err("no token on standard input".into());
            }
            println!("{}", hex(&hash_token(t)));
        }
    }
    Ok(())
}

fn opt(v: Option<f64>, prec: usize) -> String {
    match v {
        Some(v) => format!("{v:+.prec$}"),
        None => "—".into(),
    }
}

/// UTC date and time from ns since the Unix epoch (days → civil date after
/// H. Hinnant, "chrono-Compatible Low-Level Date Algorithms", `civil_from_days`).
fn utc(ns: i64) -> String {
    let secs = ns.div_euclid(1_000_000_000);
    let days = secs.div_euclid(86_400);
    let sod = secs.rem_euclid(86_400);
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z.rem_euclid(146_097);
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = doy - (153 * mp + 2) / 5 + 1;
    let m = if mp < 10 { mp + 3 } else { mp - 9 };
    let y = yoe + era * 400 + i64::from(m <= 2);
    format!(
        "{y:04}-{m:02}-{d:02} {:02}:{:02}:{:02}Z",
        sod / 3600,
        sod / 60 % 60,
        sod % 60
    )
}

fn duration(s: f64) -> String {
    let t = s.max(0.0) as u64;
    match t {
        0..60 => format!("{t}s"),
        60..3600 => format!("{}m{:02}s", t / 60, t % 60),
        3600..86_400 => format!("{}h{:02}m", t / 3600, t / 60 % 60),
        _ => format!("{}d{:02}h", t / 86_400, t / 3600 % 24),
    }
}

fn table(s: &StatusWire) -> String {
    use std::fmt::Write as _;
    let mut o = String::new();
    let _ = writeln!(o, "{}  (stiltd {})", s.stage_name, s.version);
    let _ = writeln!(
        o,
        "mode {}   ready {}   up {}   at {}",
        s.mode,
        if s.ready { "yes" } else { "NO" },
        duration(s.uptime_s),
        utc(s.now_utc_ns)
    );
    let _ = writeln!(
        o,
        "\ntilt   measured µrad  quality       age s   setpoint µrad   target µrad"
    );
    for a in &s.axes {
        let _ = writeln!(
            o,
            "  {:<4} {:>13}  {:<12} {:>6}   {:>13.3}   {:>11.3}",
            a.axis,
            opt(a.measured_urad, 3),
            a.quality,
            a.age_s.map(|v| format!("{v:.1}")).unwrap_or("—".into()),
            a.setpoint_urad,
            a.target_urad
        );
    }
    let _ = writeln!(
        o,
        "\nlegs   temp °C    quality       setpoint °C   power W        (bias {:.3} °C → {:.3})",
        s.leg_bias_c, s.leg_bias_target_c
    );
    for l in &s.legs {
        let of = l
            .max_power_w
            .map(|m| format!(" of {m:.2}"))
            .unwrap_or_default();
        let _ = writeln!(
            o,
            "  {:<4} {:>8}   {:<12}  {:>11.4}   {:.3}{of}",
            l.name,
            l.temp_c.map(|v| format!("{v:.4}")).unwrap_or("—".into()),
            l.quality,
            l.setpoint_c,
            l.power_w
        );
    }
    if s.alarms.is_empty() {
        let _ = writeln!(o, "\nalarms: none");
    } else {
        let _ = writeln!(o, "\nalarms");
        for a in &s.alarms {
            let state = match (a.active, &a.acknowledged_by) {
                (true, None) => "ACTIVE".to_string(),
                (true, Some(w)) => format!("active, acknowledged by {w}"),
                (false, None) => "latched, not acknowledged".to_string(),
                (false, Some(w)) => format!("cleared, acknowledged by {w}"),
            };
            let _ = writeln!(
                o,
                "  {:<28} since {}  {state}\n    {}",
                a.id,
                utc(a.since_utc_ns),
                a.message
            );
        }
    }
    let t = &s.timing;
    let _ = writeln!(
        o,
        "\nloop   period {} s, {} ticks, {} overruns, jitter p50 {:.3} ms p99 {:.3} ms max {:.3} ms",
        t.period_s,
        t.ticks,
        t.overruns,
        t.jitter_p50_s * 1e3,
        t.jitter_p99_s * 1e3,
        t.jitter_max_s * 1e3
    );
    let r = &s.recording;
    let _ = writeln!(
        o,
        "record {}, {} rows written, {} dropped{}{}",
        if r.enabled { "on" } else { "off" },
        r.rows_written,
        r.dropped_rows,
        r.segment
            .as_ref()
            .map(|p| format!(", segment {p}"))
            .unwrap_or_default(),
        r.alarm
            .as_ref()
            .map(|a| format!("\n  ALARM: {a}"))
            .unwrap_or_default()
    );
    for c in &s.channels {
        let _ = writeln!(
            o,
            "chan   {:<12} {:<24} {}  {} requests, {} timeouts, {} bad frames, {} reconnects",
            c.name,
            c.port,
            if c.connected { "open  " } else { "CLOSED" },
            c.requests,
            c.timeouts,
            c.bad_frames,
            c.reconnects
        );
    }
    o
}

fn sample_lines(s: &SampleWire, legs: &[String]) -> Vec<String> {
    let mut v = vec![
        format!(
            "tick {:>8}  t {:>10.1} s  mode {:<11}  tilt {}",
            s.tick, s.t_s, s.mode, s.tilt_quality
        ),
        format!(
            "  x {:>10} µrad  setpoint {:+.3} → {:+.3}",
            opt(s.tilt_urad[0], 3),
            s.setpoint_urad[0],
            s.target_urad[0]
        ),
        format!(
            "  y {:>10} µrad  setpoint {:+.3} → {:+.3}",
            opt(s.tilt_urad[1], 3),
            s.setpoint_urad[1],
            s.target_urad[1]
        ),
    ];
    for (i, l) in s.legs.iter().enumerate() {
        let name = legs.get(i).map(String::as_str).unwrap_or("?");
        v.push(format!(
            "  leg {:<4} {:>9} °C  setpoint {:.4} °C  power {:.3} W  {}",
            name,
            l.temp_c.map(|t| format!("{t:.4}")).unwrap_or("—".into()),
            l.setpoint_c,
            l.power_w,
            l.quality
        ));
    }
    v
}

fn watch(c: &Client, every: u64, count: Option<u64>) -> Result<(), String> {
    let mut events = c.stream(every).map_err(|e| e.to_string())?;
    let tty = std::io::stdout().is_terminal();
    let mut legs: Vec<String> = Vec::new();
    let mut shown = 0usize;
    let mut n = 0u64;
    let mut out = std::io::stdout().lock();
    loop {
        let ev = match events.next_event() {
            Ok(Some(ev)) => ev,
            Ok(None) => {
                eprintln!("stiltctl: the daemon ended the stream (it is shutting down?)");
                return Ok(());
            }
            Err(e) => return Err(format!("the stream broke: {e}")),
        };
        match ev.event.as_str() {
            "start" => {
                if let Ok(s) = serde_json::from_str::<StreamStartWire>(&ev.data) {
                    legs = s.legs;
                }
            }
            "lagged" => {
                let _ = writeln!(out, "(fell behind; {} samples skipped)", ev.data);
                shown = 0;
            }
            "sample" => {
                let s: SampleWire = serde_json::from_str(&ev.data)
                    .map_err(|e| format!("unexpected sample from the daemon: {e}"))?;
                let lines = sample_lines(&s, &legs);
                if tty {
                    // Back over the previous block, then rewrite each line in place.
                    if shown > 0 {
                        let _ = write!(out, "\x1b[{shown}A");
                    }
                    for l in &lines {
                        let _ = writeln!(out, "\x1b[2K{l}");
                    }
                    shown = lines.len();
                } else {
                    let _ = writeln!(out, "{}", lines.join(" |"));
                }
                let _ = out.flush();
                n += 1;
                if count.is_some_and(|c| n >= c) {
                    return Ok(());
                }
            }
            _ => {}
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn utc_matches_known_dates() {
        // Epoch seconds from GNU coreutils: `date -u -d 2024-03-01 +%s` = 1709251200,
        // `date -u -d 2000-02-29 +%s` = 951782400 (a leap day).
        assert_eq!(utc(1_709_251_200_000_000_000), "2024-03-01 00:00:00Z");
        assert_eq!(
            utc(951_782_400_000_000_000 + 3_723_000_000_000),
            "2000-02-29 01:02:03Z"
        );
        assert_eq!(utc(0), "1970-01-01 00:00:00Z");
        assert_eq!(utc(-1_000_000_000), "1969-12-31 23:59:59Z");
    }

    #[test]
    fn durations_read_well() {
        assert_eq!(duration(5.2), "5s");
        assert_eq!(duration(3725.0), "1h02m");
        assert_eq!(duration(90_000.0), "1d01h");
    }
}
