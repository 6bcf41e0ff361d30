//! Wilcoxon's signed-rank test (`stats::signed_rank`, the model choice of
//! `fit::product::compare_models`) and the normal quantile against SciPy
//! 1.17.1: `tests/data/scipy/signed_rank_reference.json`, made once by
//! `tests/data/scipy/make_signed_rank_reference.py` (versions in the file;
//! pinned in tests/python/requirements.txt). An outside check: SciPy's
//! `wilcoxon` (normal approximation, no continuity correction, zeros
//! dropped, tie-corrected variance) and `norm.ppf`.

use fringe_calibration::stats::{normal_quantile, signed_rank};
use serde_json::Value;

fn reference() -> Value {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/data/scipy/signed_rank_reference.json"
    );
    serde_json::from_str(&std::fs::read_to_string(path).expect("file")).expect("json")
}

#[test]
fn signed_rank_matches_scipy_on_three_cases() {
    let r = reference();
    assert_eq!(r["versions"]["scipy"], "1.17.1");
    let cases = r["cases"].as_object().expect("cases");
    assert_eq!(cases.len(), 3);
    for (name, c) in cases {
        let d: Vec<f64> = c["d"]
            .as_array()
            .expect("d")
            .iter()
            .map(|v| v.as_f64().expect("number"))
            .collect();
        let got = signed_rank(&d).expect("enough differences");
        let (w, z) = (
            c["w_plus"].as_f64().expect("w_plus"),
            c["z"].as_f64().expect("z"),
        );
        assert!(
            (got.w_plus - w).abs() < 1e-9,
            "{name}: W+ {} vs SciPy {w}",
            got.w_plus
        );
        assert!((got.z - z).abs() < 1e-9, "{name}: z {} vs SciPy {z}", got.z);
        assert_eq!(got.m, d.iter().filter(|v| **v != 0.0).count(), "{name}");
    }
    // The case the test is for: a few large differences of either sign
    // leave the t test at p 0.5, the signed ranks see the shift (z 3.0).
    let h = &cases["heavy_tails"];
    assert!(h["t_p"].as_f64().unwrap() > 0.4 && h["p"].as_f64().unwrap() < 0.01);
}

#[test]
fn normal_quantile_matches_scipy() {
    let r = reference();
    let want = r["normal_quantile_0_95"].as_f64().expect("quantile");
    let got = normal_quantile(0.95).expect("p in (0, 1)");
    assert!((got - want).abs() < 1e-9, "{got} vs SciPy {want}");
    assert!(normal_quantile(1.0).is_err() && normal_quantile(f64::NAN).is_err());
}

/// Fewer than three non-zero differences, or a non-finite one: no test.
#[test]
fn signed_rank_refuses_too_few_or_non_finite_differences() {
    assert!(signed_rank(&[0.0, 1.0, -2.0, 0.0]).is_none());
    assert!(signed_rank(&[1.0, 2.0, f64::NAN, 3.0]).is_none());
    assert!(signed_rank(&[1.0, 2.0, 3.0]).is_some());
}
