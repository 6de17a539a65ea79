//! `stiltd export RUN... [--stream tilt|control|events] [--from T] [--to T] [--output FILE]`:
//! recorded segments to CSV for people who want a spreadsheet.
//!
//! RUN is a segment file or a folder of segments; rows come out in time order,
//! streamed (a multi-day run is never held in memory). Times are UTC in ISO 8601
//! (`2026-12-01T06:00:00Z`, fractional seconds allowed).

use std::io::Write;
use std::path::PathBuf;
use std::process::ExitCode;

use crate::record::{StreamKind, TimeWindow, export_csv, find_segments};

/// Arguments of `stiltd export`.
#[derive(clap::Args, Debug)]
pub struct ExportArgs {
    /// Segment files or folders of segments.
    #[arg(required = true)]
    pub runs: Vec<PathBuf>,
    /// Which rows: `tilt` (every tiltmeter reading), `control` (one per tick), `events`.
    #[arg(long, default_value = "control", value_parser = parse_stream)]
    pub stream: StreamKind,
    /// Only rows at or after this UTC time (ISO 8601, e.g. 2026-12-01T06:00:00Z).
    #[arg(long, value_parser = parse_utc_ns)]
    pub from: Option<i64>,
    /// Only rows before this UTC time.
    #[arg(long, value_parser = parse_utc_ns)]
    pub to: Option<i64>,
    /// Write here instead of standard output.
    #[arg(long, short)]
    pub output: Option<PathBuf>,
}

fn parse_stream(s: &str) -> Result<StreamKind, String> {
    StreamKind::parse(s)
        .ok_or_else(|| format!("`{s}` is not a stream: use tilt, control or events"))
}

/// Parses `YYYY-MM-DDTHH:MM:SS[.frac]Z` (UTC) into nanoseconds since the Unix epoch.
pub fn parse_utc_ns(s: &str) -> Result<i64, String> {
    let err = || format!("`{s}` is not a UTC time: use ISO 8601 like 2026-12-01T06:00:00Z");
    let t = s
        .trim()
        .strip_suffix('Z')
        .or_else(|| s.trim().strip_suffix("+00:00"))
        .ok_or_else(err)?;
    let (date, time) = t.split_once(['T', ' ']).ok_or_else(err)?;
    let d: Vec<&str> = date.split('-').collect();
    let (hms, frac) = match time.split_once('.') {
        Some((a, b)) => (a, b),
        None => (time, ""),
    };
    let h: Vec<&str> = hms.split(':').collect();
    if d.len() != 3 || h.len() != 3 || frac.len() > 9 || !frac.bytes().all(|b| b.is_ascii_digit()) {
        return Err(err());
    }
    let num = |x: &str| x.parse::<i64>().map_err(|_| err());
    let (y, mo, da) = (num(d[0])?, num(d[1])?, num(d[2])?);
    let (hh, mi, ss) = (num(h[0])?, num(h[1])?, num(h[2])?);
    if !(1970..=2262).contains(&y)
        || !(1..=12).contains(&mo)
        || !(1..=31).contains(&da)
        || hh > 23
        || mi > 59
        || ss > 60
    {
        return Err(err());
    }
    // Days from civil (H. Hinnant's algorithm, public domain).
    let yy = if mo <= 2 { y - 1 } else { y };
    let era = yy.div_euclid(400);
    let yoe = yy - era * 400;
    let mp = (mo + 9) % 12;
    let doy = (153 * mp + 2) / 5 + da - 1;
    let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    let days = era * 146_097 + doe - 719_468;
    let frac_ns = if frac.is_empty() {
        0
    } else {
        num(&format!("{frac:0<9}"))?
    };
    Ok(((days * 86_400 + hh * 3600 + mi * 60 + ss) * 1_000_000_000) + frac_ns)
}

/// Expands folders into their segments, keeping files as given.
pub fn expand_runs(runs: &[PathBuf]) -> Result<Vec<PathBuf>, String> {
    let mut out = Vec::new();
    for r in runs {
        if r.is_dir() {
            let found = find_segments(r).map_err(|e| e.to_string())?;
            if found.is_empty() {
                return Err(format!(
                    "{}: no segments (*.h5) in this folder",
                    r.display()
                ));
            }
            out.extend(found);
        } else if r.exists() {
            out.push(r.clone());
        } else {
            return Err(format!("{}: no such file or folder", r.display()));
        }
    }
    Ok(out)
}

/// Runs `stiltd export`.
pub fn run(a: &ExportArgs) -> ExitCode {
    let segs = match expand_runs(&a.runs) {
        Ok(s) => s,
        Err(e) => {
            eprintln!("stiltd export: {e}");
            return ExitCode::from(2);
        }
    };
    let window = TimeWindow {
        from_utc_ns: a.from,
        to_utc_ns: a.to,
    };
    let result = match &a.output {
        Some(p) => match std::fs::File::create(p) {
            Ok(f) => {
                let mut w = std::io::BufWriter::new(f);
                export_csv(&segs, &window, a.stream, &mut w).and_then(|n| {
                    w.flush()
                        .map(|_| n)
                        .map_err(|source| crate::record::RecordError::Io {
                            path: p.clone(),
                            what: "write CSV".into(),
                            source,
                        })
                })
            }
            Err(e) => {
                eprintln!("stiltd export: cannot create {}: {e}", p.display());
                return ExitCode::FAILURE;
            }
        },
        None => {
            let stdout = std::io::stdout();
            let mut w = std::io::BufWriter::new(stdout.lock());
            export_csv(&segs, &window, a.stream, &mut w)
        }
    };
    match result {
        Ok(n) => {
            eprintln!("stiltd export: {n} rows");
            ExitCode::SUCCESS
        }
        Err(e) => {
            eprintln!("stiltd export: {e}");
            ExitCode::FAILURE
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn utc_times_parse_against_the_unix_epoch() {
        // Reference values: `date -u -d 2026-12-01T06:00:00Z +%s` = 1796104800 (GNU date).
        assert_eq!(parse_utc_ns("1970-01-01T00:00:00Z"), Ok(0));
        assert_eq!(
            parse_utc_ns("2026-12-01T06:00:00Z"),
            Ok(1_796_104_800 * 1_000_000_000)
        );
        assert_eq!(
            parse_utc_ns("2000-02-29T12:00:00.5Z"),
            Ok(951_825_600 * 1_000_000_000 + 500_000_000)
        );
        for bad in [
            "",
            "2026-12-01",
            "2026-13-01T00:00:00Z",
            "2026-12-01T06:00:00",
            "yesterday",
        ] {
            assert!(parse_utc_ns(bad).unwrap_err().contains("ISO 8601"), "{bad}");
        }
    }
}
