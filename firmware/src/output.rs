//! Moisture to 4-20 mA with NAMUR NE 43 signalling.
//!
//! ```text
//!  mA   3.6 | 3.8        4 ........................ 20     20.5 | 21
//!  fail low | under-range | measuring (span low..high) | over-range | fail high
//! ```
//! NAMUR NE 43 (common practice in process instrumentation): the measuring
//! signal is 4-20 mA, it may run on to 3.8 mA below and 20.5 mA above the
//! span to show an under- or over-range value, and a failure is signalled at
//! or below 3.6 mA or at or above 21 mA, so a PLC can tell "dry product" from
//! "broken sensor". Which failure level is used is configurable
//! ([`OutputConfig::fail_high`]); the device uses 3.5 mA and 21.5 mA, inside
//! the failure bands with margin for DAC error.

use fringe_protocol::OutputConfig;

/// Bottom of the measuring signal, mA.
pub const MA_LOW: f32 = 4.0;
/// Top of the measuring signal, mA.
pub const MA_HIGH: f32 = 20.0;
/// Lowest measuring current (under-range saturates here), mA.
pub const MA_UNDER: f32 = 3.8;
/// Highest measuring current (over-range saturates here), mA.
pub const MA_OVER: f32 = 20.5;
/// Low failure current driven, mA (NE 43: <= 3.6).
pub const MA_FAIL_LOW: f32 = 3.5;
/// High failure current driven, mA (NE 43: >= 21.0).
pub const MA_FAIL_HIGH: f32 = 21.5;

/// Highest span end accepted, % moisture: the highest moisture a reading
/// carries ([`fringe_protocol::quant::MOISTURE_MAX_PCT`], 327.67 %), reached
/// only on a dry basis (green wood and biomass hold more water than dry
/// matter). On a wet basis the moisture stays below 100 %, and a span
/// reaching above it only compresses the signal.
pub const MAX_SPAN_PCT: f32 = fringe_protocol::quant::MOISTURE_MAX_PCT;

/// What the loop shows.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum LoopState {
    /// A value within the span.
    Measuring,
    /// Below the span (clamped at 3.8 mA).
    UnderRange,
    /// Above the span (clamped at 20.5 mA).
    OverRange,
    /// Failure signalled.
    Fault,
}

/// Why an output configuration was refused.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum SpanError {
    /// A span end is NaN or infinite.
    NotFinite,
    /// The span is empty or reversed (`span_low_pct >= span_high_pct`), or
    /// outside 0..=[`MAX_SPAN_PCT`].
    OutOfRange,
}

impl core::fmt::Display for SpanError {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        match self {
            SpanError::NotFinite => write!(f, "output span: value not finite"),
            SpanError::OutOfRange => {
                write!(
                    f,
                    "output span: need 0 <= span_low_pct < span_high_pct <= 327.67 (above 100 only a dry-basis calibration reaches)"
                )
            }
        }
    }
}

impl core::error::Error for SpanError {}

/// Checks an output configuration.
///
/// # Errors
/// [`SpanError`] naming what is wrong.
pub fn validate(cfg: &OutputConfig) -> Result<(), SpanError> {
    if !cfg.span_low_pct.is_finite() || !cfg.span_high_pct.is_finite() {
        return Err(SpanError::NotFinite);
    }
    if !(0.0..=MAX_SPAN_PCT).contains(&cfg.span_low_pct)
        || !(0.0..=MAX_SPAN_PCT).contains(&cfg.span_high_pct)
        || cfg.span_low_pct >= cfg.span_high_pct
    {
        return Err(SpanError::OutOfRange);
    }
    Ok(())
}

/// Loop current for a moisture value; `None` (no valid value) signals a fault.
///
/// A non-finite moisture or an invalid configuration also signals a fault.
pub fn current_ma(cfg: &OutputConfig, moisture_pct: Option<f32>) -> (f32, LoopState) {
    let fail = if cfg.fail_high {
        MA_FAIL_HIGH
    } else {
        MA_FAIL_LOW
    };
    let m = match moisture_pct {
        Some(m) if m.is_finite() && validate(cfg).is_ok() => m,
        _ => return (fail, LoopState::Fault),
    };
    let ma = MA_LOW
        + (m - cfg.span_low_pct) / (cfg.span_high_pct - cfg.span_low_pct) * (MA_HIGH - MA_LOW);
    if ma < MA_LOW {
        (ma.max(MA_UNDER), LoopState::UnderRange)
    } else if ma > MA_HIGH {
        (ma.min(MA_OVER), LoopState::OverRange)
    } else {
        (ma, LoopState::Measuring)
    }
}

