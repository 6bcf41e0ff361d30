//! Nonlinear least squares by Levenberg-Marquardt (weighted).
//!
//! The damped step solves `min |J dp + r|^2 + lambda |D dp|^2` through a QR
//! factorisation of the stacked matrix `[J; sqrt(lambda) D]` (never the
//! normal equations), with the column scaling `D` of Moré (1978) (each entry
//! the largest column norm of `J` seen so far) and the damping update of
//! Nielsen (1999). Parameter standard errors come from an SVD of the Jacobian
//! at the solution: `cov = s^2 (J'J)^-1`, `s^2 = rss / (n - p)`.
//!
//! References: J. J. Moré, "The Levenberg-Marquardt algorithm: implementation
//! and theory", Lecture Notes in Mathematics 630 (1978); H. B. Nielsen,
//! "Damping parameter in Marquardt's method", IMM-REP-1999-05, DTU (1999).

use nalgebra::{DMatrix, DVector};

use super::{check_finite, check_sigma, FitError};

/// A least-squares problem: minimise `sum r_i(p)^2`.
///
/// Residuals are already weighted (divided by their standard uncertainty)
/// when the fit is weighted.
pub trait Problem {
    /// Number of parameters `p`.
    fn n_params(&self) -> usize;
    /// Number of residuals `n` (must exceed `p`).
    fn n_residuals(&self) -> usize;
    /// Residuals at `params` into `out` (`n` values). A value that cannot be
    /// computed is NaN; the solver then rejects the step.
    fn residuals(&self, params: &[f64], out: &mut [f64]);
    /// Jacobian `d r_i / d p_j` (`n x p`) at `params`; by default central
    /// differences of [`Problem::residuals`].
    fn jacobian(&self, params: &[f64], jac: &mut DMatrix<f64>) {
        central_differences(self, params, jac);
    }
}

/// Central-difference Jacobian of a problem's residuals, step
/// `eps^(1/3) max(|p_j|, 1e-3)` per parameter.
pub fn central_differences<P: Problem + ?Sized>(
    problem: &P,
    params: &[f64],
    jac: &mut DMatrix<f64>,
) {
    let n = problem.n_residuals();
    let mut lo = vec![0.0; n];
    let mut hi = vec![0.0; n];
    let mut p = params.to_vec();
    let h0 = f64::EPSILON.cbrt();
    for j in 0..params.len() {
        let h = h0 * params[j].abs().max(1e-3);
        p[j] = params[j] + h;
        problem.residuals(&p, &mut hi);
        p[j] = params[j] - h;
        problem.residuals(&p, &mut lo);
        p[j] = params[j];
        for i in 0..n {
            jac[(i, j)] = (hi[i] - lo[i]) / (2.0 * h);
        }
    }
}

/// Stopping tolerances and budget of [`levenberg_marquardt`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LmOptions {
    /// Maximum number of trial steps (each one residual evaluation).
    pub max_iterations: usize,
    /// Stop when the scaled step is below `xtol` relative to the scaled
    /// parameter vector.
    pub xtol: f64,
    /// Stop when both the actual and the predicted relative reduction of the
    /// sum of squares are below `ftol`.
    pub ftol: f64,
    /// Stop when the cosine between the residual vector and every Jacobian
    /// column is below `gtol` (the gradient vanishes).
    pub gtol: f64,
    /// Initial damping `lambda`, relative to the scaled `J'J` (whose diagonal
    /// is 1 at the start): small starts near Gauss-Newton, large near a short
    /// gradient step.
    pub initial_damping: f64,
}

impl Default for LmOptions {
    fn default() -> Self {
        LmOptions {
            max_iterations: 2000,
            xtol: 1e-13,
            ftol: 1e-15,
            gtol: 1e-13,
            initial_damping: 1e-3,
        }
    }
}

