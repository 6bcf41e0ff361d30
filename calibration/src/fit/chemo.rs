//! Chemometric regression (feature `fit`): ridge regression and PLS1, and
//! the choice of the ridge penalty or the number of PLS components by
//! cross-validation.
//!
//! Conventions are scikit-learn's, so the two can be compared on the same
//! table (`calibration/tests/chemo_sklearn.rs`, values from scikit-learn
//! 1.9.1):
//!
//! - [`ridge`]: `Ridge(alpha, fit_intercept=True)`: minimises
//!   `||y - b0 - X b||^2 + alpha ||b||^2` with X and y centred (not scaled),
//!   the intercept unpenalised (Hoerl and Kennard, Technometrics 12:55-67,
//!   1970).
//! - [`pls1`]: `PLSRegression(n_components, scale=True)` for one response:
//!   X and y centred and scaled to unit standard deviation (n - 1), NIPALS
//!   (Wold 1966) with X and y deflated by each score; coefficients
//!   `W (P'W)^-1 q` returned in the original units.
//!
//! [`RidgePath`] solves the ridge problem on standardised columns for many
//! penalties from one singular value decomposition, with the exact
//! leave-one-out residuals of each (`e_i / (1 - h_ii)`, Allen's PRESS for
//! a linear smoother; the intercept's share 1/n included).

use nalgebra::{DMatrix, DVector};

use super::FitError;

/// A linear model in the original units: `y = intercept + sum coef_j x_j`.
#[derive(Debug, Clone, PartialEq)]
pub struct LinearModel {
    /// Intercept.
    pub intercept: f64,
    /// One coefficient per column.
    pub coef: Vec<f64>,
}

impl LinearModel {
    /// Prediction for one row.
    pub fn predict(&self, x: &[f64]) -> f64 {
        self.intercept + x.iter().zip(&self.coef).map(|(a, b)| a * b).sum::<f64>()
    }
}

fn check(x: &DMatrix<f64>, y: &[f64], min_rows: usize) -> Result<(), FitError> {
    let (n, _) = x.shape();
    if y.len() != n {
        return Err(FitError::LengthMismatch {
            what: "y",
            expected: n,
            got: y.len(),
        });
    }
    if n < min_rows {
        return Err(FitError::TooFewObservations {
            needed: min_rows,
            got: n,
        });
    }
    super::check_finite("y", y)?;
    super::check_finite("design matrix", x.as_slice())
}

fn column_means(x: &DMatrix<f64>) -> Vec<f64> {
    let n = x.nrows() as f64;
    (0..x.ncols()).map(|j| x.column(j).sum() / n).collect()
}

/// Ridge regression with an unpenalised intercept (scikit-learn's `Ridge`).
///
/// # Errors
/// [`FitError`] for mismatched lengths, fewer than 2 rows, non-finite
/// values, a negative or non-finite `alpha`, or a singular system (only
/// possible with `alpha = 0`).
pub fn ridge(x: &DMatrix<f64>, y: &[f64], alpha: f64) -> Result<LinearModel, FitError> {
    check(x, y, 2)?;
    if !(alpha >= 0.0 && alpha.is_finite()) {
        return Err(FitError::NonFinite {
            what: "alpha",
            index: 0,
        });
    }
    let (n, p) = x.shape();
    let mx = column_means(x);
    let my = y.iter().sum::<f64>() / n as f64;
    let xc = DMatrix::from_fn(n, p, |i, j| x[(i, j)] - mx[j]);
    let yc = DVector::from_iterator(n, y.iter().map(|v| v - my));
    let mut a = xc.transpose() * &xc;
    for j in 0..p {
        a[(j, j)] += alpha;
    }
    let b = a
        .cholesky()
        .ok_or(FitError::RankDeficient { rank: 0, params: p })?
        .solve(&(xc.transpose() * yc));
    let coef: Vec<f64> = b.iter().copied().collect();
    let intercept = my - mx.iter().zip(&coef).map(|(m, c)| m * c).sum::<f64>();
    Ok(LinearModel { intercept, coef })
}

/// Column means and standard deviations (n - 1; 1 for a constant column).
#[derive(Debug, Clone, PartialEq)]
pub struct Scaling {
    /// Means.
    pub mean: Vec<f64>,
    /// Standard deviations.
    pub sd: Vec<f64>,
}

impl Scaling {
    /// The scaling of `x`'s columns.
    pub fn of(x: &DMatrix<f64>) -> Self {
        let n = x.nrows();
        let mean = column_means(x);
        let sd = (0..x.ncols())
            .map(|j| {
                let v = x
                    .column(j)
                    .iter()
                    .map(|a| (a - mean[j]).powi(2))
                    .sum::<f64>()
                    / (n.max(2) - 1) as f64;
                let s = v.sqrt();
                if s > 1e-12 * (1.0 + mean[j].abs()) {
                    s
                } else {
                    1.0
                }
            })
            .collect();
        Scaling { mean, sd }
    }

