//! Compact wire forms of a few [`crate::Reading`] fields.
//!
//! A streamed reading must fit a 64-byte frame, so four of its derived
//! quantities travel in two bytes each instead of a 4-byte `f32`. The Rust
//! fields stay `f32`; only the binary (postcard) encoding is compact.
//! Human-readable serialisers (JSON, TOML) get the plain `f32`.
//!
//! | field | wire form | step | range | NaN |
//! | --- | --- | --- | --- | --- |
//! | `ChannelValue::eps_re`, `eps_im` | IEEE 754 binary16, LE | 2^-11 relative (~0.05 %) | +/-65504, beyond: +/-inf | NaN |
//! | `Reading::temperature_c` | i16 LE, 0.01 C | 0.01 C | +/-327.67 C (saturates) | `i16::MIN` |
//! | `Reading::moisture_pct` | `Option` + i16 LE, 0.01 % | 0.01 % | +/-327.67 % (saturates) | `i16::MIN` |
//! | `Reading::uncertainty_pct` | u16 LE, 0.001 % | 0.001 % | 0..=65.534 % (saturates) | `u16::MAX` |
//!
//! The admittances `g_s`, `b_s` stay full `f32`: they are the measurement.
//! The permittivities follow from them and the cell calibration named by
//! `Reading::cell_cal`, so a host that needs more than binary16 recomputes
//! them exactly. Rounding is to nearest (ties away from zero for the fixed
//! point forms, ties to even for binary16).

/// Rounds `x` to what a binary16 carries (the value the peer decodes).
pub fn f16_round(x: f32) -> f32 {
    half::f16::from_f32(x).to_f32()
}

/// Fixed-point encoding of `x * per_unit` into an `i16`, saturating; NaN gives `i16::MIN`.
fn to_i16(x: f32, per_unit: f32) -> i16 {
    if x.is_nan() {
        return i16::MIN;
    }
    // `as` rounds toward zero; round first.
    let q = round(x * per_unit);
    q.clamp(-(i16::MAX as f32), i16::MAX as f32) as i16
}

fn from_i16(q: i16, per_unit: f32) -> f32 {
    if q == i16::MIN {
        f32::NAN
    } else {
        // Division by the exact integer scale gives the nearest f32 to q / scale.
        q as f32 / per_unit
    }
}

fn to_u16(x: f32, per_unit: f32) -> u16 {
    if x.is_nan() {
        return u16::MAX;
    }
    let q = round(x * per_unit);
    q.clamp(0.0, (u16::MAX - 1) as f32) as u16
}

fn from_u16(q: u16, per_unit: f32) -> f32 {
    if q == u16::MAX {
        f32::NAN
    } else {
        q as f32 / per_unit
    }
}

/// Round half away from zero without std (same on host and target).
fn round(x: f32) -> f32 {
    libm::roundf(x)
}

/// Wire counts per degree C of temperature (step 0.01 C).
pub const TEMPERATURE_PER_C: f32 = 100.0;
/// Wire counts per % of moisture (step 0.01 %).
pub const MOISTURE_PER_PCT: f32 = 100.0;
/// The highest moisture a reading carries, %: `i16::MAX` counts (a dry-basis
/// moisture above it saturates here; the device's range check flags it,
/// since a calibration's valid range ends here too).
pub const MOISTURE_MAX_PCT: f32 = i16::MAX as f32 / MOISTURE_PER_PCT;
/// Whether moisture `m_pct` lies beyond what a reading carries (it is sent
/// saturated at +/-[`MOISTURE_MAX_PCT`] and flagged out of range).
pub fn moisture_beyond_reading(m_pct: f32) -> bool {
    m_pct.abs() > MOISTURE_MAX_PCT
}

/// Wire counts per % of uncertainty (step 0.001 %).
pub const UNCERTAINTY_PER_PCT: f32 = 1000.0;

/// The temperature the peer decodes for `x` C.
pub fn temperature_round(x: f32) -> f32 {
    from_i16(to_i16(x, TEMPERATURE_PER_C), TEMPERATURE_PER_C)
}

/// The moisture the peer decodes for `x` %.
pub fn moisture_round(x: f32) -> f32 {
    from_i16(to_i16(x, MOISTURE_PER_PCT), MOISTURE_PER_PCT)
}

/// The uncertainty the peer decodes for `x` %.
pub fn uncertainty_round(x: f32) -> f32 {
    from_u16(to_u16(x, UNCERTAINTY_PER_PCT), UNCERTAINTY_PER_PCT)
}