/// Why Levenberg-Marquardt stopped (all of these are convergence).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum Termination {
    /// The residual vector is zero.
    ZeroResidual,
    /// The gradient vanished (`gtol`).
    SmallGradient,
    /// The step became negligible (`xtol`).
    SmallStep,
    /// The sum of squares stopped falling (`ftol`).
    SmallReduction,
}

/// The result of a nonlinear least-squares fit.
#[derive(Debug, Clone, PartialEq)]
pub struct NonlinearFit {
    /// Parameters at the minimum.
    pub params: Vec<f64>,
    /// Standard error of each parameter (NaN when `rank < p`).
    pub std_err: Vec<f64>,
    /// Covariance `s^2 (J'J)^-1` (NaN when `rank < p`).
    pub covariance: DMatrix<f64>,
    /// Residual sum of squares (weighted).
    pub rss: f64,
    /// Residual standard deviation `sqrt(rss / dof)`.
    pub residual_sd: f64,
    /// Degrees of freedom `n - p`.
    pub dof: usize,
    /// Numerical rank of the Jacobian at the solution.
    pub rank: usize,
    /// Trial steps taken.
    pub iterations: usize,
    /// Which test stopped the iteration.
    pub termination: Termination,
}

/// Minimise `sum r_i(p)^2` from `p0`.
///
/// # Errors
/// [`FitError::TooFewObservations`] unless `n > p`;
/// [`FitError::LengthMismatch`] when `p0` has the wrong length;
/// [`FitError::NonFinite`] for a non-finite start value;
/// [`FitError::ModelNotFinite`] when the residuals at `p0` are not finite;
/// [`FitError::NotConverged`] when the budget runs out.
pub fn levenberg_marquardt<P: Problem + ?Sized>(
    problem: &P,
    p0: &[f64],
    opts: &LmOptions,
) -> Result<NonlinearFit, FitError> {
    let n = problem.n_residuals();
    let m = problem.n_params();
    if m == 0 || n <= m {
        return Err(FitError::TooFewObservations {
            needed: m + 1,
            got: n,
        });
    }
    if p0.len() != m {
        return Err(FitError::LengthMismatch {
            what: "start values",
            expected: m,
            got: p0.len(),
        });
    }
    check_finite("start values", p0)?;
    let mut p = p0.to_vec();
    let mut r = vec![0.0; n];
    problem.residuals(&p, &mut r);
    if let Some(index) = r.iter().position(|v| !v.is_finite()) {
        return Err(FitError::ModelNotFinite { index });
    }
    let mut cost = sum_sq(&r);
    let mut jac = DMatrix::zeros(n, m);
    problem.jacobian(&p, &mut jac);
    let mut d = vec![0.0; m];
    update_scale(&jac, &mut d);
    let mut damping = Damping::new(opts.initial_damping);
    let mut trial = vec![0.0; m];
    let mut r_trial = vec![0.0; n];
    let mut aug = DMatrix::zeros(n + m, m);
    let mut rhs = DVector::zeros(n + m);

    for iter in 1..=opts.max_iterations {
        let r_norm = cost.sqrt();
        if r_norm == 0.0 {
            return Ok(finish(
                problem,
                p,
                cost,
                iter - 1,
                Termination::ZeroResidual,
            ));
        }
        // Gradient test (Moré's gtol): cosine of r with each column of J.
        let g = jac.transpose() * DVector::from_column_slice(&r);
        let cos_max = (0..m)
            .map(|j| {
                let cn = jac.column(j).norm();
                if cn == 0.0 {
                    0.0
                } else {
                    g[j].abs() / (cn * r_norm)
                }
            })
            .fold(0.0, f64::max);
        if cos_max <= opts.gtol {
            return Ok(finish(
                problem,
                p,
                cost,
                iter - 1,
                Termination::SmallGradient,
            ));
        }

        // Damped step from the QR of [J; sqrt(lambda) D].
        aug.fill(0.0);
        aug.view_mut((0, 0), (n, m)).copy_from(&jac);
        for j in 0..m {
            aug[(n + j, j)] = damping.lambda.sqrt() * d[j];
        }
        rhs.fill(0.0);
        for i in 0..n {
            rhs[i] = -r[i];
        }
        let qr = aug.clone().qr();
        qr.q_tr_mul(&mut rhs);
        let top = rhs.rows(0, m).into_owned();
        let dp = match qr.r().solve_upper_triangular(&top) {
            Some(dp) if dp.iter().all(|v| v.is_finite()) => dp,
            _ => {
                damping.reject();
                continue;
            }
        };
        for j in 0..m {
            trial[j] = p[j] + dp[j];
        }
        problem.residuals(&trial, &mut r_trial);
        let cost_trial = if r_trial.iter().all(|v| v.is_finite()) {
            sum_sq(&r_trial)
        } else {
            f64::INFINITY
        };
        let jdp = &jac * &dp;
        let predicted_cost: f64 = r
            .iter()
            .zip(jdp.iter())
            .map(|(a, b)| (a + b) * (a + b))
            .sum();
        let predicted = cost - predicted_cost;
        let actual = cost - cost_trial;
        let rho = Damping::gain(actual, predicted);

        let step_norm = (0..m).map(|j| (d[j] * dp[j]).powi(2)).sum::<f64>().sqrt();
        let p_norm = (0..m).map(|j| (d[j] * p[j]).powi(2)).sum::<f64>().sqrt();
        let small_step = step_norm <= opts.xtol * (p_norm + opts.xtol);

        if rho > 1e-4 {
            let small_reduction = actual <= opts.ftol * cost && predicted <= opts.ftol * cost;
            p.copy_from_slice(&trial);
            r.copy_from_slice(&r_trial);
            cost = cost_trial;
            problem.jacobian(&p, &mut jac);
            update_scale(&jac, &mut d);
            damping.accept(rho);
            if small_reduction {
                return Ok(finish(problem, p, cost, iter, Termination::SmallReduction));
            }
        } else {
            damping.reject();
        }
        if small_step || damping.lambda > 1e300 {
            return Ok(finish(problem, p, cost, iter, Termination::SmallStep));
        }
    }
    Err(FitError::NotConverged {
        iterations: opts.max_iterations,
        rss: cost,
    })
}

