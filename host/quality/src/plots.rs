//! SVG plots (plotters' SVG backend, no system fonts needed): moisture
//! trend with its uncertainty band and flags, drift control charts,
//! predicted-vs-lab and residual plots of a calibration fit.
//!
//! Every function returns a complete `<svg>` document as a string, so it can
//! be written to a file or inlined in the HTML report.

use plotters::prelude::*;

use crate::drift::{ChartKind, Quantity, Trace};

const W: u32 = 900;
const H: u32 = 360;

/// One point of the moisture trend.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TrendPoint {
    /// Hours since the first point.
    pub t_h: f64,
    /// Moisture, % (None when the device gave none).
    pub moisture_pct: Option<f64>,
    /// Standard uncertainty, %.
    pub uncertainty_pct: f64,
    /// Whether any quality flag was set.
    pub flagged: bool,
}

/// A lab result to mark on the trend.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LabPoint {
    /// Hours since the trend's first point.
    pub t_h: f64,
    /// Lab moisture, %.
    pub moisture_pct: f64,
}

fn finite_range(vals: impl Iterator<Item = f64>) -> (f64, f64) {
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for v in vals.filter(|v| v.is_finite()) {
        lo = lo.min(v);
        hi = hi.max(v);
    }
    if !lo.is_finite() {
        return (0.0, 1.0);
    }
    if hi - lo < 1e-9 {
        return (lo - 0.5, hi + 0.5);
    }
    let pad = (hi - lo) * 0.08;
    (lo - pad, hi + pad)
}

fn draw_err<E: std::fmt::Debug>(e: E) -> String {
    format!("plot failed: {e:?}")
}

/// Moisture trend with the expanded-uncertainty band (k = 2, about 95 %),
/// flagged readings in orange and lab results as black diamonds.
///
/// # Errors
/// A message if plotters fails (it does not for finite input).
pub fn trend_svg(title: &str, pts: &[TrendPoint], lab: &[LabPoint]) -> Result<String, String> {
    let mut s = String::new();
    {
        let root = SVGBackend::with_string(&mut s, (W, H)).into_drawing_area();
        root.fill(&WHITE).map_err(draw_err)?;
        let (x0, x1) = finite_range(pts.iter().map(|p| p.t_h));
        let (y0, y1) = finite_range(
            pts.iter()
                .filter_map(|p| {
                    p.moisture_pct
                        .map(|m| [m - 2.0 * p.uncertainty_pct, m + 2.0 * p.uncertainty_pct])
                })
                .flatten()
                .chain(lab.iter().map(|l| l.moisture_pct)),
        );
        let mut ch = ChartBuilder::on(&root)
            .caption(title, ("sans-serif", 18))
            .margin(10)
            .x_label_area_size(36)
            .y_label_area_size(56)
            .build_cartesian_2d(x0..x1, y0..y1)
            .map_err(draw_err)?;
        ch.configure_mesh()
            .x_desc("time, h")
            .y_desc("moisture, % wet basis")
            .draw()
            .map_err(draw_err)?;
        // Band: one polygon per unbroken run of readings with a moisture.
        let band = RGBColor(120, 160, 220).mix(0.35);
        for run in pts.split(|p| p.moisture_pct.is_none()) {
            if run.len() < 2 {
                continue;
            }
            let mut poly: Vec<(f64, f64)> = run
                .iter()
                .filter_map(|p| p.moisture_pct.map(|m| (p.t_h, m + 2.0 * p.uncertainty_pct)))
                .collect();
            poly.extend(
                run.iter()
                    .rev()
                    .filter_map(|p| p.moisture_pct.map(|m| (p.t_h, m - 2.0 * p.uncertainty_pct))),
            );
            ch.draw_series(std::iter::once(Polygon::new(poly, band.filled())))
                .map_err(draw_err)?;
            ch.draw_series(LineSeries::new(
                run.iter()
                    .filter_map(|p| p.moisture_pct.map(|m| (p.t_h, m))),
                BLUE.stroke_width(1),
            ))
            .map_err(draw_err)?;
        }
        ch.draw_series(pts.iter().filter(|p| p.flagged).filter_map(|p| {
            p.moisture_pct
                .map(|m| Circle::new((p.t_h, m), 2, RGBColor(230, 120, 0).filled()))
        }))
        .map_err(draw_err)?;
        ch.draw_series(lab.iter().map(|l| {
            EmptyElement::at((l.t_h, l.moisture_pct))
                + Polygon::new(vec![(0, -6), (6, 0), (0, 6), (-6, 0)], BLACK.filled())
        }))
        .map_err(draw_err)?;
        root.present().map_err(draw_err)?;
    }
    Ok(s)
}

