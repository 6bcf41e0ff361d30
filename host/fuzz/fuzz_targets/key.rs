//! Fuzz target for device key files (`fringe_device::key::parse_key`).
//!
//! Beyond "never panics": a key it accepts is exactly the file's text with
//! whitespace and a leading byte-order mark removed, read as 64 hex digits
//! (written back as hex, it is that text, ignoring case).
#![no_main]

use std::path::Path;

use fringe_device::key::parse_key;
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    match parse_key(Path::new("fuzz/dev.key"), data) {
        Ok(key) => {
            let text = std::str::from_utf8(data).expect("an accepted key file is text");
            let text = text.strip_prefix('\u{feff}').unwrap_or(text);
            let digits: String = text.split_whitespace().collect();
            let hex: String = key.iter().map(|b| format!("{b:02x}")).collect();
            assert_eq!(
                digits.to_ascii_lowercase(),
                hex,
                "the key is the file's digits"
            );
        }
        Err(e) => {
            // The message never shows the key file's contents.
            let msg = e.to_string();
            assert!(msg.contains("fuzz/dev.key"), "{msg}");
        }
    }
});
