//! A simulated analog front end (feature `sim`, `no_std`).
//!
//! It gives the core exactly what a board gives, ADC codes and a temperature
//! code, from a physical chain:
//!
//! ```text
//! material eps*(f)  (air, a liquid, or a product from fringe_calibration::synth)
//!   -> build-up layer on the window (partial capacitances of the
//!      interdigital electrodes, fringe_calibration::ide)
//!   -> cell: Y = G0 + j w (Cp + C0 eps*), Cp and C0 raised near the lead
//!      resonance: C_app = C / (1 - (f/f_res)^2)
//!   -> electrode state (open: only a residual capacitance; short: 0.1 S)
//!   -> chain: ratio = Y * R_t(f) * gain(t) * exp(-j f/f_bw)   (slow gain drift)
//!   -> two ADC channels at the IF: per-channel gain and offset, white
//!      Gaussian noise (seeded), quantisation, clipping at the rails
//! internal reference capacitor: Y = j w C_ref (1 + drift t)
//! temperature: Pt100 resistance from the calibration crate's IEC 60751 model,
//!   ratiometric 24-bit code with noise
//! ```
//! Time advances by the duration of each record and settling (and by
//! [`SimFrontend::advance_ms`]), so drifts move as on a real line.

use fringe_calibration::ide::IdeGeometry;
use fringe_calibration::product::{ProductModel, RelaxationModel};
use fringe_calibration::real::Cx;
use fringe_calibration::synth::{SynthProduct, SynthSample};
use fringe_protocol::{
    short_string, Basis, ModelKind, ProductCal, Range, MAX_CAL_INPUTS, MAX_CAL_PARAMS,
};
use rand_core::{Rng, SeedableRng};
use rand_xorshift::XorShiftRng;

use crate::demod::C32;
use crate::hal::{Frontend, FrontendError, FrontendInfo, Input, RECORD_LEN};

/// IF cycles per record of the simulated board.
pub const SIM_IF_BIN: u16 = 32;
/// IF of the simulated board, Hz (sample rate 8x the IF).
pub const SIM_IF_HZ: f32 = 10_000.0;
/// Nominal internal reference capacitor, pF.
pub const SIM_REFERENCE_PF: f32 = 33.0;
/// Largest excitation amplitude, V.
pub const SIM_MAX_AMPLITUDE_V: f32 = 1.0;
/// Reference resistor of the temperature measurement, ohm.
pub const SIM_TEMP_REF_OHM: f32 = 400.0;

/// What sits in front of the window.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Material {
    /// Dry air (eps' = 1.00054, ITU-R P.453 refractivity at 20 C).
    Air,
    /// A liquid of fixed complex permittivity eps' - j eps'' (bench calibration).
    Liquid {
        /// eps'.
        eps_re: f32,
        /// eps'' >= 0.
        eps_im: f32,
    },
    /// A moist product whose eps*(f) comes from [`fringe_calibration::synth`]
    /// at the scenario's temperature.
    Product {
        /// The product (dry matter, bulk density, relaxation constants).
        product: SynthProduct<f32>,
        /// Moisture, % wet basis.
        moisture_pct: f32,
        /// Conductivity of the product's water at 25 C (its salt), S/m.
        water_sigma25_s_m: f32,
    },
}

/// State of the electrodes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Electrodes {
    /// Intact.
    #[default]
    Intact,
    /// Lead broken: only a residual capacitance remains.
    Open,
    /// Electrode shorted to the guard (wet bridge, damage).
    Short,
}

