//! # fringe-calibration: the physics and statistics behind a Fringe reading
//!
//! The `cell`, `invert` and `estimate` stages of DESIGN.md live here as pure
//! functions: the firmware evaluates them in `f32` without a heap; the host
//! fits them in `f64` behind the `fit` feature.
#![cfg_attr(not(any(test, feature = "std")), no_std)]
#![forbid(unsafe_code)]
#![warn(missing_docs)]

/// Vacuum permittivity, F/m (CODATA 2018).
pub const EPS0: f64 = 8.854_187_812_8e-12;

#[cfg(feature = "fit")]
pub mod fit;
#[cfg(feature = "fit")]
pub mod stats;
