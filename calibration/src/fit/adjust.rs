//! Keeping a calibration right over time (feature `fit`): bias and slope of
//! a calibration against new lab pairs, with the significance tests of ISO
//! 12099 (its statistics apply to any secondary method; docs/REFERENCES.md §11,
//! from memory: check the standard's worked example before relying on the
//! exact wording), and the corrected calibration.
//!
//! With `e_i = predicted_i - lab_i` over n pairs:
//!
//! - **Bias** `mean(e)`, SEP the bias-corrected SD of `e` (n - 1). The bias
//!   is significant at level alpha when `|bias| sqrt(n) / SEP > t(1 -
//!   alpha/2, n - 1)`; its confidence limits are `bias +/- t SEP / sqrt(n)`.
//! - **Slope** of the lab values regressed on the predicted ones (the
//!   direction ISO 12099 uses for a slope correction): `lab = a + b pred`,
//!   `SE(b) = s_res / sqrt(sum (pred - mean)^2)` with `s_res` the residual SD
//!   (n - 2). The slope differs significantly from 1 when `|b - 1| / SE(b)
//!   > t(1 - alpha/2, n - 2)`.
//! - **SEP confidence limits** from the chi-square distribution:
//!   `SEP sqrt((n - 1) / chi2(1 - alpha/2, n - 1))` to
//!   `SEP sqrt((n - 1) / chi2(alpha/2, n - 1))`.
//! - **RMSEP** `sqrt(mean(e^2))`, bias included.
//! - **Unexplained error** ([`unexplained_error_limit`]): the SEP is
//!   significantly larger than the calibration's SEC (with `M` degrees of
//!   freedom) when `SEP > T_UE = SEC sqrt(F(1 - alpha; n - 1, M))`. A bias or
//!   slope correction does not remove such an excess: the calibration does
//!   not hold as well on these samples as on its own.
//!
//! Where the errors are exact to rounding (an inline that is the lab value
//! plus a constant, say), a t statistic is infinite when its numerator is
//! not zero and 0 when it is, not the ratio of two rounding errors.
//!
//! The tests check these figures against SciPy 1.17.1 on a worked example
//! (`tests/adjust_scipy.rs`).

use statrs::distribution::{ChiSquared, ContinuousCDF, FisherSnedecor};

use crate::stats::{t_quantile, StatsError};

/// Bias and slope of a calibration against lab pairs (see the module docs).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BiasSlope {
    /// Pairs.
    pub n: usize,
    /// Significance level of the tests (e.g. 0.05).
    pub alpha: f64,
    /// Mean of predicted - lab, %.
    pub bias: f64,
    /// Bias-corrected SD of predicted - lab, %.
    pub sep: f64,
    /// Confidence limits of the bias, %.
    pub bias_ci: (f64, f64),
    /// `|bias| sqrt(n) / SEP`.
    pub bias_t: f64,
    /// `t(1 - alpha/2, n - 1)`.
    pub bias_t_crit: f64,
    /// Whether the bias is significant.
    pub bias_significant: bool,
    /// Slope b of lab on predicted.
    pub slope: f64,
    /// Intercept a of lab on predicted, %.
    pub intercept: f64,
    /// Standard error of the slope.
    pub slope_se: f64,
    /// Confidence limits of the slope.
    pub slope_ci: (f64, f64),
    /// `|b - 1| / SE(b)`.
    pub slope_t: f64,
    /// `t(1 - alpha/2, n - 2)`.
    pub slope_t_crit: f64,
    /// Whether the slope differs significantly from 1.
    pub slope_significant: bool,
    /// Confidence limits of the SEP, %.
    pub sep_ci: (f64, f64),
    /// Residual SD of lab on predicted (n - 2), %: the error left after a
    /// bias and slope correction.
    pub s_res: f64,
    /// Root mean square of predicted - lab, bias included, %.
    pub rmsep: f64,
    /// SD of the lab values (n - 1), %.
    pub lab_sd: f64,
}

