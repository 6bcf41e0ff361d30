//! Commands of the quality engineer that read or add to the store:
//! `fringe lab add`, `fringe drift`, `fringe report`, `fringe cal history`,
//! `fringe audit export|verify`.

use std::path::PathBuf;

use anyhow::Context as _;
use fringe_quality::views::{self, GrabSample};
use fringe_quality::{analysis, audit};
use serde_json::json;

pub use crate::cli::quality::{
    AuditArgs, AuditCommand, AuditExportArgs, AuditVerifyArgs, DriftArgs, HistoryArgs, LabAddArgs,
    LabArgs, LabCommand, ReportArgs,
};
use crate::config::{ConfigError, LineConfig};
use crate::store::{db_label, AnyStore};
use crate::timefmt::{fmt_person, fmt_time};

/// The database of a command that reads one: `--db`, else the line file's.
///
/// # Errors
/// [`ConfigError::Missing`].
fn db_of(flag: Option<&PathBuf>, cfg: &LineConfig) -> Result<PathBuf, ConfigError> {
    flag.cloned()
        .or_else(|| cfg.db.clone())
        .ok_or(ConfigError::Missing {
            what: "database",
            flag: "--db",
            key: "db",
        })
}

/// Opens a database to read (a SQLite file or a `postgres://` URL):
/// read-only, after SQLite's quick check (a damaged page stops the command
/// with exit status 23 before anything is read from it; costs in
/// BENCHMARKS.md; see [`AnyStore::check_on_open`] for PostgreSQL).
///
/// # Errors
/// [`crate::store::StoreError`].
pub fn open_to_read(db: &std::path::Path) -> anyhow::Result<AnyStore> {
    let store = AnyStore::open_read_only(db)?;
    store.check_on_open()?;
    Ok(store)
}

