//! Reading the device's stored log and events into the store (backfill),
//! shared by `fringe monitor` (at start, and gaps in the stream) and
//! `fringe pull` (everything the database lacks, before, between and after
//! what it holds: [`crate::session::plan_backfill`]).

use std::time::Instant;

use fringe_protocol::{Request, Response, Seq, EVENT_CHUNK, LOG_CHUNK};

use crate::link::{Link, LinkError};
use crate::store::{Batcher, InsertStats, Source, Store};

/// The sequence right after `s` in the same boot.
pub fn next_seq(s: Seq) -> Seq {
    Seq {
        boot: s.boot,
        counter: s.counter.saturating_add(1),
    }
}

/// What a backfill did.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, serde::Serialize)]
pub struct Backfill {
    /// Readings received from the device log.
    pub received: u64,
    /// Readings the device log no longer held (overwritten before they were pulled).
    pub lost: u64,
    /// Log requests made.
    pub requests: u64,
    /// Last sequence received.
    #[serde(skip)]
    pub last: Option<Seq>,
}

/// Reads the device log from `from` (inclusive) up to `until` (exclusive;
/// `None` = to its end) into `batcher`, committing whenever a batch falls
/// due. `progress` gets the count received so far and the last sequence
/// queued, after every chunk (so a caller keeps the progress of a backfill
/// that a link error cut short).
///
/// # Errors
/// Link errors (the readings already queued stay in the batcher) and store errors.
pub fn backfill(
    link: &mut Link,
    store: &mut Store,
    batcher: &mut Batcher,
    from: Seq,
    until: Option<Seq>,
    progress: &mut dyn FnMut(u64, Option<Seq>),
) -> anyhow::Result<Backfill> {
    let mut out = Backfill::default();
    let mut at = from;
    loop {
        if until.is_some_and(|u| at >= u) {
            break;
        }
        let resp = link.request(Request::ReadLog {
            from: at,
            max: LOG_CHUNK as u8,
        })?;
        out.requests += 1;
        let Response::Log {
            readings,
            next,
            end,
        } = resp
        else {
            return Err(LinkError::Unexpected {
                request: "ReadLog",
                got: format!("{resp:?}"),
            }
            .into());
        };
        if let Some(first) = readings.first() {
            // Counters the device no longer holds (same boot only: across
            // boots the number of readings in between is not known).
            if first.seq.boot == at.boot && first.seq.counter > at.counter {
                let stop = until
                    .filter(|u| u.boot == at.boot)
                    .map_or(first.seq.counter, |u| u.counter.min(first.seq.counter));
                out.lost += u64::from(stop.saturating_sub(at.counter));
            }
        }
        let now = Instant::now();
        for r in &readings {
            if r.seq < at || until.is_some_and(|u| r.seq >= u) {
                continue;
            }
            batcher.push(*r, Source::Log, now);
            out.received += 1;
            out.last = Some(r.seq);
        }
        progress(out.received, out.last);
        if batcher.due(Instant::now()) {
            batcher.flush(store)?;
        }
        if end || readings.is_empty() || next <= at {
            break;
        }
        at = next;
    }
    Ok(out)
}

/// Reads every part of the device log the store lacks for `serial` (before,
/// between and after the runs it holds), up to `until` (exclusive; `None`:
/// the end of the log), through `batcher`. `progress` gets the count
/// received so far and the last sequence queued.
///
/// # Errors
/// As [`backfill`]; what was queued stays in the batcher.
pub fn backfill_missing(
    link: &mut Link,
    store: &mut Store,
    batcher: &mut Batcher,
    serial: &str,
    until: Option<Seq>,
    progress: &mut dyn FnMut(u64, Option<Seq>),
) -> anyhow::Result<Backfill> {
    // What is still waiting in the batcher counts as stored.
    batcher.flush(store)?;
    let runs = store.runs(serial)?;
    let mut total = Backfill::default();
    for r in crate::session::plan_backfill(&runs, until) {
        let base = total.received;
        let last = total.last;
        let b = backfill(link, store, batcher, r.from, r.until, &mut |n, l| {
            progress(base + n, l.or(last))
        })?;
        total.received += b.received;
        total.lost += b.lost;
        total.requests += b.requests;
        total.last = b.last.or(total.last);
    }
    Ok(total)
}

/// Reads the device's events from number `from` on and stores them.
///
/// # Errors
/// Link and store errors.
pub fn pull_events(
    link: &mut Link,
    store: &mut Store,
    serial: &str,
    from: u32,
) -> anyhow::Result<InsertStats> {
    let mut total = InsertStats::default();
    let mut at = from;
    loop {
        let resp = link.request(Request::ReadEvents {
            from: at,
            max: EVENT_CHUNK as u8,
        })?;
        let Response::Events { events, next, end } = resp else {
            return Err(LinkError::Unexpected {
                request: "ReadEvents",
                got: format!("{resp:?}"),
            }
            .into());
        };
        if !events.is_empty() {
            total += store.insert_events(serial, &events)?;
        }
        if end || events.is_empty() || next <= at {
            break;
        }
        at = next;
    }
    Ok(total)
}