/// A drift chart: the CUSUMs against h (or the EWMA against its limits),
/// with alarms as red marks.
///
/// # Errors
/// A message if plotters fails.
pub fn control_chart_svg(trace: &Trace, kind: ChartKind) -> Result<String, String> {
    let m = &trace.monitor;
    let mut s = String::new();
    {
        let root = SVGBackend::with_string(&mut s, (W, 280)).into_drawing_area();
        root.fill(&WHITE).map_err(draw_err)?;
        let n = trace.obs.len().max(2) as f64;
        let (title, series, lim): (String, Vec<Vec<f64>>, f64) = match kind {
            ChartKind::Cusum => (
                format!(
                    "{}: tabular CUSUM (k {} sigma, h {} sigma; sigma {:.4} {})",
                    m.quantity.describe(),
                    m.cusum.k,
                    m.cusum.h,
                    m.sigma,
                    m.quantity.unit()
                ),
                vec![
                    trace.cusum_hi.clone(),
                    trace.cusum_lo.iter().map(|v| -v).collect(),
                ],
                m.cusum.h,
            ),
            ChartKind::Ewma => (
                format!(
                    "{}: EWMA (lambda {}, L {}; target {:.4}, sigma {:.4} {})",
                    m.quantity.describe(),
                    m.ewma.lambda,
                    m.ewma.l,
                    m.target,
                    m.sigma,
                    m.quantity.unit()
                ),
                vec![trace.ewma.clone()],
                m.ewma.limit(),
            ),
        };
        let (y0, y1) = finite_range(
            series
                .iter()
                .flatten()
                .copied()
                .chain([lim * 1.2, -lim * 1.2]),
        );
        let mut ch = ChartBuilder::on(&root)
            .caption(title, ("sans-serif", 15))
            .margin(10)
            .x_label_area_size(32)
            .y_label_area_size(56)
            .build_cartesian_2d(0f64..n, y0..y1)
            .map_err(draw_err)?;
        let ydesc = if m.quantity == Quantity::Temperature {
            "beyond range edge, sigma"
        } else {
            "standardised"
        };
        ch.configure_mesh()
            .x_desc("observation")
            .y_desc(ydesc)
            .draw()
            .map_err(draw_err)?;
        for (i, ser) in series.iter().enumerate() {
            let c = if i == 0 { BLUE } else { GREEN };
            ch.draw_series(LineSeries::new(
                ser.iter().enumerate().map(|(j, v)| (j as f64, *v)),
                c,
            ))
            .map_err(draw_err)?;
        }
        for l in [lim, -lim] {
            ch.draw_series(LineSeries::new([(0.0, l), (n, l)], RED.stroke_width(1)))
                .map_err(draw_err)?;
        }
        let marks = trace.alarms.iter().filter(|a| a.chart == kind).map(|a| {
            let y = match kind {
                ChartKind::Cusum => {
                    if a.direction == crate::drift::Direction::Up {
                        lim
                    } else {
                        -lim
                    }
                }
                ChartKind::Ewma => series[0].get(a.index).copied().unwrap_or(lim),
            };
            Cross::new((a.index as f64, y), 5, RED.stroke_width(2))
        });
        ch.draw_series(marks).map_err(draw_err)?;
        root.present().map_err(draw_err)?;
    }
    Ok(s)
}

