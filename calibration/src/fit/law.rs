//! Stage 1 of the relaxation fit: the product's relaxation law (Cole-Cole
//! alpha and the relaxation-frequency law) from the spectra of all samples
//! jointly.
//!
//! Unknowns: the law `theta = (alpha, ln f_r_ref, p, c_T)` shared by all
//! samples, and each sample's `(eps_hf, d_eps, ln sigma)`. Each sample gives
//! 4 residuals (re and im of eps* at two frequencies, weighted by the noise
//! SD), so the law is fitted on the one degree of freedom every sample has
//! left after its own three parameters. Levenberg-Marquardt on all unknowns
//! at once, the normal equations reduced by the Schur complement of the
//! block-diagonal per-sample part (as in bundle adjustment: Triggs et al.,
//! "Bundle adjustment - a modern synthesis", LNCS 1883, 2000, section 6.1),
//! so one iteration costs O(n). Marquardt's diagonal damping.
//!
//! Each sample's parameters are held to the device inversion's bounds
//! ([`crate::invert::Bounds`]): steps are projected onto them and a
//! parameter on a bound that the data push outward is held there (an active
//! set per sample). Unbounded, the fit could settle on a law at which the
//! samples' parameters are unphysical (a negative eps_hf on a salted feed,
//! sigma of 1e-23 S/m on dry pellets), a law the device cannot use.
//!
//! The model is that of [`crate::invert`]:
//! `eps* = eps_hf + d_eps / (1 + (j f / f_r)^(1 - alpha)) - j sigma / (2 pi f eps0)`,
//! `ln f_r = ln f_r_ref + p (ln sigma - ln sigma_ref) + c_T (t - t_ref)`;
//! its analytic derivatives are written here and the value is checked
//! against [`crate::invert::product_permittivity`] in the tests.

use nalgebra::{Matrix3, Matrix4, SMatrix, Vector3, Vector4};

use super::nonlinear::Damping;
use crate::invert::{Observation, RelaxationLaw};
use crate::Cx;

/// Law parameters `theta = (alpha, ln f_r_ref, p, c_T)`.
pub(crate) type Theta = [f64; 4];

/// The law for `theta` with the fixed references.
pub(crate) fn law_of(theta: &Theta, sigma_ref_s_m: f64, t_ref_c: f64) -> RelaxationLaw<f64> {
    RelaxationLaw {
        alpha: theta[0],
        fr_ref_hz: theta[1].exp(),
        sigma_ref_s_m,
        fr_exponent: theta[2],
        fr_temp_coeff_per_c: theta[3],
        t_ref_c,
    }
}

/// Whether two laws are so close that a fit started from either ends in
/// the same local minimum (alpha within 0.03, f_r_ref within 20 %, the
/// exponent within 0.1; c_T is not compared): used to start the joint fit
/// from distinct laws only.
pub(crate) fn same_basin(a: &Theta, b: &Theta) -> bool {
    (a[0] - b[0]).abs() < 0.03 && (a[1] - b[1]).abs() < 0.2 && (a[2] - b[2]).abs() < 0.1
}

/// The values [`crate::product::ProductModel::from_params`] accepts.
pub(crate) fn theta_is_valid(theta: &Theta) -> bool {
    theta.iter().all(|v| v.is_finite())
        && theta[0] >= 0.0
        && theta[0] < 0.95
        && theta[2] >= 0.0
        && theta[2] <= 3.0
}

/// What [`model`] needs of one frequency, computed once per fit: ln f and
/// 2 pi f eps0 (the same expressions as before, so the same values).
#[derive(Clone, Copy)]
struct FreqConst {
    ln_f: f64,
    w_eps0: f64,
}

impl FreqConst {
    fn new(freq_hz: f64) -> Self {
        FreqConst {
            ln_f: freq_hz.ln(),
            w_eps0: 2.0 * std::f64::consts::PI * freq_hz * crate::EPS0,
        }
    }
}

/// What [`model`] needs of the law, computed once per law: beta = 1 -
/// alpha and the cosine and sine of beta pi / 2.
#[derive(Clone, Copy)]
struct LawConst {
    beta: f64,
    cos_b: f64,
    sin_b: f64,
}

impl LawConst {
    fn new(theta: &Theta) -> Self {
        let beta = 1.0 - theta[0];
        let half_pi = std::f64::consts::FRAC_PI_2;
        LawConst {
            beta,
            cos_b: (beta * half_pi).cos(),
            sin_b: (beta * half_pi).sin(),
        }
    }
}

