//! The report's plots, as PNG and SVG: the tilt and leg-temperature time series, the
//! amplitude spectral density, the Allan deviations, and tilt against temperature.
//!
//! Drawn with plotters without system fonts: DejaVu Sans (Bitstream Vera licence, in
//! `daemon/assets/`) is compiled in and registered as `sans-serif` once. [`write_all`]
//! draws every figure into a folder and returns the files written.

use std::path::{Path, PathBuf};
use std::sync::OnceLock;

use plotters::coord::Shift;
use plotters::prelude::*;
use plotters::style::{FontStyle, register_font};

use super::{Report, ReportError};

static FONT: &[u8] = include_bytes!("../../assets/DejaVuSans.ttf");
const SIZE: (u32, u32) = (1280, 800);
const FONT_NAME: &str = "sans-serif";
const COLOURS: [RGBColor; 6] = [
    RGBColor(31, 119, 180),
    RGBColor(214, 39, 40),
    RGBColor(44, 160, 44),
    RGBColor(255, 127, 14),
    RGBColor(148, 103, 189),
    RGBColor(140, 86, 75),
];

fn ensure_font() -> Result<(), String> {
    static DONE: OnceLock<Result<(), String>> = OnceLock::new();
    DONE.get_or_init(|| {
        register_font(FONT_NAME, FontStyle::Normal, FONT)
            .map_err(|_| "the bundled DejaVu Sans font cannot be read".to_string())
    })
    .clone()
}

fn err<E: std::fmt::Display>(e: E) -> String {
    e.to_string()
}

/// (lo, hi) of finite values, padded so that the range is never empty.
fn range(vals: impl Iterator<Item = f64>) -> Option<(f64, f64)> {
    let (lo, hi) = vals
        .filter(|v| v.is_finite())
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| {
            (a.min(v), b.max(v))
        });
    if !lo.is_finite() {
        return None;
    }
    let pad = ((hi - lo) * 0.05)
        .max(hi.abs().max(lo.abs()) * 1e-6)
        .max(1e-12);
    Some((lo - pad, hi + pad))
}

/// (lo, hi) of positive values for a log axis, widened to whole decades.
fn log_range(vals: impl Iterator<Item = f64>) -> Option<(f64, f64)> {
    let (lo, hi) = vals
        .filter(|v| v.is_finite() && *v > 0.0)
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| {
            (a.min(v), b.max(v))
        });
    if !lo.is_finite() {
        return None;
    }
    let lo = 10f64.powf(lo.log10().floor());
    let hi = 10f64.powf(hi.log10().ceil()).max(lo * 10.0);
    Some((lo, hi))
}

fn sci(v: &f64) -> String {
    format!("{v:.0e}")
}

fn no_data<DB: DrawingBackend>(root: &DrawingArea<DB, Shift>, title: &str) -> Result<(), String> {
    root.fill(&WHITE).map_err(err)?;
    root.draw(&Text::new(
        format!("{title}: no data in the window"),
        (40, 40),
        (FONT_NAME, 28).into_font(),
    ))
    .map_err(err)
}

