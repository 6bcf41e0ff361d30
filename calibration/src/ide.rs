//! Interdigital (fringing-field) electrodes: cell constant from geometry,
//! penetration depth, and what a window or build-up layer costs.
//!
//! Conformal mapping after Igreja and Dias, Sens. Actuators A 112:291-301
//! (2004). Metallisation ratio eta = W/(W+G), spatial wavelength
//! lambda = 2(W+G). Per half-space of relative permittivity eps and electrode
//! length L, an interior cell has C_I = eps0 eps L K(k)/K(k'), k_I =
//! sin(pi eta/2), and the two outer cells k_E = 2 sqrt(eta)/(1 + eta); for N
//! electrodes C = (N-3) C_I/2 + 2 C_I C_E/(C_I + C_E). A layer of finite
//! thickness h (r = h/lambda) has
//!
//! ```text
//! interior: k = (theta2(q)/theta3(q))^2, q = exp(-4 pi r),
//!           k_I = sn(K(k) eta, k) sqrt((1/k^2 - 1)/(1/k^2 - sn^2))
//! exterior: k_E = (1/t3) sqrt((t4^2 - t3^2)/(t4^2 - 1)),
//!           t3 = cosh(pi (1-eta)/(8 r)), t4 = cosh(pi (1+eta)/(8 r))
//! ```
//!
//! and stacked layers combine by partial capacitances: C = sum_i
//! (eps_i - eps_{i+1}) C(H_i) + eps_last C(inf), H_i the depth of the i-th
//! interface. The forms here are rewritten for stability (thin layers use
//! Jacobi's imaginary transformation of the theta functions, sqrt((1-k^2)/
//! (1-k^2 sn^2)) = k'/dn), the algebra being the same.
//!
//! Complete elliptic integrals and sn by the arithmetic-geometric mean
//! (Abramowitz and Stegun 17.6 and 16.4). Lengths in metres, capacitance in F.

use crate::dielectric::eps0;
use crate::real::{Cx, Real};

/// Arithmetic-geometric mean of `a` and `b` (> 0).
pub fn agm<T: Real>(a: T, b: T) -> T {
    let (mut a, mut b) = (a, b);
    for _ in 0..40 {
        if T::abs(a - b) <= T::EPSILON * a {
            break;
        }
        let an = (a + b) / T::c(2.0);
        b = T::sqrt(a * b);
        a = an;
    }
    (a + b) / T::c(2.0)
}

/// Complete elliptic integral of the first kind K(m), parameter m = k^2
/// (Abramowitz and Stegun 17.6: K = pi / (2 AGM(1, sqrt(1 - m)))), 0 <= m < 1.
/// Returns NaN outside that range.
pub fn ellip_k<T: Real>(m: T) -> T {
    if !(m >= T::zero() && m < T::one()) {
        return T::c(f64::NAN);
    }
    T::PI / (T::c(2.0) * agm(T::one(), T::sqrt(T::one() - m)))
}

/// K(k)/K(k') from the modulus k and its complement k' = sqrt(1 - k^2)
/// (both given, so that neither is lost to rounding near 0 or 1).
pub fn k_ratio<T: Real>(k: T, kp: T) -> T {
    agm(T::one(), k) / agm(T::one(), kp)
}

/// Jacobi sn and dn of u = K(k) eta (a fraction `eta` of the quarter period),
/// by the descending AGM (Abramowitz and Stegun 16.4).
fn sn_dn_at_fraction<T: Real>(eta: T, k: T, kp: T) -> (T, T) {
    let mut a = T::one();
    let mut b = kp;
    let mut ratios = [T::zero(); 24];
    let mut n = 0;
    while n < ratios.len() {
        let c = (a - b) / T::c(2.0);
        let an = (a + b) / T::c(2.0);
        b = T::sqrt(a * b);
        a = an;
        ratios[n] = c / a;
        n += 1;
        if T::abs(c) <= T::EPSILON * a {
            break;
        }
    }
    // phi_N = 2^N a_N u with u = K eta = pi eta / (2 a_N).
    let mut phi = T::PI * eta / T::c(2.0);
    for _ in 0..n {
        phi *= T::c(2.0);
    }
    for i in (0..n).rev() {
        phi = (phi + T::asin(ratios[i] * T::sin(phi))) / T::c(2.0);
    }
    // dn^2 = 1 - k^2 sn^2 = k'^2 + k^2 cn^2: no cancellation as k -> 1.
    let cn = T::cos(phi);
    (T::sin(phi), T::sqrt(kp * kp + k * k * cn * cn))
}

