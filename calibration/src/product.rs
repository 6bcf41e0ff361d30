//! Product calibration models, evaluated identically on device and host.
//!
//! Two models (`fringe_protocol::ModelKind` carries which one):
//!
//! - **Single frequency** (what a one-frequency instrument can do):
//!   `moisture = c0 + c1 e + c2 e^2 + c3 e^3 + c_t (t - t_ref)`, e = eps' at
//!   one of the two frequencies (the higher by default).
//! - **Relaxation**: the two-frequency inversion gives (eps_hf, d_eps, sigma);
//!   the product mixture (solid + water + air, [`ProductMixture`]) turns eps_hf
//!   into a mixing-model moisture m (% wet basis, the water mass fraction)
//!   with water's permittivity at the product temperature (Malmberg and
//!   Maryott 1956); then
//!   `moisture = p0 + p1 m + p2 m^2 + p3 m^3 + c_t (t - t_ref) + c_s ln(sigma / sigma_ref)`,
//!   and, in layouts 2 and 3, `+ q1 h + q2 h^2` with h the mixing-model moisture
//!   of the static permittivity eps_hf + d_eps held to the range
//!   `[h_min, h_max]` the calibration samples span (widened by a tenth):
//!   where salt or heat move the relaxation above the band, eps_hf alone
//!   no longer tells the water apart from the relaxation's strength, and
//!   the static term carries it (`calibration/examples/relaxation_terms.rs`
//!   and BENCHMARKS.md measure it on the zoo); the hold keeps a d_eps the
//!   two frequencies cannot determine (a relaxation far below the band)
//!   from driving the moisture out of the calibration's range. In layout
//!   3 the conductivity term holds sigma to `[sigma_min, sigma_max]` as
//!   well (the fit sets only a lower end, below the samples' lowest
//!   sigma: a product drier or purer than every calibration sample has a
//!   conductivity the two frequencies barely resolve, and the term is not
//!   extrapolated to it).
//!
//! - **Multivariate** (chemometrics on physically chosen features of both
//!   frequencies, [`MultivariateModel`]): `moisture = b0 + sum_k b_k x_k`
//!   over the 26 features of [`MultivariateModel::features`] (log eps' and
//!   log eps'' at each frequency, temperature, a water index per frequency
//!   compensated by water's permittivity at the product temperature,
//!   Trabelsi, Kraszewski and Nelson's density-independent function at the
//!   higher frequency, the squares and products of the first five, and,
//!   where the plant measures the bulk density at the sensor, its relative
//!   deviation from the calibration's and that times log eps' at each
//!   frequency); the host fits the coefficients by ridge or PLS.
//!
//! All three are linear in their coefficients over the features returned by
//! [`SingleFrequencyModel::features`], [`RelaxationModel::features`] and
//! [`MultivariateModel::features`]; the host fit regresses on exactly those
//! features, so device and host agree.
//!
//! # Flat parameter layout (`fringe_protocol::ProductCal::params`, f32)
//!
//! ```text
//! SingleFrequency, 8 values:
//!  [0] layout version (1)      [1] frequency index (0 lower, 1 higher)
//!  [2] t_ref_c                 [3] c0  [4] c1  [5] c2  [6] c3   (% per eps'^k)
//!  [7] c_t (% per K)
//!
//! Relaxation, 17 values (layout 1), 21 (layout 2, with the static terms)
//! or 23 (layout 3, with the conductivity hold; where the model has no
//! static terms, q1 = q2 = 0 and the hold of h 0-100; layout 4, the same
//! 23 values, with the density input: the mixing model takes each
//! reading's bulk density, [9] is the reference for a reading without
//! one, the fifth input range is the calibrated densities, and
//! sigma_min is 0 where the model has no conductivity hold):
//!  [0] layout version (1-4)    [1] alpha (0 <= alpha < 1)
//!  [2] fr_ref_hz (> 0)         [3] sigma_ref_s_m (> 0)
//!  [4] fr_exponent p           [5] fr_temp_coeff_per_c
//!  [6] mixing exponent a (0..=1; 0 logarithmic, 0.5 CRIM)
//!  [7] eps_dry (>= 1)          [8] particle_density_kg_m3 (0 < rho <= 5000)
//!  [9] bulk_density_kg_m3 (> 0, below the particle density)
//!  [10] t_ref_c (of the c_t term and of the law's c_T)
//!  [11] p0 [12] p1 [13] p2 [14] p3  (% per m^k)
//!  [15] c_t (% per K)          [16] c_s (% per unit ln(sigma/sigma_ref))
//!  [17] q1 [18] q2 (% per h^k)  [19] h_min [20] h_max (%, h_min <= h_max)
//!  [21] sigma_min [22] sigma_max (S/m, 0 < sigma_min <= sigma_max, or
//!  0 <= in layout 4; the fit writes the inversion's upper bound, 20, for
//!  no upper end)
//!
//! Multivariate without a density input, 27 values:
//!  [0] layout version (1)      [1] t_ref_c
//!  [2] a_f (> 0; Trabelsi-Kraszewski-Nelson constant at the higher frequency)
//!  [3] b0 (%)                  [4..27] b_0..b_22 (% per feature unit)
//!
//! Multivariate with a density input, 31 values:
//!  [0] layout version (2)      [1]-[3] as above
//!  [4..30] b_0..b_25 (% per feature unit)
//!  [30] rho_ref_kg_m3 (> 0; the bulk density the density features are relative to)
//! ```
//!
//! Valid ranges and the SEC travel beside the params (as in
//! `fringe_protocol::ProductCal`): moisture, temperature and each model
//! input in the order of [`ProductModel::input_names`].

use crate::invert::{MaterialParams, RelaxationLaw};
use crate::mixing::ProductMixture;
use crate::moisture::Basis;
use crate::real::Real;
use crate::water::static_permittivity_mm;
use core::fmt;

/// Most parameters in the flat layout (`fringe_protocol::MAX_CAL_PARAMS`).
pub const MAX_PARAMS: usize = 32;
/// Most model inputs with a valid range (`fringe_protocol::MAX_CAL_INPUTS`).
pub const MAX_INPUTS: usize = 6;
/// Current layout version (`params[0]`).
pub const LAYOUT_VERSION: f32 = 1.0;
/// Length of the single-frequency layout.
pub const SINGLE_LEN: usize = 8;
/// Length of the relaxation layout without the static terms (version 1).
pub const RELAXATION_LEN: usize = 17;
/// Length of the relaxation layout with the static terms (version 2).
pub const RELAXATION_STATIC_LEN: usize = 21;
/// Number of features of the multivariate model (the last
/// [`MV_DENSITY_FEATURES`] used only with a density input).
pub const MV_FEATURES: usize = 26;
/// Features of the multivariate model without a density input.
pub const MV_BASE_FEATURES: usize = 23;
/// Density features of the multivariate model (23-25).
pub const MV_DENSITY_FEATURES: usize = MV_FEATURES - MV_BASE_FEATURES;
/// Length of the multivariate layout without a density input (version 1).
pub const MULTIVARIATE_LEN: usize = 4 + MV_BASE_FEATURES;
/// Length of the multivariate layout with a density input (version 2).
pub const MULTIVARIATE_DENSITY_LEN: usize = 4 + MV_FEATURES + 1;
/// Layout version of the multivariate model with a density input.
pub const LAYOUT_VERSION_DENSITY: f32 = 2.0;
/// Layout version of a relaxation model with the static terms.
pub const LAYOUT_VERSION_STATIC: f32 = 2.0;
/// Layout version of a relaxation model whose conductivity term is held.
pub const LAYOUT_VERSION_SIGMA_HOLD: f32 = 3.0;
/// Length of the relaxation layout with the conductivity hold (version 3).
pub const RELAXATION_SIGMA_HOLD_LEN: usize = 23;
/// Relaxation layout version with the density input (layout 3's 23
/// values; `sigma_min` 0 where the model has no conductivity hold).
pub const LAYOUT_VERSION_DENSITY_INPUT: f32 = 4.0;
/// `sigma_max` written for a layout-4 model without a conductivity hold
/// (the inversion's upper bound of sigma, S/m).
pub const NO_SIGMA_HOLD_MAX: f32 = 20.0;
/// Lowest and highest bulk density a density input may carry, kg/m^3
/// (loose flakes to wet aggregates with room to spare; common practice,
/// no source).
pub const DENSITY_LIMITS_KG_M3: (f64, f64) = (10.0, 5000.0);

