//! `fringe cal ...` and `fringe lab ...`: the command lines, and the
//! terminal around `fringe_quality` (fit, predict, adjust, history) and
//! `fringe_device` (cell, capture, push, list, select).

use fringe_device::product::{self, Push};
use fringe_quality::product_file::ProductFile;
use serde_json::json;

use super::cal::{self};
pub use crate::cli::calcmd::{
    CalArgs, CalCommand, CaptureArgs, CellArgs, KeyArgs, ListArgs, PushArgs, SelectArgs,
};
use crate::config::LineConfig;
use crate::quality::{self, LabArgs, LabCommand};
use crate::terminal::Terminal;

/// The device key from `--key-file` or the line file (required).
fn key(k: &KeyArgs, cfg: &LineConfig, what: &str) -> anyhow::Result<fringe_protocol::auth::Key> {
    super::optional_key(k.key_file.as_deref(), cfg)?.ok_or_else(|| super::missing_key(what))
}

fn now_s() -> u64 {
    (crate::store::now_unix_ms() / 1000).max(0) as u64
}

/// Runs `fringe cal ...`.
///
/// # Errors
/// The command's error.
pub fn cal(a: &CalArgs, cfg: &LineConfig) -> anyhow::Result<()> {
    match &a.command {
        CalCommand::Fit(f) => cal::run_fit(f),
        CalCommand::Predict(p) => cal::run_predict(p),
        CalCommand::Adjust(a) => cal::run_adjust(a),
        CalCommand::History(h) => quality::history(h, cfg),
        CalCommand::Cell(c) => {
            let opts = fringe_device::cell::CellOptions {
                liquid: c.liquid.clone(),
                verify_liquid: c.verify_liquid.clone(),
                temperature_c: c.temperature_c,
                verify_temperature_c: c.verify_temperature_c,
                readings: c.readings,
                operator: c.operator.clone(),
                yes: c.yes,
                made_s: now_s(),
            };
            for (flag, name) in [
                ("--liquid", &opts.liquid),
                ("--verify-liquid", &opts.verify_liquid),
            ] {
                fringe_device::cell::liquid(name)
                    .map_err(|e| anyhow::Error::new(e).context(format!("{flag} {name}")))?;
            }
            let key = key(&c.key, cfg, "a cell calibration")?;
            let db = super::db_path(c.db.as_deref(), cfg)?;
            let mut link = super::connect(&c.port, cfg)?;
            super::with_db(&db, |store| {
                super::sync_clock(&mut link, Some(&key), "cal cell")?;
                let o = fringe_device::cell::cell_calibration(
                    &mut link,
                    &key,
                    store,
                    &mut Terminal,
                    &opts,
                )?;
                if c.json {
                    crate::out::json(&json!({
                        "serial": link.serial_number(),
                        "cal_id": o.cal.content_id().to_string(),
                        "replaced": o.old.to_string(),
                        "database": db.display().to_string(),
                        "position": o.position,
                        "points": o.cal.points.iter().map(|p| json!({
                            "freq_hz": p.freq_hz,
                            "stray_pf": p.stray_pf,
                            "cell_pf": p.cell_pf,
                            "g_offset_s": p.g_offset_s,
                        })).collect::<Vec<_>>(),
                        "verification": o.verification.iter().map(|v| json!({
                            "freq_hz": v.0,
                            "measured_eps_re": v.1,
                            "expected_eps_re": v.2,
                            "error": v.3,
                            "within_tolerance": v.4,
                        })).collect::<Vec<_>>(),
                    }))?;
                    return Ok(());
                }
                crate::outln!(
                    "cell calibration {} written to {} (was {}), recorded in {}",
                    o.cal.content_id(),
                    link.serial_number(),
                    o.old,
                    db.display()
                );
                Ok(())
            })
        }
        CalCommand::Capture(c) => {
            let mut link = super::connect(&c.port, cfg)?;
            super::sync_clock(&mut link, None, "cal capture")?;
            let n = fringe_device::capture::capture(
                &mut link,
                &c.out,
                c.readings,
                fringe_quality::samples::basis_named(&c.basis),
                &mut Terminal,
            )?;
            if c.json {
                crate::out::json(&json!({
                    "serial": link.serial_number(),
                    "samples": n,
                    "file": c.out.display().to_string(),
                }))?;
            } else {
                crate::outln!("{n} sample(s) written to {}", c.out.display());
            }
            Ok(())
        }
        CalCommand::Push(p) => {
            let (mut file, wire) = ProductFile::load(&p.cal)?;
            let overridden = product::push_gate(&p.cal, &file, p.force)?;
            file.statistics.gate_overridden.extend(overridden);
            if !file.statistics.gate_overridden.is_empty() {
                eprintln!(
                    "fringe cal push: caution: {} fails the quality gate and is pushed with --force; the audit record keeps:",
                    p.cal.display()
                );
                for r in &file.statistics.gate_overridden {
                    eprintln!("  {r}");
                }
            }
            let key = key(&p.key, cfg, "a push")?;
            let db = super::db_path(p.db.as_deref(), cfg)?;
            let mut link = super::connect(&p.port, cfg)?;
            super::with_db(&db, |store| {
                super::sync_clock(&mut link, Some(&key), "cal push")?;
                let o = product::push(
                    &mut link,
                    &key,
                    store,
                    &mut Terminal,
                    &Push {
                        file: &file,
                        wire: &wire,
                        slot: p.slot,
                        activate: p.activate,
                        operator: &p.operator,
                        reason: &p.reason,
                        yes: p.yes,
                    },
                )?;
                if p.json {
                    crate::out::json(&json!({
                        "serial": link.serial_number(),
                        "slot": o.slot,
                        "replaced": o.old.to_string(),
                        "cal_id": o.new.to_string(),
                        "active": p.activate,
                        "position": o.position,
                        "database": db.display().to_string(),
                        "gate_overridden": file.statistics.gate_overridden,
                    }))?;
                    return Ok(());
                }
                crate::outln!(
                    "slot {}: {} -> {} written, read back and verified; audit record at chain position {} of {}",
                    o.slot,
                    o.old,
                    o.new,
                    o.position,
                    db.display()
                );
                Ok(())
            })
        }
        CalCommand::List(l) => {
            let mut link = super::connect(&l.port, cfg)?;
            super::sync_clock(&mut link, None, "cal list")?;
            let (slots, active) = product::list_slots(&mut link)?;
            print_slots(&slots, active, l.json)
        }
        CalCommand::Select(s) => {
            let key = key(&s.key, cfg, "selecting a product")?;
            let db = super::db_path(s.db.as_deref(), cfg)?;
            let mut link = super::connect(&s.port, cfg)?;
            super::with_db(&db, |store| {
                super::sync_clock(&mut link, Some(&key), "cal select")?;
                let (slot, id) = product::select(
                    &mut link,
                    &key,
                    store,
                    &mut Terminal,
                    &s.product,
                    &s.operator,
                    &s.reason,
                    s.yes,
                )?;
                if s.json {
                    crate::out::json(&json!({
                        "serial": link.serial_number(),
                        "slot": slot,
                        "cal_id": id.to_string(),
                        "database": db.display().to_string(),
                    }))?;
                    return Ok(());
                }
                crate::outln!(
                    "slot {slot} ({id}) is now active on {}; recorded in {}",
                    link.serial_number(),
                    db.display()
                );
                Ok(())
            })
        }
    }
}

/// Prints the slot list.
fn print_slots(
    slots: &[fringe_protocol::SlotInfo],
    active: Option<u8>,
    as_json: bool,
) -> anyhow::Result<()> {
    if as_json {
        let v: Vec<_> = slots
            .iter()
            .map(|s| json!({"slot": s.slot, "name": s.name.as_str(), "id": s.id.to_string(), "model": format!("{:?}", s.model), "active": active == Some(s.slot)}))
            .collect();
        crate::out::json(&json!({ "slots": v, "active": active }))?;
        return Ok(());
    }
    if slots.is_empty() {
        crate::outln!("no product calibration on the device");
    }
    for s in slots {
        crate::outln!(
            "{} slot {} {:<16} {} {:?}",
            if active == Some(s.slot) { "*" } else { " " },
            s.slot,
            s.name.as_str(),
            s.id,
            s.model
        );
    }
    Ok(())
}

/// Runs `fringe lab ...`.
///
/// # Errors
/// The command's error.
pub fn lab(a: &LabArgs, cfg: &LineConfig) -> anyhow::Result<()> {
    match &a.command {
        LabCommand::Add(x) => quality::lab_add(x, cfg),
    }
}