/// Interior-cell modulus of a finite layer, k_I = sn(K eta) k'/dn(K eta), for
/// the layer modulus (k, k').
///
/// When cn(K eta) becomes tiny (thin layers, k' -> 0) the backward AGM
/// recurrence loses cn to the asin near 1; there the first-order expansion in
/// m1 = k'^2 about m = 1 (Abramowitz and Stegun 16.15) is used, written in
/// logarithms so nothing overflows. Accurate for eta up to about 0.75 on very
/// thin layers (the expansion's next term grows as k'^(2 - 2 eta)).
fn interior_layer_modulus<T: Real>(eta: T, k: T, kp: T) -> T {
    let u = T::PI * eta / (T::c(2.0) * agm(T::one(), kp));
    let e2 = T::exp(T::c(-2.0) * u);
    // sech u = 2 e^-u / (1 + e^-2u).
    let sech = T::c(2.0) * T::exp(-u) / (T::one() + e2);
    // The recurrence loses about sqrt(eps) absolute in cn: switch while the
    // expansion is still accurate (sech 1e-4 in f64, 0.1 in f32).
    let switch = T::max(T::c(1e-4), T::c(300.0) * T::sqrt(T::EPSILON));
    if sech > switch || !(kp > T::zero()) {
        let (sn, dn) = sn_dn_at_fraction(eta, k, kp);
        return sn * kp / dn;
    }
    let tanh = (T::one() - e2) / (T::one() + e2);
    // m1 sinh u cosh u = exp(2u + 2 ln k') (1 - e^-4u) / 4.
    let m1_sc = T::exp(T::c(2.0) * (u + T::ln(kp))) * (T::one() - e2 * e2) / T::c(4.0);
    let m1u = kp * kp * u;
    let sn = tanh + (m1_sc - m1u) / T::c(4.0) * sech * sech;
    let dn_over_sech = T::one() + (m1_sc + m1u) / T::c(4.0) * tanh;
    // k'/sech u = exp(u + ln k') (1 + e^-2u) / 2.
    let kp_over_sech = T::exp(u + T::ln(kp)) * (T::one() + e2) / T::c(2.0);
    sn * kp_over_sech / dn_over_sech
}

/// theta2, theta3, theta4 (zero argument) of nome q, 0 <= q < 0.5.
fn thetas<T: Real>(q: T) -> (T, T, T) {
    let mut t2 = T::zero();
    let mut t3 = T::one();
    let mut t4 = T::one();
    let q14 = T::sqrt(T::sqrt(q));
    // q^((n+1/2)^2) = q^(1/4) q^(n(n+1)); q^(n^2).
    for n in 0..12 {
        let nf = T::c(n as f64);
        t2 += T::c(2.0) * q14 * T::powf(q, nf * (nf + T::one()));
        if n > 0 {
            let qn = T::powf(q, nf * nf);
            t3 += T::c(2.0) * qn;
            t4 += if n % 2 == 1 {
                -T::c(2.0) * qn
            } else {
                T::c(2.0) * qn
            };
        }
    }
    (t2, t3, t4)
}

/// Geometry of an interdigital electrode.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct IdeGeometry<T> {
    /// Finger width W, m.
    pub width_m: T,
    /// Gap between fingers G, m.
    pub gap_m: T,
    /// Finger (overlap) length L, m.
    pub length_m: T,
    /// Number of fingers N (>= 4).
    pub n_electrodes: u32,
}

impl<T: Real> IdeGeometry<T> {
    /// Metallisation ratio eta = W / (W + G).
    pub fn eta(&self) -> T {
        self.width_m / (self.width_m + self.gap_m)
    }
    /// Spatial wavelength lambda = 2 (W + G), m.
    pub fn wavelength_m(&self) -> T {
        T::c(2.0) * (self.width_m + self.gap_m)
    }

    /// (C_I, C_E) per unit relative permittivity of one semi-infinite half-space, F.
    pub fn unit_cells_semi_infinite(&self) -> (T, T) {
        let eta = self.eta();
        let ang = T::PI * eta / T::c(2.0);
        let (ki, kip) = (T::sin(ang), T::cos(ang));
        let ke = T::c(2.0) * T::sqrt(eta) / (T::one() + eta);
        let kep = (T::one() - eta) / (T::one() + eta);
        let s = eps0::<T>() * self.length_m;
        (s * k_ratio(ki, kip), s * k_ratio(ke, kep))
    }

