//! Two-frequency relaxation inversion.
//!
//! Material model of docs/DESIGN.md at frequency f:
//!
//! ```text
//! eps*(f) = eps_hf + d_eps / (1 + (j f / f_r)^(1 - alpha)) - j sigma / (2 pi f eps0)
//! f_r     = fr_ref_hz * (sigma / sigma_ref)^p * exp(c_T (t - t_ref))
//! ```
//!
//! `alpha` and the relaxation-frequency law ([`RelaxationLaw`]) belong to the
//! product (fitted on the host); the inversion estimates
//! [`MaterialParams`] `(eps_hf, d_eps, sigma)` from eps* at two frequencies
//! (4 real numbers, 1 degree of freedom left).
//!
//! Method: a coarse search over ln(sigma) with (eps_hf, d_eps) solved
//! linearly at each grid point (the model is linear in them once sigma is
//! fixed), then Levenberg-Marquardt (Marquardt 1963) on (eps_hf, d_eps,
//! ln sigma) with simple bounds (active-set projection), residuals weighted
//! by the measurement noise. Fixed budget, no allocation, no panic. The
//! covariance is (J^T W J)^-1 at the solution (W = 1/sd^2), i.e. the noise
//! propagated through the linearised model; it is not rescaled by the
//! residual. A sigma held on its lower bound (the data push it below:
//! less conduction than the two frequencies resolve) is a limit, not an
//! estimate: the covariance is then that of (eps_hf, d_eps) with sigma held
//! there, and sigma's variance 0. The 3x3 Cholesky is written out here so every float operation
//! stays explicit on the device.

use crate::dielectric::{eps0, omega};
use crate::real::{Cx, Real};
use core::fmt;

/// The product's relaxation-frequency law and Cole-Cole broadening.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RelaxationLaw<T> {
    /// Cole-Cole broadening alpha, 0 <= alpha < 1.
    pub alpha: T,
    /// Relaxation frequency at `sigma_ref_s_m` and `t_ref_c`, Hz.
    pub fr_ref_hz: T,
    /// Reference conductivity of the law, S/m.
    pub sigma_ref_s_m: T,
    /// Exponent p of f_r in sigma (1 for a Maxwell-Wagner interface).
    pub fr_exponent: T,
    /// Temperature coefficient c_T of ln f_r beyond sigma's own, 1/K.
    pub fr_temp_coeff_per_c: T,
    /// Reference temperature of the law, C.
    pub t_ref_c: T,
}

impl<T: Real> RelaxationLaw<T> {
    /// ln f_r for ln(sigma) = `ln_sigma` at `t_c`.
    #[inline]
    pub fn ln_fr(&self, ln_sigma: T, t_c: T) -> T {
        T::ln(self.fr_ref_hz)
            + self.fr_exponent * (ln_sigma - T::ln(self.sigma_ref_s_m))
            + self.fr_temp_coeff_per_c * (t_c - self.t_ref_c)
    }

    /// Relaxation frequency f_r, Hz.
    pub fn relaxation_frequency_hz(&self, sigma_s_m: T, t_c: T) -> T {
        T::exp(self.ln_fr(T::ln(sigma_s_m), t_c))
    }
}

/// Material parameters estimated by the inversion.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct MaterialParams<T> {
    /// Permittivity above the interfacial relaxation (carries the water).
    pub eps_hf: T,
    /// Strength of the interfacial relaxation.
    pub d_eps: T,
    /// DC (ionic) conductivity, S/m.
    pub sigma_s_m: T,
}

/// Index of a parameter in [`MaterialParams`] order (covariance rows).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Param {
    /// `eps_hf`.
    EpsHf = 0,
    /// `d_eps`.
    DEps = 1,
    /// `sigma_s_m`.
    Sigma = 2,
}

/// The product model eps*(f) for given parameters (the one function the
/// inversion, the host fit and [`crate::synth`] all evaluate).
pub fn product_permittivity<T: Real>(
    freq_hz: T,
    p: &MaterialParams<T>,
    law: &RelaxationLaw<T>,
    t_c: T,
) -> Cx<T> {
    let k = Kernel::new(law, t_c);
    k.model(&Freq::new(freq_hz), p.eps_hf, p.d_eps, T::ln(p.sigma_s_m))
        .0
}

/// One measured frequency: eps* and the standard deviation of the noise on
/// each of eps' and eps''.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Observation<T> {
    /// Excitation frequency, Hz.
    pub freq_hz: T,
    /// Measured eps* = eps' - j eps'' (`im` = -eps'').
    pub eps: Cx<T>,
    /// Standard deviation of the noise on eps' and on eps'' (> 0).
    pub sd: T,
}

/// Bounds on the parameters (inclusive).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Bounds<T> {
    /// eps_hf range.
    pub eps_hf: (T, T),
    /// d_eps range; a solution at the lower bound (normally 0) is accepted.
    pub d_eps: (T, T),
    /// sigma range, S/m; a solution at the lower bound is accepted (the
    /// product conducts less than the two frequencies resolve: a dry,
    /// low-loss product), with sigma's variance 0 where the data do not
    /// determine it.
    pub sigma_s_m: (T, T),
}

