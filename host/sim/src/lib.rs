//! # fringe-sim: a simulated device
//!
//! The real firmware core (`fringe-firmware`) on its simulated front end,
//! so that everything the host does can be rehearsed without a sensor:
//!
//! - [`scenario`]: scenario files (what the sensor sees over time, what
//!   the serial line does to the bytes); [`toml_file`]: their loader with
//!   located errors;
//! - [`firmware`]: the device ([`firmware::FirmwareSim`]) behind the
//!   [`device::SimDevice`] seam;
//! - [`pty`]: the simulator on a pseudo-terminal, with line faults
//!   ([`faults`]) and disconnects (`fringe sim`);
//! - [`live`]: a scenario's device inside this process on the wall clock
//!   (a gateway's `sim:` devices);
//! - [`port`]: a simulated device inside this process behind the link's
//!   `Port` seam, on a virtual clock (the demo and tests).
//!
//! It prints nothing: what happens is told to a callback.
#![forbid(unsafe_code)]
#![warn(missing_docs)]

pub mod device;
pub mod faults;
pub mod firmware;
pub mod live;
pub mod port;
pub mod pty;
pub mod scenario;
pub mod toml_file;
