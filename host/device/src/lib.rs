//! # fringe-device: work on one device with a person at hand
//!
//! The changes a person makes to a device, each through the link with the
//! device key (HMAC write tag), read back and checked by id, and recorded
//! in the store with who, when, why, the old and the new id
//! (`fringe_quality::analysis::CalRecordBody`):
//!
//! - [`cell`]: the guided bench cell calibration;
//! - [`capture`]: reference samples captured from the device;
//! - [`product`]: product calibrations pushed, listed, selected;
//! - [`settings`]: the device settings;
//! - [`key`]: device key files; [`guide`]: how a procedure talks to the
//!   person (the binary's terminal, the demo's simulated world).
//!
//! It uses the link, the store and the quality crate's file formats; it
//! prints nothing (what a person must see goes through the [`guide::Guide`]).
#![forbid(unsafe_code)]
#![warn(missing_docs)]

pub mod capture;
pub mod cell;
pub mod guide;
pub mod key;
pub mod landed;
pub mod measure;
pub mod product;
mod record;
pub mod settings;

pub use record::record;

/// The caution shown before any change to a device on a line.
pub const LINE_CAUTION: &str = "CAUTION: a new calibration changes the moisture value and the 4-20 mA output at once. \
If the sensor is on a running line, tell the control room first and put dependent loops (dryer control, \
diversion) in manual; do any work at the sensor itself only with the line stopped, isolated and locked out \
under your site's procedure. Local codes and site rules come first.";

/// The caution shown before settings are written.
pub const SETTINGS_CAUTION: &str = "CAUTION: new settings change the 4-20 mA output at once (a new span moves the current \
for the same moisture; a new failure level changes what a fault looks like to the control system). If the sensor \
is on a running line, tell the control room first and put dependent loops (dryer control, diversion) in manual; \
check the receiving side's scaling matches the new span. Local codes and site rules come first.";

/// The caution shown before the Modbus RTU settings are written.
pub const MODBUS_CAUTION: &str = "CAUTION: new Modbus settings take effect on the RS-485 line at once: the PLC or \
SCADA master polling this device at its old unit id, baud rate or parity gets no answer from then on and will \
treat the moisture as lost (its own failure handling, alarms, loops in automatic) until the master is changed \
to the new settings too. Tell the control room first, put dependent loops in manual, and change the master \
right after; on a shared bus make sure no other device already has the new unit id. Local codes and site rules \
come first.";
