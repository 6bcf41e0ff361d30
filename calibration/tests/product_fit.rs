//! Product-model fitting on synthetic products (`fringe_calibration::synth`,
//! built from published physics: Malmberg and Maryott 1956 water, CRIM
//! mixing after Birchak et al. 1974, Archie-type conductivity, a Wagner
//! interfacial relaxation). Seeded; each test prints its seed on failure.
#![cfg(feature = "fit")]

use fringe_calibration::estimate::{estimate, Channel, EstimateInput};
use fringe_calibration::fit::{
    compare, fit_relaxation, fit_single, synthetic_samples, ChannelReading, IntervalModel,
    MixingFit, ProductFitError, RelaxationOptions, Sample, SingleOptions, SynthSpec,
};
use fringe_calibration::product::{ModelKind, ProductModel};
use fringe_calibration::stats::Folds;
use fringe_calibration::synth::SynthProduct;

fn grain() -> SynthProduct<f64> {
    SynthProduct::grain()
}

/// Densities of the synthetic grain as a plant would measure them.
fn relax_opts() -> RelaxationOptions {
    let p = grain().mixture;
    RelaxationOptions::new(p.bulk_density_kg_m3, p.particle_density_kg_m3)
}

/// Without noise, the relaxation fit recovers the product parameters the
/// synthetic product was built with (alpha 0.2, f_r exponent 1, no extra
/// temperature term, dry-matter permittivity 3.0) from the samples alone,
/// and its calibration statistics are near zero.
#[test]
fn relaxation_fit_recovers_the_product_parameters() {
    let seed = 101;
    let spec = SynthSpec {
        noise_sd: 0.0,
        ..SynthSpec::default()
    };
    let samples = synthetic_samples(&grain(), &spec, seed);
    let fit =
        fit_relaxation(&samples, &relax_opts()).unwrap_or_else(|e| panic!("seed {seed}: {e}"));
    let ProductModel::Relaxation(m) = fit.model else {
        panic!("seed {seed}: not a relaxation model")
    };
    let truth = grain().law();
    println!("seed {seed}: law {:?} mixture {:?}", m.law, m.mixture);
    assert!(
        (m.law.alpha - 0.2).abs() < 0.005,
        "seed {seed}: alpha {}",
        m.law.alpha
    );
    assert!(
        (m.law.fr_exponent - 1.0).abs() < 0.01,
        "seed {seed}: exponent {}",
        m.law.fr_exponent
    );
    assert!(
        m.law.fr_temp_coeff_per_c.abs() < 1e-3,
        "seed {seed}: temp coeff {}",
        m.law.fr_temp_coeff_per_c
    );
    let fr_true = truth.relaxation_frequency_hz(m.law.sigma_ref_s_m, m.law.t_ref_c);
    assert!(
        (m.law.fr_ref_hz / fr_true - 1.0).abs() < 0.01,
        "seed {seed}: fr_ref {} vs {fr_true}",
        m.law.fr_ref_hz
    );
    assert!(
        (m.mixture.eps_dry - 3.0).abs() < 0.05,
        "seed {seed}: eps_dry {}",
        m.mixture.eps_dry
    );
    assert!(
        fit.stats.sec_pct < 0.05,
        "seed {seed}: SEC {}",
        fit.stats.sec_pct
    );
    assert!(
        fit.stats.cross_validation.sep < 0.05,
        "seed {seed}: SEP {}",
        fit.stats.cross_validation.sep
    );
}

