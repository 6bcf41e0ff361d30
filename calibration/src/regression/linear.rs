//! Linear least squares, ordinary or weighted, by a singular value
//! decomposition of the column-scaled design matrix.
//!
//! Scaling every column to unit length before the SVD removes the
//! ill-conditioning that comes only from units (a year next to a fraction, as
//! in NIST's Longley data); the SVD then handles what is left and reports a
//! rank-deficient design as an error instead of returning huge coefficients.
//! Normal equations are never formed, so the condition number is not squared.

use nalgebra::{DMatrix, DVector};

use super::{check_finite, check_sigma, FitError};

/// The result of a linear least-squares fit `y = A b + e`.
#[derive(Debug, Clone, PartialEq)]
pub struct LinearFit {
    /// Fitted coefficients `b`, one per column of the design matrix.
    pub coef: Vec<f64>,
    /// Standard error of each coefficient: `sqrt(diag(cov))`.
    pub std_err: Vec<f64>,
    /// Covariance of the coefficients, `s^2 (A' W A)^-1` with `s` the
    /// residual standard deviation (weights taken as relative, as regression
    /// software and the NIST StRD certified values do).
    pub covariance: DMatrix<f64>,
    /// `(A' W A)^-1`: the covariance when the given uncertainties are taken
    /// as absolute; used for leverages and prediction intervals.
    pub unscaled_covariance: DMatrix<f64>,
    /// Residuals `y - A b` (unweighted).
    pub residuals: Vec<f64>,
    /// Weighted residual sum of squares `sum w_i e_i^2` (`w_i = 1/sigma_i^2`,
    /// or 1 without uncertainties).
    pub rss: f64,
    /// Residual standard deviation `sqrt(rss / dof)`; with uncertainties it is
    /// the square root of the reduced chi-square.
    pub residual_sd: f64,
    /// Degrees of freedom `n - p`.
    pub dof: usize,
    /// Coefficient of determination about the (weighted) mean of `y`,
    /// `1 - rss / tss`; meaningful when the design has a constant column.
    pub r_squared: f64,
    /// 2-norm condition number of the column-scaled design matrix.
    pub condition: f64,
}

/// Fit `y = A b` by least squares, weighted by `1/sigma^2` when `sigma`
/// (one standard uncertainty per observation, same unit as `y`) is given.
///
/// `design` is `n x p` (one row per observation). A constant term is a
/// column of ones, which the caller supplies.
///
/// # Errors
/// [`FitError::TooFewObservations`] unless `n > p`; [`FitError::LengthMismatch`]
/// when `y` or `sigma` does not have `n` entries; [`FitError::NonFinite`] for a
/// NaN or infinite input; [`FitError::BadUncertainty`] for a `sigma` that is
/// not positive; [`FitError::RankDeficient`] when the columns are linearly
/// dependent to working precision.
pub fn fit_linear(
    design: &DMatrix<f64>,
    y: &[f64],
    sigma: Option<&[f64]>,
) -> Result<LinearFit, FitError> {
    let (n, p) = design.shape();
    if p == 0 || n <= p {
        return Err(FitError::TooFewObservations {
            needed: p + 1,
            got: n,
        });
    }
    if y.len() != n {
        return Err(FitError::LengthMismatch {
            what: "y",
            expected: n,
            got: y.len(),
        });
    }
    check_finite("y", y)?;
    check_finite("design matrix", design.as_slice())?;
    let w_sqrt: Vec<f64> = match sigma {
        Some(s) => {
            if s.len() != n {
                return Err(FitError::LengthMismatch {
                    what: "sigma",
                    expected: n,
                    got: s.len(),
                });
            }
            check_sigma(s)?;
            s.iter().map(|v| 1.0 / v).collect()
        }
        None => vec![1.0; n],
    };

    // Weighted design and response.
    let mut a = design.clone();
    for (i, w) in w_sqrt.iter().enumerate() {
        a.row_mut(i).scale_mut(*w);
    }
    let yw = DVector::from_iterator(n, y.iter().zip(&w_sqrt).map(|(v, w)| v * w));

    // Column scaling to unit 2-norm.
    let mut scale = vec![1.0; p];
    for (j, s) in scale.iter_mut().enumerate() {
        let norm = a.column(j).norm();
        if norm == 0.0 {
            return Err(FitError::RankDeficient {
                rank: p - 1,
                params: p,
            });
        }
        *s = norm;
        a.column_mut(j).unscale_mut(norm);
    }

    let svd = a.svd(true, true);
    let sv = &svd.singular_values;
    let s_max = sv.max();
    let s_min = sv.min();
    let tol = s_max * f64::EPSILON * n.max(p) as f64;
    let rank = sv.iter().filter(|s| **s > tol).count();
    if rank < p {
        return Err(FitError::RankDeficient { rank, params: p });
    }
    let (Some(u), Some(v_t)) = (svd.u.as_ref(), svd.v_t.as_ref()) else {
        return Err(FitError::RankDeficient { rank: 0, params: p });
    };
    // b_scaled = V S^-1 U' y
    let uty = u.transpose() * &yw;
    let mut tmp = uty.clone();
    for (t, s) in tmp.iter_mut().zip(sv.iter()) {
        *t /= s;
    }
    let b_scaled = v_t.transpose() * tmp;
    let coef: Vec<f64> = b_scaled.iter().zip(&scale).map(|(b, s)| b / s).collect();

    // (A'WA)^-1 = D^-1 V S^-2 V' D^-1
    let mut vs = v_t.transpose();
    for (j, s) in sv.iter().enumerate() {
        vs.column_mut(j).unscale_mut(*s);
    }
    let mut unscaled = &vs * vs.transpose();
    for i in 0..p {
        for j in 0..p {
            unscaled[(i, j)] /= scale[i] * scale[j];
        }
    }

    let fitted = design * DVector::from_column_slice(&coef);
    let residuals: Vec<f64> = y.iter().zip(fitted.iter()).map(|(a, b)| a - b).collect();
    let w: Vec<f64> = w_sqrt.iter().map(|v| v * v).collect();
    let rss: f64 = residuals
        .iter()
        .zip(&w)
        .map(|(e, w)| w * e * e)
        .sum::<f64>();
    let dof = n - p;
    let s2 = rss / dof as f64;
    let covariance = &unscaled * s2;
    let std_err = (0..p).map(|j| covariance[(j, j)].sqrt()).collect();
    let w_sum: f64 = w.iter().sum();
    let y_mean = y.iter().zip(&w).map(|(v, w)| v * w).sum::<f64>() / w_sum;
    let tss: f64 = y
        .iter()
        .zip(&w)
        .map(|(v, w)| w * (v - y_mean) * (v - y_mean))
        .sum();
    let r_squared = if tss > 0.0 { 1.0 - rss / tss } else { f64::NAN };
    Ok(LinearFit {
        coef,
        std_err,
        covariance,
        unscaled_covariance: unscaled,
        residuals,
        rss,
        residual_sd: s2.sqrt(),
        dof,
        r_squared,
        condition: s_max / s_min,
    })
}