/// The model's intermediate values at one frequency (the cost needs only
/// eps*, [`d_params`] and [`model`] the rest for the derivatives): x = ln f - ln f_r,
/// u = (j f / f_r)^beta, 1 / (1 + u), the relaxation term, the conduction
/// term's magnitude and eps*.
struct Terms {
    x: f64,
    u: Cx<f64>,
    inv_d: Cx<f64>,
    relax: Cx<f64>,
    cond: f64,
    eps: Cx<f64>,
}

/// [`Terms`] at one frequency; `sigma` is `p[2].exp()`, computed once per
/// sample for both frequencies by the caller.
#[inline]
fn terms(
    fc: &FreqConst,
    p: &[f64; 3],
    sigma: f64,
    theta: &Theta,
    lc: &LawConst,
    ln_sigma_ref: f64,
    dt_c: f64,
) -> Terms {
    let ln_fr = theta[1] + theta[2] * (p[2] - ln_sigma_ref) + theta[3] * dt_c;
    let x = fc.ln_f - ln_fr;
    // u = (j f / f_r)^beta = exp(beta x + j beta pi/2); clamp as the device does.
    let mag = (lc.beta * x).clamp(-30.0, 30.0).exp();
    let u = Cx::new(mag * lc.cos_b, mag * lc.sin_b);
    let inv_d = Cx::new(1.0, 0.0) / (Cx::new(1.0, 0.0) + u);
    let relax = inv_d * p[1];
    let cond = sigma / fc.w_eps0;
    let eps = Cx::new(p[0] + relax.re, relax.im - cond);
    Terms {
        x,
        u,
        inv_d,
        relax,
        cond,
        eps,
    }
}

/// d eps* / dz (u = e^z), d eps* / d ln f_r and the derivatives w.r.t.
/// (eps_hf, d_eps, q = ln sigma), from the [`Terms`] `t`.
#[inline]
fn d_params(t: &Terms, theta: &Theta, beta: f64) -> (Cx<f64>, Cx<f64>, [Cx<f64>; 3]) {
    // d relax / dz with u = e^z.
    let dz = -(t.relax * t.inv_d * t.u);
    let d_ln_fr = dz * (-beta);
    let dp = [
        Cx::new(1.0, 0.0),
        t.inv_d,
        d_ln_fr * theta[2] - Cx::new(0.0, t.cond),
    ];
    (dz, d_ln_fr, dp)
}

/// eps* and its derivatives w.r.t. (eps_hf, d_eps, q = ln sigma) and theta
/// (`sigma`: `p[2].exp()`).
#[inline]
fn model(
    fc: &FreqConst,
    p: &[f64; 3],
    sigma: f64,
    theta: &Theta,
    lc: &LawConst,
    ln_sigma_ref: f64,
    dt_c: f64,
) -> (Cx<f64>, [Cx<f64>; 3], [Cx<f64>; 4]) {
    let t = terms(fc, p, sigma, theta, lc, ln_sigma_ref, dt_c);
    let half_pi = std::f64::consts::FRAC_PI_2;
    let (dz, d_ln_fr, dp) = d_params(&t, theta, lc.beta);
    let (x, eps) = (t.x, t.eps);
    let dtheta = [
        dz * Cx::new(-x, -half_pi),
        d_ln_fr,
        d_ln_fr * (p[2] - ln_sigma_ref),
        d_ln_fr * dt_c,
    ];
    (eps, dp, dtheta)
}

/// Why the law could not be fitted.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) enum LawError {
    /// The normal equations are singular (the law is not determined).
    Singular,
    /// The iteration budget ran out.
    NotConverged,
}

/// The fitted law.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct LawFit {
    pub theta: Theta,
    /// Weighted residual sum of squares at the solution.
    pub cost: f64,
    /// Each sample's (eps_hf, d_eps, ln sigma) at the solution.
    pub params: Vec<[f64; 3]>,
    /// Standard errors of theta (0 for a parameter held fixed).
    pub std_err: Theta,
    /// Whether the fit met its convergence test within its budget.
    pub converged: bool,
}

