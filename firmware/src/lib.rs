//! # fringe-firmware: the sensor's core
//!
//! The firmware stages of docs/DESIGN.md, top to bottom, each a module:
//!
//! - [`hal`]: the hardware seam (front end, 4-20 mA DAC, watchdog, clock);
//! - [`demod`]: Goertzel demodulation of sensor and reference channels,
//!   complex ratio, noise and SNR, robust averaging;
//! - [`measure`]: the measurement schedule (two frequencies, temperature,
//!   reference check, empty-line and electrode checks) and the estimation
//!   through `fringe-calibration`;
//! - [`storage`] on [`flash`]: settings, calibrations, counters, reading and
//!   event logs on a NOR flash through `sequential-storage`;
//! - [`output`]: moisture to 4-20 mA with NAMUR NE 43 signalling;
//! - [`settings`]: the plant's device settings (tag, interval, span,
//!   failure level, stale-output timeout), their defaults and checks;
//! - [`device`]: the [`Device`] that owns all of it, measures on its own
//!   schedule from `poll`, answers the protocol;
//! - [`modbus`]: the Modbus RTU slave serving the device's input registers
//!   (`fringe-registers`) on RS-485, and the half-duplex transmitter;
//! - `sim` (feature `sim`): a simulated front end, physically honest.
//!
//! No heap, no globals, no panics reachable from input; the only clocks are
//! the `now_ms` argument of [`Device::poll`] and the `now_us`/`at_us`
//! arguments of the Modbus slave.
#![cfg_attr(not(any(test, feature = "std")), no_std)]
#![forbid(unsafe_code)]
#![warn(missing_docs)]
#![cfg_attr(
    not(test),
    deny(
        clippy::unwrap_used,
        clippy::expect_used,
        clippy::indexing_slicing,
        clippy::panic
    )
)]

pub mod demod;
pub mod device;
pub mod flash;
pub mod hal;
pub mod measure;
pub mod modbus;
pub mod output;
pub mod settings;
#[cfg(feature = "sim")]
pub mod sim;
pub mod storage;

pub use device::{BootError, Booted, Device, DeviceConfig, Diagnostics};
pub use flash::RamFlash;
pub use fringe_protocol as protocol;
pub use hal::{CurrentOutput, Frontend, Watchdog};
#[cfg(feature = "sim")]
pub use sim::{Scenario, SimFrontend};
