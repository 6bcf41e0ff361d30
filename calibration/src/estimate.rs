//! The device-side chain, shared by the firmware and `fringe cal predict`:
//! per-frequency permittivity (with its noise standard deviation) +
//! temperature + product calibration -> moisture, uncertainty, flags.
//!
//! - Single-frequency model: moisture from eps' at the model's frequency;
//!   u^2 = (d moisture/d eps' * sd)^2 + SEC^2.
//! - Relaxation model: [`invert`] -> (eps_hf, d_eps, sigma) with covariance
//!   C; u^2 = g^T C g + SEC^2 with g the moisture gradient
//!   ([`RelaxationModel::gradient`]); with the density input (layout 4)
//!   at the reading's bulk density, and without one at the calibration's
//!   reference density with the spread of the moisture over the calibrated
//!   densities added (`DENSITY_MISSING`).
//! - Multivariate model: moisture from the features of both channels;
//!   u^2 = sum_k (d moisture/d e_k sd_k)^2 + SEC^2 over eps' and eps'' of
//!   both frequencies ([`MultivariateModel::moisture_and_gradient`]).
//!
//! No calibration, non-finite permittivity (an uncalibrated cell reports
//! NaN) or a failed inversion give `moisture_pct: None` and say why in
//! [`Estimate::flags`] and [`Estimate::failure`]; a number is never invented.
//! A temperature, input or moisture outside the calibration's valid ranges
//! still gives the moisture, flagged.
//!
//! [`RelaxationModel::gradient`]: crate::product::RelaxationModel::gradient
//! [`MultivariateModel::moisture_and_gradient`]: crate::product::MultivariateModel::moisture_and_gradient

use crate::cell::{admittance_to_permittivity, CellConstants, CellError};
use crate::invert::{invert, Inversion, InvertError, InvertOptions, Observation};
use crate::product::{ProductCalibration, ProductModel};
use crate::real::{Cx, Real};
use bitflags::bitflags;

bitflags! {
    /// Quality flags of an estimate. The bit values equal those of
    /// `fringe_protocol::Flags`, so `Flags::from_bits_truncate(f.bits())` maps them.
    #[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
    pub struct EstimateFlags: u16 {
        /// Moisture or a model input outside the calibration's valid range.
        const OUT_OF_RANGE = 1 << 2;
        /// Temperature outside the calibrated range (or not finite).
        const TEMP_OUT_OF_RANGE = 1 << 3;
        /// The relaxation inversion failed (not converged, singular, bad input).
        const FIT_NOT_CONVERGED = 1 << 4;
        /// No product calibration, or the permittivity is not available.
        const NOT_CALIBRATED = 1 << 7;
        /// The calibration takes a bulk density input and none (or no
        /// usable one) came with the reading: the moisture assumes the
        /// calibration's reference density, with the uncertainty widened.
        const DENSITY_MISSING = 1 << 11;
    }
}

/// One frequency's permittivity and its noise.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Channel<T> {
    /// Excitation frequency, Hz.
    pub freq_hz: T,
    /// eps'.
    pub eps_re: T,
    /// eps'' (>= 0 for a lossy material).
    pub eps_loss: T,
    /// Standard deviation of the noise on eps' and on eps''.
    pub sd: T,
}

/// Input of [`estimate`]: both frequencies (lower first) and the temperature.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EstimateInput<T> {
    /// Channels, lower frequency first.
    pub channels: [Channel<T>; 2],
    /// Product temperature, C.
    pub temperature_c: T,
    /// Bulk density of the product at the sensor, kg/m^3, where the plant
    /// measures it (a weigh belt, a radiometric gauge); used only by a
    /// calibration with a density input.
    pub bulk_density_kg_m3: Option<T>,
}

/// Why an estimate carries no moisture.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum Failure {
    /// No product calibration.
    NotCalibrated,
    /// Permittivity, frequency or temperature not finite (e.g. uncalibrated cell).
    InvalidInput,
    /// The inversion failed.
    Inversion(InvertError),
    /// The model produced a non-finite moisture (inputs far outside the model).
    NonFinite,
}

