//! Relaxation models, conduction loss, loss tangent and dielectric heating.
//!
//! Sign convention (docs/DESIGN.md): eps* = eps' - j eps'', eps'' >= 0 for a lossy
//! material. A returned [`Cx`] holds `re = eps'` and `im = -eps''`; use
//! [`loss_factor`] to read eps'' without a sign slip.
//!
//! Frequencies are in Hz, times in seconds, conductivity in S/m.

use crate::real::{j_pow, norm_sqr, Cx, Real};

/// Vacuum permittivity in the scalar type `T`, F/m (CODATA 2018).
#[inline]
pub fn eps0<T: Real>() -> T {
    T::c(crate::EPS0)
}

/// Angular frequency 2 pi f, rad/s.
#[inline]
pub fn omega<T: Real>(freq_hz: T) -> T {
    T::c(2.0) * T::PI * freq_hz
}

/// Builds eps* from eps' and eps'' (eps'' >= 0 for a lossy material).
#[inline]
pub fn from_parts<T: Real>(eps_re: T, eps_loss: T) -> Cx<T> {
    Cx::new(eps_re, -eps_loss)
}

/// The loss factor eps'' of eps* (positive for a lossy material).
#[inline]
pub fn loss_factor<T: Real>(eps: Cx<T>) -> T {
    -eps.im
}

/// Debye relaxation: eps_inf + d_eps / (1 + j omega tau).
pub fn debye<T: Real>(freq_hz: T, eps_inf: T, d_eps: T, tau_s: T) -> Cx<T> {
    let den = Cx::new(T::one(), omega(freq_hz) * tau_s);
    Cx::new(eps_inf, T::zero()) + Cx::new(d_eps, T::zero()) / den
}

/// Cole-Cole relaxation in the frequency form of docs/DESIGN.md:
/// eps_inf + d_eps / (1 + (j f / f_r)^(1 - alpha)), `0 <= alpha < 1`.
///
/// `alpha = 0` is Debye with tau = 1 / (2 pi f_r).
pub fn cole_cole<T: Real>(freq_hz: T, eps_inf: T, d_eps: T, f_r_hz: T, alpha: T) -> Cx<T> {
    let u = j_pow(freq_hz / f_r_hz, T::one() - alpha);
    Cx::new(eps_inf, T::zero()) + Cx::new(d_eps, T::zero()) / (Cx::new(T::one(), T::zero()) + u)
}

/// Havriliak-Negami relaxation:
/// eps_inf + d_eps / (1 + (j f / f_r)^(1 - alpha))^beta, `0 < beta <= 1`.
///
/// `beta = 1` is Cole-Cole; `alpha = 0, beta < 1` is Cole-Davidson.
pub fn havriliak_negami<T: Real>(
    freq_hz: T,
    eps_inf: T,
    d_eps: T,
    f_r_hz: T,
    alpha: T,
    beta: T,
) -> Cx<T> {
    let z = Cx::new(T::one(), T::zero()) + j_pow(freq_hz / f_r_hz, T::one() - alpha);
    // z^beta in polar form with explicit libm functions.
    let r = T::powf(norm_sqr(z), beta / T::c(2.0));
    let phi = beta * T::atan2(z.im, z.re);
    let zb = Cx::new(r * T::cos(phi), r * T::sin(phi));
    Cx::new(eps_inf, T::zero()) + Cx::new(d_eps, T::zero()) / zb
}

/// Loss factor of a DC conductivity: eps'' = sigma / (2 pi f eps0).
#[inline]
pub fn conductivity_loss<T: Real>(freq_hz: T, sigma_s_m: T) -> T {
    sigma_s_m / (omega(freq_hz) * eps0::<T>())
}

/// The conductivity term as a complex permittivity: -j sigma / (2 pi f eps0).
#[inline]
pub fn conductivity_term<T: Real>(freq_hz: T, sigma_s_m: T) -> Cx<T> {
    Cx::new(T::zero(), -conductivity_loss(freq_hz, sigma_s_m))
}

/// Loss tangent tan(delta) = eps'' / eps'.
#[inline]
pub fn loss_tangent<T: Real>(eps: Cx<T>) -> T {
    loss_factor(eps) / eps.re
}

/// Dielectric heating power density P = 2 pi f eps0 eps'' E_rms^2, W/m^3.
///
/// `e_rms_v_m` is the RMS field strength inside the material, V/m.
#[inline]
pub fn heating_power_density<T: Real>(freq_hz: T, eps_loss: T, e_rms_v_m: T) -> T {
    omega(freq_hz) * eps0::<T>() * eps_loss * e_rms_v_m * e_rms_v_m
}