/// Levenberg-Marquardt damping with Nielsen's (1999) update.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Damping {
    /// Current damping.
    pub lambda: f64,
    nu: f64,
}

impl Damping {
    pub(crate) fn new(lambda: f64) -> Self {
        Damping { lambda, nu: 2.0 }
    }

    /// Gain ratio of a step: actual over predicted reduction (-1 when the
    /// model predicts none).
    pub(crate) fn gain(actual: f64, predicted: f64) -> f64 {
        if predicted > 0.0 {
            actual / predicted
        } else {
            -1.0
        }
    }

    /// After an accepted step of gain ratio `rho`.
    pub(crate) fn accept(&mut self, rho: f64) {
        self.lambda *= (1.0f64 / 3.0).max(1.0 - (2.0 * rho - 1.0).powi(3));
        self.nu = 2.0;
    }

    /// After a rejected step.
    pub(crate) fn reject(&mut self) {
        self.lambda *= self.nu;
        self.nu *= 2.0;
    }
}

fn sum_sq(r: &[f64]) -> f64 {
    r.iter().map(|v| v * v).sum()
}

/// Moré's scaling: each entry the largest column norm of J seen so far.
fn update_scale(jac: &DMatrix<f64>, d: &mut [f64]) {
    for (j, dj) in d.iter_mut().enumerate() {
        let cn = jac.column(j).norm();
        *dj = dj.max(cn);
        if *dj == 0.0 {
            *dj = 1.0;
        }
    }
}