/// Model comparison on a synthetic product whose conductivity (salt) and
/// temperature vary between samples: the relaxation model's cross-validated
/// SEP is clearly (at least 3 times) smaller than the single-frequency
/// model's. The measured ratio is printed (and recorded in BENCHMARKS.md).
#[test]
fn relaxation_beats_single_frequency_when_salt_and_temperature_vary() {
    let seed = 2024;
    let spec = SynthSpec {
        n: 80,
        ..SynthSpec::default()
    };
    let samples = synthetic_samples(&grain(), &spec, seed);
    let c = compare(&samples, &SingleOptions::default(), &relax_opts())
        .unwrap_or_else(|e| panic!("seed {seed}: {e}"));
    let (s, r) = (&c.single.stats, &c.relaxation.stats);
    println!(
        "seed {seed}: n {} | single: SEC {:.3} SEP(cv) {:.3} RMSEP {:.3} R^2 {:.4} RPD {:.1} | relaxation: SEC {:.3} SEP(cv) {:.3} RMSEP {:.3} R^2 {:.4} RPD {:.1} | SEP ratio {:.2}",
        s.n,
        s.sec_pct,
        s.cross_validation.sep,
        s.cross_validation.rmsep,
        s.cross_validation.r_squared,
        s.cross_validation.rpd,
        r.sec_pct,
        r.cross_validation.sep,
        r.cross_validation.rmsep,
        r.cross_validation.r_squared,
        r.cross_validation.rpd,
        c.sep_ratio
    );
    assert_eq!(c.better, ModelKind::Relaxation, "seed {seed}");
    assert!(
        c.sep_ratio > 3.0,
        "seed {seed}: SEP ratio {:.2}",
        c.sep_ratio
    );
    // Same samples, same split.
    assert_eq!(s.n, r.n);
    assert_eq!(s.folds, r.folds);
}

/// The statistics come from the device path: the flat params rebuild the
/// calibration the fit reports, the SEC recomputed from the per-sample
/// fitted values matches, the calibration samples lie inside the valid
/// moisture range, and each fitted value (f32, as the firmware computes it)
/// agrees with the same calibration evaluated in f64 within 0.01 % moisture
/// (issue 3's bound between the firmware and host paths).
#[test]
fn statistics_use_the_device_evaluation() {
    let seed = 7;
    let samples = synthetic_samples(&grain(), &SynthSpec::default(), seed);
    for fit in [
        fit_single(&samples, &SingleOptions::default()).unwrap(),
        fit_relaxation(&samples, &relax_opts()).unwrap(),
    ] {
        let rebuilt = ProductModel::<f32>::from_params(fit.model.kind(), &fit.params).unwrap();
        assert_eq!(rebuilt, fit.calibration.model, "seed {seed}");
        let n = fit.samples.len() as f64;
        let rss: f64 = fit
            .samples
            .iter()
            .map(|s| (s.fitted_pct - s.reference_pct).powi(2))
            .sum();
        let sec = (rss / (n - fit.stats.n_coef as f64)).sqrt();
        assert!((sec - fit.stats.sec_pct).abs() < 1e-9, "seed {seed}");
        assert!((f64::from(fit.calibration.sec_pct) - sec).abs() < 1e-6);
        let cal64 = fit.calibration.cast::<f64>();
        for (r, s) in fit.samples.iter().zip(&samples) {
            assert!(fit
                .calibration
                .moisture_pct
                .contains(r.reference_pct as f32));
            let ch = |k: usize| Channel {
                freq_hz: s.channels[k].freq_hz,
                eps_re: s.channels[k].eps_re,
                eps_loss: s.channels[k].eps_loss,
                sd: 0.02,
            };
            let input = EstimateInput {
                channels: [ch(0), ch(1)],
                temperature_c: s.temperature_c,
                bulk_density_kg_m3: None,
            };
            let host = estimate(&input, Some(&cal64)).moisture_pct.unwrap();
            assert!(
                (host - r.fitted_pct).abs() < 0.01,
                "seed {seed} {}: f64 {host} vs f32 {}",
                r.id,
                r.fitted_pct
            );
        }
    }
}

