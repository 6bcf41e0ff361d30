//! `fringe pull`: read the device's stored log and events from the last
//! stored ones on, with a progress bar; idempotent (run it as often as you like).

use std::time::Instant;

use anyhow::Context;
use fringe_protocol::Seq;
use indicatif::{ProgressBar, ProgressStyle};

use super::ingest::{backfill, next_seq, pull_events};
use crate::cli::PullArgs;
use crate::config::LineConfig;
use crate::out;
use crate::store::Batcher;

/// What a pull did.
#[derive(Debug, Clone, Default, serde::Serialize)]
pub struct PullSummary {
    /// Device serial.
    pub serial: String,
    /// First sequence asked for.
    pub from: String,
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
    let mut link = super::connect(&args.port, cfg)?;
    let id = link
        .identity()
        .cloned()
        .context("no identity after the handshake")?;
    let serial = super::register(&mut store, &id)?;
    let from = store.last_seq(&serial)?.map_or(
        Seq {
            boot: 0,
            counter: 0,
        },
        next_seq,
    );
    let status = super::request_status(&mut link)?;
    // Readings to expect: all of the log if we start before it, else the
    // part of this boot after `from`.
    let expected = if from <= status.log_first {
        u64::from(status.log_len)
    } else if from.boot == status.next_seq.boot {
        u64::from(status.next_seq.counter.saturating_sub(from.counter))
    } else {
        u64::from(status.log_len)
    };
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
    let b = backfill(
        &mut link,
        &mut store,
        &mut batcher,
        from,
        None,
        &mut |n, _| {
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
        from: from.to_string(),
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
            "{}: {} readings from {} received, {} stored, {} already stored, {} lost; {} events stored ({})",
            summary.serial,
            summary.received,
            summary.from,
            summary.stored,
            summary.duplicates,
            summary.lost,
            summary.events_stored,
            out::duration_ms(summary.elapsed_ms)
        ))?;
    }
    Ok(())
}
