//! # fringe-calibration: the physics and statistics behind a Fringe reading
//!
//! The `cell`, `invert` and `estimate` stages of docs/DESIGN.md live here as pure
//! functions: the firmware evaluates them in `f32` without a heap; the host
//! fits them in `f64` behind the `fit` feature. Every model is generic over
//! [`Real`] (`f32`, `f64`), so device and host run the same code.
//!
//! | module | what |
//! | --- | --- |
//! | [`real`] | the scalar trait; explicit `libm` functions |
//! | [`water`] | water (Malmberg-Maryott, Kaatze 1989) and reference liquids |
//! | [`dielectric`] | Debye, Cole-Cole, Havriliak-Negami, conduction loss, loss tangent, heating |
//! | [`mixing`] | power-law mixing (CRIM, Looyenga, Lichtenecker), Maxwell Garnett, Topp, Roth, product mixture |
//! | [`moisture`] | wet/dry basis, volumetric/gravimetric (the one place for conversions) |
//! | [`cell`] | admittance <-> permittivity, two-point calibration, verification |
//! | [`ide`] | interdigital electrodes: cell constant, penetration depth, window cost |
//! | [`invert`] | two-frequency relaxation inversion |
//! | [`product`] | product calibration models and their flat parameter layout |
//! | [`estimate`] | the device-side chain: permittivity -> moisture, uncertainty, flags |
//! | [`synth`] | a synthetic product for the simulator, tests and demo |
//! | [`temperature`] | Pt RTD (IEC 60751), NTC beta and Steinhart-Hart |
//!
//! ## Maths on the device: libm, not micromath
//!
//! Every transcendental function is `libm`'s, called explicitly through
//! [`Real`]. Measured by `tests/micromath_accuracy.rs` (micromath 2.1 against
//! std f64 over the ranges the code uses):
//!
//! | micromath 2.1 function, range | worst error vs std f64 (relative unless marked) |
//! | --- | --- |
//! | sqrt [1e-6, 1e6] | 6.07e-2 |
//! | exp [-30, 30] | 2.39e-3 |
//! | ln [1e-7, 1e9] (absolute) | 1.18e-1 |
//! | powf x^0.5, x in [0.01, 100] | 5.72e-2 |
//! | powf x^0.8, x in [0.01, 100] | 8.99e-2 |
//! | sin [0.3, pi/2] | 3.06e-3 |
//! | cos [0, 1.2] | 1.78e-3 |
//! | log10 [1e-3, 1e3] (absolute) | 5.11e-2 |
//! | asin [-0.99, 0.99] | 9.50e-2 |
//! | atan2, full circle (absolute, rad) | 2.83e-3 |
//! | (libm sqrtf, same range) | 5.93e-8 |
//!
//! and what each would do to a moisture result (45 synthetic readings,
//! f32 chain against the f64 chain; the limit is 0.01 % moisture):
//!
//! | functions on micromath | worst moisture error vs f64, % | readings without moisture (of 45) |
//! | --- | --- | --- |
//! | libm only (the shipped f32 path) | 5.60e-5 | 0 |
//! | micromath sqrt | 6.42e-1 | 4 |
//! | micromath exp | 1.96e-1 | 0 |
//! | micromath ln | 9.88e-1 | 0 |
//! | micromath powf | 1.16e-2 | 0 |
//! | micromath sin | 3.35e-2 | 0 |
//! | micromath cos | 1.50e-2 | 0 |
//! | micromath everywhere | 3.94e0 | 4 |
//!
//! ## Device and host
//!
//! The firmware calls [`estimate::estimate`] (or
//! [`estimate::estimate_from_admittance`]) with `f32`; the host runs the same
//! functions in `f64`. A [`product::ProductCalibration`] is rebuilt on either
//! side from `fringe_protocol::ProductCal` by
//! [`product::ProductCalibration::from_parts`]; [`estimate::EstimateFlags`]
//! bits equal `fringe_protocol::Flags` bits.
#![cfg_attr(not(any(test, feature = "std")), no_std)]
#![forbid(unsafe_code)]
#![warn(missing_docs)]
// `!(x > 0)` is used on purpose: it rejects NaN, which `x <= 0` would let through.
#![allow(clippy::neg_cmp_op_on_partial_ord)]
// Small fixed-size matrix code reads better with explicit indices.
#![allow(clippy::needless_range_loop)]

pub mod cell;
pub mod dielectric;
pub mod estimate;
pub mod ide;
pub mod invert;
pub mod mixing;
pub mod moisture;
pub mod product;
pub mod real;
pub mod synth;
pub mod temperature;
pub mod water;

pub use real::{Cx, Real};

/// Vacuum permittivity, F/m (CODATA 2018).
pub const EPS0: f64 = 8.854_187_812_8e-12;

#[cfg(feature = "fit")]
pub mod fit;
#[cfg(feature = "fit")]
pub mod regression;
#[cfg(feature = "fit")]
pub mod stats;
