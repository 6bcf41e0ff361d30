//! Reading the device's stored log and events into the store (backfill):
//! at the start of a session, for a gap in the stream, and for a pull of
//! everything the database lacks, before, between and after what it holds
//! ([`plan_backfill`]).

use std::time::Instant;

use fringe_link::{Link, LinkError};
use fringe_protocol::{Reading, Request, Response, Seq, EVENT_CHUNK, LOG_CHUNK};
use fringe_store::{Batcher, InsertStats, RecordStore, Source};

use crate::error::LineError;

/// A range of the device log to read: from `from` (inclusive) to `until`
/// (exclusive; `None`: to the end of the log).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct LogRange {
    /// First sequence wanted.
    pub from: Seq,
    /// First sequence not wanted.
    pub until: Option<Seq>,
}

/// The parts of the device log a database lacks, given the runs of
/// consecutive readings it holds (`(first, last)` within one boot, in
/// order, from `RecordRead::runs`): before the first run, between
/// runs and after the last, limited to `until` (exclusive; `None`: the end
/// of the log). The device answers a `ReadLog` from the first reading it
/// still holds at or after `from`, so a range that starts before the log
/// does costs nothing extra; readings it no longer holds are reported lost
/// by the backfill.
pub fn plan_backfill(runs: &[(Seq, Seq)], until: Option<Seq>) -> Vec<LogRange> {
    let mut out = Vec::new();
    let mut at = Seq::default();
    for &(first, last) in runs {
        if first > at {
            let end = until.map_or(first, |u| u.min(first));
            if end > at {
                out.push(LogRange {
                    from: at,
                    until: Some(end),
                });
            }
        }
        at = at.max(next_seq(last));
    }
    if until.is_none_or(|u| u > at) {
        out.push(LogRange { from: at, until });
    }
    out
}

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
/// due. `each` gets every reading as it is queued; `progress` the count
/// received so far and the last sequence queued, after every chunk (so a
/// caller keeps the progress of a backfill that a link error cut short).
///
/// # Errors
/// Link errors (the readings already queued stay in the batcher) and store errors.
pub fn backfill(
    link: &mut Link,
    store: &mut (impl RecordStore + ?Sized),
    batcher: &mut Batcher,
    from: Seq,
    until: Option<Seq>,
    each: &mut dyn FnMut(&Reading),
    progress: &mut dyn FnMut(u64, Option<Seq>),
) -> Result<Backfill, LineError> {
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
            each(r);
            out.received += 1;
            out.last = Some(r.seq);
        }
        progress(out.received, out.last);
        if batcher.due(Instant::now()) {
            batcher.flush(store).map_err(LineError::Commit)?;
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
/// the end of the log), through `batcher`. `each` gets every reading as
/// it is queued; `progress` the count received so far and the last
/// sequence queued.
///
/// # Errors
/// As [`backfill`]; what was queued stays in the batcher.
pub fn backfill_missing(
    link: &mut Link,
    store: &mut (impl RecordStore + ?Sized),
    batcher: &mut Batcher,
    serial: &str,
    until: Option<Seq>,
    each: &mut dyn FnMut(&Reading),
    progress: &mut dyn FnMut(u64, Option<Seq>),
) -> Result<Backfill, LineError> {
    // What is still waiting in the batcher counts as stored.
    batcher.flush(store).map_err(LineError::Commit)?;
    let runs = store.runs(serial)?;
    let mut total = Backfill::default();
    for r in plan_backfill(&runs, until) {
        let base = total.received;
        let last = total.last;
        let b = backfill(link, store, batcher, r.from, r.until, each, &mut |n, l| {
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
    store: &mut (impl RecordStore + ?Sized),
    serial: &str,
    from: u32,
) -> Result<InsertStats, LineError> {
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

#[cfg(test)]
mod tests {
    use super::*;

    fn seq(boot: u32, counter: u32) -> Seq {
        Seq { boot, counter }
    }

    #[test]
    fn an_empty_database_reads_the_whole_log() {
        assert_eq!(
            plan_backfill(&[], None),
            vec![LogRange {
                from: seq(0, 0),
                until: None
            }]
        );
    }

    #[test]
    fn a_database_with_the_middle_reads_both_ends_and_the_holes() {
        let runs = [
            (seq(2, 10), seq(2, 19)),
            (seq(2, 25), seq(2, 30)),
            (seq(4, 0), seq(4, 7)),
        ];
        assert_eq!(
            plan_backfill(&runs, None),
            vec![
                LogRange {
                    from: seq(0, 0),
                    until: Some(seq(2, 10))
                },
                LogRange {
                    from: seq(2, 20),
                    until: Some(seq(2, 25))
                },
                // Boot 3, whole, lies between.
                LogRange {
                    from: seq(2, 31),
                    until: Some(seq(4, 0))
                },
                LogRange {
                    from: seq(4, 8),
                    until: None
                },
            ]
        );
        // Up to where the device is now: nothing after it.
        assert_eq!(
            plan_backfill(&runs, Some(seq(2, 27))),
            vec![
                LogRange {
                    from: seq(0, 0),
                    until: Some(seq(2, 10))
                },
                LogRange {
                    from: seq(2, 20),
                    until: Some(seq(2, 25))
                },
            ]
        );
        // Everything of boot 1 stored up to where the device is: only what
        // an earlier boot may still hold (a boot counter before 1 is never
        // used, so the device answers that request with nothing).
        assert_eq!(
            plan_backfill(&[(seq(1, 0), seq(1, 99))], Some(seq(1, 100))),
            vec![LogRange {
                from: seq(0, 0),
                until: Some(seq(1, 0))
            }]
        );
        assert_eq!(
            plan_backfill(&[(seq(0, 0), seq(1, 99))], Some(seq(1, 100))),
            vec![]
        );
        assert_eq!(
            plan_backfill(&[(seq(0, 0), seq(1, 5))], None),
            vec![LogRange {
                from: seq(1, 6),
                until: None
            }]
        );
    }
}