fn finish<P: Problem + ?Sized>(
    problem: &P,
    params: Vec<f64>,
    rss: f64,
    iterations: usize,
    termination: Termination,
) -> NonlinearFit {
    let n = problem.n_residuals();
    let m = problem.n_params();
    let mut jac = DMatrix::zeros(n, m);
    problem.jacobian(&params, &mut jac);
    let dof = n - m;
    let s2 = rss / dof as f64;
    let (covariance, rank) = covariance_from_jacobian(&jac, s2);
    let std_err = (0..m).map(|j| covariance[(j, j)].sqrt()).collect();
    NonlinearFit {
        params,
        std_err,
        covariance,
        rss,
        residual_sd: s2.sqrt(),
        dof,
        rank,
        iterations,
        termination,
    }
}

/// `s2 (J'J)^-1` by an SVD of the column-scaled `J`, and the numerical rank.
/// All entries are NaN when `J` is rank-deficient.
pub fn covariance_from_jacobian(jac: &DMatrix<f64>, s2: f64) -> (DMatrix<f64>, usize) {
    let (n, m) = jac.shape();
    let mut a = jac.clone();
    let mut scale = vec![1.0; m];
    for (j, s) in scale.iter_mut().enumerate() {
        let cn = a.column(j).norm();
        if cn > 0.0 {
            *s = cn;
            a.column_mut(j).unscale_mut(cn);
        }
    }
    let svd = a.svd(false, true);
    let sv = &svd.singular_values;
    let tol = sv.max() * f64::EPSILON * n.max(m) as f64;
    let rank = sv.iter().filter(|s| **s > tol).count();
    let Some(v_t) = svd.v_t.as_ref() else {
        return (DMatrix::from_element(m, m, f64::NAN), 0);
    };
    if rank < m {
        return (DMatrix::from_element(m, m, f64::NAN), rank);
    }
    let mut vs = v_t.transpose();
    for (j, s) in sv.iter().enumerate() {
        vs.column_mut(j).unscale_mut(*s);
    }
    let mut cov = &vs * vs.transpose();
    for i in 0..m {
        for j in 0..m {
            cov[(i, j)] *= s2 / (scale[i] * scale[j]);
        }
    }
    (cov, rank)
}

/// A curve `y = f(x, p)` fitted to points, weighted by `1/sigma^2`.
struct Curve<'a, F, G> {
    x: &'a [f64],
    y: &'a [f64],
    w: Vec<f64>,
    f: F,
    grad: Option<G>,
    n_params: usize,
}

impl<F, G> Problem for Curve<'_, F, G>
where
    F: Fn(f64, &[f64]) -> f64,
    G: Fn(f64, &[f64], &mut [f64]),
{
    fn n_params(&self) -> usize {
        self.n_params
    }
    fn n_residuals(&self) -> usize {
        self.x.len()
    }
    fn residuals(&self, p: &[f64], out: &mut [f64]) {
        for (o, ((x, y), w)) in out.iter_mut().zip(self.x.iter().zip(self.y).zip(&self.w)) {
            *o = ((self.f)(*x, p) - y) * w;
        }
    }
    fn jacobian(&self, p: &[f64], jac: &mut DMatrix<f64>) {
        let Some(grad) = &self.grad else {
            central_differences(self, p, jac);
            return;
        };
        let mut g = vec![0.0; self.n_params];
        for i in 0..self.x.len() {
            grad(self.x[i], p, &mut g);
            for j in 0..self.n_params {
                jac[(i, j)] = g[j] * self.w[i];
            }
        }
    }
}