/// ISO 12099's limit on the unexplained error (from memory):
/// `T_UE = SEC sqrt(F(1 - alpha; n - 1, dof_cal))` for a SEP of `n` pairs
/// against a calibration of standard error `sec` with `dof_cal` degrees of
/// freedom (samples less parameters). A SEP above it is significantly
/// larger than the SEC.
///
/// # Errors
/// [`StatsError`] for fewer than 2 pairs, no degrees of freedom, a `sec`
/// that is not a finite number >= 0, or `alpha` outside (0, 0.5].
pub fn unexplained_error_limit(
    sec: f64,
    dof_cal: usize,
    n: usize,
    alpha: f64,
) -> Result<f64, StatsError> {
    if n < 2 {
        return Err(StatsError::TooFew { needed: 2, got: n });
    }
    if dof_cal < 1 {
        return Err(StatsError::TooFew {
            needed: 1,
            got: dof_cal,
        });
    }
    if !(sec.is_finite() && sec >= 0.0) {
        return Err(StatsError::NonFinite {
            what: "SEC",
            index: 0,
        });
    }
    if !(alpha > 0.0 && alpha <= 0.5) {
        return Err(StatsError::BadSignificance(alpha));
    }
    let f = FisherSnedecor::new((n - 1) as f64, dof_cal as f64)
        .map_err(|_| StatsError::TooFew { needed: 2, got: n })?;
    Ok(sec * f.inverse_cdf(1.0 - alpha).sqrt())
}

/// `num / den` for a t statistic, where a `den` at rounding level (at or
/// below `tiny.1`) gives infinity for a `num` above its own (`tiny.0`) and
/// 0 for one at it.
fn t_ratio(num: f64, den: f64, tiny: (f64, f64)) -> f64 {
    if den > tiny.1 {
        num / den
    } else if num > tiny.0 {
        f64::INFINITY
    } else {
        0.0
    }
}