/// Everything the simulated world is made of.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Scenario {
    /// The material in front of the window when product is present.
    pub material: Material,
    /// Whether the line carries product (false: empty line, air).
    pub product_present: bool,
    /// Temperature of the material and the sensor, C.
    pub temperature_c: f32,
    /// Build-up layer on the window, mm (dried residue, eps* = 3.0 - j0.05, invented).
    pub buildup_mm: f32,
    /// Electrode state.
    pub electrodes: Electrodes,
    /// ADC noise, codes rms per sample (both channels).
    pub noise_codes: f32,
    /// Slow drift of the chain gain, % per hour.
    pub chain_drift_pct_per_h: f32,
    /// Slow drift of the internal reference capacitor, % per hour.
    pub reference_drift_pct_per_h: f32,
    /// The converter never finishes a record ([`FrontendError::NotReady`]):
    /// a stalled front end.
    pub stalled: bool,
    /// Setting the excitation to this frequency (Hz) fails on the bus and
    /// leaves the synthesiser where it was (0: never).
    pub excitation_fault_hz: f32,
}

impl Default for Scenario {
    fn default() -> Self {
        Self {
            material: Material::Air,
            product_present: true,
            temperature_c: 20.0,
            buildup_mm: 0.0,
            electrodes: Electrodes::Intact,
            noise_codes: 4.0,
            chain_drift_pct_per_h: 0.0,
            reference_drift_pct_per_h: 0.0,
            stalled: false,
            excitation_fault_hz: 0.0,
        }
    }
}

/// The simulated cell's constants (the truth the bench calibration finds).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SimCell {
    /// Stray capacitance at low frequency, pF.
    pub stray_pf: f32,
    /// Empty-cell capacitance at low frequency, pF.
    pub cell_pf: f32,
    /// Residual conductance, S.
    pub g_offset_s: f32,
    /// Lead resonance, Hz.
    pub f_res_hz: f32,
    /// Electrode geometry (for what a build-up layer does to the reading).
    pub ide: IdeGeometry<f32>,
    /// Permittivity of the substrate behind the electrodes (FR-4, 4.4).
    pub substrate_eps: f32,
}

/// Cell of the simulated sensor (invented values of a plausible size).
pub const SIM_CELL: SimCell = SimCell {
    stray_pf: 2.1,
    cell_pf: 1.5,
    g_offset_s: 2.0e-8,
    f_res_hz: 150.0e6,
    // 2 mm fingers, 3 mm gaps, 40 mm long, 10 fingers: about 97 % of the
    // signal from within 3.0-3.4 mm of the window (the finite-layer formula
    // of docs/REFERENCES.md section 7 for this geometry; test below).
    ide: IdeGeometry {
        width_m: 2.0e-3,
        gap_m: 3.0e-3,
        length_m: 40.0e-3,
        n_electrodes: 10,
    },
    substrate_eps: 4.4,
};

const AIR_EPS: f32 = 1.000_54;
const BUILDUP_EPS: C32 = C32::new(3.0, -0.05);
const SHORT_S: f32 = 0.1;
const OPEN_PF: f32 = 0.05;

/// The simulated front end.
#[derive(Debug, Clone)]
pub struct SimFrontend {
    rng: XorShiftRng,
    scenario: Scenario,
    freq_hz: f32,
    amplitude_v: f32,
    input: Input,
    time_s: f64,
}

fn gauss(rng: &mut XorShiftRng) -> f32 {
    // Box-Muller on two uniforms in (0, 1].
    let u1 = ((rng.next_u64() >> 40) as f32 + 1.0) / (1u32 << 24) as f32;
    let u2 = ((rng.next_u64() >> 40) as f32) / (1u32 << 24) as f32;
    libm::sqrtf(-2.0 * libm::logf(u1)) * libm::cosf(2.0 * core::f32::consts::PI * u2)
}

impl SimFrontend {
    /// A front end seeded with `seed`, showing `scenario`.
    pub fn new(seed: u64, scenario: Scenario) -> Self {
        Self {
            rng: XorShiftRng::seed_from_u64(seed),
            scenario,
            freq_hz: 1.0e6,
            amplitude_v: 0.0,
            input: Input::Electrodes,
            time_s: 0.0,
        }
    }
    /// Changes the world (product change, empty line, fault...).
    pub fn set_scenario(&mut self, scenario: Scenario) {
        self.scenario = scenario;
    }
    /// The world now.
    pub fn scenario(&self) -> &Scenario {
        &self.scenario
    }
    /// Lets simulated time pass (drifts move).
    pub fn advance_ms(&mut self, ms: u64) {
        self.time_s += ms as f64 / 1000.0;
    }
    /// Simulated time since start, s.
    pub fn time_s(&self) -> f64 {
        self.time_s
    }

