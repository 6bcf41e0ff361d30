//! Commands of the quality engineer that read or add to the store:
//! `fringe lab add`, `fringe drift`, `fringe report`, `fringe cal history`,
//! `fringe audit export|verify`.

use std::io::Write as _;
use std::path::{Path, PathBuf};

use anyhow::Context as _;
use clap::{Args, Subcommand};
use fringe_protocol::Flags;
use serde_json::json;

use crate::analysis::{self, LineData};
use crate::audit;
use crate::drift::{ChartKind, CusumParams, EwmaParams, Trace};
use crate::plots::{self, LabPoint, TrendPoint};
use crate::report::{self, ReportInput};
use crate::store::{chain, NewLabSample, Store};
use crate::timefmt::{fmt_time, parse_time};

/// `fringe lab`.
#[derive(Debug, Clone, Args)]
pub struct LabArgs {
    /// What to do.
    #[command(subcommand)]
    pub command: LabCommand,
}

/// `fringe lab ...`.
#[derive(Debug, Clone, Subcommand)]
pub enum LabCommand {
    /// Record a lab grab-sample result against the inline reading at that time.
    #[command(
        after_help = "Example:\n  fringe lab add --db line2.db --time 2026-12-01T09:40Z --moisture 14.2 \\\n      --method \"oven 130 C 2 h, ground\" --operator \"R. Okafor\" --sample-id G-0412"
    )]
    Add(LabAddArgs),
}

/// `fringe lab add`.
#[derive(Debug, Clone, Args)]
pub struct LabAddArgs {
    /// Database file.
    #[arg(long, value_name = "FILE")]
    pub db: PathBuf,
    /// When the sample was taken: RFC 3339 with an offset
    /// (2026-12-01T09:40+01:00, 2026-12-01T08:40Z); without an offset
    /// (2026-12-01 09:40) it is local time.
    #[arg(long, value_name = "T", value_parser = parse_time)]
    pub time: i64,
    /// Lab moisture, % (basis as --basis).
    #[arg(long, value_name = "PCT")]
    pub moisture: f64,
    /// Reference method (e.g. "oven 130 C 2 h, ground").
    #[arg(long)]
    pub method: String,
    /// Who took and measured it.
    #[arg(long)]
    pub operator: String,
    /// The lab's sample id [default: LAB-<time>].
    #[arg(long)]
    pub sample_id: Option<String>,
    /// Device serial [default: the database's only device].
    #[arg(long)]
    pub serial: Option<String>,
    /// Moisture basis of the lab value.
    #[arg(long, value_parser = ["wet", "dry"], default_value = "wet")]
    pub basis: String,
    /// Furthest a matched reading may lie from --time, s.
    #[arg(long, default_value_t = 300)]
    pub match_within_s: i64,
    /// Print the result as JSON.
    #[arg(long)]
    pub json: bool,
}

/// `fringe drift`.
#[derive(Debug, Clone, Args)]
#[command(
    after_help = "Example:\n  fringe drift --db line2.db\n  fringe drift --db line2.db --plot drift.svg --json"
)]
pub struct DriftArgs {
    /// Database file.
    #[arg(long, value_name = "FILE")]
    pub db: PathBuf,
    /// Device serial [default: the first device].
    #[arg(long)]
    pub serial: Option<String>,
    /// Draw the control charts to this SVG file.
    #[arg(long, value_name = "FILE.svg")]
    pub plot: Option<PathBuf>,
    /// Print JSON.
    #[arg(long)]
    pub json: bool,
}

/// `fringe report`.
#[derive(Debug, Clone, Args)]
#[command(
    after_help = "Example:\n  fringe report --db line2.db --out report/   # then open report/index.html"
)]
pub struct ReportArgs {
    /// Database file.
    #[arg(long, value_name = "FILE")]
    pub db: PathBuf,
    /// Output folder (index.html and the plots as SVG files).
    #[arg(long, value_name = "DIR")]
    pub out: PathBuf,
    /// Device serial [default: the first device].
    #[arg(long)]
    pub serial: Option<String>,
    /// Page title.
    #[arg(long)]
    pub title: Option<String>,
}

