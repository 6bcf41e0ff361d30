//! The live drift check of a device that streams into a store (`fringe
//! monitor`, and each device of `fringe gateway`): every so often the four
//! monitors of `fringe drift` ([`crate::analysis`]) run over all that is
//! stored for the device, and each alarm episode not seen before is handed
//! back once.
//!
//! The first check (at the start of a run, before the stream) only learns
//! the episodes already in the record; they are counted, not announced as
//! new. The episodes are those `fringe drift` prints, as both read the same
//! store with the same code. The data are read once, then only what was
//! added since ([`crate::analysis::LineData::refresh`]).

use std::collections::HashSet;
use std::time::{Duration, Instant};

use fringe_store::RecordRead;

use crate::analysis::{self, LineData, LoadError};
use crate::drift::{Alarm, Direction, Quantity};

/// What one [`DriftWatch::check`] found.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Checked {
    /// The check ran (it was due, or forced, and the device has data).
    pub ran: bool,
    /// This was the first check of the run: `before` episodes were
    /// already in the record (and are not in `fresh`).
    pub before: Option<usize>,
    /// Alarm episodes raised since the last check, oldest first.
    pub fresh: Vec<Alarm>,
}

/// The live drift check of one device.
#[derive(Debug)]
pub struct DriftWatch {
    every: Option<Duration>,
    last: Option<Instant>,
    /// Episodes seen: quantity, direction, time of the episode's first alarm.
    known: HashSet<(Quantity, Direction, i64)>,
    primed: bool,
    data: Option<LineData>,
}

impl DriftWatch {
    /// A watch that runs every `every` (`None`: never).
    pub fn new(every: Option<Duration>) -> Self {
        Self {
            every,
            last: None,
            known: HashSet::new(),
            primed: false,
            data: None,
        }
    }

    /// Whether a check is due at `now`.
    pub fn due(&self, now: Instant) -> bool {
        self.every
            .is_some_and(|every| self.last.is_none_or(|t| now.duration_since(t) >= every))
    }

    /// Runs the monitors over what `store` holds for `serial` if due at
    /// `now` (or `force`d) and returns the episodes not seen before.
    ///
    /// # Errors
    /// [`LoadError`] reading the store (the watch stays usable; the next
    /// check reads again).
    pub fn check(
        &mut self,
        store: &(impl RecordRead + ?Sized),
        serial: &str,
        now: Instant,
        force: bool,
    ) -> Result<Checked, LoadError> {
        if self.every.is_none() || (!force && !self.due(now)) {
            return Ok(Checked::default());
        }
        self.last = Some(now);
        // The first check is the one at the start of the run (before the
        // stream), even when nothing is stored yet: what it finds was there
        // before.
        let at_start = !self.primed;
        self.primed = true;
        let data = match self.data.as_mut() {
            Some(d) => {
                d.refresh(store)?;
                d
            }
            None => match analysis::load(store, Some(serial)) {
                Ok(d) => self.data.insert(d),
                // Nothing stored for the device yet: nothing to watch.
                Err(_) if store.last_seq(serial)?.is_none() => {
                    return Ok(Checked {
                        ran: false,
                        before: at_start.then_some(0),
                        fresh: Vec::new(),
                    })
                }
                Err(e) => return Err(e),
            },
        };
        let mut fresh = Vec::new();
        for t in data.traces() {
            for a in t.episodes() {
                if self.known.insert((a.quantity, a.direction, a.time_ms)) {
                    fresh.push(a);
                }
            }
        }
        if at_start {
            return Ok(Checked {
                ran: true,
                before: Some(fresh.len()),
                fresh: Vec::new(),
            });
        }
        fresh.sort_by_key(|a| a.time_ms);
        Ok(Checked {
            ran: true,
            before: None,
            fresh,
        })
    }
}
