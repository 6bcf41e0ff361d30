//! Commands of the quality engineer that read or add to the store:
//! `fringe lab add`, `fringe drift`, `fringe report`, `fringe cal history`,
//! `fringe audit export|verify`.

use std::path::PathBuf;

use anyhow::Context as _;
use fringe_quality::views::{self, GrabSample};
use fringe_quality::{analysis, audit};
use serde_json::json;

pub use crate::cli::quality::{
    AuditArgs, AuditCommand, AuditExportArgs, AuditVerifyArgs, DriftArgs, ExportArgs, HistoryArgs,
    LabAddArgs, LabArgs, LabCommand, ReportArgs,
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
        supersedes: a.supersedes,
    };
    grab.validate()?;
    let db = db_of(a.db.as_ref(), cfg)?;
    // A lab sample belongs to a device a database already holds: never a new file.
    let mut store = AnyStore::open_existing(&db)?;
    store.check_on_open()?;
    let g = grab.record(store.get_mut(), a.serial.as_deref())?;
    let inline = g.matched.and_then(|(r, _, _)| r.moisture_pct);
    // The lab value on the basis the matched reading was made on (its
    // product calibration's record), so that lab - inline compares like
    // with like (as `fringe drift` does); as entered when unknown.
    let entered = fringe_quality::samples::basis_named(&a.basis);
    let reading_basis = match g.matched {
        Some((r, _, _)) => fringe_quality::analysis::calibration_bases(store.get_mut(), &g.serial)?
            .get(&r.product_cal)
            .copied(),
        None => None,
    };
    let lab_on_reading = reading_basis.map_or(a.moisture, |b| {
        fringe_calibration::moisture::convert(a.moisture, entered, b)
    });
    let converted = reading_basis.filter(|b| *b != entered);
    if a.json {
        crate::out::json(&json!({
            "sample_id": g.sample_id, "serial": g.serial, "time_utc": fmt_time(a.time), "lab_moisture_pct": a.moisture,
            "matched_reading": g.matched.map(|(r, t, _)| json!({
                "boot": r.seq.boot, "counter": r.seq.counter, "time_utc": fmt_time(t),
                // Reading time minus sample time, s.
                "offset_s": (t - a.time) as f64 / 1000.0,
            })),
            "unmatched_reason": g.unmatched,
            "inline_moisture_pct": inline, "residual_pct": inline.map(|i| {
                // To 0.001 %: the difference of a lab value and an f32 reading.
                let r = lab_on_reading - f64::from(i);
                (r * 1000.0).round() / 1000.0
            }),
            "lab_moisture_pct_on_reading_basis": converted.map(|_| (lab_on_reading * 1000.0).round() / 1000.0),
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
            "  matched reading {} at {} ({:+.0} s from the sample){}: inline {:.2} %, lab - inline {:+.2} %{}",
            r.seq,
            fmt_person(t),
            (t - a.time) as f64 / 1000.0,
            if rebased {
                " (taken before the device clock was set; re-based)"
            } else {
                ""
            },
            i,
            lab_on_reading - f64::from(i),
            match converted {
                Some(b) => format!(
                    " (the lab value on the reading's {} basis: {:.2} %)",
                    if b == fringe_calibration::moisture::Basis::Dry {
                        "dry"
                    } else {
                        "wet"
                    },
                    lab_on_reading
                ),
                None => String::new(),
            }
        ),
        _ => crate::outln!(
            "  stored unmatched (sample at {}): {}",
            fmt_person(a.time),
            g.unmatched
                .as_deref()
                .unwrap_or("no inline moisture at the matched reading")
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
        views::may_replace(p, "--plot")?;
        let svg = views::drift_svg(&traces)? + views::SVG_MARK;
        fringe_quality::files::replace(p, svg.as_bytes())
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

/// `fringe export`: the rows go to a new file (written beside it as
/// `NAME.partial-PID`, then linked to its name only if that is still free,
/// so that an existing file is never overwritten and a failed export leaves
/// no half file under the name) or to stdout.
///
/// # Errors
/// A bad flag combination or an existing `--out` ([`crate::exit::UsageError`]),
/// an unknown device, the store, the writer.
pub fn export_cmd(a: &ExportArgs, cfg: &LineConfig) -> anyhow::Result<()> {
    use fringe_quality::export::{self, Format, Kind, Selection};
    use std::io::{IsTerminal as _, Write as _};
    let usage = |m: String| anyhow::Error::new(crate::exit::UsageError(m));
    if a.json && a.out.is_none() {
        return Err(usage(
            "--json prints the summary on stdout, which carries the export without --out: give --out FILE".into(),
        ));
    }
    if let (Some(from), Some(to)) = (a.from, a.to) {
        if from > to {
            return Err(usage(format!(
                "--from {} is later than --to {}: swap them",
                fmt_person(from),
                fmt_person(to)
            )));
        }
    }
    let ext = a
        .out
        .as_deref()
        .and_then(|p| p.extension())
        .and_then(|e| e.to_str())
        .map(str::to_ascii_lowercase);
    let format = match (a.format.as_deref(), ext.as_deref()) {
        (Some("jsonl"), _) | (None, Some("jsonl" | "ndjson")) => Format::Jsonl,
        _ => Format::Csv,
    };
    let kind = match a.what.as_str() {
        "events" => Kind::Events,
        "lab" => Kind::Lab,
        _ => Kind::Readings,
    };
    if let Some(out) = &a.out {
        if out.exists() || out.is_symlink() {
            return Err(usage(format!(
                "--out {}: the file exists and is never overwritten; choose another name or move it away",
                out.display()
            )));
        }
        let dir = match out.parent() {
            Some(d) if !d.as_os_str().is_empty() => d,
            _ => std::path::Path::new("."),
        };
        if !dir.is_dir() {
            return Err(usage(format!(
                "--out {}: the folder {} does not exist",
                out.display(),
                dir.display()
            )));
        }
    }
    let db = db_of(a.db.as_ref(), cfg)?;
    let store = open_to_read(&db)?;
    let label = db_label(&db);
    let sel = Selection {
        serials: a.devices.clone(),
        from_ms: a.from,
        to_ms: a.to,
    };

    let bar = if std::io::stderr().is_terminal() {
        indicatif::ProgressBar::new_spinner()
    } else {
        indicatif::ProgressBar::hidden()
    };
    bar.set_style(
        indicatif::ProgressStyle::with_template("{spinner} exporting {msg}: {pos} rows {per_sec}")
            .unwrap_or_else(|_| indicatif::ProgressStyle::default_spinner()),
    );
    bar.set_message(kind.as_str());
    let mut progress = |n: u64| bar.set_position(n);

    let summary = match &a.out {
        None => {
            let mut w = std::io::BufWriter::new(std::io::stdout().lock());
            let s = store.consistent(|s| {
                export::export(s, &label, kind, &sel, format, &mut w, &mut progress)
            })??;
            w.flush()?;
            s
        }
        Some(out) => {
            let mut name = out.file_name().unwrap_or_default().to_os_string();
            name.push(format!(".partial-{}", std::process::id()));
            let partial = out.with_file_name(name);
            let file = std::fs::OpenOptions::new()
                .write(true)
                .create_new(true)
                .open(&partial)
                .with_context(|| format!("cannot create {}", partial.display()))?;
            let mut w = std::io::BufWriter::new(file);
            let done = store
                .consistent(|s| {
                    export::export(s, &label, kind, &sel, format, &mut w, &mut progress)
                })
                .map_err(anyhow::Error::from)
                .and_then(|r| r.map_err(anyhow::Error::from))
                .and_then(|s| {
                    let f = w.into_inner().map_err(|e| e.into_error())?;
                    f.sync_all()?;
                    Ok(s)
                })
                .and_then(|s| {
                    // A hard link fails if the name was taken meanwhile: never a clobber.
                    // A file system without hard links (a FAT-formatted USB
                    // stick) gets a rename after one more check of the name.
                    match std::fs::hard_link(&partial, out) {
                        Ok(()) => {}
                        Err(e) if e.kind() == std::io::ErrorKind::AlreadyExists || out.exists() => {
                            return Err(anyhow::Error::new(e).context(format!(
                                "cannot put the export at {}: the name was taken meanwhile",
                                out.display()
                            )))
                        }
                        Err(_) => std::fs::rename(&partial, out).with_context(|| {
                            format!("cannot put the export at {}", out.display())
                        })?,
                    }
                    Ok(s)
                });
            let _ = std::fs::remove_file(&partial);
            done?
        }
    };
    bar.finish_and_clear();

    let range = match (summary.first_unix_ms, summary.last_unix_ms) {
        (Some(f), Some(l)) => format!(" taken {} to {}", fmt_person(f), fmt_person(l)),
        _ => String::new(),
    };
    let devices: Vec<String> = summary
        .per_device
        .iter()
        .map(|(d, n)| format!("{d} {n}"))
        .collect();
    let dest = a
        .out
        .as_ref()
        .map_or_else(|| "stdout".to_string(), |p| p.display().to_string());
    let mut text = format!(
        "exported {} {}{range} ({}) from {label} to {dest}",
        summary.rows,
        kind.as_str(),
        devices.join(", ")
    );
    if summary.untimed_left_out > 0 {
        text.push_str(&format!(
            "\n  {} {} without a wall-clock time (device clock never set, no clock event stored) left out of the range",
            summary.untimed_left_out,
            kind.as_str()
        ));
    }
    if a.out.is_none() {
        eprintln!("{text}");
    } else if a.json {
        crate::out::json(&json!({
            "file": dest,
            "format": match format { Format::Csv => "csv", Format::Jsonl => "jsonl" },
            "what": a.what,
            "rows": summary.rows,
            "per_device": summary.per_device,
            "untimed_left_out": summary.untimed_left_out,
            "first_utc": summary.first_unix_ms.map(crate::timefmt::fmt_time),
            "last_utc": summary.last_unix_ms.map(crate::timefmt::fmt_time),
        }))?;
    } else {
        crate::outln!("{text}");
    }
    Ok(())
}
