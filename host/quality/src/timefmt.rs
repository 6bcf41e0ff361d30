//! Times as people read and type them, and as files keep them.
//!
//! - [`fmt_time`]: UTC, `YYYY-MM-DDTHH:MM:SSZ`, for files, JSON and audit
//!   bundles (stable whatever the machine's time zone).
//! - [`fmt_person`]: what a person reads on a terminal: the local time with
//!   its offset (`2026-12-01T07:29:00+01:00`), or UTC when `--utc` was
//!   given ([`set_utc`]). The local zone is the system's (`TZ` if set,
//!   else `/etc/localtime`), through `jiff`.
//! - [`parse_time`]: what a person types: RFC 3339 with an offset
//!   (`2026-12-01T07:29:00+01:00`, `2026-12-01T06:29Z`), the same without
//!   an offset or with a space for `T` (local time), a date alone (local
//!   midnight), or milliseconds since the Unix epoch.

use std::sync::atomic::{AtomicBool, Ordering};

use jiff::civil::DateTime;
use jiff::tz::TimeZone;
use jiff::Timestamp;

/// What every time flag accepts, for help texts.
pub const TIME_HELP: &str =
    "RFC 3339 with an offset (2026-12-01T07:29:00+01:00, 2026-12-01T06:29Z); \
without an offset (2026-12-01 07:29) it is local time";

static UTC: AtomicBool = AtomicBool::new(false);

/// Shows times to people in UTC instead of local time (`--utc`); set once
/// by the binary before a command runs.
pub fn set_utc(utc: bool) {
    UTC.store(utc, Ordering::Relaxed);
}

/// Whether times are shown in UTC.
pub fn utc() -> bool {
    UTC.load(Ordering::Relaxed)
}

/// Formats ms since the Unix epoch as `YYYY-MM-DDTHH:MM:SSZ` (UTC).
pub fn fmt_time(ms: i64) -> String {
    match Timestamp::from_millisecond(ms) {
        Ok(t) => t.strftime("%Y-%m-%dT%H:%M:%SZ").to_string(),
        Err(_) => format!("{ms} ms"),
    }
}

/// Formats ms since the Unix epoch for a person: local time with its
/// offset, or UTC with `Z` after [`set_utc`].
pub fn fmt_person(ms: i64) -> String {
    if utc() {
        return fmt_time(ms);
    }
    fmt_in(ms, &TimeZone::system())
}

/// Formats ms since the Unix epoch in `tz`, with the offset.
pub fn fmt_in(ms: i64, tz: &TimeZone) -> String {
    match Timestamp::from_millisecond(ms) {
        Ok(t) => t
            .to_zoned_datetime(tz.clone())
            .strftime("%Y-%m-%dT%H:%M:%S%:z")
            .to_string(),
        Err(_) => format!("{ms} ms"),
    }
}

/// The zone times are shown in: UTC after [`set_utc`], else the system's.
fn display_zone() -> TimeZone {
    if utc() {
        TimeZone::UTC
    } else {
        TimeZone::system()
    }
}

/// ms since the Unix epoch formatted with `strftime` pattern `pattern` in
/// the zone times are shown in (local, or UTC after [`set_utc`]); for plot
/// axes (`%H:%M`, `%m-%d %H:%M`).
pub fn fmt_clock(ms: i64, pattern: &str) -> String {
    match Timestamp::from_millisecond(ms) {
        Ok(t) => t
            .to_zoned_datetime(display_zone())
            .strftime(pattern)
            .to_string(),
        Err(_) => format!("{ms} ms"),
    }
}

/// The offset from UTC, ms, of the zone times are shown in at `ms`.
pub fn offset_ms(ms: i64) -> i64 {
    match Timestamp::from_millisecond(ms) {
        Ok(t) => i64::from(display_zone().to_offset(t).seconds()) * 1000,
        Err(_) => 0,
    }
}