/// A scatter of `(x, y)` with an optional 1:1 line and a zero line.
///
/// # Errors
/// A message if plotters fails.
pub fn scatter_svg(
    title: &str,
    x_desc: &str,
    y_desc: &str,
    pts: &[(f64, f64)],
    identity_line: bool,
    zero_line: bool,
) -> Result<String, String> {
    let mut s = String::new();
    {
        let root = SVGBackend::with_string(&mut s, (480, 380)).into_drawing_area();
        root.fill(&WHITE).map_err(draw_err)?;
        let (mut x0, mut x1) = finite_range(pts.iter().map(|p| p.0));
        let (mut y0, mut y1) =
            finite_range(pts.iter().map(|p| p.1).chain(zero_line.then_some(0.0)));
        if identity_line {
            (x0, x1) = (x0.min(y0), x1.max(y1));
            (y0, y1) = (x0, x1);
        }
        let mut ch = ChartBuilder::on(&root)
            .caption(title, ("sans-serif", 15))
            .margin(10)
            .x_label_area_size(36)
            .y_label_area_size(56)
            .build_cartesian_2d(x0..x1, y0..y1)
            .map_err(draw_err)?;
        ch.configure_mesh()
            .x_desc(x_desc)
            .y_desc(y_desc)
            .draw()
            .map_err(draw_err)?;
        if identity_line {
            ch.draw_series(LineSeries::new([(x0, x0), (x1, x1)], BLACK.mix(0.5)))
                .map_err(draw_err)?;
        }
        if zero_line {
            ch.draw_series(LineSeries::new([(x0, 0.0), (x1, 0.0)], BLACK.mix(0.5)))
                .map_err(draw_err)?;
        }
        ch.draw_series(pts.iter().map(|&p| Circle::new(p, 3, BLUE.filled())))
            .map_err(draw_err)?;
        root.present().map_err(draw_err)?;
    }
    Ok(s)
}

/// Several SVG documents side by side in one SVG (for `cal fit --plot`):
/// each placed in a row of `per_row`, at the sizes they declare.
pub fn combine_svgs(parts: &[String], per_row: usize, cell: (u32, u32)) -> String {
    let per_row = per_row.max(1);
    let rows = parts.len().div_ceil(per_row).max(1);
    let (w, h) = (cell.0 * per_row as u32, cell.1 * rows as u32);
    let mut out = format!(
        "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"{w}\" height=\"{h}\" viewBox=\"0 0 {w} {h}\">\n"
    );
    for (i, p) in parts.iter().enumerate() {
        let (x, y) = ((i % per_row) as u32 * cell.0, (i / per_row) as u32 * cell.1);
        // Nested <svg> elements keep each plot's own coordinate system.
        let inner = p.trim_start_matches(|c| c != '<');
        let inner = inner
            .strip_prefix("<?xml")
            .map_or(inner, |r| r.split_once("?>").map_or(r, |(_, b)| b));
        out.push_str(&inner.replacen("<svg ", &format!("<svg x=\"{x}\" y=\"{y}\" "), 1));
        out.push('\n');
    }
    out.push_str("</svg>\n");
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::drift::{Monitor, Obs};

    #[test]
    fn trend_plot_is_svg_with_band_and_marks() {
        let pts: Vec<TrendPoint> = (0..50)
            .map(|i| TrendPoint {
                t_h: i as f64 * 0.1,
                moisture_pct: if i == 20 {
                    None
                } else {
                    Some(14.0 + 0.01 * i as f64)
                },
                uncertainty_pct: 0.3,
                flagged: i == 30,
            })
            .collect();
        let svg = trend_svg(
            "line 2",
            &pts,
            &[LabPoint {
                t_h: 2.0,
                moisture_pct: 14.5,
            }],
        )
        .expect("plot");
        assert!(svg.starts_with("<svg") && svg.trim_end().ends_with("</svg>"));
        assert!(svg.contains("<polygon"), "band drawn");
        assert!(svg.contains("moisture, % wet basis"));
    }

    #[test]
    fn control_chart_marks_alarms() {
        let obs: Vec<Obs> = (0..100)
            .map(|i| Obs {
                time_ms: i * 1000,
                value: if i > 50 { 3.0 } else { 0.0 },
            })
            .collect();
        let t = Monitor::new(Quantity::ReferenceCheck, 0.0, 1.0).run(&obs);
        assert!(!t.alarms.is_empty());
        for k in [ChartKind::Cusum, ChartKind::Ewma] {
            let svg = control_chart_svg(&t, k).expect("plot");
            assert!(svg.contains("internal reference check"));
        }
    }

    #[test]
    fn combined_svg_nests_parts() {
        let a = scatter_svg("a", "x", "y", &[(1.0, 1.0), (2.0, 2.1)], true, false).expect("plot");
        let b = scatter_svg("b", "x", "r", &[(1.0, 0.1), (2.0, -0.1)], false, true).expect("plot");
        let c = combine_svgs(&[a, b], 2, (480, 380));
        assert_eq!(c.matches("<svg").count(), 3);
        assert!(c.contains("x=\"480\""));
    }
}