    /// (C_I, C_E) per unit relative permittivity of a layer of thickness `h_m`
    /// bounded beyond by a field-line (magnetic) wall, F. Tends to
    /// [`IdeGeometry::unit_cells_semi_infinite`] as h grows.
    pub fn unit_cells_layer(&self, h_m: T) -> (T, T) {
        let eta = self.eta();
        let r = h_m / self.wavelength_m();
        if !(r > T::zero()) {
            return (T::zero(), T::zero());
        }
        // Below 0.004 lambda (f64) or 0.012 lambda (f32) the moduli underflow;
        // a layer that thin has a capacitance proportional to its thickness
        // (to 1 % at 0.004, 2 % at 0.012), which is used there.
        let r_thin = if T::EPSILON > T::c(1e-10) {
            T::c(0.012)
        } else {
            T::c(0.004)
        };
        if r < r_thin {
            let (ci, ce) = self.unit_cells_layer(r_thin * self.wavelength_m());
            return (ci * r / r_thin, ce * r / r_thin);
        }
        // Interior: modulus of the layer, with the imaginary transformation
        // for thin layers (nome stays below e^-pi).
        let (k, kp) = if r >= T::c(0.25) {
            let (t2, t3, t4) = thetas(T::exp(T::c(-4.0) * T::PI * r));
            ((t2 / t3) * (t2 / t3), (t4 / t3) * (t4 / t3))
        } else {
            let (t2, t3, t4) = thetas(T::exp(-T::PI / (T::c(4.0) * r)));
            ((t4 / t3) * (t4 / t3), (t2 / t3) * (t2 / t3))
        };
        let ki = interior_layer_modulus(eta, k, kp);
        let kip = T::sqrt(T::max(T::one() - ki * ki, T::zero()));
        // Exterior: sinh ratios in exponential form (no overflow for thin layers).
        let a3 = T::PI * (T::one() - eta) / (T::c(8.0) * r);
        let a4 = T::PI * (T::one() + eta) / (T::c(8.0) * r);
        let sratio = T::exp(a3 - a4) * T::exp_m1(T::c(-2.0) * a3) / T::exp_m1(T::c(-2.0) * a4);
        let sech3 = T::c(2.0) * T::exp(-a3) / (T::one() + T::exp(T::c(-2.0) * a3));
        let ke = sech3 * T::sqrt(T::max(T::one() - sratio * sratio, T::zero()));
        let kep = T::sqrt(T::max(T::one() - ke * ke, T::zero()));
        let s = eps0::<T>() * self.length_m;
        (s * k_ratio(ki, kip), s * k_ratio(ke, kep))
    }

    /// Total capacitance from summed interior and exterior cell capacitances:
    /// (N-3) C_I/2 + 2 C_I C_E/(C_I + C_E).
    pub fn combine(&self, c_i: T, c_e: T) -> T {
        let n = T::c(self.n_electrodes as f64);
        (n - T::c(3.0)) * c_i / T::c(2.0) + T::c(2.0) * c_i * c_e / (c_i + c_e)
    }

    /// Capacitance, F, of the electrode on a semi-infinite substrate
    /// (`substrate_eps`) under `layers` (thickness m, permittivity; nearest the
    /// electrodes first, at most 4) and then a semi-infinite product.
    pub fn capacitance_f(&self, substrate_eps: T, layers: &[(T, T)], product_eps: T) -> T {
        let (ci_inf, ce_inf) = self.unit_cells_semi_infinite();
        let mut ci = (substrate_eps + product_eps) * ci_inf;
        let mut ce = (substrate_eps + product_eps) * ce_inf;
        let mut depth = T::zero();
        for (i, &(h, eps)) in layers.iter().take(4).enumerate() {
            depth += h;
            let next = layers.get(i + 1).map_or(product_eps, |l| l.1);
            let (cil, cel) = self.unit_cells_layer(depth);
            ci += (eps - next) * cil;
            ce += (eps - next) * cel;
        }
        self.combine(ci, ce)
    }

    /// Fraction of an interior cell's response (the periodic part of the
    /// electrode, independent of N) that comes from within `h_m` of the
    /// electrode plane (one half-space, unit permittivity). The two outer
    /// cells reach deeper: see [`IdeGeometry::depth_fraction_total`].
    pub fn depth_fraction(&self, h_m: T) -> T {
        self.unit_cells_layer(h_m).0 / self.unit_cells_semi_infinite().0
    }

