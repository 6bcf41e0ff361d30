//! Calibration statistics as practised for moisture and NIR calibrations
//! (feature `fit`).
//!
//! Conventions (ISO 12099:2017 style; IUPAC chemometrics vocabulary,
//! Pure Appl. Chem. 88:407, 2016):
//! - residual `e_i = predicted_i - reference_i`, in % moisture;
//! - `bias = mean(e)`; `RMSEP = sqrt(sum e^2 / n)`;
//!   `SEP = sqrt(sum (e - bias)^2 / (n - 1))` (bias-corrected), so that
//!   `RMSEP^2 = bias^2 + SEP^2 (n - 1) / n`;
//! - `SEC = sqrt(sum e^2 / (n - k))` on the calibration set itself, `k` the
//!   number of fitted coefficients including the constant;
//! - `slope`: the **reference regressed on the predicted** values (the
//!   direction ISO 12099 uses for a slope correction; from memory, see
//!   docs/REFERENCES.md section 8); `R^2` the squared correlation of predicted
//!   and reference; `RPD = SD(reference) / SEP`.
//!
//! Cross-validation ([`cross_validate`]) takes any fit-and-predict closure;
//! leverage, studentized residuals and prediction intervals
//! ([`diagnostics`], [`prediction_interval`]) are for linear models
//! ([`crate::regression::LinearFit`]).

use nalgebra::DMatrix;
use statrs::distribution::{ContinuousCDF, StudentsT};

use crate::regression::LinearFit;

/// Why a statistic could not be computed.
#[derive(Debug, Clone, Copy, PartialEq)]
#[non_exhaustive]
pub enum StatsError {
    /// Too few values for the statistic.
    TooFew {
        /// Minimum number.
        needed: usize,
        /// Number given.
        got: usize,
    },
    /// Two inputs that must pair up have different lengths.
    LengthMismatch {
        /// Which input.
        what: &'static str,
        /// Expected length.
        expected: usize,
        /// Given length.
        got: usize,
    },
    /// A value is NaN or infinite.
    NonFinite {
        /// Which input.
        what: &'static str,
        /// Index of the first bad value.
        index: usize,
    },
    /// Folds cannot be formed (`k` below 2 or above `n`).
    BadFolds {
        /// Requested number of folds.
        k: usize,
        /// Number of samples.
        n: usize,
    },
    /// A confidence level outside (0, 1).
    BadConfidence(f64),
    /// A significance level (a test's alpha) outside (0, 0.5].
    BadSignificance(f64),
    /// Values that must vary do not (all equal, or equal within rounding).
    NoSpread {
        /// Which input.
        what: &'static str,
        /// Number of values.
        n: usize,
    },
}

impl core::fmt::Display for StatsError {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        match self {
            StatsError::TooFew { needed, got } => {
                write!(f, "{got} values given, at least {needed} needed")
            }
            StatsError::LengthMismatch {
                what,
                expected,
                got,
            } => write!(f, "{what} has {got} values, expected {expected}"),
            StatsError::NonFinite { what, index } => {
                write!(f, "{what}[{index}] is NaN or infinite")
            }
            StatsError::BadFolds { k, n } => write!(
                f,
                "cannot split {n} samples into {k} folds (need 2 <= k <= n)"
            ),
            StatsError::BadConfidence(c) => {
                write!(f, "confidence level {c} must lie strictly between 0 and 1")
            }
            StatsError::BadSignificance(a) => write!(
                f,
                "significance level {a} must lie above 0 and at most 0.5 (e.g. 0.05 for 95 % confidence)"
            ),
            StatsError::NoSpread { what, n } => write!(
                f,
                "the {n} {what} values do not vary (all equal within rounding): no slope can be estimated from them"
            ),
        }
    }
}

impl std::error::Error for StatsError {}

fn check_pair(reference: &[f64], predicted: &[f64], needed: usize) -> Result<(), StatsError> {
    if predicted.len() != reference.len() {
        return Err(StatsError::LengthMismatch {
            what: "predicted",
            expected: reference.len(),
            got: predicted.len(),
        });
    }
    if reference.len() < needed {
        return Err(StatsError::TooFew {
            needed,
            got: reference.len(),
        });
    }
    for (what, v) in [("reference", reference), ("predicted", predicted)] {
        if let Some(index) = v.iter().position(|x| !x.is_finite()) {
            return Err(StatsError::NonFinite { what, index });
        }
    }
    Ok(())
}

fn mean(v: &[f64]) -> f64 {
    v.iter().sum::<f64>() / v.len() as f64
}