/// The per-sample bounds of the device's inversion
/// ([`crate::invert::Bounds`]'s defaults) on (eps_hf, d_eps, ln sigma): the
/// joint fit keeps every sample inside them, so the law it finds is one at
/// which the device can find each sample's parameters.
fn sample_bounds() -> ([f64; 3], [f64; 3]) {
    let b = crate::invert::Bounds::<f64>::default();
    (
        [b.eps_hf.0, b.d_eps.0, b.sigma_s_m.0.ln()],
        [b.eps_hf.1, b.d_eps.1, b.sigma_s_m.1.ln()],
    )
}

/// `p` held to the bounds.
fn clamp_sample(p: &mut [f64; 3], lo: &[f64; 3], hi: &[f64; 3]) {
    for j in 0..3 {
        p[j] = p[j].clamp(lo[j], hi[j]);
    }
}

/// The sample's Jacobian with the columns of the parameters held on a
/// bound zeroed: a parameter on its bound whose descent direction
/// (-gradient) points out of the box does not move (an active set, as in
/// the device's inversion).
fn hold_active(jp: &mut J4x3, r: &Vector4<f64>, p: &[f64; 3], lo: &[f64; 3], hi: &[f64; 3]) {
    let g: Vector3<f64> = jp.transpose() * r;
    for j in 0..3 {
        if (p[j] <= lo[j] && g[j] > 0.0) || (p[j] >= hi[j] && g[j] < 0.0) {
            jp.column_mut(j).fill(0.0);
        }
    }
}

struct Data<'a> {
    obs: &'a [[Observation<f64>; 2]],
    /// Each observation's frequency constants.
    fc: Vec<[FreqConst; 2]>,
    temps: &'a [f64],
    ln_sigma_ref: f64,
    t_ref_c: f64,
    /// Per-sample bounds ([`sample_bounds`]).
    lo: [f64; 3],
    hi: [f64; 3],
}

type J4x3 = SMatrix<f64, 4, 3>;

/// One sample's residuals and Jacobians at the current law and parameters
/// (held columns zeroed) and the products of the reduced system:
/// `jtj_p = jp' jp`, `w = jt' jp`, `g_p = jp' r`.
struct Linearised {
    r: Vector4<f64>,
    jp: J4x3,
    jt: Matrix4<f64>,
    jtj_p: Matrix3<f64>,
    w: J4x3,
    g_p: Vector3<f64>,
}

