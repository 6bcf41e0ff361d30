//! The provisioning record: serial number and write key, written once at
//! production into the last 2 KiB page of flash bank 2 (offset
//! [`OFFSET`]), outside the device's storage.
//!
//! ```text
//! offset  0   8 bytes  magic "FRNGPRV1"
//!         8  16 bytes  serial, ASCII 0x21..=0x7E, NUL-padded, 1..=16 characters
//!        24  32 bytes  write key (HMAC-SHA256), not all 0x00 and not all 0xFF
//! ```
//! The device's storage keeps its own copy once it has booted (a stored
//! identity wins, `fringe_firmware::DeviceConfig`); the record only names
//! a blank device. A missing or malformed record means the board does not
//! run (`main::unprovisioned`): it never makes up a key.

use embassy_stm32::flash::{Blocking, Flash};
use heapless::String;

/// Offset of the record from the start of flash (0x0807_F800).
pub const OFFSET: u32 = 0x7_F800;
/// First bytes of a record.
pub const MAGIC: [u8; 8] = *b"FRNGPRV1";

/// The serial and key, if the record is there and well formed.
pub fn read(flash: &mut Flash<'static, Blocking>) -> Option<(String<16>, [u8; 32])> {
    let mut rec = [0u8; 56];
    flash.blocking_read(OFFSET, &mut rec).ok()?;
    let (magic, rest) = rec.split_at(8);
    let (serial, key) = rest.split_at(16);
    if magic != MAGIC {
        return None;
    }
    let len = serial.iter().position(|&b| b == 0).unwrap_or(serial.len());
    let (text, pad) = serial.split_at(len);
    if len == 0 || !text.iter().all(|b| (0x21..=0x7E).contains(b)) || pad.iter().any(|&b| b != 0) {
        return None;
    }
    if key.iter().all(|&b| b == 0) || key.iter().all(|&b| b == 0xFF) {
        return None;
    }
    let mut s = String::new();
    for &b in text {
        s.push(char::from(b)).ok()?;
    }
    let mut k = [0u8; 32];
    k.copy_from_slice(key);
    Some((s, k))
}