    /// Complex permittivity in front of the electrodes at `freq_hz`
    /// (eps' + j im with im = -eps'').
    pub fn material_eps(&self, freq_hz: f32) -> C32 {
        let sc = &self.scenario;
        let bulk = if !sc.product_present {
            C32::new(AIR_EPS, 0.0)
        } else {
            match sc.material {
                Material::Air => C32::new(AIR_EPS, 0.0),
                Material::Liquid { eps_re, eps_im } => C32::new(eps_re, -eps_im),
                Material::Product {
                    product,
                    moisture_pct,
                    water_sigma25_s_m,
                } => {
                    let e = product.permittivity(
                        freq_hz,
                        &SynthSample {
                            moisture_pct,
                            temperature_c: sc.temperature_c,
                            water_sigma25_s_m,
                        },
                    );
                    C32::new(e.re, e.im)
                }
            }
        };
        if sc.buildup_mm.is_nan() || sc.buildup_mm <= 0.0 {
            return bulk;
        }
        // What the electrodes see through the layer: partial capacitances of
        // the interdigital geometry (fringe_calibration::ide).
        let layer = (
            sc.buildup_mm * 1e-3,
            Cx::new(BUILDUP_EPS.re, BUILDUP_EPS.im),
        );
        let e = SIM_CELL.ide.apparent_permittivity(
            SIM_CELL.substrate_eps,
            &[layer],
            Cx::new(bulk.re, bulk.im),
        );
        C32::new(e.re, e.im)
    }

    /// True cell admittance at `freq_hz` (S), electrodes or reference.
    pub fn admittance(&self, freq_hz: f32) -> C32 {
        let w = 2.0 * core::f32::consts::PI * freq_hz;
        let h = 1.0 - (freq_hz / SIM_CELL.f_res_hz) * (freq_hz / SIM_CELL.f_res_hz);
        match self.input {
            Input::Reference => {
                let drift = 1.0
                    + self.scenario.reference_drift_pct_per_h
                        * 0.01
                        * (self.time_s / 3600.0) as f32;
                C32::new(0.0, w * SIM_REFERENCE_PF * 1e-12 * drift)
            }
            Input::Electrodes => match self.scenario.electrodes {
                Electrodes::Short => C32::new(SHORT_S, 0.0),
                Electrodes::Open => C32::new(0.0, w * OPEN_PF * 1e-12),
                Electrodes::Intact => {
                    let eps = self.material_eps(freq_hz);
                    let cp = SIM_CELL.stray_pf * 1e-12 / h;
                    let c0 = SIM_CELL.cell_pf * 1e-12 / h;
                    // jw(Cp + C0 eps) with eps = re + j im: G = -w C0 im, B = w (Cp + C0 re).
                    C32::new(
                        SIM_CELL.g_offset_s - w * c0 * eps.im,
                        w * (cp + c0 * eps.re),
                    )
                }
            },
        }
    }

    fn chain_gain(&self) -> C32 {
        let g = 1.0 + self.scenario.chain_drift_pct_per_h * 0.01 * (self.time_s / 3600.0) as f32;
        let phi = -self.freq_hz / 2.0e9;
        C32::new(g * libm::cosf(phi), g * libm::sinf(phi))
    }
}

fn r_t(freq_hz: f32) -> f32 {
    // Gain switched with frequency so both ranges use the ADC well.
    120.0 * libm::powf(1.0e6 / freq_hz.max(1.0), 0.292)
}

impl Frontend for SimFrontend {
    fn info(&self) -> FrontendInfo {
        FrontendInfo {
            if_bin: SIM_IF_BIN,
            adc_full_scale: i16::MAX,
            reference_pf: SIM_REFERENCE_PF,
            temp_ref_ohm: SIM_TEMP_REF_OHM,
            max_amplitude_v: SIM_MAX_AMPLITUDE_V,
        }
    }

