//! Fuzz target for the simulator's scenario files
//! (`fringe_sim::scenario::Scenario::parse`).
//!
//! Beyond "never panics": the key of an accepted scenario is the file's
//! 64 hex digits, and the conditions of an accepted scenario, at every
//! point of its curves and halfway between, lie within the limits its
//! checks enforce on the points (a piecewise-linear curve cannot leave them).
#![no_main]

use std::path::Path;

use fringe_sim::scenario::Scenario;
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    let Ok(s) = Scenario::parse(Path::new("fuzz/scenario.toml"), text) else {
        return;
    };
    let key = s.key().expect("an accepted scenario has a key");
    let hex: String = key.iter().map(|b| format!("{b:02x}")).collect();
    assert_eq!(
        s.device.key.trim().to_ascii_lowercase(),
        hex,
        "the key is the file's digits"
    );
    let mut times: Vec<f64> = [
        &s.moisture_pct,
        &s.temperature_c,
        &s.water_conductivity_s_m,
        &s.bulk_density_kg_m3,
        &s.buildup_mm,
    ]
    .iter()
    .flat_map(|c| c.iter().map(|p| p[0]))
    .collect();
    times.sort_by(f64::total_cmp);
    let mids: Vec<f64> = times
        .windows(2)
        .map(|w| w[0] + (w[1] - w[0]) / 2.0)
        .collect();
    times.extend(mids);
    times.push(0.0);
    for t in times.into_iter().take(64) {
        let c = s.at(t);
        let within = |v: f64, lo: f64, hi: f64| (lo..=hi).contains(&v);
        assert!(
            within(c.moisture_pct, 0.0, 100.0)
                && within(c.temperature_c, -40.0, 150.0)
                && within(c.water_conductivity_s_m, 0.0, 20.0)
                && within(c.bulk_density_kg_m3, 10.0, 3000.0)
                && within(c.buildup_mm, 0.0, 10.0),
            "conditions at t = {t}: {c:?}"
        );
    }
});