macro_rules! fixed_field {
    ($name:ident, $doc:literal, $enc:expr, $dec:expr) => {
        #[doc = $doc]
        pub(crate) mod $name {
            use serde::{Deserialize, Deserializer, Serialize, Serializer};

            pub(crate) fn serialize<S: Serializer>(x: &f32, s: S) -> Result<S::Ok, S::Error> {
                if s.is_human_readable() {
                    x.serialize(s)
                } else {
                    let enc: fn(f32) -> [u8; 2] = $enc;
                    enc(*x).serialize(s)
                }
            }

            pub(crate) fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<f32, D::Error> {
                if d.is_human_readable() {
                    f32::deserialize(d)
                } else {
                    let dec: fn([u8; 2]) -> f32 = $dec;
                    <[u8; 2]>::deserialize(d).map(dec)
                }
            }
        }
    };
}

fixed_field!(
    f16_le,
    "`f32` as IEEE binary16, little-endian.",
    |x| half::f16::from_f32(x).to_bits().to_le_bytes(),
    |b| half::f16::from_bits(u16::from_le_bytes(b)).to_f32()
);
fixed_field!(
    centi_c,
    "`f32` degrees C as i16 hundredths, little-endian.",
    |x| super::to_i16(x, super::TEMPERATURE_PER_C).to_le_bytes(),
    |b| super::from_i16(i16::from_le_bytes(b), super::TEMPERATURE_PER_C)
);
fixed_field!(
    milli_pct,
    "`f32` percent as u16 thousandths, little-endian.",
    |x| super::to_u16(x, super::UNCERTAINTY_PER_PCT).to_le_bytes(),
    |b| super::from_u16(u16::from_le_bytes(b), super::UNCERTAINTY_PER_PCT)
);

/// `Option<f32>` percent as `Option` + i16 hundredths, little-endian.
pub(crate) mod opt_centi_pct {
    use serde::{Deserialize, Deserializer, Serialize, Serializer};

    use super::{from_i16, to_i16, MOISTURE_PER_PCT};

    pub(crate) fn serialize<S: Serializer>(x: &Option<f32>, s: S) -> Result<S::Ok, S::Error> {
        if s.is_human_readable() {
            x.serialize(s)
        } else {
            x.map(|v| to_i16(v, MOISTURE_PER_PCT).to_le_bytes())
                .serialize(s)
        }
    }

    pub(crate) fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<Option<f32>, D::Error> {
        if d.is_human_readable() {
            Option::<f32>::deserialize(d)
        } else {
            Option::<[u8; 2]>::deserialize(d)
                .map(|o| o.map(|b| from_i16(i16::from_le_bytes(b), MOISTURE_PER_PCT)))
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fixed_point_steps_and_saturation() {
        assert_eq!(temperature_round(31.414), 31.41);
        assert_eq!(temperature_round(-12.345), -12.35); // half away from zero
        assert_eq!(temperature_round(1000.0), 327.67);
        assert_eq!(temperature_round(-1000.0), -327.67);
        assert!(temperature_round(f32::NAN).is_nan());
        assert_eq!(moisture_round(14.206), 14.21);
        assert_eq!(moisture_round(-0.3), -0.3);
        assert_eq!(uncertainty_round(0.3504), 0.35);
        assert_eq!(uncertainty_round(-1.0), 0.0);
        assert_eq!(uncertainty_round(f32::INFINITY), 65.534);
        assert!(uncertainty_round(f32::NAN).is_nan());
    }

    #[test]
    fn binary16_known_values() {
        // IEEE 754-2008 binary16: largest finite 65504, 1 + 2^-10 is the next
        // value above 1, 2^-24 the smallest subnormal.
        assert_eq!(half::f16::from_f32(65504.0).to_bits(), 0x7BFF);
        assert_eq!(half::f16::from_f32(1.0).to_bits(), 0x3C00);
        assert_eq!(f16_round(1.0 + 1.0 / 1024.0), 1.0 + 1.0 / 1024.0);
        assert_eq!(f16_round(5.960_464_5e-8), 5.960_464_5e-8);
        assert_eq!(f16_round(1.0e6), f32::INFINITY);
        // Relative step at eps' = 12.5 (between 8 and 16): 2^-7 = 0.0078.
        assert!((f16_round(12.503) - 12.5).abs() < 0.004);
    }
}