impl<T: Real> Default for Bounds<T> {
    /// eps_hf 1-100, d_eps 0-10000, sigma 1e-7-20 S/m.
    fn default() -> Self {
        Bounds {
            eps_hf: (T::one(), T::c(100.0)),
            d_eps: (T::zero(), T::c(1e4)),
            sigma_s_m: (T::c(1e-7), T::c(20.0)),
        }
    }
}

/// Options of [`invert`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct InvertOptions<T> {
    /// Parameter bounds.
    pub bounds: Bounds<T>,
    /// Most model evaluations in the Levenberg-Marquardt phase (default 40).
    pub max_iterations: u32,
}

impl<T: Real> Default for InvertOptions<T> {
    fn default() -> Self {
        InvertOptions {
            bounds: Bounds::default(),
            max_iterations: 40,
        }
    }
}

/// A converged inversion.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Inversion<T> {
    /// The estimate.
    pub params: MaterialParams<T>,
    /// Covariance of (eps_hf, d_eps, sigma_s_m), in their units squared.
    pub covariance: [[T; 3]; 3],
    /// Weighted residual sum of squares at the solution (chi-square, 1 dof).
    pub chi2: T,
    /// Levenberg-Marquardt evaluations used.
    pub iterations: u32,
}

impl<T: Real> Inversion<T> {
    /// Standard deviation of one parameter.
    pub fn sd(&self, p: Param) -> T {
        let i = p as usize;
        T::sqrt(T::max(self.covariance[i][i], T::zero()))
    }
}

/// Why an inversion gave no estimate.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum InvertError {
    /// A frequency, permittivity or noise value is not finite or not
    /// positive, or both frequencies are equal.
    InvalidInput,
    /// The iteration budget ran out before convergence.
    NotConverged,
    /// The parameters are not determined by the data (J^T J singular; with
    /// sigma held on its lower bound, that of eps_hf and d_eps).
    Singular,
    /// The best fit lies on a bound of this parameter.
    OutOfBounds(Param),
}

impl fmt::Display for InvertError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            InvertError::InvalidInput => f.write_str(
                "invalid inversion input: frequencies must differ and be > 0 Hz, eps* finite, noise sd > 0",
            ),
            InvertError::NotConverged => f.write_str("relaxation inversion did not converge within its budget"),
            InvertError::Singular => f.write_str("relaxation parameters not determined by the data (singular)"),
            InvertError::OutOfBounds(p) => write!(
                f,
                "relaxation fit pinned at the bound of {}",
                match p {
                    Param::EpsHf => "eps_hf",
                    Param::DEps => "d_eps",
                    Param::Sigma => "sigma_s_m",
                }
            ),
        }
    }
}

impl core::error::Error for InvertError {}

/// Precomputed law constants for one inversion.
struct Kernel<T> {
    beta: T,
    cos_b: T,
    sin_b: T,
    /// ln f_r at ln sigma = 0.
    ln_fr0: T,
    fr_exponent: T,
}

/// Per-frequency constants: ln f and 1 / (2 pi f eps0).
#[derive(Clone, Copy)]
struct Freq<T> {
    ln_f: T,
    inv_w_eps0: T,
}

impl<T: Real> Freq<T> {
    fn new(freq_hz: T) -> Self {
        Freq {
            ln_f: T::ln(freq_hz),
            inv_w_eps0: T::one() / (omega(freq_hz) * eps0::<T>()),
        }
    }
}

impl<T: Real> Kernel<T> {
    fn new(law: &RelaxationLaw<T>, t_c: T) -> Self {
        let beta = T::one() - law.alpha;
        let phi = T::PI * beta / T::c(2.0);
        Kernel {
            beta,
            cos_b: T::cos(phi),
            sin_b: T::sin(phi),
            ln_fr0: law.ln_fr(T::zero(), t_c),
            fr_exponent: law.fr_exponent,
        }
    }

    /// Model value and its derivatives w.r.t. (eps_hf, d_eps, ln sigma).
    #[inline]
    fn model(&self, f: &Freq<T>, eps_hf: T, d_eps: T, q: T) -> (Cx<T>, [Cx<T>; 3]) {
        let arg = self.beta * (f.ln_f - self.ln_fr0 - self.fr_exponent * q);
        let mag = T::exp(T::clamp(arg, T::c(-30.0), T::c(30.0)));
        let u = Cx::new(mag * self.cos_b, mag * self.sin_b);
        let inv_d = Cx::new(T::one(), T::zero()) / (Cx::new(T::one(), T::zero()) + u);
        let cond = T::exp(q) * f.inv_w_eps0;
        let relax = inv_d * d_eps;
        let eps = Cx::new(eps_hf + relax.re, relax.im - cond);
        // d(d/D)/dq = d_eps * beta * p * u / D^2.
        let dq = relax * inv_d * u * (self.beta * self.fr_exponent);
        let jac = [
            Cx::new(T::one(), T::zero()),
            inv_d,
            Cx::new(dq.re, dq.im - cond),
        ];
        (eps, jac)
    }
}