    /// `x` centred and scaled.
    pub fn apply(&self, x: &DMatrix<f64>) -> DMatrix<f64> {
        DMatrix::from_fn(x.nrows(), x.ncols(), |i, j| {
            (x[(i, j)] - self.mean[j]) / self.sd[j]
        })
    }

    /// A model on scaled columns (`coef_z`, intercept `b0_z`) in the
    /// original units.
    pub fn unscale(&self, b0_z: f64, coef_z: &[f64]) -> LinearModel {
        let coef: Vec<f64> = coef_z.iter().zip(&self.sd).map(|(c, s)| c / s).collect();
        let intercept = b0_z - self.mean.iter().zip(&coef).map(|(m, c)| m * c).sum::<f64>();
        LinearModel { intercept, coef }
    }

    /// `T` of z = T [1, x]: the map from an augmented raw row to the scaled row.
    fn augmented_map(&self) -> DMatrix<f64> {
        let p = self.mean.len();
        DMatrix::from_fn(p, p + 1, |i, j| {
            if j == 0 {
                -self.mean[i] / self.sd[i]
            } else if j == i + 1 {
                1.0 / self.sd[i]
            } else {
                0.0
            }
        })
    }

    /// `(A'A)^-1`-like matrix of a regression on scaled columns in the
    /// augmented raw space `[1, x]`: `e1 e1'/n + T' m T`, with `m` the
    /// scaled-space matrix whose quadratic form gives a row's leverage.
    pub fn leverage_matrix(&self, m: &DMatrix<f64>, n: usize) -> DMatrix<f64> {
        let t = self.augmented_map();
        let mut u = t.transpose() * m * &t;
        u[(0, 0)] += 1.0 / n as f64;
        u
    }
}

/// PLS1 fit with the quantities behind its leverage.
#[derive(Debug, Clone, PartialEq)]
pub struct PlsFit {
    /// The model in original units.
    pub model: LinearModel,
    /// Column scaling used.
    pub scaling: Scaling,
    /// Rotations R (p x k): scores `t = z R` for a scaled row z.
    pub rotations: DMatrix<f64>,
    /// `t_k' t_k` of each component's scores.
    pub score_ss: Vec<f64>,
}

impl PlsFit {
    /// Leverage matrix in the augmented raw space (see
    /// [`Scaling::leverage_matrix`]): `h = 1/n + sum_k t_k^2 / (t_k' t_k)`.
    pub fn leverage_matrix(&self, n: usize) -> DMatrix<f64> {
        let k = self.score_ss.len();
        let d = DMatrix::from_fn(
            k,
            k,
            |i, j| {
                if i == j {
                    1.0 / self.score_ss[i]
                } else {
                    0.0
                }
            },
        );
        let m = &self.rotations * d * self.rotations.transpose();
        self.scaling.leverage_matrix(&m, n)
    }
}

/// PLS1 by NIPALS (scikit-learn's `PLSRegression(scale=True)`, one response).
///
/// # Errors
/// [`FitError`] for mismatched lengths, fewer than 3 rows, non-finite
/// values, `n_components` of 0 or above the number of columns, or a
/// component with no variance left to explain.
pub fn pls1(x: &DMatrix<f64>, y: &[f64], n_components: usize) -> Result<PlsFit, FitError> {
    pls1_path(x, y, n_components)?
        .pop()
        .ok_or(FitError::RankDeficient {
            rank: 0,
            params: n_components,
        })
}