/// `fringe cal history`.
#[derive(Debug, Clone, Args)]
pub struct HistoryArgs {
    /// Database file.
    #[arg(long, value_name = "FILE")]
    pub db: PathBuf,
    /// Device serial [default: every device].
    #[arg(long)]
    pub serial: Option<String>,
    /// Print JSON.
    #[arg(long)]
    pub json: bool,
}

/// `fringe audit`.
#[derive(Debug, Clone, Args)]
pub struct AuditArgs {
    /// What to do.
    #[command(subcommand)]
    pub command: AuditCommand,
}

/// `fringe audit ...`.
#[derive(Debug, Clone, Subcommand)]
pub enum AuditCommand {
    /// Write a tamper-evident bundle of the records in a time range.
    #[command(
        after_help = "Example:\n  fringe audit export --db line2.db --from 2026-12-01T06:00Z --to 2026-12-01T14:00Z --out audit-2026-12-01"
    )]
    Export(AuditExportArgs),
    /// Check a bundle (and/or a database) and report every changed, removed or reordered record.
    #[command(
        after_help = "Example:\n  fringe audit verify audit-2026-12-01\n  fringe audit verify audit-2026-12-01 --db line2.db\n  fringe audit verify --db line2.db"
    )]
    Verify(AuditVerifyArgs),
}

/// `fringe audit export`.
#[derive(Debug, Clone, Args)]
pub struct AuditExportArgs {
    /// Database file.
    #[arg(long, value_name = "FILE")]
    pub db: PathBuf,
    /// Start of the range [default: the beginning]: RFC 3339 with an
    /// offset (2026-12-01T06:00+01:00, ...Z); without an offset it is local
    /// time. Readings taken before the device clock was set count at their
    /// re-based wall-clock time.
    #[arg(long, value_name = "T", value_parser = parse_time)]
    pub from: Option<i64>,
    /// End of the range [default: now]; as --from.
    #[arg(long, value_name = "T", value_parser = parse_time)]
    pub to: Option<i64>,
    /// Output folder (created; must not hold files).
    #[arg(long, value_name = "DIR")]
    pub out: PathBuf,
    /// Print the manifest as JSON.
    #[arg(long)]
    pub json: bool,
}

/// `fringe audit verify`.
#[derive(Debug, Clone, Args)]
pub struct AuditVerifyArgs {
    /// Bundle folder.
    #[arg(value_name = "DIR", required_unless_present = "db")]
    pub dir: Option<PathBuf>,
    /// Database to check (its own chain, and the bundle against it).
    #[arg(long, value_name = "FILE")]
    pub db: Option<PathBuf>,
    /// Print JSON.
    #[arg(long)]
    pub json: bool,
}

/// A finished command that found problems (exit status 4, "problems").
#[derive(Debug)]
pub struct ProblemsFound(pub String);

impl std::fmt::Display for ProblemsFound {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.0)
    }
}

impl std::error::Error for ProblemsFound {}

fn only_device(store: &Store, serial: Option<&str>) -> anyhow::Result<String> {
    if let Some(s) = serial {
        return Ok(s.to_string());
    }
    let d = store.devices()?;
    match d.as_slice() {
        [one] => Ok(one.serial.clone()),
        [] => anyhow::bail!(
            "{}: no device recorded yet; connect the device once (fringe monitor) first",
            store.path().display()
        ),
        _ => anyhow::bail!(
            "{}: several devices ({}); choose one with --serial",
            store.path().display(),
            d.iter()
                .map(|x| x.serial.as_str())
                .collect::<Vec<_>>()
                .join(", ")
        ),
    }
}