/// Sample standard deviation (`n - 1` in the denominator).
fn sd(v: &[f64]) -> f64 {
    let m = mean(v);
    (v.iter().map(|x| (x - m) * (x - m)).sum::<f64>() / (v.len() - 1) as f64).sqrt()
}

/// Validation (or cross-validation) statistics of predictions against
/// reference values, all in the unit of the values (% moisture).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PredictionStats {
    /// Number of samples.
    pub n: usize,
    /// Mean of `predicted - reference`.
    pub bias: f64,
    /// Root mean square error of prediction, `sqrt(sum e^2 / n)`.
    pub rmsep: f64,
    /// Standard error of prediction, bias-corrected, `n - 1` denominator.
    pub sep: f64,
    /// Slope of reference regressed on predicted.
    pub slope: f64,
    /// Intercept of reference regressed on predicted.
    pub intercept: f64,
    /// Squared correlation of predicted and reference.
    pub r_squared: f64,
    /// Sample SD of the reference values.
    pub sd_reference: f64,
    /// Ratio of performance to deviation, `sd_reference / sep`.
    pub rpd: f64,
}

impl PredictionStats {
    /// Statistics of `predicted` against `reference` (paired by index).
    ///
    /// # Errors
    /// [`StatsError::TooFew`] below 3 samples, [`StatsError::LengthMismatch`],
    /// [`StatsError::NonFinite`].
    pub fn new(reference: &[f64], predicted: &[f64]) -> Result<Self, StatsError> {
        check_pair(reference, predicted, 3)?;
        let n = reference.len();
        let e: Vec<f64> = predicted
            .iter()
            .zip(reference)
            .map(|(p, r)| p - r)
            .collect();
        let bias = mean(&e);
        let rmsep = (e.iter().map(|x| x * x).sum::<f64>() / n as f64).sqrt();
        let sep = sd(&e);
        let (mr, mp) = (mean(reference), mean(predicted));
        let (mut sxy, mut sxx, mut syy) = (0.0, 0.0, 0.0);
        for (r, p) in reference.iter().zip(predicted) {
            sxy += (p - mp) * (r - mr);
            sxx += (p - mp) * (p - mp);
            syy += (r - mr) * (r - mr);
        }
        let slope = sxy / sxx;
        let sd_reference = sd(reference);
        Ok(PredictionStats {
            n,
            bias,
            rmsep,
            sep,
            slope,
            intercept: mr - slope * mp,
            r_squared: sxy * sxy / (sxx * syy),
            sd_reference,
            rpd: sd_reference / sep,
        })
    }
}

/// Standard error of calibration, `sqrt(sum (fitted - reference)^2 / (n - k))`
/// with `k` fitted coefficients (constant included).
///
/// # Errors
/// [`StatsError::TooFew`] unless `n > k`, [`StatsError::LengthMismatch`],
/// [`StatsError::NonFinite`].
pub fn sec(reference: &[f64], fitted: &[f64], n_coef: usize) -> Result<f64, StatsError> {
    check_pair(reference, fitted, n_coef + 1)?;
    let rss: f64 = fitted
        .iter()
        .zip(reference)
        .map(|(f, r)| (f - r) * (f - r))
        .sum();
    Ok((rss / (reference.len() - n_coef) as f64).sqrt())
}

/// How samples are split for cross-validation.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Folds {
    /// Each sample predicted from a model fitted on all the others.
    LeaveOneOut,
    /// `k` folds by "venetian blinds": sample `i` (in the order given) is in
    /// fold `i % k`. Deterministic; sort the samples (e.g. by reference
    /// value) first if the order carries structure.
    KFold(usize),
}

impl Folds {
    /// Test indices of each fold for `n` samples.
    ///
    /// # Errors
    /// [`StatsError::BadFolds`] when `k < 2` or `k > n`.
    pub fn split(&self, n: usize) -> Result<Vec<Vec<usize>>, StatsError> {
        let k = match *self {
            Folds::LeaveOneOut => n,
            Folds::KFold(k) => k,
        };
        if k < 2 || k > n {
            return Err(StatsError::BadFolds { k, n });
        }
        let mut folds = vec![Vec::new(); k];
        for i in 0..n {
            folds[i % k].push(i);
        }
        Ok(folds)
    }
}

/// A cross-validation failure: the split, or the fit of one fold.
#[derive(Debug, Clone, PartialEq)]
pub enum CvError<E> {
    /// The folds could not be formed.
    Folds(StatsError),
    /// The fit-and-predict step failed on a fold.
    Fit {
        /// Fold number (0-based).
        fold: usize,
        /// The fit's error.
        error: E,
    },
    /// The closure returned the wrong number of predictions.
    WrongCount {
        /// Fold number.
        fold: usize,
        /// Predictions expected (the fold's size).
        expected: usize,
        /// Predictions returned.
        got: usize,
    },
}

