//! Fringe's Modbus input-register map, in one place for the device's RTU
//! slave (firmware) and the gateway's TCP server (host). `no_std`, no heap.
//!
//! Input registers (function 04), 0-based addresses (3xxxx numbering is
//! address + 30001), 16-bit big-endian words as the Modbus application
//! protocol specification V1.1b3 defines them. Float32 values occupy two
//! registers, high word first (a convention, not part of the
//! specification; register [`KNOWN_VALUE`] lets an integrator check the
//! word order). The full table is in `docs/MODBUS.md`.
//!
//! ```text
//! addr  words  content
//!  0-1   f32   moisture, % on the calibration's basis (NaN: no valid value)
//!  2-3   f32   standard uncertainty of the moisture, % moisture
//!  4-5   f32   product temperature, C
//!  6     u16   status word (STATUS_* bits)
//!  7-8   u32   the reading's counter within its boot, high word first
//!  9     u16   age of the reading, s (saturates at 65535)
//! 10     u16   boot counter of the reading (low 16 bits)
//! 11     u16   quality flags of the reading (the device's own flag bits)
//! 12-13  f32   known value 1234.5 (0x449A, 0x5000): checks the word order
//! 14     u16   map version (2)
//! 15     u16   moisture basis of the reading's calibration: 0 not known
//!              (or no calibration), 1 wet, 2 dry (map version 2; read as 0
//!              in version 1)
//! 16-19        reserved, read as 0
//! 20     i16   moisture x 100 (0x8000: no valid value)
//! 21     i16   uncertainty x 100 (0x8000: no valid value)
//! 22     i16   temperature x 10 (0x8000: no valid value)
//! 23     u16   status word (copy of 6)
//! 24     u16   age, s (copy of 9)
//! ```
//!
//! Nothing here writes: the map is read-only by design (a control system
//! reads the value; a change to the device's calibration, settings or clock
//! goes through Fringe's authenticated protocol, never through Modbus). The
//! one value a PLC may write, the plant's bulk density, is taken by the
//! gateway outside this map (`fringe_gateway::modbus`) and sent signed.
#![cfg_attr(not(test), no_std)]
#![forbid(unsafe_code)]
#![warn(missing_docs)]

use fringe_protocol::{Flags, Reading};

/// Registers in the map (addresses `0..MAP_LEN`).
pub const MAP_LEN: usize = 25;
/// Version of this map, in register [`VERSION`].
pub const MAP_VERSION: u16 = 2;

/// Address of the moisture float32.
pub const MOISTURE: u16 = 0;
/// Address of the uncertainty float32.
pub const UNCERTAINTY: u16 = 2;
/// Address of the temperature float32.
pub const TEMPERATURE: u16 = 4;
/// Address of the status word.
pub const STATUS: u16 = 6;
/// Address of the counter (u32, two registers).
pub const COUNTER: u16 = 7;
/// Address of the age in seconds.
pub const AGE: u16 = 9;
/// Address of the boot counter (low 16 bits).
pub const BOOT: u16 = 10;
/// Address of the reading's flag bits.
pub const FLAGS: u16 = 11;
/// Address of the known-value float32.
pub const KNOWN_VALUE: u16 = 12;
/// Address of the map version.
pub const VERSION: u16 = 14;
/// Address of the moisture basis ([`BASIS_WET`], [`BASIS_DRY`], 0 not
/// known).
pub const MOISTURE_BASIS: u16 = 15;
/// [`MOISTURE_BASIS`]: water over wet mass.
pub const BASIS_WET: u16 = 1;
/// [`MOISTURE_BASIS`]: water over dry mass (can exceed 100 %).
pub const BASIS_DRY: u16 = 2;
/// Address of the scaled moisture (x 100).
pub const SCALED_MOISTURE: u16 = 20;
/// Address of the scaled uncertainty (x 100).
pub const SCALED_UNCERTAINTY: u16 = 21;
/// Address of the scaled temperature (x 10).
pub const SCALED_TEMPERATURE: u16 = 22;
/// Address of the status word's copy in the scaled block.
pub const SCALED_STATUS: u16 = 23;
/// Address of the age's copy in the scaled block.
pub const SCALED_AGE: u16 = 24;

/// The value of the known-value register pair.
pub const KNOWN: f32 = 1234.5;
/// The scaled-int16 "no valid value" code.
pub const NO_VALUE_I16: u16 = 0x8000;

