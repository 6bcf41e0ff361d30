//! Dielectric mixing models and the Topp equation.
//!
//! - Power-law family eps^a = sum v_i eps_i^a (volume fractions summing to 1):
//!   a = 1/2 CRIM (Birchak et al., Proc. IEEE 62(1):93-98, 1974), a = 1/3
//!   Looyenga (Physica 31:401, 1965), a -> 0 Lichtenecker's logarithmic rule
//!   (ln eps = sum v_i ln eps_i), a = 1 linear. Any `a` in (0, 1] is the
//!   Lichtenecker-Rother form.
//! - Maxwell Garnett (Phil. Trans. R. Soc. A 203:385, 1904): spheres in a host.
//! - Topp, Davis and Annan, Water Resour. Res. 16(3):574-582 (1980), and its
//!   numerical inverse (not the paper's separate back-regression, which does
//!   not close with the forward equation: docs/REFERENCES.md 4).
//! - Roth et al. (1990) composite model: the power law with a = 0.5 over
//!   solid, water and air with porosity n.
//! - [`ProductMixture`]: solid + water + air from the product's wet bulk
//!   density, particle density and dry-matter permittivity, forward and
//!   inverse in closed form (the fractions are linear in the moisture).

use crate::moisture;
use crate::real::{Cx, Real};

/// The generalised power `g_a(x) = (x^a - 1)/a`, with `g_0(x) = ln x`.
///
/// The power-law rule is linear in it: g_a(eps) = sum v_i g_a(eps_i) when
/// the fractions sum to 1.
#[inline]
pub fn g_pow<T: Real>(a: T, x: T) -> T {
    if T::abs(a) < T::c(1e-6) {
        T::ln(x)
    } else {
        (T::powf(x, a) - T::one()) / a
    }
}

/// Inverse of [`g_pow`]: `x = (1 + a y)^(1/a)`, or `exp(y)` for `a = 0`.
#[inline]
pub fn g_pow_inv<T: Real>(a: T, y: T) -> T {
    if T::abs(a) < T::c(1e-6) {
        T::exp(y)
    } else {
        T::powf(T::one() + a * y, T::one() / a)
    }
}

/// Power-law mixture of `(volume_fraction, permittivity)` phases with
/// exponent `a` (0 means logarithmic). Fractions should sum to 1.
pub fn power_law<T: Real>(a: T, phases: &[(T, T)]) -> T {
    let log_rule = T::abs(a) < T::c(1e-6);
    let mut s = T::zero();
    for &(v, e) in phases {
        s += v * if log_rule { T::ln(e) } else { T::powf(e, a) };
    }
    if log_rule {
        T::exp(s)
    } else {
        T::powf(s, T::one() / a)
    }
}

/// CRIM (a = 1/2).
pub fn crim<T: Real>(phases: &[(T, T)]) -> T {
    power_law(T::c(0.5), phases)
}

/// Looyenga (a = 1/3).
pub fn looyenga<T: Real>(phases: &[(T, T)]) -> T {
    power_law(T::c(1.0 / 3.0), phases)
}

/// Lichtenecker logarithmic rule (a -> 0).
pub fn lichtenecker<T: Real>(phases: &[(T, T)]) -> T {
    power_law(T::zero(), phases)
}

/// Maxwell Garnett: spherical inclusions (`eps_i`, volume fraction `v`) in a
/// host `eps_h`; complex values allowed (e.g. conducting inclusions).
pub fn maxwell_garnett<T: Real>(eps_h: Cx<T>, eps_i: Cx<T>, v: T) -> Cx<T> {
    let three = Cx::new(T::c(3.0), T::zero());
    let two = Cx::new(T::c(2.0), T::zero());
    let vv = Cx::new(v, T::zero());
    let d = eps_i - eps_h;
    eps_h + three * vv * eps_h * d / (eps_i + two * eps_h - vv * d)
}

/// Topp et al. (1980): volumetric water content from apparent permittivity Ka:
/// theta = -5.3e-2 + 2.92e-2 Ka - 5.5e-4 Ka^2 + 4.3e-6 Ka^3.
pub fn topp<T: Real>(ka: T) -> T {
    T::c(-5.3e-2) + ka * (T::c(2.92e-2) + ka * (T::c(-5.5e-4) + ka * T::c(4.3e-6)))
}