impl<E: core::fmt::Display> core::fmt::Display for CvError<E> {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        match self {
            CvError::Folds(e) => write!(f, "cross-validation: {e}"),
            CvError::Fit { fold, error } => {
                write!(f, "cross-validation fold {}: {error}", fold + 1)
            }
            CvError::WrongCount {
                fold,
                expected,
                got,
            } => write!(
                f,
                "cross-validation fold {}: {got} predictions for {expected} samples",
                fold + 1
            ),
        }
    }
}

impl<E: core::fmt::Debug + core::fmt::Display> std::error::Error for CvError<E> {}

/// Out-of-fold predictions for `n` samples.
///
/// For each fold, `fit_predict(train, test)` fits on the samples `train`
/// and returns one prediction for each sample in `test` (in that order).
/// The result holds every sample's prediction from the fold that left it
/// out, in the original order.
///
/// # Errors
/// [`CvError::Folds`] for an impossible split, [`CvError::Fit`] naming the
/// fold whose fit failed, [`CvError::WrongCount`].
pub fn cross_validate<E, F>(
    n: usize,
    folds: Folds,
    mut fit_predict: F,
) -> Result<Vec<f64>, CvError<E>>
where
    F: FnMut(&[usize], &[usize]) -> Result<Vec<f64>, E>,
{
    let split = folds.split(n).map_err(CvError::Folds)?;
    let mut out = vec![f64::NAN; n];
    let mut train = Vec::with_capacity(n);
    for (fold, test) in split.iter().enumerate() {
        train.clear();
        let mut t = test.iter().peekable();
        for i in 0..n {
            if t.peek() == Some(&&i) {
                t.next();
            } else {
                train.push(i);
            }
        }
        let pred = fit_predict(&train, test).map_err(|error| CvError::Fit { fold, error })?;
        if pred.len() != test.len() {
            return Err(CvError::WrongCount {
                fold,
                expected: test.len(),
                got: pred.len(),
            });
        }
        for (i, p) in test.iter().zip(pred) {
            out[*i] = p;
        }
    }
    Ok(out)
}

/// Thresholds for flagging calibration samples.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct OutlierRule {
    /// Flag a sample whose externally studentized residual exceeds this in
    /// magnitude (3.0 by default; common practice, no source).
    pub studentized: f64,
    /// Flag a sample whose leverage exceeds `leverage_factor * p / n`
    /// (3.0 by default, i.e. three times the mean leverage; common practice
    /// in chemometrics, no source).
    pub leverage_factor: f64,
}

impl Default for OutlierRule {
    fn default() -> Self {
        OutlierRule {
            studentized: 3.0,
            leverage_factor: 3.0,
        }
    }
}

/// Per-sample diagnostics of a linear calibration fit.
#[derive(Debug, Clone, PartialEq)]
pub struct Diagnostics {
    /// Hat values `h_ii` (they sum to the number of coefficients).
    pub leverage: Vec<f64>,
    /// Internally studentized residuals `e_i / (s sqrt(1 - h_ii))`, with
    /// `e_i = y_i - yhat_i` (weighted).
    pub studentized: Vec<f64>,
    /// Externally studentized residuals (`s` from the fit without sample i;
    /// Belsley, Kuh and Welsch, Regression Diagnostics, 1980, eq. 2.8).
    pub externally_studentized: Vec<f64>,
    /// Leave-one-out (PRESS) residuals `e_i / (1 - h_ii)`, unweighted
    /// (`y_i - yhat_(i)`): exact for least squares, no refit needed.
    pub press_residuals: Vec<f64>,
    /// Samples flagged as outliers by the studentized residual.
    pub outliers: Vec<usize>,
    /// Samples flagged for high leverage.
    pub high_leverage: Vec<usize>,
    /// Largest hat value in the calibration set (an extrapolation bound for
    /// new readings, see [`prediction_interval`]).
    pub max_leverage: f64,
}