/// `fringe lab add`.
///
/// # Errors
/// A bad value, store failure or unknown device.
pub fn lab_add(a: &LabAddArgs) -> anyhow::Result<()> {
    let limit = if a.basis == "dry" { 1000.0 } else { 100.0 };
    if !(a.moisture.is_finite() && a.moisture >= 0.0 && a.moisture < limit) {
        anyhow::bail!(
            "--moisture {}: must be a moisture in % {} basis, 0 <= m < {limit}",
            a.moisture,
            a.basis
        );
    }
    if a.operator.trim().is_empty() || a.method.trim().is_empty() {
        anyhow::bail!(
            "--operator and --method must not be empty (the audit trail needs who and how)"
        );
    }
    let mut store = Store::open(&a.db)?;
    let serial = only_device(&store, a.serial.as_deref())?;
    let readings = store.readings(&serial)?;
    // By wall-clock time (re-based for readings taken before the clock was
    // set); a reading whose wall-clock time is not known cannot match.
    let nearest = readings
        .iter()
        .filter(|r| r.reading.moisture_pct.is_some())
        .filter_map(|r| r.wall_ms.map(|t| (r, t)))
        .min_by_key(|(_, t)| (t - a.time).abs());
    let matched = nearest
        .filter(|(_, t)| (t - a.time).abs() <= a.match_within_s * 1000)
        .map(|(r, _)| r);
    let sample_id = a
        .sample_id
        .clone()
        .unwrap_or_else(|| format!("LAB-{}", fmt_time(a.time)));
    let rec = store.insert_lab_sample(
        &serial,
        &NewLabSample {
            sample_id: sample_id.clone(),
            taken_unix_ms: a.time,
            product: None,
            lab_moisture_pct: a.moisture,
            basis: a.basis.clone(),
            method: Some(a.method.clone()),
            reading: matched.map(|r| r.reading.seq),
            note: Some(format!("operator: {}", a.operator)),
            supersedes: None,
        },
    )?;
    let inline = matched.and_then(|r| r.reading.moisture_pct);
    if a.json {
        crate::outln!(
            "{}",
            json!({
                "sample_id": sample_id, "serial": serial, "time_utc": fmt_time(a.time), "lab_moisture_pct": a.moisture,
                "matched_reading": matched.map(|r| r.reading.seq.to_string()),
                "inline_moisture_pct": inline, "residual_pct": inline.map(|i| a.moisture - f64::from(i)),
                "position": rec.position, "duplicate": rec.duplicate,
            })
        );
        return Ok(());
    }
    crate::outln!(
        "recorded lab sample {sample_id} ({} {:.2} %, {}) at chain position {}",
        a.basis,
        a.moisture,
        a.method,
        rec.position
    );
    match (matched, inline) {
        (Some(r), Some(i)) => crate::outln!(
            "  matched reading {} at {}{}: inline {:.2} %, lab - inline {:+.2} %",
            r.reading.seq,
            crate::timefmt::fmt_person(r.wall_ms.unwrap_or(r.reading.time_ms as i64)),
            if r.rebased {
                " (taken before the device clock was set; re-based)"
            } else {
                ""
            },
            i,
            a.moisture - f64::from(i)
        ),
        _ => crate::outln!(
            "  no inline reading within {} s of {}: stored unmatched",
            a.match_within_s,
            crate::timefmt::fmt_person(a.time)
        ),
    }
    if rec.duplicate {
        crate::outln!("  (identical record already stored: nothing added)");
    }
    Ok(())
}

fn trace_json(t: &Trace) -> serde_json::Value {
    let m = &t.monitor;
    json!({
        "quantity": m.quantity,
        "unit": m.quantity.unit(),
        "observations": t.obs.len(),
        "target": m.target,
        "sigma": m.sigma,
        "range": m.range,
        "cusum": { "k": m.cusum.k, "h": m.cusum.h, "arl0": m.cusum.arl(0.0, 64), "arl_1sigma": m.cusum.arl(1.0, 64) },
        "ewma": if m.range.is_none() {
            json!({ "lambda": m.ewma.lambda, "l": m.ewma.l, "arl0": m.ewma.arl(0.0, 120), "arl_1sigma": m.ewma.arl(1.0, 120) })
        } else { serde_json::Value::Null },
        "alarms": t.episodes().iter().map(alarm_json).collect::<Vec<_>>(),
    })
}