/// Which model (mirrors `fringe_protocol::ModelKind`).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ModelKind {
    /// [`SingleFrequencyModel`].
    SingleFrequency,
    /// [`RelaxationModel`].
    Relaxation,
    /// [`MultivariateModel`].
    Multivariate,
}

/// Valid range of one quantity (inclusive).
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct Range<T> {
    /// Lower bound.
    pub min: T,
    /// Upper bound.
    pub max: T,
}

impl<T: Real> Range<T> {
    /// A range.
    pub fn new(min: T, max: T) -> Self {
        Range { min, max }
    }
    /// Whether `x` lies in the range (NaN never does).
    pub fn contains(&self, x: T) -> bool {
        x >= self.min && x <= self.max
    }
    /// `x` held to the range (NaN to its lower end), and whether it lay
    /// inside it.
    pub fn hold(&self, x: T) -> (T, bool) {
        if self.contains(x) {
            (x, true)
        } else if x > self.max {
            (self.max, false)
        } else {
            // Below the range, or NaN.
            (self.min, false)
        }
    }
    fn valid(&self) -> bool {
        !(self.min.to_f64().is_nan() || self.max.to_f64().is_nan()) && self.min <= self.max
    }
    fn cast<U: Real>(&self) -> Range<U> {
        Range {
            min: U::cast(self.min),
            max: U::cast(self.max),
        }
    }
}

/// Why a calibration was refused.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum ParamsError {
    /// The params slice has the wrong length for the model.
    WrongLength {
        /// Expected length.
        expected: usize,
        /// Length given.
        got: usize,
    },
    /// `params[0]` names a layout this build does not know.
    UnknownVersion,
    /// A value is NaN or infinite.
    NonFinite {
        /// Index in the flat layout.
        index: usize,
    },
    /// A value is outside what the model allows.
    Invalid {
        /// Index in the flat layout.
        index: usize,
        /// What is required.
        reason: &'static str,
    },
    /// A valid range is NaN or has min > max (`index` 0 moisture, 1
    /// temperature, 2.. the inputs).
    BadRange {
        /// Which range.
        index: usize,
    },
    /// The number of input ranges differs from the model's inputs.
    WrongInputCount {
        /// Expected count.
        expected: usize,
        /// Count given.
        got: usize,
    },
    /// The SEC is negative or not finite.
    BadSec,
}

impl fmt::Display for ParamsError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            ParamsError::WrongLength { expected, got } => {
                write!(
                    f,
                    "calibration params: expected {expected} values, got {got}"
                )
            }
            ParamsError::UnknownVersion => {
                f.write_str("calibration params[0]: unknown layout version (expected 1, or 2 for a multivariate model with a density input or a relaxation model with the static terms)")
            }
            ParamsError::NonFinite { index } => {
                write!(f, "calibration params[{index}] is not finite")
            }
            ParamsError::Invalid { index, reason } => {
                write!(f, "calibration params[{index}]: {reason}")
            }
            ParamsError::BadRange { index } => {
                write!(f, "valid range {index} (0 moisture, 1 temperature, 2.. inputs) is NaN or min > max")
            }
            ParamsError::WrongInputCount { expected, got } => {
                write!(
                    f,
                    "calibration has {got} input ranges, model needs {expected}"
                )
            }
            ParamsError::BadSec => f.write_str("SEC must be a finite, non-negative % moisture"),
        }
    }
}

impl core::error::Error for ParamsError {}

#[inline]
fn poly3<T: Real>(c: &[T; 4], x: T) -> T {
    c[0] + x * (c[1] + x * (c[2] + x * c[3]))
}

#[inline]
fn dpoly3<T: Real>(c: &[T; 4], x: T) -> T {
    c[1] + x * (T::c(2.0) * c[2] + x * T::c(3.0) * c[3])
}

/// Single-frequency baseline model.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SingleFrequencyModel<T> {
    /// Which frequency's eps' (0 lower, 1 higher).
    pub freq_index: usize,
    /// Reference temperature of the temperature term, C.
    pub t_ref_c: T,
    /// c0..c3, % moisture per eps'^k.
    pub coeffs: [T; 4],
    /// Temperature coefficient, % per K.
    pub c_t: T,
}

impl<T: Real> SingleFrequencyModel<T> {
    /// Number of features (and coefficients).
    pub const N_FEATURES: usize = 5;

    /// Features `[1, e, e^2, e^3, t - t_ref]` the moisture is linear in.
    pub fn features(&self, eps_re: T, t_c: T) -> [T; 5] {
        [
            T::one(),
            eps_re,
            eps_re * eps_re,
            eps_re * eps_re * eps_re,
            t_c - self.t_ref_c,
        ]
    }

    /// Moisture, %.
    pub fn moisture_pct(&self, eps_re: T, t_c: T) -> T {
        poly3(&self.coeffs, eps_re) + self.c_t * (t_c - self.t_ref_c)
    }

    /// d moisture / d eps', % per unit.
    pub fn d_moisture_d_eps(&self, eps_re: T) -> T {
        dpoly3(&self.coeffs, eps_re)
    }
}

/// Relaxation model.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RelaxationModel<T> {
    /// Cole-Cole alpha and relaxation-frequency law used by the inversion.
    pub law: RelaxationLaw<T>,
    /// Solid + water + air mixture of the product.
    pub mixture: ProductMixture<T>,
    /// Reference temperature of the temperature term, C.
    pub t_ref_c: T,
    /// p0..p3, % moisture per m^k (m: mixing-model moisture, % wet basis).
    pub coeffs: [T; 4],
    /// Temperature coefficient, % per K.
    pub c_t: T,
    /// Conductivity coefficient, % per unit ln(sigma / sigma_ref).
    pub c_sigma: T,
    /// q1, q2: % moisture per h^k (h: the held static mixing-model
    /// moisture, [`RelaxationModel::held_static_pct`]); both zero in a
    /// layout-1 model.
    pub c_static: [T; 2],
    /// The range h is held to, %.
    pub static_hold: Range<T>,
    /// The range sigma is held to in the conductivity term, S/m
    /// ([`no_sigma_hold`] in layouts 1 and 2).
    pub sigma_hold: Range<T>,
    /// The mixing model takes each reading's bulk density (the plant's
    /// density input, layout 4) instead of `mixture.bulk_density_kg_m3`,
    /// which is then the reference used where a reading has none.
    pub density_input: bool,
}

/// The conductivity term's hold of a model without one.
pub fn no_sigma_hold<T: Real>() -> Range<T> {
    Range::new(T::zero(), T::c(1e30))
}

/// The static terms' hold of a model without them.
pub fn no_static_hold<T: Real>() -> Range<T> {
    Range::new(T::zero(), T::c(100.0))
}

impl<T: Real> RelaxationModel<T> {
    /// Number of features (and coefficients).
    pub const N_FEATURES: usize = 8;

    /// Whether the model uses the static terms (layout 2, or 3 with them).
    pub fn uses_static(&self) -> bool {
        self.c_static[0] != T::zero() || self.c_static[1] != T::zero()
    }

    /// Mixing-model moisture of the static permittivity eps_hf + d_eps, %
    /// (not held).
    pub fn static_moisture_pct(&self, p: &MaterialParams<T>, t_c: T) -> T {
        self.mixing_moisture_pct(p.eps_hf + p.d_eps, t_c)
    }

