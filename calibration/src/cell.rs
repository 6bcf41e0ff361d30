//! Sensor cell: admittance <-> complex permittivity, the two-point bench
//! calibration and the third-liquid verification.
//!
//! Cell model at one frequency (docs/DESIGN.md, `fringe_protocol::CellPoint`):
//!
//! ```text
//! Y = j w Cp + j w C0 eps* + G0,   eps* = eps' - j eps''
//!   => G = G0 + w C0 eps'',   B = w (Cp + C0 eps')
//! ```
//!
//! Cp (stray, pF) is the capacitance that does not pass through the product,
//! C0 (cell constant, pF) the empty-cell capacitance through it, G0 (S) a
//! residual conductance of the front end. Admittance in siemens, frequency in Hz.

use crate::dielectric::omega;
use crate::real::{Cx, Real};
use crate::water::ReferenceLiquid;
use core::fmt;

const PF: f64 = 1e-12;

/// Cell constants at one frequency.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct CellConstants<T> {
    /// Stray (parallel) capacitance Cp, pF.
    pub stray_pf: T,
    /// Cell constant as the empty-cell capacitance C0, pF (> 0).
    pub cell_pf: T,
    /// Residual conductance offset G0, S.
    pub g_offset_s: T,
}

/// Why a cell computation was refused.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum CellError {
    /// The cell constant C0 is zero, negative or not finite.
    BadCellConstant,
    /// The frequency is zero, negative or not finite.
    BadFrequency,
    /// An admittance or permittivity value is not finite.
    NonFinite,
    /// The two calibration media have (nearly) the same permittivity, or the
    /// liquid's susceptance is not above the air's: C0 cannot be solved.
    DegenerateCalibration,
    /// The reference liquid's temperature is outside its table's range.
    LiquidTemperature,
}

impl fmt::Display for CellError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            CellError::BadCellConstant => "cell constant C0 must be a positive finite capacitance (pF)",
            CellError::BadFrequency => "frequency must be positive and finite (Hz)",
            CellError::NonFinite => "admittance or permittivity is not finite",
            CellError::LiquidTemperature => "reference liquid temperature outside the range of its table (C)",
            CellError::DegenerateCalibration => {
                "calibration media too close in permittivity (or liquid susceptance not above air): C0 undetermined"
            }
        })
    }
}

impl core::error::Error for CellError {}

fn check_freq<T: Real>(freq_hz: T) -> Result<T, CellError> {
    if freq_hz.is_finite() && freq_hz > T::zero() {
        Ok(omega(freq_hz))
    } else {
        Err(CellError::BadFrequency)
    }
}

/// Complex permittivity from the cell admittance `y = G + jB` (S).
///
/// # Errors
/// [`CellError::BadCellConstant`], [`CellError::BadFrequency`], [`CellError::NonFinite`].
pub fn admittance_to_permittivity<T: Real>(
    freq_hz: T,
    y_s: Cx<T>,
    cell: &CellConstants<T>,
) -> Result<Cx<T>, CellError> {
    let w = check_freq(freq_hz)?;
    if !(cell.cell_pf.is_finite() && cell.cell_pf > T::zero()) {
        return Err(CellError::BadCellConstant);
    }
    if !(y_s.re.is_finite() && y_s.im.is_finite()) {
        return Err(CellError::NonFinite);
    }
    let c0 = cell.cell_pf * T::c(PF);
    let eps_re = (y_s.im / w - cell.stray_pf * T::c(PF)) / c0;
    let eps_loss = (y_s.re - cell.g_offset_s) / (w * c0);
    Ok(Cx::new(eps_re, -eps_loss))
}

/// Cell admittance `G + jB` (S) for a material of permittivity `eps` (inverse
/// of [`admittance_to_permittivity`]).
///
/// # Errors
/// [`CellError::BadFrequency`].
pub fn permittivity_to_admittance<T: Real>(
    freq_hz: T,
    eps: Cx<T>,
    cell: &CellConstants<T>,
) -> Result<Cx<T>, CellError> {
    let w = check_freq(freq_hz)?;
    let c0 = cell.cell_pf * T::c(PF);
    let g = cell.g_offset_s + w * c0 * (-eps.im);
    let b = w * (cell.stray_pf * T::c(PF) + c0 * eps.re);
    Ok(Cx::new(g, b))
}