    /// As [`IdeGeometry::depth_fraction`] for the whole electrode (interior and
    /// outer cells combined).
    pub fn depth_fraction_total(&self, h_m: T) -> T {
        let (ci, ce) = self.unit_cells_layer(h_m);
        let (ci0, ce0) = self.unit_cells_semi_infinite();
        self.combine(ci, ce) / self.combine(ci0, ce0)
    }

    /// Depth, m, within which `fraction` (0..1) of an interior cell's response
    /// arises (penetration depth; bisection on [`IdeGeometry::depth_fraction`]).
    pub fn penetration_depth_m(&self, fraction: T) -> T {
        let lam = self.wavelength_m();
        let (mut lo, mut hi) = (lam * T::c(1e-4), lam * T::c(4.0));
        for _ in 0..60 {
            let mid = (lo + hi) / T::c(2.0);
            if self.depth_fraction(mid) < fraction {
                lo = mid;
            } else {
                hi = mid;
            }
        }
        (lo + hi) / T::c(2.0)
    }

    /// The permittivity a sensor calibrated bare (on `substrate_eps`) reports
    /// when `layers` (thickness m, complex eps*; nearest the electrodes
    /// first, at most 4) lie between it and a product of eps* `product`:
    /// the eps that gives the bare electrode the same (complex) capacitance.
    /// Partial capacitances as in [`IdeGeometry::capacitance_f`], complex.
    pub fn apparent_permittivity(
        &self,
        substrate_eps: T,
        layers: &[(T, Cx<T>)],
        product: Cx<T>,
    ) -> Cx<T> {
        let (ci_inf, ce_inf) = self.unit_cells_semi_infinite();
        let sub = Cx::new(substrate_eps, T::zero());
        let mut ci = (sub + product) * ci_inf;
        let mut ce = (sub + product) * ce_inf;
        let mut depth = T::zero();
        for (i, &(h, eps)) in layers.iter().take(4).enumerate() {
            depth += h;
            let next = layers.get(i + 1).map_or(product, |l| l.1);
            let (cil, cel) = self.unit_cells_layer(depth);
            ci = ci + (eps - next) * cil;
            ce = ce + (eps - next) * cel;
        }
        let n = T::c(self.n_electrodes as f64);
        let total = ci * ((n - T::c(3.0)) / T::c(2.0)) + ci * ce * T::c(2.0) / (ci + ce);
        total / self.combine(ci_inf, ce_inf) - sub
    }

