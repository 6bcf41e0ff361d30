//! `fringe cal ...` and `fringe lab ...`: the command lines, and the
//! terminal around `fringe_quality` (fit, predict, adjust, history) and
//! `fringe_device` (cell, capture, push, list, select).

use std::path::PathBuf;

use clap::{Args, Subcommand};
use fringe_device::product::{self, Push};
use fringe_quality::product_file::ProductFile;
use serde_json::json;

use super::cal::{self, AdjustArgs, FitArgs, PredictArgs};
use crate::cli::PortArgs;
use crate::config::LineConfig;
use crate::quality::{self, HistoryArgs, LabArgs, LabCommand};
use crate::terminal::Terminal;

/// `fringe cal`.
#[derive(Debug, Clone, Args)]
pub struct CalArgs {
    /// What to do.
    #[command(subcommand)]
    pub command: CalCommand,
}

/// `fringe cal ...`.
#[derive(Debug, Clone, Subcommand)]
pub enum CalCommand {
    /// Fit a product calibration from reference samples (statistics, outliers, valid ranges).
    Fit(FitArgs),
    /// Evaluate a product calibration on a sample table exactly as the device does.
    Predict(PredictArgs),
    /// Bias/slope check of a calibration against lab pairs (ISO 12099 tests); write the corrected one.
    Adjust(AdjustArgs),
    /// Bench cell calibration: air, a reference liquid, verification with a further liquid.
    Cell(CellArgs),
    /// Record reference samples from a connected device.
    Capture(CaptureArgs),
    /// Write a product calibration to the device (authenticated, read back, audited).
    Push(PushArgs),
    /// List the product calibrations on the device and which is active.
    List(ListArgs),
    /// Switch the active product (authenticated, audited).
    Select(SelectArgs),
    /// Every calibration change recorded in a database.
    History(HistoryArgs),
}

/// Where the device key comes from.
#[derive(Debug, Clone, Args)]
pub struct KeyArgs {
    /// File holding the device's write key as 64 hex digits (keep it like a
    /// password) [default: `key_file` in the line file].
    #[arg(long, value_name = "FILE")]
    pub key_file: Option<PathBuf>,
}

/// `fringe cal cell`.
#[derive(Debug, Clone, Args)]
#[command(
    after_help = "Example:\n  fringe cal cell --port /dev/ttyUSB0 --key-file hgm-l2-0007.key --db line2.db \\\n      --liquid methanol --verify-liquid ethanol --temperature-c 21.4 --operator \"R. Okafor\""
)]
pub struct CellArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// The key.
    #[command(flatten)]
    pub key: KeyArgs,
    /// Database that records the calibration [default: `db` in the line file].
    #[arg(long, value_name = "FILE")]
    pub db: Option<PathBuf>,
    /// Reference liquid for the second point (from the calibration crate's table).
    #[arg(long, default_value = "methanol")]
    pub liquid: String,
    /// A further liquid to verify with.
    #[arg(long, default_value = "ethanol")]
    pub verify_liquid: String,
    /// Liquid temperature, C, measured with a thermometer [default: the device's temperature reading].
    #[arg(long)]
    pub temperature_c: Option<f64>,
    /// Readings averaged per step.
    #[arg(long, default_value_t = 8, value_parser = clap::value_parser!(u32).range(1..=200))]
    pub readings: u32,
    /// Who does the calibration.
    #[arg(long)]
    pub operator: String,
    /// Do not ask before writing.
    #[arg(long)]
    pub yes: bool,
}

/// `fringe cal capture`.
#[derive(Debug, Clone, Args)]
#[command(after_help = "Example:\n  fringe cal capture --port /dev/ttyUSB0 --out lab-2026-11.csv")]
pub struct CaptureArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// Reference-sample table to write (appended to if it exists).
    #[arg(long, value_name = "FILE.csv")]
    pub out: PathBuf,
    /// Readings averaged per sample.
    #[arg(long, default_value_t = 5, value_parser = clap::value_parser!(u32).range(1..=200))]
    pub readings: u32,
}

/// `fringe cal push`.
#[derive(Debug, Clone, Args)]
#[command(
    after_help = "Example:\n  fringe cal push --port /dev/ttyUSB0 --key-file hgm-l2-0007.key --db line2.db \\\n      --cal wheat-l2.toml --operator \"R. Okafor\" --reason \"new wheat crop, 40 samples\""
)]
pub struct PushArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// The key.
    #[command(flatten)]
    pub key: KeyArgs,
    /// Product calibration (TOML from `fringe cal fit`).
    #[arg(long, value_name = "PRODUCT.toml")]
    pub cal: PathBuf,
    /// Database that records the change [default: `db` in the line file].
    #[arg(long, value_name = "FILE")]
    pub db: Option<PathBuf>,
    /// Product slot [default: the slot holding this product name, else the first free one].
    #[arg(long, value_parser = clap::value_parser!(u8).range(0..8))]
    pub slot: Option<u8>,
    /// Who makes the change.
    #[arg(long)]
    pub operator: String,
    /// Why.
    #[arg(long)]
    pub reason: String,
    /// Make it the active product too.
    #[arg(long, default_value_t = true, action = clap::ArgAction::Set)]
    pub activate: bool,
    /// Do not ask for confirmation.
    #[arg(long)]
    pub yes: bool,
    /// Push even if the calibration fails the quality gate (RPD < 2, R^2 < 0.8,
    /// fewer than 5 samples per parameter); the override is kept in the audit record.
    #[arg(long)]
    pub force: bool,
}

/// `fringe cal list`.
#[derive(Debug, Clone, Args)]
pub struct ListArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// Print JSON.
    #[arg(long)]
    pub json: bool,
}

/// `fringe cal select`.
#[derive(Debug, Clone, Args)]
#[command(
    after_help = "Example:\n  fringe cal select --port /dev/ttyUSB0 --key-file k.key --db line2.db \"HM barley L2\" --operator \"R. Okafor\" --reason \"product change\""
)]
pub struct SelectArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// The key.
    #[command(flatten)]
    pub key: KeyArgs,
    /// Database that records the change [default: `db` in the line file].
    #[arg(long, value_name = "FILE")]
    pub db: Option<PathBuf>,
    /// Product name or slot number.
    pub product: String,
    /// Who makes the change.
    #[arg(long)]
    pub operator: String,
    /// Why.
    #[arg(long)]
    pub reason: String,
    /// Do not ask for confirmation.
    #[arg(long)]
    pub yes: bool,
}

/// The device key from `--key-file` or the line file (required).
fn key(k: &KeyArgs, cfg: &LineConfig, what: &str) -> anyhow::Result<fringe_protocol::auth::Key> {
    super::optional_key(k.key_file.as_deref(), cfg)?.ok_or_else(|| {
        anyhow::anyhow!(
            "{what} needs the device key: pass --key-file or set key_file in the line file"
        )
    })
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
                readings: c.readings,
                operator: c.operator.clone(),
                yes: c.yes,
                made_s: now_s(),
            };
            fringe_device::cell::liquid(&opts.liquid)?;
            fringe_device::cell::liquid(&opts.verify_liquid)?;
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
            let n = fringe_device::capture::capture(&mut link, &c.out, c.readings, &mut Terminal)?;
            crate::outln!("{n} sample(s) written to {}", c.out.display());
            Ok(())
        }
        CalCommand::Push(p) => {
            let (mut file, wire) = ProductFile::load(&p.cal)?;
            let overridden = product::push_gate(&p.cal, &file, p.force)?;
            file.statistics.gate_overridden.extend(overridden);
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
        crate::outln!("{}", json!({ "slots": v, "active": active }));
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
