//! `fringe pull`: store every reading the device log still holds that the
//! database lacks (before, between and after what it holds:
//! [`crate::session::plan_backfill`]) and the events after the last stored
//! one, with a progress bar; idempotent (run it as often as you like). With
//! the device key it first sets the device clock when it is unset or off
//! by more than a second.

use std::time::Instant;

use anyhow::Context;
use indicatif::{ProgressBar, ProgressStyle};

use super::ingest::{backfill_missing, pull_events};
use crate::cli::PullArgs;
use crate::config::LineConfig;
use crate::out;
use crate::store::Batcher;

/// What a pull did.
#[derive(Debug, Clone, serde::Serialize)]
pub struct PullSummary {
    /// Device serial.
    pub serial: String,
    /// The device log: first sequence held, and readings held.
    pub log_first: String,
    /// Readings the device log holds.
    pub log_len: u32,
    /// The device clock before, and whether it was set.
    pub clock: crate::session::ClockSync,
    /// Readings received.
    pub received: u64,
    /// Readings newly stored.
    pub stored: u64,
    /// Readings already stored.
    pub duplicates: u64,
    /// Readings the device log no longer held.
    pub lost: u64,
    /// Events newly stored.
    pub events_stored: u64,
    /// Damaged frames on the link.
    pub link_errors: u32,
    /// Wall time, ms.
    pub elapsed_ms: u64,
}

/// `fringe pull`.
///
/// # Errors
/// Port, link, database and output errors, each with its exit code.
pub fn pull(args: &PullArgs, cfg: &LineConfig) -> anyhow::Result<()> {
    let t0 = Instant::now();
    let (_, mut store) = super::open_db(args.db.as_deref(), cfg)?;
    let key = super::optional_key(args.key_file.as_deref(), cfg)?;
    let mut link = super::connect(&args.port, cfg)?;
    let id = link
        .identity()
        .cloned()
        .context("no identity after the handshake")?;
    let serial = super::register(&mut store, &id)?;
    let clock = super::sync_clock(&mut link, key.as_ref(), "pull")?;
    let status = super::request_status(&mut link)?;
    // Readings to expect: those the log holds that the database lacks (the
    // device goes on measuring meanwhile; the bar grows if it must).
    let held = store.count_between(&serial, status.log_first, status.next_seq)?;
    let expected = u64::from(status.log_len).saturating_sub(held);
    let bar = if args.json {
        ProgressBar::hidden()
    } else {
        ProgressBar::new(expected)
    };
    bar.set_style(
        ProgressStyle::with_template(
            "{prefix} [{bar:40}] {pos}/{len} readings {per_sec} eta {eta}",
        )
        .unwrap_or_else(|_| ProgressStyle::default_bar())
        .progress_chars("=> "),
    );
    bar.set_prefix(format!("pulling {serial}"));
    let mut batcher = Batcher::new(&serial);
    let b = backfill_missing(
        &mut link,
        &mut store,
        &mut batcher,
        &serial,
        None,
        &mut |n, _| {
            if n > bar.length().unwrap_or(0) {
                bar.set_length(n);
            }
            bar.set_position(n);
        },
    );
    // Commit what came even if the link failed half way.
    let flushed = batcher.flush(&mut store);
    bar.finish_and_clear();
    let b = b?;
    flushed?;
    let events_from = store
        .last_event(&serial)?
        .map_or(0, |n| n.saturating_add(1));
    let ev = pull_events(&mut link, &mut store, &serial, events_from)?;
    let total = batcher.total();
    let summary = PullSummary {
        serial,
        log_first: status.log_first.to_string(),
        log_len: status.log_len,
        clock,
        received: b.received,
        stored: total.inserted,
        duplicates: total.duplicates + total.conflicts,
        lost: b.lost,
        events_stored: ev.inserted,
        link_errors: link.stats().damaged,
        elapsed_ms: t0.elapsed().as_millis() as u64,
    };
    if args.json {
        out::json(&serde_json::to_value(&summary)?)?;
    } else {
        out::line(&format!(
            "{}: device log {} readings from {}; {} received, {} stored, {} already stored, {} lost; {} events stored ({})",
            summary.serial,
            summary.log_len,
            summary.log_first,
            summary.received,
            summary.stored,
            summary.duplicates,
            summary.lost,
            summary.events_stored,
            out::duration_ms(summary.elapsed_ms)
        ))?;
    }
    Ok(())
}
