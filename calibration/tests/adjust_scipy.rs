//! ISO 12099-style bias and slope tests (`fit::adjust`, docs/REFERENCES.md §11.4)
//! on a worked example
//! against SciPy 1.17.1: `tests/data/scipy/bias_slope_reference.json`, made
//! once by `tests/data/scipy/make_bias_slope_reference.py` (versions in the
//! file; pinned in tests/python/requirements.txt). An outside check: SciPy's
//! t-test, linear regression and t and chi-square quantiles.

use fringe_calibration::fit::adjust::{bias_slope, unexplained_error_limit, Correction};
use fringe_calibration::product::{ModelKind, ProductModel, SingleFrequencyModel};
use serde_json::Value;

fn reference() -> Value {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/data/scipy/bias_slope_reference.json"
    );
    serde_json::from_str(&std::fs::read_to_string(path).expect("file")).expect("json")
}

fn v(x: &Value) -> Vec<f64> {
    x.as_array()
        .expect("array")
        .iter()
        .map(|a| a.as_f64().expect("number"))
        .collect()
}

fn close(a: f64, b: &Value, what: &str) {
    let b = b.as_f64().expect("number");
    assert!(
        (a - b).abs() <= 1e-9 * (1.0 + b.abs()),
        "{what}: {a} vs SciPy {b}"
    );
}

#[test]
fn bias_and_slope_tests_match_scipy() {
    let r = reference();
    assert_eq!(r["versions"]["scipy"], "1.17.1");
    let b = bias_slope(
        &v(&r["lab"]),
        &v(&r["predicted"]),
        r["alpha"].as_f64().unwrap(),
    )
    .unwrap();
    close(b.bias, &r["bias"], "bias");
    close(b.sep, &r["sep"], "SEP");
    close(b.bias_t, &r["bias_t"], "bias t");
    close(b.bias_t_crit, &r["bias_t_crit"], "t(0.975, n-1)");
    close(b.bias_ci.0, &r["bias_ci"][0], "bias low");
    close(b.bias_ci.1, &r["bias_ci"][1], "bias high");
    close(b.slope, &r["slope"], "slope");
    close(b.intercept, &r["intercept"], "intercept");
    close(b.slope_se, &r["slope_se"], "SE(slope)");
    close(b.slope_t, &r["slope_t"], "slope t");
    close(b.slope_t_crit, &r["slope_t_crit"], "t(0.975, n-2)");
    close(b.sep_ci.0, &r["sep_ci"][0], "SEP low");
    close(b.sep_ci.1, &r["sep_ci"][1], "SEP high");
    close(b.s_res, &r["s_res"], "residual SD of lab on predicted");
    close(b.rmsep, &r["rmsep"], "RMSEP");
    let t_ue = unexplained_error_limit(
        r["sec_cal"].as_f64().unwrap(),
        r["dof_cal"].as_u64().unwrap() as usize,
        b.n,
        b.alpha,
    )
    .unwrap();
    close(t_ue, &r["t_ue"], "T_UE = SEC sqrt(F(0.95; n - 1, M))");
    // The example's inline reads high with a slope: both significant.
    assert!(b.bias_significant && b.slope_significant);
    assert_eq!(b.recommended(), Correction::BiasAndSlope);
}

/// The corrected model gives `a + b m` exactly (consistency test), and after
/// the recommended correction the example's pairs have no bias and unit
/// slope left.
#[test]
fn the_correction_removes_bias_and_slope() {
    let r = reference();
    let (lab, pred) = (v(&r["lab"]), v(&r["predicted"]));
    let b = bias_slope(&lab, &pred, 0.05).unwrap();
    let (a, s) = b.map(Correction::BiasAndSlope);
    let corrected: Vec<f64> = pred.iter().map(|p| a + s * p).collect();
    let after = bias_slope(&lab, &corrected, 0.05).unwrap();
    assert!(after.bias.abs() < 1e-12 && (after.slope - 1.0).abs() < 1e-12);
    assert_eq!(after.recommended(), Correction::None);
    let m = ProductModel::SingleFrequency(SingleFrequencyModel {
        freq_index: 1,
        t_ref_c: 20.0f64,
        coeffs: [1.0, 2.0, 0.1, 0.0],
        c_t: 0.05,
    });
    let ProductModel::SingleFrequency(old) = m else {
        unreachable!()
    };
    let ProductModel::SingleFrequency(new) = m.rescaled(a, s) else {
        unreachable!()
    };
    for (e, t) in [(5.0, 10.0), (9.0, 30.0)] {
        assert!((new.moisture_pct(e, t) - (a + s * old.moisture_pct(e, t))).abs() < 1e-12);
    }
    assert_eq!(m.rescaled(0.0, 1.0).kind(), ModelKind::SingleFrequency);
}