type M3<T> = [[T; 3]; 3];

/// Solves the SPD system `m x = b` by Cholesky; `None` if not positive definite.
fn chol_solve<T: Real>(m: &M3<T>, b: &[T; 3]) -> Option<[T; 3]> {
    let mut l = [[T::zero(); 3]; 3];
    for i in 0..3 {
        for j in 0..=i {
            let mut s = m[i][j];
            for k in 0..j {
                s -= l[i][k] * l[j][k];
            }
            if i == j {
                if !(s > T::zero()) {
                    return None;
                }
                l[i][i] = T::sqrt(s);
            } else {
                l[i][j] = s / l[j][j];
            }
        }
    }
    let mut y = [T::zero(); 3];
    for i in 0..3 {
        let mut s = b[i];
        for k in 0..i {
            s -= l[i][k] * y[k];
        }
        y[i] = s / l[i][i];
    }
    let mut x = [T::zero(); 3];
    for i in (0..3).rev() {
        let mut s = y[i];
        for k in i + 1..3 {
            s -= l[k][i] * x[k];
        }
        x[i] = s / l[i][i];
    }
    Some(x)
}

/// Inverse of an SPD 3x3 matrix, refusing a near-singular one (checked on the
/// correlation-scaled matrix, so units do not matter).
fn spd_inverse<T: Real>(a: &M3<T>) -> Option<M3<T>> {
    let mut s = [T::zero(); 3];
    for i in 0..3 {
        if !(a[i][i] > T::zero()) || !a[i][i].is_finite() {
            return None;
        }
        s[i] = T::one() / T::sqrt(a[i][i]);
    }
    let mut r = [[T::zero(); 3]; 3];
    for i in 0..3 {
        for j in 0..3 {
            r[i][j] = a[i][j] * s[i] * s[j];
        }
    }
    // Smallest Cholesky pivot of the correlation matrix ~ 1 - R^2 of the worst
    // parameter against the others.
    let tol = T::EPSILON * T::c(1e3);
    let mut out = [[T::zero(); 3]; 3];
    for j in 0..3 {
        let mut e = [T::zero(); 3];
        e[j] = T::one();
        let col = chol_solve(&r, &e)?;
        for i in 0..3 {
            out[i][j] = col[i] * s[i] * s[j];
        }
    }
    // Reject when a variance is blown up beyond what the precision supports.
    for i in 0..3 {
        if !(out[i][i] * a[i][i] * tol < T::one()) {
            return None;
        }
    }
    Some(out)
}

struct Problem<'a, T> {
    obs: &'a [Observation<T>; 2],
    freqs: [Freq<T>; 2],
    k: Kernel<T>,
    lo: [T; 3],
    hi: [T; 3],
}

impl<T: Real> Problem<'_, T> {
    /// chi2, and optionally the normal matrix J^T W J and J^T W r.
    fn eval(&self, x: &[T; 3], normal: bool) -> (T, M3<T>, [T; 3]) {
        let mut chi2 = T::zero();
        let mut a = [[T::zero(); 3]; 3];
        let mut g = [T::zero(); 3];
        for (o, f) in self.obs.iter().zip(self.freqs.iter()) {
            let (m, jac) = self.k.model(f, x[0], x[1], x[2]);
            let w = T::one() / o.sd;
            let rr = (o.eps.re - m.re) * w;
            let ri = (o.eps.im - m.im) * w;
            chi2 += rr * rr + ri * ri;
            if normal {
                let jr = [jac[0].re * w, jac[1].re * w, jac[2].re * w];
                let ji = [jac[0].im * w, jac[1].im * w, jac[2].im * w];
                for i in 0..3 {
                    g[i] += jr[i] * rr + ji[i] * ri;
                    for j in 0..3 {
                        a[i][j] += jr[i] * jr[j] + ji[i] * ji[j];
                    }
                }
            }
        }
        (chi2, a, g)
    }

    fn clamp(&self, x: &mut [T; 3]) {
        for (i, v) in x.iter_mut().enumerate() {
            *v = T::clamp(*v, self.lo[i], self.hi[i]);
        }
    }

    /// For a relaxation frequency set by ln sigma = `q` in the law, the model
    /// is linear in (eps_hf, d_eps, sigma_cond) when the conduction term's
    /// sigma is taken as a separate unknown. Returns that weighted linear
    /// least-squares solution; a consistent fit has ln sigma_cond = q.
    fn linear3(&self, q: T) -> Option<[T; 3]> {
        let mut a = [[T::zero(); 3]; 3];
        let mut b = [T::zero(); 3];
        for (o, f) in self.obs.iter().zip(self.freqs.iter()) {
            let (_, jac) = self.k.model(f, T::zero(), T::zero(), q);
            let w = T::one() / o.sd;
            // Columns: eps_hf -> (1, 0); d_eps -> 1/D; sigma -> (0, -1/(w eps0)).
            let c_cond = -f.inv_w_eps0;
            let rows = [
                ([T::one(), jac[1].re, T::zero()], o.eps.re),
                ([T::zero(), jac[1].im, c_cond], o.eps.im),
            ];
            for (r, y) in rows {
                for i in 0..3 {
                    b[i] += r[i] * w * y * w;
                    for j in 0..3 {
                        a[i][j] += r[i] * w * r[j] * w;
                    }
                }
            }
        }
        chol_solve(&a, &b)
    }

    /// Consistency of [`Problem::linear3`]: ln sigma_cond - q (a non-positive
    /// sigma_cond counts as ln 1e-30, far below any q).
    fn mismatch(&self, q: T) -> Option<(T, [T; 3])> {
        let x = self.linear3(q)?;
        Some((T::ln(T::max(x[2], T::c(1e-30))) - q, x))
    }
}

