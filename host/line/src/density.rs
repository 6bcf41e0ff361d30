//! The plant's bulk density sent to a device (protocol 1.4), for a product
//! calibration with a density input.

use fringe_link::{Link, LinkError};
use fringe_protocol::auth::Key;
use fringe_protocol::{Capabilities, Request, Response, DENSITY_RANGE_KG_M3};

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

/// `v` as a bulk density the device takes, kg/m3 (its range, protocol
/// 1.4): the one check of `fringe device density` and the gateway's feed.
///
/// # Errors
/// A value outside it, in words (a value in g/cm3 is named as such).
pub fn check_density(v: f64) -> Result<f32, String> {
    let (lo, hi) = DENSITY_RANGE_KG_M3;
    if !v.is_finite() {
        return Err(format!("{v} is not a number"));
    }
    if v > 0.0 && v < f64::from(lo) {
        return Err(format!(
            "{v} kg/m3 is below {lo}: it looks like g/cm3 (send kg/m3, 1.65 g/cm3 = 1650 kg/m3)"
        ));
    }
    if !(f64::from(lo)..=f64::from(hi)).contains(&v) {
        return Err(format!("{v} kg/m3 is outside {lo}..={hi} kg/m3"));
    }
    Ok(v as f32)
}

/// The counter a density sent at device uptime `uptime_ms` carries: the
/// uptime in tenths of a second (at least 1), so that densities sent one
/// after another, from this process or another, rise without the host
/// keeping a count; a `u32` of them lasts 13 years of uptime. Two sent
/// within the same tenth of a second: the second is refused as a replay.
pub fn density_counter(uptime_ms: u64) -> u32 {
    u32::try_from(uptime_ms / 100).unwrap_or(u32::MAX).max(1)
}

/// Sends the plant's bulk density `kg_m3`, to hold `hold_ms` (authenticated;
/// the device checks both, see `protocol/WIRE.md`). The request names the
/// device's current boot and carries [`density_counter`] of its uptime,
/// both read from its status just before.
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
    set_density_after(link, key, kg_m3, hold_ms, None).map(|_| ())
}

/// As [`set_density`], for a sender that sends again and again: the
/// counter is above `after` (the boot and counter this sender used last,
/// as returned) when the boot is the same, so that two densities within
/// one tenth of a second of uptime are not taken for a replay. Returns the
/// boot and counter used.
///
/// # Errors
/// As [`set_density`].
pub fn set_density_after(
    link: &mut Link,
    key: &Key,
    kg_m3: f32,
    hold_ms: u32,
    after: Option<(u32, u32)>,
) -> Result<(u32, u32), DensityError> {
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
    let status = link.status()?;
    let mut counter = density_counter(status.uptime_ms);
    if let Some((boot, last)) = after {
        if boot == status.boot && counter <= last {
            counter = last.saturating_add(1);
        }
    }
    let request = Request::SetDensity {
        boot: status.boot,
        kg_m3,
        hold_ms,
    };
    // A density sent within a tenth of a second of uptime of the one
    // before it (another process, a command run twice quickly: the
    // device's uptime has not moved a tenth on) carries the same counter
    // and is refused as a replay; it is signed once more with the next
    // counter, as it would carry a moment later (the json test met this
    // with two `device density` runs in a row). Once only: each refusal
    // counts toward the device's hold-off of wrong writes.
    let mut answer = link.request_signed_with(request.clone(), key, counter);
    if let Err(LinkError::Refused { code, reason, .. }) = &answer {
        if *code == fringe_protocol::ErrorCode::AuthFailed.code()
            && reason.as_str() == fringe_protocol::AuthFailure::Replay.reason()
        {
            counter = counter.saturating_add(1);
            answer = link.request_signed_with(request, key, counter);
        }
    }
    match answer? {
        Response::Ack => Ok((status.boot, counter)),
        other => Err(LinkError::Unexpected {
            request: "SetDensity",
            got: format!("{other:?}"),
        }
        .into()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_counter_rises_with_the_uptime_and_is_never_zero() {
        assert_eq!(density_counter(0), 1);
        assert_eq!(density_counter(99), 1);
        assert_eq!(density_counter(250), 2);
        assert_eq!(density_counter(3_600_000), 36_000);
        // 13 years of uptime still fit; beyond, it stays at the top.
        assert_eq!(density_counter(13 * 365 * 86_400_000), 4_099_680_000);
        assert_eq!(density_counter(u64::MAX), u32::MAX);
    }
}