/// One alarm as `fringe drift --json` and `fringe monitor --json` print it:
/// its fields, the message for a person and both times in UTC.
pub fn alarm_json(a: &crate::drift::Alarm) -> serde_json::Value {
    let mut v = serde_json::to_value(a).unwrap_or_default();
    v["message"] = json!(a.message());
    v["since_utc"] = json!(fmt_time(a.since_ms));
    v["time_utc"] = json!(fmt_time(a.time_ms));
    v
}

/// Prints a drift summary for `data` to `w`; returns the alarm count.
///
/// # Errors
/// I/O.
pub fn print_drift(
    data: &LineData,
    traces: &[Trace],
    w: &mut dyn std::io::Write,
) -> std::io::Result<usize> {
    let c = CusumParams::default();
    let e = EwmaParams::default();
    writeln!(
        w,
        "drift monitors of {} (CUSUM k {} h {}: in-control ARL {:.0}; EWMA lambda {} L {}: {:.0}):",
        data.serial,
        c.k,
        c.h,
        c.arl(0.0, 64),
        e.lambda,
        e.l,
        e.arl(0.0, 120)
    )?;
    let mut n = 0;
    for t in traces {
        let m = &t.monitor;
        let alarms = t.episodes();
        let what = match m.range {
            Some((lo, hi)) => format!("calibrated range {lo:.1}..{hi:.1} {}", m.quantity.unit()),
            None => format!("target {:.4} {}", m.target, m.quantity.unit()),
        };
        writeln!(
            w,
            "  {:<28} {:>5} obs, {what}, sigma {:.4}: {}",
            m.quantity.describe(),
            t.obs.len(),
            m.sigma,
            if alarms.is_empty() {
                "in control".to_string()
            } else {
                format!("{} alarm(s)", alarms.len())
            }
        )?;
        for a in alarms {
            n += 1;
            writeln!(w, "    ALARM {}", a.message())?;
        }
    }
    Ok(n)
}

/// `fringe drift`.
///
/// # Errors
/// Store failure or a failed plot write.
pub fn drift(a: &DriftArgs) -> anyhow::Result<()> {
    let store = Store::open_read_only(&a.db)?;
    let data = analysis::load(&store, a.serial.as_deref())?;
    let traces = data.traces();
    if let Some(p) = &a.plot {
        std::fs::write(p, drift_svg(&traces)?)
            .with_context(|| format!("writing {}", p.display()))?;
    }
    if a.json {
        crate::outln!(
            "{}",
            json!({ "serial": data.serial, "monitors": traces.iter().map(trace_json).collect::<Vec<_>>() })
        );
    } else {
        print_drift(&data, &traces, &mut std::io::stdout().lock())?;
        if let Some(p) = &a.plot {
            crate::outln!("charts: {}", p.display());
        }
    }
    Ok(())
}

/// All control charts of `traces` stacked in one SVG.
///
/// # Errors
/// A plotting failure.
pub fn drift_svg(traces: &[Trace]) -> anyhow::Result<String> {
    let mut parts = Vec::new();
    for t in traces.iter().filter(|t| !t.obs.is_empty()) {
        parts.push(plots::control_chart_svg(t, ChartKind::Cusum).map_err(anyhow::Error::msg)?);
        if !t.ewma.is_empty() {
            parts.push(plots::control_chart_svg(t, ChartKind::Ewma).map_err(anyhow::Error::msg)?);
        }
    }
    Ok(plots::combine_svgs(&parts, 1, (900, 280)))
}