    /// [`RelaxationModel::static_moisture_pct`] held to the model's range,
    /// and whether it lay inside it.
    pub fn held_static_pct(&self, p: &MaterialParams<T>, t_c: T) -> (T, bool) {
        self.static_hold.hold(self.static_moisture_pct(p, t_c))
    }

    /// Whether the conductivity term holds sigma (layout 3): a lower end
    /// above 0 ([`no_sigma_hold`] has 0).
    pub fn has_sigma_hold(&self) -> bool {
        self.sigma_hold.min > T::zero()
    }

    /// sigma held to the model's range, and whether it lay inside it.
    pub fn held_sigma(&self, sigma_s_m: T) -> (T, bool) {
        self.sigma_hold.hold(sigma_s_m)
    }

    /// The same model with the mixing model at bulk density `rho_kg_m3`
    /// (a reading's, where the model takes the density input).
    pub fn at_density(&self, rho_kg_m3: T) -> Self {
        let mut m = *self;
        m.mixture.bulk_density_kg_m3 = rho_kg_m3;
        m
    }

    /// The model at a reading's bulk density where it takes the density
    /// input and the reading has one; otherwise itself.
    pub fn at_reading_density(&self, rho_kg_m3: Option<T>) -> Self {
        match rho_kg_m3 {
            Some(rho) if self.density_input => self.at_density(rho),
            _ => *self,
        }
    }

    /// The standard deviation of the moisture of `p` at `t_c` over the
    /// bulk densities `rho` with equal chance (a uniform distribution,
    /// (m(max) - m(min)) / sqrt(12): GUM, JCGM 100:2008, 4.3.7; from
    /// memory): what a reading without its density adds to the
    /// uncertainty.
    pub fn moisture_sd_over_densities(&self, p: &MaterialParams<T>, t_c: T, rho: Range<T>) -> T {
        let m = |r: T| self.at_density(r).moisture_pct(p, t_c);
        T::abs(m(rho.max) - m(rho.min)) / T::sqrt(T::c(12.0))
    }

    /// Mixing-model moisture m (% wet basis) from eps_hf at `t_c`.
    pub fn mixing_moisture_pct(&self, eps_hf: T, t_c: T) -> T {
        self.mixture
            .moisture_wb_pct(eps_hf, static_permittivity_mm(t_c))
    }

    /// Features `[1, m, m^2, m^3, t - t_ref, ln(sigma/sigma_ref), h, h^2]`
    /// (sigma held, [`RelaxationModel::held_sigma`]).
    pub fn features(&self, p: &MaterialParams<T>, t_c: T) -> [T; 8] {
        let m = self.mixing_moisture_pct(p.eps_hf, t_c);
        let (h, _) = self.held_static_pct(p, t_c);
        [
            T::one(),
            m,
            m * m,
            m * m * m,
            t_c - self.t_ref_c,
            T::ln(self.held_sigma(p.sigma_s_m).0 / self.law.sigma_ref_s_m),
            h,
            h * h,
        ]
    }

    /// Moisture, %.
    pub fn moisture_pct(&self, p: &MaterialParams<T>, t_c: T) -> T {
        let m = self.mixing_moisture_pct(p.eps_hf, t_c);
        let mut out = poly3(&self.coeffs, m)
            + self.c_t * (t_c - self.t_ref_c)
            + self.c_sigma * T::ln(self.held_sigma(p.sigma_s_m).0 / self.law.sigma_ref_s_m);
        if self.uses_static() {
            let (h, _) = self.held_static_pct(p, t_c);
            out += self.c_static[0] * h + self.c_static[1] * h * h;
        }
        out
    }

    /// Gradient of the moisture w.r.t. (eps_hf, d_eps, sigma_s_m).
    pub fn gradient(&self, p: &MaterialParams<T>, t_c: T) -> [T; 3] {
        let ew = static_permittivity_mm(t_c);
        let m = self.mixture.moisture_wb_pct(p.eps_hf, ew);
        let dm = self.mixture.d_moisture_d_eps(p.eps_hf, ew);
        // The static terms: h follows eps_hf + d_eps inside its hold and
        // stands still outside it.
        let ds = match self.held_static_pct(p, t_c) {
            (h, true) if self.uses_static() => {
                (self.c_static[0] + T::c(2.0) * self.c_static[1] * h)
                    * self.mixture.d_moisture_d_eps(p.eps_hf + p.d_eps, ew)
            }
            _ => T::zero(),
        };
        [
            dpoly3(&self.coeffs, m) * dm + ds,
            ds,
            match self.held_sigma(p.sigma_s_m) {
                (_, true) => self.c_sigma / p.sigma_s_m,
                _ => T::zero(),
            },
        ]
    }
}

/// Floor added to eps'' before its logarithm (and in the density-independent
/// function), so a nearly lossless product gives finite features whose
/// noise stays bounded.
pub const LOSS_FLOOR: f64 = 0.01;

/// The base features whose squares and products the multivariate model
/// uses, as index pairs into the first five features.
const QUAD: [(usize, usize); 15] = [
    (0, 0),
    (0, 1),
    (0, 2),
    (0, 3),
    (0, 4),
    (1, 1),
    (1, 2),
    (1, 3),
    (1, 4),
    (2, 2),
    (2, 3),
    (2, 4),
    (3, 3),
    (3, 4),
    (4, 4),
];

/// Trabelsi, Kraszewski and Nelson's density-independent calibration
/// function psi = sqrt(eps'' / (eps' (a_f eps' - eps''))) (IEEE Trans.
/// Instrum. Meas. 47(3):613-622, 1998; docs/REFERENCES.md §11, from memory),
/// with its derivatives w.r.t. (eps', eps''). NaN where
/// a_f eps' <= eps'' (outside the function's domain).
pub fn tkn_psi<T: Real>(a_f: T, eps_re: T, eps_loss: T) -> (T, T, T) {
    let d = eps_re * (a_f * eps_re - eps_loss);
    if !(d > T::zero() && eps_loss >= T::zero()) {
        let nan = T::c(f64::NAN);
        return (nan, nan, nan);
    }
    let g = eps_loss / d;
    let psi = T::sqrt(g);
    if !(psi > T::zero()) {
        return (psi, T::zero(), T::zero());
    }
    // dg/de' = -l (2 a e' - l) / D^2, dg/dl = a e'^2 / D^2.
    let d2 = d * d;
    let dg_de = -eps_loss * (T::c(2.0) * a_f * eps_re - eps_loss) / d2;
    let dg_dl = a_f * eps_re * eps_re / d2;
    let h = T::c(0.5) / psi;
    (psi, dg_de * h, dg_dl * h)
}

/// Multivariate (chemometric) model on physically chosen features.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MultivariateModel<T> {
    /// Reference temperature of the temperature feature, C.
    pub t_ref_c: T,
    /// Trabelsi-Kraszewski-Nelson constant a_f at the higher frequency (> 0).
    pub a_f: T,
    /// Intercept b0, %.
    pub intercept: T,
    /// Coefficients of the features, in [`MultivariateModel::FEATURE_NAMES`] order.
    pub coeffs: [T; MV_FEATURES],
    /// Bulk density the density features are relative to, kg/m^3; 0 for a
    /// model without a density input (its density coefficients are 0).
    pub rho_ref_kg_m3: T,
}

impl<T: Real> MultivariateModel<T> {
    /// Feature names, in order (1 lower frequency, 2 higher; dt =
    /// (t - t_ref)/10 K; w = water index; psi2 = density-independent
    /// function at the higher frequency).
    pub const FEATURE_NAMES: [&'static str; MV_FEATURES] = [
        "ln_e1",
        "ln_e2",
        "ln_l1",
        "ln_l2",
        "dt",
        "w2",
        "w1",
        "psi2",
        "ln_e1^2",
        "ln_e1*ln_e2",
        "ln_e1*ln_l1",
        "ln_e1*ln_l2",
        "ln_e1*dt",
        "ln_e2^2",
        "ln_e2*ln_l1",
        "ln_e2*ln_l2",
        "ln_e2*dt",
        "ln_l1^2",
        "ln_l1*ln_l2",
        "ln_l1*dt",
        "ln_l2^2",
        "ln_l2*dt",
        "dt^2",
        "dr",
        "dr*ln_e1",
        "dr*ln_e2",
    ];