/// The zone times are shown in, for an axis title: `UTC`, or `local time
/// (UTC+01:00)` with the offset at `ms`.
pub fn zone_label(ms: i64) -> String {
    if utc() {
        return "UTC".into();
    }
    match Timestamp::from_millisecond(ms) {
        Ok(t) => format!(
            "local time (UTC{})",
            t.to_zoned_datetime(TimeZone::system()).strftime("%:z")
        ),
        Err(_) => "local time".into(),
    }
}

/// Parses a time a person typed (see the module doc) in the system's time
/// zone; returns ms since the Unix epoch.
///
/// # Errors
/// A message naming the text and the accepted forms (clap adds the flag).
pub fn parse_time(s: &str) -> Result<i64, String> {
    parse_time_in(s, &TimeZone::system())
}

/// The end of a range a person typed: the last millisecond of the time as
/// precise as it was written. A time to the second includes that whole
/// second (the exports show whole seconds, so the row shown as `06:01:30`
/// is in a range that ends at `06:01:30`), to the minute that minute, a
/// date alone that whole local day; milliseconds since the epoch are
/// taken as they are.
///
/// # Errors
/// As [`parse_time`].
pub fn parse_time_end(s: &str) -> Result<i64, String> {
    parse_time_end_in(s, &TimeZone::system())
}

/// [`parse_time_end`] with times without an offset taken in `tz`.
///
/// # Errors
/// As [`parse_time`].
pub fn parse_time_end_in(s: &str, tz: &TimeZone) -> Result<i64, String> {
    let start = parse_time_in(s, tz)?;
    let t = s.trim().replacen(' ', "T", 1);
    if t.chars().all(|c| c.is_ascii_digit()) {
        return Ok(start);
    }
    if t.len() == 10 {
        // A date alone: up to the next local midnight (23 or 25 hours on
        // the days the clocks change).
        let next = t
            .parse::<jiff::civil::Date>()
            .ok()
            .and_then(|d| d.tomorrow().ok())
            .map(|d| parse_time_in(&d.to_string(), tz));
        return match next {
            Some(Ok(n)) => Ok(n - 1),
            _ => Ok(start + 86_399_999),
        };
    }
    let time = t.get(11..).unwrap_or("");
    let end = time.find(['Z', 'z', '+', '-']).unwrap_or(time.len());
    // The last field written, by its digits (with or without colons:
    // `06`, `06:01` or `0601`, `06:01:30` or `060130`), then the digits of
    // a fraction of the second (after `.` or `,`).
    let clock = &time[..end];
    let (whole, frac) = clock.split_once(['.', ',']).unwrap_or((clock, ""));
    let digits = whole.chars().filter(char::is_ascii_digit).count();
    let unit_ms: i64 = match digits {
        0..=2 => 3_600_000,
        3..=4 => 60_000,
        _ if frac.is_empty() => 1_000,
        _ => 10i64.pow(3u32.saturating_sub(frac.len() as u32)),
    };
    Ok(start + unit_ms - 1)
}