impl Data<'_> {
    /// Weighted residuals (model - measured)/sd of sample i and Jacobians
    /// (`lc`: [`LawConst`] of `theta`, computed once per law by the caller).
    fn sample(
        &self,
        i: usize,
        p: &[f64; 3],
        theta: &Theta,
        lc: &LawConst,
    ) -> (Vector4<f64>, J4x3, Matrix4<f64>) {
        let mut r = Vector4::zeros();
        let mut jp = J4x3::zeros();
        let mut jt = Matrix4::zeros();
        let dt = self.temps[i] - self.t_ref_c;
        let sigma = p[2].exp();
        for (k, o) in self.obs[i].iter().enumerate() {
            let (e, dp, dth) = model(&self.fc[i][k], p, sigma, theta, lc, self.ln_sigma_ref, dt);
            let w = 1.0 / o.sd;
            r[2 * k] = (e.re - o.eps.re) * w;
            r[2 * k + 1] = (e.im - o.eps.im) * w;
            for j in 0..3 {
                jp[(2 * k, j)] = dp[j].re * w;
                jp[(2 * k + 1, j)] = dp[j].im * w;
            }
            for j in 0..4 {
                jt[(2 * k, j)] = dth[j].re * w;
                jt[(2 * k + 1, j)] = dth[j].im * w;
            }
        }
        (r, jp, jt)
    }

    /// [`Data::sample`]'s residuals and Jacobian w.r.t. the sample's own
    /// parameters only (the same values).
    fn sample_p(
        &self,
        i: usize,
        p: &[f64; 3],
        theta: &Theta,
        lc: &LawConst,
    ) -> (Vector4<f64>, J4x3) {
        let mut r = Vector4::zeros();
        let mut jp = J4x3::zeros();
        let dt = self.temps[i] - self.t_ref_c;
        let sigma = p[2].exp();
        for (k, o) in self.obs[i].iter().enumerate() {
            let t = terms(&self.fc[i][k], p, sigma, theta, lc, self.ln_sigma_ref, dt);
            let (_, _, dp) = d_params(&t, theta, lc.beta);
            let w = 1.0 / o.sd;
            r[2 * k] = (t.eps.re - o.eps.re) * w;
            r[2 * k + 1] = (t.eps.im - o.eps.im) * w;
            for j in 0..3 {
                jp[(2 * k, j)] = dp[j].re * w;
                jp[(2 * k + 1, j)] = dp[j].im * w;
            }
        }
        (r, jp)
    }

    /// [`Data::sample`]'s residuals alone (the same values).
    fn residuals(&self, i: usize, p: &[f64; 3], theta: &Theta, lc: &LawConst) -> Vector4<f64> {
        let mut r = Vector4::zeros();
        let dt = self.temps[i] - self.t_ref_c;
        let sigma = p[2].exp();
        for (k, o) in self.obs[i].iter().enumerate() {
            let e = terms(&self.fc[i][k], p, sigma, theta, lc, self.ln_sigma_ref, dt).eps;
            let w = 1.0 / o.sd;
            r[2 * k] = (e.re - o.eps.re) * w;
            r[2 * k + 1] = (e.im - o.eps.im) * w;
        }
        r
    }

    /// Levenberg-Marquardt on one sample's three parameters with the law
    /// held fixed (a start for the joint fit; at most 30 steps).
    fn refine_sample(&self, i: usize, p: &mut [f64; 3], theta: &Theta) {
        let mut lambda = 1e-3;
        let lc = LawConst::new(theta);
        let mut cost = self.residuals(i, p, theta, &lc).norm_squared();
        for _ in 0..30 {
            let (r, jp) = self.sample_p(i, p, theta, &lc);
            let mut v: Matrix3<f64> = jp.transpose() * jp;
            for j in 0..3 {
                v[(j, j)] *= 1.0 + lambda;
                v[(j, j)] += 1e-12;
            }
            let Some(dp) = v.lu().solve(&(-(jp.transpose() * r))) else {
                return;
            };
            let mut trial = [p[0] + dp[0], p[1] + dp[1], p[2] + dp[2]];
            clamp_sample(&mut trial, &self.lo, &self.hi);
            let c = self.residuals(i, &trial, theta, &lc).norm_squared();
            if c.is_finite() && c < cost {
                let done = cost - c <= 1e-10 * cost;
                *p = trial;
                cost = c;
                lambda = (lambda / 3.0).max(1e-12);
                if done {
                    return;
                }
            } else {
                lambda *= 4.0;
                if lambda > 1e10 {
                    return;
                }
            }
        }
    }

    fn cost(&self, ps: &[[f64; 3]], theta: &Theta) -> f64 {
        let mut c = 0.0;
        let dt0 = self.t_ref_c;
        let lc = LawConst::new(theta);
        for (i, p) in ps.iter().enumerate() {
            let dt = self.temps[i] - dt0;
            let sigma = p[2].exp();
            for (k, o) in self.obs[i].iter().enumerate() {
                let e = terms(&self.fc[i][k], p, sigma, theta, &lc, self.ln_sigma_ref, dt).eps;
                let w = 1.0 / o.sd;
                let (a, b) = ((e.re - o.eps.re) * w, (e.im - o.eps.im) * w);
                c += a * a + b * b;
            }
        }
        if c.is_finite() {
            c
        } else {
            f64::INFINITY
        }
    }
}

/// Iteration budget of one joint fit.
pub(crate) const MAX_ITER: usize = 200;

/// Fits the law from `theta0`; `fit_temperature` false keeps c_T fixed.
pub(crate) fn fit_law(
    obs: &[[Observation<f64>; 2]],
    temps: &[f64],
    sigma_ref_s_m: f64,
    t_ref_c: f64,
    theta0: Theta,
    fit_temperature: bool,
) -> Result<LawFit, LawError> {
    fit_law_budget(
        obs,
        temps,
        sigma_ref_s_m,
        t_ref_c,
        (theta0, None),
        fit_temperature,
        MAX_ITER,
    )
}