    /// Whether the model takes a bulk density input.
    pub fn uses_density(&self) -> bool {
        self.rho_ref_kg_m3 > T::zero()
    }

    /// The density feature dr = rho / rho_ref - 1 of a density input: 0 for
    /// a model without one, or when the input is missing (`None`), not
    /// finite or not positive (then the model assumes its reference
    /// density; [`crate::estimate::estimate`] flags that and widens the
    /// uncertainty).
    pub fn density_deviation(&self, rho_kg_m3: Option<T>) -> T {
        match rho_kg_m3 {
            Some(r) if self.uses_density() && r.is_finite() && r > T::zero() => {
                r / self.rho_ref_kg_m3 - T::one()
            }
            _ => T::zero(),
        }
    }

    /// The features of a reading and their derivatives w.r.t.
    /// `(eps'_1, eps''_1, eps'_2, eps''_2)` (`e` in that order):
    ///
    /// - 0-3: ln eps'_1, ln eps'_2, ln(eps''_1 + f), ln(eps''_2 + f), f = [`LOSS_FLOOR`];
    /// - 4: dt = (t - t_ref) / 10 K;
    /// - 5, 6: water index w_k = (sqrt(eps'_k) - 1) / (sqrt(eps_w(t)) - 1), the
    ///   CRIM water fraction of a product without solid (Birchak et al.
    ///   1974), with water's permittivity at t (Malmberg and Maryott 1956):
    ///   the temperature correction physics gives, so it extrapolates;
    /// - 7: psi_2 = [`tkn_psi`] at the higher frequency on eps''_2 + f;
    /// - 8-22: squares and products of features 0-4;
    /// - 23-25: dr = rho / rho_ref - 1 (the bulk density's relative
    ///   deviation, [`MultivariateModel::density_deviation`]), dr ln eps'_1,
    ///   dr ln eps'_2: at a given moisture, eps' grows with the amount of
    ///   matter in the field (Nelson's review of density effects, from
    ///   memory), and its logarithm shifts in proportion to itself for a
    ///   power-law mixture. All 0 without a density input.
    ///
    /// A feature is NaN where it is not defined (eps' <= 0, eps'' < -f,
    /// psi outside its domain).
    pub fn features(
        &self,
        e: [T; 4],
        t_c: T,
        rho_kg_m3: Option<T>,
    ) -> ([T; MV_FEATURES], [[T; 4]; MV_FEATURES]) {
        let fl = T::c(LOSS_FLOOR);
        let mut x = [T::zero(); MV_FEATURES];
        let mut d = [[T::zero(); 4]; MV_FEATURES];
        x[0] = T::ln(e[0]);
        d[0][0] = T::one() / e[0];
        x[1] = T::ln(e[2]);
        d[1][2] = T::one() / e[2];
        x[2] = T::ln(e[1] + fl);
        d[2][1] = T::one() / (e[1] + fl);
        x[3] = T::ln(e[3] + fl);
        d[3][3] = T::one() / (e[3] + fl);
        x[4] = (t_c - self.t_ref_c) / T::c(10.0);
        let sw = T::sqrt(static_permittivity_mm(t_c)) - T::one();
        x[5] = (T::sqrt(e[2]) - T::one()) / sw;
        d[5][2] = T::c(0.5) / (T::sqrt(e[2]) * sw);
        x[6] = (T::sqrt(e[0]) - T::one()) / sw;
        d[6][0] = T::c(0.5) / (T::sqrt(e[0]) * sw);
        let (psi, dpe, dpl) = tkn_psi(self.a_f, e[2], e[3] + fl);
        x[7] = psi;
        d[7][2] = dpe;
        d[7][3] = dpl;
        for (k, (i, j)) in QUAD.iter().enumerate() {
            x[8 + k] = x[*i] * x[*j];
            for c in 0..4 {
                d[8 + k][c] = x[*i] * d[*j][c] + x[*j] * d[*i][c];
            }
        }
        let dr = self.density_deviation(rho_kg_m3);
        x[23] = dr;
        x[24] = dr * x[0];
        d[24][0] = dr * d[0][0];
        x[25] = dr * x[1];
        d[25][2] = dr * d[1][2];
        (x, d)
    }

    /// Moisture, %, and its gradient w.r.t. `(eps'_1, eps''_1, eps'_2, eps''_2)`,
    /// at bulk density `rho_kg_m3` (used only by a model with a density input).
    pub fn moisture_and_gradient(&self, e: [T; 4], t_c: T, rho_kg_m3: Option<T>) -> (T, [T; 4]) {
        let (x, d) = self.features(e, t_c, rho_kg_m3);
        let mut m = self.intercept;
        let mut g = [T::zero(); 4];
        for k in 0..MV_FEATURES {
            m += self.coeffs[k] * x[k];
            for c in 0..4 {
                g[c] += self.coeffs[k] * d[k][c];
            }
        }
        (m, g)
    }

    /// Moisture, %.
    pub fn moisture_pct(&self, e: [T; 4], t_c: T, rho_kg_m3: Option<T>) -> T {
        self.moisture_and_gradient(e, t_c, rho_kg_m3).0
    }

    /// d moisture / d dr at a reading (dr = rho / rho_ref - 1): how much a
    /// unit relative density error moves the moisture.
    pub fn d_moisture_d_density(&self, e: [T; 4]) -> T {
        self.coeffs[23] + self.coeffs[24] * T::ln(e[0]) + self.coeffs[25] * T::ln(e[2])
    }
}

/// A product model of any kind.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum ProductModel<T> {
    /// Single-frequency baseline.
    SingleFrequency(SingleFrequencyModel<T>),
    /// Relaxation model.
    Relaxation(RelaxationModel<T>),
    /// Multivariate model.
    Multivariate(MultivariateModel<T>),
}

impl<T: Real> ProductModel<T> {
    /// The model's kind.
    pub fn kind(&self) -> ModelKind {
        match self {
            ProductModel::SingleFrequency(_) => ModelKind::SingleFrequency,
            ProductModel::Relaxation(_) => ModelKind::Relaxation,
            ProductModel::Multivariate(_) => ModelKind::Multivariate,
        }
    }