/// Status bit: no valid moisture value (none measured yet, none computed,
/// stale, or the device not connected). A control system must not use the
/// value while it is set.
pub const STATUS_NO_VALUE: u16 = 1 << 0;
/// Status bit: the latest reading is older than the stale limit.
pub const STATUS_STALE: u16 = 1 << 1;
/// Status bit: NAMUR NE 107 category F, failure (electrode or temperature
/// sensor fault, saturated front end).
pub const STATUS_NE107_FAILURE: u16 = 1 << 2;
/// Status bit: NE 107 category C, function check (not calibrated).
pub const STATUS_NE107_CHECK: u16 = 1 << 3;
/// Status bit: NE 107 category S, out of specification (moisture or
/// temperature outside the calibration, fit not converged, weak signal, a
/// density input missing).
pub const STATUS_NE107_OUT_OF_SPEC: u16 = 1 << 4;
/// Status bit: NE 107 category M, maintenance required (internal
/// reference drifted).
pub const STATUS_NE107_MAINTENANCE: u16 = 1 << 5;
/// Status bit: the line is empty (the window sees air).
pub const STATUS_NO_PRODUCT: u16 = 1 << 6;
/// Status bit: the device clock was never set (times from power-on).
pub const STATUS_CLOCK_UNSET: u16 = 1 << 7;
/// Status bit: the gateway has lost the device (always 0 on the device).
pub const STATUS_DISCONNECTED: u16 = 1 << 8;
/// Status bit: no reading since start (nothing to show yet).
pub const STATUS_NO_READING: u16 = 1 << 15;

/// NE 107 category F flags.
const FAILURE: Flags = Flags::ELECTRODE_FAULT
    .union(Flags::TEMP_SENSOR_FAULT)
    .union(Flags::SATURATED);
/// NE 107 category S flags.
const OUT_OF_SPEC: Flags = Flags::OUT_OF_RANGE
    .union(Flags::TEMP_OUT_OF_RANGE)
    .union(Flags::FIT_NOT_CONVERGED)
    .union(Flags::LOW_SNR)
    .union(Flags::DENSITY_MISSING);

/// What the map shows: the latest reading, how old it is, and whether its
/// source is considered stale or lost.
#[derive(Debug, Clone, PartialEq)]
pub struct Snapshot {
    /// The latest reading, if any.
    pub reading: Option<Reading>,
    /// Age of that reading, s.
    pub age_s: u32,
    /// Whether it is older than the stale limit.
    pub stale: bool,
    /// Whether the source (for the gateway: the device link) is up.
    pub connected: bool,
    /// The moisture basis of the reading's product calibration, where
    /// known.
    pub basis: Option<fringe_protocol::Basis>,
}

/// The status word of a snapshot.
pub fn status_word(s: &Snapshot) -> u16 {
    let mut w = 0;
    let Some(r) = &s.reading else {
        w |= STATUS_NO_READING | STATUS_NO_VALUE;
        if !s.connected {
            w |= STATUS_DISCONNECTED;
        }
        return w;
    };
    let f = r.flags;
    if f.intersects(FAILURE) {
        w |= STATUS_NE107_FAILURE;
    }
    if f.contains(Flags::NOT_CALIBRATED) {
        w |= STATUS_NE107_CHECK;
    }
    if f.intersects(OUT_OF_SPEC) {
        w |= STATUS_NE107_OUT_OF_SPEC;
    }
    if f.contains(Flags::REFERENCE_DRIFT) {
        w |= STATUS_NE107_MAINTENANCE;
    }
    if f.contains(Flags::NO_PRODUCT) {
        w |= STATUS_NO_PRODUCT;
    }
    if f.contains(Flags::CLOCK_UNSET) {
        w |= STATUS_CLOCK_UNSET;
    }
    if s.stale {
        w |= STATUS_STALE;
    }
    if !s.connected {
        w |= STATUS_DISCONNECTED;
    }
    // A failure (F) or function check (C) makes any number the reading
    // carries unusable for control, as does a stale or lost source.
    let valid = r.moisture_pct.is_some_and(f32::is_finite)
        && w & (STATUS_NE107_FAILURE | STATUS_NE107_CHECK) == 0;
    if !valid || s.stale || !s.connected {
        w |= STATUS_NO_VALUE;
    }
    w
}

fn put_f32(map: &mut [u16; MAP_LEN], at: u16, v: f32) {
    let b = v.to_bits();
    map[at as usize] = (b >> 16) as u16;
    map[at as usize + 1] = b as u16;
}

