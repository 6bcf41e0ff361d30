//! Temperature sensors: platinum RTDs (IEC 60751, Callendar-Van Dusen) and
//! NTC thermistors (beta model, Steinhart-Hart).
//!
//! Temperatures in C (ITS-90), resistances in ohm.

use crate::real::Real;
use core::fmt;

/// Why a temperature could not be computed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum TempError {
    /// The resistance lies outside the sensor's defined range (open/short or
    /// beyond -200..850 C for a Pt RTD), or is not finite.
    OutOfRange,
}

impl fmt::Display for TempError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("sensor resistance outside its defined range (open, short or beyond the standard's span)")
    }
}

impl core::error::Error for TempError {}

/// A platinum RTD per IEC 60751: R(t) = R0 (1 + A t + B t^2 + C (t - 100) t^3),
/// the C term only below 0 C; defined for -200..850 C.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PlatinumRtd<T> {
    /// Resistance at 0 C, ohm.
    pub r0_ohm: T,
    /// A coefficient, 1/K.
    pub a: T,
    /// B coefficient, 1/K^2.
    pub b: T,
    /// C coefficient (below 0 C), 1/K^4.
    pub c: T,
}

impl<T: Real> PlatinumRtd<T> {
    /// IEC 60751 coefficients with the given R0.
    pub fn iec60751(r0_ohm: T) -> Self {
        PlatinumRtd {
            r0_ohm,
            a: T::c(3.9083e-3),
            b: T::c(-5.775e-7),
            c: T::c(-4.183e-12),
        }
    }
    /// Pt100.
    pub fn pt100() -> Self {
        Self::iec60751(T::c(100.0))
    }
    /// Pt1000.
    pub fn pt1000() -> Self {
        Self::iec60751(T::c(1000.0))
    }

    /// Resistance at `t_c`, ohm (Callendar-Van Dusen; not range-checked).
    pub fn resistance_ohm(&self, t_c: T) -> T {
        let mut x = T::one() + self.a * t_c + self.b * t_c * t_c;
        if t_c < T::zero() {
            x += self.c * (t_c - T::c(100.0)) * t_c * t_c * t_c;
        }
        self.r0_ohm * x
    }

    /// Temperature from resistance, C: the closed-form quadratic root at and
    /// above 0 C, Newton iteration on the full equation below.
    ///
    /// # Errors
    /// [`TempError::OutOfRange`] outside -200..850 C or for a non-finite input.
    pub fn temperature_c(&self, r_ohm: T) -> Result<T, TempError> {
        if !(r_ohm >= self.resistance_ohm(T::c(-200.0))
            && r_ohm <= self.resistance_ohm(T::c(850.0)))
        {
            return Err(TempError::OutOfRange);
        }
        let ratio = r_ohm / self.r0_ohm;
        let disc = self.a * self.a - T::c(4.0) * self.b * (T::one() - ratio);
        let mut t = (-self.a + T::sqrt(T::max(disc, T::zero()))) / (T::c(2.0) * self.b);
        if ratio < T::one() {
            for _ in 0..8 {
                let f = self.resistance_ohm(t) - r_ohm;
                let df = self.r0_ohm
                    * (self.a
                        + T::c(2.0) * self.b * t
                        + self.c * (T::c(4.0) * t * t * t - T::c(300.0) * t * t));
                t -= f / df;
            }
        }
        Ok(t)
    }
}

const T0_K: f64 = 273.15;

/// NTC thermistor, beta model: R(T) = R25 exp(beta (1/T - 1/T25)), T in K.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct NtcBeta<T> {
    /// Resistance at 25 C, ohm.
    pub r25_ohm: T,
    /// Beta, K.
    pub beta_k: T,
}

impl<T: Real> NtcBeta<T> {
    /// Resistance at `t_c`, ohm.
    pub fn resistance_ohm(&self, t_c: T) -> T {
        let inv = T::one() / (t_c + T::c(T0_K)) - T::one() / T::c(25.0 + T0_K);
        self.r25_ohm * T::exp(self.beta_k * inv)
    }
    /// Temperature from resistance, C.
    ///
    /// # Errors
    /// [`TempError::OutOfRange`] for a non-positive or non-finite resistance.
    pub fn temperature_c(&self, r_ohm: T) -> Result<T, TempError> {
        if !(r_ohm > T::zero() && r_ohm.is_finite()) {
            return Err(TempError::OutOfRange);
        }
        let inv = T::one() / T::c(25.0 + T0_K) + T::ln(r_ohm / self.r25_ohm) / self.beta_k;
        Ok(T::one() / inv - T::c(T0_K))
    }
}

/// NTC thermistor, Steinhart-Hart: 1/T = A + B ln R + C (ln R)^3, T in K.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SteinhartHart<T> {
    /// A, 1/K.
    pub a: T,
    /// B, 1/K.
    pub b: T,
    /// C, 1/K.
    pub c: T,
}