fn time_series<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    r: &Report,
) -> Result<(), String> {
    root.fill(&WHITE).map_err(err)?;
    let panels = root.split_evenly((2, 1));
    let title = format!("Tilt and leg temperatures — {}", r.stage);
    // Tilt panel.
    let tilt = &r.plot.tilt;
    let xr = range(tilt.iter().map(|b| b.x)).unwrap_or((0.0, 1.0));
    let yr = range(
        tilt.iter()
            .flat_map(|b| [b.min[0], b.max[0], b.min[1], b.max[1]]),
    );
    match yr {
        Some(yr) => {
            let mut c = ChartBuilder::on(&panels[0])
                .caption(&title, (FONT_NAME, 28))
                .margin(15)
                .x_label_area_size(45)
                .y_label_area_size(90)
                .build_cartesian_2d(xr.0..xr.1, yr.0..yr.1)
                .map_err(err)?;
            c.configure_mesh()
                .x_desc("time since first sample (h)")
                .y_desc("tilt (µrad)")
                .label_style((FONT_NAME, 18))
                .axis_desc_style((FONT_NAME, 20))
                .draw()
                .map_err(err)?;
            for k in 0..2 {
                let col = COLOURS[k];
                for (what, alpha) in [("min", 0.35), ("max", 0.35)] {
                    let pts = tilt.iter().filter_map(|b| {
                        let v = if what == "min" { b.min[k] } else { b.max[k] };
                        v.is_finite().then_some((b.x, v))
                    });
                    c.draw_series(LineSeries::new(pts, col.mix(alpha)))
                        .map_err(err)?;
                }
                let pts = tilt
                    .iter()
                    .filter_map(|b| b.mean[k].is_finite().then_some((b.x, b.mean[k])));
                c.draw_series(LineSeries::new(pts, col.stroke_width(2)))
                    .map_err(err)?
                    .label(format!(
                        "tilt {} (bucket mean; light: min/max)",
                        ["x", "y"][k]
                    ))
                    .legend(move |(x, y)| {
                        PathElement::new(vec![(x, y), (x + 24, y)], col.stroke_width(2))
                    });
            }
            c.configure_series_labels()
                .label_font((FONT_NAME, 18))
                .background_style(WHITE.mix(0.85))
                .border_style(BLACK)
                .position(SeriesLabelPosition::UpperRight)
                .draw()
                .map_err(err)?;
        }
        None => no_data(&panels[0], "tilt")?,
    }
    // Leg temperature panel.
    let legs = &r.plot.legs;
    let yr = range(legs.iter().flat_map(|b| b.mean.clone()));
    match yr {
        Some(yr) => {
            let mut c = ChartBuilder::on(&panels[1])
                .margin(15)
                .x_label_area_size(45)
                .y_label_area_size(90)
                .build_cartesian_2d(xr.0..xr.1, yr.0..yr.1)
                .map_err(err)?;
            c.configure_mesh()
                .x_desc("time since first sample (h)")
                .y_desc("leg temperature (°C)")
                .label_style((FONT_NAME, 18))
                .axis_desc_style((FONT_NAME, 20))
                .draw()
                .map_err(err)?;
            for (i, name) in r.legs.iter().enumerate() {
                let col = COLOURS[(i + 2) % COLOURS.len()];
                let pts = legs.iter().filter_map(|b| {
                    b.mean
                        .get(i)
                        .copied()
                        .filter(|v| v.is_finite())
                        .map(|v| (b.x, v))
                });
                c.draw_series(LineSeries::new(pts, col.stroke_width(2)))
                    .map_err(err)?
                    .label(format!("leg {name}"))
                    .legend(move |(x, y)| {
                        PathElement::new(vec![(x, y), (x + 24, y)], col.stroke_width(2))
                    });
            }
            c.configure_series_labels()
                .label_font((FONT_NAME, 18))
                .background_style(WHITE.mix(0.85))
                .border_style(BLACK)
                .position(SeriesLabelPosition::UpperRight)
                .draw()
                .map_err(err)?;
        }
        None => no_data(&panels[1], "leg temperatures")?,
    }
    Ok(())
}