/// Builds the report's input from a store.
///
/// # Errors
/// Store failure.
pub fn report_input(
    store: &Store,
    serial: Option<&str>,
    title: Option<&str>,
) -> anyhow::Result<ReportInput> {
    let data = analysis::load(store, serial)?;
    let t0 = data.rows.first().map_or(0, |r| r.time_ms);
    let hours = |t: i64| (t - t0) as f64 / 3.6e6;
    let trend: Vec<TrendPoint> = data
        .rows
        .iter()
        .map(|r| TrendPoint {
            t_h: hours(r.time_ms),
            moisture_pct: r.reading.moisture_pct.map(f64::from),
            uncertainty_pct: f64::from(r.reading.uncertainty_pct),
            flagged: !(r.reading.flags - Flags::CLOCK_UNSET).is_empty(),
        })
        .collect();
    let lab: Vec<LabPoint> = data
        .lab
        .iter()
        .map(|l| LabPoint {
            t_h: hours(l.time_ms),
            moisture_pct: l.lab_pct,
        })
        .collect();
    let mut flag_counts: Vec<(String, u64)> = Vec::new();
    for (f, name) in Flags::NAMES {
        let n = data
            .rows
            .iter()
            .filter(|r| r.reading.flags.contains(f))
            .count() as u64;
        if n > 0 {
            flag_counts.push((name.to_string(), n));
        }
    }
    // Times: readings taken before the device clock was set are placed at
    // their re-based wall-clock time; those of a boot whose clock was never
    // set keep their time since boot.
    let rebased = data.rows.iter().filter(|r| r.rebased).count() as u64;
    if rebased > 0 {
        flag_counts.push((
            "clock_unset, re-based onto wall-clock time".to_string(),
            rebased,
        ));
    }
    let unknown = data.rows.iter().filter(|r| !r.clock_known).count() as u64;
    if unknown > 0 {
        flag_counts.push((
            "clock_unset, wall-clock time unknown (time since boot)".to_string(),
            unknown,
        ));
    }
    let mut calibrations = Vec::new();
    for kind in [
        crate::store::CalKind::Cell,
        crate::store::CalKind::Product,
        crate::store::CalKind::Settings,
    ] {
        if let Some((pos, created, _, body, name)) = data.cals.iter().rev().find(|c| c.2 == kind) {
            let mut rows = vec![
                ("calibration id".to_string(), body.new_id.clone()),
                ("recorded (UTC)".to_string(), fmt_time(*created)),
                ("chain position".to_string(), pos.to_string()),
                ("operator".to_string(), body.operator.clone()),
                ("reason".to_string(), body.reason.clone()),
                ("replaced".to_string(), body.old_id.clone()),
            ];
            if let Some(s) = &body.statistics {
                rows.push((
                    "n / SEC / SEP (%)".into(),
                    format!("{} / {:.3} / {:.3}", s.n, s.sec, s.sep),
                ));
                rows.push((
                    "bias / slope / R^2 / RPD".into(),
                    format!(
                        "{:+.3} / {:.4} / {:.4} / {:.2}",
                        s.bias, s.slope, s.r2, s.rpd
                    ),
                ));
                rows.push(("cross-validation".into(), s.cross_validation.clone()));
            }
            if let Ok(cal) =
                serde_json::from_value::<fringe_protocol::ProductCal>(body.calibration.clone())
            {
                rows.push(("model".into(), format!("{:?}", cal.model)));
                rows.push((
                    "valid moisture (%)".into(),
                    format!("{:.2} .. {:.2}", cal.moisture_pct.min, cal.moisture_pct.max),
                ));
                rows.push((
                    "valid temperature (C)".into(),
                    format!(
                        "{:.1} .. {:.1}",
                        cal.temperature_c.min, cal.temperature_c.max
                    ),
                ));
            }
            if let Some(v) = &body.verification {
                rows.push(("verification".into(), v.clone()));
            }
            let head = match kind {
                crate::store::CalKind::Cell => "Cell calibration".to_string(),
                crate::store::CalKind::Product => {
                    format!("Product calibration {}", name.clone().unwrap_or_default())
                }
                crate::store::CalKind::Settings => {
                    format!("Device settings {}", name.clone().unwrap_or_default())
                }
            };
            calibrations.push((head, rows));
        }
    }
    let (p, h) = store.chain_head()?;
    Ok(ReportInput {
        title: title.map_or_else(
            || format!("Fringe line report: {}", data.serial),
            str::to_string,
        ),
        database: store.path().display().to_string(),
        span_ms: data
            .rows
            .first()
            .zip(data.rows.last())
            .map(|(a, b)| (a.time_ms, b.time_ms)),
        readings: data.rows.len() as u64,
        trend,
        lab,
        flag_counts,
        traces: data.traces(),
        calibrations,
        chain_head: Some((p, chain::hex(&h))),
    })
}