    /// Names (with units) of the inputs whose valid ranges a calibration carries.
    pub fn input_names(&self) -> &'static [&'static str] {
        match self {
            ProductModel::SingleFrequency(_) => &["eps_re"],
            ProductModel::Relaxation(m) if m.density_input => &[
                "eps_hf",
                "d_eps",
                "sigma_s_m",
                "mixing_moisture_pct",
                "bulk_density_kg_m3",
            ],
            ProductModel::Relaxation(_) => &["eps_hf", "d_eps", "sigma_s_m", "mixing_moisture_pct"],
            ProductModel::Multivariate(m) if m.uses_density() => &[
                "eps1_re",
                "eps1_loss",
                "eps2_re",
                "eps2_loss",
                "bulk_density_kg_m3",
            ],
            ProductModel::Multivariate(_) => &["eps1_re", "eps1_loss", "eps2_re", "eps2_loss"],
        }
    }

    /// Flat `f32` parameter layout (see the module docs); returns the array
    /// and the number of values used.
    pub fn to_params(&self) -> ([f32; MAX_PARAMS], usize) {
        let mut out = [0.0f32; MAX_PARAMS];
        let f = |x: T| x.to_f64() as f32;
        out[0] = LAYOUT_VERSION;
        match self {
            ProductModel::SingleFrequency(m) => {
                out[1] = m.freq_index as f32;
                out[2] = f(m.t_ref_c);
                for k in 0..4 {
                    out[3 + k] = f(m.coeffs[k]);
                }
                out[7] = f(m.c_t);
                (out, SINGLE_LEN)
            }
            ProductModel::Relaxation(m) => {
                let v = [
                    m.law.alpha,
                    m.law.fr_ref_hz,
                    m.law.sigma_ref_s_m,
                    m.law.fr_exponent,
                    m.law.fr_temp_coeff_per_c,
                    m.mixture.exponent,
                    m.mixture.eps_dry,
                    m.mixture.particle_density_kg_m3,
                    m.mixture.bulk_density_kg_m3,
                    m.t_ref_c,
                    m.coeffs[0],
                    m.coeffs[1],
                    m.coeffs[2],
                    m.coeffs[3],
                    m.c_t,
                    m.c_sigma,
                    m.c_static[0],
                    m.c_static[1],
                    m.static_hold.min,
                    m.static_hold.max,
                ];
                for (i, x) in v.iter().enumerate() {
                    out[1 + i] = f(*x);
                }
                // Layout 4: layout 3 with the density input; sigma_min 0
                // where the model has no conductivity hold.
                if m.density_input {
                    out[0] = LAYOUT_VERSION_DENSITY_INPUT;
                    let (lo, hi) = if m.has_sigma_hold() {
                        (f(m.sigma_hold.min), f(m.sigma_hold.max))
                    } else {
                        (0.0, NO_SIGMA_HOLD_MAX)
                    };
                    out[21] = lo;
                    out[22] = hi;
                    return (out, RELAXATION_SIGMA_HOLD_LEN);
                }
                // (A hold is a lower end above 0: the upper end of no hold
                // is not the same number in f32 and f64.)
                if m.has_sigma_hold() {
                    out[0] = LAYOUT_VERSION_SIGMA_HOLD;
                    out[21] = f(m.sigma_hold.min);
                    out[22] = f(m.sigma_hold.max);
                    return (out, RELAXATION_SIGMA_HOLD_LEN);
                }
                if !m.uses_static() {
                    out[RELAXATION_LEN..RELAXATION_STATIC_LEN].fill(0.0);
                    return (out, RELAXATION_LEN);
                }
                out[0] = LAYOUT_VERSION_STATIC;
                (out, RELAXATION_STATIC_LEN)
            }
            ProductModel::Multivariate(m) => {
                out[1] = f(m.t_ref_c);
                out[2] = f(m.a_f);
                out[3] = f(m.intercept);
                if !m.uses_density() {
                    for k in 0..MV_BASE_FEATURES {
                        out[4 + k] = f(m.coeffs[k]);
                    }
                    return (out, MULTIVARIATE_LEN);
                }
                out[0] = LAYOUT_VERSION_DENSITY;
                for k in 0..MV_FEATURES {
                    out[4 + k] = f(m.coeffs[k]);
                }
                out[4 + MV_FEATURES] = f(m.rho_ref_kg_m3);
                (out, MULTIVARIATE_DENSITY_LEN)
            }
        }
    }

    /// Parses and validates the flat layout.
    ///
    /// # Errors
    /// [`ParamsError`] naming the offending index.
    pub fn from_params(kind: ModelKind, params: &[f32]) -> Result<Self, ParamsError> {
        // The multivariate model's layout version 2 (with a density input)
        // and the relaxation model's (with the static terms) are longer;
        // every other layout is version 1.
        let density =
            kind == ModelKind::Multivariate && params.first() == Some(&LAYOUT_VERSION_DENSITY);
        let density_input =
            kind == ModelKind::Relaxation && params.first() == Some(&LAYOUT_VERSION_DENSITY_INPUT);
        let sigma_held = density_input
            || kind == ModelKind::Relaxation && params.first() == Some(&LAYOUT_VERSION_SIGMA_HOLD);
        let with_static = sigma_held
            || kind == ModelKind::Relaxation && params.first() == Some(&LAYOUT_VERSION_STATIC);
        let expected = match kind {
            ModelKind::SingleFrequency => SINGLE_LEN,
            ModelKind::Relaxation if sigma_held => RELAXATION_SIGMA_HOLD_LEN,
            ModelKind::Relaxation if with_static => RELAXATION_STATIC_LEN,
            ModelKind::Relaxation => RELAXATION_LEN,
            ModelKind::Multivariate if density => MULTIVARIATE_DENSITY_LEN,
            ModelKind::Multivariate => MULTIVARIATE_LEN,
        };
        if params.len() != expected {
            return Err(ParamsError::WrongLength {
                expected,
                got: params.len(),
            });
        }
        if let Some(index) = params.iter().position(|x| !x.is_finite()) {
            return Err(ParamsError::NonFinite { index });
        }
        if params[0] != LAYOUT_VERSION && !density && !with_static {
            return Err(ParamsError::UnknownVersion);
        }
        let g = |i: usize| T::c(params[i] as f64);
        let bad = |index, reason| Err(ParamsError::Invalid { index, reason });
        match kind {
            ModelKind::SingleFrequency => {
                let idx = params[1];
                if idx != 0.0 && idx != 1.0 {
                    return bad(1, "frequency index must be 0 or 1");
                }
                Ok(ProductModel::SingleFrequency(SingleFrequencyModel {
                    freq_index: idx as usize,
                    t_ref_c: g(2),
                    coeffs: [g(3), g(4), g(5), g(6)],
                    c_t: g(7),
                }))
            }
            ModelKind::Relaxation => {
                let p = params;
                if !(p[1] >= 0.0 && p[1] < 1.0) {
                    return bad(1, "alpha must be in [0, 1)");
                }
                if !(p[2] > 0.0) {
                    return bad(2, "fr_ref_hz must be > 0");
                }
                if !(p[3] > 0.0) {
                    return bad(3, "sigma_ref_s_m must be > 0");
                }
                if !(p[4] >= 0.0 && p[4] <= 3.0) {
                    return bad(4, "fr_exponent must be in [0, 3]");
                }
                if !(p[6] >= 0.0 && p[6] <= 1.0) {
                    return bad(6, "mixing exponent must be in [0, 1]");
                }
                if !(p[7] >= 1.0) {
                    return bad(7, "eps_dry must be >= 1");
                }
                if !(p[8] > 0.0) {
                    return bad(8, "particle density must be > 0 kg/m^3");
                }
                if !(p[8] <= 5000.0) {
                    return bad(8, "particle density must be at most 5000 kg/m^3");
                }
                if !(p[9] > 0.0 && p[9] < p[8]) {
                    return bad(9, "bulk density must be > 0 and below the particle density");
                }
                let (c_static, static_hold) = if with_static {
                    if !(p[19] <= p[20]) {
                        return bad(19, "the static terms' hold must satisfy h_min <= h_max");
                    }
                    ([g(17), g(18)], Range::new(g(19), g(20)))
                } else {
                    ([T::zero(); 2], no_static_hold())
                };
                let sigma_hold = if density_input {
                    if !(p[21] >= 0.0 && p[21] <= p[22]) {
                        return bad(
                            21,
                            "the conductivity hold must satisfy 0 <= sigma_min <= sigma_max",
                        );
                    }
                    if p[21] > 0.0 {
                        Range::new(g(21), g(22))
                    } else {
                        no_sigma_hold()
                    }
                } else if sigma_held {
                    if !(p[21] > 0.0 && p[21] <= p[22]) {
                        return bad(
                            21,
                            "the conductivity hold must satisfy 0 < sigma_min <= sigma_max",
                        );
                    }
                    Range::new(g(21), g(22))
                } else {
                    no_sigma_hold()
                };
                Ok(ProductModel::Relaxation(RelaxationModel {
                    law: RelaxationLaw {
                        alpha: g(1),
                        fr_ref_hz: g(2),
                        sigma_ref_s_m: g(3),
                        fr_exponent: g(4),
                        fr_temp_coeff_per_c: g(5),
                        t_ref_c: g(10),
                    },
                    mixture: ProductMixture {
                        exponent: g(6),
                        eps_dry: g(7),
                        particle_density_kg_m3: g(8),
                        bulk_density_kg_m3: g(9),
                    },
                    t_ref_c: g(10),
                    coeffs: [g(11), g(12), g(13), g(14)],
                    c_t: g(15),
                    c_sigma: g(16),
                    c_static,
                    static_hold,
                    sigma_hold,
                    density_input,
                }))
            }
            ModelKind::Multivariate => {
                if !(params[2] > 0.0) {
                    return bad(2, "a_f must be > 0");
                }
                let n = if density {
                    MV_FEATURES
                } else {
                    MV_BASE_FEATURES
                };
                let mut coeffs = [T::zero(); MV_FEATURES];
                for (k, c) in coeffs.iter_mut().take(n).enumerate() {
                    *c = g(4 + k);
                }
                let rho_ref = if density {
                    let i = 4 + MV_FEATURES;
                    let (lo, hi) = DENSITY_LIMITS_KG_M3;
                    if !(params[i] >= lo as f32 && params[i] <= hi as f32) {
                        return bad(i, "rho_ref_kg_m3 must be 10-5000 kg/m^3");
                    }
                    g(i)
                } else {
                    T::zero()
                };
                Ok(ProductModel::Multivariate(MultivariateModel {
                    t_ref_c: g(1),
                    a_f: g(2),
                    intercept: g(3),
                    coeffs,
                    rho_ref_kg_m3: rho_ref,
                }))
            }
        }
    }

    /// The model whose moisture is `a + b m` where this one gives `m` (a
    /// bias and slope correction): every model is linear in its
    /// coefficients, so the correction is exact.
    pub fn rescaled(&self, a: T, b: T) -> Self {
        let mut m = *self;
        match &mut m {
            ProductModel::SingleFrequency(s) => {
                s.coeffs = s.coeffs.map(|c| c * b);
                s.coeffs[0] += a;
                s.c_t *= b;
            }
            ProductModel::Relaxation(r) => {
                r.coeffs = r.coeffs.map(|c| c * b);
                r.coeffs[0] += a;
                r.c_t *= b;
                r.c_sigma *= b;
                r.c_static = r.c_static.map(|c| c * b);
            }
            ProductModel::Multivariate(v) => {
                v.coeffs = v.coeffs.map(|c| c * b);
                v.intercept = a + b * v.intercept;
            }
        }
        m
    }

    /// The same model in another scalar type.
    pub fn cast<U: Real>(&self) -> ProductModel<U> {
        match self {
            ProductModel::SingleFrequency(m) => {
                ProductModel::SingleFrequency(SingleFrequencyModel {
                    freq_index: m.freq_index,
                    t_ref_c: U::cast(m.t_ref_c),
                    coeffs: m.coeffs.map(U::cast),
                    c_t: U::cast(m.c_t),
                })
            }
            ProductModel::Relaxation(m) => ProductModel::Relaxation(RelaxationModel {
                law: RelaxationLaw {
                    alpha: U::cast(m.law.alpha),
                    fr_ref_hz: U::cast(m.law.fr_ref_hz),
                    sigma_ref_s_m: U::cast(m.law.sigma_ref_s_m),
                    fr_exponent: U::cast(m.law.fr_exponent),
                    fr_temp_coeff_per_c: U::cast(m.law.fr_temp_coeff_per_c),
                    t_ref_c: U::cast(m.law.t_ref_c),
                },
                mixture: ProductMixture {
                    exponent: U::cast(m.mixture.exponent),
                    eps_dry: U::cast(m.mixture.eps_dry),
                    particle_density_kg_m3: U::cast(m.mixture.particle_density_kg_m3),
                    bulk_density_kg_m3: U::cast(m.mixture.bulk_density_kg_m3),
                },
                t_ref_c: U::cast(m.t_ref_c),
                coeffs: m.coeffs.map(U::cast),
                c_t: U::cast(m.c_t),
                c_sigma: U::cast(m.c_sigma),
                c_static: m.c_static.map(U::cast),
                static_hold: m.static_hold.cast(),
                sigma_hold: m.sigma_hold.cast(),
                density_input: m.density_input,
            }),
            ProductModel::Multivariate(m) => ProductModel::Multivariate(MultivariateModel {
                t_ref_c: U::cast(m.t_ref_c),
                a_f: U::cast(m.a_f),
                intercept: U::cast(m.intercept),
                coeffs: m.coeffs.map(U::cast),
                rho_ref_kg_m3: U::cast(m.rho_ref_kg_m3),
            }),
        }
    }
}

