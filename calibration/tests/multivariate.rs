//! The multivariate product model on the device path: its flat layout, its
//! features' derivatives, the f32 chain against f64, its uncertainty
//! against the scatter of noisy readings, and refusals. Consistency tests
//! (the code against itself and against finite differences), except where
//! a source is named.

use fringe_calibration::estimate::{estimate, Channel, EstimateFlags, EstimateInput};
use fringe_calibration::fit::product::{fit_multivariate, MultivariateOptions};
use fringe_calibration::fit::zoo::{Draw, Family, FREQ_PAIRS};
use fringe_calibration::fit::SeededRng;
use fringe_calibration::product::{
    tkn_psi, ModelKind, MultivariateModel, ParamsError, ProductModel, MULTIVARIATE_DENSITY_LEN,
    MULTIVARIATE_LEN, MV_BASE_FEATURES, MV_FEATURES,
};

fn seed() -> u64 {
    std::env::var("FRINGE_SEED")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(1)
}

/// A model without a density input (its density coefficients 0).
fn model() -> MultivariateModel<f64> {
    let mut coeffs = [0.0; MV_FEATURES];
    for (k, c) in coeffs.iter_mut().take(MV_BASE_FEATURES).enumerate() {
        *c = 0.3 * ((k as f64) * 0.7).sin();
    }
    MultivariateModel {
        t_ref_c: 22.5,
        a_f: 0.8,
        intercept: 4.0,
        coeffs,
        rho_ref_kg_m3: 0.0,
    }
}

/// The same with a density input at 800 kg/m^3.
fn density_model() -> MultivariateModel<f64> {
    let mut m = model();
    for (k, c) in m.coeffs.iter_mut().enumerate().skip(MV_BASE_FEATURES) {
        *c = 0.3 * ((k as f64) * 0.7).sin();
    }
    m.rho_ref_kg_m3 = 800.0;
    m
}

/// Version 2 of the layout (with a density input) round-trips; a version 1
/// file keeps its length and meaning; a reference density outside
/// 10-5000 kg/m^3 is refused by its index.
#[test]
fn density_layout_round_trips_and_refuses_a_bad_reference() {
    let m = ProductModel::Multivariate(density_model());
    let (p, n) = m.to_params();
    assert_eq!((n, p[0]), (MULTIVARIATE_DENSITY_LEN, 2.0));
    let back = ProductModel::<f64>::from_params(ModelKind::Multivariate, &p[..n]).unwrap();
    assert_eq!(back.to_params().0[..n], p[..n]);
    assert_eq!(back.input_names().len(), 5);
    for bad in [0.0f32, -800.0, 9.0, 6000.0] {
        let mut q = p;
        q[n - 1] = bad;
        assert!(
            matches!(
                ProductModel::<f32>::from_params(ModelKind::Multivariate, &q[..n]),
                Err(ParamsError::Invalid { index, .. }) if index == n - 1
            ),
            "{bad}"
        );
    }
    // A version-2 header on a version-1 length is refused by its length.
    let (p1, n1) = ProductModel::Multivariate(model()).to_params();
    assert_eq!((n1, p1[0]), (MULTIVARIATE_LEN, 1.0));
    let mut q = p1;
    q[0] = 2.0;
    assert_eq!(
        ProductModel::<f32>::from_params(ModelKind::Multivariate, &q[..n1]),
        Err(ParamsError::WrongLength {
            expected: MULTIVARIATE_DENSITY_LEN,
            got: MULTIVARIATE_LEN
        })
    );
}