/// `v * scale` rounded to an i16 word, or [`NO_VALUE_I16`] when `v` is
/// absent, not finite or does not fit.
fn scaled(v: Option<f32>, scale: f32) -> u16 {
    match v {
        Some(x) if x.is_finite() => {
            let y = x * scale;
            // Round half away from zero without libm (no_std).
            let r = if y >= 0.0 { y + 0.5 } else { y - 0.5 };
            // Within (-32768, 32768) the cast truncates to -32767..=32767
            // (never the -32768 of no value): a value up to half a step
            // past 32767 reads 32767, as 327.67 % does, the highest
            // moisture a reading carries (327.67 * 100 in f32 is 32767.002).
            if r > -32768.0 && r < 32768.0 {
                (r as i16) as u16
            } else {
                NO_VALUE_I16
            }
        }
        _ => NO_VALUE_I16,
    }
}

/// The whole register map of a snapshot.
pub fn map(s: &Snapshot) -> [u16; MAP_LEN] {
    let mut m = [0u16; MAP_LEN];
    let status = status_word(s);
    let valid = status & STATUS_NO_VALUE == 0;
    let r = s.reading.as_ref();
    let moisture = r.and_then(|r| r.moisture_pct).filter(|_| valid);
    let uncertainty = moisture.and(r.map(|r| r.uncertainty_pct));
    // The temperature is no value on a sensor fault, and, like the
    // moisture, when the reading is stale or its device lost: a frozen
    // number would pass for the present one (found by review).
    let temperature = r
        .map(|r| r.temperature_c)
        .filter(|_| !r.is_some_and(|r| r.flags.contains(Flags::TEMP_SENSOR_FAULT)))
        .filter(|_| !s.stale && s.connected);
    put_f32(&mut m, MOISTURE, moisture.unwrap_or(f32::NAN));
    put_f32(&mut m, UNCERTAINTY, uncertainty.unwrap_or(f32::NAN));
    put_f32(&mut m, TEMPERATURE, temperature.unwrap_or(f32::NAN));
    m[STATUS as usize] = status;
    let counter = r.map_or(0, |r| r.seq.counter);
    m[COUNTER as usize] = (counter >> 16) as u16;
    m[COUNTER as usize + 1] = counter as u16;
    let age = if r.is_some() {
        s.age_s.min(u32::from(u16::MAX)) as u16
    } else {
        u16::MAX
    };
    m[AGE as usize] = age;
    m[BOOT as usize] = r.map_or(0, |r| r.seq.boot as u16);
    m[FLAGS as usize] = r.map_or(0, |r| r.flags.bits());
    put_f32(&mut m, KNOWN_VALUE, KNOWN);
    m[VERSION as usize] = MAP_VERSION;
    m[MOISTURE_BASIS as usize] = match s.basis.filter(|_| r.is_some()) {
        None => 0,
        Some(fringe_protocol::Basis::Wet) => BASIS_WET,
        Some(fringe_protocol::Basis::Dry) => BASIS_DRY,
    };
    m[SCALED_MOISTURE as usize] = scaled(moisture, 100.0);
    m[SCALED_UNCERTAINTY as usize] = scaled(uncertainty, 100.0);
    m[SCALED_TEMPERATURE as usize] = scaled(temperature, 10.0);
    m[SCALED_STATUS as usize] = status;
    m[SCALED_AGE as usize] = age;
    m
}

/// Modbus exception codes this map answers with (Modbus Application
/// Protocol V1.1b3, section 7).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Exception {
    /// 01: the function is not supported (only 04 is).
    IllegalFunction = 1,
    /// 02: the address range lies (partly) outside the map.
    IllegalDataAddress = 2,
    /// 03: the quantity is not 1..=125.
    IllegalDataValue = 3,
}

/// Most registers one read may ask for (V1.1b3, function 04: 1 to 125).
pub const MAX_READ: u16 = 125;

/// The registers `addr..addr + count` of `map`, as function 04 answers.
///
/// # Errors
/// [`Exception::IllegalDataValue`] for a count outside 1..=125 (checked
/// first, as the specification's state diagram does);
/// [`Exception::IllegalDataAddress`] when the range leaves the map.
pub fn read_input_registers(
    map: &[u16; MAP_LEN],
    addr: u16,
    count: u16,
) -> Result<&[u16], Exception> {
    if count == 0 || count > MAX_READ {
        return Err(Exception::IllegalDataValue);
    }
    let end = usize::from(addr) + usize::from(count);
    if end > MAP_LEN {
        return Err(Exception::IllegalDataAddress);
    }
    Ok(&map[usize::from(addr)..end])
}

