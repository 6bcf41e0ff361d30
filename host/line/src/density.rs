//! The plant's bulk density sent to a device (protocol 1.4), for a product
//! calibration with a density input.

use fringe_link::{Link, LinkError};
use fringe_protocol::auth::Key;
use fringe_protocol::{Capabilities, Request, Response};

/// Why a density could not be sent.
#[derive(Debug, thiserror::Error)]
pub enum DensityError {
    /// The device cannot take one (firmware before protocol 1.4).
    #[error(
        "{serial} has no density input (it speaks protocol {protocol}; 1.4 added it): nothing sent"
    )]
    NoInput {
        /// The device serial.
        serial: String,
        /// Its protocol version.
        protocol: String,
    },
    /// The link or the device refused.
    #[error(transparent)]
    Link(#[from] LinkError),
}

/// Sends the plant's bulk density `kg_m3`, to hold `hold_ms` (authenticated;
/// the device checks both, see `protocol/WIRE.md`). The request names the
/// device's current boot, read from its status just before.
///
/// # Errors
/// [`DensityError::NoInput`] for a device without the input; the device's
/// refusal (a value out of range, a bad key) as [`LinkError`].
pub fn set_density(
    link: &mut Link,
    key: &Key,
    kg_m3: f32,
    hold_ms: u32,
) -> Result<(), DensityError> {
    if !link
        .identity()
        .is_some_and(|id| id.capabilities.contains(Capabilities::DENSITY_INPUT))
    {
        return Err(DensityError::NoInput {
            serial: link.serial_number().to_string(),
            protocol: link
                .identity()
                .map_or_else(|| "?".to_string(), |id| id.protocol.to_string()),
        });
    }
    let boot = link.status()?.boot;
    match link.request_signed(
        Request::SetDensity {
            boot,
            kg_m3,
            hold_ms,
        },
        key,
    )? {
        Response::Ack => Ok(()),
        other => Err(LinkError::Unexpected {
            request: "SetDensity",
            got: format!("{other:?}"),
        }
        .into()),
    }
}