/// PLS1 fits with 1, 2, ..., `n_components` components from one NIPALS run
/// (the k-component model uses the first k weights and loadings), so
/// choosing the number of components costs one fit.
///
/// # Errors
/// As [`pls1`].
pub fn pls1_path(
    x: &DMatrix<f64>,
    y: &[f64],
    n_components: usize,
) -> Result<Vec<PlsFit>, FitError> {
    check(x, y, 3)?;
    let (n, p) = x.shape();
    if n_components == 0 || n_components > p {
        return Err(FitError::RankDeficient {
            rank: p,
            params: n_components,
        });
    }
    let scaling = Scaling::of(x);
    let mut xk = scaling.apply(x);
    let my = y.iter().sum::<f64>() / n as f64;
    let sy = (y.iter().map(|v| (v - my).powi(2)).sum::<f64>() / (n - 1) as f64).sqrt();
    let sy = if sy > 0.0 { sy } else { 1.0 };
    let mut yk = DVector::from_iterator(n, y.iter().map(|v| (v - my) / sy));
    let mut w = DMatrix::zeros(p, n_components);
    let mut pl = DMatrix::zeros(p, n_components);
    let mut q = DVector::zeros(n_components);
    let mut score_ss = Vec::with_capacity(n_components);
    for k in 0..n_components {
        let wk = xk.transpose() * &yk;
        let norm = wk.norm();
        if !(norm > 1e-12) {
            return Err(FitError::RankDeficient {
                rank: k,
                params: n_components,
            });
        }
        let wk = wk / norm;
        let t = &xk * &wk;
        let tt = t.dot(&t);
        if !(tt > 0.0) {
            return Err(FitError::RankDeficient {
                rank: k,
                params: n_components,
            });
        }
        let pk = xk.transpose() * &t / tt;
        let qk = yk.dot(&t) / tt;
        xk -= &t * pk.transpose();
        yk -= &t * qk;
        w.set_column(k, &wk);
        pl.set_column(k, &pk);
        q[k] = qk;
        score_ss.push(tt);
    }
    let mut out = Vec::with_capacity(n_components);
    for k in 1..=n_components {
        // R = W (P'W)^-1 over the first k components.
        let wk = w.columns(0, k).into_owned();
        let ptw = pl.columns(0, k).transpose() * &wk;
        let inv = ptw.try_inverse().ok_or(FitError::RankDeficient {
            rank: k - 1,
            params: n_components,
        })?;
        let rotations = wk * inv;
        let coef_z: Vec<f64> = (&rotations * q.rows(0, k)).iter().map(|c| c * sy).collect();
        out.push(PlsFit {
            model: scaling.unscale(my, &coef_z),
            scaling: scaling.clone(),
            rotations,
            score_ss: score_ss[..k].to_vec(),
        });
    }
    Ok(out)
}

/// Ridge solutions on standardised columns for many penalties from one SVD.
#[derive(Debug, Clone)]
pub struct RidgePath {
    scaling: Scaling,
    u: DMatrix<f64>,
    s: Vec<f64>,
    v: DMatrix<f64>,
    my: f64,
    uty: DVector<f64>,
    n: usize,
}

/// One penalty of a [`RidgePath`].
#[derive(Debug, Clone, PartialEq)]
pub struct RidgeAt {
    /// Penalty on the standardised columns.
    pub alpha: f64,
    /// Leave-one-out residuals `y_i - yhat_(i)`.
    pub loo_residuals: Vec<f64>,
    /// Residuals of the fit on all rows.
    pub residuals: Vec<f64>,
    /// Effective number of parameters `sum s^2 / (s^2 + alpha)` (the
    /// intercept not counted).
    pub edf: f64,
}

impl RidgePath {
    /// Prepares the path for `x` (n x p) and `y`.
    ///
    /// # Errors
    /// As [`ridge`].
    pub fn new(x: &DMatrix<f64>, y: &[f64]) -> Result<Self, FitError> {
        check(x, y, 3)?;
        let n = x.nrows();
        let scaling = Scaling::of(x);
        let z = scaling.apply(x);
        let my = y.iter().sum::<f64>() / n as f64;
        let yc = DVector::from_iterator(n, y.iter().map(|v| v - my));
        let svd = z.svd(true, true);
        let (Some(u), Some(vt)) = (svd.u, svd.v_t) else {
            return Err(FitError::RankDeficient {
                rank: 0,
                params: x.ncols(),
            });
        };
        let uty = u.transpose() * &yc;
        Ok(RidgePath {
            scaling,
            s: svd.singular_values.iter().copied().collect(),
            v: vt.transpose(),
            u,
            my,
            uty,
            n,
        })
    }

    /// Residuals, leave-one-out residuals and effective parameters at `alpha`.
    pub fn at(&self, alpha: f64, y: &[f64]) -> RidgeAt {
        let f: Vec<f64> = self.s.iter().map(|s| s * s / (s * s + alpha)).collect();
        let mut residuals = Vec::with_capacity(self.n);
        let mut loo = Vec::with_capacity(self.n);
        for i in 0..self.n {
            let (mut fit, mut h) = (self.my, 1.0 / self.n as f64);
            for (k, fk) in f.iter().enumerate() {
                let uik = self.u[(i, k)];
                fit += uik * fk * self.uty[k];
                h += uik * uik * fk;
            }
            let e = y[i] - fit;
            residuals.push(e);
            loo.push(e / (1.0 - h).max(1e-12));
        }
        RidgeAt {
            alpha,
            loo_residuals: loo,
            residuals,
            edf: f.iter().sum(),
        }
    }

