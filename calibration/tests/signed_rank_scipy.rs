//! Wilcoxon's signed-rank test (`stats::signed_rank`, the model choice of
//! `fit::product::compare_models`) and the normal quantile against SciPy
//! 1.17.1 (the normal form on five cases, the exact p value on the three
//! without ties): `tests/data/scipy/signed_rank_reference.json`, made once by
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
fn signed_rank_matches_scipy_on_five_cases() {
    let r = reference();
    assert_eq!(r["versions"]["scipy"], "1.17.1");
    let cases = r["cases"].as_object().expect("cases");
    assert_eq!(cases.len(), 5);
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
        // The exact p value where SciPy gives one (no ties, no zeros).
        if let Some(p) = c["p_exact"].as_f64() {
            let e = got.p_exact.expect("few differences: exact");
            assert!((e - p).abs() < 1e-12, "{name}: exact p {e} vs SciPy {p}");
            assert!((got.p_greater() - p).abs() < 1e-12, "{name}");
        }
    }
    // The case the signed ranks are for: a few large differences of either
    // sign, among many small positive ones, hide the shift from a t test
    // (SciPy's t: p 0.50), not from the signed ranks.
    let h = &cases["heavy_tails"];
    assert!(h["t_p"].as_f64().unwrap() > 0.4, "the case as SciPy saw it");
    let d: Vec<f64> = h["d"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_f64().unwrap())
        .collect();
    let got = signed_rank(&d).unwrap();
    assert!(got.p_greater() < 0.01, "{got:?}");
    // Four positive differences of four: z 1.83 is past 1.645, but the
    // exact p is 1/16 (SciPy's exact), not significant at 5 %.
    let four = signed_rank(&[1.0, 2.0, 3.0, 4.0]).unwrap();
    assert!(four.z > normal_quantile(0.95).unwrap());
    assert!((four.p_greater() - 0.0625).abs() < 1e-12, "{four:?}");
}

/// With ties the exact p value is conditional on the tied ranks; checked
/// against every one of the 2^12 sign patterns counted one by one
/// (consistency test of the counting, not an outside check).
#[test]
fn the_exact_p_with_ties_counts_every_sign_pattern() {
    let d = [
        0.2, -0.2, 0.5, 0.0, 0.5, 0.1, -0.1, 0.3, 0.0, 0.2, 0.7, -0.5, 0.3, 0.2,
    ];
    let got = signed_rank(&d).unwrap();
    // Mid-ranks of the 12 non-zero |d| (0.1 x2, 0.2 x4, 0.3 x2, 0.5 x3, 0.7).
    let mut a: Vec<f64> = d.iter().filter(|v| **v != 0.0).map(|v| v.abs()).collect();
    a.sort_by(f64::total_cmp);
    let rank = |x: f64| {
        let below = a.iter().filter(|v| **v < x).count() as f64;
        let same = a.iter().filter(|v| **v == x).count() as f64;
        below + (same + 1.0) / 2.0
    };
    let ranks: Vec<f64> = a.iter().map(|v| rank(*v)).collect();
    let hits = (0u32..1 << 12)
        .filter(|signs| {
            let w: f64 = (0..12)
                .filter(|i| signs >> i & 1 == 1)
                .map(|i| ranks[i])
                .sum();
            w >= got.w_plus - 1e-9
        })
        .count();
    let p = hits as f64 / 4096.0;
    assert!((got.p_exact.unwrap() - p).abs() < 1e-12, "{got:?} vs {p}");
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