/// Two-point calibration at one frequency from the admittance with air and
/// with a reference liquid, given their permittivities (eps' at the measured
/// temperature; see [`crate::water::ReferenceLiquid::permittivity`]).
///
/// C0 = (B_liq - B_air) / (w (eps_liq - eps_air)), Cp = B_air / w - C0 eps_air,
/// G0 = G_air (air is lossless).
///
/// # Errors
/// [`CellError::DegenerateCalibration`] when the media differ by less than
/// 0.1 in permittivity or the liquid does not raise the susceptance;
/// [`CellError::BadFrequency`]; [`CellError::NonFinite`].
pub fn two_point_calibration<T: Real>(
    freq_hz: T,
    y_air_s: Cx<T>,
    eps_air: T,
    y_liquid_s: Cx<T>,
    eps_liquid: T,
) -> Result<CellConstants<T>, CellError> {
    let w = check_freq(freq_hz)?;
    for v in [
        y_air_s.re,
        y_air_s.im,
        y_liquid_s.re,
        y_liquid_s.im,
        eps_air,
        eps_liquid,
    ] {
        if !v.is_finite() {
            return Err(CellError::NonFinite);
        }
    }
    let d_eps = eps_liquid - eps_air;
    let d_b = y_liquid_s.im - y_air_s.im;
    if T::abs(d_eps) < T::c(0.1) || !(d_b / d_eps > T::zero()) {
        return Err(CellError::DegenerateCalibration);
    }
    let c0 = d_b / (w * d_eps);
    let cp = y_air_s.im / w - c0 * eps_air;
    Ok(CellConstants {
        stray_pf: cp / T::c(PF),
        cell_pf: c0 / T::c(PF),
        g_offset_s: y_air_s.re,
    })
}

/// Two-point calibration with air at `t_air_c` and a tabulated reference
/// liquid at its measured temperature `t_liquid_c` (their permittivities from
/// [`ReferenceLiquid::permittivity`]; air's loss and the liquid's loss at these
/// frequencies are not used).
///
/// # Errors
/// As [`two_point_calibration`]; [`CellError::LiquidTemperature`] when
/// `t_liquid_c` is outside the range the liquid's table holds for.
pub fn two_point_with_liquid<T: Real>(
    freq_hz: T,
    y_air_s: Cx<T>,
    t_air_c: T,
    y_liquid_s: Cx<T>,
    liquid: &ReferenceLiquid,
    t_liquid_c: T,
) -> Result<CellConstants<T>, CellError> {
    if !liquid.valid_at(t_liquid_c.to_f64()) {
        return Err(CellError::LiquidTemperature);
    }
    let air = ReferenceLiquid::by_name("air").map_or(T::c(1.000537), |a| a.permittivity(t_air_c));
    two_point_calibration(
        freq_hz,
        y_air_s,
        air,
        y_liquid_s,
        liquid.permittivity(t_liquid_c),
    )
}

/// Result of checking a calibrated cell against a third liquid.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Verification<T> {
    /// Permittivity the cell reports for the liquid.
    pub measured: Cx<T>,
    /// Expected eps' of the liquid at its temperature.
    pub expected_re: T,
    /// measured eps' - expected eps'.
    pub error_re: T,
    /// error_re / expected_re.
    pub relative_error: T,
    /// Whether |error_re| is within the liquid's stated tolerance.
    pub within_tolerance: bool,
}