/// Fit `y = f(x, p)` from `p0`, weighted by `1/sigma^2` when `sigma` is given.
///
/// `grad`, when given, writes `d f / d p_j` at `(x, p)` into its third
/// argument; otherwise the Jacobian is taken by central differences.
///
/// # Errors
/// As [`levenberg_marquardt`], plus [`FitError::LengthMismatch`] when `y` or
/// `sigma` does not match `x`, [`FitError::NonFinite`] for a bad data value
/// and [`FitError::BadUncertainty`] for a non-positive `sigma`.
pub fn fit_curve<F, G>(
    x: &[f64],
    y: &[f64],
    sigma: Option<&[f64]>,
    f: F,
    grad: Option<G>,
    p0: &[f64],
    opts: &LmOptions,
) -> Result<NonlinearFit, FitError>
where
    F: Fn(f64, &[f64]) -> f64,
    G: Fn(f64, &[f64], &mut [f64]),
{
    if y.len() != x.len() {
        return Err(FitError::LengthMismatch {
            what: "y",
            expected: x.len(),
            got: y.len(),
        });
    }
    check_finite("x", x)?;
    check_finite("y", y)?;
    let w = match sigma {
        Some(s) => {
            if s.len() != x.len() {
                return Err(FitError::LengthMismatch {
                    what: "sigma",
                    expected: x.len(),
                    got: s.len(),
                });
            }
            check_sigma(s)?;
            s.iter().map(|v| 1.0 / v).collect()
        }
        None => vec![1.0; x.len()],
    };
    let curve = Curve {
        x,
        y,
        w,
        f,
        grad,
        n_params: p0.len(),
    };
    levenberg_marquardt(&curve, p0, opts)
}

/// Type of "no analytic gradient" for [`fit_curve`].
pub type NoGradient = fn(f64, &[f64], &mut [f64]);

#[cfg(test)]
mod tests {
    use super::*;

    /// Exponential decay through exact points: the solver recovers the
    /// generating parameters (a self-consistency check; the NIST StRD
    /// problems in `tests/nist_strd.rs` are the outside reference).
    #[test]
    fn exact_exponential_is_recovered() {
        let x: Vec<f64> = (0..20).map(|i| i as f64 * 0.5).collect();
        let y: Vec<f64> = x.iter().map(|t| 3.0 * (-0.7 * t).exp() + 0.5).collect();
        let f = |t: f64, p: &[f64]| p[0] * (-p[1] * t).exp() + p[2];
        let fit = fit_curve(
            &x,
            &y,
            None,
            f,
            None::<NoGradient>,
            &[1.0, 0.1, 0.0],
            &LmOptions::default(),
        )
        .unwrap();
        assert!((fit.params[0] - 3.0).abs() < 1e-8, "{:?}", fit.params);
        assert!((fit.params[1] - 0.7).abs() < 1e-8);
        assert!((fit.params[2] - 0.5).abs() < 1e-8);
    }

    /// A model that cannot be evaluated at the start is refused by name.
    #[test]
    fn non_finite_start_is_refused() {
        let x = [1.0, 2.0, 3.0];
        let y = [1.0, 2.0, 3.0];
        let f = |t: f64, p: &[f64]| (p[0] * t).ln();
        let e = fit_curve(
            &x,
            &y,
            None,
            f,
            None::<NoGradient>,
            &[-1.0],
            &LmOptions::default(),
        );
        assert_eq!(e.unwrap_err(), FitError::ModelNotFinite { index: 0 });
    }

    /// A weighted straight line fitted by LM equals the weighted linear
    /// least-squares solution, standard errors included (same estimator).
    #[test]
    fn linear_model_matches_linear_solver() {
        let x = [0.0, 1.0, 2.0, 3.0, 4.0, 5.0];
        let y = [1.1, 2.9, 5.2, 6.8, 9.3, 10.9];
        let s = [0.1, 0.2, 0.1, 0.4, 0.2, 0.3];
        let f = |t: f64, p: &[f64]| p[0] + p[1] * t;
        let nl = fit_curve(
            &x,
            &y,
            Some(&s),
            f,
            None::<NoGradient>,
            &[0.0, 0.0],
            &LmOptions::default(),
        )
        .unwrap();
        let lin = super::super::fit_linear(&super::super::polynomial_design(&x, 1), &y, Some(&s))
            .unwrap();
        for j in 0..2 {
            assert!((nl.params[j] - lin.coef[j]).abs() < 1e-9);
            assert!((nl.std_err[j] - lin.std_err[j]).abs() < 1e-7 * lin.std_err[j]);
        }
    }
}
