//! The device settings a plant sets: measuring-point tag, measurement
//! interval, 4-20 mA span and NAMUR NE 43 failure level, stale-output
//! timeout ([`Settings`], protocol 1.1).
//!
//! They live in the settings map under one key, written whole and
//! atomically (a power cut leaves the old settings or the new ones), and are
//! checked here before they are stored or used. A stored value that no
//! longer passes the check (written by another firmware) is replaced by the
//! defaults at boot.
//!
//! | setting | default | accepted |
//! | --- | --- | --- |
//! | tag | empty | up to 24 bytes of UTF-8, no control characters |
//! | interval | 1000 ms | 100 ms .. 1 h |
//! | span | 0-30 % moisture at 4-20 mA | 0 <= low < high <= 327.67 % (above 100 % on a dry basis only) |
//! | failure level | low (3.5 mA; NE 43: <= 3.6 mA) | low or high (21.5 mA; NE 43: >= 21 mA) |
//! | stale-output timeout | 10 s | twice the interval .. one day |
//!
//! A reading starts on the interval; one that takes longer than the
//! interval (on the simulated board a plain reading acquires for about
//! 53 ms, one with the reference check, every tenth, about 158 ms) delays
//! the next one, which starts as soon as it is done, and the slots it
//! overran by a whole interval or more are skipped rather than caught up.

use fringe_protocol::{short_string, OutputConfig, Settings};

use crate::output::{self, SpanError, DEFAULT_OUTPUT};

/// Default measurement interval, ms.
pub const DEFAULT_INTERVAL_MS: u32 = 1000;
/// Default stale-output timeout, ms.
pub const DEFAULT_STALE_TIMEOUT_MS: u32 = 10_000;
/// Shortest measurement interval accepted, ms (a reading with the
/// reference check takes about 160 ms of acquisition on the simulated board).
pub const MIN_INTERVAL_MS: u32 = 100;
/// Longest measurement interval accepted, ms (one hour).
pub const MAX_INTERVAL_MS: u32 = 3_600_000;
/// Longest stale-output timeout accepted, ms (one day).
pub const MAX_STALE_TIMEOUT_MS: u32 = 86_400_000;

/// The defaults: no tag, one reading a second, 0-30 % at 4-20 mA, failure
/// low, stale after 10 s.
pub fn default_settings() -> Settings {
    Settings {
        tag: short_string(""),
        interval_ms: DEFAULT_INTERVAL_MS,
        output: DEFAULT_OUTPUT,
        stale_timeout_ms: DEFAULT_STALE_TIMEOUT_MS,
    }
}

/// Why settings were refused.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum SettingsError {
    /// The tag holds a control character.
    Tag,
    /// The interval lies outside [`MIN_INTERVAL_MS`]..=[`MAX_INTERVAL_MS`].
    Interval,
    /// The stale-output timeout is shorter than twice the interval or
    /// longer than [`MAX_STALE_TIMEOUT_MS`].
    StaleTimeout,
    /// The 4-20 mA span is refused.
    Span(SpanError),
}

impl core::fmt::Display for SettingsError {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        match self {
            SettingsError::Tag => write!(f, "settings: tag holds a control character"),
            SettingsError::Interval => write!(
                f,
                "settings: interval_ms not {MIN_INTERVAL_MS}..={MAX_INTERVAL_MS}"
            ),
            SettingsError::StaleTimeout => write!(
                f,
                "settings: stale_timeout_ms not 2 x interval_ms..={MAX_STALE_TIMEOUT_MS}"
            ),
            SettingsError::Span(e) => write!(f, "settings: {e}"),
        }
    }
}

impl core::error::Error for SettingsError {}

impl SettingsError {
    /// A short reason for the protocol's error frame (at most 32 bytes).
    pub fn reason(self) -> &'static str {
        match self {
            SettingsError::Tag => "tag has a control character",
            SettingsError::Interval => "interval_ms not 100..3600000",
            SettingsError::StaleTimeout => "stale_timeout_ms not 2x int..1 d",
            SettingsError::Span(SpanError::NotFinite) => "span not finite",
            SettingsError::Span(_) => "span: need 0<=low<high<=327.67",
        }
    }
}

/// Checks settings before they are stored or used.
///
/// # Errors
/// [`SettingsError`] naming the first setting refused.
pub fn validate(s: &Settings) -> Result<(), SettingsError> {
    if s.tag.chars().any(char::is_control) {
        return Err(SettingsError::Tag);
    }
    if !(MIN_INTERVAL_MS..=MAX_INTERVAL_MS).contains(&s.interval_ms) {
        return Err(SettingsError::Interval);
    }
    let min_stale = s.interval_ms.saturating_mul(2);
    if !(min_stale..=MAX_STALE_TIMEOUT_MS).contains(&s.stale_timeout_ms) {
        return Err(SettingsError::StaleTimeout);
    }
    output::validate(&s.output).map_err(SettingsError::Span)
}

/// `s` with its output replaced (what `SetOutput` writes).
pub fn with_output(s: &Settings, output: OutputConfig) -> Settings {
    Settings {
        output,
        ..s.clone()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_pass_and_match_the_documented_table() {
        let d = default_settings();
        assert_eq!(validate(&d), Ok(()));
        assert_eq!(d.tag.as_str(), "");
        assert_eq!((d.interval_ms, d.stale_timeout_ms), (1000, 10_000));
        assert_eq!(
            (
                d.output.span_low_pct,
                d.output.span_high_pct,
                d.output.fail_high
            ),
            (0.0, 30.0, false)
        );
    }

    #[test]
    fn each_bad_value_is_named() {
        let d = default_settings();
        let bad = |s: Settings| validate(&s).unwrap_err();
        assert_eq!(
            bad(Settings {
                tag: short_string("L2\nX"),
                ..d.clone()
            }),
            SettingsError::Tag
        );
        assert_eq!(
            bad(Settings {
                interval_ms: 99,
                ..d.clone()
            }),
            SettingsError::Interval
        );
        assert_eq!(
            bad(Settings {
                interval_ms: MAX_INTERVAL_MS + 1,
                stale_timeout_ms: MAX_STALE_TIMEOUT_MS,
                ..d.clone()
            }),
            SettingsError::Interval
        );
        assert_eq!(
            bad(Settings {
                stale_timeout_ms: 1999,
                ..d.clone()
            }),
            SettingsError::StaleTimeout
        );
        assert_eq!(
            bad(Settings {
                stale_timeout_ms: MAX_STALE_TIMEOUT_MS + 1,
                ..d.clone()
            }),
            SettingsError::StaleTimeout
        );
        let mut o = d.output;
        o.span_high_pct = f32::NAN;
        assert_eq!(
            bad(with_output(&d, o)),
            SettingsError::Span(SpanError::NotFinite)
        );
        for e in [
            SettingsError::Tag,
            SettingsError::Interval,
            SettingsError::StaleTimeout,
            SettingsError::Span(SpanError::OutOfRange),
        ] {
            assert!(e.reason().len() <= fringe_protocol::REASON_LEN, "{e}");
        }
        // The longest interval with the longest timeout is accepted.
        assert_eq!(
            validate(&Settings {
                interval_ms: MAX_INTERVAL_MS,
                stale_timeout_ms: MAX_STALE_TIMEOUT_MS,
                ..d
            }),
            Ok(())
        );
    }
}