/// k-fold with the whole two-stage fit repeated per fold gives a SEP close
/// to leave-one-out with only the coefficients refitted (the nonlinear
/// parameters come from the spectra and carry little lab information).
#[test]
fn kfold_full_refit_agrees_with_loo() {
    let seed = 99;
    let spec = SynthSpec {
        n: 40,
        ..SynthSpec::default()
    };
    let samples = synthetic_samples(&grain(), &spec, seed);
    let loo = fit_relaxation(&samples, &relax_opts()).unwrap();
    let k5 = fit_relaxation(
        &samples,
        &RelaxationOptions {
            folds: Folds::KFold(5),
            refit_nonlinear_in_cv: true,
            ..relax_opts()
        },
    )
    .unwrap();
    let (a, b) = (
        loo.stats.cross_validation.sep,
        k5.stats.cross_validation.sep,
    );
    println!("seed {seed}: SEP LOO {a:.4}, 5-fold full refit {b:.4}");
    assert!((a / b - 1.0).abs() < 0.3, "seed {seed}: {a} vs {b}");
}

fn few(n: usize) -> Vec<Sample> {
    synthetic_samples(
        &grain(),
        &SynthSpec {
            n,
            ..SynthSpec::default()
        },
        5,
    )
}

/// Refusals name the sample and the field.
#[test]
fn refuses_bad_samples_by_name() {
    // Single, degree 2: 4 coefficients, so 7 samples needed.
    assert_eq!(
        fit_single(&few(6), &SingleOptions::default()).unwrap_err(),
        ProductFitError::TooFewSamples { needed: 7, got: 6 }
    );
    // Relaxation, degree 2: 5 coefficients and the mixing parameter, so 9
    // samples needed (the static terms' two more are not tried below five
    // samples per fitted parameter).
    assert_eq!(
        fit_relaxation(&few(8), &relax_opts()).unwrap_err(),
        ProductFitError::TooFewSamples { needed: 9, got: 8 }
    );
    let base = few(12);

    let mut s = base.clone();
    s[3].channels[1].eps_loss = f64::NAN;
    assert_eq!(
        fit_single(&s, &SingleOptions::default()).unwrap_err(),
        ProductFitError::NonFinite {
            id: "synth-004".into(),
            field: "eps_loss"
        }
    );

    let mut s = base.clone();
    s[5].channels[0].eps_loss = -0.5;
    let e = fit_relaxation(&s, &relax_opts()).unwrap_err();
    assert!(
        matches!(&e, ProductFitError::NegativeLoss { id, freq_hz, .. } if id == "synth-006" && *freq_hz == 1.0e6),
        "{e:?}"
    );
    assert!(e.to_string().contains("synth-006"), "{e}");

    let mut s = base.clone();
    s[2].channels[1].freq_hz = 10.0e6;
    assert_eq!(
        fit_single(&s, &SingleOptions::default()).unwrap_err(),
        ProductFitError::MixedFrequencies {
            id: "synth-003".into(),
            expected_hz: 20.0e6,
            got_hz: 10.0e6
        }
    );

    let mut s = base.clone();
    s[7].id = s[1].id.clone();
    assert_eq!(
        fit_relaxation(&s, &relax_opts()).unwrap_err(),
        ProductFitError::DuplicateId {
            id: "synth-002".into()
        }
    );

    let mut s = base.clone();
    s[4].channels.push(ChannelReading {
        freq_hz: 5.0e6,
        eps_re: 5.0,
        eps_loss: 1.0,
    });
    assert!(matches!(
        fit_single(&s, &SingleOptions::default()).unwrap_err(),
        ProductFitError::WrongChannelCount { got: 3, .. }
    ));

    // Below 0, or at 1000 % (90.9 % wet basis) and above: refused on
    // either basis (a dry basis exceeds 100 % on wood and biomass).
    for m in [-0.5, 1000.0] {
        let mut s = base.clone();
        s[0].moisture_pct = m;
        assert!(matches!(
            fit_single(&s, &SingleOptions::default()).unwrap_err(),
            ProductFitError::MoistureOutOfRange { .. }
        ));
    }
    // A dry-basis value above 100 % is a moisture.
    let mut s = base.clone();
    s[0].moisture_pct = 150.0;
    assert!(!matches!(
        fit_single(&s, &SingleOptions::default()),
        Err(ProductFitError::MoistureOutOfRange { .. })
    ));
}