/// The default span: 0-30 % moisture, failure low.
pub const DEFAULT_OUTPUT: OutputConfig = OutputConfig {
    span_low_pct: 0.0,
    span_high_pct: 30.0,
    fail_high: false,
};

#[cfg(test)]
mod tests {
    use super::*;

    const CFG: OutputConfig = OutputConfig {
        span_low_pct: 10.0,
        span_high_pct: 20.0,
        fail_high: false,
    };

    #[test]
    fn in_range_is_linear() {
        assert_eq!(current_ma(&CFG, Some(10.0)), (4.0, LoopState::Measuring));
        assert_eq!(current_ma(&CFG, Some(20.0)), (20.0, LoopState::Measuring));
        let (ma, s) = current_ma(&CFG, Some(15.0));
        assert!((ma - 12.0).abs() < 1e-5 && s == LoopState::Measuring);
    }

    #[test]
    fn under_and_over_range_stay_in_ne43_measuring_band() {
        // NAMUR NE 43: measuring band 3.8-20.5 mA.
        let (ma, s) = current_ma(&CFG, Some(9.0));
        assert!(
            (ma - 3.8).abs() < 1e-5 && s == LoopState::UnderRange,
            "{ma}"
        );
        let (ma, s) = current_ma(&CFG, Some(9.9));
        assert!(
            (ma - 3.84).abs() < 1e-4 && s == LoopState::UnderRange,
            "{ma}"
        );
        let (ma, s) = current_ma(&CFG, Some(25.0));
        assert!(
            (ma - 20.5).abs() < 1e-5 && s == LoopState::OverRange,
            "{ma}"
        );
        let (ma, _) = current_ma(&CFG, Some(20.2));
        assert!((ma - 20.32).abs() < 1e-4);
    }

    #[test]
    fn fault_low_and_high_in_ne43_failure_bands() {
        let (ma, s) = current_ma(&CFG, None);
        assert!(ma <= 3.6 && s == LoopState::Fault);
        let (ma, _) = current_ma(&CFG, Some(f32::NAN));
        assert!(ma <= 3.6);
        let hi = OutputConfig {
            fail_high: true,
            ..CFG
        };
        let (ma, s) = current_ma(&hi, None);
        assert!(ma >= 21.0 && s == LoopState::Fault);
    }

    #[test]
    fn bad_spans_refused() {
        let mut c = CFG;
        c.span_high_pct = 10.0;
        assert_eq!(validate(&c), Err(SpanError::OutOfRange));
        c.span_high_pct = f32::INFINITY;
        assert_eq!(validate(&c), Err(SpanError::NotFinite));
        assert_eq!(current_ma(&c, Some(12.0)).1, LoopState::Fault);
        c.span_high_pct = 327.7;
        assert_eq!(validate(&c), Err(SpanError::OutOfRange));
        c.span_low_pct = -0.5;
        c.span_high_pct = 20.0;
        assert_eq!(validate(&c), Err(SpanError::OutOfRange));
    }

    /// Green wood on a dry basis: 30-180 % moisture (water above the dry
    /// mass; the range from memory) on 4-20 mA. The loop runs linearly
    /// across 100 %, which an earlier limit of the span refused.
    #[test]
    fn a_dry_basis_span_above_100_pct() {
        let wood = OutputConfig {
            span_low_pct: 30.0,
            span_high_pct: 180.0,
            fail_high: false,
        };
        assert_eq!(validate(&wood), Ok(()));
        // 4 + (130 - 30) / 150 * 16 = 14.667 mA.
        let (ma, s) = current_ma(&wood, Some(130.0));
        assert!(
            (ma - 14.666_667).abs() < 1e-4 && s == LoopState::Measuring,
            "{ma}"
        );
        let (ma, s) = current_ma(&wood, Some(190.0));
        assert!(
            (ma - 20.5).abs() < 1e-5 && s == LoopState::OverRange,
            "{ma}"
        );
        let top = OutputConfig {
            span_low_pct: 0.0,
            span_high_pct: MAX_SPAN_PCT,
            fail_high: true,
        };
        assert_eq!(validate(&top), Ok(()));
        assert_eq!(current_ma(&top, Some(327.67)), (20.0, LoopState::Measuring));
    }
}