/// Bias and slope tests of `predicted` against `lab` at level `alpha`.
///
/// Predicted values that do not vary (a steady line read to the same
/// digit) determine no slope: the bias test stands, and the slope, its
/// intercept, standard error, limits and t and the residual SD are NaN
/// ([`BiasSlope::slope_determined`] false), never significant nor
/// correctable.
///
/// # Errors
/// [`StatsError`] for fewer than 3 pairs, mismatched lengths, non-finite
/// values, or an `alpha` outside (0, 0.5].
pub fn bias_slope(lab: &[f64], predicted: &[f64], alpha: f64) -> Result<BiasSlope, StatsError> {
    if lab.len() != predicted.len() {
        return Err(StatsError::LengthMismatch {
            what: "predicted",
            expected: lab.len(),
            got: predicted.len(),
        });
    }
    let n = lab.len();
    if n < 3 {
        return Err(StatsError::TooFew { needed: 3, got: n });
    }
    for (what, v) in [("lab", lab), ("predicted", predicted)] {
        if let Some(index) = v.iter().position(|x| !x.is_finite()) {
            return Err(StatsError::NonFinite { what, index });
        }
    }
    if !(alpha > 0.0 && alpha <= 0.5) {
        return Err(StatsError::BadSignificance(alpha));
    }
    let nf = n as f64;
    let e: Vec<f64> = predicted.iter().zip(lab).map(|(p, r)| p - r).collect();
    let bias = e.iter().sum::<f64>() / nf;
    let sep = (e.iter().map(|x| (x - bias).powi(2)).sum::<f64>() / (nf - 1.0)).sqrt();
    let rmsep = (e.iter().map(|x| x * x).sum::<f64>() / nf).sqrt();
    let tb = t_quantile(1.0 - alpha / 2.0, nf - 1.0)?;
    let half_b = tb * sep / nf.sqrt();
    let (mp, ml) = (
        predicted.iter().sum::<f64>() / nf,
        lab.iter().sum::<f64>() / nf,
    );
    // Rounding level of these values, an inline value being an f32 (about
    // 6e-8 of it): far below any moisture a lab or a reading resolves.
    let tiny = 1e-6 * mp.abs().max(ml.abs()).max(1.0);
    let bias_t = t_ratio(bias.abs() * nf.sqrt(), sep, (tiny * nf.sqrt(), tiny));
    let (mut sxy, mut sxx) = (0.0, 0.0);
    for (p, r) in predicted.iter().zip(lab) {
        sxy += (p - mp) * (r - ml);
        sxx += (p - mp) * (p - mp);
    }
    let chi = ChiSquared::new(nf - 1.0).map_err(|_| StatsError::TooFew { needed: 2, got: n })?;
    let sep_ci = (
        sep * ((nf - 1.0) / chi.inverse_cdf(1.0 - alpha / 2.0)).sqrt(),
        sep * ((nf - 1.0) / chi.inverse_cdf(alpha / 2.0)).sqrt(),
    );
    let lab_sd = (lab.iter().map(|r| (r - ml).powi(2)).sum::<f64>() / (nf - 1.0)).sqrt();
    let ts = t_quantile(1.0 - alpha / 2.0, nf - 2.0)?;
    let bias_part = BiasSlope {
        n,
        alpha,
        bias,
        sep,
        bias_ci: (bias - half_b, bias + half_b),
        bias_t,
        bias_t_crit: tb,
        bias_significant: bias_t > tb,
        slope: f64::NAN,
        intercept: f64::NAN,
        slope_se: f64::NAN,
        slope_ci: (f64::NAN, f64::NAN),
        slope_t: f64::NAN,
        slope_t_crit: ts,
        slope_significant: false,
        sep_ci,
        s_res: f64::NAN,
        rmsep,
        lab_sd,
    };
    // Predictions that do not vary (a steady product read to the same
    // digit) or vary by rounding only determine no slope; the bias test
    // stands (found by review: five readings of 12.6 against lab values
    // 0.5 % lower were refused a bias correction).
    if !((sxx / (nf - 1.0)).sqrt() > 10.0 * tiny) {
        return Ok(bias_part);
    }
    let slope = sxy / sxx;
    let intercept = ml - slope * mp;
    let rss: f64 = predicted
        .iter()
        .zip(lab)
        .map(|(p, r)| (r - intercept - slope * p).powi(2))
        .sum();
    let s_res = (rss / (nf - 2.0)).sqrt();
    let slope_se = s_res / sxx.sqrt();
    let slope_t = t_ratio(
        (slope - 1.0).abs(),
        slope_se,
        (tiny / sxx.sqrt(), tiny / sxx.sqrt()),
    );
    Ok(BiasSlope {
        slope,
        intercept,
        slope_se,
        slope_ci: (slope - ts * slope_se, slope + ts * slope_se),
        slope_t,
        slope_significant: slope_t > ts,
        s_res,
        ..bias_part
    })
}

/// The least ratio of the lab values' SD to the SEP at which a slope from
/// the pairs is corrected ([`BiasSlope::slope_correctable`]).
///
/// Where the readings' errors do not follow the moisture (the scatter of
/// a line running steady), the slope of lab on predicted is about
/// `var(m) / (var(m) + s^2)` for a calibration that is right (m the
/// moisture, s the readings' error): regression dilution, a slope below 1
/// that a correction would wrongly apply, flattening the calibration. A
/// lab SD of at least 3 times the SEP (which holds both errors) keeps that
/// slope at or above 0.9 (9 var(m) >= 9 s^2 + 8 s_lab^2: arithmetic; the
/// rule is ours, no source).
pub const SLOPE_SPREAD: f64 = 3.0;

/// Which correction to apply.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Correction {
    /// None.
    None,
    /// Subtract the bias: `new = old - bias`.
    Bias,
    /// Lab on predicted: `new = a + b old`.
    BiasAndSlope,
}

impl BiasSlope {
    /// Whether the pairs determine a slope (their predicted values vary).
    pub fn slope_determined(&self) -> bool {
        self.slope.is_finite()
    }