/// Leave-one-out by the exact least-squares downdate gives the same
/// out-of-fold predictions as refitting each of the n folds (k-fold with
/// k = n), for both models.
#[test]
fn loo_downdate_equals_refit() {
    let seed = 31;
    let samples = synthetic_samples(&grain(), &SynthSpec::default(), seed);
    let n = samples.len();
    let a = fit_single(&samples, &SingleOptions::default()).unwrap();
    let b = fit_single(
        &samples,
        &SingleOptions {
            folds: Folds::KFold(n),
            ..SingleOptions::default()
        },
    )
    .unwrap();
    let c = fit_relaxation(&samples, &relax_opts()).unwrap();
    let d = fit_relaxation(
        &samples,
        &RelaxationOptions {
            folds: Folds::KFold(n),
            ..relax_opts()
        },
    )
    .unwrap();
    for (x, y) in [(&a, &b), (&c, &d)] {
        for (s, t) in x.samples.iter().zip(&y.samples) {
            assert!(
                (s.cv_predicted_pct - t.cv_predicted_pct).abs() < 1e-3,
                "seed {seed} {}: {} vs {}",
                s.id,
                s.cv_predicted_pct,
                t.cv_predicted_pct
            );
        }
    }
}

/// A calibration sample read back through `predict` gives its fitted value
/// and its own leverage; a reading far outside the calibration set
/// (35 % moisture, 60 C) is flagged both by the device's range check and by
/// its leverage.
#[test]
fn predict_reproduces_samples_and_flags_extrapolation() {
    let seed = 17;
    let samples = synthetic_samples(&grain(), &SynthSpec::default(), seed);
    for fit in [
        fit_single(&samples, &SingleOptions::default()).unwrap(),
        fit_relaxation(&samples, &relax_opts()).unwrap(),
    ] {
        for (s, r) in samples.iter().zip(&fit.samples).take(10) {
            let p = fit
                .predict(&s.channels, s.temperature_c, None, 0.95)
                .unwrap();
            let m = f64::from(p.estimate.moisture_pct.unwrap());
            assert!((m - r.fitted_pct).abs() < 1e-9, "seed {seed} {}", s.id);
            assert!(
                (p.leverage - r.leverage).abs() < 1e-4 * r.leverage.max(1e-3),
                "seed {seed} {}: {} vs {}",
                s.id,
                p.leverage,
                r.leverage
            );
            assert!(!p.extrapolation);
            let (lo, hi) = p.interval_pct.unwrap();
            assert!(lo < m && m < hi);
        }
        let far = synthetic_samples(
            &grain(),
            &SynthSpec {
                n: 1,
                moisture_pct: (35.0, 35.0),
                temperature_c: (60.0, 60.0),
                water_sigma25_s_m: (0.1, 0.1),
                noise_sd: 0.0,
                ..SynthSpec::default()
            },
            seed,
        );
        let p = fit
            .predict(&far[0].channels, far[0].temperature_c, None, 0.95)
            .unwrap();
        assert!(
            p.extrapolation,
            "seed {seed}: leverage {} vs max {}",
            p.leverage, fit.max_leverage
        );
        assert!(!p.estimate.flags.is_empty(), "seed {seed}: no range flag");
        let mut bad = far[0].channels.clone();
        bad[1].freq_hz = 30.0e6;
        assert!(matches!(
            fit.predict(&bad, 20.0, None, 0.95),
            Err(ProductFitError::MixedFrequencies { .. })
        ));
    }
}