/// [`parse_time`] with times without an offset taken in `tz`.
///
/// # Errors
/// As [`parse_time`].
pub fn parse_time_in(s: &str, tz: &TimeZone) -> Result<i64, String> {
    let t = s.trim();
    let bad = |why: &str| format!("`{s}` is not a time ({why}): use {TIME_HELP}");
    if !t.is_empty() && t.chars().all(|c| c.is_ascii_digit()) {
        return t.parse().map_err(|_| bad("too many digits"));
    }
    if t.is_empty() {
        return Err(bad("empty"));
    }
    // With an offset or Z: an instant.
    let with_t = t.replacen(' ', "T", 1);
    let has_offset = with_t.ends_with(['Z', 'z'])
        || with_t
            .get(10..)
            .is_some_and(|rest| rest.contains('+') || rest.contains('-'));
    if has_offset {
        let fixed = with_seconds(&with_t);
        return fixed
            .parse::<Timestamp>()
            .map(|ts| ts.as_millisecond())
            .map_err(|e| bad(&e.to_string()));
    }
    // A date alone: local midnight.
    let civil = if with_t.len() == 10 {
        format!("{with_t}T00:00:00")
    } else {
        with_t
    };
    let dt: DateTime = civil
        .parse()
        .map_err(|e: jiff::Error| bad(&e.to_string()))?;
    let at = tz.to_ambiguous_timestamp(dt);
    // A local time the clocks pass twice (going back) or skip (going
    // forward) is refused, with both offsets: taking one of them matched a
    // grab sample an hour off, or left an hour out of a range.
    let zone = tz.iana_name().unwrap_or("the local time zone");
    match at.offset() {
        jiff::tz::AmbiguousOffset::Fold { before, after } => {
            return Err(format!(
                "`{s}` occurs twice in {zone} (at {before} and again at {after}, the clocks going back): give the offset, e.g. `{}{before}`",
                t.replacen(' ', "T", 1)
            ))
        }
        jiff::tz::AmbiguousOffset::Gap { before, after } => {
            return Err(format!(
                "`{s}` does not exist in {zone} (the clocks skip it, going from {before} to {after}): give the time with its offset"
            ))
        }
        jiff::tz::AmbiguousOffset::Unambiguous { .. } => {}
    }
    at.compatible()
        .map(|ts| ts.as_millisecond())
        .map_err(|e| bad(&e.to_string()))
}