    /// The model at `alpha` in original units and its leverage matrix in
    /// the augmented raw space.
    pub fn model(&self, alpha: f64) -> (LinearModel, DMatrix<f64>) {
        let p = self.v.nrows();
        let k = self.s.len();
        let mut coef_z = vec![0.0; p];
        let mut minv = DMatrix::zeros(p, p);
        for j in 0..k {
            let s2a = self.s[j] * self.s[j] + alpha;
            if !(s2a > 0.0) {
                continue;
            }
            let c = self.s[j] * self.uty[j] / s2a;
            for r in 0..p {
                coef_z[r] += self.v[(r, j)] * c;
                for q in 0..p {
                    minv[(r, q)] += self.v[(r, j)] * self.v[(q, j)] / s2a;
                }
            }
        }
        (
            self.scaling.unscale(self.my, &coef_z),
            self.scaling.leverage_matrix(&minv, self.n),
        )
    }
}

/// Penalties tried for standardised columns: `n * 10^(-6 .. 2)`, 33 steps.
pub fn alpha_grid(n: usize) -> Vec<f64> {
    (0..33)
        .map(|k| n as f64 * 10f64.powf(-6.0 + 0.25 * k as f64))
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A noise-free linear table is recovered exactly by ridge with no
    /// penalty and by PLS with all components (both are then least squares).
    #[test]
    fn unpenalised_ridge_and_full_pls_are_least_squares() {
        let x = DMatrix::from_fn(12, 3, |i, j| {
            ((i * (j + 2)) % 7) as f64 + 0.1 * (i * j) as f64
        });
        let y: Vec<f64> = (0..12)
            .map(|i| 1.5 + 2.0 * x[(i, 0)] - 0.5 * x[(i, 1)] + 0.25 * x[(i, 2)])
            .collect();
        let r = ridge(&x, &y, 0.0).unwrap();
        let p = pls1(&x, &y, 3).unwrap();
        for m in [&r, &p.model] {
            assert!((m.intercept - 1.5).abs() < 1e-9, "{m:?}");
            for (c, want) in m.coef.iter().zip([2.0, -0.5, 0.25]) {
                assert!((c - want).abs() < 1e-9, "{m:?}");
            }
        }
    }

    /// Each member of the PLS path equals a separate fit with that many
    /// components.
    #[test]
    fn pls_path_equals_separate_fits() {
        let x = DMatrix::from_fn(20, 4, |i, j| {
            ((i * 5 + j * 7) % 9) as f64 + 0.3 * (i * j) as f64
        });
        let y: Vec<f64> = (0..20)
            .map(|i| x[(i, 0)] - 0.5 * x[(i, 3)] + (i % 3) as f64)
            .collect();
        let path = pls1_path(&x, &y, 4).unwrap();
        for (k, f) in path.iter().enumerate() {
            let one = pls1(&x, &y, k + 1).unwrap();
            for (a, b) in f.model.coef.iter().zip(&one.model.coef) {
                assert!((a - b).abs() < 1e-12, "k {}: {a} {b}", k + 1);
            }
        }
    }

    /// The SVD path equals the direct ridge solution on standardised
    /// columns, and its leave-one-out residuals equal refits without each
    /// row (exact for a linear smoother).
    #[test]
    fn ridge_path_matches_direct_solution_and_refits() {
        let x = DMatrix::from_fn(15, 4, |i, j| {
            ((i * 7 + j * 3) % 11) as f64 + (j as f64).sin() * i as f64
        });
        let y: Vec<f64> = (0..15)
            .map(|i| 3.0 + x[(i, 0)] - 0.3 * x[(i, 2)] + ((i * 13) % 5) as f64 * 0.1)
            .collect();
        let path = RidgePath::new(&x, &y).unwrap();
        let alpha = 2.5;
        let (m, _) = path.model(alpha);
        // Direct: ridge on the standardised columns, then unscaled.
        let sc = Scaling::of(&x);
        let z = sc.apply(&x);
        let d = ridge(&z, &y, alpha).unwrap();
        let back = sc.unscale(d.intercept, &d.coef);
        for (a, b) in m.coef.iter().zip(&back.coef) {
            assert!((a - b).abs() < 1e-9, "{a} {b}");
        }
        let at = path.at(alpha, &y);
        for i in 0..15 {
            let keep: Vec<usize> = (0..15).filter(|k| *k != i).collect();
            let zi = DMatrix::from_fn(14, 4, |r, c| z[(keep[r], c)]);
            let yi: Vec<f64> = keep.iter().map(|k| y[*k]).collect();
            let fi = ridge(&zi, &yi, alpha).unwrap();
            let row: Vec<f64> = (0..4).map(|c| z[(i, c)]).collect();
            let e = y[i] - fi.predict(&row);
            assert!(
                (e - at.loo_residuals[i]).abs() < 1e-9,
                "row {i}: {e} vs {}",
                at.loo_residuals[i]
            );
        }
    }
}