impl core::fmt::Display for Failure {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        match self {
            Failure::NotCalibrated => f.write_str("no product calibration"),
            Failure::InvalidInput => {
                f.write_str("permittivity, frequency or temperature not finite")
            }
            Failure::Inversion(e) => write!(f, "{e}"),
            Failure::NonFinite => f.write_str("model gave a non-finite moisture"),
        }
    }
}

/// Result of [`estimate`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Estimate<T> {
    /// Moisture on the calibration's basis, %; `None` when there is none.
    pub moisture_pct: Option<T>,
    /// Standard uncertainty (1 sigma), % moisture; NaN without moisture.
    pub uncertainty_pct: T,
    /// Quality flags.
    pub flags: EstimateFlags,
    /// The inversion (relaxation model only).
    pub inversion: Option<Inversion<T>>,
    /// Why there is no moisture.
    pub failure: Option<Failure>,
}

impl<T: Real> Estimate<T> {
    fn none(flags: EstimateFlags, failure: Failure, inversion: Option<Inversion<T>>) -> Self {
        Estimate {
            moisture_pct: None,
            uncertainty_pct: T::c(f64::NAN),
            flags,
            inversion,
            failure: Some(failure),
        }
    }
}

/// Runs the chain for one reading (see the module docs). Never panics.
pub fn estimate<T: Real>(
    input: &EstimateInput<T>,
    cal: Option<&ProductCalibration<T>>,
) -> Estimate<T> {
    let Some(cal) = cal else {
        return Estimate::none(EstimateFlags::NOT_CALIBRATED, Failure::NotCalibrated, None);
    };
    let t = input.temperature_c;
    let mut flags = EstimateFlags::empty();
    if !t.is_finite() {
        return Estimate::none(
            EstimateFlags::TEMP_OUT_OF_RANGE,
            Failure::InvalidInput,
            None,
        );
    }
    if !cal.temperature_c.contains(t) {
        flags |= EstimateFlags::TEMP_OUT_OF_RANGE;
    }
    let ranges = cal.input_ranges();
    let (m, var_model, inversion) = match &cal.model {
        ProductModel::SingleFrequency(sf) => {
            let Some(ch) = input.channels.get(sf.freq_index) else {
                return Estimate::none(EstimateFlags::NOT_CALIBRATED, Failure::InvalidInput, None);
            };
            if !(ch.eps_re.is_finite() && ch.freq_hz.is_finite()) {
                return Estimate::none(EstimateFlags::NOT_CALIBRATED, Failure::InvalidInput, None);
            }
            if ranges.first().is_some_and(|r| !r.contains(ch.eps_re)) {
                flags |= EstimateFlags::OUT_OF_RANGE;
            }
            let d = sf.d_moisture_d_eps(ch.eps_re) * ch.sd;
            (sf.moisture_pct(ch.eps_re, t), d * d, None)
        }
        ProductModel::Relaxation(rm) => {
            for ch in input.channels.iter() {
                if !(ch.eps_re.is_finite() && ch.eps_loss.is_finite() && ch.freq_hz.is_finite()) {
                    return Estimate::none(
                        EstimateFlags::NOT_CALIBRATED,
                        Failure::InvalidInput,
                        None,
                    );
                }
            }
            let obs = input.channels.map(|c| Observation {
                freq_hz: c.freq_hz,
                eps: Cx::new(c.eps_re, -c.eps_loss),
                sd: c.sd,
            });
            let inv = match invert(&obs, &rm.law, t, &InvertOptions::default()) {
                Ok(inv) => inv,
                Err(e) => {
                    let f = match e {
                        InvertError::OutOfBounds(_) => EstimateFlags::OUT_OF_RANGE,
                        _ => EstimateFlags::FIT_NOT_CONVERGED,
                    };
                    return Estimate::none(flags | f, Failure::Inversion(e), None);
                }
            };
            let p = inv.params;
            // With the density input the mixing model takes the reading's
            // bulk density; without one, the calibration's reference
            // density, flagged, with the moisture's spread over the
            // calibrated densities in the uncertainty.
            let rho = input
                .bulk_density_kg_m3
                .filter(|r| r.is_finite() && *r > T::zero());
            let mut var_density = T::zero();
            let rm = match (rm.density_input, rho) {
                (true, Some(r)) => {
                    if ranges.get(4).is_some_and(|rg| !rg.contains(r)) {
                        flags |= EstimateFlags::OUT_OF_RANGE;
                    }
                    rm.at_density(r)
                }
                (true, None) => {
                    flags |= EstimateFlags::DENSITY_MISSING;
                    if let Some(rg) = ranges.get(4) {
                        let d = rm.moisture_sd_over_densities(&p, t, *rg);
                        if d.is_finite() {
                            var_density = d * d;
                        }
                    }
                    *rm
                }
                (false, _) => *rm,
            };
            let mix = rm.mixing_moisture_pct(p.eps_hf, t);
            for (r, x) in ranges.iter().zip([p.eps_hf, p.d_eps, p.sigma_s_m, mix]) {
                if !r.contains(x) {
                    flags |= EstimateFlags::OUT_OF_RANGE;
                }
            }
            // The static terms' moisture beyond its hold: the model holds
            // it and the reading lies outside the calibration.
            if rm.uses_static() && !rm.held_static_pct(&p, t).1 {
                flags |= EstimateFlags::OUT_OF_RANGE;
            }
            let g = rm.gradient(&p, t);
            let mut var = var_density;
            for i in 0..3 {
                for j in 0..3 {
                    var += g[i] * inv.covariance[i][j] * g[j];
                }
            }
            (rm.moisture_pct(&p, t), var, Some(inv))
        }
        ProductModel::Multivariate(mv) => {
            for ch in input.channels.iter() {
                if !(ch.eps_re.is_finite() && ch.eps_loss.is_finite() && ch.freq_hz.is_finite()) {
                    return Estimate::none(
                        EstimateFlags::NOT_CALIBRATED,
                        Failure::InvalidInput,
                        None,
                    );
                }
            }
            let [c0, c1] = input.channels;
            let e = [c0.eps_re, c0.eps_loss, c1.eps_re, c1.eps_loss];
            for (r, x) in ranges.iter().zip(e) {
                if !r.contains(x) {
                    flags |= EstimateFlags::OUT_OF_RANGE;
                }
            }
            let rho = input
                .bulk_density_kg_m3
                .filter(|r| r.is_finite() && *r > T::zero());
            let mut var = T::zero();
            if mv.uses_density() {
                let rho_range = ranges.get(4).copied();
                match rho {
                    Some(r) => {
                        if rho_range.is_some_and(|rg| !rg.contains(r)) {
                            flags |= EstimateFlags::OUT_OF_RANGE;
                        }
                    }
                    None => {
                        // The density is taken as the reference, anywhere in
                        // the calibrated range with equal chance: the
                        // standard deviation of a uniform distribution,
                        // width / sqrt(12) (GUM, JCGM 100:2008, 4.3.7; from memory).
                        flags |= EstimateFlags::DENSITY_MISSING;
                        let width = rho_range.map_or(T::zero(), |rg| rg.max - rg.min);
                        let d = mv.d_moisture_d_density(e) * width
                            / (mv.rho_ref_kg_m3 * T::sqrt(T::c(12.0)));
                        var += d * d;
                    }
                }
            }
            let (m, g) = mv.moisture_and_gradient(e, t, rho);
            for (k, gk) in g.iter().enumerate() {
                let d = *gk * input.channels[k / 2].sd;
                var += d * d;
            }
            if !var.is_finite() {
                return Estimate::none(
                    flags | EstimateFlags::OUT_OF_RANGE,
                    Failure::NonFinite,
                    None,
                );
            }
            (m, var, None)
        }
    };
    if !m.is_finite() {
        return Estimate::none(
            flags | EstimateFlags::OUT_OF_RANGE,
            Failure::NonFinite,
            inversion,
        );
    }
    if !cal.moisture_pct.contains(m) {
        flags |= EstimateFlags::OUT_OF_RANGE;
    }
    let u = T::sqrt(T::max(var_model, T::zero()) + cal.sec_pct * cal.sec_pct);
    Estimate {
        moisture_pct: Some(m),
        uncertainty_pct: u,
        flags,
        inversion,
        failure: None,
    }
}