/// Design matrix of a polynomial of `degree` in `x`: columns `1, x, x^2, ...`.
pub fn polynomial_design(x: &[f64], degree: usize) -> DMatrix<f64> {
    DMatrix::from_fn(x.len(), degree + 1, |i, j| x[i].powi(j as i32))
}

impl LinearFit {
    /// Leverage (hat value) of a design row `x0`: `x0' (A'WA)^-1 x0`.
    ///
    /// For an observation of the fit this is its hat value `h_ii` (times its
    /// weight, for a weighted fit); for a new point it measures how far the
    /// point lies from the centre of the calibration data.
    pub fn leverage(&self, x0: &[f64]) -> f64 {
        let v = DVector::from_column_slice(x0);
        (v.transpose() * &self.unscaled_covariance * &v)[(0, 0)]
    }

    /// Prediction `x0' b` for a design row.
    pub fn predict(&self, x0: &[f64]) -> f64 {
        x0.iter().zip(&self.coef).map(|(a, b)| a * b).sum()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A straight line through exact points comes back exactly, with zero
    /// residual (a check that needs no outside source).
    #[test]
    fn exact_line_is_recovered() {
        let x = [0.0, 1.0, 2.0, 3.0, 4.0];
        let y: Vec<f64> = x.iter().map(|v| 2.5 - 0.5 * v).collect();
        let fit = fit_linear(&polynomial_design(&x, 1), &y, None).unwrap();
        assert!((fit.coef[0] - 2.5).abs() < 1e-14);
        assert!((fit.coef[1] + 0.5).abs() < 1e-14);
        assert!(fit.rss < 1e-25);
    }

    /// Weighted least squares equals ordinary least squares on rows scaled by
    /// `1/sigma` (the definition of weighted least squares).
    #[test]
    fn weights_equal_scaled_rows() {
        let x = [0.0, 1.0, 2.0, 3.0, 4.0, 5.0];
        let y = [1.1, 2.9, 5.2, 6.8, 9.3, 10.9];
        let s = [0.1, 0.2, 0.1, 0.4, 0.2, 0.3];
        let fit = fit_linear(&polynomial_design(&x, 1), &y, Some(&s)).unwrap();
        let a = DMatrix::from_fn(6, 2, |i, j| x[i].powi(j as i32) / s[i]);
        let yw: Vec<f64> = y.iter().zip(&s).map(|(a, b)| a / b).collect();
        let plain = fit_linear(&a, &yw, None).unwrap();
        for j in 0..2 {
            assert!((fit.coef[j] - plain.coef[j]).abs() < 1e-12);
            assert!((fit.std_err[j] - plain.std_err[j]).abs() < 1e-12);
        }
        assert!((fit.rss - plain.rss).abs() < 1e-10);
    }

    #[test]
    fn refuses_bad_input() {
        let x = [0.0, 1.0, 2.0];
        let d = polynomial_design(&x, 1);
        assert!(matches!(
            fit_linear(&d, &[1.0, f64::NAN, 2.0], None),
            Err(FitError::NonFinite {
                what: "y",
                index: 1
            })
        ));
        assert!(matches!(
            fit_linear(&d, &[1.0, 2.0, 3.0], Some(&[1.0, 0.0, 1.0])),
            Err(FitError::BadUncertainty { index: 1, .. })
        ));
        assert!(matches!(
            fit_linear(&polynomial_design(&x, 2), &[1.0, 2.0, 3.0], None),
            Err(FitError::TooFewObservations { needed: 4, got: 3 })
        ));
        let dup = DMatrix::from_fn(4, 2, |i, _| i as f64);
        assert!(matches!(
            fit_linear(&dup, &[1.0, 2.0, 3.0, 4.0], None),
            Err(FitError::RankDeficient { rank: 1, params: 2 })
        ));
    }
}
