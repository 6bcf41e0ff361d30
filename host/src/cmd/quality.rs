//! Dispatch of the calibration, lab, drift, report, audit and demo commands
//! (their argument structs live in their own modules).

use clap::{Args, Subcommand};

use super::cal::{self, AdjustArgs, FitArgs, PredictArgs};
use crate::config::LineConfig;
use crate::device_cal::{self, CaptureArgs, CellArgs, ListArgs, PushArgs, SelectArgs, Terminal};
use crate::product_file::ProductFile;
use crate::quality::{self, HistoryArgs, LabArgs, LabCommand};
use crate::store::Store;

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

/// Runs `fringe cal ...`.
///
/// # Errors
/// The command's error.
pub fn cal(a: &CalArgs, cfg: &LineConfig) -> anyhow::Result<()> {
    match &a.command {
        CalCommand::Fit(f) => cal::run_fit(f),
        CalCommand::Predict(p) => cal::run_predict(p),
        CalCommand::Adjust(a) => cal::run_adjust(a),
        CalCommand::History(h) => quality::history(h),
        CalCommand::Cell(c) => {
            let key = device_cal::load_key(&c.key.key_file)?;
            let mut store = Store::open(&c.db)?;
            let mut link = super::connect(&c.port, cfg)?;
            super::sync_clock(&mut link, Some(&key), "cal cell")?;
            let now_s = (crate::store::now_unix_ms() / 1000).max(0) as u64;
            let o = device_cal::cell_calibration(
                &mut link,
                &key,
                &mut store,
                &mut Terminal,
                c,
                now_s,
                &mut |s| eprintln!("  {s}"),
            )?;
            crate::outln!(
                "cell calibration {} written to {} (was {}), recorded in {}",
                o.cal.content_id(),
                link.serial_number(),
                o.old,
                c.db.display()
            );
            Ok(())
        }
        CalCommand::Capture(c) => {
            let mut link = super::connect(&c.port, cfg)?;
            super::sync_clock(&mut link, None, "cal capture")?;
            let n = device_cal::capture(&mut link, c, &mut Terminal)?;
            crate::outln!("{n} sample(s) written to {}", c.out.display());
            Ok(())
        }
        CalCommand::Push(p) => {
            let (mut file, wire) = ProductFile::load(&p.cal)?;
            let overridden = device_cal::push_gate(&p.cal, &file, p.force)?;
            file.statistics.gate_overridden.extend(overridden);
            let key = device_cal::load_key(&p.key.key_file)?;
            let mut store = Store::open(&p.db)?;
            let mut link = super::connect(&p.port, cfg)?;
            super::sync_clock(&mut link, Some(&key), "cal push")?;
            let o = device_cal::push(
                &mut link,
                &key,
                &mut store,
                &mut Terminal,
                &file,
                &wire,
                p.slot,
                p.activate,
                &p.operator,
                &p.reason,
                p.yes,
            )?;
            crate::outln!(
                "slot {}: {} -> {} written, read back and verified; audit record at chain position {} of {}",
                o.slot,
                o.old,
                o.new,
                o.position,
                p.db.display()
            );
            Ok(())
        }
        CalCommand::List(l) => {
            let mut link = super::connect(&l.port, cfg)?;
            super::sync_clock(&mut link, None, "cal list")?;
            let (slots, active) = device_cal::list_slots(&mut link)?;
            device_cal::print_slots(&slots, active, l.json)?;
            Ok(())
        }
        CalCommand::Select(s) => {
            let key = device_cal::load_key(&s.key.key_file)?;
            let mut store = Store::open(&s.db)?;
            let mut link = super::connect(&s.port, cfg)?;
            super::sync_clock(&mut link, Some(&key), "cal select")?;
            let (slot, id) = device_cal::select(
                &mut link,
                &key,
                &mut store,
                &mut Terminal,
                &s.product,
                &s.operator,
                &s.reason,
                s.yes,
            )?;
            crate::outln!(
                "slot {slot} ({id}) is now active on {}; recorded in {}",
                link.serial_number(),
                s.db.display()
            );
            Ok(())
        }
    }
}

/// Runs `fringe lab ...`.
///
/// # Errors
/// The command's error.
pub fn lab(a: &LabArgs) -> anyhow::Result<()> {
    match &a.command {
        LabCommand::Add(x) => quality::lab_add(x),
    }
}
