//! # fringe-firmware: the sensor's core
//!
//! Front-end seam, demodulation, measurement schedule, estimation, flash
//! storage, command handling, current output and the device loop. Runs
//! unchanged on the host (simulated front end) and on a Cortex-M4F.
#![cfg_attr(not(any(test, feature = "std")), no_std)]
#![forbid(unsafe_code)]
#![warn(missing_docs)]

pub use fringe_protocol as protocol;