/// Leverage, studentized residuals and flags of a linear fit made by
/// [`crate::regression::fit_linear`] from `design` (and the same `sigma`).
///
/// # Errors
/// [`StatsError::LengthMismatch`] when `design` or `sigma` does not match
/// the fit; [`StatsError::TooFew`] when `n - p < 2` (no external variance).
pub fn diagnostics(
    design: &DMatrix<f64>,
    fit: &LinearFit,
    sigma: Option<&[f64]>,
    rule: &OutlierRule,
) -> Result<Diagnostics, StatsError> {
    let (n, p) = design.shape();
    if fit.residuals.len() != n || fit.coef.len() != p {
        return Err(StatsError::LengthMismatch {
            what: "design rows",
            expected: fit.residuals.len(),
            got: n,
        });
    }
    if let Some(s) = sigma {
        if s.len() != n {
            return Err(StatsError::LengthMismatch {
                what: "sigma",
                expected: n,
                got: s.len(),
            });
        }
    }
    if n < p + 2 {
        return Err(StatsError::TooFew {
            needed: p + 2,
            got: n,
        });
    }
    let dof = (n - p) as f64;
    let s2 = fit.residual_sd * fit.residual_sd;
    let mut d = Diagnostics {
        leverage: Vec::with_capacity(n),
        studentized: Vec::with_capacity(n),
        externally_studentized: Vec::with_capacity(n),
        press_residuals: Vec::with_capacity(n),
        outliers: Vec::new(),
        high_leverage: Vec::new(),
        max_leverage: 0.0,
    };
    let row = |i: usize| -> Vec<f64> { design.row(i).iter().copied().collect() };
    for i in 0..n {
        let w = sigma.map_or(1.0, |s| 1.0 / (s[i] * s[i]));
        let h = w * fit.leverage(&row(i));
        let e = fit.residuals[i];
        let ew = e * w.sqrt();
        let one_h = (1.0 - h).max(f64::EPSILON);
        let r = ew / (s2 * one_h).sqrt();
        let s2_i = ((dof * s2 - ew * ew / one_h) / (dof - 1.0)).max(0.0);
        let t = ew / (s2_i * one_h).sqrt();
        d.leverage.push(h);
        d.studentized.push(r);
        d.externally_studentized.push(t);
        d.press_residuals.push(e / one_h);
        if t.abs() > rule.studentized {
            d.outliers.push(i);
        }
        if h > rule.leverage_factor * p as f64 / n as f64 {
            d.high_leverage.push(i);
        }
        d.max_leverage = d.max_leverage.max(h);
    }
    Ok(d)
}

/// A prediction with its interval for one new reading.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PredictionInterval {
    /// Predicted value `x0' b`.
    pub value: f64,
    /// Lower end of the interval.
    pub lower: f64,
    /// Upper end of the interval.
    pub upper: f64,
    /// Leverage of the new reading, `x0' (A'A)^-1 x0`.
    pub leverage: f64,
    /// The leverage exceeds the largest of the calibration set: the reading
    /// lies outside the calibration data (extrapolation).
    pub extrapolation: bool,
}

/// Two-sided prediction interval at `confidence` (e.g. 0.95) for a new
/// observation with design row `x0`, from an unweighted linear fit:
/// `yhat +/- t(1 - a/2, n - p) s sqrt(1 + h0)` (Draper and Smith, Applied
/// Regression Analysis, 3rd ed., 1998, section 3.2).
///
/// `max_leverage` is the calibration set's largest hat value
/// ([`Diagnostics::max_leverage`]); a new reading beyond it is flagged.
///
/// # Errors
/// [`StatsError::BadConfidence`], [`StatsError::LengthMismatch`] when `x0`
/// does not match the fit, [`StatsError::NonFinite`] for a bad `x0`.
pub fn prediction_interval(
    fit: &LinearFit,
    x0: &[f64],
    confidence: f64,
    max_leverage: f64,
) -> Result<PredictionInterval, StatsError> {
    if !(confidence > 0.0 && confidence < 1.0) {
        return Err(StatsError::BadConfidence(confidence));
    }
    if x0.len() != fit.coef.len() {
        return Err(StatsError::LengthMismatch {
            what: "x0",
            expected: fit.coef.len(),
            got: x0.len(),
        });
    }
    if let Some(index) = x0.iter().position(|v| !v.is_finite()) {
        return Err(StatsError::NonFinite { what: "x0", index });
    }
    let t = t_quantile(0.5 + confidence / 2.0, fit.dof as f64)?;
    let h0 = fit.leverage(x0);
    let value = fit.predict(x0);
    let half = t * fit.residual_sd * (1.0 + h0).sqrt();
    Ok(PredictionInterval {
        value,
        lower: value - half,
        upper: value + half,
        leverage: h0,
        extrapolation: h0 > max_leverage,
    })
}