/// Numerical inverse of [`topp`] (the cubic is increasing for all Ka):
/// Ka from theta, searched in [1, 100]. `None` when theta is outside the
/// range the cubic reaches there.
pub fn topp_inverse<T: Real>(theta: T) -> Option<T> {
    let (mut lo, mut hi) = (T::one(), T::c(100.0));
    if !(theta >= topp(lo) && theta <= topp(hi)) {
        return None;
    }
    // Bisection: 60 halvings reach f64 resolution on [1, 100].
    for _ in 0..60 {
        let mid = (lo + hi) / T::c(2.0);
        if topp(mid) < theta {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    Some((lo + hi) / T::c(2.0))
}

/// Roth et al. (1990) composite model (power law, a = 0.5) for porosity `n`,
/// solid `eps_s`, water `eps_w`, air 1: eps from theta.
pub fn roth<T: Real>(porosity: T, eps_s: T, eps_w: T, theta: T) -> T {
    crim(&[
        (T::one() - porosity, eps_s),
        (theta, eps_w),
        (porosity - theta, T::one()),
    ])
}

/// Inverse of [`roth`]: theta from eps.
pub fn roth_inverse<T: Real>(porosity: T, eps_s: T, eps_w: T, eps: T) -> T {
    let h = T::c(0.5);
    (T::powf(eps, h) - (T::one() - porosity) * T::powf(eps_s, h) - porosity)
        / (T::powf(eps_w, h) - T::one())
}

/// A moist granular product as solid + water + air (power-law mixing).
///
/// With wet bulk density rho_b, particle density rho_p and wet-basis
/// moisture fraction m: water fraction theta = m rho_b / rho_w, solid
/// fraction v_s = (1 - m) rho_b / rho_p, air the rest. Both fractions are
/// linear in m, so g_a(eps) = v_s g_a(eps_s) + theta g_a(eps_w) inverts in
/// closed form.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ProductMixture<T> {
    /// Mixing exponent a (0.5 CRIM, 1/3 Looyenga, 0 logarithmic).
    pub exponent: T,
    /// Permittivity of the dry matter itself (not of the dry bulk).
    pub eps_dry: T,
    /// Particle (true) density of the dry matter, kg/m^3.
    pub particle_density_kg_m3: T,
    /// Wet bulk density as the product flows past the sensor, kg/m^3.
    pub bulk_density_kg_m3: T,
}

impl<T: Real> ProductMixture<T> {
    /// Mixture permittivity at wet-basis moisture `m_wb_pct` with water of
    /// permittivity `eps_water`.
    pub fn permittivity(&self, m_wb_pct: T, eps_water: T) -> T {
        let theta = moisture::volumetric_from_wet(m_wb_pct, self.bulk_density_kg_m3);
        let vs = moisture::solid_fraction_from_wet(
            m_wb_pct,
            self.bulk_density_kg_m3,
            self.particle_density_kg_m3,
        );
        let a = self.exponent;
        g_pow_inv(a, vs * g_pow(a, self.eps_dry) + theta * g_pow(a, eps_water))
    }

    /// Wet-basis moisture, %, whose mixture permittivity is `eps` (inverse of
    /// [`ProductMixture::permittivity`]). Not clamped: a value below 0 or
    /// above 100 says the inputs are outside the model.
    pub fn moisture_wb_pct(&self, eps: T, eps_water: T) -> T {
        let a = self.exponent;
        let gs = self.solid_coeff() * g_pow(a, self.eps_dry);
        let gw = self.water_coeff() * g_pow(a, eps_water);
        T::c(100.0) * (g_pow(a, eps) - gs) / (gw - gs)
    }

    /// d moisture_wb_pct / d eps at `eps` (for uncertainty propagation).
    pub fn d_moisture_d_eps(&self, eps: T, eps_water: T) -> T {
        let a = self.exponent;
        let gs = self.solid_coeff() * g_pow(a, self.eps_dry);
        let gw = self.water_coeff() * g_pow(a, eps_water);
        // d g_a(x)/dx = x^(a-1).
        T::c(100.0) * T::powf(eps, a - T::one()) / (gw - gs)
    }

    fn solid_coeff(&self) -> T {
        moisture::solid_fraction_from_wet(
            T::zero(),
            self.bulk_density_kg_m3,
            self.particle_density_kg_m3,
        )
    }

    fn water_coeff(&self) -> T {
        moisture::volumetric_from_wet(T::c(100.0), self.bulk_density_kg_m3)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn three(theta: f64) -> [(f64, f64); 3] {
        [(0.6, 4.7), (theta, 80.0), (0.4 - theta, 1.0)]
    }

    #[test]
    fn three_phase_table() {
        // docs/REFERENCES.md 4 [calc]: solid 0.6 (4.7), water theta (80), air 0.4 - theta;
        // power-law family after Birchak et al. 1974 (CRIM) and Looyenga 1965.
        let table = [
            (0.1, 11.1200, 6.2260, 5.2311, 3.9225),
            (0.2, 19.0200, 10.8216, 8.8289, 6.0796),
            (0.3, 26.9200, 16.6795, 13.7843, 9.4229),
        ];
        for &(t, lin, c, l, lg) in &table {
            let p = three(t);
            assert!((power_law(1.0, &p) - lin).abs() < 1e-4, "linear {t}");
            assert!((crim(&p) - c).abs() < 1e-4, "crim {t}: {}", crim(&p));
            assert!(
                (looyenga(&p) - l).abs() < 1e-4,
                "looyenga {t}: {}",
                looyenga(&p)
            );
            assert!(
                (lichtenecker(&p) - lg).abs() < 1e-4,
                "log {t}: {}",
                lichtenecker(&p)
            );
            // Invariant: linear >= CRIM >= Looyenga >= log.
            assert!(
                lin >= crim(&p) && crim(&p) >= looyenga(&p) && looyenga(&p) >= lichtenecker(&p)
            );
        }
        // One phase returns itself.
        for a in [0.0, 1.0 / 3.0, 0.5, 1.0] {
            assert!((power_law::<f64>(a, &[(1.0, 7.5)]) - 7.5).abs() < 1e-12);
        }
    }

    #[test]
    fn maxwell_garnett_limits() {
        // Maxwell Garnett (1904): v = 0 gives the host, v = 1 the inclusion; dilute
        // limit 1 + 3 v (e - 1)/(e + 2) for spheres in vacuum (Clausius-Mossotti).
        let h = Cx::new(2.0f64, 0.0);
        let i = Cx::new(80.0f64, -5.0);
        assert!((maxwell_garnett(h, i, 0.0) - h).norm() < 1e-12);
        assert!((maxwell_garnett(h, i, 1.0) - i).norm() < 1e-12);
        let e = 5.0f64;
        let v = 1e-6;
        let mg = maxwell_garnett(Cx::new(1.0, 0.0), Cx::new(e, 0.0), v);
        assert!((mg.re - (1.0 + 3.0 * v * (e - 1.0) / (e + 2.0))).abs() < 1e-10);
    }

    #[test]
    fn topp_values_and_numerical_inverse() {
        // Topp, Davis and Annan (1980), docs/REFERENCES.md 4 [calc].
        for &(ka, th) in &[
            (5.0f64, 0.07979f64),
            (10.0, 0.18830),
            (20.0, 0.34540),
            (30.0, 0.44410),
        ] {
            assert!((topp(ka) - th).abs() < 1e-5, "{ka}: {}", topp(ka));
            let back = topp_inverse(th).unwrap();
            assert!((topp(back) - th).abs() < 1e-12);
            assert!((back - ka).abs() < 2e-3, "{ka}: {back}");
        }
        // Round trip on a fine grid, and out-of-range refused.
        for i in 2..80 {
            let ka = i as f64;
            assert!((topp_inverse(topp(ka)).unwrap() - ka).abs() < 1e-9);
        }
        assert!(topp_inverse(-0.5f64).is_none());
        assert!(topp_inverse(5.0f64).is_none());
    }

    #[test]
    fn roth_composite_and_back() {
        // docs/REFERENCES.md 4 [calc]: Roth et al. 1990, n 0.4, eps_s 4.7, eps_w 80,
        // theta 0.25 -> 13.59277.
        let e = roth(0.4f64, 4.7, 80.0, 0.25);
        assert!((e - 13.59277).abs() < 1e-5, "{e}");
        assert!((roth_inverse(0.4, 4.7, 80.0, e) - 0.25).abs() < 1e-12);
    }

    #[test]
    fn product_mixture_round_trip() {
        for a in [0.0, 1.0 / 3.0, 0.5, 1.0] {
            let m = ProductMixture {
                exponent: a,
                eps_dry: 3.2f64,
                particle_density_kg_m3: 1400.0,
                bulk_density_kg_m3: 760.0,
            };
            for mwb in [0.0, 8.0, 15.0, 30.0] {
                let e = m.permittivity(mwb, 78.3);
                assert!((m.moisture_wb_pct(e, 78.3) - mwb).abs() < 1e-9);
                let h = 1e-6;
                let d =
                    (m.moisture_wb_pct(e + h, 78.3) - m.moisture_wb_pct(e - h, 78.3)) / (2.0 * h);
                assert!((d - m.d_moisture_d_eps(e, 78.3)).abs() < 1e-5 * d.abs());
            }
            // Same as the explicit three-phase power law.
            let theta = moisture::volumetric_from_wet(15.0, 760.0);
            let vs = moisture::solid_fraction_from_wet(15.0, 760.0, 1400.0);
            let p = [(vs, 3.2), (theta, 78.3), (1.0 - vs - theta, 1.0)];
            assert!((m.permittivity(15.0, 78.3) - power_law(a, &p)).abs() < 1e-9);
        }
    }
}