    /// Sensitivity to the product behind `layers` (window, build-up), relative
    /// to the bare electrode on the same substrate: (dC/d eps_product with the
    /// layers) / (dC/d eps_product without), at `product_eps`.
    pub fn product_sensitivity(&self, substrate_eps: T, layers: &[(T, T)], product_eps: T) -> T {
        let d = T::c(1e-3) * T::max(product_eps, T::one());
        let with = self.capacitance_f(substrate_eps, layers, product_eps + d)
            - self.capacitance_f(substrate_eps, layers, product_eps - d);
        let bare = self.capacitance_f(substrate_eps, &[], product_eps + d)
            - self.capacitance_f(substrate_eps, &[], product_eps - d);
        with / bare
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn elliptic_k_against_abramowitz_stegun() {
        // Abramowitz and Stegun table 17.1 (argument m = k^2), docs/REFERENCES.md 7,
        // to 1e-9 (f64).
        for &(m, k) in &[
            (0.1f64, 1.612441348720219f64),
            (0.5, 1.854074677301372),
            (0.9, 2.578092113348173),
            (0.99, 3.695637362989874),
        ] {
            assert!((ellip_k(m) - k).abs() < 1e-9, "m {m}: {}", ellip_k(m));
        }
        assert!((ellip_k(0.0f64) - core::f64::consts::FRAC_PI_2).abs() < 1e-15);
        assert!(ellip_k(1.0f64).is_nan());
        // K(k)/K(k') = 1 at k = sin(pi/4) (Igreja and Dias 2004, eta = 0.5).
        let s = core::f64::consts::FRAC_1_SQRT_2;
        assert!((k_ratio(s, s) - 1.0).abs() < 1e-15);
    }

    #[test]
    fn sn_dn_against_closed_forms() {
        // sn(u, 0) = sin u; at u = K, sn = 1 and dn = k' (A&S 16.5, 16.1).
        let (sn, dn) = sn_dn_at_fraction(0.3f64, 0.0, 1.0);
        assert!(
            (sn - (0.3 * core::f64::consts::FRAC_PI_2).sin()).abs() < 1e-12
                && (dn - 1.0).abs() < 1e-12
        );
        let k = 0.8f64;
        let kp = (1.0 - k * k).sqrt();
        let (sn, dn) = sn_dn_at_fraction(1.0, k, kp);
        assert!(
            (sn - 1.0).abs() < 1e-12 && (dn - kp).abs() < 1e-12,
            "{sn} {dn}"
        );
        // dn^2 + k^2 sn^2 = 1 at a generic point (A&S 16.9.1).
        let (sn, dn) = sn_dn_at_fraction(0.37, k, kp);
        assert!((dn * dn + k * k * sn * sn - 1.0).abs() < 1e-12);
        // sn(K/2) = 1/sqrt(1 + k') (A&S 16.5.2).
        let (sn, _) = sn_dn_at_fraction(0.5, k, kp);
        assert!((sn - 1.0 / (1.0 + kp).sqrt()).abs() < 1e-12, "{sn}");
    }

    #[test]
    fn igreja_dias_regression_values() {
        // docs/REFERENCES.md section 7 [calc]: an invented geometry, W = G =
        // 0.5 mm, L = 20 mm, N = 20, air both sides: C_I 0.3542 pF, C_E
        // 0.5537 pF, total 3.4424 pF; FR-4 (4.4) substrate under air 9.2946
        // pF. A regression test of this implementation; the outside check
        // is `interdigital_capacitance_agrees_with_scipy` in
        // tests/tests/outside.rs (the published formula with scipy's K(m)).
        let g = IdeGeometry {
            width_m: 0.5e-3f64,
            gap_m: 0.5e-3,
            length_m: 20e-3,
            n_electrodes: 20,
        };
        let (ci, ce) = g.unit_cells_semi_infinite();
        assert!(
            (2.0 * ci * 1e12 - 0.3542).abs() < 1e-4,
            "{}",
            2.0 * ci * 1e12
        );
        assert!(
            (2.0 * ce * 1e12 - 0.5537).abs() < 1e-4,
            "{}",
            2.0 * ce * 1e12
        );
        assert!((g.capacitance_f(1.0, &[], 1.0) * 1e12 - 3.4424).abs() < 1e-4);
        assert!((g.capacitance_f(4.4, &[], 1.0) * 1e12 - 9.2946).abs() < 1e-4);
    }

    #[test]
    fn finite_layer_limits_and_penetration_depth() {
        let g = IdeGeometry {
            width_m: 0.5e-3f64,
            gap_m: 0.5e-3,
            length_m: 20e-3,
            n_electrodes: 20,
        };
        let lam = g.wavelength_m();
        // Thick layer -> semi-infinite; both branches of the theta evaluation meet at r = 0.25.
        let (ci0, ce0) = g.unit_cells_semi_infinite();
        let (ci, _) = g.unit_cells_layer(3.9 * lam);
        let (_, ce) = g.unit_cells_layer(200.0 * lam);
        assert!(
            (ci / ci0 - 1.0).abs() < 1e-9 && (ce / ce0 - 1.0).abs() < 1e-5,
            "{ci} {ci0} {ce} {ce0}"
        );
        let a = g.depth_fraction(0.25 * lam * (1.0 - 1e-9));
        let b = g.depth_fraction(0.25 * lam * (1.0 + 1e-9));
        assert!((a - b).abs() < 1e-7, "{a} {b}");
        // Both evaluations of the interior modulus agree where they meet.
        for eta in [0.3f64, 0.5, 0.7] {
            for kp in [1e-6f64, 1e-7, 3e-8] {
                let k = (1.0 - kp * kp).sqrt();
                let (sn, dn) = sn_dn_at_fraction(eta, k, kp);
                let u = core::f64::consts::PI * eta / (2.0 * agm(1.0, kp));
                if 1.0 / u.cosh() > 1e-5 {
                    let a = sn * kp / dn;
                    let b = interior_layer_modulus(eta, k, kp);
                    assert!((a / b - 1.0).abs() < 1e-3, "eta {eta} kp {kp}: {a} {b}");
                }
            }
        }
        // Monotone in depth.
        let mut last = 0.0;
        for i in 1..400 {
            let f = g.depth_fraction_total(lam * i as f64 * 0.0025);
            assert!(f > last && f <= 1.0 + 1e-12, "{i}: {f}");
            last = f;
        }
        // docs/REFERENCES.md 7: about 97 % of the signal from within 0.32-0.33 lambda
        // (finite-layer formula; the lambda/3 rule of thumb).
        let d = g.penetration_depth_m(0.97) / lam;
        assert!((0.32..=0.33).contains(&d), "{d}");
        // The whole 20-finger electrode reaches deeper (outer cells).
        assert!(g.depth_fraction_total(d * lam) < 0.97);
        // f32 (device) path close to f64.
        let g32 = IdeGeometry {
            width_m: 0.5e-3f32,
            gap_m: 0.5e-3,
            length_m: 20e-3,
            n_electrodes: 20,
        };
        for r in [0.002f32, 0.01, 0.02, 0.05, 0.3, 1.0] {
            let a = g32.depth_fraction_total(r * 1e-3 * 2.0) as f64;
            let b = g.depth_fraction_total(r as f64 * 1e-3 * 2.0);
            let tol = if r < 0.012 { 0.03 * b } else { 1e-4 };
            assert!((a - b).abs() < tol, "{r}: {a} {b}");
        }
    }

    #[test]
    fn apparent_permittivity_through_build_up() {
        let g = IdeGeometry {
            width_m: 0.5e-3f64,
            gap_m: 0.5e-3,
            length_m: 20e-3,
            n_electrodes: 20,
        };
        let wet = Cx::new(25.0, -40.0);
        let dry = Cx::new(3.0, -0.05);
        // No layer, or a layer of the product itself: the product.
        assert!((g.apparent_permittivity(4.4, &[], wet) - wet).norm() < 1e-9);
        assert!((g.apparent_permittivity(4.4, &[(0.2e-3, wet)], wet) - wet).norm() < 1e-9);
        // Thick build-up: the build-up's own permittivity (to 1 % at 4 lambda).
        let thick = g.apparent_permittivity(4.4, &[(8e-3, dry)], wet);
        assert!((thick - dry).norm() < 0.01 * dry.norm() + 0.05, "{thick}");
        // Real parts agree with the real capacitance formula.
        let a = g.apparent_permittivity(4.4, &[(0.3e-3, Cx::new(3.0, 0.0))], Cx::new(25.0, 0.0));
        let c = g.capacitance_f(4.4, &[(0.3e-3, 3.0)], 25.0)
            / g.combine(
                g.unit_cells_semi_infinite().0,
                g.unit_cells_semi_infinite().1,
            )
            - 4.4;
        assert!((a.re - c).abs() < 1e-9 && a.im.abs() < 1e-12);
        // Thin build-up lowers both parts of a wet product's reading, monotonically.
        let mut last = wet;
        for h_mm in [0.1, 0.3, 1.0] {
            let e = g.apparent_permittivity(4.4, &[(h_mm * 1e-3, dry)], wet);
            assert!(e.re < last.re && -e.im < -last.im, "{h_mm}: {e}");
            last = e;
        }
    }

    #[test]
    fn window_and_build_up_cost() {
        let g = IdeGeometry {
            width_m: 0.5e-3f64,
            gap_m: 0.5e-3,
            length_m: 20e-3,
            n_electrodes: 20,
        };
        // A layer of the product's own permittivity changes nothing.
        let c0 = g.capacitance_f(4.4, &[], 6.0);
        let c1 = g.capacitance_f(4.4, &[(0.3e-3, 6.0)], 6.0);
        assert!((c0 - c1).abs() < 1e-9 * c0);
        // A 1 mm PTFE-like window (eps 2.1) costs sensitivity; thicker costs more.
        let s1 = g.product_sensitivity(4.4, &[(1e-3, 2.1)], 6.0);
        let s2 = g.product_sensitivity(4.4, &[(2e-3, 2.1)], 6.0);
        assert!(s1 < 1.0 && s2 < s1 && s2 > 0.0, "{s1} {s2}");
        // A layer of thickness h leaves the product the response from beyond h:
        // for unit permittivity everywhere that is 1 - depth_fraction(h) (exact
        // for one cell type; the interior/exterior combination moves it slightly).
        for h in [0.1e-3, 0.3e-3, 1e-3] {
            let s = g.product_sensitivity(1.0, &[(h, 1.0)], 1.0);
            let beyond = 1.0 - g.depth_fraction_total(h);
            assert!((s - beyond).abs() < 0.02, "{h}: {s} vs {beyond}");
        }
    }
}