/// `fringe report`: writes `DIR/index.html` (self-contained) and the plots
/// as separate SVG files beside it.
///
/// # Errors
/// Store failure or a failed write.
pub fn report(a: &ReportArgs) -> anyhow::Result<PathBuf> {
    let store = Store::open_read_only(&a.db)?;
    write_report(&store, a.serial.as_deref(), a.title.as_deref(), &a.out)
}

/// Writes the report of `store` into `out`.
///
/// # Errors
/// Store failure or a failed write.
pub fn write_report(
    store: &Store,
    serial: Option<&str>,
    title: Option<&str>,
    out: &Path,
) -> anyhow::Result<PathBuf> {
    let input = report_input(store, serial, title)?;
    let html = report::render(&input).map_err(anyhow::Error::msg)?;
    std::fs::create_dir_all(out).with_context(|| format!("creating {}", out.display()))?;
    let page = out.join("index.html");
    std::fs::write(&page, html).with_context(|| format!("writing {}", page.display()))?;
    if !input.trend.is_empty() {
        let svg = plots::trend_svg("inline moisture", &input.trend, &input.lab)
            .map_err(anyhow::Error::msg)?;
        std::fs::write(out.join("trend.svg"), svg)
            .with_context(|| format!("writing {}", out.join("trend.svg").display()))?;
    }
    std::fs::write(out.join("drift.svg"), drift_svg(&input.traces)?)
        .with_context(|| format!("writing {}", out.join("drift.svg").display()))?;
    Ok(page)
}

/// `fringe cal history`.
///
/// # Errors
/// Store failure.
pub fn history(a: &HistoryArgs) -> anyhow::Result<()> {
    let store = Store::open_read_only(&a.db)?;
    let serials: Vec<String> = match &a.serial {
        Some(s) => vec![s.clone()],
        None => store
            .devices()?
            .into_iter()
            .map(|d| d.record.serial)
            .collect(),
    };
    let mut all = Vec::new();
    for s in &serials {
        for c in store.calibrations(s)? {
            let body: analysis::CalRecordBody =
                serde_json::from_value(c.cal.body.clone()).unwrap_or_default();
            all.push((s.clone(), c, body));
        }
    }
    if a.json {
        let v: Vec<serde_json::Value> = all
            .iter()
            .map(|(s, c, b)| {
                json!({
                    "serial": s, "position": c.position, "time_utc": fmt_time(c.created_unix_ms), "kind": c.cal.kind,
                    "slot": c.cal.slot, "name": c.cal.name, "action": b.action, "old_id": b.old_id, "new_id": b.new_id,
                    "operator": b.operator, "reason": b.reason, "statistics": b.statistics, "verification": b.verification,
                })
            })
            .collect();
        crate::outln!("{}", serde_json::Value::Array(v));
        return Ok(());
    }
    let mut w = std::io::stdout().lock();
    if all.is_empty() {
        writeln!(w, "no calibration change recorded in {}", a.db.display())?;
    }
    for (s, c, b) in &all {
        writeln!(
            w,
            "{} {s} #{:<3} {:<8} {:<8} {} -> {} slot {} {:<16} by {}: {}",
            crate::timefmt::fmt_person(c.created_unix_ms),
            c.seq,
            c.cal.kind.as_str(),
            b.action,
            b.old_id,
            b.new_id,
            c.cal.slot.map_or("-".into(), |x| x.to_string()),
            c.cal.name.clone().unwrap_or_default(),
            b.operator,
            b.reason
        )?;
    }
    Ok(())
}