/// [`fit_law`] with at most `max_iter` iterations, from `start`: a law
/// and, to go on with an earlier fit of the same samples, their
/// parameters (`LawFit::params`; `None` starts each sample from its
/// readings). A fit that ends with its budget says so
/// (`LawFit::converged` false) and can be continued from its result.
pub(crate) fn fit_law_budget(
    obs: &[[Observation<f64>; 2]],
    temps: &[f64],
    sigma_ref_s_m: f64,
    t_ref_c: f64,
    start: (Theta, Option<&[[f64; 3]]>),
    fit_temperature: bool,
    max_iter: usize,
) -> Result<LawFit, LawError> {
    let (theta0, ps0) = start;
    let data = Data {
        obs,
        fc: obs
            .iter()
            .map(|o| [FreqConst::new(o[0].freq_hz), FreqConst::new(o[1].freq_hz)])
            .collect(),
        temps,
        ln_sigma_ref: sigma_ref_s_m.ln(),
        t_ref_c,
        lo: sample_bounds().0,
        hi: sample_bounds().1,
    };
    let (lo, hi) = (data.lo, data.hi);
    let n = obs.len();
    let mask = [true, true, true, fit_temperature];
    let k = mask.iter().filter(|m| **m).count();
    // Per-sample start, from the readings alone: sigma from the loss at the
    // lower frequency (where conduction dominates eps''), eps_hf from eps'
    // at the higher one, d_eps from the drop of eps' between the two.
    let mut ps: Vec<[f64; 3]> = match ps0 {
        Some(p) if p.len() == n => p
            .iter()
            .map(|x| {
                let mut x = *x;
                clamp_sample(&mut x, &data.lo, &data.hi);
                x
            })
            .collect(),
        _ => {
            let mut ps: Vec<[f64; 3]> = obs
                .iter()
                .map(|o| {
                    let (lo, hi) = (o[0], o[1]);
                    let omega_eps0 = 2.0 * std::f64::consts::PI * lo.freq_hz * crate::EPS0;
                    let sigma = (omega_eps0 * (-lo.eps.im)).max(1e-7);
                    let d_eps = (lo.eps.re - hi.eps.re).max(0.1);
                    let mut p = [hi.eps.re, d_eps, sigma.ln()];
                    clamp_sample(&mut p, &data.lo, &data.hi);
                    p
                })
                .collect();
            for (i, p) in ps.iter_mut().enumerate() {
                data.refine_sample(i, p, &theta0);
            }
            ps
        }
    };
    let mut theta = theta0;
    let mut cost = data.cost(&ps, &theta);
    let mut damping = Damping::new(1e-3);
    let mut converged = false;
    let mut trial_ps = ps.clone();
    // Each sample's linearisation at the current law and parameters, with
    // the products the reduced system needs, and their sums: computed once
    // per accepted step, not again for each damping tried.
    let mut cache: Vec<Linearised> = Vec::with_capacity(n);
    let mut vinv: Vec<Matrix3<f64>> = Vec::with_capacity(n);
    let (mut u, mut g_t) = (Matrix4::zeros(), Vector4::zeros());
    let mut fresh = true;
    for _ in 0..max_iter {
        if fresh {
            cache.clear();
            let lc = LawConst::new(&theta);
            for (i, p) in ps.iter().enumerate() {
                let (r, mut jp, mut jt) = data.sample(i, p, &theta, &lc);
                hold_active(&mut jp, &r, p, &lo, &hi);
                for (j, m) in mask.iter().enumerate() {
                    if !m {
                        jt.column_mut(j).fill(0.0);
                    }
                }
                cache.push(Linearised {
                    jtj_p: jp.transpose() * jp,
                    w: jt.transpose() * jp,
                    g_p: jp.transpose() * r,
                    r,
                    jp,
                    jt,
                });
            }
            (u, g_t) = (Matrix4::zeros(), Vector4::zeros());
            for c in &cache {
                u += c.jt.transpose() * c.jt;
                g_t += c.jt.transpose() * c.r;
            }
            fresh = false;
        }
        // Reduced system S dtheta = rhs.
        let mut s = u;
        for j in 0..4 {
            s[(j, j)] += damping.lambda * u[(j, j)].max(1e-12);
            if !mask[j] {
                s[(j, j)] = 1.0;
            }
        }
        let mut rhs = -g_t;
        vinv.clear();
        let mut ok = true;
        for c in &cache {
            let mut v = c.jtj_p;
            for j in 0..3 {
                v[(j, j)] += damping.lambda * v[(j, j)].max(1e-12) + 1e-12;
            }
            let Some(vi) = v.try_inverse() else {
                ok = false;
                break;
            };
            s -= c.w * vi * c.w.transpose();
            rhs += c.w * (vi * c.g_p);
            vinv.push(vi);
        }
        for j in 0..4 {
            if !mask[j] {
                s.row_mut(j).fill(0.0);
                s.column_mut(j).fill(0.0);
                s[(j, j)] = 1.0;
                rhs[j] = 0.0;
            }
        }
        let dtheta = if ok { s.lu().solve(&rhs) } else { None };
        let Some(dtheta) = dtheta.filter(|d| d.iter().all(|v| v.is_finite())) else {
            damping.reject();
            if damping.lambda > 1e16 {
                return Err(LawError::Singular);
            }
            continue;
        };
        let mut trial = theta;
        for j in 0..4 {
            trial[j] += dtheta[j];
        }
        if !theta_is_valid(&trial) {
            // Not a law the device accepts: the step is rejected (as a
            // step of infinite cost would be) without the samples' steps.
            damping.reject();
            if damping.lambda > 1e16 {
                converged = true;
                break;
            }
            continue;
        }
        let mut pred = 0.0;
        for (i, (vi, c)) in vinv.iter().zip(&cache).enumerate() {
            let (r, jp, jt) = (&c.r, &c.jp, &c.jt);
            let mut dp = -(vi * (c.g_p + c.w.transpose() * dtheta));
            for j in 0..3 {
                // Projected onto the bounds (a no-op inside them).
                trial_ps[i][j] = (ps[i][j] + dp[j]).clamp(lo[j], hi[j]);
                if trial_ps[i][j] != ps[i][j] + dp[j] {
                    dp[j] = trial_ps[i][j] - ps[i][j];
                }
            }
            let lin = r + jp * dp + jt * dtheta;
            pred += lin.norm_squared();
        }
        let new_cost = data.cost(&trial_ps, &trial);
        let predicted = cost - pred;
        let actual = cost - new_cost;
        let rho = Damping::gain(actual, predicted);
        if rho > 1e-4 {
            let small = actual <= 1e-12 * cost;
            let step_small = (0..4).all(|j| dtheta[j].abs() <= 1e-10 * (theta[j].abs() + 1e-6));
            std::mem::swap(&mut ps, &mut trial_ps);
            theta = trial;
            cost = new_cost;
            fresh = true;
            damping.accept(rho);
            if small || step_small {
                converged = true;
                break;
            }
        } else {
            damping.reject();
            if damping.lambda > 1e16 {
                // No step reduces the cost: at the minimum to working precision.
                converged = true;
                break;
            }
        }
    }
    // At the end of the budget a finite cost is still the best law found
    // (a law that hardly shows in the band converges slowly: the spectra
    // barely determine it); it is kept and said so (`converged`).
    if !converged && !cost.is_finite() {
        return Err(LawError::NotConverged);
    }
    // Covariance of theta: s^2 S^-1 (undamped reduced system) at the solution.
    let mut u = Matrix4::zeros();
    let mut s = Matrix4::zeros();
    // Per-sample parameters held on a bound at the solution: not fitted, so
    // not counted against the degrees of freedom.
    let mut held = 0usize;
    let law_const = LawConst::new(&theta);
    for (i, p) in ps.iter().enumerate() {
        let (r, mut jp, jt) = data.sample(i, p, &theta, &law_const);
        hold_active(&mut jp, &r, p, &lo, &hi);
        u += jt.transpose() * jt;
        let mut v: Matrix3<f64> = jp.transpose() * jp;
        for j in 0..3 {
            if v[(j, j)] == 0.0 {
                // Held on its bound: no share in the law's covariance.
                v[(j, j)] = 1.0;
                held += 1;
            }
        }
        if let Some(vi) = v.try_inverse() {
            let w = jt.transpose() * jp;
            s -= w * vi * w.transpose();
        }
    }
    s += u;
    for j in 0..4 {
        if !mask[j] {
            s.row_mut(j).fill(0.0);
            s.column_mut(j).fill(0.0);
            s[(j, j)] = 1.0;
        }
    }
    let dof = (3 * n + n).saturating_sub(3 * n - held + k).max(1) as f64;
    let s2 = cost / dof;
    let mut std_err = [0.0; 4];
    if let Some(c) = s.try_inverse() {
        for j in 0..4 {
            if mask[j] {
                std_err[j] = (s2 * c[(j, j)]).max(0.0).sqrt();
            }
        }
    } else {
        // The spectra do not determine the law (e.g. a relaxation far
        // outside the band): its standard errors are unbounded.
        std_err = [f64::INFINITY; 4];
    }
    Ok(LawFit {
        theta,
        cost,
        params: ps,
        std_err,
        converged,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::invert::{product_permittivity, MaterialParams};

    /// The lighter evaluations of the per-sample refinement
    /// ([`Data::sample_p`], [`Data::residuals`]) give bit for bit the
    /// residuals and parameter Jacobian of the full one ([`Data::sample`]),
    /// so the refinement takes the same steps as with the full one.
    #[test]
    fn lighter_evaluations_equal_the_full_one_bit_for_bit() {
        let obs: Vec<[Observation<f64>; 2]> = [(12.0, 3.0, 8.0, 0.4), (25.0, 40.0, 14.0, 2.5)]
            .iter()
            .map(|&(a, b, c, d)| {
                [
                    Observation {
                        freq_hz: 1e6,
                        eps: Cx::new(a, -b),
                        sd: 0.02,
                    },
                    Observation {
                        freq_hz: 20e6,
                        eps: Cx::new(c, -d),
                        sd: 0.02,
                    },
                ]
            })
            .collect();
        let temps = [12.0, 31.0];
        let (lo, hi) = sample_bounds();
        let data = Data {
            obs: &obs,
            fc: obs
                .iter()
                .map(|o| [FreqConst::new(o[0].freq_hz), FreqConst::new(o[1].freq_hz)])
                .collect(),
            temps: &temps,
            ln_sigma_ref: (2e-3f64).ln(),
            t_ref_c: 22.0,
            lo,
            hi,
        };
        let theta = [0.2, 15.5, 0.9, 0.01];
        let lc = LawConst::new(&theta);
        for (i, p) in [[5.5, 20.0, (3e-3f64).ln()], [7.0, 35.0, (1e-2f64).ln()]]
            .iter()
            .enumerate()
        {
            let (r, jp, _) = data.sample(i, p, &theta, &lc);
            let (r2, jp2) = data.sample_p(i, p, &theta, &lc);
            let r3 = data.residuals(i, p, &theta, &lc);
            let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
            assert_eq!(bits(r.as_slice()), bits(r2.as_slice()));
            assert_eq!(bits(r.as_slice()), bits(r3.as_slice()));
            assert_eq!(bits(jp.as_slice()), bits(jp2.as_slice()));
        }
    }

    /// The model written here equals the inversion's own model
    /// (crate::invert::product_permittivity), and its analytic derivatives
    /// equal central differences.
    #[test]
    fn model_matches_the_inversion_and_its_derivatives() {
        let theta = [0.2, 16.0, 0.9, 0.01];
        let p = [5.5, 20.0, (3e-3f64).ln()];
        let (ln_sref, t_ref, t) = ((1e-3f64).ln(), 25.0, 31.0);
        for f in [1e6, 20e6] {
            let fc = FreqConst::new(f);
            let lc = LawConst::new(&theta);
            let (e, dp, dth) = model(&fc, &p, p[2].exp(), &theta, &lc, ln_sref, t - t_ref);
            let law = law_of(&theta, ln_sref.exp(), t_ref);
            let mp = MaterialParams {
                eps_hf: p[0],
                d_eps: p[1],
                sigma_s_m: p[2].exp(),
            };
            let want = product_permittivity(f, &mp, &law, t);
            assert!((e - want).norm() < 1e-10 * want.norm(), "{e} vs {want}");
            let h = 1e-6;
            for j in 0..3 {
                let (mut a, mut b) = (p, p);
                a[j] += h;
                b[j] -= h;
                let fd = (model(&fc, &a, a[2].exp(), &theta, &lc, ln_sref, t - t_ref).0
                    - model(&fc, &b, b[2].exp(), &theta, &lc, ln_sref, t - t_ref).0)
                    / (2.0 * h);
                assert!(
                    (fd - dp[j]).norm() < 1e-5 * (1.0 + fd.norm()),
                    "p{j}: {fd} vs {}",
                    dp[j]
                );
            }
            for j in 0..4 {
                let (mut a, mut b) = (theta, theta);
                a[j] += h;
                b[j] -= h;
                let sigma = p[2].exp();
                let fd = (model(&fc, &p, sigma, &a, &LawConst::new(&a), ln_sref, t - t_ref).0
                    - model(&fc, &p, sigma, &b, &LawConst::new(&b), ln_sref, t - t_ref).0)
                    / (2.0 * h);
                assert!(
                    (fd - dth[j]).norm() < 1e-5 * (1.0 + fd.norm()),
                    "theta{j}: {fd} vs {}",
                    dth[j]
                );
            }
        }
    }
}