    fn transimpedance_ohm(&self, freq_hz: f32) -> f32 {
        r_t(freq_hz)
    }

    fn set_excitation(&mut self, freq_hz: f32, amplitude_v: f32) -> Result<(), FrontendError> {
        if !(1.0e5..=1.0e8).contains(&freq_hz)
            || !(0.0..=SIM_MAX_AMPLITUDE_V).contains(&amplitude_v)
        {
            return Err(FrontendError::Unsupported);
        }
        if freq_hz == self.scenario.excitation_fault_hz {
            return Err(FrontendError::Bus);
        }
        self.freq_hz = freq_hz;
        self.amplitude_v = amplitude_v;
        self.time_s += 0.001; // synthesiser settling
        Ok(())
    }

    fn select_input(&mut self, input: Input) -> Result<(), FrontendError> {
        self.input = input;
        Ok(())
    }

    fn acquire(
        &mut self,
        sensor: &mut [i16; RECORD_LEN],
        reference: &mut [i16; RECORD_LEN],
    ) -> Result<(), FrontendError> {
        if self.scenario.stalled {
            return Err(FrontendError::NotReady);
        }
        let ratio = self
            .admittance(self.freq_hz)
            .scale(r_t(self.freq_hz))
            .times(self.chain_gain());
        // The reference channel sees the excitation at 0.6 of full scale at
        // the largest amplitude; per-channel gains are a board's fixed errors.
        let a_ref = 0.6 * f32::from(i16::MAX) * self.amplitude_v / SIM_MAX_AMPLITUDE_V;
        let (g_s, g_r, off_s, off_r) = (1.012f32, 0.994f32, 14.0f32, -9.0f32);
        let a_s = a_ref * ratio.abs() * g_s;
        let ph_s = ratio.arg();
        let phase0 =
            2.0 * core::f32::consts::PI * ((self.rng.next_u32() >> 8) as f32 / (1u32 << 24) as f32);
        let noise = self.scenario.noise_codes.max(0.0);
        for (n, (s, r)) in sensor.iter_mut().zip(reference.iter_mut()).enumerate() {
            let th = phase0
                + 2.0 * core::f32::consts::PI * f32::from(SIM_IF_BIN) * n as f32
                    / RECORD_LEN as f32;
            let vs = a_s * libm::cosf(th + ph_s) + off_s + noise * gauss(&mut self.rng);
            let vr = a_ref * g_r * libm::cosf(th) + off_r + noise * gauss(&mut self.rng);
            *s = libm::roundf(vs).clamp(-32768.0, 32767.0) as i16;
            *r = libm::roundf(vr).clamp(-32768.0, 32767.0) as i16;
        }
        self.time_s += RECORD_LEN as f64 / (8.0 * f64::from(SIM_IF_HZ));
        Ok(())
    }

    fn read_temperature_raw(&mut self) -> Result<u32, FrontendError> {
        let r = crate::measure::TempSensor::Pt100.resistance_ohm(self.scenario.temperature_c);
        let code = r / SIM_TEMP_REF_OHM * (1u32 << 24) as f32 + 4.0 * gauss(&mut self.rng);
        Ok(code.clamp(0.0, ((1u32 << 24) - 1) as f32) as u32)
    }
}

/// The exact product calibration of a synthetic product: its own relaxation
/// law and mixture, moisture = the mixing-model moisture, SEC 0. What a
/// perfect lab would fit; for tests, benchmarks and demos. Valid ranges:
/// moisture 5-30 %, temperature 0-50 C, eps_hf 1-60, d_eps 0-500,
/// sigma 0-1 S/m, mixing moisture 0-40 %.
pub fn exact_calibration(product: &SynthProduct<f32>, name: &str) -> ProductCal {
    exact_calibration_on(product, name, Basis::Wet)
}