/// Verifies a cell calibration with a third liquid of known eps' (`expected_re`,
/// absolute tolerance `tolerance`).
///
/// # Errors
/// As [`admittance_to_permittivity`].
pub fn verify<T: Real>(
    freq_hz: T,
    y_s: Cx<T>,
    cell: &CellConstants<T>,
    expected_re: T,
    tolerance: T,
) -> Result<Verification<T>, CellError> {
    let measured = admittance_to_permittivity(freq_hz, y_s, cell)?;
    let error_re = measured.re - expected_re;
    Ok(Verification {
        measured,
        expected_re,
        error_re,
        relative_error: error_re / expected_re,
        within_tolerance: T::abs(error_re) <= tolerance,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::water::REFERENCE_LIQUIDS;

    const CELL: CellConstants<f64> = CellConstants {
        stray_pf: 2.7,
        cell_pf: 3.4424,
        g_offset_s: 1.5e-7,
    };

    #[test]
    fn admittance_round_trip() {
        for &f in &[1e6, 20e6] {
            let eps = Cx::new(12.5, -40.0);
            let y = permittivity_to_admittance(f, eps, &CELL).unwrap();
            let back = admittance_to_permittivity(f, y, &CELL).unwrap();
            assert!((back - eps).norm() < 1e-9);
            // Y = j w Cp + j w C0 eps* + G0 written out (docs/DESIGN.md cell model).
            let w = 2.0 * core::f64::consts::PI * f;
            let j = Cx::new(0.0, 1.0);
            let direct = j * w * 2.7e-12 + j * w * 3.4424e-12 * eps + Cx::new(1.5e-7, 0.0);
            assert!((direct - y).norm() < 1e-15);
        }
        let bad = CellConstants {
            cell_pf: 0.0,
            ..CELL
        };
        assert_eq!(
            admittance_to_permittivity(1e6, Cx::new(0.0, 1e-6), &bad),
            Err(CellError::BadCellConstant)
        );
        assert_eq!(
            admittance_to_permittivity(0.0, Cx::new(0.0, 1e-6), &CELL),
            Err(CellError::BadFrequency)
        );
        assert_eq!(
            admittance_to_permittivity(1e6, Cx::new(f64::NAN, 1e-6), &CELL),
            Err(CellError::NonFinite)
        );
    }

    #[test]
    fn two_point_calibration_then_third_liquid() {
        // Air (ITU-R P.453, 1.000537 at 20 C) and ethanol at 22.4 C (Gregory and
        // Clarke 2012) calibrate; methanol at 22.4 C verifies.
        let f = 20e6;
        let t = 22.4;
        let air = ReferenceLiquid::by_name("air").unwrap().permittivity(t);
        let eth = ReferenceLiquid::by_name("ethanol").unwrap().permittivity(t);
        let met = ReferenceLiquid::by_name("methanol").unwrap();
        let y_air = permittivity_to_admittance(f, Cx::new(air, 0.0), &CELL).unwrap();
        let y_eth = permittivity_to_admittance(f, Cx::new(eth, -0.02), &CELL).unwrap();
        let cal = two_point_calibration(f, y_air, air, y_eth, eth).unwrap();
        assert!((cal.stray_pf - CELL.stray_pf).abs() < 1e-9);
        assert!((cal.cell_pf - CELL.cell_pf).abs() < 1e-9);
        assert!((cal.g_offset_s - CELL.g_offset_s).abs() < 1e-15);
        // A methanol sample whose true eps' is 0.5 % above the table value.
        let truth = met.permittivity(t) * 1.005;
        let y_met = permittivity_to_admittance(f, Cx::new(truth, -0.1), &CELL).unwrap();
        let v = verify(f, y_met, &cal, met.permittivity(t), met.tolerance).unwrap();
        assert!(
            (v.relative_error - 0.005).abs() < 1e-9,
            "{}",
            v.relative_error
        );
        assert!(v.within_tolerance);
        let v2 = verify(f, y_met, &cal, met.permittivity(t) * 0.98, met.tolerance).unwrap();
        assert!(!v2.within_tolerance);
        // The same through the table lookup; and a liquid outside its table's range.
        let eth_row = ReferenceLiquid::by_name("ethanol").unwrap();
        let cal2 = two_point_with_liquid(f, y_air, t, y_eth, eth_row, t).unwrap();
        assert!((cal2.cell_pf - CELL.cell_pf).abs() < 1e-9);
        assert_eq!(
            two_point_with_liquid(f, y_air, t, y_eth, eth_row, 70.0),
            Err(CellError::LiquidTemperature)
        );
        // Degenerate: air against air.
        assert_eq!(
            two_point_calibration(f, y_air, air, y_air, air),
            Err(CellError::DegenerateCalibration)
        );
        assert!(REFERENCE_LIQUIDS.len() >= 7);
    }

    #[test]
    fn f32_cell_matches_f64() {
        let c32 = CellConstants {
            stray_pf: 2.7f32,
            cell_pf: 3.4424,
            g_offset_s: 1.5e-7,
        };
        let y = permittivity_to_admittance(1e6, Cx::new(12.5, -40.0), &CELL).unwrap();
        let e32 =
            admittance_to_permittivity(1e6f32, Cx::new(y.re as f32, y.im as f32), &c32).unwrap();
        assert!((e32.re as f64 - 12.5).abs() < 1e-4 && (e32.im as f64 + 40.0).abs() < 1e-4);
    }
}