/// Wilcoxon's signed-rank test of paired differences `d` (Wilcoxon,
/// Biometrics Bulletin 1:80-83, 1945; the large-sample normal form as in
/// Hollander and Wolfe, Nonparametric Statistical Methods, ch. 3; from
/// memory): zero differences are dropped, the others ranked by size (ties
/// at their mean rank), and `W+` is the sum of the ranks of the positive
/// ones. Under the null hypothesis (differences symmetric about zero) `W+`
/// has mean `m (m + 1) / 4` and variance `m (m + 1) (2m + 1) / 24` less
/// `sum (t^3 - t) / 48` over groups of `t` tied sizes; `z` is the
/// standardised `W+` without a continuity correction. Checked against
/// `scipy.stats.wilcoxon(d, zero_method="wilcox", correction=False,
/// alternative="greater", method="approx")` (and the exact p value with
/// `method="exact"`) in `tests/signed_rank_scipy.rs`. `None` with fewer
/// than three non-zero differences or a non-finite one.
pub fn signed_rank(d: &[f64]) -> Option<SignedRank> {
    if !d.iter().all(|v| v.is_finite()) {
        return None;
    }
    let mut abs: Vec<(f64, bool)> = d
        .iter()
        .filter(|v| **v != 0.0)
        .map(|v| (v.abs(), *v > 0.0))
        .collect();
    let m = abs.len();
    if m < 3 {
        return None;
    }
    abs.sort_by(|a, b| a.0.total_cmp(&b.0));
    let (mut w_plus, mut ties) = (0.0, 0.0);
    // Each difference's rank, doubled (mean ranks of ties are halves).
    let mut ranks2: Vec<usize> = Vec::with_capacity(m);
    let mut k = 0;
    while k < m {
        let mut e = k;
        while e + 1 < m && abs[e + 1].0 == abs[k].0 {
            e += 1;
        }
        // Ranks k+1 ..= e+1 share their mean.
        let rank = (k + e) as f64 / 2.0 + 1.0;
        w_plus += rank * abs[k..=e].iter().filter(|a| a.1).count() as f64;
        ranks2.extend(std::iter::repeat_n(k + e + 2, e - k + 1));
        let t = (e - k + 1) as f64;
        ties += t * t * t - t;
        k = e + 1;
    }
    // Exact for few differences: the share of the 2^m sign patterns of
    // these ranks whose positive ranks sum to W+ or more (the permutation
    // null the normal form approximates; with ties, conditional on them).
    let p_exact = (m <= EXACT_MAX).then(|| {
        let total: usize = ranks2.iter().sum();
        let mut count = vec![0.0f64; total + 1];
        count[0] = 1.0;
        let mut reach = 0;
        for r in &ranks2 {
            for s in (0..=reach).rev() {
                if count[s] > 0.0 {
                    count[s + r] += count[s];
                }
            }
            reach += r;
        }
        let w2 = (2.0 * w_plus).round() as usize;
        count[w2.min(total + 1)..].iter().sum::<f64>() / 2f64.powi(m as i32)
    });
    let mf = m as f64;
    let mean = mf * (mf + 1.0) / 4.0;
    let var = mf * (mf + 1.0) * (2.0 * mf + 1.0) / 24.0 - ties / 48.0;
    let z = if var > 0.0 {
        (w_plus - mean) / var.sqrt()
    } else {
        0.0
    };
    Some(SignedRank {
        m,
        w_plus,
        z,
        p_exact,
    })
}

/// Up to this many non-zero differences [`signed_rank`] also gives the
/// exact one-sided p value (the normal form is poor below about 20: with
/// 4 positive differences of 4 it gives z 1.83, p 0.034, where the exact p
/// is 1/16).
pub const EXACT_MAX: usize = 25;

/// The result of [`signed_rank`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SignedRank {
    /// Non-zero differences ranked.
    pub m: usize,
    /// Sum of the ranks of the positive differences.
    pub w_plus: f64,
    /// `W+` standardised under the null hypothesis (normal approximation).
    pub z: f64,
    /// With at most [`EXACT_MAX`] differences: the exact probability of a
    /// `W+` this large or larger under the null hypothesis.
    pub p_exact: Option<f64>,
}

impl SignedRank {
    /// One-sided p value of `W+` this large or larger: exact with at most
    /// [`EXACT_MAX`] differences, else from the normal form.
    pub fn p_greater(&self) -> f64 {
        self.p_exact.unwrap_or_else(|| {
            statrs::distribution::Normal::new(0.0, 1.0)
                .map(|n| 1.0 - n.cdf(self.z))
                .unwrap_or(f64::NAN)
        })
    }
}

/// Quantile of the standard normal distribution (`p` in (0, 1)).
///
/// # Errors
/// [`StatsError::BadConfidence`] for `p` outside (0, 1).
pub fn normal_quantile(p: f64) -> Result<f64, StatsError> {
    if !(p > 0.0 && p < 1.0) {
        return Err(StatsError::BadConfidence(p));
    }
    let n =
        statrs::distribution::Normal::new(0.0, 1.0).map_err(|_| StatsError::BadConfidence(p))?;
    Ok(n.inverse_cdf(p))
}

