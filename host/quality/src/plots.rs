//! SVG plots (plotters' SVG backend, no system fonts needed): moisture
//! trend with its uncertainty band, flags, empty-line periods and a
//! temperature panel; drift control charts against time; predicted-vs-lab
//! and residual plots of a calibration fit.
//!
//! Every function returns a complete `<svg>` document as a string, so it can
//! be written to a file or inlined in the HTML report. Time axes are clock
//! time in the zone [`crate::timefmt`] shows (local, or UTC with `--utc`),
//! the date in the axis title, or on every label when the span crosses a
//! date. Every chart carries its legend; a chart with nothing to draw says
//! why in the chart.

use fringe_protocol::Flags;
use plotters::prelude::*;

use crate::drift::{ChartKind, Direction, Quantity, Trace};
use crate::timefmt::{fmt_clock, offset_ms, zone_label};

const W: u32 = 900;
const H: u32 = 360;
/// Height of the temperature panel under the trend.
const H_TEMP: u32 = 170;

/// One point of the moisture trend.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TrendPoint {
    /// When, ms since the Unix epoch (re-based wall-clock time).
    pub time_ms: i64,
    /// Moisture, % (None when the device gave none).
    pub moisture_pct: Option<f64>,
    /// Standard uncertainty, %.
    pub uncertainty_pct: f64,
    /// Product temperature, C (None when not finite).
    pub temperature_c: Option<f64>,
    /// The reading's quality flags (the clock flag left out).
    pub flags: Flags,
}

impl TrendPoint {
    /// Whether any quality flag was set.
    pub fn flagged(&self) -> bool {
        !self.flags.is_empty()
    }
}

/// A lab result to mark on the trend.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LabPoint {
    /// When the sample was taken, ms since the Unix epoch.
    pub time_ms: i64,
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

/// The x range of a time axis (ms as f64), at least a minute wide.
fn time_range(times: impl Iterator<Item = i64>) -> (f64, f64) {
    let (mut lo, mut hi) = (i64::MAX, i64::MIN);
    for t in times {
        lo = lo.min(t);
        hi = hi.max(t);
    }
    if lo > hi {
        return (0.0, 60_000.0);
    }
    if hi - lo < 60_000 {
        hi = lo + 60_000;
    }
    (lo as f64, hi as f64)
}

/// The axis title and the tick-label pattern of a time axis over
/// `[x0, x1]`: `HH:MM` with the date in the title, or `MM-DD HH:MM` when
/// the span crosses a date.
fn time_axis(x0: f64, x1: f64) -> (String, &'static str) {
    let (d0, d1) = (
        fmt_clock(x0 as i64, "%Y-%m-%d"),
        fmt_clock(x1 as i64, "%Y-%m-%d"),
    );
    let zone = zone_label(x0 as i64);
    if d0 == d1 {
        (format!("{zone}, {d0}"), "%H:%M")
    } else {
        (format!("{zone}, {d0} to {d1}"), "%m-%d %H:%M")
    }
}

/// A time axis: x in hours since the shown clock's midnight before the
/// first time, so that plotters' round numbers fall on round clock times
/// (every 6, 12 or 30 minutes, every hour ...).
#[derive(Debug, Clone, Copy)]
struct Clock {
    /// The midnight, ms since the Unix epoch.
    day0_ms: i64,
}

impl Clock {
    fn new(first_ms: f64) -> Self {
        let t = first_ms as i64;
        let off = offset_ms(t);
        Clock {
            day0_ms: t - (t + off).rem_euclid(86_400_000),
        }
    }
    /// x of a time.
    fn x(&self, ms: f64) -> f64 {
        (ms - self.day0_ms as f64) / 3.6e6
    }
    /// Time of an x.
    fn ms(&self, x: f64) -> i64 {
        self.day0_ms + (x * 3.6e6).round() as i64
    }
}