/// `fringe lab add`.
///
/// # Errors
/// A bad value, store failure or unknown device.
pub fn lab_add(a: &LabAddArgs, cfg: &LineConfig) -> anyhow::Result<()> {
    let grab = GrabSample {
        time_ms: a.time,
        moisture_pct: a.moisture,
        basis: a.basis.clone(),
        method: a.method.clone(),
        operator: a.operator.clone(),
        sample_id: a.sample_id.clone(),
        match_within_s: a.match_within_s,
    };
    grab.validate()?;
    let db = db_of(a.db.as_ref(), cfg)?;
    // A lab sample belongs to a device a database already holds: never a new file.
    let mut store = AnyStore::open_existing(&db)?;
    store.check_on_open()?;
    let g = grab.record(store.get_mut(), a.serial.as_deref())?;
    let inline = g.matched.and_then(|(r, _, _)| r.moisture_pct);
    if a.json {
        crate::out::json(&json!({
            "sample_id": g.sample_id, "serial": g.serial, "time_utc": fmt_time(a.time), "lab_moisture_pct": a.moisture,
            "matched_reading": g.matched.map(|(r, _, _)| json!({"boot": r.seq.boot, "counter": r.seq.counter})),
            "inline_moisture_pct": inline, "residual_pct": inline.map(|i| {
                // To 0.001 %: the difference of a lab value and an f32 reading.
                let r = a.moisture - f64::from(i);
                (r * 1000.0).round() / 1000.0
            }),
            "position": g.recorded.position, "duplicate": g.recorded.duplicate,
        }))?;
        return Ok(());
    }
    crate::outln!(
        "recorded lab sample {} ({} {:.2} %, {}) at chain position {}",
        g.sample_id,
        a.basis,
        a.moisture,
        a.method,
        g.recorded.position
    );
    match (g.matched, inline) {
        (Some((r, t, rebased)), Some(i)) => crate::outln!(
            "  matched reading {} at {}{}: inline {:.2} %, lab - inline {:+.2} %",
            r.seq,
            fmt_person(t),
            if rebased {
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
            fmt_person(a.time)
        ),
    }
    if g.recorded.duplicate {
        crate::outln!("  (identical record already stored: nothing added)");
    }
    Ok(())
}

/// `fringe drift`.
///
/// # Errors
/// Store failure or a failed plot write.
pub fn drift(a: &DriftArgs, cfg: &LineConfig) -> anyhow::Result<()> {
    let store = open_to_read(&db_of(a.db.as_ref(), cfg)?)?;
    let data = analysis::load(store.get(), a.serial.as_deref())?;
    let traces = data.traces();
    if let Some(p) = &a.plot {
        std::fs::write(p, views::drift_svg(&traces)?)
            .with_context(|| format!("writing {}", p.display()))?;
    }
    if a.json {
        crate::out::json(&views::drift_json(&data, &traces))?;
    } else {
        views::write_drift(&data, &traces, &mut std::io::stdout().lock())?;
        if let Some(p) = &a.plot {
            crate::outln!("charts: {}", p.display());
        }
    }
    Ok(())
}

/// `fringe report`: writes `DIR/index.html` (self-contained) and the plots
/// as separate SVG files beside it.
///
/// # Errors
/// Store failure or a failed write.
pub fn report(a: &ReportArgs, cfg: &LineConfig) -> anyhow::Result<PathBuf> {
    let store = open_to_read(&db_of(a.db.as_ref(), cfg)?)?;
    Ok(views::write_report(
        store.get(),
        a.serial.as_deref(),
        a.title.as_deref(),
        &a.out,
    )?)
}

/// `fringe cal history`.
///
/// # Errors
/// Store failure.
pub fn history(a: &HistoryArgs, cfg: &LineConfig) -> anyhow::Result<()> {
    let db = db_of(a.db.as_ref(), cfg)?;
    let store = open_to_read(&db)?;
    let all = views::history(store.get(), a.serial.as_deref())?;
    if a.json {
        crate::out::json(&views::history_json(&all))?;
        return Ok(());
    }
    views::write_history(&all, store.get().path(), &mut std::io::stdout().lock())?;
    Ok(())
}

/// `fringe audit ...`.
///
/// # Errors
/// A store or file failure; [`crate::exit::ProblemsFound`] when verification finds a problem.
pub fn audit_cmd(a: &AuditArgs, cfg: &LineConfig) -> anyhow::Result<()> {
    match &a.command {
        AuditCommand::Export(e) => {
            if let (Some(from), Some(to)) = (e.from, e.to) {
                if from > to {
                    return Err(crate::exit::UsageError(format!(
                        "--from {} is later than --to {}: swap them",
                        fmt_person(from),
                        fmt_person(to)
                    ))
                    .into());
                }
            }
            let db = db_of(e.db.as_ref(), cfg)?;
            let store = AnyStore::open_read_only(&db)?;
            let to = e.to.unwrap_or_else(crate::store::now_unix_ms);
            if let Some(from) = e.from.filter(|f| *f > to) {
                return Err(crate::exit::UsageError(format!(
                    "--from {} is later than --to (default: now, {}): swap them or give --to",
                    fmt_person(from),
                    fmt_person(to)
                ))
                .into());
            }
            // One consistent view of a database gateways may be writing;
            // the label never holds a password.
            let label = db_label(&db);
            let s = store.consistent(|s| audit::export(s, &label, e.from, to, &e.out))??;
            if e.json {
                crate::out::json(&serde_json::to_value(&s.manifest)?)?;
            } else {
                views::write_export(&s, &mut std::io::stdout().lock())?;
            }
            Ok(())
        }
        AuditCommand::Verify(v) => {
            let db = match (&v.dir, &v.db) {
                (_, Some(db)) => Some(db.clone()),
                (Some(_), None) => None,
                (None, None) => Some(db_of(None, cfg)?),
            };
            let store = db.as_deref().map(AnyStore::open_read_only).transpose()?;
            let r = match &store {
                Some(st) => st.consistent(|s| audit::verify(v.dir.as_deref(), Some(s)))??,
                None => audit::verify(v.dir.as_deref(), None)?,
            };
            if v.json {
                crate::out::json(
                    &json!({ "ok": r.ok(), "records_checked": r.records_checked, "problems": r.problems.iter().map(|p| json!({"detail": p, "message": p.to_string()})).collect::<Vec<_>>() }),
                )?;
            } else {
                views::write_verify(
                    &r,
                    v.dir.as_deref(),
                    store.as_ref().map(|s| s.get().path()),
                    &mut std::io::stdout().lock(),
                )?;
            }
            if r.ok() {
                Ok(())
            } else {
                Err(
                    crate::exit::ProblemsFound(format!("{} problem(s) found", r.problems.len()))
                        .into(),
                )
            }
        }
    }
}