/// Word order of the 32-bit values (float32 and uint32) in the map.
/// The Modbus application protocol specification leaves it open; high word
/// first is the map's own order, low word first is what many PLCs expect
/// (the two are often called ABCD and CDAB; common practice, no source).
/// 16-bit registers are the same either way.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum WordOrder {
    /// High word at the lower address (the map as [`map`] gives it).
    #[default]
    HighFirst,
    /// Low word at the lower address.
    LowFirst,
}

/// First addresses of the map's 32-bit values.
pub const WIDE: [u16; 5] = [MOISTURE, UNCERTAINTY, TEMPERATURE, COUNTER, KNOWN_VALUE];

/// `m` in word order `order`: with [`WordOrder::LowFirst`] the two
/// registers of every 32-bit value swapped, the rest unchanged.
pub fn with_word_order(mut m: [u16; MAP_LEN], order: WordOrder) -> [u16; MAP_LEN] {
    if order == WordOrder::LowFirst {
        for a in WIDE {
            m.swap(usize::from(a), usize::from(a) + 1);
        }
    }
    m
}

#[cfg(test)]
mod tests {
    use super::*;
    use fringe_protocol::{CalId, ChannelValue, Seq};
    use proptest::prelude::*;

    fn reading(moisture: Option<f32>, flags: Flags) -> Reading {
        Reading {
            seq: Seq {
                boot: 3,
                counter: 70_000,
            },
            time_ms: 1_796_083_200_000,
            channels: [ChannelValue::default(); 2],
            temperature_c: 21.5,
            moisture_pct: moisture,
            uncertainty_pct: 0.12,
            flags,
            cell_cal: CalId::NONE,
            product_cal: CalId::NONE,
        }
    }

    fn snap(r: Option<Reading>) -> Snapshot {
        Snapshot {
            reading: r,
            age_s: 4,
            stale: false,
            connected: true,
            basis: None,
        }
    }

    fn f32_at(m: &[u16], at: u16) -> f32 {
        f32::from_bits(u32::from(m[at as usize]) << 16 | u32::from(m[at as usize + 1]))
    }

    #[test]
    fn a_valid_reading_fills_every_field() {
        let m = map(&snap(Some(reading(Some(14.37), Flags::empty()))));
        assert_eq!(f32_at(&m, MOISTURE), 14.37);
        assert_eq!(f32_at(&m, UNCERTAINTY), 0.12);
        assert_eq!(f32_at(&m, TEMPERATURE), 21.5);
        assert_eq!(m[STATUS as usize], 0);
        assert_eq!(
            (u32::from(m[COUNTER as usize]) << 16) | u32::from(m[COUNTER as usize + 1]),
            70_000
        );
        assert_eq!(m[AGE as usize], 4);
        assert_eq!(m[BOOT as usize], 3);
        assert_eq!(m[VERSION as usize], 2);
        assert_eq!(m[SCALED_MOISTURE as usize], 1437);
        assert_eq!(m[SCALED_UNCERTAINTY as usize], 12);
        assert_eq!(m[SCALED_TEMPERATURE as usize], 215);
        assert_eq!(m[SCALED_AGE as usize], 4);
        // Basis not known: 0, as register 15 read in map version 1.
        assert_eq!(m[MOISTURE_BASIS as usize], 0);
    }

    /// Register 15 says the basis of the reading's calibration (1 wet, 2
    /// dry); with no reading it is 0, whatever the snapshot says.
    #[test]
    fn the_basis_register() {
        let with = |basis| Snapshot {
            basis,
            ..snap(Some(reading(Some(140.0), Flags::empty())))
        };
        assert_eq!(map(&with(Some(fringe_protocol::Basis::Wet)))[15], 1);
        assert_eq!(map(&with(Some(fringe_protocol::Basis::Dry)))[15], 2);
        assert_eq!(map(&with(None))[15], 0);
        let none = Snapshot {
            basis: Some(fringe_protocol::Basis::Dry),
            ..snap(None)
        };
        assert_eq!(map(&none)[15], 0);
        for r in 16..20 {
            assert_eq!(map(&with(Some(fringe_protocol::Basis::Dry)))[r], 0, "{r}");
        }
    }