#[test]
fn layout_round_trips_and_refuses_a_bad_a_f() {
    let m = ProductModel::Multivariate(model());
    let (p, n) = m.to_params();
    assert_eq!(n, MULTIVARIATE_LEN);
    let back = ProductModel::<f64>::from_params(ModelKind::Multivariate, &p[..n]).unwrap();
    assert_eq!(back.to_params().0[..n], p[..n]);
    let mut bad = p;
    bad[2] = 0.0;
    assert!(matches!(
        ProductModel::<f32>::from_params(ModelKind::Multivariate, &bad[..n]),
        Err(ParamsError::Invalid { index: 2, .. })
    ));
    assert_eq!(
        ProductModel::<f32>::from_params(ModelKind::Multivariate, &p[..n - 1]),
        Err(ParamsError::WrongLength {
            expected: MULTIVARIATE_LEN,
            got: MULTIVARIATE_LEN - 1
        })
    );
}

/// The analytic derivatives of every feature equal central differences.
#[test]
fn feature_derivatives_match_finite_differences() {
    let m = density_model();
    let e = [12.0, 35.0, 6.5, 2.2];
    let rho = Some(850.0);
    let (x, d) = m.features(e, 31.0, rho);
    assert!(x.iter().all(|v| v.is_finite()));
    assert!((x[23] - 850.0 / 800.0 + 1.0).abs() < 1e-15);
    for c in 0..4 {
        let h = 1e-6 * e[c];
        let (mut a, mut b) = (e, e);
        a[c] += h;
        b[c] -= h;
        let (xa, _) = m.features(a, 31.0, rho);
        let (xb, _) = m.features(b, 31.0, rho);
        for k in 0..MV_FEATURES {
            let fd = (xa[k] - xb[k]) / (2.0 * h);
            assert!(
                (fd - d[k][c]).abs() < 1e-5 * (1.0 + fd.abs()),
                "feature {k} input {c}: {fd} vs {}",
                d[k][c]
            );
        }
    }
}

/// Trabelsi, Kraszewski and Nelson's psi: the formula, its domain and its
/// derivatives (a consistency test; no values of the paper are at hand to
/// compare with, from memory or otherwise).
#[test]
fn tkn_psi_formula_domain_and_derivatives() {
    let (psi, de, dl) = tkn_psi(0.5f64, 4.0, 0.6);
    let want = (0.6f64 / (4.0 * (0.5 * 4.0 - 0.6))).sqrt();
    assert!((psi - want).abs() < 1e-15);
    let h = 1e-7;
    let fd_e = (tkn_psi(0.5, 4.0 + h, 0.6).0 - tkn_psi(0.5, 4.0 - h, 0.6).0) / (2.0 * h);
    let fd_l = (tkn_psi(0.5, 4.0, 0.6 + h).0 - tkn_psi(0.5, 4.0, 0.6 - h).0) / (2.0 * h);
    assert!((de - fd_e).abs() < 1e-6 && (dl - fd_l).abs() < 1e-6);
    assert!(tkn_psi(0.1f64, 4.0, 0.6).0.is_nan(), "outside a_f e' > e''");
}

