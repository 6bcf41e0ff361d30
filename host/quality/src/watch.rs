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
//! added since, and only the monitors' state is kept, not the readings
//! ([`crate::analysis::LiveData`]): its memory does not grow with the
//! device's history.

use std::time::{Duration, Instant};

use fringe_store::RecordRead;

use crate::analysis::{LiveData, LoadError};
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

/// Whether episode `a` is one of `known`: the same quantity and direction
/// over a span that overlaps a known one. An episode found again by a later
/// check is the same one even where data added since (a late lab result
/// charted at its earlier time, say) moved its change point or first alarm.
fn seen(known: &[(Quantity, Direction, i64, i64)], a: &Alarm) -> bool {
    known.iter().any(|(q, d, since, at)| {
        *q == a.quantity && *d == a.direction && a.since_ms <= *at && *since <= a.time_ms
    })
}

/// The live drift check of one device.
#[derive(Debug)]
pub struct DriftWatch {
    every: Option<Duration>,
    last: Option<Instant>,
    /// Episodes seen: quantity, direction, and the span from the change
    /// point to the first alarm, ms.
    known: Vec<(Quantity, Direction, i64, i64)>,
    primed: bool,
    data: Option<LiveData>,
}

impl DriftWatch {
    /// A watch that runs every `every` (`None`: never).
    pub fn new(every: Option<Duration>) -> Self {
        Self {
            every,
            last: None,
            known: Vec::new(),
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
            None => match LiveData::load(store, serial) {
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
        for a in data.episodes() {
            if !seen(&self.known, &a) {
                self.known
                    .push((a.quantity, a.direction, a.since_ms, a.time_ms));
                fresh.push(a);
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::drift::{Action, ChartKind};

    fn alarm(quantity: Quantity, direction: Direction, since_ms: i64, time_ms: i64) -> Alarm {
        Alarm {
            quantity,
            chart: ChartKind::Cusum,
            direction,
            index: 0,
            time_ms,
            since_index: 0,
            since_ms,
            shift: 0.0,
            shift_sigma: 0.0,
            action: Action::BiasAdjust,
        }
    }

    /// An episode found again with its first alarm or change point moved
    /// (a late lab result charted at its earlier time) is not announced
    /// again; one after it, or of the other direction or quantity, is.
    #[test]
    fn an_episode_found_again_with_its_times_moved_is_not_new() {
        let known = vec![(Quantity::LabResidual, Direction::Down, 1_000, 2_000)];
        let lab = Quantity::LabResidual;
        assert!(seen(&known, &alarm(lab, Direction::Down, 1_000, 2_000)));
        assert!(seen(&known, &alarm(lab, Direction::Down, 500, 1_500)));
        assert!(seen(&known, &alarm(lab, Direction::Down, 1_500, 2_500)));
        assert!(!seen(&known, &alarm(lab, Direction::Down, 3_000, 4_000)));
        assert!(!seen(&known, &alarm(lab, Direction::Up, 1_000, 2_000)));
        assert!(!seen(
            &known,
            &alarm(Quantity::EmptyBaseline, Direction::Down, 1_000, 2_000)
        ));
    }
}
