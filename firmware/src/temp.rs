//! Platinum RTD resistance <-> temperature, IEC 60751 (ITS-90)
//! Callendar-Van Dusen: R(t) = R0 (1 + A t + B t^2 + C (t - 100) t^3),
//! C only below 0 C; A = 3.9083e-3, B = -5.775e-7, C = -4.183e-12.
//!
//! Kept here until the calibration crate carries the sensor models; the
//! firmware then calls those.

const A: f32 = 3.9083e-3;
const B: f32 = -5.775e-7;
const C: f32 = -4.183e-12;

/// Resistance at `t_c`, ohm, for a sensor of `r0_ohm` at 0 C.
pub fn rtd_resistance_ohm(t_c: f32, r0_ohm: f32) -> f32 {
    let c = if t_c < 0.0 { C } else { 0.0 };
    r0_ohm * (1.0 + A * t_c + B * t_c * t_c + c * (t_c - 100.0) * t_c * t_c * t_c)
}

/// Temperature for a resistance, C; `None` outside -200..=850 C or for bad input.
pub fn rtd_temperature_c(r_ohm: f32, r0_ohm: f32) -> Option<f32> {
    if !(r_ohm.is_finite() && r0_ohm.is_finite() && r0_ohm > 0.0 && r_ohm > 0.0) {
        return None;
    }
    let x = r_ohm / r0_ohm;
    // Closed form above 0 C (quadratic), then Newton steps (for below 0 C).
    let disc = A * A - 4.0 * B * (1.0 - x);
    let mut t = if disc >= 0.0 {
        (-A + libm::sqrtf(disc)) / (2.0 * B)
    } else {
        return None;
    };
    if t < 0.0 {
        for _ in 0..6 {
            let f = rtd_resistance_ohm(t, 1.0) - x;
            let d = A + 2.0 * B * t + C * (4.0 * t * t * t - 300.0 * t * t);
            t -= f / d;
        }
    }
    (-200.0..=850.0).contains(&t).then_some(t)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pt100_table_values() {
        // IEC 60751 Pt100 (REFERENCES.md section 6, matches the published table to 2 dp).
        for (t, r) in [
            (-100.0f32, 60.2558f32),
            (0.0, 100.0),
            (50.0, 119.3971),
            (100.0, 138.5055),
            (200.0, 175.856),
        ] {
            assert!((rtd_resistance_ohm(t, 100.0) - r).abs() < 2e-3, "{t}");
            let back = rtd_temperature_c(r, 100.0).unwrap();
            assert!((back - t).abs() < 5e-3, "{t} -> {back}");
        }
        assert_eq!(rtd_temperature_c(f32::NAN, 100.0), None);
        assert_eq!(rtd_temperature_c(0.0, 100.0), None);
    }
}