/// A product calibration: model, valid ranges, SEC and basis.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ProductCalibration<T> {
    /// The model.
    pub model: ProductModel<T>,
    /// Basis of the moisture the model returns.
    pub basis: Basis,
    /// Valid moisture range, %.
    pub moisture_pct: Range<T>,
    /// Valid temperature range, C.
    pub temperature_c: Range<T>,
    /// Valid range of each input in [`ProductModel::input_names`] order
    /// (entries past the model's input count are unused).
    pub inputs: [Range<T>; MAX_INPUTS],
    /// Standard error of calibration, % moisture.
    pub sec_pct: T,
}

impl<T: Real> ProductCalibration<T> {
    /// Builds and validates a calibration from its wire parts
    /// (`fringe_protocol::ProductCal` fields).
    ///
    /// # Errors
    /// [`ParamsError`].
    pub fn from_parts(
        kind: ModelKind,
        params: &[f32],
        basis: Basis,
        moisture_pct: Range<f32>,
        temperature_c: Range<f32>,
        inputs: &[Range<f32>],
        sec_pct: f32,
    ) -> Result<Self, ParamsError> {
        let model = ProductModel::<T>::from_params(kind, params)?;
        let n = model.input_names().len();
        if inputs.len() != n {
            return Err(ParamsError::WrongInputCount {
                expected: n,
                got: inputs.len(),
            });
        }
        for (index, r) in [moisture_pct, temperature_c]
            .iter()
            .chain(inputs.iter())
            .enumerate()
        {
            if !r.valid() {
                return Err(ParamsError::BadRange { index });
            }
        }
        if !(sec_pct.is_finite() && sec_pct >= 0.0) {
            return Err(ParamsError::BadSec);
        }
        let mut ins = [Range::new(T::zero(), T::zero()); MAX_INPUTS];
        for (d, s) in ins.iter_mut().zip(inputs) {
            *d = s.cast();
        }
        Ok(ProductCalibration {
            model,
            basis,
            moisture_pct: moisture_pct.cast(),
            temperature_c: temperature_c.cast(),
            inputs: ins,
            sec_pct: T::cast(sec_pct),
        })
    }

    /// The valid input ranges in use.
    pub fn input_ranges(&self) -> &[Range<T>] {
        let n = self.model.input_names().len();
        &self.inputs[..n]
    }

    /// The same calibration in another scalar type.
    pub fn cast<U: Real>(&self) -> ProductCalibration<U> {
        ProductCalibration {
            model: self.model.cast(),
            basis: self.basis,
            moisture_pct: self.moisture_pct.cast(),
            temperature_c: self.temperature_c.cast(),
            inputs: self.inputs.map(|r| r.cast()),
            sec_pct: U::cast(self.sec_pct),
        }
    }
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;

    pub(crate) fn relaxation_model() -> RelaxationModel<f64> {
        RelaxationModel {
            law: RelaxationLaw {
                alpha: 0.2,
                fr_ref_hz: 5e6,
                sigma_ref_s_m: 1e-3,
                fr_exponent: 1.0,
                fr_temp_coeff_per_c: 0.0,
                t_ref_c: 25.0,
            },
            mixture: ProductMixture {
                exponent: 0.5,
                eps_dry: 3.0,
                particle_density_kg_m3: 1400.0,
                bulk_density_kg_m3: 760.0,
            },
            t_ref_c: 25.0,
            coeffs: [0.2, 0.98, 0.001, 0.0],
            c_t: 0.01,
            c_sigma: -0.05,
            c_static: [0.0; 2],
            static_hold: no_static_hold(),
            sigma_hold: no_sigma_hold(),
            density_input: false,
        }
    }