/// `fringe audit ...`.
///
/// # Errors
/// A store or file failure; [`ProblemsFound`] when verification finds a problem.
pub fn audit_cmd(a: &AuditArgs) -> anyhow::Result<()> {
    match &a.command {
        AuditCommand::Export(e) => {
            let store = Store::open_read_only(&e.db)?;
            let from = e.from.unwrap_or(i64::MIN);
            let to = e.to.unwrap_or_else(crate::store::now_unix_ms);
            let s = audit::export(&store, &e.db.display().to_string(), from, to, &e.out)?;
            if e.json {
                crate::outln!("{}", serde_json::to_string(&s.manifest)?);
            } else {
                print_export(&s)?;
            }
            Ok(())
        }
        AuditCommand::Verify(v) => {
            let store = v.db.as_ref().map(Store::open_read_only).transpose()?;
            let r = audit::verify(v.dir.as_deref(), store.as_ref())?;
            if v.json {
                crate::outln!(
                    "{}",
                    json!({ "ok": r.ok(), "records_checked": r.records_checked, "problems": r.problems.iter().map(|p| json!({"detail": p, "message": p.to_string()})).collect::<Vec<_>>() })
                );
            } else {
                print_verify(&r, v.dir.as_deref(), v.db.as_deref())?;
            }
            if r.ok() {
                Ok(())
            } else {
                Err(ProblemsFound(format!("{} problem(s) found", r.problems.len())).into())
            }
        }
    }
}

/// Prints an export summary.
pub fn print_export(s: &audit::ExportSummary) -> anyhow::Result<()> {
    let m = &s.manifest;
    crate::outln!("wrote audit bundle {}", s.out.display());
    crate::outln!(
        "  range {} .. {}",
        crate::timefmt::fmt_person(m.from_ms.max(0)),
        crate::timefmt::fmt_person(m.to_ms)
    );
    crate::outln!(
        "  chain positions {}..={}, last hash {}",
        m.first_position,
        m.last_position,
        m.last_hash
    );
    for (t, n) in &m.records {
        crate::outln!("  {t}: {n} records");
    }
    crate::outln!(
        "  calibrations in force: {} record(s), positions {:?}",
        s.calibrations_in_force.len(),
        s.calibrations_in_force
    );
    crate::outln!(
        "  database chain head at export: position {}, {}",
        m.db_head_position,
        m.db_head_hash
    );
    Ok(())
}

/// Prints a verification report.
pub fn print_verify(
    r: &audit::VerifyReport,
    dir: Option<&Path>,
    db: Option<&Path>,
) -> anyhow::Result<()> {
    let what = match (dir, db) {
        (Some(d), Some(b)) => format!("bundle {} against {}", d.display(), b.display()),
        (Some(d), None) => format!("bundle {}", d.display()),
        (None, Some(b)) => format!("database {}", b.display()),
        (None, None) => "nothing".into(),
    };
    if r.ok() {
        crate::outln!(
            "verified {what}: {} records, no change, removal or reordering found",
            r.records_checked
        );
        if let Some((p, h)) = &r.bundle_last {
            crate::outln!("  bundle ends at position {p}, hash {h}");
        }
    } else {
        crate::outln!(
            "{what}: {} problem(s) in {} records checked:",
            r.problems.len(),
            r.records_checked
        );
        for p in &r.problems {
            crate::outln!("  {p}");
        }
    }
    Ok(())
}
