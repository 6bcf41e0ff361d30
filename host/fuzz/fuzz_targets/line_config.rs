//! Fuzz target for the line file of `fringe monitor` and `fringe pull`
//! (`LineConfig::parse` of `host/src/config.rs`, compiled in from that
//! file). It must never panic, and what it accepts has a valid baud rate
//! and alarm limits.
#![no_main]

use std::path::Path;

use libfuzzer_sys::fuzz_target;

#[path = "../../src/config.rs"]
#[allow(dead_code, unused_imports)]
mod config;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    if let Ok(c) = config::LineConfig::parse(Path::new("fuzz/line.toml"), text) {
        if let Some(b) = c.baud {
            assert!((300..=4_000_000).contains(&b), "baud {b} accepted");
        }
        assert!(c.alarm.validate().is_ok(), "bad alarm limits accepted");
    }
});