/// [`exact_calibration`] reporting on `basis`. On a dry basis the moisture
/// is M_db = 100 m / (100 - m) of the mixing-model moisture m to its cubic
/// term, m + m^2/100 + m^3/10^4 (the layout's polynomial is cubic): low by
/// the terms dropped, 0.05 % at 14 % wet (16.23 % against 16.28 % dry),
/// 0.52 % at 25 % wet, 1.2 % at 30 % wet; not counted in its SEC of 0.
/// Valid moisture 5-42.86 % (the upper end the dry basis of 30 % wet).
pub fn exact_calibration_on(product: &SynthProduct<f32>, name: &str, basis: Basis) -> ProductCal {
    let (coeffs, top) = match basis {
        Basis::Wet => ([0.0, 1.0, 0.0, 0.0], 30.0),
        Basis::Dry => ([0.0, 1.0, 0.01, 1e-4], 100.0 * 30.0 / 70.0),
    };
    let model = ProductModel::Relaxation(RelaxationModel {
        law: product.law(),
        mixture: product.mixture,
        t_ref_c: 25.0,
        coeffs,
        c_t: 0.0,
        c_sigma: 0.0,
        c_static: [0.0; 2],
        static_hold: fringe_calibration::product::no_static_hold(),
        sigma_hold: fringe_calibration::product::no_sigma_hold(),
        density_input: false,
    });
    let (params, n) = model.to_params();
    let r = |min, max| Range { min, max };
    let mut p: heapless::Vec<f32, MAX_CAL_PARAMS> = heapless::Vec::new();
    for x in params.iter().take(n) {
        let _ = p.push(*x);
    }
    let mut inputs: heapless::Vec<Range, MAX_CAL_INPUTS> = heapless::Vec::new();
    for x in [r(1.0, 60.0), r(0.0, 500.0), r(0.0, 1.0), r(0.0, 40.0)] {
        let _ = inputs.push(x);
    }
    ProductCal {
        name: short_string(name),
        model: ModelKind::Relaxation,
        basis,
        params: p,
        moisture_pct: r(5.0, top),
        temperature_c: r(0.0, 50.0),
        inputs,
        sec_pct: 0.0,
        made_s: 0,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::demod;

    /// Sensor/reference bin ratio of one record at `f` on `input`, with the
    /// sensor codes passed through `mutate` first (identity for the test).
    fn bin_ratio(
        fe: &mut SimFrontend,
        f: f32,
        input: Input,
        mutate: impl Fn(i16) -> i16,
    ) -> (C32, u16) {
        fe.set_excitation(f, 1.0).unwrap();
        fe.select_input(input).unwrap();
        let (mut s, mut r) = ([0i16; RECORD_LEN], [0i16; RECORD_LEN]);
        fe.acquire(&mut s, &mut r).unwrap();
        for x in s.iter_mut() {
            *x = mutate(*x);
        }
        let rr = demod::record(&s, &r, SIM_IF_BIN, i16::MAX);
        (rr.ratio, rr.sensor.clipped + rr.reference.clipped)
    }

    /// The cell model written out from the module doc and the public
    /// [`SIM_CELL`] constants (not through [`SimFrontend::admittance`]):
    /// Y = G0 + j w (Cp + C0 eps*) / (1 - (f/f_res)^2), eps* = re + j im.
    fn documented_cell_admittance(f: f32, eps: C32) -> C32 {
        let w = 2.0 * core::f32::consts::PI * f;
        let h = 1.0 - (f / SIM_CELL.f_res_hz) * (f / SIM_CELL.f_res_hz);
        let (cp, c0) = (SIM_CELL.stray_pf * 1e-12 / h, SIM_CELL.cell_pf * 1e-12 / h);
        C32::new(
            SIM_CELL.g_offset_s - w * c0 * eps.im,
            w * (cp + c0 * eps.re),
        )
    }

    /// How far `got` is from `want`: (relative magnitude error, phase error).
    fn mismatch(got: C32, want: C32) -> (f32, f32) {
        let q = got.over(want);
        ((q.abs() - 1.0).abs(), q.arg().abs())
    }

    /// Consistency test of the simulator's chain (not an outside check): the
    /// ratio of the electrode record to the internal-reference record is
    /// Y / (j w C_ref), whatever the board's private channel gains, the
    /// transimpedance and the chain phase are (they cancel, as they do in
    /// the device's own reference correction). The expectation uses only
    /// public constants and the cell model of the module doc.
    ///
    /// Mutation it catches (checked below): the sensor channel's gain halved
    /// (codes halved before demodulation) moves the ratio by 50 %, far
    /// outside the 1e-3 tolerance; so does any error in the admittance model
    /// (a missing stray capacitance, a sign error in the loss).
    #[test]
    fn electrode_over_reference_ratio_is_the_cell_admittance_over_the_reference() {
        let seed = 77u64;
        let eps = C32::new(24.4, -2.0);
        let mut fe = SimFrontend::new(
            seed,
            Scenario {
                material: Material::Liquid {
                    eps_re: 24.4,
                    eps_im: 2.0,
                },
                noise_codes: 0.5,
                ..Scenario::default()
            },
        );
        for f in [1.0e6f32, 20.0e6] {
            let w = 2.0 * core::f32::consts::PI * f;
            let y_ref = C32::new(0.0, w * SIM_REFERENCE_PF * 1e-12);
            let want = documented_cell_admittance(f, eps).over(y_ref);
            let (e, clip_e) = bin_ratio(&mut fe, f, Input::Electrodes, |x| x);
            let (r, clip_r) = bin_ratio(&mut fe, f, Input::Reference, |x| x);
            assert_eq!(clip_e + clip_r, 0, "seed {seed} f {f}: clipped");
            let (mag, phase) = mismatch(e.over(r), want);
            assert!(
                mag < 1e-3 && phase < 1e-3,
                "seed {seed} f {f}: got {:?} want {want:?} (|err| {mag}, phase {phase})",
                e.over(r)
            );
            // The mutation: the sensor channel's gain halved.
            let (e_half, _) = bin_ratio(&mut fe, f, Input::Electrodes, |x| x / 2);
            let (mag, _) = mismatch(e_half.over(r), want);
            assert!(
                mag > 0.4,
                "seed {seed} f {f}: a halved gain went unseen ({mag})"
            );
        }
    }

    #[test]
    fn the_stated_penetration_depth_of_the_simulated_electrode() {
        // The comment at SIM_CELL states it; this keeps the two together.
        let d = SIM_CELL.ide.penetration_depth_m(0.97) * 1e3;
        assert!((3.0..=3.4).contains(&d), "97 % depth {d} mm");
    }

    #[test]
    fn short_saturates_and_open_is_tiny() {
        let mut fe = SimFrontend::new(
            1,
            Scenario {
                electrodes: Electrodes::Short,
                ..Scenario::default()
            },
        );
        fe.set_excitation(1.0e6, 1.0).unwrap();
        let (mut s, mut r) = ([0i16; RECORD_LEN], [0i16; RECORD_LEN]);
        fe.acquire(&mut s, &mut r).unwrap();
        assert!(demod::tone(&s, SIM_IF_BIN, i16::MAX).clipped > 0);
        fe.set_scenario(Scenario {
            electrodes: Electrodes::Open,
            ..Scenario::default()
        });
        assert!(fe.admittance(1.0e6).abs() < 2.0 * core::f32::consts::PI * 1.0e6 * 0.1e-12);
    }

    #[test]
    fn buildup_lowers_the_apparent_permittivity_of_a_wet_material() {
        let mut fe = SimFrontend::new(
            1,
            Scenario {
                material: Material::Liquid {
                    eps_re: 20.0,
                    eps_im: 1.0,
                },
                ..Scenario::default()
            },
        );
        let clean = fe.material_eps(1.0e6);
        fe.set_scenario(Scenario {
            buildup_mm: 1.0,
            ..*fe.scenario()
        });
        let dirty = fe.material_eps(1.0e6);
        assert!(dirty.re < clean.re && dirty.re > 3.0, "{clean:?} {dirty:?}");
    }
}