/// Standard deviation of eps' (and eps'') from the standard deviation of the
/// admittance noise (same on G and B, S): sd / (w C0).
pub fn permittivity_sd<T: Real>(freq_hz: T, admittance_sd_s: T, cell: &CellConstants<T>) -> T {
    admittance_sd_s / (crate::dielectric::omega(freq_hz) * cell.cell_pf * T::c(1e-12))
}

/// The whole chain from admittances: cell -> inversion -> moisture.
///
/// `y_s[k]` is G + jB at `freqs_hz[k]`, `y_sd_s[k]` its noise standard deviation.
///
/// # Errors
/// A [`CellError`] when a cell constant or frequency is unusable (then there
/// is no permittivity to estimate from).
pub fn estimate_from_admittance<T: Real>(
    freqs_hz: [T; 2],
    y_s: [Cx<T>; 2],
    y_sd_s: [T; 2],
    cells: &[CellConstants<T>; 2],
    temperature_c: T,
    bulk_density_kg_m3: Option<T>,
    cal: Option<&ProductCalibration<T>>,
) -> Result<Estimate<T>, CellError> {
    let mut ch = [Channel {
        freq_hz: T::zero(),
        eps_re: T::zero(),
        eps_loss: T::zero(),
        sd: T::zero(),
    }; 2];
    for k in 0..2 {
        let e = admittance_to_permittivity(freqs_hz[k], y_s[k], &cells[k])?;
        ch[k] = Channel {
            freq_hz: freqs_hz[k],
            eps_re: e.re,
            eps_loss: -e.im,
            sd: permittivity_sd(freqs_hz[k], y_sd_s[k], &cells[k]),
        };
    }
    Ok(estimate(
        &EstimateInput {
            channels: ch,
            temperature_c,
            bulk_density_kg_m3,
        },
        cal,
    ))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cell::permittivity_to_admittance;
    use crate::dielectric::loss_factor;
    use crate::moisture::Basis;
    use crate::product::{ModelKind, Range, RelaxationModel, SingleFrequencyModel};
    use crate::synth::{SynthProduct, SynthSample};

    /// Relaxation calibration whose polynomial is the identity: the synthetic
    /// product's own mixture and law, so the chain must return the synthetic moisture.
    fn identity_cal<T: Real>() -> ProductCalibration<T> {
        let sp = SynthProduct::<f64>::grain();
        let m = ProductModel::Relaxation(RelaxationModel {
            law: sp.law(),
            mixture: sp.mixture,
            t_ref_c: 25.0,
            coeffs: [0.0, 1.0, 0.0, 0.0],
            c_t: 0.0,
            c_sigma: 0.0,
            c_static: [0.0; 2],
            static_hold: crate::product::no_static_hold(),
            sigma_hold: crate::product::no_sigma_hold(),
            density_input: false,
        });
        let (p, n) = m.to_params();
        let r = Range::new;
        ProductCalibration::from_parts(
            ModelKind::Relaxation,
            &p[..n],
            Basis::Wet,
            r(5.0, 30.0),
            r(0.0, 50.0),
            &[r(1.5, 40.0), r(0.0, 500.0), r(1e-6, 1.0), r(0.0, 40.0)],
            0.25,
        )
        .unwrap()
    }

    fn input<T: Real>(s: &SynthSample<f64>, sd: f64) -> EstimateInput<T> {
        let sp = SynthProduct::<f64>::grain();
        let ch = [1e6, 20e6].map(|f| {
            let e = sp.permittivity(f, s);
            Channel {
                freq_hz: T::c(f),
                eps_re: T::c(e.re),
                eps_loss: T::c(loss_factor(e)),
                sd: T::c(sd),
            }
        });
        EstimateInput {
            channels: ch,
            temperature_c: T::c(s.temperature_c),
            bulk_density_kg_m3: None,
        }
    }

    fn grid() -> impl Iterator<Item = SynthSample<f64>> {
        crate::synth::span_grid()
    }

    proptest::proptest! {
        #![proptest_config(fringe_testkit::proptest_config(256, 0xE57_1A7E))]

        // Any input, however wild, gives either no moisture (with a reason) or
        // a finite one, and never panics (docs/DESIGN.md: no panics on any input).
        #[test]
        fn estimate_never_panics_or_invents(
            e0 in proptest::num::f32::ANY, l0 in proptest::num::f32::ANY,
            e1 in proptest::num::f32::ANY, l1 in proptest::num::f32::ANY,
            sd in proptest::num::f32::ANY, t in proptest::num::f32::ANY,
        ) {
            let ch = |f: f32, e, l| Channel { freq_hz: f, eps_re: e, eps_loss: l, sd };
            let i = EstimateInput { channels: [ch(1e6, e0, l0), ch(20e6, e1, l1)], temperature_c: t, bulk_density_kg_m3: None };
            let e = estimate(&i, Some(&identity_cal::<f32>()));
            match e.moisture_pct {
                Some(m) => proptest::prop_assert!(m.is_finite() && e.failure.is_none()),
                None => proptest::prop_assert!(e.failure.is_some() && !e.flags.is_empty()),
            }
        }

        #[test]
        fn from_params_never_panics(v in proptest::collection::vec(proptest::num::f32::ANY, 0..30), relax: bool) {
            let kind = if relax { ModelKind::Relaxation } else { ModelKind::SingleFrequency };
            let _ = ProductModel::<f32>::from_params(kind, &v);
        }
    }

    /// A relaxation calibration with the density input (layout 4): the
    /// mixing model takes the reading's bulk density; a reading outside
    /// the calibrated densities is flagged out of range; a reading without
    /// one takes the calibration's reference density, is flagged
    /// `DENSITY_MISSING`, and its uncertainty gains the spread of the
    /// moisture over the calibrated densities, (m(max) - m(min)) /
    /// sqrt(12) (a uniform distribution: GUM, JCGM 100:2008, 4.3.7; from
    /// memory).
    #[test]
    fn the_relaxation_model_takes_the_readings_density() {
        let ProductModel::Relaxation(base) = identity_cal::<f64>().model else {
            panic!("kind")
        };
        // With the static terms and the conductivity term too, so that
        // every part of the moisture and its gradient is at the density.
        let rm = RelaxationModel {
            c_sigma: 0.3,
            c_static: [0.05, -0.001],
            static_hold: Range::new(0.0, 60.0),
            ..base
        };
        let rho0 = rm.mixture.bulk_density_kg_m3;
        let (lo, hi) = (0.9 * rho0 as f32, 1.1 * rho0 as f32);
        let r = Range::new;
        let cal_of = |m: RelaxationModel<f64>| {
            let (p, n) = ProductModel::Relaxation(m).to_params();
            let mut ins = vec![r(1.5, 40.0), r(0.0, 500.0), r(1e-6, 1.0), r(0.0, 40.0)];
            if m.density_input {
                ins.push(r(lo, hi));
            }
            ProductCalibration::<f64>::from_parts(
                ModelKind::Relaxation,
                &p[..n],
                Basis::Wet,
                r(5.0, 30.0),
                r(0.0, 50.0),
                &ins,
                0.25,
            )
            .unwrap()
        };
        let cal = cal_of(RelaxationModel {
            density_input: true,
            ..rm
        });
        let s = SynthSample {
            moisture_pct: 15.0,
            temperature_c: 20.0,
            water_sigma25_s_m: 0.05,
        };
        let at = |rho: Option<f64>| {
            let mut i = input::<f64>(&s, 0.01);
            i.bulk_density_kg_m3 = rho;
            estimate(&i, Some(&cal))
        };
        // At a density, as a calibration without the density input made at
        // that density: the same moisture and the same uncertainty.
        for rho in [rho0, 0.95 * rho0, 1.05 * rho0] {
            let e = at(Some(rho));
            let want = estimate(&input::<f64>(&s, 0.01), Some(&cal_of(rm.at_density(rho))));
            assert!((e.moisture_pct.unwrap() - want.moisture_pct.unwrap()).abs() < 1e-9);
            assert!((e.uncertainty_pct - want.uncertainty_pct).abs() < 1e-9);
            assert!(e.flags.is_empty(), "{:?}", e.flags);
        }
        let e0 = at(Some(rho0));
        assert!(at(Some(1.05 * rho0)).moisture_pct.unwrap() < e0.moisture_pct.unwrap());
        // Outside the calibrated densities: flagged.
        assert!(at(Some(1.2 * rho0))
            .flags
            .contains(EstimateFlags::OUT_OF_RANGE));
        // None given: the reference density, flagged, the uncertainty widened.
        let none = at(None);
        assert_eq!(none.moisture_pct, e0.moisture_pct);
        assert!(none.flags.contains(EstimateFlags::DENSITY_MISSING));
        let p0 = e0.inversion.unwrap().params;
        let spread0 = (rm
            .at_density(f64::from(hi))
            .moisture_pct(&p0, s.temperature_c)
            - rm.at_density(f64::from(lo))
                .moisture_pct(&p0, s.temperature_c))
            / 12f64.sqrt();
        assert!(spread0.abs() > 0.1, "{spread0}");
        let widened = (none.uncertainty_pct.powi(2) - e0.uncertainty_pct.powi(2)).sqrt();
        assert!(
            (widened - spread0.abs()).abs() < 1e-6,
            "{widened} vs {spread0}"
        );
    }

    #[test]
    fn uncalibrated_gives_no_moisture() {
        let s = SynthSample {
            moisture_pct: 15.0,
            temperature_c: 20.0,
            water_sigma25_s_m: 0.05,
        };
        let e = estimate::<f32>(&input(&s, 0.01), None);
        assert_eq!(e.moisture_pct, None);
        assert!(e.flags.contains(EstimateFlags::NOT_CALIBRATED));
        assert!(e.uncertainty_pct.is_nan());
        // An uncalibrated cell reports NaN permittivity (fringe_protocol::ChannelValue).
        let mut i = input::<f32>(&s, 0.01);
        i.channels[0].eps_re = f32::NAN;
        let e = estimate(&i, Some(&identity_cal()));
        assert_eq!(
            (e.moisture_pct, e.failure),
            (None, Some(Failure::InvalidInput))
        );
        assert!(e.flags.contains(EstimateFlags::NOT_CALIBRATED));
        // Zero noise sd is refused by the inversion, not turned into a number.
        let mut i = input::<f32>(&s, 0.01);
        i.channels[1].sd = 0.0;
        let e = estimate(&i, Some(&identity_cal()));
        assert_eq!(e.moisture_pct, None);
        assert!(e.flags.contains(EstimateFlags::FIT_NOT_CONVERGED));
    }

    /// The static terms add `q1 h + q2 h^2` with h the mixing-model
    /// moisture of eps_hf + d_eps; beyond its hold h stands at the hold's
    /// end and the reading is flagged out of range.
    #[test]
    fn static_terms_add_their_moisture_and_flag_a_reading_beyond_their_hold() {
        let plain = identity_cal::<f64>();
        let ranges = identity_cal::<f32>();
        let s = grid().nth(3).unwrap();
        let e = estimate(&input::<f64>(&s, 1e-3), Some(&plain));
        let (m0, inv) = (e.moisture_pct.unwrap(), e.inversion.unwrap());
        let ProductModel::Relaxation(rm) = plain.model else {
            panic!("kind")
        };
        let h = rm.static_moisture_pct(&inv.params, s.temperature_c);
        assert!(h.is_finite() && h > 0.0, "{h}");
        let with = |lo: f64, hi: f64| {
            let m = ProductModel::Relaxation(RelaxationModel {
                c_static: [0.1, 0.002],
                static_hold: Range::new(lo, hi),
                sigma_hold: crate::product::no_sigma_hold(),
                ..rm
            });
            let (p, n) = m.to_params();
            let cal = ProductCalibration::from_parts(
                ModelKind::Relaxation,
                &p[..n],
                Basis::Wet,
                ranges.moisture_pct,
                ranges.temperature_c,
                ranges.input_ranges(),
                0.25,
            )
            .unwrap();
            estimate(&input::<f64>(&s, 1e-3), Some(&cal))
        };
        let q = |x: f64| 0.1 * x + 0.002 * x * x;
        // Inside the hold: the terms at h, no flag.
        let e = with(h - 1.0, h + 1.0);
        assert!((e.moisture_pct.unwrap() - (m0 + q(h))).abs() < 1e-6);
        assert!(e.flags.is_empty(), "{:?}", e.flags);
        // Beyond it: at the hold's end, flagged.
        let e = with(h - 3.0, h - 2.0);
        assert!((e.moisture_pct.unwrap() - (m0 + q(h - 2.0))).abs() < 1e-6);
        assert!(
            e.flags.contains(EstimateFlags::OUT_OF_RANGE),
            "{:?}",
            e.flags
        );
    }

    #[test]
    fn relaxation_chain_recovers_synthetic_moisture_through_salt_and_temperature() {
        let cal = identity_cal::<f64>();
        for s in grid() {
            let e = estimate(&input::<f64>(&s, 1e-3), Some(&cal));
            let m = e
                .moisture_pct
                .unwrap_or_else(|| panic!("{s:?}: {:?}", e.failure));
            assert!((m - s.moisture_pct).abs() < 1e-3, "{s:?}: {m}");
            assert!(
                e.uncertainty_pct >= 0.25 && e.uncertainty_pct < 0.3,
                "{}",
                e.uncertainty_pct
            );
            assert!(e.flags.is_empty(), "{s:?}: {:?}", e.flags);
        }
    }

    #[test]
    fn f32_path_agrees_with_f64_within_0_01_pct() {
        // Issue 3: the firmware path (f32, libm) agrees with the host path (f64)
        // within 0.01 % moisture on the same inputs (f32-rounded inputs for both).
        let c32 = identity_cal::<f32>();
        let c64 = c32.cast::<f64>();
        let mut worst = 0.0f64;
        for s in grid() {
            let i32_ = input::<f32>(&s, 1e-3);
            let i64_ = EstimateInput {
                channels: i32_.channels.map(|c| Channel {
                    freq_hz: c.freq_hz as f64,
                    eps_re: c.eps_re as f64,
                    eps_loss: c.eps_loss as f64,
                    sd: c.sd as f64,
                }),
                temperature_c: i32_.temperature_c as f64,
                bulk_density_kg_m3: None,
            };
            let a = estimate(&i32_, Some(&c32));
            let a = a
                .moisture_pct
                .unwrap_or_else(|| panic!("{s:?} {:?}", a.failure)) as f64;
            let b = estimate(&i64_, Some(&c64)).moisture_pct.unwrap();
            worst = worst.max((a - b).abs());
        }
        assert!(
            worst < 0.01,
            "worst f32 - f64 difference {worst} % moisture"
        );
    }

    #[test]
    fn uncertainty_matches_scatter_of_noisy_estimates() {
        // The propagated uncertainty (without the SEC) against the scatter of
        // repeated noisy estimates of one reading: within 20 %. Seeded.
        use rand::SeedableRng;
        use rand_distr::{Distribution, Normal};
        let seed = 99_173u64;
        let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
        let mut cal = identity_cal::<f64>();
        cal.sec_pct = 0.0;
        for s in [
            SynthSample {
                moisture_pct: 12.0,
                temperature_c: 15.0,
                water_sigma25_s_m: 0.05,
            },
            SynthSample {
                moisture_pct: 22.0,
                temperature_c: 35.0,
                water_sigma25_s_m: 0.2,
            },
        ] {
            let sd = 0.01;
            let clean = input::<f64>(&s, sd);
            let noise = Normal::new(0.0, sd).unwrap();
            let (mut sum, mut sum2, mut u_mean) = (0.0, 0.0, 0.0);
            let n = 300;
            for _ in 0..n {
                let mut i = clean;
                for c in i.channels.iter_mut() {
                    c.eps_re += noise.sample(&mut rng);
                    c.eps_loss += noise.sample(&mut rng);
                }
                let e = estimate(&i, Some(&cal));
                let m = e
                    .moisture_pct
                    .unwrap_or_else(|| panic!("seed {seed}: {:?}", e.failure));
                sum += m;
                sum2 += m * m;
                u_mean += e.uncertainty_pct / n as f64;
            }
            let mean = sum / n as f64;
            let scatter = (sum2 / n as f64 - mean * mean).sqrt();
            println!("scatter {scatter} predicted {u_mean}");
            assert!(
                (scatter / u_mean - 1.0).abs() < 0.2,
                "seed {seed} {s:?}: scatter {scatter} vs {u_mean}"
            );
        }
    }

    #[test]
    fn single_frequency_model_and_flags() {
        // A straight line through two synthetic points at 25 C, low salt.
        let sp = SynthProduct::<f64>::grain();
        let e_at = |m: f64, t: f64, salt: f64| {
            sp.permittivity(
                20e6,
                &SynthSample {
                    moisture_pct: m,
                    temperature_c: t,
                    water_sigma25_s_m: salt,
                },
            )
            .re
        };
        let (e1, e2) = (e_at(10.0, 25.0, 0.02), e_at(20.0, 25.0, 0.02));
        let c1 = 10.0 / (e2 - e1);
        let model = ProductModel::SingleFrequency(SingleFrequencyModel {
            freq_index: 1,
            t_ref_c: 25.0,
            coeffs: [10.0 - c1 * e1, c1, 0.0, 0.0],
            c_t: 0.0,
        });
        let (p, n) = model.to_params();
        let r = Range::new;
        let cal = ProductCalibration::<f64>::from_parts(
            ModelKind::SingleFrequency,
            &p[..n],
            Basis::Wet,
            r(5.0, 30.0),
            r(10.0, 40.0),
            &[r(2.0, 30.0)],
            0.3,
        )
        .unwrap();
        let run = |m, t, salt| {
            estimate(
                &input::<f64>(
                    &SynthSample {
                        moisture_pct: m,
                        temperature_c: t,
                        water_sigma25_s_m: salt,
                    },
                    0.01,
                ),
                Some(&cal),
            )
        };
        let base = run(15.0, 25.0, 0.02);
        assert!(base.flags.is_empty() && base.inversion.is_none());
        let u = (c1 * 0.01f64).hypot(0.3);
        assert!(
            (base.uncertainty_pct - u).abs() < 1e-6,
            "{} {u}",
            base.uncertainty_pct
        );
        // Salt biases the single-frequency reading upward (the synth's purpose).
        let salty = run(15.0, 25.0, 0.3).moisture_pct.unwrap();
        assert!(salty - base.moisture_pct.unwrap() > 0.5, "{salty}");
        // Temperature outside 10-40 C is flagged but still reported.
        let cold = run(15.0, 2.0, 0.02);
        assert!(
            cold.moisture_pct.is_some() && cold.flags.contains(EstimateFlags::TEMP_OUT_OF_RANGE)
        );
        // Moisture outside 5-30 % is flagged.
        let wet = run(34.0, 25.0, 0.02);
        assert!(wet.flags.contains(EstimateFlags::OUT_OF_RANGE));
    }

    #[test]
    fn chain_from_admittance_matches_permittivity_chain() {
        let cal = identity_cal::<f32>();
        let sp = SynthProduct::<f32>::grain();
        let s = SynthSample {
            moisture_pct: 14.0f32,
            temperature_c: 18.0,
            water_sigma25_s_m: 0.1,
        };
        let cells = [CellConstants {
            stray_pf: 2.7f32,
            cell_pf: 3.44,
            g_offset_s: 1e-7,
        }; 2];
        let f = [1e6f32, 20e6];
        let y =
            f.map(|fk| permittivity_to_admittance(fk, sp.permittivity(fk, &s), &cells[0]).unwrap());
        let e =
            estimate_from_admittance(f, y, [2e-10, 4e-9], &cells, 18.0, None, Some(&cal)).unwrap();
        let m = e.moisture_pct.unwrap();
        assert!((m - 14.0).abs() < 0.01, "{m}");
        assert!(
            (permittivity_sd(1e6f32, 2e-10, &cells[0]) - 2e-10 / (6.283_185e6 * 3.44e-12)).abs()
                < 1e-6
        );
    }
}