/// What a run of readings without a value was, in words.
fn no_value_words(flags: Flags) -> String {
    if flags.contains(Flags::NO_PRODUCT) {
        "line empty".into()
    } else if flags.contains(Flags::NOT_CALIBRATED) {
        "not calibrated".into()
    } else {
        let v: Vec<&str> = flags.names().collect();
        if v.is_empty() {
            "no value".into()
        } else {
            format!("no value: {}", v.join(", "))
        }
    }
}

/// A period the trend shades: from, to (ms) and its label.
type Shade = (f64, f64, String);

/// The periods without a value (runs of readings without moisture) and
/// without readings (a step longer than 5 times the usual one).
fn shaded_periods(pts: &[TrendPoint]) -> Vec<Shade> {
    let mut out = Vec::new();
    let mut steps: Vec<i64> = pts
        .windows(2)
        .map(|w| w[1].time_ms - w[0].time_ms)
        .collect();
    steps.sort_unstable();
    let usual = steps.get(steps.len() / 2).copied().unwrap_or(0).max(1);
    let mut i = 0;
    while i < pts.len() {
        if pts[i].moisture_pct.is_none() {
            let j = (i..pts.len())
                .find(|&k| pts[k].moisture_pct.is_some())
                .unwrap_or(pts.len());
            let end = pts.get(j).map_or(pts[j - 1].time_ms, |p| p.time_ms);
            out.push((
                pts[i].time_ms as f64,
                end as f64,
                no_value_words(pts[i].flags),
            ));
            i = j;
        } else {
            i += 1;
        }
    }
    for w in pts.windows(2) {
        if w[1].time_ms - w[0].time_ms > 5 * usual && steps.len() >= 4 {
            out.push((
                w[0].time_ms as f64,
                w[1].time_ms as f64,
                "no readings".into(),
            ));
        }
    }
    out
}

/// Why a trend has no moisture to draw, for the chart itself.
fn empty_reason(pts: &[TrendPoint]) -> String {
    if pts.is_empty() {
        return "No readings in this range.".into();
    }
    let all = pts.iter().fold(Flags::empty(), |a, p| a | p.flags);
    if pts.iter().all(|p| p.flags.contains(Flags::NOT_CALIBRATED)) {
        "No moisture value: every reading is flagged not_calibrated. Push a product calibration (fringe cal push).".into()
    } else {
        format!(
            "No moisture value in {} readings (flags: {}).",
            pts.len(),
            all.names().collect::<Vec<_>>().join(", ")
        )
    }
}

const BAND: RGBColor = RGBColor(120, 160, 220);
const FLAG: RGBColor = RGBColor(230, 120, 0);
const SHADE: RGBColor = RGBColor(150, 150, 150);