    #[test]
    fn known_value_words_are_the_ieee_754_pattern() {
        // IEEE 754 binary32 of 1234.5 is 0x449A5000 (sign 0, exponent
        // 137 = 10 + 127, mantissa 0x1A5000): high word first.
        let m = map(&snap(None));
        assert_eq!(&m[12..14], &[0x449A, 0x5000]);
    }

    #[test]
    fn no_value_is_nan_and_0x8000_and_a_status_bit() {
        for s in [
            snap(None),
            snap(Some(reading(None, Flags::NOT_CALIBRATED))),
            Snapshot {
                stale: true,
                ..snap(Some(reading(Some(14.0), Flags::empty())))
            },
            Snapshot {
                connected: false,
                ..snap(Some(reading(Some(14.0), Flags::empty())))
            },
        ] {
            let m = map(&s);
            assert!(f32_at(&m, MOISTURE).is_nan(), "{s:?}");
            assert!(f32_at(&m, UNCERTAINTY).is_nan(), "{s:?}");
            assert_eq!(m[SCALED_MOISTURE as usize], NO_VALUE_I16, "{s:?}");
            assert_ne!(m[STATUS as usize] & STATUS_NO_VALUE, 0, "{s:?}");
            // The temperature of a reading that is stale or whose device
            // is lost is no value either; an uncalibrated one's is.
            let fresh = !s.stale && s.connected;
            let t = f32_at(&m, TEMPERATURE);
            let has_reading = s.reading.is_some();
            assert_eq!(t.is_nan(), !(fresh && has_reading), "{s:?}");
            assert_eq!(
                m[SCALED_TEMPERATURE as usize] == NO_VALUE_I16,
                !(fresh && has_reading),
                "{s:?}"
            );
        }
        assert_ne!(status_word(&snap(None)) & STATUS_NO_READING, 0);
    }

    #[test]
    fn flags_map_to_ne107_categories() {
        let w = |f| status_word(&snap(Some(reading(Some(10.0), f))));
        assert_eq!(
            w(Flags::ELECTRODE_FAULT) & STATUS_NE107_FAILURE,
            STATUS_NE107_FAILURE
        );
        assert_eq!(
            w(Flags::NOT_CALIBRATED) & STATUS_NE107_CHECK,
            STATUS_NE107_CHECK
        );
        assert_eq!(
            w(Flags::OUT_OF_RANGE) & STATUS_NE107_OUT_OF_SPEC,
            STATUS_NE107_OUT_OF_SPEC
        );
        assert_eq!(
            w(Flags::DENSITY_MISSING) & STATUS_NE107_OUT_OF_SPEC,
            STATUS_NE107_OUT_OF_SPEC
        );
        assert_eq!(w(Flags::DENSITY_MISSING) & STATUS_NO_VALUE, 0);
        assert_eq!(
            w(Flags::REFERENCE_DRIFT) & STATUS_NE107_MAINTENANCE,
            STATUS_NE107_MAINTENANCE
        );
        assert_eq!(w(Flags::NO_PRODUCT) & STATUS_NO_PRODUCT, STATUS_NO_PRODUCT);
        assert_eq!(
            w(Flags::CLOCK_UNSET) & STATUS_CLOCK_UNSET,
            STATUS_CLOCK_UNSET
        );
        // A flag of another category sets none of the others.
        assert_eq!(w(Flags::REFERENCE_DRIFT) & STATUS_NE107_FAILURE, 0);
        // F and C make a carried number unusable; S and M do not.
        assert_ne!(w(Flags::ELECTRODE_FAULT) & STATUS_NO_VALUE, 0);
        assert_ne!(w(Flags::NOT_CALIBRATED) & STATUS_NO_VALUE, 0);
        assert_eq!(w(Flags::OUT_OF_RANGE) & STATUS_NO_VALUE, 0);
        assert_eq!(w(Flags::REFERENCE_DRIFT) & STATUS_NO_VALUE, 0);
    }