    /// Whether the pairs can correct a slope: a positive slope, from lab
    /// values that spread at least [`SLOPE_SPREAD`] times the SEP.
    pub fn slope_correctable(&self) -> bool {
        self.slope > 0.0 && self.lab_sd >= SLOPE_SPREAD * self.sep
    }

    /// The correction the tests call for: slope and bias when the slope
    /// differs significantly from 1 and the pairs can correct it
    /// ([`BiasSlope::slope_correctable`]), the bias alone when it is
    /// significant, else none. (Found by review: 30 pairs of a line
    /// running steady, lab SD 0.1 % against a SEP of 0.2 %, gave a
    /// significant slope of about 0.2 for a calibration that was right,
    /// and the correction flattened it.)
    pub fn recommended(&self) -> Correction {
        if self.slope_significant && self.slope_correctable() {
            Correction::BiasAndSlope
        } else if self.bias_significant {
            Correction::Bias
        } else {
            Correction::None
        }
    }

    /// `(a, b)` of `new = a + b old` for a correction.
    pub fn map(&self, c: Correction) -> (f64, f64) {
        match c {
            Correction::None => (0.0, 1.0),
            Correction::Bias => (-self.bias, 1.0),
            Correction::BiasAndSlope => (self.intercept, self.slope),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Normal deviates from a fixed xorshift sequence (Box-Muller).
    fn normals(n: usize, mut s: u64) -> Vec<f64> {
        let mut uni = move || {
            s ^= s << 13;
            s ^= s >> 7;
            s ^= s << 17;
            ((s >> 11) as f64 + 0.5) / (1u64 << 53) as f64
        };
        (0..n)
            .map(|_| {
                let (u, v) = (uni(), uni());
                (-2.0 * u.ln()).sqrt() * (2.0 * std::f64::consts::PI * v).cos()
            })
            .collect()
    }

    /// A calibration that is right, on 30 grab samples of a line running
    /// steady (moisture SD 0.1 %, readings' error 0.2 %, lab's 0.05 %):
    /// the slope of lab on predicted comes out far below 1 and
    /// significant, but the pairs cannot correct a slope, so none is
    /// recommended (it flattened the calibration before). The same
    /// calibration wrong by a slope of 1.25, on pairs over 8-20 %, is
    /// corrected for it.
    #[test]
    fn a_slope_from_pairs_that_hardly_spread_is_not_corrected() {
        let (m, e, l) = (normals(30, 7), normals(30, 11), normals(30, 13));
        let moisture: Vec<f64> = m.iter().map(|z| 14.0 + 0.1 * z).collect();
        let predicted: Vec<f64> = moisture.iter().zip(&e).map(|(m, z)| m + 0.2 * z).collect();
        let lab: Vec<f64> = moisture.iter().zip(&l).map(|(m, z)| m + 0.05 * z).collect();
        let b = bias_slope(&lab, &predicted, 0.05).unwrap();
        assert!(b.slope < 0.6 && b.slope_significant, "{b:?}");
        assert!(!b.slope_correctable(), "{b:?}");
        assert_ne!(b.recommended(), Correction::BiasAndSlope);
        // Wide pairs, a calibration reading 1.25 times too steep.
        let moisture: Vec<f64> = (0..30).map(|i| 8.0 + 12.0 * f64::from(i) / 29.0).collect();
        let predicted: Vec<f64> = moisture
            .iter()
            .zip(&e)
            .map(|(m, z)| 14.0 + 1.25 * (m - 14.0) + 0.2 * z)
            .collect();
        let lab: Vec<f64> = moisture.iter().zip(&l).map(|(m, z)| m + 0.05 * z).collect();
        let b = bias_slope(&lab, &predicted, 0.05).unwrap();
        assert!(b.slope_correctable(), "{b:?}");
        assert_eq!(b.recommended(), Correction::BiasAndSlope);
        assert!((b.slope - 0.8).abs() < 0.02, "{b:?}");
    }
}
