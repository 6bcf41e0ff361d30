//! # fringe-protocol: the wire between a Fringe sensor and its host
//!
//! This crate is the `report` stage of the firmware and the `link` stage of
//! the host (see docs/DESIGN.md). It holds, with no heap and no panics:
//!
//! - [`version`]: the protocol version carried in every frame header, and the
//!   handshake rule (a major mismatch is refused on both sides);
//! - [`msg`]: the typed messages (requests from the host, responses, readings,
//!   events and errors from the device) serialised with postcard;
//! - [`frame`]: framing (header + postcard payload + CRC-32, COBS, `0x00`
//!   delimiter) and the streaming [`frame::FrameDecoder`] that resynchronises
//!   after garbage and counts every kind of error;
//! - [`quant`]: the compact (2-byte) wire forms of a few reading fields that
//!   keep a streamed reading within 64 bytes;
//! - [`auth`]: HMAC-SHA256 tags over device serial, a monotonic counter and
//!   the encoded request, for every request that changes the device.
//!
//! The byte layout is written down in `protocol/WIRE.md`; golden byte tests
//! keep it from changing by accident. postcard is not self-describing: enum
//! variants are only ever appended, never reordered or removed.
#![cfg_attr(not(any(test, feature = "std")), no_std)]
#![forbid(unsafe_code)]
#![warn(missing_docs)]

pub mod auth;
pub mod frame;
pub mod msg;
pub mod quant;
pub mod version;

pub use frame::{FrameDecoder, FrameError, MAX_FRAME_LEN, MAX_PAYLOAD_LEN};
pub use msg::*;
pub use version::{Version, PROTOCOL_VERSION};