/// Quantile of Student's t distribution with `dof` degrees of freedom.
///
/// # Errors
/// [`StatsError::BadConfidence`] for `p` outside (0, 1);
/// [`StatsError::TooFew`] for `dof < 1`.
pub fn t_quantile(p: f64, dof: f64) -> Result<f64, StatsError> {
    if !(p > 0.0 && p < 1.0) {
        return Err(StatsError::BadConfidence(p));
    }
    let t = StudentsT::new(0.0, 1.0, dof).map_err(|_| StatsError::TooFew { needed: 1, got: 0 })?;
    if dof >= 1e4 {
        // statrs' inverse loses digits past 1e4 degrees of freedom and does
        // not return at 1e8; there the expansion of t in the normal
        // quantile (Abramowitz and Stegun 26.7.5, from memory) agrees with
        // SciPy to about 1e-14 for p in [1e-4, 0.9999] (its next term is of
        // order dof^-4).
        let z = normal_quantile(p)?;
        let (z2, g) = (z * z, 1.0 / dof);
        let t1 = z * (z2 + 1.0) / 4.0;
        let t2 = z * ((5.0 * z2 + 16.0) * z2 + 3.0) / 96.0;
        let t3 = z * (((3.0 * z2 + 19.0) * z2 + 17.0) * z2 - 15.0) / 384.0;
        return Ok(z + g * (t1 + g * (t2 + g * t3)));
    }
    Ok(t.inverse_cdf(p))
}

/// Indices of the inputs of `x` that lie outside `[min, max]` of `ranges`
/// (a NaN is always outside): the range check for extrapolation.
pub fn out_of_range(ranges: &[(f64, f64)], x: &[f64]) -> Vec<usize> {
    ranges
        .iter()
        .zip(x)
        .enumerate()
        .filter(|(_, ((lo, hi), v))| !(**v >= *lo && **v <= *hi))
        .map(|(i, _)| i)
        .collect()
}

