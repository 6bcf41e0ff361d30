//! A synthetic moist granular product from published physics: the one
//! forward model behind the firmware's simulated front end, the host's
//! tests and the demo. Nobody writes a second copy.
//!
//! Given wet-basis moisture M, temperature t and the salt content of the
//! water (as its conductivity at 25 C, sigma_w25):
//!
//! 1. Water fraction theta = (M/100) rho_b / rho_w; solid fraction
//!    v_s = (1 - M/100) rho_b / rho_p; air the rest ([`crate::moisture`]).
//! 2. eps_hf = power-law mixture (CRIM by default, Birchak et al. 1974) of
//!    the dry matter, water at t (static permittivity, Malmberg and Maryott
//!    1956; water's own relaxation near 19 GHz is far above the band) and air
//!    ([`ProductMixture`]).
//! 3. Water conductivity sigma_w = sigma_w25 (1 + 0.0192 (t - 25)), the
//!    linear compensation that reproduces the KCl standards of Wu, Koch and
//!    Pratt (1991) to about 0.5 % over 15-35 C (docs/REFERENCES.md 3). *Assumption:*
//!    the product's salts follow KCl's temperature coefficient.
//! 4. Bulk conductivity sigma = sigma_w theta^m + sigma_dry (the form of
//!    Archie's law, Archie 1942). *Assumptions:* m = 1.5, sigma_dry = 1e-6 S/m.
//! 5. Interfacial (Maxwell-Wagner) relaxation: for conducting inclusions
//!    Wagner (1914) gives tau = eps0 (2 eps_host + eps_incl) / sigma_incl, so
//!    f_r grows in proportion to conductivity. Here f_r = sigma / (2 pi eps0
//!    eps_mw) with the bulk sigma. *Assumption:* eps_mw = 3 lumps the
//!    geometry (it stands for theta^m (2 eps_host + eps_w)). Its strength
//!    d_eps = k_d theta sigma_w / (sigma_w + sigma_half) grows with water and
//!    salt and saturates. *Assumptions:* k_d = 200, sigma_half = 0.05 S/m,
//!    Cole-Cole alpha = 0.2.
//! 6. eps*(f) = eps_hf + d_eps / (1 + (j f/f_r)^(1-alpha)) - j sigma/(2 pi f eps0),
//!    evaluated by [`product_permittivity`] (the inversion's own model).
//!
//! The consequence the demo needs: a single-frequency eps' rises with salt
//! (through d_eps and f_r) and falls with temperature (through water's
//! permittivity), while the relaxation model, which separates eps_hf from
//! the interfacial term and corrects water's permittivity for temperature,
//! can recover the moisture. The relaxation-frequency law of this product is
//! exactly of the inversion's form, with exponent 1 ([`SynthProduct::law`]).

use crate::dielectric::eps0;
use crate::invert::{product_permittivity, MaterialParams, RelaxationLaw};
use crate::mixing::ProductMixture;
use crate::moisture;
use crate::real::{Cx, Real};
use crate::water::static_permittivity_mm;

/// A synthetic product (all constants documented in the module docs).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SynthProduct<T> {
    /// Dry matter, density and mixing rule.
    pub mixture: ProductMixture<T>,
    /// Archie-type exponent m of sigma = sigma_w theta^m.
    pub archie_exponent: T,
    /// Conductivity of the dry product, S/m.
    pub sigma_dry_s_m: T,
    /// Effective interfacial permittivity eps_mw of f_r = sigma/(2 pi eps0 eps_mw).
    pub interfacial_eps: T,
    /// k_d of d_eps = k_d theta sigma_w/(sigma_w + sigma_half).
    pub d_eps_per_theta: T,
    /// sigma_half of the d_eps saturation, S/m.
    pub sigma_half_s_m: T,
    /// Cole-Cole alpha of the interfacial relaxation.
    pub alpha: T,
}

/// The state of the product in front of the sensor.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SynthSample<T> {
    /// Moisture, % wet basis.
    pub moisture_pct: T,
    /// Temperature, C.
    pub temperature_c: T,
    /// Conductivity of the product's water at 25 C (salt content), S/m.
    pub water_sigma25_s_m: T,
}

impl<T: Real> SynthProduct<T> {
    /// A grain-like product of our own invention ("Harrowgate Mill wheat"):
    /// eps_dry 3.0, particle density 1400 kg/m^3, wet bulk density
    /// 760 kg/m^3, CRIM. Invented values for demos and tests.
    pub fn grain() -> Self {
        SynthProduct {
            mixture: ProductMixture {
                exponent: T::c(0.5),
                eps_dry: T::c(3.0),
                particle_density_kg_m3: T::c(1400.0),
                bulk_density_kg_m3: T::c(760.0),
            },
            archie_exponent: T::c(1.5),
            sigma_dry_s_m: T::c(1e-6),
            interfacial_eps: T::c(3.0),
            d_eps_per_theta: T::c(200.0),
            sigma_half_s_m: T::c(0.05),
            alpha: T::c(0.2),
        }
    }

