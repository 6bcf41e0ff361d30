//! Line-session logic with no terminal: checking and correcting the device
//! clock on a connection, and planning which stored readings of the device
//! log a database still lacks. The commands (`monitor`, `pull`, the
//! calibration and device commands) call these and say what happened;
//! time comes in as an argument.

use fringe_protocol::auth::Key;
use fringe_protocol::{Request, Response, Seq, Status};

use crate::link::{Link, LinkError};

/// A device clock further off than this is set again, ms.
pub const CLOCK_TOLERANCE_MS: i64 = 1000;
/// Device times below this (2000-01-01) count from boot: the clock is unset
/// (a device refuses to set a clock before it).
pub const CLOCK_SET_AFTER_MS: u64 = 946_684_800_000;

/// The device clock against the host's.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case", tag = "state")]
pub enum ClockCheck {
    /// Never set since boot: the device counts from boot.
    Unset {
        /// The device's time since boot, ms.
        since_boot_ms: u64,
    },
    /// Set; `off_ms` = device time - host time (positive: the device is ahead).
    Set {
        /// Device time, ms since the Unix epoch.
        device_ms: i64,
        /// Device time minus host time, ms.
        off_ms: i64,
    },
}

impl ClockCheck {
    /// Whether the clock should be set (unset, or off by more than
    /// [`CLOCK_TOLERANCE_MS`]).
    pub fn needs_setting(&self) -> bool {
        match *self {
            ClockCheck::Unset { .. } => true,
            ClockCheck::Set { off_ms, .. } => off_ms.abs() > CLOCK_TOLERANCE_MS,
        }
    }
}

/// Reads the device clock from a status taken at host time `host_ms`.
pub fn check_clock(status: &Status, host_ms: i64) -> ClockCheck {
    if status.time_ms < CLOCK_SET_AFTER_MS {
        ClockCheck::Unset {
            since_boot_ms: status.time_ms,
        }
    } else {
        let device_ms = status.time_ms as i64;
        ClockCheck::Set {
            device_ms,
            off_ms: device_ms - host_ms,
        }
    }
}

/// What a clock synchronisation did.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
pub struct ClockSync {
    /// The clock before.
    pub before: ClockCheck,
    /// Set to this host time (ms since the Unix epoch), if it was set. The
    /// device logs the change as a `ClockSet` event (old and new time),
    /// which a pull or monitor stores with the device's other events.
    pub set_to_ms: Option<i64>,
    /// It needed setting but no device key was given.
    pub needs_key: bool,
}

fn status(link: &mut Link) -> Result<Status, LinkError> {
    match link.request(Request::Status)? {
        Response::Status(s) => Ok(s),
        other => Err(LinkError::Unexpected {
            request: "Status",
            got: format!("{other:?}"),
        }),
    }
}

/// Checks the device clock and, when it is unset or off by more than a
/// second, sets it to `now()` with `key` (an authenticated `SetClock`).
/// Without a key it only reports ([`ClockSync::needs_key`]). `now` gives
/// the host's time in ms since the Unix epoch; it is read right before each
/// request that needs it.
///
/// # Errors
/// [`LinkError`] (a refused write, e.g. a wrong key, included).
pub fn sync_clock(
    link: &mut Link,
    key: Option<&Key>,
    now: &dyn Fn() -> i64,
) -> Result<ClockSync, LinkError> {
    let s = status(link)?;
    let before = check_clock(&s, now());
    if !before.needs_setting() {
        return Ok(ClockSync {
            before,
            set_to_ms: None,
            needs_key: false,
        });
    }
    let Some(key) = key else {
        return Ok(ClockSync {
            before,
            set_to_ms: None,
            needs_key: true,
        });
    };
    let t = now();
    link.request_signed(Request::SetClock { unix_ms: t as u64 }, key)?;
    Ok(ClockSync {
        before,
        set_to_ms: Some(t),
        needs_key: false,
    })
}

/// Sets the device clock to `unix_ms` (authenticated), whatever it shows.
///
/// # Errors
/// [`LinkError`].
pub fn set_clock(link: &mut Link, key: &Key, unix_ms: i64) -> Result<(), LinkError> {
    link.request_signed(
        Request::SetClock {
            unix_ms: unix_ms.max(0) as u64,
        },
        key,
    )?;
    Ok(())
}

/// A range of the device log to read: from `from` (inclusive) to `until`
/// (exclusive; `None`: to the end of the log).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct LogRange {
    /// First sequence wanted.
    pub from: Seq,
    /// First sequence not wanted.
    pub until: Option<Seq>,
}

fn after(s: Seq) -> Seq {
    Seq {
        boot: s.boot,
        counter: s.counter.saturating_add(1),
    }
}

/// The parts of the device log a database lacks, given the runs of
/// consecutive readings it holds (`(first, last)` within one boot, in
/// order, from [`crate::store::Store::runs`]): before the first run, between
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
        at = at.max(after(last));
    }
    if until.is_none_or(|u| u > at) {
        out.push(LogRange { from: at, until });
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn seq(boot: u32, counter: u32) -> Seq {
        Seq { boot, counter }
    }

    fn status_at(time_ms: u64) -> Status {
        Status {
            time_ms,
            uptime_ms: 0,
            boot: 1,
            next_seq: Seq::default(),
            log_first: Seq::default(),
            log_len: 0,
            next_event: 0,
            stream_period_ms: None,
            active_slot: None,
            cell_cal: fringe_protocol::CalId::NONE,
            product_cal: fringe_protocol::CalId::NONE,
            last_flags: fringe_protocol::Flags::empty(),
            write_counter: 0,
            link_errors: 0,
            reference_ratio: 1.0,
            output_ma: 3.5,
            stack_free_bytes: None,
            reading_cost: None,
        }
    }

    #[test]
    fn clock_unset_off_and_within_a_second() {
        let host = 1_796_083_200_000i64;
        let c = check_clock(&status_at(6_000), host);
        assert_eq!(
            c,
            ClockCheck::Unset {
                since_boot_ms: 6_000
            }
        );
        assert!(c.needs_setting());
        let c = check_clock(&status_at(host as u64 + 999), host);
        assert!(!c.needs_setting(), "{c:?}");
        let c = check_clock(&status_at(host as u64 - 1001), host);
        assert_eq!(
            c,
            ClockCheck::Set {
                device_ms: host - 1001,
                off_ms: -1001
            }
        );
        assert!(c.needs_setting());
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