/// A fitted multivariate calibration on a zoo product: the device's f32
/// chain agrees with f64 within 0.01 % moisture (issue 3's bound), and the
/// propagated uncertainty (SEC removed) matches the scatter of repeated
/// noisy readings of one sample within 20 %.
#[test]
fn f32_chain_and_uncertainty_on_a_fitted_calibration() {
    let seed = seed();
    let f = Family::sand();
    let train = f.samples(&Draw::new(60, FREQ_PAIRS[0]), seed);
    let fit = fit_multivariate(&train, &MultivariateOptions::default())
        .unwrap_or_else(|e| panic!("FRINGE_SEED={seed}: {e}"));
    let c32 = fit.calibration;
    let c64 = c32.cast::<f64>();
    let mut worst = 0.0f64;
    for s in train.iter().take(30) {
        let ch = |k: usize| Channel {
            freq_hz: s.channels[k].freq_hz as f32,
            eps_re: s.channels[k].eps_re as f32,
            eps_loss: s.channels[k].eps_loss as f32,
            sd: 0.02f32,
        };
        let i32_ = EstimateInput {
            channels: [ch(0), ch(1)],
            temperature_c: s.temperature_c as f32,
            bulk_density_kg_m3: None,
        };
        let i64_ = EstimateInput {
            channels: i32_.channels.map(|c| Channel {
                freq_hz: f64::from(c.freq_hz),
                eps_re: f64::from(c.eps_re),
                eps_loss: f64::from(c.eps_loss),
                sd: f64::from(c.sd),
            }),
            temperature_c: f64::from(i32_.temperature_c),
            bulk_density_kg_m3: None,
        };
        let a = f64::from(estimate(&i32_, Some(&c32)).moisture_pct.unwrap());
        let b = estimate(&i64_, Some(&c64)).moisture_pct.unwrap();
        worst = worst.max((a - b).abs());
    }
    assert!(worst < 0.01, "FRINGE_SEED={seed}: f32 vs f64 {worst}");

    let mut cal = c64;
    cal.sec_pct = 0.0;
    let s = &train[0];
    let sd = 0.02;
    let clean = EstimateInput {
        channels: [0, 1].map(|k| Channel {
            freq_hz: s.channels[k].freq_hz,
            eps_re: s.channels[k].eps_re,
            eps_loss: s.channels[k].eps_loss,
            sd,
        }),
        temperature_c: s.temperature_c,
        bulk_density_kg_m3: None,
    };
    let mut rng = SeededRng::new(seed);
    let (mut sum, mut sum2, mut u) = (0.0, 0.0, 0.0);
    let n = 400;
    for _ in 0..n {
        let mut i = clean;
        for c in i.channels.iter_mut() {
            c.eps_re += sd * rng.normal();
            c.eps_loss += sd * rng.normal();
        }
        let e = estimate(&i, Some(&cal));
        let m = e.moisture_pct.unwrap();
        sum += m;
        sum2 += m * m;
        u += e.uncertainty_pct / f64::from(n);
    }
    let mean = sum / f64::from(n);
    let scatter = (sum2 / f64::from(n) - mean * mean).sqrt();
    assert!(
        (scatter / u - 1.0).abs() < 0.2,
        "FRINGE_SEED={seed}: scatter {scatter} vs propagated {u}"
    );
}

/// Readings the features cannot be formed for give no moisture with a
/// reason, never a number: eps' not positive, NaN.
#[test]
fn impossible_readings_give_no_moisture() {
    let f = Family::sand();
    let train = f.samples(&Draw::new(40, FREQ_PAIRS[0]), 3);
    let fit = fit_multivariate(&train, &MultivariateOptions::default()).unwrap();
    let ok = EstimateInput {
        channels: [0, 1].map(|k| Channel {
            freq_hz: train[0].channels[k].freq_hz as f32,
            eps_re: train[0].channels[k].eps_re as f32,
            eps_loss: train[0].channels[k].eps_loss as f32,
            sd: 0.02,
        }),
        temperature_c: 20.0,
        bulk_density_kg_m3: None,
    };
    assert!(estimate(&ok, Some(&fit.calibration)).moisture_pct.is_some());
    for bad in [0.0f32, -1.0, f32::NAN] {
        let mut i = ok;
        i.channels[1].eps_re = bad;
        let e = estimate(&i, Some(&fit.calibration));
        assert!(
            e.moisture_pct.is_none() && e.failure.is_some(),
            "{bad}: {e:?}"
        );
        assert!(!e.flags.is_empty());
    }
    let mut i = ok;
    i.channels[0].eps_loss = 1e6;
    let e = estimate(&i, Some(&fit.calibration));
    assert!(
        e.moisture_pct.is_none() || e.flags.contains(EstimateFlags::OUT_OF_RANGE),
        "{e:?}"
    );
}