/// `2026-12-01T06:29Z` -> `2026-12-01T06:29:00Z` (RFC 3339 needs seconds).
fn with_seconds(t: &str) -> String {
    let Some(time) = t.get(11..) else {
        return t.to_string();
    };
    let end = time.find(['Z', 'z', '+', '-']).unwrap_or(time.len());
    if time[..end].matches(':').count() == 1 {
        format!("{}{}:00{}", &t[..11], &time[..end], &time[end..])
    } else {
        t.to_string()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn berlin() -> TimeZone {
        TimeZone::get("Europe/Berlin").expect("tz database (Debian tzdata)")
    }

    /// Local times the clocks pass twice or skip are refused with both
    /// offsets; with an offset, or away from a change, they are taken
    /// (Europe/Berlin's changes of 2026: 29 March 02:00 +01:00 -> 03:00
    /// +02:00, 25 October 03:00 +02:00 -> 02:00 +01:00; EU summer-time
    /// rule, from memory, as the tz database gives them).
    #[test]
    fn a_local_time_at_a_clock_change_must_carry_its_offset() {
        let b = berlin();
        let e = parse_time_in("2026-10-25 02:30", &b).unwrap_err();
        assert!(
            e.contains("occurs twice in Europe/Berlin (at +02 and again at +01")
                && e.contains("`2026-10-25T02:30+02`"),
            "{e}"
        );
        let e = parse_time_in("2026-03-29T02:30", &b).unwrap_err();
        assert!(e.contains("does not exist in Europe/Berlin"), "{e}");
        // 2026-10-25T00:30Z = 1792888200000 ms, 01:30Z = 1792891800000 ms
        // (Python datetime).
        assert_eq!(
            parse_time_in("2026-10-25 02:30+01:00", &b),
            Ok(1_792_891_800_000)
        );
        assert_eq!(
            parse_time_in("2026-10-25 02:30+02:00", &b),
            Ok(1_792_888_200_000)
        );
        assert!(parse_time_in("2026-10-25 04:30", &b).is_ok());
    }

    /// The end of a range is the last millisecond of what was written
    /// (worked by hand: 2026-12-01 is 1796083200000 ms; Berlin is UTC+1
    /// then, and 2026-03-29 has 23 hours there, the clocks going forward).
    #[test]
    fn a_range_end_includes_what_was_written() {
        let b = berlin();
        let z = |s| parse_time_end_in(s, &b).unwrap();
        assert_eq!(z("2026-12-01T06:01:30Z"), 1796083200000 + 21_690_000 + 999);
        assert_eq!(z("2026-12-01T06:01Z"), 1796083200000 + 21_660_000 + 59_999);
        assert_eq!(z("2026-12-01T06:01:30.5Z"), 1796083200000 + 21_690_500 + 99);
        assert_eq!(z("2026-12-01T06:01:30.250Z"), 1796083200000 + 21_690_250);
        // The other forms jiff reads: a comma, an hour alone, no colons.
        assert_eq!(z("2026-12-01T06:01:30,5Z"), 1796083200000 + 21_690_500 + 99);
        assert_eq!(z("2026-12-01T06Z"), 1796083200000 + 21_600_000 + 3_599_999);
        assert_eq!(z("2026-12-01T0601Z"), 1796083200000 + 21_660_000 + 59_999);
        assert_eq!(z("2026-12-01T060130Z"), 1796083200000 + 21_690_000 + 999);
        assert_eq!(z("1796083200000"), 1796083200000);
        // A local date: its midnight to the next, less 1 ms.
        assert_eq!(z("2026-12-01"), 1796083200000 - 3_600_000 + 86_400_000 - 1);
        let short = z("2026-03-29") - parse_time_in("2026-03-29", &b).unwrap() + 1;
        assert_eq!(short, 23 * 3_600_000);
    }

    #[test]
    fn time_formatting() {
        assert_eq!(fmt_time(0), "1970-01-01T00:00:00Z");
        // 2000-03-01T12:34:56Z = 951914096 s (leap-year boundary).
        assert_eq!(fmt_time(951_914_096_000), "2000-03-01T12:34:56Z");
        // Central European Time in winter is UTC+1, in summer UTC+2.
        assert_eq!(
            fmt_in(1_796_106_540_000, &berlin()),
            "2026-12-01T07:29:00+01:00"
        );
        assert_eq!(
            fmt_in(1_782_894_540_000, &berlin()),
            "2026-07-01T10:29:00+02:00"
        );
        assert_eq!(fmt_in(0, &TimeZone::UTC), "1970-01-01T00:00:00+00:00");
    }

    #[test]
    fn time_parsing_round_trips() {
        let tz = berlin();
        let at = 1_796_106_540_000; // 2026-12-01T06:29:00Z
        for s in [
            "2026-12-01T06:29:00Z",
            "2026-12-01T06:29Z",
            "2026-12-01 06:29:00Z",
            "2026-12-01T07:29:00+01:00",
            "2026-12-01T07:29+01:00",
            "2026-12-01T01:29:00-05:00",
            "1796106540000",
        ] {
            assert_eq!(parse_time_in(s, &tz), Ok(at), "{s}");
        }
        assert_eq!(
            parse_time_in("2000-03-01T12:34:56Z", &tz),
            Ok(951_914_096_000)
        );
    }

    #[test]
    fn times_without_an_offset_are_local() {
        let tz = berlin();
        // 09:40 in Berlin on 1 December is 08:40 UTC; on 1 July 07:40 UTC.
        assert_eq!(
            parse_time_in("2026-12-01 09:40", &tz).map(fmt_time),
            Ok("2026-12-01T08:40:00Z".into())
        );
        assert_eq!(
            parse_time_in("2026-07-01T09:40:00", &tz).map(fmt_time),
            Ok("2026-07-01T07:40:00Z".into())
        );
        assert_eq!(
            parse_time_in("2026-12-01", &tz).map(fmt_time),
            Ok("2026-11-30T23:00:00Z".into())
        );
        assert_eq!(
            parse_time_in("2026-12-01 09:40", &TimeZone::UTC).map(fmt_time),
            Ok("2026-12-01T09:40:00Z".into())
        );
    }

    #[test]
    fn bad_times_say_what_was_typed_and_what_works() {
        let tz = berlin();
        for s in [
            "yesterday",
            "2026-13-01",
            "2026-12-01T25:00",
            "2026-12-01T06:29+99:00",
            "",
            "99999999999999999999999",
        ] {
            let e = parse_time_in(s, &tz).expect_err(s);
            assert!(e.contains(&format!("`{s}`")), "{e}");
            assert!(e.contains("RFC 3339") && e.contains("local time"), "{e}");
        }
    }
}