/// Moisture trend on the clock with the expanded-uncertainty band (k = 2,
/// about 95 %), flagged readings as orange dots, lab results as black
/// diamonds, periods without a value or without readings shaded grey and
/// labelled, a legend, and the product temperature in a panel below. With
/// no moisture to draw, the chart says why.
///
/// # Errors
/// A message if plotters fails (it does not for finite input).
pub fn trend_svg(title: &str, pts: &[TrendPoint], lab: &[LabPoint]) -> Result<String, String> {
    let mut s = String::new();
    {
        let root = SVGBackend::with_string(&mut s, (W, H + H_TEMP)).into_drawing_area();
        root.fill(&WHITE).map_err(draw_err)?;
        let (top, bottom) = root.split_vertically(H);
        let (x0, x1) = time_range(
            pts.iter()
                .map(|p| p.time_ms)
                .chain(lab.iter().map(|l| l.time_ms)),
        );
        let (x_desc, pattern) = time_axis(x0, x1);
        let clock = Clock::new(x0);
        let (cx0, cx1) = (clock.x(x0), clock.x(x1));
        let label = |x: &f64| fmt_clock(clock.ms(*x), pattern);
        let has_value = pts.iter().any(|p| p.moisture_pct.is_some());
        let (y0, y1) = finite_range(
            pts.iter()
                .filter_map(|p| {
                    p.moisture_pct
                        .map(|m| [m - 2.0 * p.uncertainty_pct, m + 2.0 * p.uncertainty_pct])
                })
                .flatten()
                .chain(lab.iter().map(|l| l.moisture_pct)),
        );
        let mut ch = ChartBuilder::on(&top)
            .caption(title, ("sans-serif", 18))
            .margin(10)
            .x_label_area_size(36)
            .y_label_area_size(56)
            .build_cartesian_2d(cx0..cx1, y0..y1)
            .map_err(draw_err)?;
        ch.configure_mesh()
            .x_desc(x_desc.as_str())
            .x_label_formatter(&label)
            .x_labels(8)
            .y_desc("moisture, % (calibration basis)")
            .draw()
            .map_err(draw_err)?;
        if !has_value {
            let why = empty_reason(pts);
            ch.draw_series(std::iter::once(Text::new(
                why,
                (cx0 + (cx1 - cx0) * 0.03, y0 + (y1 - y0) * 0.55),
                ("sans-serif", 15).into_font().color(&BLACK),
            )))
            .map_err(draw_err)?;
        }
        // Periods without a value or without readings: shaded and labelled.
        let shades = shaded_periods(pts);
        ch.draw_series(shades.iter().map(|(a, b, _)| {
            Rectangle::new(
                [(clock.x(*a), y0), (clock.x(*b), y1)],
                SHADE.mix(0.18).filled(),
            )
        }))
        .map_err(draw_err)?
        .label("no value / no readings (labelled)")
        .legend(|(x, y)| Rectangle::new([(x, y - 5), (x + 16, y + 5)], SHADE.mix(0.4).filled()));
        ch.draw_series(shades.iter().map(|(a, _, why)| {
            Text::new(
                why.clone(),
                (clock.x(*a), y1 - (y1 - y0) * 0.02),
                ("sans-serif", 10).into_font().color(&SHADE.mix(0.9)),
            )
        }))
        .map_err(draw_err)?;
        // Band and line: one polygon and one line per unbroken run of
        // readings with a moisture.
        let mut first = true;
        for run in pts.split(|p| p.moisture_pct.is_none()) {
            if run.is_empty() {
                continue;
            }
            let x = |p: &TrendPoint| clock.x(p.time_ms as f64);
            let mut poly: Vec<(f64, f64)> = run
                .iter()
                .filter_map(|p| p.moisture_pct.map(|m| (x(p), m + 2.0 * p.uncertainty_pct)))
                .collect();
            poly.extend(
                run.iter()
                    .rev()
                    .filter_map(|p| p.moisture_pct.map(|m| (x(p), m - 2.0 * p.uncertainty_pct))),
            );
            let band = ch
                .draw_series(std::iter::once(Polygon::new(poly, BAND.mix(0.35).filled())))
                .map_err(draw_err)?;
            if first {
                band.label("expanded uncertainty (k = 2, about 95 %)")
                    .legend(|(x, y)| {
                        Rectangle::new([(x, y - 5), (x + 16, y + 5)], BAND.mix(0.35).filled())
                    });
            }
            let line = ch
                .draw_series(LineSeries::new(
                    run.iter().filter_map(|p| p.moisture_pct.map(|m| (x(p), m))),
                    BLUE.stroke_width(1),
                ))
                .map_err(draw_err)?;
            if first {
                line.label("inline moisture")
                    .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 16, y)], BLUE));
            }
            first = false;
        }
        let flagged: Vec<(f64, f64)> = pts
            .iter()
            .filter(|p| p.flagged())
            .filter_map(|p| p.moisture_pct.map(|m| (clock.x(p.time_ms as f64), m)))
            .collect();
        if !flagged.is_empty() {
            ch.draw_series(flagged.iter().map(|&p| Circle::new(p, 3, FLAG.filled())))
                .map_err(draw_err)?
                .label("reading with a quality flag")
                .legend(|(x, y)| Circle::new((x + 8, y), 3, FLAG.filled()));
        }
        if !lab.is_empty() {
            ch.draw_series(lab.iter().map(|l| {
                EmptyElement::at((clock.x(l.time_ms as f64), l.moisture_pct))
                    + Polygon::new(vec![(0, -6), (6, 0), (0, 6), (-6, 0)], BLACK.filled())
            }))
            .map_err(draw_err)?
            .label("lab grab sample")
            .legend(|(x, y)| {
                EmptyElement::at((x + 8, y))
                    + Polygon::new(vec![(0, -5), (5, 0), (0, 5), (-5, 0)], BLACK.filled())
            });
        }
        ch.configure_series_labels()
            .position(SeriesLabelPosition::UpperRight)
            .background_style(WHITE.mix(0.85))
            .border_style(BLACK.mix(0.4))
            .label_font(("sans-serif", 11))
            .draw()
            .map_err(draw_err)?;

        // The temperature panel, on the same time axis.
        let temps: Vec<(f64, f64)> = pts
            .iter()
            .filter_map(|p| p.temperature_c.map(|t| (clock.x(p.time_ms as f64), t)))
            .collect();
        let (t0, t1) = finite_range(temps.iter().map(|p| p.1));
        let mut tc = ChartBuilder::on(&bottom)
            .margin(10)
            .x_label_area_size(36)
            .y_label_area_size(56)
            .build_cartesian_2d(cx0..cx1, t0..t1)
            .map_err(draw_err)?;
        tc.configure_mesh()
            .x_desc(x_desc.as_str())
            .x_label_formatter(&label)
            .x_labels(8)
            .y_desc("product temperature, C")
            .draw()
            .map_err(draw_err)?;
        if temps.is_empty() {
            tc.draw_series(std::iter::once(Text::new(
                "No temperature in this range.",
                (cx0 + (cx1 - cx0) * 0.03, (t0 + t1) / 2.0),
                ("sans-serif", 13).into_font().color(&BLACK),
            )))
            .map_err(draw_err)?;
        } else {
            tc.draw_series(LineSeries::new(temps.iter().copied(), RED.stroke_width(1)))
                .map_err(draw_err)?
                .label("product temperature")
                .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 16, y)], RED));
            tc.configure_series_labels()
                .position(SeriesLabelPosition::UpperRight)
                .background_style(WHITE.mix(0.85))
                .border_style(BLACK.mix(0.4))
                .label_font(("sans-serif", 11))
                .draw()
                .map_err(draw_err)?;
        }
        root.present().map_err(draw_err)?;
    }
    Ok(s)
}