#[cfg(test)]
mod tests {
    use super::*;

    // Identities from docs/REFERENCES.md section 1 ("Relaxation-model identities" [calc]).
    #[test]
    fn cole_cole_alpha_zero_is_debye() {
        let f_r = 19.245e9f64;
        let tau = 1.0 / (2.0 * core::f64::consts::PI * f_r);
        for &f in &[1e6, 1e9, 19.245e9, 1e11] {
            let a = cole_cole(f, 5.0, 73.0, f_r, 0.0);
            let b = debye(f, 5.0, 73.0, tau);
            assert!((a - b).norm() < 1e-9, "f {f}: {a} vs {b}");
        }
    }

    #[test]
    fn real_part_at_relaxation_frequency_is_midpoint_for_any_alpha() {
        // docs/REFERENCES.md 1: at omega tau = 1 the real part is eps_inf + d_eps/2.
        for &alpha in &[0.0, 0.1, 0.3, 0.6] {
            let e = cole_cole(1e7f64, 3.0, 40.0, 1e7, alpha);
            assert!((e.re - 23.0).abs() < 1e-9, "alpha {alpha}: {}", e.re);
        }
        // Water at 25 C (Kaatze 1989 parameters): 41.735 at 19.245 GHz.
        let (eps_s, eps_inf, tau) = crate::water::kaatze_debye(25.0f64);
        let f_r = 1.0 / (2.0 * core::f64::consts::PI * tau);
        let e = debye(f_r, eps_inf, eps_s - eps_inf, tau);
        assert!((e.re - 41.735).abs() < 0.01, "{}", e.re);
        // Debye loss peak d_eps / 2 at omega tau = 1.
        assert!((loss_factor(e) - (eps_s - eps_inf) / 2.0).abs() < 1e-9);
    }

    #[test]
    fn havriliak_negami_beta_one_is_cole_cole() {
        for &f in &[1e5, 3e6, 1e8] {
            let a = havriliak_negami(f, 4.0, 20.0, 3e6, 0.2, 1.0f64);
            let b = cole_cole(f, 4.0, 20.0, 3e6, 0.2);
            assert!((a - b).norm() < 1e-9);
        }
        // Cole-Davidson (alpha 0, Davidson and Cole 1951): the loss peak sits at
        // omega tau = tan(pi / (2 (beta + 1))).
        let beta = 0.5f64;
        let tau = 1.0 / (2.0 * core::f64::consts::PI * 3e6);
        let w_peak = (core::f64::consts::PI / (2.0 * (beta + 1.0))).tan() / tau;
        let f_peak = w_peak / (2.0 * core::f64::consts::PI);
        let loss = |f: f64| loss_factor(havriliak_negami(f, 4.0, 20.0, 3e6, 0.0, beta));
        assert!(loss(f_peak) > loss(f_peak * 1.01) && loss(f_peak) > loss(f_peak / 1.01));
        // Cole-Davidson (alpha 0) is asymmetric: beta < 1 lowers the loss peak.
        let hn = havriliak_negami(3e6, 4.0, 20.0, 3e6, 0.0, 0.5f64);
        let cc = cole_cole(3e6, 4.0, 20.0, 3e6, 0.0);
        assert!(loss_factor(hn) < loss_factor(cc));
    }

    #[test]
    fn conductivity_loss_values() {
        // docs/REFERENCES.md 1: sigma 0.01 S/m -> 179.75 at 1 MHz. Its 10 MHz value
        // (18.013) is not a tenth of that; sigma/(2 pi f eps0) with CODATA eps0
        // gives 17.975, which is what is checked here.
        assert!((conductivity_loss(1e6f64, 0.01) - 179.75).abs() < 0.01);
        assert!((conductivity_loss(10e6f64, 0.01) - 17.975).abs() < 0.001);
        let z = conductivity_term(1e6f64, 0.01);
        assert!(z.re == 0.0 && z.im < 0.0);
    }

    #[test]
    fn heating_of_water_at_2_45_ghz() {
        // docs/REFERENCES.md 10: water 25 C at 2.45 GHz and 1 kV/m: 1.253 W/cm^3 [calc],
        // with eps'' from the Kaatze 1989 Debye model.
        let e = crate::water::water_permittivity(2.45e9f64, 25.0);
        let p_w_cm3 = heating_power_density(2.45e9, loss_factor(e), 1000.0) * 1e-6;
        assert!((p_w_cm3 - 1.253).abs() < 0.005, "{p_w_cm3}");
        assert!((loss_tangent(e) - loss_factor(e) / e.re).abs() < 1e-15);
    }
}