fn asd<DB: DrawingBackend>(root: &DrawingArea<DB, Shift>, r: &Report) -> Result<(), String> {
    root.fill(&WHITE).map_err(err)?;
    let spectra: Vec<_> = r
        .axes
        .iter()
        .filter_map(|a| a.asd.as_ref().ok().map(|s| (a.axis, s)))
        .collect();
    let xr = log_range(
        spectra
            .iter()
            .flat_map(|(_, s)| s.frequencies_hz.iter().copied()),
    );
    let yr = log_range(spectra.iter().flat_map(|(_, s)| {
        s.frequencies_hz
            .iter()
            .zip(&s.asd)
            .filter(|(f, _)| **f > 0.0)
            .map(|(_, a)| *a)
    }));
    let (Some(xr), Some(yr)) = (xr, yr) else {
        return no_data(root, "amplitude spectral density");
    };
    let res = spectra.first().map_or(0.0, |(_, s)| s.resolution_hz);
    let mut c = ChartBuilder::on(root)
        .caption(
            format!(
                "Tilt amplitude spectral density (Welch, Hann, 50 % overlap, Δf = {res:.2e} Hz)"
            ),
            (FONT_NAME, 26),
        )
        .margin(20)
        .x_label_area_size(55)
        .y_label_area_size(100)
        .build_cartesian_2d((xr.0..xr.1).log_scale(), (yr.0..yr.1).log_scale())
        .map_err(err)?;
    c.configure_mesh()
        .x_desc("frequency (Hz)")
        .y_desc("ASD (rad/√Hz)")
        .x_label_formatter(&sci)
        .y_label_formatter(&sci)
        .label_style((FONT_NAME, 18))
        .axis_desc_style((FONT_NAME, 20))
        .draw()
        .map_err(err)?;
    for (k, (axis, s)) in spectra.iter().enumerate() {
        let col = COLOURS[k];
        let pts = s
            .frequencies_hz
            .iter()
            .zip(&s.asd)
            .filter(|(f, a)| **f > 0.0 && **a > 0.0)
            .map(|(f, a)| (*f, *a));
        c.draw_series(LineSeries::new(pts, col.stroke_width(2)))
            .map_err(err)?
            .label(format!("tilt {axis} ({} segments)", s.segments))
            .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 24, y)], col.stroke_width(2)));
    }
    c.configure_series_labels()
        .label_font((FONT_NAME, 18))
        .background_style(WHITE.mix(0.85))
        .border_style(BLACK)
        .draw()
        .map_err(err)
}

fn allan<DB: DrawingBackend>(root: &DrawingArea<DB, Shift>, r: &Report) -> Result<(), String> {
    root.fill(&WHITE).map_err(err)?;
    let xr = log_range(r.axes.iter().flat_map(|a| a.allan.iter().map(|p| p.tau_s)));
    let yr = log_range(r.axes.iter().flat_map(|a| {
        a.allan
            .iter()
            .flat_map(|p| [Some(p.adev_rad), p.mdev_rad])
            .flatten()
    }));
    let (Some(xr), Some(yr)) = (xr, yr) else {
        return no_data(root, "Allan deviation");
    };
    let mut c = ChartBuilder::on(root)
        .caption(
            "Allan deviation of tilt (octave averaging times)",
            (FONT_NAME, 26),
        )
        .margin(20)
        .x_label_area_size(55)
        .y_label_area_size(100)
        .build_cartesian_2d((xr.0..xr.1).log_scale(), (yr.0..yr.1).log_scale())
        .map_err(err)?;
    c.configure_mesh()
        .x_desc("averaging time τ (s)")
        .y_desc("deviation (rad)")
        .x_label_formatter(&sci)
        .y_label_formatter(&sci)
        .label_style((FONT_NAME, 18))
        .axis_desc_style((FONT_NAME, 20))
        .draw()
        .map_err(err)?;
    for (k, a) in r.axes.iter().enumerate() {
        let col = COLOURS[k];
        let adev: Vec<(f64, f64)> = a
            .allan
            .iter()
            .filter(|p| p.adev_rad > 0.0)
            .map(|p| (p.tau_s, p.adev_rad))
            .collect();
        c.draw_series(LineSeries::new(adev.clone(), col.stroke_width(2)))
            .map_err(err)?
            .label(format!("overlapping ADEV, tilt {}", a.axis))
            .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 24, y)], col.stroke_width(2)));
        c.draw_series(adev.iter().map(|&p| Circle::new(p, 4, col.filled())))
            .map_err(err)?;
        let mdev: Vec<(f64, f64)> = a
            .allan
            .iter()
            .filter_map(|p| p.mdev_rad.filter(|v| *v > 0.0).map(|v| (p.tau_s, v)))
            .collect();
        let light = col.mix(0.55);
        c.draw_series(LineSeries::new(mdev.clone(), light.stroke_width(2)))
            .map_err(err)?
            .label(format!("modified ADEV, tilt {}", a.axis))
            .legend(move |(x, y)| {
                PathElement::new(vec![(x, y), (x + 24, y)], light.stroke_width(2))
            });
        c.draw_series(
            mdev.iter()
                .map(|&p| TriangleMarker::new(p, 5, light.filled())),
        )
        .map_err(err)?;
    }
    c.configure_series_labels()
        .label_font((FONT_NAME, 18))
        .background_style(WHITE.mix(0.85))
        .border_style(BLACK)
        .draw()
        .map_err(err)
}