/// 95 % prediction intervals of the relaxation model cover at least about
/// 95 % of fresh samples from the same product (definition of the interval;
/// seeded, 400 fresh samples, binomial SD 1.1 %). Measured: 98.8 %. The
/// interval is conservative here because the inversion noise, and so the
/// error, grows with the salt content while the interval uses one pooled
/// residual SD; the bounds allow for that.
#[test]
fn relaxation_prediction_interval_coverage() {
    let seed = 4242;
    let spec = SynthSpec {
        n: 80,
        ..SynthSpec::default()
    };
    let fit = fit_relaxation(&synthetic_samples(&grain(), &spec, seed), &relax_opts()).unwrap();
    let fresh = synthetic_samples(
        &grain(),
        &SynthSpec {
            n: 400,
            ..SynthSpec::default()
        },
        seed + 1,
    );
    let mut inside = 0;
    for s in &fresh {
        let p = fit
            .predict(&s.channels, s.temperature_c, None, 0.95)
            .unwrap();
        let (lo, hi) = p.interval_pct.unwrap();
        if s.moisture_pct >= lo && s.moisture_pct <= hi {
            inside += 1;
        }
    }
    let rate = f64::from(inside) / fresh.len() as f64;
    println!("seed {seed}: coverage {rate:.3}");
    assert!(
        (0.90..=0.99).contains(&rate),
        "seed {seed}: coverage {rate}"
    );
}

/// With the dry-matter permittivity given (3.0, the synthetic product's),
/// fitting the mixing exponent instead recovers CRIM's 0.5 from noise-free
/// samples.
#[test]
fn mixing_exponent_fit_recovers_crim() {
    let seed = 55;
    let spec = SynthSpec {
        n: 40,
        noise_sd: 0.0,
        ..SynthSpec::default()
    };
    let samples = synthetic_samples(&grain(), &spec, seed);
    let opts = RelaxationOptions {
        mixing: MixingFit::Exponent { eps_dry: 3.0 },
        ..relax_opts()
    };
    let fit = fit_relaxation(&samples, &opts).unwrap_or_else(|e| panic!("seed {seed}: {e}"));
    let ProductModel::Relaxation(m) = fit.model else {
        panic!("seed {seed}: not a relaxation model")
    };
    assert!(
        (m.mixture.exponent - 0.5).abs() < 0.005,
        "seed {seed}: exponent {}",
        m.mixture.exponent
    );
    assert!(fit.stats.cross_validation.sep < 0.05, "seed {seed}");
}

