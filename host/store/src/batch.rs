//! The batching policy: readings wait at most [`BATCH_MAX_AGE`] (or until
//! [`BATCH_MAX_LEN`] are queued) before they are committed, so a killed
//! process loses at most one batch, which the next run reads back from the
//! device log. Time comes in as an argument.

use std::time::{Duration, Instant};

use fringe_protocol::Reading;

use crate::error::StoreError;
use crate::record::{InsertStats, Source};
use crate::traits::RecordLog;

/// Longest time a reading may wait in a [`Batcher`] before it is committed.
pub const BATCH_MAX_AGE: Duration = Duration::from_millis(50);
/// Most readings in one batch.
pub const BATCH_MAX_LEN: usize = 1000;

/// Collects readings of one device and commits them in batches at most
/// [`BATCH_MAX_AGE`] after the first one of a batch arrived.
#[derive(Debug)]
pub struct Batcher {
    serial: String,
    pending: Vec<(Reading, Source)>,
    since: Option<Instant>,
    max_age: Duration,
    total: InsertStats,
}

impl Batcher {
    /// A batcher for device `serial`.
    pub fn new(serial: &str) -> Self {
        Self {
            serial: serial.into(),
            pending: Vec::new(),
            since: None,
            max_age: BATCH_MAX_AGE,
            total: InsertStats::default(),
        }
    }

    /// Queues a reading that arrived at `now`.
    pub fn push(&mut self, r: Reading, source: Source, now: Instant) {
        if self.pending.is_empty() {
            self.since = Some(now);
        }
        self.pending.push((r, source));
    }

    /// Whether a commit is due (the oldest pending reading is old enough,
    /// or the batch is full).
    pub fn due(&self, now: Instant) -> bool {
        self.pending.len() >= BATCH_MAX_LEN
            || self
                .since
                .is_some_and(|s| now.saturating_duration_since(s) >= self.max_age)
    }

    /// When the next commit falls due, if anything is pending.
    pub fn deadline(&self) -> Option<Instant> {
        self.since.map(|s| s + self.max_age)
    }

    /// Readings waiting.
    pub fn pending(&self) -> usize {
        self.pending.len()
    }

    /// Everything stored so far through this batcher.
    pub fn total(&self) -> InsertStats {
        self.total
    }

    /// Commits what is pending (one transaction per source).
    ///
    /// # Errors
    /// [`StoreError`]; the readings of the failed transaction stay pending
    /// and a later flush retries them (none is stored twice: inserts are
    /// idempotent).
    pub fn flush(
        &mut self,
        store: &mut (impl RecordLog + ?Sized),
    ) -> Result<InsertStats, StoreError> {
        let mut stats = InsertStats::default();
        if self.pending.is_empty() {
            return Ok(stats);
        }
        for src in [Source::Stream, Source::Log] {
            let batch: Vec<Reading> = self
                .pending
                .iter()
                .filter(|(_, s)| *s == src)
                .map(|(r, _)| *r)
                .collect();
            if !batch.is_empty() {
                let st = store.insert_readings(&self.serial, &batch, src)?;
                stats += st;
                self.total += st;
                self.pending.retain(|(_, s)| *s != src);
            }
        }
        self.since = None;
        Ok(stats)
    }
}