fn tilt_vs_temp<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    r: &Report,
) -> Result<(), String> {
    root.fill(&WHITE).map_err(err)?;
    let pts = &r.plot.tilt_vs_temp;
    let xr = range(pts.iter().map(|b| b.mean[0]));
    let yr = range(pts.iter().flat_map(|b| [b.mean[1], b.mean[2]]));
    let (Some(xr), Some(yr)) = (xr, yr) else {
        return no_data(root, "tilt against temperature");
    };
    let mut c = ChartBuilder::on(root)
        .caption(
            "Tilt against mean leg temperature (control ticks, bucket means)",
            (FONT_NAME, 26),
        )
        .margin(20)
        .x_label_area_size(55)
        .y_label_area_size(100)
        .build_cartesian_2d(xr.0..xr.1, yr.0..yr.1)
        .map_err(err)?;
    c.configure_mesh()
        .x_desc("mean leg temperature (°C)")
        .y_desc("tilt (µrad)")
        .label_style((FONT_NAME, 18))
        .axis_desc_style((FONT_NAME, 20))
        .draw()
        .map_err(err)?;
    for k in 0..2 {
        let col = COLOURS[k];
        let slope = r.coupling.on_mean_leg[k].as_ref().ok();
        let label = match slope {
            Some(s) => format!(
                "tilt {}: slope {:+.3} ± {:.3} µrad/K",
                ["x", "y"][k],
                s.slope_urad_per_k,
                s.std_err_urad_per_k
            ),
            None => format!("tilt {}", ["x", "y"][k]),
        };
        c.draw_series(
            pts.iter()
                .filter(|b| b.mean[0].is_finite() && b.mean[k + 1].is_finite())
                .map(|b| Circle::new((b.mean[0], b.mean[k + 1]), 3, col.mix(0.7).filled())),
        )
        .map_err(err)?
        .label(label)
        .legend(move |(x, y)| Circle::new((x + 10, y), 4, col.filled()));
        if let Some(s) = slope {
            let line = [xr.0, xr.1].map(|x| (x, s.intercept_urad + s.slope_urad_per_k * x));
            c.draw_series(LineSeries::new(line, col.stroke_width(2)))
                .map_err(err)?;
        }
    }
    c.configure_series_labels()
        .label_font((FONT_NAME, 18))
        .background_style(WHITE.mix(0.85))
        .border_style(BLACK)
        .draw()
        .map_err(err)
}

macro_rules! both {
    ($dir:expr, $name:expr, $f:ident, $r:expr, $out:expr) => {{
        let png = $dir.join(format!("{}.png", $name));
        {
            let root = BitMapBackend::new(&png, SIZE).into_drawing_area();
            $f(&root, $r)
                .and_then(|_| root.present().map_err(err))
                .map_err(|message| ReportError::Plot {
                    path: png.clone(),
                    message,
                })?;
        }
        $out.push(png);
        let svg = $dir.join(format!("{}.svg", $name));
        {
            let root = SVGBackend::new(&svg, SIZE).into_drawing_area();
            $f(&root, $r)
                .and_then(|_| root.present().map_err(err))
                .map_err(|message| ReportError::Plot {
                    path: svg.clone(),
                    message,
                })?;
        }
        $out.push(svg);
    }};
}

/// Draws every figure into `dir` (created if missing) as PNG and SVG; returns the files.
pub fn write_all(r: &Report, dir: &Path) -> Result<Vec<PathBuf>, ReportError> {
    std::fs::create_dir_all(dir).map_err(|e| ReportError::Plot {
        path: dir.to_path_buf(),
        message: format!("cannot create the folder: {e}"),
    })?;
    ensure_font().map_err(|message| ReportError::Plot {
        path: dir.to_path_buf(),
        message,
    })?;
    let mut out = Vec::new();
    both!(dir, "tilt_timeseries", time_series, r, out);
    both!(dir, "tilt_asd", asd, r, out);
    both!(dir, "tilt_allan", allan, r, out);
    both!(dir, "tilt_vs_temperature", tilt_vs_temp, r, out);
    Ok(out)
}
