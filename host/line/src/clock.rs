//! The device clock on a connection: checked against the host's, set when
//! it is unset or off by more than [`CLOCK_TOLERANCE_MS`] and the device
//! key is at hand; a set clock off by more than [`CLOCK_AUTO_LIMIT_MS`] is
//! left alone and said (one of the two clocks is wrong, and a host without
//! time service, a laptop an hour off, would stamp every later reading
//! wrongly; `fringe device clock --set` sets it on purpose). Time comes in
//! as an argument.

use fringe_link::{Link, LinkError};
use fringe_protocol::auth::Key;
use fringe_protocol::{Request, Status};

/// A device clock further off than this is set again, ms.
pub const CLOCK_TOLERANCE_MS: i64 = 1000;
/// A set device clock further off than this is not set automatically, ms
/// (15 min: a battery-backed clock drifting a few seconds a day, left a
/// few months, stays within it; a time-zone or daylight-saving mistake of
/// an hour does not).
pub const CLOCK_AUTO_LIMIT_MS: i64 = 15 * 60_000;
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

    /// Whether a set clock is too far off to be set without a person
    /// (more than [`CLOCK_AUTO_LIMIT_MS`]).
    pub fn too_far_to_set_automatically(&self) -> bool {
        matches!(*self, ClockCheck::Set { off_ms, .. } if off_ms.abs() > CLOCK_AUTO_LIMIT_MS)
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
    /// It was off by more than [`CLOCK_AUTO_LIMIT_MS`] and was left as it
    /// was, for a person to check and set.
    pub too_far: bool,
}

/// Checks the device clock and, when it is unset or off by more than a
/// second (and not by more than [`CLOCK_AUTO_LIMIT_MS`]), sets it to
/// `now()` with `key` (an authenticated `SetClock`).
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
    let s = link.status()?;
    let before = check_clock(&s, now());
    let left = |needs_key: bool, too_far: bool| ClockSync {
        before,
        set_to_ms: None,
        needs_key,
        too_far,
    };
    if !before.needs_setting() {
        return Ok(left(false, false));
    }
    if before.too_far_to_set_automatically() {
        return Ok(left(false, true));
    }
    let Some(key) = key else {
        return Ok(left(true, false));
    };
    let t = now();
    link.request_signed(Request::SetClock { unix_ms: t as u64 }, key)?;
    Ok(ClockSync {
        before,
        set_to_ms: Some(t),
        needs_key: false,
        too_far: false,
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

#[cfg(test)]
mod tests {
    use super::*;

    fn status_at(time_ms: u64) -> Status {
        Status {
            time_ms,
            uptime_ms: 0,
            boot: 1,
            next_seq: fringe_protocol::Seq::default(),
            log_first: fringe_protocol::Seq::default(),
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
        assert!(!c.too_far_to_set_automatically());
        // 15 min off is set; a second more is left for a person.
        let at = |off: i64| check_clock(&status_at((host + off) as u64), host);
        assert!(!at(-CLOCK_AUTO_LIMIT_MS).too_far_to_set_automatically());
        assert!(at(-CLOCK_AUTO_LIMIT_MS - 1000).too_far_to_set_automatically());
        assert!(at(3_600_000).too_far_to_set_automatically());
        assert!(!check_clock(&status_at(6_000), host).too_far_to_set_automatically());
    }
}