/// Degenerate pairs get a verdict a person can read, not NaN or the ratio
/// of two rounding errors (consistency tests; invented values).
#[test]
fn degenerate_pairs_have_a_clear_verdict() {
    use fringe_calibration::stats::StatsError;
    let lab = [12.0, 12.5, 13.1, 13.8, 14.2];
    // A steady product read to the same digit: no slope (NaN, never
    // significant nor correctable), the bias test as for any pairs.
    let flat = [12.2; 5];
    let b = bias_slope(&lab, &flat, 0.05).unwrap();
    assert!(
        !b.slope_determined() && b.slope.is_nan() && b.s_res.is_nan(),
        "{b:?}"
    );
    assert!(!b.slope_significant && !b.slope_correctable(), "{b:?}");
    let want = bias_slope(&lab, &lab.map(|x| x + 0.1), 0.05).unwrap();
    assert!((b.bias - (12.2 - 13.12)).abs() < 1e-12, "{b:?}");
    assert!((b.sep - want.lab_sd).abs() < 1e-12, "{b:?}");
    assert_eq!(b.lab_sd, want.lab_sd);
    let almost = [12.2, 12.2, 12.2000001, 12.2, 12.2];
    assert!(!bias_slope(&lab, &almost, 0.05).unwrap().slope_determined());
    // A steady line whose readings are 0.52 % high (five readings of
    // 12.6): the bias is significant and corrected, the slope left
    // (t = 0.52 sqrt(5) / 0.0837 = 13.9 against t(0.975, 4) = 2.776;
    // arithmetic).
    let steady = [12.0, 12.1, 12.2, 12.1, 12.0];
    let b = bias_slope(&steady, &[12.6; 5], 0.05).unwrap();
    assert!(
        (b.bias - 0.52).abs() < 1e-12 && (b.bias_t - 13.9).abs() < 0.05,
        "{b:?}"
    );
    assert_eq!(b.recommended(), Correction::Bias);
    // An inline that is the lab value plus 0.3 exactly: the bias is
    // certain, the slope is 1.
    let offset: Vec<f64> = lab.iter().map(|x| x + 0.3).collect();
    let b = bias_slope(&lab, &offset, 0.05).unwrap();
    assert!(b.bias_significant && b.bias_t.is_infinite(), "{b:?}");
    assert!(!b.slope_significant && b.slope_t == 0.0, "{b:?}");
    assert_eq!(b.recommended(), Correction::Bias);
    // The same with the inline values as the device's f32 (rounded to
    // about 6e-8 of their value), over 500 random sets of 8 pairs: never
    // a slope from rounding alone.
    let mut rng = fringe_calibration::fit::rng::SeededRng::new(12099);
    for _ in 0..500 {
        let lab: Vec<f64> = (0..8).map(|_| rng.range(5.0, 25.0)).collect();
        let inline: Vec<f64> = lab.iter().map(|x| f64::from((x + 0.3) as f32)).collect();
        let b = bias_slope(&lab, &inline, 0.05).unwrap();
        assert!(b.bias_significant && !b.slope_significant, "{lab:?}: {b:?}");
    }
    // Identical values: nothing to correct, no NaN.
    let b = bias_slope(&lab, &lab, 0.05).unwrap();
    assert!(b.bias_t == 0.0 && b.slope_t == 0.0, "{b:?}");
    assert_eq!(b.recommended(), Correction::None);
    // A confidence level typed for a significance level.
    assert_eq!(
        bias_slope(&lab, &offset, 0.95).unwrap_err(),
        StatsError::BadSignificance(0.95)
    );
}