/// `[min, max]` of each column of `rows` (the calibration set's ranges).
pub fn column_ranges(rows: &[Vec<f64>]) -> Vec<(f64, f64)> {
    let p = rows.first().map_or(0, Vec::len);
    (0..p)
        .map(|j| {
            rows.iter()
                .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), r| {
                    (lo.min(r[j]), hi.max(r[j]))
                })
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::fit::{fit_linear, polynomial_design, SeededRng};

    /// An invented set with values computed once from the definitions of
    /// the IUPAC vocabulary (Pure Appl. Chem. 88:407, 2016), docs/REFERENCES.md
    /// section 8 [calc]. A regression test of this implementation, not an
    /// outside check: that is `prediction_statistics_agree_with_numpy_and_scipy`
    /// in tests/tests/outside.rs, against numpy and scipy.stats.
    const REF: [f64; 10] = [10.2, 11.5, 12.1, 13.0, 13.8, 14.6, 15.3, 16.9, 18.2, 19.5];
    const PRED: [f64; 10] = [10.5, 11.3, 12.4, 13.2, 13.7, 15.0, 15.2, 17.3, 18.0, 19.9];

    #[test]
    fn regression_values_of_an_invented_set() {
        let s = PredictionStats::new(&REF, &PRED).unwrap();
        assert_eq!(s.n, 10);
        assert!((s.bias - 0.1400).abs() < 5e-5, "bias {}", s.bias);
        assert!((s.rmsep - 0.2828).abs() < 5e-5, "RMSEP {}", s.rmsep);
        assert!((s.sep - 0.2591).abs() < 5e-5, "SEP {}", s.sep);
        assert!((s.r_squared - 0.99274).abs() < 5e-6, "R^2 {}", s.r_squared);
        assert!((s.rpd - 11.587).abs() < 5e-4, "RPD {}", s.rpd);
        // Reference on predicted (ISO 12099 direction); the other direction
        // would give 1.00649.
        assert!((s.slope - 0.98634).abs() < 5e-6, "slope {}", s.slope);
    }

    /// The identity RMSEP^2 = bias^2 + SEP^2 (n-1)/n (docs/REFERENCES.md
    /// section 8) on random sets; seeded, the seed is printed on failure.
    #[test]
    fn rmsep_bias_sep_identity() {
        for seed in 1..200u64 {
            let mut rng = SeededRng::new(seed);
            let n = 3 + (rng.uniform() * 40.0) as usize;
            let r: Vec<f64> = (0..n).map(|_| 5.0 + 20.0 * rng.uniform()).collect();
            let p: Vec<f64> = r.iter().map(|v| v + rng.uniform() - 0.3).collect();
            let s = PredictionStats::new(&r, &p).unwrap();
            let lhs = s.rmsep * s.rmsep;
            let rhs = s.bias * s.bias + s.sep * s.sep * (n as f64 - 1.0) / n as f64;
            assert!(
                (lhs - rhs).abs() < 1e-12 * lhs.max(1e-12),
                "seed {seed}: {lhs} vs {rhs}"
            );
        }
    }

    /// SEC divides by n - k.
    #[test]
    fn sec_uses_degrees_of_freedom() {
        let v = sec(&[1.0, 2.0, 3.0, 4.0], &[1.5, 2.0, 2.5, 4.0], 2).unwrap();
        assert!((v - (0.5f64 / 2.0).sqrt()).abs() < 1e-15);
        assert!(sec(&[1.0, 2.0], &[1.0, 2.0], 2).is_err());
    }

    /// Student t quantiles against the NIST/SEMATECH e-Handbook of
    /// Statistical Methods, table 1.3.6.7.2 (upper critical values).
    #[test]
    fn t_quantiles_match_the_table() {
        assert!((t_quantile(0.975, 10.0).unwrap() - 2.228).abs() < 5e-4);
        assert!((t_quantile(0.975, 30.0).unwrap() - 2.042).abs() < 5e-4);
        assert!((t_quantile(0.95, 5.0).unwrap() - 2.015).abs() < 5e-4);
    }

    /// Past 1e4 degrees of freedom (a lab would not reach them, a long
    /// line's readings can): values of SciPy 1.17.1's `stats.t.ppf`,
    /// computed once and written here; before, 1e8 did not return.
    #[test]
    fn t_quantiles_at_many_degrees_of_freedom_match_scipy() {
        for (dof, p975, p995) in [
            (1e4, 1.960201239890626, 2.5763210466685282),
            (1e5, 1.9599877075346095, 2.575878469908375),
            (1e6, 1.959966356814107, 2.5758342201053344),
            (1e8, 1.9599640082627663, 2.5758293527143774),
        ] {
            for (p, want) in [(0.975, p975), (0.995, p995)] {
                let t = t_quantile(p, dof).unwrap();
                assert!(
                    (t - want).abs() < 1e-11,
                    "t({p}, {dof}) {t} vs SciPy {want}"
                );
            }
        }
        // Continuous where the expansion takes over.
        let below = t_quantile(0.975, 9999.0).unwrap();
        let at = t_quantile(0.975, 1e4).unwrap();
        assert!(below > at && below - at < 1e-7, "{below} {at}");
    }

    #[test]
    fn folds_split_and_refuse() {
        let f = Folds::KFold(3).split(7).unwrap();
        assert_eq!(f, vec![vec![0, 3, 6], vec![1, 4], vec![2, 5]]);
        assert_eq!(Folds::LeaveOneOut.split(3).unwrap().len(), 3);
        assert_eq!(
            Folds::KFold(8).split(7),
            Err(StatsError::BadFolds { k: 8, n: 7 })
        );
    }

    fn line_data(seed: u64, n: usize) -> (Vec<f64>, Vec<f64>) {
        let mut rng = SeededRng::new(seed);
        let x: Vec<f64> = (0..n).map(|_| 10.0 * rng.uniform()).collect();
        let y: Vec<f64> = x
            .iter()
            .map(|v| 1.0 + 0.5 * v + 0.05 * v * v + rng.normal() * 0.3)
            .collect();
        (x, y)
    }

    fn fit_predict_quadratic(x: &[f64], y: &[f64], train: &[usize], test: &[usize]) -> Vec<f64> {
        let xt: Vec<f64> = train.iter().map(|i| x[*i]).collect();
        let yt: Vec<f64> = train.iter().map(|i| y[*i]).collect();
        let fit = fit_linear(&polynomial_design(&xt, 2), &yt, None).unwrap();
        test.iter()
            .map(|i| fit.predict(&[1.0, x[*i], x[*i] * x[*i]]))
            .collect()
    }

    /// Leave-one-out by refitting equals the PRESS residuals e/(1-h) of the
    /// full fit (an exact identity of least squares: Belsley, Kuh and
    /// Welsch 1980, eq. 2.2), and the externally studentized residual equals
    /// the one computed from the refit without the sample; k-fold with
    /// k = n equals leave-one-out.
    #[test]
    fn loo_refit_equals_press_identity() {
        let seed = 7;
        let (x, y) = line_data(seed, 25);
        let design = polynomial_design(&x, 2);
        let fit = fit_linear(&design, &y, None).unwrap();
        let d = diagnostics(&design, &fit, None, &OutlierRule::default()).unwrap();
        let loo = cross_validate::<(), _>(x.len(), Folds::LeaveOneOut, |tr, te| {
            Ok(fit_predict_quadratic(&x, &y, tr, te))
        })
        .unwrap();
        let kn = cross_validate::<(), _>(x.len(), Folds::KFold(x.len()), |tr, te| {
            Ok(fit_predict_quadratic(&x, &y, tr, te))
        })
        .unwrap();
        assert_eq!(loo, kn);
        for i in 0..x.len() {
            let press = y[i] - loo[i];
            assert!(
                (press - d.press_residuals[i]).abs() < 1e-9,
                "seed {seed} sample {i}"
            );
            // s_(i) from the refit without i.
            let keep: Vec<usize> = (0..x.len()).filter(|j| *j != i).collect();
            let xt: Vec<f64> = keep.iter().map(|j| x[*j]).collect();
            let yt: Vec<f64> = keep.iter().map(|j| y[*j]).collect();
            let fi = fit_linear(&polynomial_design(&xt, 2), &yt, None).unwrap();
            let t = fit.residuals[i] / (fi.residual_sd * (1.0 - d.leverage[i]).sqrt());
            assert!(
                (t - d.externally_studentized[i]).abs() < 1e-9,
                "seed {seed} sample {i}"
            );
        }
        let trace: f64 = d.leverage.iter().sum();
        assert!((trace - 3.0).abs() < 1e-12, "hat values sum to p");
    }

    /// A gross error is flagged and a far-out x has high leverage.
    #[test]
    fn flags_outlier_and_leverage() {
        let (mut x, mut y) = line_data(11, 30);
        y[4] += 5.0;
        x.push(30.0);
        y.push(1.0 + 15.0 + 45.0);
        let design = polynomial_design(&x, 2);
        let fit = fit_linear(&design, &y, None).unwrap();
        let d = diagnostics(&design, &fit, None, &OutlierRule::default()).unwrap();
        assert!(d.outliers.contains(&4), "{:?}", d.outliers);
        assert!(d.high_leverage.contains(&30), "{:?}", d.high_leverage);
    }

    /// 95 % prediction intervals cover about 95 % of new observations
    /// (definition of the interval; seeded simulation, binomial bound).
    #[test]
    fn prediction_interval_coverage() {
        let seed = 3;
        let mut rng = SeededRng::new(seed);
        let mut covered = 0;
        let trials = 2000;
        for _ in 0..trials {
            let x: Vec<f64> = (0..12).map(|i| i as f64).collect();
            let y: Vec<f64> = x.iter().map(|v| 2.0 + 0.3 * v + rng.normal()).collect();
            let design = polynomial_design(&x, 1);
            let fit = fit_linear(&design, &y, None).unwrap();
            let x0 = 10.0 * rng.uniform();
            let pi = prediction_interval(&fit, &[1.0, x0], 0.95, 1.0).unwrap();
            let y0 = 2.0 + 0.3 * x0 + rng.normal();
            if y0 >= pi.lower && y0 <= pi.upper {
                covered += 1;
            }
        }
        let rate = covered as f64 / trials as f64;
        // 0.95 +/- 3 binomial SDs (0.0049 each at n = 2000)
        assert!((rate - 0.95).abs() < 0.015, "seed {seed}: coverage {rate}");
    }

    #[test]
    fn extrapolation_is_flagged() {
        let (x, y) = line_data(5, 20);
        let design = polynomial_design(&x, 1);
        let fit = fit_linear(&design, &y, None).unwrap();
        let d = diagnostics(&design, &fit, None, &OutlierRule::default()).unwrap();
        let inside = prediction_interval(&fit, &[1.0, 5.0], 0.95, d.max_leverage).unwrap();
        let outside = prediction_interval(&fit, &[1.0, 25.0], 0.95, d.max_leverage).unwrap();
        assert!(!inside.extrapolation && outside.extrapolation);
        assert!(outside.upper - outside.lower > inside.upper - inside.lower);
        let ranges = column_ranges(&[vec![1.0, 20.0], vec![3.0, 25.0]]);
        assert_eq!(out_of_range(&ranges, &[2.0, 26.0]), vec![1]);
        assert_eq!(out_of_range(&ranges, &[f64::NAN, 21.0]), vec![0]);
    }

    #[test]
    fn refuses_bad_input() {
        assert_eq!(
            PredictionStats::new(&[1.0, 2.0, 3.0], &[1.0, f64::NAN, 3.0]),
            Err(StatsError::NonFinite {
                what: "predicted",
                index: 1
            })
        );
        assert!(matches!(
            PredictionStats::new(&[1.0, 2.0], &[1.0, 2.0]),
            Err(StatsError::TooFew { needed: 3, got: 2 })
        ));
    }
}
