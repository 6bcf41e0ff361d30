//! `fringe report`: one self-contained HTML page (inline SVG, no scripts,
//! no external files) that opens in a browser from disk.

use std::fmt::Write as _;

use crate::drift::{fmt_time, Alarm, ChartKind, Trace};
use crate::plots::{self, LabPoint, TrendPoint};

/// What the page shows.
#[derive(Debug, Clone, Default)]
pub struct ReportInput {
    /// Page title (plant, line, device).
    pub title: String,
    /// Database it came from.
    pub database: String,
    /// First and last reading time, ms.
    pub span_ms: Option<(i64, i64)>,
    /// Moisture trend.
    pub trend: Vec<TrendPoint>,
    /// Lab results on the trend.
    pub lab: Vec<LabPoint>,
    /// Count of readings per flag word.
    pub flag_counts: Vec<(String, u64)>,
    /// Total readings.
    pub readings: u64,
    /// Drift traces.
    pub traces: Vec<Trace>,
    /// Calibrations in force: (heading, key/value rows).
    pub calibrations: Vec<(String, Vec<(String, String)>)>,
    /// Chain head (position, hash).
    pub chain_head: Option<(u64, String)>,
}

fn esc(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

fn strip_xml_decl(svg: &str) -> &str {
    match svg.find("<svg") {
        Some(i) => &svg[i..],
        None => svg,
    }
}

/// Renders the page.
///
/// # Errors
/// A message if a plot cannot be drawn.
pub fn render(r: &ReportInput) -> Result<String, String> {
    let mut h = String::new();
    let _ = write!(
        h,
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><meta name=\"generator\" content=\"fringe\"><title>{t}</title>\n<style>\
         body{{font-family:sans-serif;max-width:960px;margin:1em auto;color:#222}}\
         table{{border-collapse:collapse;margin:.5em 0}}td,th{{border:1px solid #bbb;padding:2px 8px;text-align:left}}\
         .alarm{{background:#fde8e8}}.ok{{background:#e8f6e8}}svg{{max-width:100%;height:auto}}</style></head><body>\n\
         <h1>{t}</h1>\n<p>Database <code>{db}</code>",
        t = esc(&r.title),
        db = esc(&r.database)
    );
    if let Some((a, b)) = r.span_ms {
        let _ = write!(
            h,
            ", readings from {} to {} (UTC)",
            fmt_time(a),
            fmt_time(b)
        );
    }
    let _ = writeln!(h, ". {} readings.</p>", r.readings);

    let alarms: Vec<Alarm> = r.traces.iter().flat_map(|t| t.episodes()).collect();
    let _ = writeln!(h, "<h2>Drift alarms</h2>");
    if alarms.is_empty() {
        let _ = writeln!(h, "<p class=\"ok\">No drift alarm.</p>");
    } else {
        let _ = writeln!(h, "<table><tr><th>what</th><th>since (UTC)</th><th>flagged (UTC)</th><th>by how much</th><th>what to do</th></tr>");
        for a in &alarms {
            let _ = writeln!(
                h,
                "<tr class=\"alarm\"><td>{}</td><td>{}</td><td>{} ({})</td><td>{} {} ({} sigma)</td><td>{}</td></tr>",
                esc(a.quantity.describe()),
                fmt_time(a.since_ms),
                fmt_time(a.time_ms),
                a.chart.name(),
                crate::numbers::signed(a.shift, 3),
                esc(a.quantity.unit()),
                crate::numbers::signed(a.shift_sigma, 1),
                esc(a.action.advice())
            );
        }
        let _ = writeln!(h, "</table>");
    }

    let _ = writeln!(h, "<h2>Moisture trend</h2>\n<p>Line: inline moisture; band: expanded uncertainty (k = 2, about 95 %); orange dots (when there are any): readings with a value and a quality flag; black diamonds: lab grab samples; grey, labelled: periods without a value (line empty, not calibrated, ...) or without readings. Below: the product temperature. Times on the axes: local time with its offset (UTC with --utc).</p>");
    if r.trend.is_empty() {
        let _ = writeln!(h, "<p>No readings.</p>");
    } else {
        let svg = plots::trend_svg("inline moisture", &r.trend, &r.lab)?;
        h.push_str(strip_xml_decl(&svg));
        h.push('\n');
    }
    let _ = writeln!(h, "<h3>Quality flags</h3>");
    if r.flag_counts.is_empty() {
        let _ = writeln!(h, "<p>No reading carried a flag.</p>");
    } else {
        let _ = writeln!(h, "<table><tr><th>flag</th><th>readings</th></tr>");
        for (f, n) in &r.flag_counts {
            let _ = writeln!(h, "<tr><td>{}</td><td>{n}</td></tr>", esc(f));
        }
        let _ = writeln!(h, "</table>");
    }

    let _ = writeln!(h, "<h2>Drift charts</h2>\n<p>Against time: blue, the upper CUSUM C+ (an upward shift); green, the lower one drawn as -C- (a downward shift); red lines: decision limits; red crosses: alarms, on the curve that crossed. In-control average run lengths: CUSUM k 0.5, h 5: 465 observations; EWMA lambda 0.1, L 2.814: about 500 (Montgomery; Lucas and Saccucci 1990).</p>");
    for t in &r.traces {
        if t.obs.is_empty() {
            let _ = writeln!(
                h,
                "<p>{}: no observations.</p>",
                esc(t.monitor.quantity.describe())
            );
            continue;
        }
        let _ = writeln!(
            h,
            "<h3>{} ({} observations)</h3>",
            esc(t.monitor.quantity.describe()),
            t.obs.len()
        );
        h.push_str(strip_xml_decl(&plots::control_chart_svg(
            t,
            ChartKind::Cusum,
        )?));
        h.push('\n');
        if !t.ewma.is_empty() {
            h.push_str(strip_xml_decl(&plots::control_chart_svg(
                t,
                ChartKind::Ewma,
            )?));
            h.push('\n');
        }
    }

    let _ = writeln!(h, "<h2>Calibrations in force</h2>");
    if r.calibrations.is_empty() {
        let _ = writeln!(h, "<p>No calibration record in the database.</p>");
    }
    for (head, rows) in &r.calibrations {
        let _ = writeln!(h, "<h3>{}</h3><table>", esc(head));
        for (k, v) in rows {
            let _ = writeln!(h, "<tr><th>{}</th><td>{}</td></tr>", esc(k), esc(v));
        }
        let _ = writeln!(h, "</table>");
    }
    if let Some((p, hash)) = &r.chain_head {
        let _ = writeln!(
            h,
            "<h2>Audit</h2><p>Hash chain head at the time of this report: position {p}, SHA-256 <code>{}</code>. Check the records with <code>fringe audit verify --db FILE</code>.</p>",
            esc(hash)
        );
    }
    let _ = writeln!(h, "</body></html>");
    Ok(h)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::drift::{Monitor, Obs, Quantity};

    #[test]
    fn page_is_self_contained_and_lists_alarms() {
        let obs: Vec<Obs> = (0..80)
            .map(|i| Obs {
                time_ms: 1_790_000_000_000 + i * 60_000,
                value: if i > 40 { 2.5 } else { 0.0 },
            })
            .collect();
        let input = ReportInput {
            title: "Harrowgate Mill <line 2>".into(),
            database: "line2.db".into(),
            span_ms: Some((1_790_000_000_000, 1_790_000_600_000)),
            trend: (0..10)
                .map(|i| TrendPoint {
                    time_ms: 1_790_000_000_000 + i * 60_000,
                    moisture_pct: Some(14.0),
                    uncertainty_pct: 0.2,
                    temperature_c: Some(30.0),
                    flags: fringe_protocol::Flags::empty(),
                })
                .collect(),
            traces: vec![Monitor::new(Quantity::EmptyBaseline, 0.0, 1.0).run(&obs)],
            chain_head: Some((5, "ab".repeat(32))),
            ..Default::default()
        };
        let html = render(&input).expect("render");
        assert!(html.contains("Harrowgate Mill &lt;line 2&gt;"));
        assert!(html.contains("clean the sensor window"));
        assert!(!html.contains("<script") && !html.contains(" src=") && !html.contains(" href="));
        assert!(
            !html.contains("<?xml"),
            "SVG inlined without its XML declaration"
        );
        assert!(html.matches("<svg").count() >= 3);
    }
}
