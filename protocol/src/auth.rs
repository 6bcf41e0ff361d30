//! Write authentication: HMAC-SHA256 (RFC 2104, FIPS 180-4) tags.
//!
//! Every request that changes the device ([`Request::needs_auth`]) carries an
//! [`Auth`] with a counter and a tag over:
//!
//! ```text
//! "FRINGE-W1" | len(serial): u8 | serial (ASCII) | counter: u32 LE | postcard(request)
//! ```
//!
//! The device keeps the highest counter it accepted and refuses any counter
//! not above it (replay); that bookkeeping lives in the firmware. The key is
//! 32 bytes, unique per device, set at commissioning.

use hmac::{KeyInit, Mac};
use sha2::Sha256;

use crate::frame::MAX_PAYLOAD_LEN;
use crate::msg::{Auth, AuthFailure, Request};

type HmacSha256 = hmac::Hmac<Sha256>;

/// Length of a device key, bytes.
pub const KEY_LEN: usize = 32;
/// A device key.
pub type Key = [u8; KEY_LEN];

const DOMAIN: &[u8] = b"FRINGE-W1";

fn mac_over(key: &Key, serial: &str, counter: u32, payload: &[u8]) -> Option<HmacSha256> {
    // HMAC accepts keys of any length, so this never fails for a 32-byte key.
    let mut mac = HmacSha256::new_from_slice(key).ok()?;
    let s = serial.as_bytes();
    let s = s.get(..s.len().min(255)).unwrap_or(&[]);
    mac.update(DOMAIN);
    mac.update(&[s.len() as u8]);
    mac.update(s);
    mac.update(&counter.to_le_bytes());
    mac.update(payload);
    Some(mac)
}

/// Tag over already-encoded request bytes.
pub fn tag_bytes(key: &Key, serial: &str, counter: u32, payload: &[u8]) -> [u8; 32] {
    let mut tag = [0u8; 32];
    if let Some(mac) = mac_over(key, serial, counter, payload) {
        tag.copy_from_slice(&mac.finalize().into_bytes());
    }
    tag
}

/// Builds the [`Auth`] for `request` with `counter`.
///
/// Returns `None` only if the request cannot be encoded within a frame.
pub fn sign(key: &Key, serial: &str, counter: u32, request: &Request) -> Option<Auth> {
    let mut buf = [0u8; MAX_PAYLOAD_LEN];
    let payload = postcard::to_slice(request, &mut buf).ok()?;
    Some(Auth {
        counter,
        tag: tag_bytes(key, serial, counter, payload),
    })
}

/// Checks the tag of `request` (constant-time comparison). The counter's
/// freshness is the caller's to check.
///
/// # Errors
/// [`AuthFailure::Missing`] without a tag, [`AuthFailure::BadTag`] when it
/// does not verify.
pub fn verify(
    key: &Key,
    serial: &str,
    auth: Option<&Auth>,
    request: &Request,
) -> Result<u32, AuthFailure> {
    let auth = auth.ok_or(AuthFailure::Missing)?;
    let mut buf = [0u8; MAX_PAYLOAD_LEN];
    let payload = postcard::to_slice(request, &mut buf).map_err(|_| AuthFailure::BadTag)?;
    mac_over(key, serial, auth.counter, payload)
        .ok_or(AuthFailure::BadTag)?
        .verify_slice(&auth.tag)
        .map_err(|_| AuthFailure::BadTag)?;
    Ok(auth.counter)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn hex(s: &str) -> std::vec::Vec<u8> {
        (0..s.len())
            .step_by(2)
            .map(|i| u8::from_str_radix(&s[i..i + 2], 16).unwrap())
            .collect()
    }

    #[test]
    fn rfc4231_case_1_and_2() {
        // RFC 4231 section 4.2 (test case 1) and 4.3 (test case 2), HMAC-SHA-256.
        let mut m = HmacSha256::new_from_slice(&[0x0b; 20]).unwrap();
        m.update(b"Hi There");
        assert_eq!(
            m.finalize().into_bytes().as_slice(),
            hex("b0344c61d8db38535ca8afceaf0bf12b881dc200c9833da726e9376c2e32cff7").as_slice()
        );
        let mut m = HmacSha256::new_from_slice(b"Jefe").unwrap();
        m.update(b"what do ya want for nothing?");
        assert_eq!(
            m.finalize().into_bytes().as_slice(),
            hex("5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843").as_slice()
        );
    }

    #[test]
    fn sign_verify_and_tamper() {
        let key = [7u8; 32];
        let req = Request::SelectProduct { slot: 3 };
        let auth = sign(&key, "FR-0001", 42, &req).unwrap();
        assert_eq!(verify(&key, "FR-0001", Some(&auth), &req), Ok(42));
        assert_eq!(
            verify(&[8u8; 32], "FR-0001", Some(&auth), &req),
            Err(AuthFailure::BadTag)
        );
        assert_eq!(
            verify(&key, "FR-0002", Some(&auth), &req),
            Err(AuthFailure::BadTag)
        );
        assert_eq!(
            verify(
                &key,
                "FR-0001",
                Some(&auth),
                &Request::SelectProduct { slot: 4 }
            ),
            Err(AuthFailure::BadTag)
        );
        let mut bad = auth;
        bad.tag[5] ^= 1;
        assert_eq!(
            verify(&key, "FR-0001", Some(&bad), &req),
            Err(AuthFailure::BadTag)
        );
        let mut bad = auth;
        bad.counter += 1;
        assert_eq!(
            verify(&key, "FR-0001", Some(&bad), &req),
            Err(AuthFailure::BadTag)
        );
        assert_eq!(
            verify(&key, "FR-0001", None, &req),
            Err(AuthFailure::Missing)
        );
    }
}