/// The cross-validated SEP (leave-one-out, whole fit repeated per fold) is
/// an unbiased guess of the error on samples the fit never saw: over ten
/// calibration sets of 40 samples, the SEP on 300 fresh samples of the same
/// product averages to the cross-validated one within 15 %. (Single sets
/// scatter more than a normal SEP from 40 samples would: about 0.65 to 1.2
/// here, so each set is only held to a factor of 2.)
#[test]
fn cross_validated_sep_predicts_the_sep_on_fresh_samples() {
    let mut ratios = Vec::new();
    for seed in 200u64..210 {
        let train = synthetic_samples(
            &grain(),
            &SynthSpec {
                n: 40,
                ..SynthSpec::default()
            },
            seed,
        );
        let f = fit_relaxation(
            &train,
            &RelaxationOptions {
                refit_nonlinear_in_cv: true,
                ..relax_opts()
            },
        )
        .unwrap();
        let fresh = synthetic_samples(
            &grain(),
            &SynthSpec {
                n: 300,
                ..SynthSpec::default()
            },
            seed + 10_000,
        );
        let e: Vec<f64> = fresh
            .iter()
            .filter_map(|x| {
                let p = f.predict(&x.channels, x.temperature_c, None, 0.95).ok()?;
                Some(f64::from(p.estimate.moisture_pct?) - x.moisture_pct)
            })
            .collect();
        assert!(e.len() >= 290, "seed {seed}: {} of 300 predicted", e.len());
        let n = e.len() as f64;
        let mean = e.iter().sum::<f64>() / n;
        let sep_fresh = (e.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
        let sep_cv = f.stats.cross_validation.sep;
        let r = sep_fresh / sep_cv;
        println!(
            "seed {seed}: SEP cross-validated {sep_cv:.3}, fresh {sep_fresh:.3}, ratio {r:.2}"
        );
        assert!((0.5..=2.0).contains(&r), "seed {seed}: ratio {r}");
        ratios.push(r);
    }
    let mean = ratios.iter().sum::<f64>() / ratios.len() as f64;
    println!("mean fresh / cross-validated SEP over 10 sets: {mean:.3}");
    assert!((0.85..=1.15).contains(&mean), "mean ratio {mean}");
}

/// A table on a dry basis (the same noiseless grain, its lab values
/// converted, M_db = 100 M_wb / (100 - M_wb)) gives the same dry-matter
/// permittivity as on a wet basis (3.0, what the grain was built with):
/// the mixing model's moisture is a wet-basis water fraction, so its
/// parameter is chosen against the lab values on a wet basis. Before, the
/// dry values chose a dry-matter permittivity at which every sample's
/// mixing moisture was negative (a demo table: -23 to -8 %).
#[test]
fn a_dry_basis_table_gives_the_wet_basis_mixture() {
    use fringe_calibration::moisture::{wet_to_dry, Basis};
    let seed = 101;
    let spec = SynthSpec {
        noise_sd: 0.0,
        ..SynthSpec::default()
    };
    let mut samples = synthetic_samples(&grain(), &spec, seed);
    for s in &mut samples {
        s.moisture_pct = wet_to_dry(s.moisture_pct);
    }
    let opts = RelaxationOptions {
        lab_basis: Basis::Dry,
        ..relax_opts()
    };
    let fit = fit_relaxation(&samples, &opts).unwrap_or_else(|e| panic!("seed {seed}: {e}"));
    let ProductModel::Relaxation(m) = fit.model else {
        panic!("seed {seed}: not a relaxation model")
    };
    assert!(
        (m.mixture.eps_dry - 3.0).abs() < 0.05,
        "seed {seed}: eps_dry {}",
        m.mixture.eps_dry
    );
    println!(
        "seed {seed}: eps_dry {}, SEP {} on a dry basis",
        m.mixture.eps_dry, fit.stats.cross_validation.sep
    );
    assert!(
        fit.stats.cross_validation.sep < 0.05,
        "seed {seed}: SEP {} on a dry basis",
        fit.stats.cross_validation.sep
    );
}

/// A reading whose leverage cannot be computed gets no prediction interval
/// and is marked as an extrapolation (before, it got the interval of a
/// reading at average leverage, the narrowest there is). The leverage is
/// made incomputable here by a leverage matrix of the wrong size, as a
/// model whose features the reading cannot form would give.
#[test]
fn a_reading_without_a_leverage_gets_no_interval() {
    let seed = 4243;
    let fit = fit_single(
        &synthetic_samples(&grain(), &SynthSpec::default(), seed),
        &SingleOptions::default(),
    )
    .unwrap();
    let s = &synthetic_samples(&grain(), &SynthSpec::default(), seed + 1)[0];
    let mut ch = s.channels.clone();
    ch.sort_by(|a, b| a.freq_hz.total_cmp(&b.freq_hz));
    let eps = [0, 1].map(|k| (ch[k].eps_re, ch[k].eps_loss));
    let mut im = IntervalModel::of(&fit);
    let predict = |im: &IntervalModel| {
        im.predict(
            &fit.model,
            &fit.calibration,
            eps,
            s.temperature_c,
            None,
            0.95,
        )
        .unwrap()
    };
    let whole = predict(&im);
    assert!(
        whole.leverage.is_finite() && whole.interval_pct.is_some(),
        "seed {seed}: {whole:?}"
    );
    im.leverage_matrix.clear();
    let p = predict(&im);
    assert!(p.estimate.moisture_pct.is_some(), "seed {seed}: {p:?}");
    assert!(p.leverage.is_nan(), "seed {seed}: {p:?}");
    assert_eq!(p.interval_pct, None, "seed {seed}");
    assert!(p.extrapolation && p.marked(), "seed {seed}: {p:?}");
}