struct Fit<T> {
    x: [T; 3],
    chi2: T,
    a: M3<T>,
    /// The gradient at `x` (of the sign convention of `Problem::eval`).
    g: [T; 3],
    iterations: u32,
}

/// Levenberg-Marquardt from `x0` with bounds by active-set projection.
fn levenberg_marquardt<T: Real>(
    p: &Problem<'_, T>,
    x0: [T; 3],
    max_iterations: u32,
) -> Result<Fit<T>, InvertError> {
    let tol = T::max(T::c(1e-9), T::EPSILON * T::c(1e4));
    let mut x = x0;
    let (mut chi2, mut a, mut g) = p.eval(&x, true);
    let mut lambda = T::c(1e-3);
    let mut it = 0u32;
    loop {
        // Active set: a parameter on a bound whose descent direction points out.
        let mut free = [true; 3];
        for i in 0..3 {
            let at_lo = x[i] <= p.lo[i] && g[i] < T::zero();
            let at_hi = x[i] >= p.hi[i] && g[i] > T::zero();
            free[i] = !(at_lo || at_hi);
        }
        let mask = |m: &M3<T>, v: &[T; 3], lam: T| {
            let mut mm = *m;
            let mut vv = *v;
            for i in 0..3 {
                if !free[i] {
                    for j in 0..3 {
                        mm[i][j] = T::zero();
                        mm[j][i] = T::zero();
                    }
                    mm[i][i] = T::one();
                    vv[i] = T::zero();
                } else {
                    mm[i][i] *= T::one() + lam;
                }
            }
            (mm, vv)
        };
        // Gauss-Newton decrement: predicted chi2 reduction of a full step.
        let (m0, g0) = mask(&a, &g, T::zero());
        let d0 = chol_solve(&m0, &g0).ok_or(InvertError::Singular)?;
        let dec = d0[0] * g0[0] + d0[1] * g0[1] + d0[2] * g0[2];
        if dec < tol * (T::one() + chi2) {
            break;
        }
        if it >= max_iterations {
            // Out of budget while pressed against a bound: the data want a
            // value outside it (d_eps >= lower bound is a physical limit).
            return Err(if !free[0] {
                InvertError::OutOfBounds(Param::EpsHf)
            } else if !free[2] && x[2] >= p.hi[2] {
                InvertError::OutOfBounds(Param::Sigma)
            } else if !free[1] && x[1] >= p.hi[1] {
                InvertError::OutOfBounds(Param::DEps)
            } else {
                InvertError::NotConverged
            });
        }
        let (m1, g1) = mask(&a, &g, lambda);
        let d = chol_solve(&m1, &g1).ok_or(InvertError::Singular)?;
        let mut xt = [x[0] + d[0], x[1] + d[1], x[2] + d[2]];
        p.clamp(&mut xt);
        let ct = p.eval(&xt, false).0;
        it += 1;
        if ct.is_finite() && ct < chi2 {
            x = xt;
            (chi2, a, g) = p.eval(&x, true);
            lambda = T::max(lambda / T::c(10.0), T::c(1e-9));
        } else {
            lambda *= T::c(10.0);
            if lambda > T::c(1e9) {
                // No step of any length lowers chi2: a minimum to working precision.
                break;
            }
        }
    }
    Ok(Fit {
        x,
        chi2,
        a,
        g,
        iterations: it,
    })
}