    /// Material parameters (eps_hf, d_eps, sigma) of a sample.
    pub fn material(&self, s: &SynthSample<T>) -> MaterialParams<T> {
        let t = s.temperature_c;
        let rho_b = self.mixture.bulk_density_kg_m3;
        let theta = moisture::volumetric_from_wet(s.moisture_pct, rho_b);
        let eps_hf = self
            .mixture
            .permittivity(s.moisture_pct, static_permittivity_mm(t));
        let sigma_w = T::max(
            s.water_sigma25_s_m * (T::one() + T::c(0.0192) * (t - T::c(25.0))),
            T::zero(),
        );
        let sigma =
            sigma_w * T::powf(T::max(theta, T::zero()), self.archie_exponent) + self.sigma_dry_s_m;
        let d_eps = self.d_eps_per_theta * theta * sigma_w / (sigma_w + self.sigma_half_s_m);
        MaterialParams {
            eps_hf,
            d_eps,
            sigma_s_m: sigma,
        }
    }

    /// The product's relaxation law in the inversion's form (exponent 1,
    /// reference 1e-3 S/m at 25 C).
    pub fn law(&self) -> RelaxationLaw<T> {
        let sigma_ref = T::c(1e-3);
        RelaxationLaw {
            alpha: self.alpha,
            fr_ref_hz: sigma_ref / (T::c(2.0) * T::PI * eps0::<T>() * self.interfacial_eps),
            sigma_ref_s_m: sigma_ref,
            fr_exponent: T::one(),
            fr_temp_coeff_per_c: T::zero(),
            t_ref_c: T::c(25.0),
        }
    }

    /// Complex permittivity eps* = eps' - j eps'' of a sample at `freq_hz`.
    pub fn permittivity(&self, freq_hz: T, s: &SynthSample<T>) -> Cx<T> {
        product_permittivity(freq_hz, &self.material(s), &self.law(), s.temperature_c)
    }
}

/// A span of readings over the grain product's range, as the tests and
/// benchmarks use it: moisture 8, 12, 16, 20, 25 % wet basis x temperature
/// 5, 20, 40 C x water conductivity 0.02, 0.08, 0.3 S/m (45 samples).
pub fn span_grid<T: Real>() -> impl Iterator<Item = SynthSample<T>> {
    [8.0, 12.0, 16.0, 20.0, 25.0].into_iter().flat_map(|m| {
        [5.0, 20.0, 40.0].into_iter().flat_map(move |t| {
            [0.02, 0.08, 0.3].into_iter().map(move |salt| SynthSample {
                moisture_pct: T::c(m),
                temperature_c: T::c(t),
                water_sigma25_s_m: T::c(salt),
            })
        })
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::dielectric::loss_factor;

    fn sample(m: f64, t: f64, salt: f64) -> SynthSample<f64> {
        SynthSample {
            moisture_pct: m,
            temperature_c: t,
            water_sigma25_s_m: salt,
        }
    }

    #[test]
    fn relaxation_sits_in_band_and_grows_with_salt() {
        let p = SynthProduct::<f64>::grain();
        let law = p.law();
        let lo = p.material(&sample(15.0, 25.0, 0.02));
        let hi = p.material(&sample(15.0, 25.0, 0.2));
        let fr_lo = law.relaxation_frequency_hz(lo.sigma_s_m, 25.0);
        let fr_hi = law.relaxation_frequency_hz(hi.sigma_s_m, 25.0);
        assert!(
            fr_lo > 1e6 && fr_hi < 100e6 && fr_hi > fr_lo,
            "{fr_lo} {fr_hi}"
        );
        assert!(hi.d_eps > lo.d_eps && hi.sigma_s_m > lo.sigma_s_m);
        // Salt does not move eps_hf (the water fraction is the same).
        assert!((hi.eps_hf - lo.eps_hf).abs() < 1e-12);
        // f_r is Wagner's sigma / (2 pi eps0 eps_mw).
        let fr = lo.sigma_s_m / (2.0 * core::f64::consts::PI * crate::EPS0 * 3.0);
        assert!((fr - fr_lo).abs() < 1e-6 * fr);
    }

    #[test]
    fn single_frequency_eps_is_biased_by_salt_and_temperature() {
        let p = SynthProduct::<f64>::grain();
        let base = p.permittivity(20e6, &sample(15.0, 25.0, 0.05)).re;
        let salty = p.permittivity(20e6, &sample(15.0, 25.0, 0.3)).re;
        let warm = p.permittivity(20e6, &sample(15.0, 45.0, 0.05)).re;
        let wetter = p.permittivity(20e6, &sample(16.0, 25.0, 0.05)).re;
        let per_pct = wetter - base;
        // Salt and temperature each shift eps' by more than 0.3 % moisture worth.
        assert!(
            (salty - base).abs() > 0.3 * per_pct,
            "{base} {salty} {per_pct}"
        );
        assert!(
            (warm - base).abs() > 0.3 * per_pct,
            "{base} {warm} {per_pct}"
        );
        // The conduction loss dominates eps'' at 1 MHz and scales with sigma.
        let e = p.permittivity(1e6, &sample(15.0, 25.0, 0.05));
        let m = p.material(&sample(15.0, 25.0, 0.05));
        assert!(loss_factor(e) > crate::dielectric::conductivity_loss(1e6, m.sigma_s_m));
    }

    #[test]
    fn synth_eps_hf_follows_the_mixing_model() {
        let p = SynthProduct::<f64>::grain();
        for m in [5.0, 15.0, 25.0] {
            let mp = p.material(&sample(m, 20.0, 0.05));
            let back = p
                .mixture
                .moisture_wb_pct(mp.eps_hf, static_permittivity_mm(20.0));
            assert!((back - m).abs() < 1e-9);
        }
    }
}