impl<T: Real> SteinhartHart<T> {
    /// Temperature from resistance, C.
    ///
    /// # Errors
    /// [`TempError::OutOfRange`] for a non-positive or non-finite resistance.
    pub fn temperature_c(&self, r_ohm: T) -> Result<T, TempError> {
        if !(r_ohm > T::zero() && r_ohm.is_finite()) {
            return Err(TempError::OutOfRange);
        }
        let l = T::ln(r_ohm);
        Ok(T::one() / (self.a + self.b * l + self.c * l * l * l) - T::c(T0_K))
    }
    /// Resistance at `t_c`, ohm (Newton on ln R, monotonic for B, C > 0).
    pub fn resistance_ohm(&self, t_c: T) -> T {
        let target = T::one() / (t_c + T::c(T0_K));
        // Start from the linear term alone.
        let mut l = (target - self.a) / self.b;
        for _ in 0..20 {
            let f = self.a + self.b * l + self.c * l * l * l - target;
            l -= f / (self.b + T::c(3.0) * self.c * l * l);
        }
        T::exp(l)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pt100_iec60751_table() {
        // IEC 60751 Pt100 values (docs/REFERENCES.md 6, [calc] matching the published
        // table to 2 dp): within 1e-4 ohm on the equation, inverse within 1e-4 C.
        let pt = PlatinumRtd::<f64>::pt100();
        for &(t, r) in &[
            (-100.0, 60.2558),
            (0.0, 100.0),
            (50.0, 119.3971),
            (100.0, 138.5055),
            (200.0, 175.8560),
        ] {
            assert!(
                (pt.resistance_ohm(t) - r).abs() < 1e-4,
                "{t}: {}",
                pt.resistance_ohm(t)
            );
            assert!((pt.temperature_c(r).unwrap() - t).abs() < 1e-3, "{t}");
        }
        // Inverse against forward over the whole span, both sides of 0 C.
        for i in -200..=850 {
            let t = i as f64;
            let back = pt.temperature_c(pt.resistance_ohm(t)).unwrap();
            assert!((back - t).abs() < 1e-4, "{t}: {back}");
        }
        // Pt1000 is x10.
        let p1k = PlatinumRtd::<f64>::pt1000();
        assert!((p1k.resistance_ohm(100.0) - 1385.055).abs() < 1e-3);
        assert_eq!(pt.temperature_c(10.0), Err(TempError::OutOfRange));
        assert_eq!(pt.temperature_c(f64::NAN), Err(TempError::OutOfRange));
    }

    #[test]
    fn pt100_f32_device_path() {
        // The firmware's f32 path: 0.001 ohm and 0.001 C (issue 3).
        let pt = PlatinumRtd::<f32>::pt100();
        for &(t, r) in &[
            (-100.0f32, 60.2558f32),
            (0.0, 100.0),
            (100.0, 138.5055),
            (200.0, 175.856),
        ] {
            assert!((pt.resistance_ohm(t) - r).abs() < 1e-3);
            assert!((pt.temperature_c(r).unwrap() - t).abs() < 1e-3);
        }
    }

    #[test]
    fn ntc_beta_and_steinhart_hart() {
        // docs/REFERENCES.md 6 [calc]: 10 kohm, beta 3950: 0 C 33620.6 ohm, 50 C 3588.2 ohm.
        let n = NtcBeta {
            r25_ohm: 10_000.0f64,
            beta_k: 3950.0,
        };
        assert!((n.resistance_ohm(0.0) - 33620.6).abs() < 0.1);
        assert!((n.resistance_ohm(50.0) - 3588.2).abs() < 0.1);
        assert!((n.temperature_c(33620.6).unwrap()).abs() < 1e-4);
        assert!((n.temperature_c(10_000.0).unwrap() - 25.0).abs() < 1e-9);
        // Steinhart-Hart, A 1.129148e-3, B 2.34125e-4, C 8.76741e-8: 10000 ohm
        // -> 25.000 C, 32650 ohm -> 0.000 C [calc].
        let sh = SteinhartHart {
            a: 1.129148e-3f64,
            b: 2.34125e-4,
            c: 8.76741e-8,
        };
        assert!((sh.temperature_c(10_000.0).unwrap() - 25.0).abs() < 1e-3);
        assert!((sh.temperature_c(32_650.0).unwrap()).abs() < 1e-2);
        for t in [-20.0, 0.0, 25.0, 80.0] {
            assert!((sh.temperature_c(sh.resistance_ohm(t)).unwrap() - t).abs() < 1e-9);
        }
        assert_eq!(sh.temperature_c(0.0), Err(TempError::OutOfRange));
    }
}