/// Estimates [`MaterialParams`] from eps* at two frequencies.
///
/// `t_c` is the product temperature (for the law's temperature term).
///
/// # Errors
/// [`InvertError::InvalidInput`], [`InvertError::NotConverged`],
/// [`InvertError::Singular`], [`InvertError::OutOfBounds`] (never a number
/// that did not come from a converged, determined fit; a sigma held on its
/// lower bound is returned as that bound, with variance 0). Out of budget
/// while sigma is held on its lower bound gives `NotConverged`, as for
/// d_eps on its own (before, `OutOfBounds(Sigma)`).
pub fn invert<T: Real>(
    obs: &[Observation<T>; 2],
    law: &RelaxationLaw<T>,
    t_c: T,
    opts: &InvertOptions<T>,
) -> Result<Inversion<T>, InvertError> {
    for o in obs.iter() {
        let ok = o.freq_hz.is_finite()
            && o.freq_hz > T::zero()
            && o.eps.re.is_finite()
            && o.eps.im.is_finite()
            && o.sd.is_finite()
            && o.sd > T::zero();
        if !ok {
            return Err(InvertError::InvalidInput);
        }
    }
    let law_ok = law.alpha >= T::zero()
        && law.alpha < T::one()
        && law.fr_ref_hz > T::zero()
        && law.sigma_ref_s_m > T::zero()
        && law.fr_exponent.is_finite()
        && law.fr_temp_coeff_per_c.is_finite()
        && t_c.is_finite()
        && law.fr_ref_hz.is_finite()
        && law.sigma_ref_s_m.is_finite();
    if !law_ok || !(T::abs(obs[0].freq_hz - obs[1].freq_hz) > T::zero()) {
        return Err(InvertError::InvalidInput);
    }
    let b = &opts.bounds;
    let p = Problem {
        obs,
        freqs: [Freq::new(obs[0].freq_hz), Freq::new(obs[1].freq_hz)],
        k: Kernel::new(law, t_c),
        lo: [b.eps_hf.0, b.d_eps.0, T::ln(b.sigma_s_m.0)],
        hi: [b.eps_hf.1, b.d_eps.1, T::ln(b.sigma_s_m.1)],
    };
    if !(p.lo[0] < p.hi[0] && p.lo[1] < p.hi[1] && p.lo[2] < p.hi[2]) {
        return Err(InvertError::InvalidInput);
    }

    // Start: sigma cannot exceed the smallest eps'' w eps0 (relaxation loss >= 0).
    let mut s_max = T::MAX;
    for o in obs.iter() {
        s_max = T::min(
            s_max,
            T::max(-o.eps.im, T::zero()) * omega(o.freq_hz) * eps0::<T>(),
        );
    }
    let q_top = T::clamp(T::ln(T::max(s_max, b.sigma_s_m.0)), p.lo[2], p.hi[2]);
    // Starts: roots of ln sigma_cond(q) - q on a grid of q (factor e^0.5 steps
    // from the upper estimate down, then bisection). A root is an exact
    // two-frequency solution up to noise; with several, try the two best.
    const GRID: usize = 24;
    let mut starts: [([T; 3], T); 2] = [([T::zero(); 3], T::MAX); 2];
    let push = |starts: &mut [([T; 3], T); 2], x: [T; 3]| {
        let mut x = x;
        p.clamp(&mut x);
        let c = p.eval(&x, false).0;
        if c < starts[0].1 {
            starts[1] = starts[0];
            starts[0] = (x, c);
        } else if c < starts[1].1 {
            starts[1] = (x, c);
        }
    };
    let step = T::c(0.5);
    let mut prev: Option<(T, T)> = None;
    for i in 0..GRID {
        let q = q_top - step * T::c(i as f64);
        if q < p.lo[2] - step {
            break;
        }
        let Some((h, _)) = p.mismatch(q) else {
            prev = None;
            continue;
        };
        if let Some((qp, hp)) = prev {
            if (hp <= T::zero()) != (h <= T::zero()) {
                // Bracket [q, qp]: bisection.
                let (mut a_q, mut b_q) = (q, qp);
                let mut ha = h;
                for _ in 0..16 {
                    let m = (a_q + b_q) / T::c(2.0);
                    match p.mismatch(m) {
                        Some((hm, _)) if (hm <= T::zero()) == (ha <= T::zero()) => {
                            a_q = m;
                            ha = hm;
                        }
                        _ => b_q = m,
                    }
                }
                let qm = (a_q + b_q) / T::c(2.0);
                if let Some((_, x)) = p.mismatch(qm) {
                    push(&mut starts, [x[0], x[1], qm]);
                }
            }
        }
        prev = Some((q, h));
    }
    if !(starts[0].1 < T::MAX) {
        // No consistent root (noise-dominated data): start from the top.
        if let Some(x) = p.linear3(q_top) {
            push(&mut starts, [x[0], x[1], q_top]);
        }
        push(&mut starts, [obs[1].eps.re, T::zero(), q_top]);
    }
    let mut best: Option<Result<Fit<T>, InvertError>> = None;
    for (x0, c0) in starts {
        if !(c0 < T::MAX) {
            continue;
        }
        // A first fit consistent with the noise (chi2 below the 99 % point of
        // chi-square with 1 dof, 6.63) is kept without trying the second root.
        if matches!(best, Some(Ok(ref b)) if b.chi2 < T::c(6.63)) {
            break;
        }
        let r = levenberg_marquardt(&p, x0, opts.max_iterations);
        best = match (best, r) {
            (None, r) => Some(r),
            (Some(Ok(b)), Ok(f)) => Some(Ok(if f.chi2 < b.chi2 { f } else { b })),
            (Some(Ok(b)), Err(_)) => Some(Ok(b)),
            (Some(Err(_)), r) => Some(r),
        };
    }
    let fit = best.unwrap_or(Err(InvertError::NotConverged))?;
    let (x, chi2, a, g, it) = (fit.x, fit.chi2, fit.a, fit.g, fit.iterations);
    // A solution on a bound means the data want a value outside it
    // (d_eps and sigma at their lower bounds are physical limits and
    // accepted: no relaxation strength, or less conduction than the two
    // frequencies resolve).
    let pinned = |i: usize| x[i] <= p.lo[i] || x[i] >= p.hi[i];
    if pinned(0) {
        return Err(InvertError::OutOfBounds(Param::EpsHf));
    }
    if x[1] >= p.hi[1] {
        return Err(InvertError::OutOfBounds(Param::DEps));
    }
    if x[2] >= p.hi[2] {
        return Err(InvertError::OutOfBounds(Param::Sigma));
    }
    // sigma on its lower bound. Pushed below it by the data (the active
    // set's test of `levenberg_marquardt`), it is held there: the covariance
    // of (eps_hf, d_eps) with sigma held, sigma's variance 0; where that
    // does not determine d_eps (the relaxation far below the band at the
    // bound's relaxation frequency), the full covariance, if any. On the
    // bound but not pushed (a minimum there), the full covariance, else the
    // held one.
    let at_lo = x[2] <= p.lo[2];
    let pushed = at_lo && g[2] < T::zero();
    let held_cov = || {
        let mut held = a;
        for j in 0..3 {
            held[2][j] = T::zero();
            held[j][2] = T::zero();
        }
        held[2][2] = T::one();
        spd_inverse(&held).map(|mut c| {
            c[2][2] = T::zero();
            c
        })
    };
    let cov_q = if pushed {
        held_cov().or_else(|| spd_inverse(&a))
    } else if at_lo {
        spd_inverse(&a).or_else(held_cov)
    } else {
        spd_inverse(&a)
    };
    let cov_q = cov_q.ok_or(InvertError::Singular)?;
    let sigma = T::exp(x[2]);
    let scale = [T::one(), T::one(), sigma];
    let mut cov = [[T::zero(); 3]; 3];
    for i in 0..3 {
        for j in 0..3 {
            cov[i][j] = cov_q[i][j] * scale[i] * scale[j];
        }
    }
    Ok(Inversion {
        params: MaterialParams {
            eps_hf: x[0],
            d_eps: x[1],
            sigma_s_m: sigma,
        },
        covariance: cov,
        chi2,
        iterations: it,
    })
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use crate::dielectric::cole_cole;
    use crate::dielectric::conductivity_term;
    use rand::{RngExt, SeedableRng};
    use rand_distr::{Distribution, Normal};

    pub(crate) fn law() -> RelaxationLaw<f64> {
        RelaxationLaw {
            alpha: 0.2,
            fr_ref_hz: 5e6,
            sigma_ref_s_m: 1e-3,
            fr_exponent: 1.0,
            fr_temp_coeff_per_c: 0.0,
            t_ref_c: 25.0,
        }
    }

    fn obs(p: &MaterialParams<f64>, law: &RelaxationLaw<f64>, sd: f64) -> [Observation<f64>; 2] {
        [1e6, 20e6].map(|f| Observation {
            freq_hz: f,
            eps: product_permittivity(f, p, law, 25.0),
            sd,
        })
    }

    #[test]
    fn model_is_cole_cole_plus_conduction() {
        // docs/DESIGN.md model written out with the independent dielectric functions.
        let l = law();
        let p = MaterialParams {
            eps_hf: 6.0,
            d_eps: 25.0,
            sigma_s_m: 2e-3,
        };
        let fr = l.relaxation_frequency_hz(2e-3, 25.0);
        assert!((fr - 1e7).abs() < 1e-3);
        for f in [1e6, 7e6, 20e6] {
            let a = product_permittivity(f, &p, &l, 25.0);
            let b = cole_cole(f, 6.0, 25.0, fr, 0.2) + conductivity_term(f, 2e-3);
            assert!((a - b).norm() < 1e-9 * b.norm());
        }
    }

    #[test]
    fn jacobian_matches_finite_differences() {
        let l = law();
        let k = Kernel::new(&l, 25.0);
        let x = [6.0, 25.0, (2e-3f64).ln()];
        for f in [1e6, 20e6] {
            let fq = Freq::new(f);
            let (_, jac) = k.model(&fq, x[0], x[1], x[2]);
            for i in 0..3 {
                let h = 1e-6 * (1.0 + x[i].abs());
                let mut xp = x;
                let mut xm = x;
                xp[i] += h;
                xm[i] -= h;
                let fd = (k.model(&fq, xp[0], xp[1], xp[2]).0
                    - k.model(&fq, xm[0], xm[1], xm[2]).0)
                    / (2.0 * h);
                assert!(
                    (fd - jac[i]).norm() < 1e-5 * (1.0 + jac[i].norm()),
                    "f {f} i {i}: {fd} vs {}",
                    jac[i]
                );
            }
        }
    }

    #[test]
    fn exact_data_recovered_across_product_ranges() {
        // Synthetic data from known parameters (issue 3 test list).
        let l = law();
        let mut n = 0;
        for &eps_hf in &[2.5, 5.0, 12.0, 30.0] {
            for &d_eps in &[0.5, 5.0, 40.0] {
                for &sigma in &[1e-4, 1e-3, 1e-2, 5e-2] {
                    let p = MaterialParams {
                        eps_hf,
                        d_eps,
                        sigma_s_m: sigma,
                    };
                    let o = obs(&p, &l, 0.01);
                    let r = invert(&o, &l, 25.0, &InvertOptions::default())
                        .unwrap_or_else(|e| panic!("{p:?}: {e}"));
                    assert!(
                        (r.params.eps_hf - eps_hf).abs() < 1e-4 * eps_hf,
                        "{p:?} {r:?}"
                    );
                    assert!(
                        (r.params.d_eps - d_eps).abs() < 1e-3 * d_eps.max(1.0),
                        "{p:?} {r:?}"
                    );
                    assert!(
                        (r.params.sigma_s_m / sigma - 1.0).abs() < 1e-4,
                        "{p:?} {r:?}"
                    );
                    assert!(r.chi2 < 1e-6);
                    n += 1;
                }
            }
        }
        assert_eq!(n, 48);
    }

    #[test]
    fn noisy_inversion_covariance_matches_scatter() {
        // Covariance (J^T W J)^-1 vs the scatter of repeated noisy inversions:
        // within 20 % on each standard deviation (issue 3). Seeded.
        let seed = 20261201u64;
        let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
        let l = law();
        for p in [
            MaterialParams {
                eps_hf: 5.0,
                d_eps: 15.0,
                sigma_s_m: 1e-3,
            },
            MaterialParams {
                eps_hf: 14.0,
                d_eps: 60.0,
                sigma_s_m: 8e-3,
            },
        ] {
            let clean = obs(&p, &l, 1.0);
            let sd = 0.02;
            let noise = Normal::new(0.0, sd).unwrap();
            let n = 400;
            let mut sum = [0.0f64; 3];
            let mut sum2 = [0.0f64; 3];
            let mut predicted = [0.0f64; 3];
            for _ in 0..n {
                let mut o = clean;
                for c in o.iter_mut() {
                    c.sd = sd;
                    c.eps.re += noise.sample(&mut rng);
                    c.eps.im += noise.sample(&mut rng);
                }
                let r = invert(&o, &l, 25.0, &InvertOptions::default())
                    .unwrap_or_else(|e| panic!("seed {seed}: {e}"));
                let v = [r.params.eps_hf, r.params.d_eps, r.params.sigma_s_m];
                for i in 0..3 {
                    sum[i] += v[i];
                    sum2[i] += v[i] * v[i];
                    predicted[i] += r.covariance[i][i] / n as f64;
                }
            }
            for i in 0..3 {
                let mean = sum[i] / n as f64;
                let var = sum2[i] / n as f64 - mean * mean;
                let ratio = (var / predicted[i]).sqrt();
                assert!(
                    (ratio - 1.0).abs() < 0.2,
                    "seed {seed} {p:?} param {i}: scatter/predicted sd {ratio}"
                );
            }
            let _: f64 = rng.random();
        }
    }

    #[test]
    fn noisy_data_recovered_across_product_ranges() {
        // Synthetic grain (crate::synth) over 8-25 % moisture, 5-40 C and three
        // salt levels, noise sd 0.01 on eps' and eps'': every parameter within
        // 4.5 of its own predicted standard deviation, and the z-scores of all
        // 135 parameters scattered like a unit normal (rms within 0.7-1.3). Seeded.
        use crate::synth::SynthProduct;
        let seed = 7_340_021u64;
        let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
        let sp = SynthProduct::<f64>::grain();
        let law = sp.law();
        let sd = 0.01;
        let noise = Normal::new(0.0, sd).unwrap();
        let (mut n, mut z2) = (0usize, 0.0f64);
        for s in crate::synth::span_grid::<f64>() {
            let t = s.temperature_c;
            let truth = sp.material(&s);
            let o = [1e6, 20e6].map(|f| {
                let e = sp.permittivity(f, &s);
                Observation {
                    freq_hz: f,
                    eps: Cx::new(e.re + noise.sample(&mut rng), e.im + noise.sample(&mut rng)),
                    sd,
                }
            });
            let r = invert(&o, &law, t, &InvertOptions::default())
                .unwrap_or_else(|e| panic!("seed {seed} {s:?}: {e}"));
            let est = [r.params.eps_hf, r.params.d_eps, r.params.sigma_s_m];
            let tru = [truth.eps_hf, truth.d_eps, truth.sigma_s_m];
            for i in 0..3 {
                let z = (est[i] - tru[i]) / r.covariance[i][i].sqrt();
                assert!(z.abs() < 4.5, "seed {seed} {s:?} param {i}: z {z}");
                z2 += z * z;
                n += 1;
            }
        }
        let rms = (z2 / n as f64).sqrt();
        println!("z rms {rms} over {n}");
        assert!((0.7..1.3).contains(&rms), "seed {seed}: z rms {rms}");
    }

    #[test]
    fn typed_failures() {
        let l = law();
        let p = MaterialParams {
            eps_hf: 5.0,
            d_eps: 15.0,
            sigma_s_m: 1e-3,
        };
        let mut o = obs(&p, &l, 0.01);
        o[0].sd = 0.0;
        assert_eq!(
            invert(&o, &l, 25.0, &InvertOptions::default()),
            Err(InvertError::InvalidInput)
        );
        let mut o = obs(&p, &l, 0.01);
        o[1].freq_hz = o[0].freq_hz;
        assert_eq!(
            invert(&o, &l, 25.0, &InvertOptions::default()),
            Err(InvertError::InvalidInput)
        );
        // eps_hf beyond the bound.
        let o = obs(&MaterialParams { eps_hf: 150.0, ..p }, &l, 0.01);
        assert_eq!(
            invert(&o, &l, 25.0, &InvertOptions::default()),
            Err(InvertError::OutOfBounds(Param::EpsHf))
        );
        // A budget of one evaluation cannot converge from the grid start on noisy data.
        let mut o = obs(&p, &l, 0.01);
        o[0].eps.re += 0.3;
        let opts = InvertOptions {
            max_iterations: 1,
            ..InvertOptions::default()
        };
        assert_eq!(invert(&o, &l, 25.0, &opts), Err(InvertError::NotConverged));
        // Conductivity beyond the upper bound: refused (the fit presses
        // against sigma's upper bound and drags eps_hf onto its own).
        let o = obs(
            &MaterialParams {
                sigma_s_m: 1000.0,
                ..p
            },
            &l,
            0.01,
        );
        let r = invert(&o, &l, 25.0, &InvertOptions::default());
        assert!(matches!(r, Err(InvertError::OutOfBounds(_))), "{r:?}");
    }

    /// A lossless reading (eps'' = 0 at both frequencies, as of a dry
    /// plastic; common practice, no source): sigma lands on its lower bound
    /// and d_eps on 0, both accepted, eps_hf is eps'; sigma is held there,
    /// not estimated (variance 0), in f64 and in the device's f32.
    #[test]
    fn a_lossless_reading_sits_on_the_lower_bounds() {
        let l = law();
        let o = [1e6, 20e6].map(|f| Observation {
            freq_hz: f,
            eps: Cx::new(4.0, 0.0),
            sd: 0.01,
        });
        let b = Bounds::<f64>::default();
        let r = invert(&o, &l, 25.0, &InvertOptions::default()).expect("accepted");
        assert!((r.params.eps_hf - 4.0).abs() < 1e-3, "{r:?}");
        assert!(r.params.d_eps < 1e-3, "{r:?}");
        assert!(
            (r.params.sigma_s_m / b.sigma_s_m.0 - 1.0).abs() < 1e-9,
            "{r:?}"
        );
        assert!(
            r.sd(Param::EpsHf) > 0.0 && r.sd(Param::EpsHf) < 0.05,
            "{r:?}"
        );
        // Held, not estimated: no variance, no covariance with the others.
        assert_eq!(r.covariance[2], [0.0; 3], "{r:?}");
        assert_eq!(r.covariance[0][2], 0.0);
        // The same in f32, as the device runs it.
        let o32 = o.map(|x| Observation {
            freq_hz: x.freq_hz as f32,
            eps: Cx::new(x.eps.re as f32, x.eps.im as f32),
            sd: x.sd as f32,
        });
        let l32 = RelaxationLaw {
            alpha: l.alpha as f32,
            fr_ref_hz: l.fr_ref_hz as f32,
            sigma_ref_s_m: l.sigma_ref_s_m as f32,
            fr_exponent: l.fr_exponent as f32,
            fr_temp_coeff_per_c: l.fr_temp_coeff_per_c as f32,
            t_ref_c: l.t_ref_c as f32,
        };
        let r32 = invert(&o32, &l32, 25.0f32, &InvertOptions::default()).expect("accepted in f32");
        assert!((r32.params.eps_hf - 4.0).abs() < 1e-2, "{r32:?}");
        assert!((r32.params.sigma_s_m / 1e-7 - 1.0).abs() < 1e-5, "{r32:?}");
        assert_eq!(r32.covariance[2], [0.0; 3], "{r32:?}");
        assert!(r32.sd(Param::EpsHf) > 0.0 && r32.sd(Param::EpsHf) < 0.05);
    }

    #[test]
    fn spd_inverse_is_inverse() {
        let a = [[4.0, 1.0, 0.5], [1.0, 3.0, 0.2], [0.5, 0.2, 2.0]];
        let inv = spd_inverse(&a).unwrap();
        for i in 0..3 {
            for j in 0..3 {
                let s: f64 = (0..3).map(|k| a[i][k] * inv[k][j]).sum();
                assert!((s - if i == j { 1.0 } else { 0.0 }).abs() < 1e-12);
            }
        }
        assert!(spd_inverse(&[[1.0, 1.0, 0.0], [1.0, 1.0, 0.0], [0.0, 0.0, 1.0]]).is_none());
    }
}
