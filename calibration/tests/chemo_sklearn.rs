//! Ridge and PLS1 against scikit-learn 1.9.1 (docs/REFERENCES.md §11.1-11.3)
//! on a small committed table:
//! `tests/data/sklearn/chemo_reference.json`, made once by
//! `tests/data/sklearn/make_chemo_reference.py` (versions recorded in the
//! file; pinned in tests/python/requirements.txt). An outside check: the
//! expected values come from an independent library, not from this code.

use fringe_calibration::fit::chemo::{pls1, ridge, RidgePath};
use nalgebra::DMatrix;
use serde_json::Value;

fn reference() -> Value {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/data/sklearn/chemo_reference.json"
    );
    serde_json::from_str(&std::fs::read_to_string(path).expect("reference file")).expect("json")
}

fn vec(v: &Value) -> Vec<f64> {
    v.as_array()
        .expect("array")
        .iter()
        .map(|x| x.as_f64().expect("number"))
        .collect()
}

fn table(r: &Value) -> (DMatrix<f64>, Vec<f64>) {
    let rows: Vec<Vec<f64>> = r["X"].as_array().expect("X").iter().map(vec).collect();
    let x = DMatrix::from_fn(rows.len(), rows[0].len(), |i, j| rows[i][j]);
    (x, vec(&r["y"]))
}

fn close(a: f64, b: f64, tol: f64, what: &str) {
    assert!(
        (a - b).abs() <= tol * (1.0 + b.abs()),
        "{what}: {a} vs scikit-learn {b}"
    );
}

#[test]
fn ridge_matches_scikit_learn() {
    let r = reference();
    assert_eq!(r["versions"]["scikit-learn"], "1.9.1");
    let (x, y) = table(&r);
    for case in r["ridge"].as_array().expect("ridge") {
        let alpha = case["alpha"].as_f64().expect("alpha");
        let m = ridge(&x, &y, alpha).expect("fit");
        for (j, (a, b)) in m.coef.iter().zip(vec(&case["coef"])).enumerate() {
            close(*a, b, 1e-9, &format!("alpha {alpha} coef {j}"));
        }
        close(
            m.intercept,
            case["intercept"].as_f64().expect("b0"),
            1e-9,
            "intercept",
        );
        for (i, want) in vec(&case["predict"]).into_iter().enumerate() {
            let row: Vec<f64> = x.row(i).iter().copied().collect();
            close(
                m.predict(&row),
                want,
                1e-9,
                &format!("alpha {alpha} prediction {i}"),
            );
        }
    }
}

#[test]
fn pls_matches_scikit_learn() {
    let r = reference();
    let (x, y) = table(&r);
    for case in r["pls"].as_array().expect("pls") {
        let k = case["n_components"].as_u64().expect("k") as usize;
        let f = pls1(&x, &y, k).expect("fit");
        for (j, (a, b)) in f.model.coef.iter().zip(vec(&case["coef"])).enumerate() {
            close(*a, b, 1e-8, &format!("{k} components coef {j}"));
        }
        // scikit-learn's PLS predicts (x - mean(x)) coef + intercept_ (its
        // intercept_ is the mean of y); ours is for the raw x.
        let coef = vec(&case["coef"]);
        let raw_b0 = case["intercept"].as_f64().expect("b0")
            - (0..x.ncols())
                .map(|j| x.column(j).mean() * coef[j])
                .sum::<f64>();
        close(f.model.intercept, raw_b0, 1e-8, "intercept");
        for (i, want) in vec(&case["predict"]).into_iter().enumerate() {
            let row: Vec<f64> = x.row(i).iter().copied().collect();
            close(
                f.model.predict(&row),
                want,
                1e-8,
                &format!("{k} components prediction {i}"),
            );
        }
    }
}

/// The closed-form leave-one-out residuals of the ridge path equal
/// scikit-learn's Ridge refitted without each row (on the same
/// standardised columns).
#[test]
fn ridge_leave_one_out_matches_scikit_learn_refits() {
    let r = reference();
    let (x, y) = table(&r);
    let case = &r["ridge_loo_standardised"];
    let alpha = case["alpha"].as_f64().expect("alpha");
    let path = RidgePath::new(&x, &y).expect("path");
    let at = path.at(alpha, &y);
    for (i, (a, b)) in at
        .loo_residuals
        .iter()
        .zip(vec(&case["residuals"]))
        .enumerate()
    {
        close(*a, b, 1e-9, &format!("row {i}"));
    }
}
