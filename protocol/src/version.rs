//! Protocol version and the handshake rule.
//!
//! Every frame header carries the version as one byte, `major << 4 | minor`
//! (so both are limited to 0..=15 on the wire). The handshake
//! ([`crate::Request::Identify`] / [`crate::Response::Identity`]) carries the
//! full version; the rule is the same on both sides: equal majors talk, any
//! minor is accepted (a newer minor only appends message variants, which an
//! older peer answers with [`crate::ErrorCode::UnknownRequest`]).

use core::fmt;
use serde::{Deserialize, Serialize};

/// A protocol version, `major.minor`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
pub struct Version {
    /// Incompatible changes raise the major version.
    pub major: u8,
    /// Compatible additions (appended variants, appended fields in new messages).
    pub minor: u8,
}

/// The version this crate speaks.
///
/// 1.1 added [`crate::Settings`] with `ReadSettings`/`WriteSettings`, the
/// `SettingsChanged` event, the `StaleOutput` fault and the `SETTINGS`
/// capability (a device that measures on its own schedule).
///
/// 1.2 added [`crate::ModbusSettings`] with `ReadModbus`/`WriteModbus`,
/// the `Modbus` response, the `ModbusChanged` event and the `MODBUS_RTU`
/// capability (the Modbus RTU unit id, baud rate and parity as device
/// settings).
///
/// 1.3 added [`crate::AuthFailure::Throttled`]: a write refused unchecked
/// because the device holds writes off after repeated failed ones.
///
/// 1.4 added [`crate::Request::SetDensity`] and the `DENSITY_INPUT`
/// capability: the plant's bulk density for a product calibration that
/// takes one.
pub const PROTOCOL_VERSION: Version = Version { major: 1, minor: 4 };

/// Why two versions cannot talk.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub struct VersionMismatch {
    /// Our version.
    pub ours: Version,
    /// The peer's version.
    pub theirs: Version,
}

impl fmt::Display for VersionMismatch {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "incompatible protocol version: we speak {}, the peer speaks {} (major versions must match)",
            self.ours, self.theirs
        )
    }
}

impl core::error::Error for VersionMismatch {}

impl Version {
    /// The one-byte header form, `major << 4 | minor`; `None` if either part exceeds 15.
    pub const fn header_byte(self) -> Option<u8> {
        if self.major > 15 || self.minor > 15 {
            None
        } else {
            Some((self.major << 4) | self.minor)
        }
    }

    /// Reads the one-byte header form.
    pub const fn from_header_byte(b: u8) -> Self {
        Self {
            major: b >> 4,
            minor: b & 0x0f,
        }
    }

    /// The handshake rule: equal majors are compatible.
    ///
    /// # Errors
    /// [`VersionMismatch`] when the majors differ.
    pub fn check_compatible(self, theirs: Version) -> Result<(), VersionMismatch> {
        if self.major == theirs.major {
            Ok(())
        } else {
            Err(VersionMismatch { ours: self, theirs })
        }
    }
}

impl fmt::Display for Version {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}.{}", self.major, self.minor)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn header_byte_round_trip() {
        for major in 0..16u8 {
            for minor in 0..16u8 {
                let v = Version { major, minor };
                let b = v.header_byte().unwrap();
                assert_eq!(Version::from_header_byte(b), v);
            }
        }
        assert_eq!(
            Version {
                major: 16,
                minor: 0
            }
            .header_byte(),
            None
        );
    }

    #[test]
    fn major_mismatch_refused_minor_accepted() {
        let ours = Version { major: 1, minor: 0 };
        assert!(ours
            .check_compatible(Version { major: 1, minor: 7 })
            .is_ok());
        let err = ours
            .check_compatible(Version { major: 2, minor: 0 })
            .unwrap_err();
        assert_eq!(err.theirs.major, 2);
        let text = std::format!("{err}");
        assert!(text.contains("1.0") && text.contains("2.0"), "{text}");
    }
}
