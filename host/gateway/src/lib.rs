//! Fringe's plant outputs, for many devices in one process: what the
//! gateway serves to a plant's control and information systems.
//!
//! - [`live`]: the latest reading of every device, shared between the line
//!   sessions that fill it and the servers that read it.
//! - [`modbus`]: a Modbus TCP server of [`live`] with the register map of
//!   `fringe-registers` (one unit id per device), read-only but for the
//!   bulk density a listed PLC may write to a unit whose site entry takes it.
//! - [`sparkplug`], [`outbox`], [`mqtt`]: readings and alarms to the plant's
//!   MQTT broker as Sparkplug B (or plain JSON), QoS 1, with a
//!   store-and-forward buffer on disk.
//! - [`web`]: the read-only live page for the control room.
//! - [`density`]: the plant's bulk density from the broker or a PLC to the
//!   devices that take one.
//! - [`site`]: site files; [`run`]: the gateway itself, a line session per
//!   device into one store ([`shared`]) feeding the outputs above;
//!   [`lease`]: which gateway runs which device when several share a store.
//!
//! Time comes in as [`std::time::Instant`] arguments where ages matter, so
//! tests drive it; nothing here prints.
#![forbid(unsafe_code)]
#![warn(missing_docs)]

pub mod density;
pub mod lease;
pub mod live;
pub mod modbus;
pub mod mqtt;
pub mod outbox;
pub mod run;
pub mod shared;
pub mod site;
pub mod sparkplug;
pub mod web;
