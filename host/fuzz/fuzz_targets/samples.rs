//! Fuzz target for the reference-sample CSV reader
//! (`fringe_quality::samples::parse_samples`).
//!
//! Beyond "never panics": a table it accepts holds what its documentation
//! promises (ids unique and non-empty, finite numbers within the stated
//! limits, one frequency pair), and what `write_samples` writes from it
//! reads back with the same ids in the same order; a sample merged into it
//! (`merge_samples`) leaves its rows the same samples.
#![no_main]

use std::path::Path;

use fringe_quality::samples::{
    merge_samples, parse_samples, write_samples, Basis, MoistureColumn, RefSample, SampleSet,
};
use libfuzzer_sys::fuzz_target;

fn check(set: &SampleSet, moisture: MoistureColumn, basis: Basis) {
    let max = match basis {
        Basis::Wet => 100.0,
        Basis::Dry => fringe_quality::samples::MAX_DRY_BASIS_PCT,
    };
    assert!(!set.samples.is_empty(), "an accepted table has a sample");
    let [f1, f2] = set.freqs_hz;
    assert!(f1 > 0.0 && f1 < f2 && f2.is_finite(), "{:?}", set.freqs_hz);
    for (i, s) in set.samples.iter().enumerate() {
        assert!(!s.sample_id.is_empty());
        assert!(
            set.samples[..i].iter().all(|p| p.sample_id != s.sample_id),
            "duplicate id {:?} accepted",
            s.sample_id
        );
        match s.moisture_pct {
            Some(m) => assert!((0.0..max).contains(&m), "moisture {m} on {basis:?}"),
            None => assert_eq!(moisture, MoistureColumn::Optional),
        }
        assert!((-40.0..=150.0).contains(&s.temperature_c));
        if let Some(r) = s.bulk_density_kg_m3 {
            assert!((10.0..=5000.0).contains(&r), "bulk density {r}");
        }
        for k in 0..2 {
            assert!(s.eps_re[k].is_finite() && s.eps_re[k] >= 1.0);
            assert!(s.eps_im[k].is_finite() && s.eps_im[k] >= 0.0);
            assert!((s.freqs_hz[k] - set.freqs_hz[k]).abs() <= 1e-6 * set.freqs_hz[k]);
        }
    }
    assert_eq!(
        set.all_have_moisture,
        set.samples.iter().all(|s| s.moisture_pct.is_some())
    );
    // Written back (values rounded to the columns' digits), the ids survive.
    let mut out = Vec::new();
    write_samples(&mut out, &set.samples).expect("writes to memory");
    if let Ok(again) = parse_samples(
        Path::new("again.csv"),
        &out,
        MoistureColumn::Optional,
        basis,
    ) {
        let ids = |s: &SampleSet| {
            s.samples
                .iter()
                .map(|r| r.sample_id.clone())
                .collect::<Vec<_>>()
        };
        assert_eq!(ids(set), ids(&again), "ids written back");
    }
}

/// `data`, accepted as `set` on `basis`, with a new sample merged in (as
/// `cal capture` adds one): where it reads back, the rows it had are the
/// same samples (their fields kept as typed) and the new one is last, with
/// its lab value (a table without the column gains it).
fn check_merge(data: &[u8], set: &SampleSet, basis: Basis) {
    let mut id = String::from("new");
    while set.samples.iter().any(|s| s.sample_id == id) {
        id.push('x');
    }
    let new = RefSample {
        sample_id: id.clone(),
        moisture_pct: Some(12.5),
        moisture_basis: Some(basis),
        ..set.samples[0].clone()
    };
    let merged = merge_samples(Path::new("fuzz/lab.csv"), data, std::slice::from_ref(&new))
        .expect("an accepted table merges");
    // The new row's numbers are rounded to the columns' digits, which can
    // take a value over a limit (99.996 % to 100.00 %): then it is refused.
    if let Ok(again) = parse_samples(
        Path::new("merged.csv"),
        &merged,
        MoistureColumn::Optional,
        basis,
    ) {
        assert_eq!(again.samples.len(), set.samples.len() + 1);
        for (a, b) in set.samples.iter().zip(&again.samples) {
            let b = RefSample {
                line: a.line,
                ..b.clone()
            };
            assert_eq!(a, &b, "a row kept as it was");
        }
        let last = again.samples.last().expect("rows");
        assert_eq!(
            (&last.sample_id, last.moisture_pct, last.moisture_basis),
            (&id, Some(12.5), Some(basis)),
            "the new row with its lab value"
        );
    }
}

fuzz_target!(|data: &[u8]| {
    for moisture in [MoistureColumn::Required, MoistureColumn::Optional] {
        for basis in [Basis::Wet, Basis::Dry] {
            if let Ok(set) = parse_samples(Path::new("fuzz/lab.csv"), data, moisture, basis) {
                check(&set, moisture, basis);
                if moisture == MoistureColumn::Optional {
                    check_merge(data, &set, basis);
                }
            }
        }
    }
});