    fn static_model() -> RelaxationModel<f64> {
        RelaxationModel {
            c_static: [0.3, -0.004],
            static_hold: Range::new(5.0, 40.0),
            sigma_hold: no_sigma_hold(),
            ..relaxation_model()
        }
    }

    #[test]
    fn the_static_terms_round_trip_in_layout_2_and_are_validated() {
        let m = ProductModel::Relaxation(static_model());
        let (mut p, n) = m.to_params();
        assert_eq!(n, RELAXATION_STATIC_LEN);
        assert_eq!(p[0], 2.0);
        let back = ProductModel::<f64>::from_params(ModelKind::Relaxation, &p[..n]).unwrap();
        let ProductModel::Relaxation(b) = back else {
            panic!("kind")
        };
        assert!((b.c_static[0] - 0.3).abs() < 1e-6 && (b.c_static[1] + 0.004).abs() < 1e-8);
        assert_eq!(b.static_hold, Range::new(5.0, 40.0));
        // Without the static terms the model keeps layout 1.
        let (p1, n1) = ProductModel::Relaxation(relaxation_model()).to_params();
        assert_eq!((n1, p1[0]), (RELAXATION_LEN, 1.0));
        // The device's f32 model carries the same terms.
        let ProductModel::Relaxation(b32) =
            ProductModel::<f32>::from_params(ModelKind::Relaxation, &p[..n]).unwrap()
        else {
            panic!("kind")
        };
        assert_eq!(b32.c_static, [0.3f32, -0.004]);
        assert_eq!(b32.static_hold, Range::new(5.0f32, 40.0));
        // An inverted hold names index 19 (a hold below 0 % is valid: h is
        // a regression feature).
        p[19] = 30.0;
        p[20] = 20.0;
        assert!(matches!(
            ProductModel::<f32>::from_params(ModelKind::Relaxation, &p[..n]),
            Err(ParamsError::Invalid { index: 19, .. })
        ));
        p[19] = -3.0;
        assert!(ProductModel::<f32>::from_params(ModelKind::Relaxation, &p[..n]).is_ok());
        // A scaled model scales the static terms too.
        let ProductModel::Relaxation(r) = m.rescaled(0.5, 2.0) else {
            panic!("kind")
        };
        assert_eq!(r.c_static, [0.6, -0.008]);
    }

    #[test]
    fn the_static_terms_gradient_matches_differences_and_stops_at_the_hold() {
        let m = static_model();
        let t = 21.0;
        let moist = |e: f64, d: f64| {
            m.moisture_pct(
                &MaterialParams {
                    eps_hf: e,
                    d_eps: d,
                    sigma_s_m: 2e-3,
                },
                t,
            )
        };
        // Inside the hold (h about 17 %) and beyond it (h above 40 %).
        for (e, d, inside) in [(5.0, 6.0, true), (5.0, 60.0, false)] {
            let p = MaterialParams {
                eps_hf: e,
                d_eps: d,
                sigma_s_m: 2e-3,
            };
            assert_eq!(
                m.held_static_pct(&p, t).1,
                inside,
                "h {}",
                m.static_moisture_pct(&p, t)
            );
            let g = m.gradient(&p, t);
            let h = 1e-5;
            let ge = (moist(e + h, d) - moist(e - h, d)) / (2.0 * h);
            let gd = (moist(e, d + h) - moist(e, d - h)) / (2.0 * h);
            assert!(
                (g[0] - ge).abs() < 1e-5 * ge.abs().max(1.0),
                "{} {ge}",
                g[0]
            );
            assert!(
                (g[1] - gd).abs() < 1e-5 * gd.abs().max(1.0),
                "{} {gd}",
                g[1]
            );
            assert_eq!(g[1] == 0.0, !inside);
        }
    }

    /// A layout-1 or layout-2 calibration as the device parses it (f32),
    /// cast back to f64 (what `cal adjust` does before rescaling), keeps
    /// its layout: the f32 sentinel of no hold is not taken for a hold.
    #[test]
    fn layouts_1_and_2_keep_their_layout_through_f32_and_back() {
        for (m, n) in [
            (relaxation_model(), RELAXATION_LEN),
            (static_model(), RELAXATION_STATIC_LEN),
        ] {
            let (p, k) = ProductModel::Relaxation(m).to_params();
            assert_eq!(k, n);
            let dev = ProductModel::<f32>::from_params(ModelKind::Relaxation, &p[..k]).unwrap();
            let back = dev.cast::<f64>().rescaled(0.1, 1.01);
            let (q, k2) = back.to_params();
            assert_eq!((k2, q[0]), (n, p[0]));
            assert!(ProductModel::<f64>::from_params(ModelKind::Relaxation, &q[..k2]).is_ok());
        }
    }

    /// The density input (layout 4): it round-trips with and without a
    /// conductivity hold (sigma_min 0 for none; a negative one names
    /// index 21), the model gains the density as its fifth input, and
    /// its mixing model follows the density it is given: the same
    /// parameters read denser give a lower mixing-model moisture (more
    /// solid in the same volume), as the mixing model itself says.
    #[test]
    fn the_density_input_round_trips_in_layout_4() {
        for hold in [Range::new(1e-4, 20.0), no_sigma_hold::<f64>()] {
            let m = RelaxationModel {
                sigma_hold: hold,
                density_input: true,
                ..static_model()
            };
            let (mut p, n) = ProductModel::Relaxation(m).to_params();
            assert_eq!((n, p[0]), (RELAXATION_SIGMA_HOLD_LEN, 4.0));
            let back = ProductModel::<f64>::from_params(ModelKind::Relaxation, &p[..n]).unwrap();
            // Every value as written, the hold's included.
            let (again, k) = back.to_params();
            assert_eq!(&again[..k], &p[..n]);
            let ProductModel::Relaxation(b) = back else {
                panic!("kind")
            };
            assert!(b.density_input);
            assert_eq!(b.has_sigma_hold(), hold.min > 0.0);
            assert_eq!(back.input_names().len(), 5);
            assert_eq!(back.input_names()[4], "bulk_density_kg_m3");
            // Through f32 and back (what `cal adjust` does) it stays layout 4.
            let dev = ProductModel::<f32>::from_params(ModelKind::Relaxation, &p[..n]).unwrap();
            let (q, k) = dev.cast::<f64>().rescaled(0.1, 1.01).to_params();
            assert_eq!((k, q[0]), (n, 4.0));
            p[21] = -1e-4;
            assert!(matches!(
                ProductModel::<f32>::from_params(ModelKind::Relaxation, &p[..n]),
                Err(ParamsError::Invalid { index: 21, .. })
            ));
            let t = 21.0;
            let (lo, hi) = (
                b.at_density(0.9 * b.mixture.bulk_density_kg_m3)
                    .mixing_moisture_pct(6.0, t),
                b.at_density(1.1 * b.mixture.bulk_density_kg_m3)
                    .mixing_moisture_pct(6.0, t),
            );
            assert!(lo > b.mixing_moisture_pct(6.0, t) && b.mixing_moisture_pct(6.0, t) > hi);
        }
    }

