//! Fuzz target for the audit bundle reader
//! (`fringe_quality::audit::verify_files`, what `fringe audit verify` runs).
//!
//! The input is a whole bundle: its files separated by NUL bytes, in the
//! order manifest.json, records.jsonl, calibrations_in_force.json, then the
//! CSV files (devices, readings, events, calibrations, lab_samples,
//! reference_checks), then clocks_in_force.json (`audit::SEED_ORDER`); a
//! file left off is missing. The reader must never panic, and its report must
//! serialise for `--json`.
#![no_main]

use std::collections::BTreeMap;

use fringe_quality::audit::{verify_files, SEED_ORDER as NAMES};
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let files: BTreeMap<String, Vec<u8>> = NAMES
        .iter()
        .zip(data.split(|b| *b == 0))
        .map(|(n, b)| ((*n).to_string(), b.to_vec()))
        .collect();
    if let Ok(report) = verify_files(&files) {
        serde_json::to_string(&report).expect("the report serialises");
        if report.ok() {
            assert!(report.bundle_last.is_some(), "a good bundle has records");
        }
    }
});