/// A fit with a density input on a product whose bulk density varies 10 %
/// between samples (the zoo's chips; invented data): the calibration takes
/// the density as a fifth input; a reading without one still gives a
/// moisture, flagged `DENSITY_MISSING`, at the reference density and with
/// the uncertainty widened by the density's spread (a uniform distribution
/// over the calibrated range, GUM 4.3.7, from memory); a density outside the calibrated
/// range is flagged out of range; a sample without a density is refused by
/// its id.
#[test]
fn a_density_input_is_used_and_its_absence_flagged() {
    let seed = seed();
    let f = Family::wood_chips();
    assert!(f.density_variation >= 0.05, "the family varies in density");
    let train = f.samples(&Draw::new(80, FREQ_PAIRS[0]), seed);
    let opts = MultivariateOptions {
        density_input: true,
        ..MultivariateOptions::default()
    };
    let fit = fit_multivariate(&train, &opts).unwrap_or_else(|e| panic!("FRINGE_SEED={seed}: {e}"));
    let cal = fit.calibration;
    let ProductModel::Multivariate(mv) = cal.model else {
        panic!("not multivariate")
    };
    assert!(mv.uses_density());
    assert_eq!(cal.input_ranges().len(), 5);
    let s = &train[0];
    let with = EstimateInput {
        channels: [0, 1].map(|k| Channel {
            freq_hz: s.channels[k].freq_hz as f32,
            eps_re: s.channels[k].eps_re as f32,
            eps_loss: s.channels[k].eps_loss as f32,
            sd: 0.02,
        }),
        temperature_c: s.temperature_c as f32,
        bulk_density_kg_m3: s.bulk_density_kg_m3.map(|r| r as f32),
    };
    let a = estimate(&with, Some(&cal));
    assert!(!a.flags.contains(EstimateFlags::DENSITY_MISSING), "{a:?}");
    let mut without = with;
    without.bulk_density_kg_m3 = None;
    let b = estimate(&without, Some(&cal));
    assert!(b.flags.contains(EstimateFlags::DENSITY_MISSING), "{b:?}");
    assert!(b.moisture_pct.is_some(), "{b:?}");
    let at_ref = EstimateInput {
        bulk_density_kg_m3: Some(mv.rho_ref_kg_m3),
        ..with
    };
    let c = estimate(&at_ref, Some(&cal));
    assert_eq!(
        b.moisture_pct, c.moisture_pct,
        "missing means the reference density"
    );
    // The widening: u_b^2 = u_c^2 + (dm/ddr * width / rho_ref)^2 / 12.
    let r = cal.input_ranges()[4];
    let e4 = [0, 1].map(|k| [with.channels[k].eps_re, with.channels[k].eps_loss]);
    let slope = mv.d_moisture_d_density([e4[0][0], e4[0][1], e4[1][0], e4[1][1]]);
    let extra = slope * (r.max - r.min) / mv.rho_ref_kg_m3 / 12f32.sqrt();
    let want = (c.uncertainty_pct.powi(2) + extra * extra).sqrt();
    assert!(
        (b.uncertainty_pct - want).abs() < 1e-4 * want,
        "{} vs {want}",
        b.uncertainty_pct
    );
    assert!(extra.abs() > 0.0);
    for bad in [f32::NAN, -1.0, 0.0] {
        let e = estimate(
            &EstimateInput {
                bulk_density_kg_m3: Some(bad),
                ..with
            },
            Some(&cal),
        );
        assert!(e.flags.contains(EstimateFlags::DENSITY_MISSING), "{bad}");
    }
    let far = estimate(
        &EstimateInput {
            bulk_density_kg_m3: Some(r.max * 1.5),
            ..with
        },
        Some(&cal),
    );
    assert!(far.flags.contains(EstimateFlags::OUT_OF_RANGE), "{far:?}");

    let mut missing = train.clone();
    missing[7].bulk_density_kg_m3 = None;
    let e = fit_multivariate(&missing, &opts).unwrap_err().to_string();
    assert!(
        e.contains(&missing[7].id) && e.contains("bulk density"),
        "{e}"
    );
}