/// A curve of a control chart: its legend, values, colour.
type Series<'a> = (&'a str, Vec<f64>, RGBColor);

/// A drift chart against time: the upper CUSUM C+ (an upward shift) and
/// the lower one drawn as -C- (a downward shift) against the decision
/// limits +h and -h (or the EWMA against its limits), alarms as red crosses
/// on the curve that crossed, and a legend. With no observation the chart
/// says so.
///
/// # Errors
/// A message if plotters fails.
pub fn control_chart_svg(trace: &Trace, kind: ChartKind) -> Result<String, String> {
    let m = &trace.monitor;
    let mut s = String::new();
    {
        let root = SVGBackend::with_string(&mut s, (W, 280)).into_drawing_area();
        root.fill(&WHITE).map_err(draw_err)?;
        let (title, series, lim): (String, Vec<Series<'_>>, f64) = match kind {
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
                    ("C+ (upward shift)", trace.cusum_hi.clone(), BLUE),
                    (
                        "-C- (downward shift)",
                        trace.cusum_lo.iter().map(|v| -v).collect(),
                        GREEN,
                    ),
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
                vec![("EWMA, standardised", trace.ewma.clone(), BLUE)],
                m.ewma.limit(),
            ),
        };
        let (x0, x1) = time_range(trace.obs.iter().map(|o| o.time_ms));
        let (x_desc, pattern) = time_axis(x0, x1);
        let clock = Clock::new(x0);
        let (cx0, cx1) = (clock.x(x0), clock.x(x1));
        let label = |x: &f64| fmt_clock(clock.ms(*x), pattern);
        let (y0, y1) = finite_range(
            series
                .iter()
                .flat_map(|s| s.1.iter())
                .copied()
                .chain([lim * 1.2, -lim * 1.2]),
        );
        let mut ch = ChartBuilder::on(&root)
            .caption(title, ("sans-serif", 15))
            .margin(10)
            .x_label_area_size(32)
            .y_label_area_size(56)
            .build_cartesian_2d(cx0..cx1, y0..y1)
            .map_err(draw_err)?;
        let ydesc = if m.quantity == Quantity::Temperature {
            "beyond range edge, sigma"
        } else {
            "standardised, sigma"
        };
        let ytick = |y: &f64| crate::numbers::fmt(*y, crate::numbers::Rule::Significant(2));
        ch.configure_mesh()
            .x_desc(x_desc.as_str())
            .x_label_formatter(&label)
            .x_labels(8)
            .y_label_formatter(&ytick)
            .y_desc(ydesc)
            .draw()
            .map_err(draw_err)?;
        if trace.obs.is_empty() {
            ch.draw_series(std::iter::once(Text::new(
                "No observations: nothing to monitor in this range.",
                (cx0 + (cx1 - cx0) * 0.03, 0.0),
                ("sans-serif", 14).into_font().color(&BLACK),
            )))
            .map_err(draw_err)?;
        }
        let t = |j: usize| clock.x(trace.obs.get(j).map_or(x0, |o| o.time_ms as f64));
        for (name, ser, c) in &series {
            let c = *c;
            ch.draw_series(LineSeries::new(
                ser.iter().enumerate().map(|(j, v)| (t(j), *v)),
                c,
            ))
            .map_err(draw_err)?
            .label(*name)
            .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 16, y)], c));
        }
        ch.draw_series(LineSeries::new(
            [(cx0, lim), (cx1, lim)],
            RED.stroke_width(1),
        ))
        .map_err(draw_err)?
        .label(format!("decision limits +/-{lim:.3}"))
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 16, y)], RED));
        ch.draw_series(LineSeries::new(
            [(cx0, -lim), (cx1, -lim)],
            RED.stroke_width(1),
        ))
        .map_err(draw_err)?;
        let marks: Vec<(f64, f64)> = trace
            .alarms
            .iter()
            .filter(|a| a.chart == kind)
            .filter_map(|a| {
                let y = match (kind, a.direction) {
                    (ChartKind::Cusum, Direction::Up) => series[0].1.get(a.index).copied(),
                    (ChartKind::Cusum, Direction::Down) => series.get(1)?.1.get(a.index).copied(),
                    (ChartKind::Ewma, _) => series[0].1.get(a.index).copied(),
                }?;
                Some((t(a.index), y))
            })
            .collect();
        if !marks.is_empty() {
            ch.draw_series(marks.iter().map(|&p| Cross::new(p, 6, RED.stroke_width(2))))
                .map_err(draw_err)?
                .label("alarm")
                .legend(|(x, y)| Cross::new((x + 8, y), 5, RED.stroke_width(2)));
        }
        ch.configure_series_labels()
            .position(SeriesLabelPosition::UpperLeft)
            .background_style(WHITE.mix(0.85))
            .border_style(BLACK.mix(0.4))
            .label_font(("sans-serif", 11))
            .draw()
            .map_err(draw_err)?;
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
                .map_err(draw_err)?
                .label("1:1")
                .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 16, y)], BLACK.mix(0.5)));
        }
        if zero_line {
            ch.draw_series(LineSeries::new([(x0, 0.0), (x1, 0.0)], BLACK.mix(0.5)))
                .map_err(draw_err)?
                .label("zero")
                .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 16, y)], BLACK.mix(0.5)));
        }
        if pts.is_empty() {
            ch.draw_series(std::iter::once(Text::new(
                "No samples to draw.",
                (x0 + (x1 - x0) * 0.05, (y0 + y1) / 2.0),
                ("sans-serif", 14).into_font().color(&BLACK),
            )))
            .map_err(draw_err)?;
        }
        ch.draw_series(pts.iter().map(|&p| Circle::new(p, 3, BLUE.filled())))
            .map_err(draw_err)?
            .label("reference sample")
            .legend(|(x, y)| Circle::new((x + 8, y), 3, BLUE.filled()));
        ch.configure_series_labels()
            .position(SeriesLabelPosition::UpperLeft)
            .background_style(WHITE.mix(0.85))
            .border_style(BLACK.mix(0.4))
            .label_font(("sans-serif", 11))
            .draw()
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
    fn uncalibrated_trend_says_why_regression_empty_chart_without_a_note() {
        let pts: Vec<TrendPoint> = (0..20)
            .map(|i| TrendPoint {
                time_ms: 1_796_104_800_000 + i * 1000,
                moisture_pct: None,
                uncertainty_pct: f64::NAN,
                temperature_c: Some(22.0),
                flags: Flags::NOT_CALIBRATED,
            })
            .collect();
        let svg = trend_svg("line 2", &pts, &[]).expect("plot");
        assert!(
            svg.contains("not_calibrated") && svg.contains("fringe cal push"),
            "{svg}"
        );
    }

    #[test]
    fn cusum_at_its_alarm_is_beyond_the_limit_where_the_cross_is_drawn() {
        let obs: Vec<Obs> = (0..100)
            .map(|i| Obs {
                time_ms: 1_796_104_800_000 + i * 60_000,
                value: if i > 50 { -3.0 } else { 0.0 },
            })
            .collect();
        let t = Monitor::new(Quantity::ReferenceCheck, 0.0, 1.0).run(&obs);
        let a = t
            .alarms
            .iter()
            .find(|a| a.chart == ChartKind::Cusum)
            .expect("alarm");
        assert_eq!(a.direction, Direction::Down);
        // The curve at the alarm is beyond the limit, not on it.
        assert!(t.cusum_lo[a.index] > t.monitor.cusum.h);
    }

    #[test]
    fn trend_plot_is_svg_with_band_and_marks() {
        crate::timefmt::set_utc(true);
        let t0 = 1_796_104_800_000; // 2026-12-01T06:00Z
        let pts: Vec<TrendPoint> = (0..50)
            .map(|i| TrendPoint {
                time_ms: t0 + i * 360_000,
                moisture_pct: if i == 20 {
                    None
                } else {
                    Some(14.0 + 0.01 * i as f64)
                },
                uncertainty_pct: 0.3,
                temperature_c: Some(30.0),
                flags: if i == 30 {
                    Flags::OUT_OF_RANGE
                } else if i == 20 {
                    Flags::NO_PRODUCT
                } else {
                    Flags::empty()
                },
            })
            .collect();
        let svg = trend_svg(
            "line 2",
            &pts,
            &[LabPoint {
                time_ms: t0 + 7_200_000,
                moisture_pct: 14.5,
            }],
        )
        .expect("plot");
        assert!(svg.starts_with("<svg") && svg.trim_end().ends_with("</svg>"));
        assert!(svg.contains("<polygon"), "band drawn");
        assert!(svg.contains("moisture, % (calibration basis)"));
        // Clock time with the date, a legend, the flagged reading, the
        // labelled empty period and the temperature panel.
        assert!(
            svg.contains("UTC, 2026-12-01") && svg.contains("08:00"),
            "clock axis: {}",
            svg.lines()
                .filter(|l| !l.starts_with('<'))
                .collect::<Vec<_>>()
                .join(" | ")
        );
        for legend in [
            "inline moisture",
            "expanded uncertainty",
            "reading with a quality flag",
            "lab grab sample",
        ] {
            assert!(svg.contains(legend), "legend {legend}");
        }
        assert!(svg.contains("line empty"), "empty period labelled");
        assert!(svg.contains("product temperature, C"), "temperature panel");
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
            assert!(svg.contains("alarm") && svg.contains("decision limits"));
        }
        let svg = control_chart_svg(&t, ChartKind::Cusum).expect("plot");
        assert!(svg.contains("C+ (upward shift)") && svg.contains("-C- (downward shift)"));
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
