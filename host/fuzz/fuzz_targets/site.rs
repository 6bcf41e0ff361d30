//! Fuzz target for the gateway's site file (`Site::parse` of
//! `host/gateway/src/site.rs`, compiled in from that file). It must never
//! panic, and an accepted site's `Debug` form (which hides passwords) builds.
#![no_main]

use std::path::Path;

use libfuzzer_sys::fuzz_target;

#[path = "../../gateway/src/site.rs"]
#[allow(dead_code)]
mod site;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    if let Ok(site) = site::Site::parse(Path::new("fuzz/site.toml"), text) {
        let _ = format!("{site:?}");
    }
});
