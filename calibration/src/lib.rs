//! # fringe-calibration: the physics and statistics behind a Fringe reading
//!
//! The `cell`, `invert` and `estimate` stages of DESIGN.md live here as pure
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
pub mod stats;