    /// The conductivity hold (layout 3): sigma below the hold counts as
    /// the hold's lower end, with no gradient there; inside it, as before.
    #[test]
    fn the_conductivity_hold_round_trips_in_layout_3_and_stops_the_term() {
        for base in [relaxation_model(), static_model()] {
            let m = RelaxationModel {
                sigma_hold: Range::new(1e-4, no_sigma_hold::<f64>().max),
                ..base
            };
            let (mut p, n) = ProductModel::Relaxation(m).to_params();
            assert_eq!((n, p[0]), (RELAXATION_SIGMA_HOLD_LEN, 3.0));
            let ProductModel::Relaxation(b) =
                ProductModel::<f32>::from_params(ModelKind::Relaxation, &p[..n]).unwrap()
            else {
                panic!("kind")
            };
            assert_eq!(b.sigma_hold.min, 1e-4f32);
            assert_eq!(b.c_static, m.c_static.map(|c| c as f32));
            assert_eq!(b.uses_static(), base.uses_static());
            // An inverted or non-positive hold names index 21.
            for (lo, hi) in [(1e-3, 1e-4), (0.0, 1.0)] {
                p[21] = lo;
                p[22] = hi;
                assert!(
                    matches!(
                        ProductModel::<f32>::from_params(ModelKind::Relaxation, &p[..n]),
                        Err(ParamsError::Invalid { index: 21, .. })
                    ),
                    "{lo} {hi}"
                );
            }
            let at = |s: f64| MaterialParams {
                eps_hf: 5.0,
                d_eps: 6.0,
                sigma_s_m: s,
            };
            let t = 21.0;
            // Below the hold the moisture stands still and its gradient
            // in sigma is 0; inside it matches a difference.
            assert_eq!(m.moisture_pct(&at(1e-6), t), m.moisture_pct(&at(1e-4), t));
            assert_eq!(m.gradient(&at(1e-6), t)[2], 0.0);
            let s = 2e-3;
            let d = (m.moisture_pct(&at(s * 1.001), t) - m.moisture_pct(&at(s / 1.001), t))
                / (s * 1.001 - s / 1.001);
            let g = m.gradient(&at(s), t)[2];
            assert!((g - d).abs() < 1e-4 * d.abs(), "{g} {d}");
            // Without a hold the term goes on below 1e-4 S/m.
            assert!(base.moisture_pct(&at(1e-6), t) != base.moisture_pct(&at(1e-4), t));
        }
    }

    #[test]
    fn params_round_trip_both_kinds() {
        let s = ProductModel::SingleFrequency(SingleFrequencyModel {
            freq_index: 1,
            t_ref_c: 20.0f64,
            coeffs: [-3.0, 2.5, -0.04, 0.0005],
            c_t: 0.02,
        });
        let r = ProductModel::Relaxation(relaxation_model());
        for m in [s, r] {
            let (p, n) = m.to_params();
            assert!(n <= MAX_PARAMS);
            let back = ProductModel::<f64>::from_params(m.kind(), &p[..n]).unwrap();
            let (p2, n2) = back.to_params();
            assert_eq!(&p[..n], &p2[..n2]);
            // f32 rounding only.
            let (q, _) = back.cast::<f32>().to_params();
            assert_eq!(&p[..n], &q[..n]);
        }
    }

    #[test]
    fn params_validation_names_the_index() {
        let (mut p, n) = ProductModel::Relaxation(relaxation_model()).to_params();
        assert_eq!(
            ProductModel::<f32>::from_params(ModelKind::Relaxation, &p[..n - 1]),
            Err(ParamsError::WrongLength {
                expected: 17,
                got: 16
            })
        );
        p[5] = f32::NAN;
        assert_eq!(
            ProductModel::<f32>::from_params(ModelKind::Relaxation, &p[..n]),
            Err(ParamsError::NonFinite { index: 5 })
        );
        p[5] = 0.0;
        p[9] = 2000.0;
        assert!(matches!(
            ProductModel::<f32>::from_params(ModelKind::Relaxation, &p[..n]),
            Err(ParamsError::Invalid { index: 9, .. })
        ));
        p[9] = 760.0;
        // Version 2 is the longer layout with the static terms.
        p[0] = 2.0;
        assert_eq!(
            ProductModel::<f32>::from_params(ModelKind::Relaxation, &p[..n]),
            Err(ParamsError::WrongLength {
                expected: 21,
                got: 17
            })
        );
        // Version 3 is the longer still with the conductivity hold.
        p[0] = 3.0;
        assert_eq!(
            ProductModel::<f32>::from_params(ModelKind::Relaxation, &p[..n]),
            Err(ParamsError::WrongLength {
                expected: 23,
                got: 17
            })
        );
        // Version 4 (the density input) has layout 3's length.
        p[0] = 4.0;
        assert_eq!(
            ProductModel::<f32>::from_params(ModelKind::Relaxation, &p[..n]),
            Err(ParamsError::WrongLength {
                expected: 23,
                got: 17
            })
        );
        p[0] = 5.0;
        assert_eq!(
            ProductModel::<f32>::from_params(ModelKind::Relaxation, &p[..n]),
            Err(ParamsError::UnknownVersion)
        );
        p[0] = 1.0;
        p[1] = 1.0;
        assert!(matches!(
            ProductModel::<f32>::from_params(ModelKind::Relaxation, &p[..n]),
            Err(ParamsError::Invalid { index: 1, .. })
        ));
        let e = ParamsError::Invalid {
            index: 1,
            reason: "alpha must be in [0, 1)",
        };
        assert_eq!(
            e.to_string(),
            "calibration params[1]: alpha must be in [0, 1)"
        );
    }

    #[test]
    fn from_parts_checks_ranges_and_sec() {
        let (p, n) = ProductModel::Relaxation(relaxation_model()).to_params();
        let r = |a, b| Range::new(a, b);
        let ins = [r(1.5, 40.0), r(0.0, 500.0), r(1e-5, 0.5), r(0.0, 40.0)];
        let ok = ProductCalibration::<f32>::from_parts(
            ModelKind::Relaxation,
            &p[..n],
            Basis::Wet,
            r(5.0, 30.0),
            r(0.0, 50.0),
            &ins,
            0.3,
        )
        .unwrap();
        assert_eq!(ok.input_ranges().len(), 4);
        let e = ProductCalibration::<f32>::from_parts(
            ModelKind::Relaxation,
            &p[..n],
            Basis::Wet,
            r(5.0, 30.0),
            r(0.0, 50.0),
            &ins[..3],
            0.3,
        );
        assert_eq!(
            e,
            Err(ParamsError::WrongInputCount {
                expected: 4,
                got: 3
            })
        );
        let e = ProductCalibration::<f32>::from_parts(
            ModelKind::Relaxation,
            &p[..n],
            Basis::Wet,
            r(30.0, 5.0),
            r(0.0, 50.0),
            &ins,
            0.3,
        );
        assert_eq!(e, Err(ParamsError::BadRange { index: 0 }));
        let e = ProductCalibration::<f32>::from_parts(
            ModelKind::Relaxation,
            &p[..n],
            Basis::Wet,
            r(5.0, 30.0),
            r(0.0, 50.0),
            &ins,
            -1.0,
        );
        assert_eq!(e, Err(ParamsError::BadSec));
    }

    #[test]
    fn relaxation_gradient_matches_finite_differences() {
        let m = relaxation_model();
        let p = MaterialParams {
            eps_hf: 5.5,
            d_eps: 20.0,
            sigma_s_m: 2e-3,
        };
        let g = m.gradient(&p, 22.0);
        let h = 1e-6;
        let fd0 = (m.moisture_pct(
            &MaterialParams {
                eps_hf: 5.5 + h,
                ..p
            },
            22.0,
        ) - m.moisture_pct(
            &MaterialParams {
                eps_hf: 5.5 - h,
                ..p
            },
            22.0,
        )) / (2.0 * h);
        let hs = 1e-9;
        let fd2 = (m.moisture_pct(
            &MaterialParams {
                sigma_s_m: 2e-3 + hs,
                ..p
            },
            22.0,
        ) - m.moisture_pct(
            &MaterialParams {
                sigma_s_m: 2e-3 - hs,
                ..p
            },
            22.0,
        )) / (2.0 * hs);
        assert!((g[0] - fd0).abs() < 1e-5 * fd0.abs());
        assert!((g[2] - fd2).abs() < 1e-4 * fd2.abs());
        // Linear in the features.
        let f = m.features(&p, 22.0);
        let c = [
            m.coeffs[0],
            m.coeffs[1],
            m.coeffs[2],
            m.coeffs[3],
            m.c_t,
            m.c_sigma,
        ];
        let dot: f64 = f.iter().zip(c).map(|(a, b)| a * b).sum();
        assert!((dot - m.moisture_pct(&p, 22.0)).abs() < 1e-12);
    }
}