    #[test]
    fn exceptions_follow_the_specification() {
        let m = map(&snap(None));
        assert_eq!(read_input_registers(&m, 0, 25).map(<[u16]>::len), Ok(25));
        assert_eq!(read_input_registers(&m, 24, 1).map(<[u16]>::len), Ok(1));
        assert_eq!(
            read_input_registers(&m, 24, 2),
            Err(Exception::IllegalDataAddress)
        );
        assert_eq!(
            read_input_registers(&m, 25, 1),
            Err(Exception::IllegalDataAddress)
        );
        assert_eq!(
            read_input_registers(&m, 0, 0),
            Err(Exception::IllegalDataValue)
        );
        assert_eq!(
            read_input_registers(&m, 0, 126),
            Err(Exception::IllegalDataValue)
        );
        assert_eq!(
            read_input_registers(&m, 65535, 125),
            Err(Exception::IllegalDataAddress)
        );
    }

    #[test]
    fn out_of_range_scaled_values_are_no_value() {
        assert_eq!(scaled(Some(400.0), 100.0), NO_VALUE_I16);
        assert_eq!(scaled(Some(327.67), 100.0), 32767);
        assert_eq!(scaled(Some(-327.67), 100.0), (-32767i16) as u16);
        assert_eq!(scaled(Some(327.68), 100.0), NO_VALUE_I16);
        assert_eq!(scaled(Some(-327.0), 100.0), (-32700i16) as u16);
        assert_eq!(scaled(Some(f32::INFINITY), 100.0), NO_VALUE_I16);
        assert_eq!(scaled(Some(0.004), 100.0), 0);
        assert_eq!(scaled(Some(-0.006), 100.0), (-1i16) as u16);
    }

    proptest! {
        #![proptest_config(fringe_testkit::proptest_config(512, 0x3_0001))]

        /// The float and scaled blocks say the same thing: either both show
        /// no value, or the scaled moisture is the float's x 100 rounded.
        #[test]
        fn float_and_scaled_blocks_agree(m in proptest::option::of(-50.0f32..400.0), bits in 0u16..(1 << 11), stale: bool, connected: bool, age in 0u32..100_000) {
            let s = Snapshot {
                reading: Some(reading(m, Flags::from_bits_truncate(bits))),
                age_s: age,
                stale,
                connected,
                basis: None,
            };
            let map = map(&s);
            let f = f32_at(&map, MOISTURE);
            let i = map[SCALED_MOISTURE as usize];
            if f.is_nan() {
                prop_assert_eq!(i, NO_VALUE_I16);
                prop_assert_ne!(map[STATUS as usize] & STATUS_NO_VALUE, 0);
            } else if (f * 100.0).abs() < 32767.5 {
                prop_assert!(((i as i16) as f32 - f * 100.0).abs() <= 0.5 + 1e-3);
            } else {
                prop_assert_eq!(i, NO_VALUE_I16);
            }
            prop_assert_eq!(map[SCALED_STATUS as usize], map[STATUS as usize]);
            prop_assert_eq!(map[AGE as usize] as u32, age.min(65535));
        }
    }

    #[test]
    fn low_word_first_swaps_every_32_bit_value_and_nothing_else() {
        let r = Reading {
            seq: fringe_protocol::Seq {
                boot: 2,
                counter: 0x0001_0002,
            },
            time_ms: 0,
            channels: [fringe_protocol::ChannelValue::default(); 2],
            temperature_c: 20.0,
            moisture_pct: Some(14.25),
            uncertainty_pct: 0.5,
            flags: Flags::empty(),
            cell_cal: fringe_protocol::CalId::NONE,
            product_cal: fringe_protocol::CalId::NONE,
        };
        let hi = map(&Snapshot {
            reading: Some(r),
            age_s: 3,
            stale: false,
            connected: true,
            basis: None,
        });
        let lo = with_word_order(hi, WordOrder::LowFirst);
        // The known value 1234.5 = 0x449A5000 (IEEE 754 binary32,
        // computed by hand: 1234.5 = 1.2055664 x 2^10) as CDAB.
        assert_eq!(&hi[12..14], &[0x449A, 0x5000]);
        assert_eq!(&lo[12..14], &[0x5000, 0x449A]);
        // The counter, and a float, read back from the swapped words.
        assert_eq!(u32::from(lo[8]) << 16 | u32::from(lo[7]), 0x0001_0002);
        let m = f32::from_bits(u32::from(lo[1]) << 16 | u32::from(lo[0]));
        assert_eq!(m, 14.25);
        for a in 0..MAP_LEN as u16 {
            let wide = WIDE.iter().any(|w| a == *w || a == *w + 1);
            if !wide {
                assert_eq!(lo[usize::from(a)], hi[usize::from(a)], "register {a}");
            }
        }
        assert_eq!(with_word_order(hi, WordOrder::HighFirst), hi);
    }
}
