//! Product fits on every product of the zoo (`fit::zoo`, synthetic products
//! from published physics, invented constants) at every frequency pair.
//!
//! Random tests take `FRINGE_SEED` (default 1) and print it on failure.

use fringe_calibration::estimate::EstimateFlags;
use fringe_calibration::fit::product::{
    fit_multivariate, fit_relaxation, fit_single, MultivariateOptions, MvMethod, ProductFitError,
    RelaxationOptions, SingleOptions,
};
use fringe_calibration::fit::zoo::{all_pairs, held_out_cases, Draw, Family, FREQ_PAIRS};

/// Training samples per fit.
const TRAIN: usize = 100;

fn seed() -> u64 {
    std::env::var("FRINGE_SEED")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(1)
}

fn relax_opts(f: &Family) -> RelaxationOptions {
    RelaxationOptions {
        refit_nonlinear_in_cv: true,
        ..f.relaxation_options()
    }
}

/// Whether a refusal names what is at fault and what to do: the samples
/// left out by id, or a relaxation law the spectra do not determine. Valid
/// options (every product's densities) and a valid table are never refused.
fn is_named_refusal(e: &ProductFitError) -> bool {
    matches!(
        e,
        ProductFitError::TooManyExcluded { .. } | ProductFitError::LawNotDetermined { .. }
    ) && !e.to_string().contains("NaN or infinite")
}

/// Property over products x frequency pairs x two seeds (60 samples each;
/// the zoo's products at its pairs, the held-out products at all six
/// pairs, the zoo's at the held-out pairs):
/// every fit (single-frequency, relaxation, ridge, PLS) finishes or refuses
/// with a reason naming what is at fault (only the relaxation model may
/// refuse, naming the samples it cannot use or its undetermined law);
/// never a NaN in a design matrix, never a failed least-squares stage
/// passed through to the user (issue 11, item 2).
#[test]
fn every_fit_finishes_or_names_its_refusal() {
    let base = seed();
    let mut failures = Vec::new();
    for f in Family::all().into_iter().chain(Family::held_out()) {
        for pair in all_pairs() {
            for seed in [base, base + 1] {
                let samples = f.samples(&Draw::new(60, pair), seed);
                let single = fit_single(&samples, &SingleOptions::default());
                let relax = fit_relaxation(&samples, &relax_opts(&f));
                let mv = |method| {
                    fit_multivariate(
                        &samples,
                        &MultivariateOptions {
                            method,
                            ..MultivariateOptions::default()
                        },
                    )
                    .err()
                };
                let (ridge, pls) = (mv(MvMethod::Ridge), mv(MvMethod::Pls));
                if let Ok(r) = &relax {
                    // The model written is the one cross-validated: on its own
                    // samples it fits at least about as well as the folds
                    // predict them (a law fitted on all samples stuck in a
                    // worse local minimum than every fold's broke this:
                    // relaxation_law_fit_leaves_the_local_minimum_of_its_first_start).
                    // Where the spectra determine the law so poorly that the
                    // fit on all samples still lands elsewhere, it says so
                    // and cannot be chosen.
                    let (cal, cv) = (r.stats.calibration.sep, r.stats.cross_validation.sep);
                    let flagged = r
                        .notes
                        .iter()
                        .any(|n| n.contains("exceeds its cross-validated SEP"))
                        && !ModelComparison::eligible(r);
                    if cal > 1.1 * cv && !flagged {
                        failures.push(format!(
                            "FRINGE_SEED={seed} {} {:?} relaxation: SEP on its own samples {cal:.3} above its cross-validated {cv:.3}, unflagged",
                            f.name, pair
                        ));
                    }
                    println!(
                        "FRINGE_SEED={seed} {} {:?}: relaxation SEP {:.3} with {} excluded{}",
                        f.name,
                        pair,
                        r.stats.cross_validation.sep,
                        r.excluded.len(),
                        if r.notes.is_empty() { "" } else { " (notes)" }
                    );
                }
                for (what, r) in [
                    ("single", single.err()),
                    ("relaxation", relax.err()),
                    ("ridge", ridge),
                    ("PLS", pls),
                ] {
                    if let Some(e) = r {
                        if !is_named_refusal(&e) {
                            failures.push(format!(
                                "FRINGE_SEED={seed} {} {:?} {what}: {e}",
                                f.name, pair
                            ));
                        }
                    }
                }
            }
        }
    }
    assert!(
        failures.is_empty(),
        "{} failures:\n{}",
        failures.len(),
        failures.join("\n")
    );
}

/// Regression: on the grain at 5/50 MHz (60 samples, seed 6) the joint law
/// fit on all samples, started from the best law of an 8-sample probe,
/// stopped in a local minimum (alpha 0.26, f_r exponent 1.18, cost 130)
/// while every leave-one-out fold found the product's own law (alpha 0.20,
/// exponent 0.99, cost about 38). The model written then had an SEP of
/// 2.0 % on its own samples, the cross-validation (which refits the law in
/// every fold) said 0.24 %, and the comparison chose it: 2.6 % SEP and 31 %
/// interval coverage on fresh samples. The joint fit now starts from the
/// three best distinct probe laws. (Fixed data: the case is one seed of the
/// zoo; the property test above checks the same invariant on FRINGE_SEED.)
#[test]
fn relaxation_law_fit_leaves_the_local_minimum_of_its_first_start() {
    let f = Family::grain();
    let train = f.samples(&Draw::new(60, FREQ_PAIRS[2]), 6);
    let fit = fit_relaxation(&train, &relax_opts(&f)).expect("grain is the model's own form");
    let (cal, cv) = (fit.stats.calibration.sep, fit.stats.cross_validation.sep);
    assert!(
        cal < 0.4 && cal <= cv,
        "SEP on its own samples {cal:.3}, cross-validated {cv:.3}"
    );
    let fringe_calibration::product::ProductModel::Relaxation(m) = &fit.model else {
        panic!("not a relaxation model");
    };
    // The synthetic grain's own Cole-Cole alpha (fit::zoo, invented constant).
    let alpha = f.interfacial.expect("grain has one").alpha;
    assert!(
        (m.law.alpha - alpha).abs() < 0.03,
        "law alpha {} where the grain's is {alpha}",
        m.law.alpha
    );
}

#[path = "common/baseline.rs"]
mod baseline;

use baseline::Baseline;
use fringe_calibration::fit::product::{
    compare_models, Candidate, CompareOptions, ModelComparison, ProductFit, Sample,
};
use fringe_calibration::stats::Folds;

fn compare_opts(f: &Family) -> CompareOptions {
    CompareOptions {
        single: SingleOptions::default(),
        relaxation: Some(relax_opts(f)),
        eps_sd: f.eps_noise_sd.max(1e-3),
        folds: Folds::LeaveOneOut,
        density_input: false,
    }
}

fn sep(e: &[f64]) -> f64 {
    let n = e.len() as f64;
    let m = e.iter().sum::<f64>() / n;
    (e.iter().map(|v| (v - m).powi(2)).sum::<f64>() / (n - 1.0)).sqrt()
}

/// (errors through the device path of the readings with a moisture, share
/// of all readings inside their 95 % interval: a reading without an
/// interval, as one without a leverage, is not inside).
fn validate(fit: &ProductFit, val: &[Sample]) -> (Vec<f64>, f64) {
    let mut e = Vec::new();
    let mut inside = 0usize;
    for s in val {
        let p = fit
            .predict(&s.channels, s.temperature_c, s.bulk_density_kg_m3, 0.95)
            .expect("reading at the calibration's frequencies");
        if let Some(m) = p.estimate.moisture_pct {
            e.push(f64::from(m) - s.moisture_pct);
            if p.interval_pct
                .is_some_and(|(lo, hi)| (lo..=hi).contains(&s.moisture_pct))
            {
                inside += 1;
            }
        }
    }
    let cov = inside as f64 / val.len() as f64;
    (e, cov)
}

fn baseline_sep(b: &Baseline, val: &[Sample]) -> f64 {
    sep(&val
        .iter()
        .map(|s| b.predict(&s.channels, s.temperature_c) - s.moisture_pct)
        .collect::<Vec<_>>())
}

/// Every product at every frequency pair ([`TRAIN`] = 100 calibration
/// samples: at 60 the quality gate's five samples per parameter hold
/// ridge to 11 effective parameters, and the chosen model did up to 1.68
/// times worse than the baseline over FRINGE_SEED 1-16, BENCHMARKS.md; 200
/// fresh validation samples): the comparison finishes and every reading of
/// the validation set gets a moisture. The chosen model's validation SEP
/// over the generic quadratic ridge baseline's (tests/common/baseline.rs)
/// averages at most 1.05 over the 24 cases and is at most 1.4 in each; the
/// 95 % prediction intervals cover 90-99 % of the zoo's validation samples
/// (88-99.5 % of each product's 600, 85-100 % in each case of 200). At
/// most 2 % of the validation readings may be without a moisture (flagged
/// by the device, never a number made up).
///
/// Issue 11 asks for "no worse than" the baseline in every case. With 100
/// calibration samples two models of similar skill differ on fresh samples
/// by chance by 10-30 % (and the realised coverage of one calibration's
/// intervals by several percent), so single cases are held to the looser
/// bounds; the cases above 1.0 are reported in BENCHMARKS.md.
#[test]
fn chosen_model_holds_against_the_generic_baseline_on_every_product() {
    let cases: Vec<(Family, Vec<[f64; 2]>)> = Family::all()
        .into_iter()
        .map(|f| (f, FREQ_PAIRS.to_vec()))
        .collect();
    holds_against_the_baseline(&cases, "the zoo");
}

/// The same bounds on products and frequency pairs nothing was designed on
/// (`fit::zoo::held_out_cases`: `Family::held_out`, `HELD_OUT_PAIRS`, added after the models and
/// rules were fixed): the held-out products at all six pairs, the zoo's
/// products at the three held-out pairs (42 cases). Over FRINGE_SEED 1-16
/// at their first measurement (BENCHMARKS.md) the comparison finished in
/// every case and the chosen model did at most 1.18 times the baseline's
/// SEP; the test fails with FRINGE_SEED 4 and 5, where one product's
/// coverage over its pairs is 99.8 % (the cereal with bound water at the
/// held-out pairs on seed 4, the coffee on seed 5; 99.5 % allowed).
#[test]
fn chosen_model_holds_on_products_and_pairs_not_designed_on() {
    holds_against_the_baseline(&held_out_cases(), "the held-out cases");
}

/// The comparison on each product at each of its pairs ([`TRAIN`]
/// calibration samples, 200 fresh ones): every case finishes, at most 2 %
/// of the validation readings without a moisture, the chosen model's SEP
/// at most 1.4 times the baseline's in each case and 1.05 on average,
/// coverage of the 95 % intervals 85-100 % in each case, 88-99.5 % over a
/// product's pairs and 90-99 % over all (`what` names the set).
fn holds_against_the_baseline(cases: &[(Family, Vec<[f64; 2]>)], what: &str) {
    let seed = seed();
    let mut worst: (f64, String) = (0.0, String::new());
    let mut ratios = Vec::new();
    let mut all_cov = Vec::new();
    for (f, pairs) in cases {
        let mut family_cov = Vec::new();
        for pair in pairs.iter().copied() {
            let train = f.samples(&Draw::new(TRAIN, pair), seed);
            let val = f.samples(&Draw::new(200, pair), seed + 1000);
            let cmp = compare_models(&train, &compare_opts(f))
                .unwrap_or_else(|e| panic!("FRINGE_SEED={seed} {} {pair:?}: {e}", f.name));
            let fit = cmp.chosen_fit();
            let (e, cov) = validate(fit, &val);
            // A reading the device cannot evaluate says so (flags, no value);
            // at most 2 % of the validation readings may.
            assert!(
                e.len() * 50 >= val.len() * 49,
                "FRINGE_SEED={seed} {} {pair:?}: {} of {} readings without a moisture",
                f.name,
                val.len() - e.len(),
                val.len()
            );
            let (s, b) = (sep(&e), baseline_sep(&Baseline::fit(&train), &val));
            println!(
                "FRINGE_SEED={seed} {} {pair:?}: chosen {} ({} coefficients) SEP {s:.3}, baseline {b:.3}, ratio {:.2}, coverage {:.3}",
                f.name,
                cmp.chosen.name(),
                fit.stats.n_coef,
                s / b,
                cov
            );
            if s / b > worst.0 {
                worst = (s / b, format!("{} {pair:?}", f.name));
            }
            ratios.push(s / b);
            assert!(
                s <= 1.4 * b,
                "FRINGE_SEED={seed} {} {pair:?}: chosen {} SEP {s:.3} vs baseline {b:.3}",
                f.name,
                cmp.chosen.name()
            );
            assert!(
                (0.85..=1.0).contains(&cov),
                "FRINGE_SEED={seed} {} {pair:?}: coverage {cov:.3}",
                f.name
            );
            family_cov.push(cov);
        }
        let c = family_cov.iter().sum::<f64>() / family_cov.len() as f64;
        println!(
            "FRINGE_SEED={seed} {}: coverage over its {} pairs {c:.3}",
            f.name,
            pairs.len()
        );
        assert!(
            (0.88..=0.995).contains(&c),
            "FRINGE_SEED={seed} {}: coverage over its {} pairs {c:.3}",
            f.name,
            pairs.len()
        );
        all_cov.push(c);
    }
    let c = all_cov.iter().sum::<f64>() / all_cov.len() as f64;
    println!("FRINGE_SEED={seed}: coverage over {what} {c:.3}");
    assert!(
        (0.90..=0.99).contains(&c),
        "FRINGE_SEED={seed}: coverage over {what} {c:.3}"
    );
    let mean = ratios.iter().sum::<f64>() / ratios.len() as f64;
    println!(
        "FRINGE_SEED={seed}: SEP ratio chosen/baseline over {what}: mean {mean:.3}, worst {:.2} ({})",
        worst.0, worst.1
    );
    assert!(
        mean <= 1.05,
        "FRINGE_SEED={seed}: mean ratio over {what} {mean:.3}"
    );
}

/// Where the physics model should win, it does: on the synthetic grain,
/// whose relaxation law is of the inversion's own form, calibrated over
/// 5-40 C and salt 0.02-0.3 S/m and validated at up to twice the calibrated
/// water conductivity, the relaxation model's validation SEP is smaller
/// than the generic baseline's; 10 C beyond the calibrated temperatures it
/// is within 15 % of it or better. (The comparison's choice is printed: in
/// range a multivariate fit can be as good, and it is then chosen; the
/// other products are in BENCHMARKS.md.)
///
/// Not on every seed: with FRINGE_SEED 11, 13 and 14 (of 1-16) the
/// temperature check fails at 5/50 MHz, 1.15, 1.20 and 1.38 times the
/// baseline (measured 2026-12-04). On 11 and 13 the relaxation model's
/// errors 10 C hotter scatter more (SEP 0.21 in range, 0.24 and 0.29
/// hotter) with no bias to speak of (+0.10 and +0.04 %) and with a slope in
/// moisture of opposite sign on the two seeds: the temperature terms'
/// estimation error, carried 10 C beyond the samples; at 5/50 MHz the
/// baseline extrapolates in temperature about as well (0.21 and 0.25). On
/// 14 the law fit itself is poor (cross-validated SEP 0.55 against 0.28 on
/// its own samples) and PLS is chosen.
#[test]
fn physics_wins_extrapolation_on_the_grain() {
    let seed = seed();
    let f = Family::grain();
    for pair in FREQ_PAIRS {
        let train = f.samples(&Draw::new(60, pair), seed);
        let cmp = compare_models(&train, &compare_opts(&f))
            .unwrap_or_else(|e| panic!("FRINGE_SEED={seed} {pair:?}: {e}"));
        let relax = cmp
            .results
            .iter()
            .find(|r| r.0 == Candidate::Relaxation)
            .and_then(|r| r.1.as_ref().ok())
            .unwrap_or_else(|| panic!("FRINGE_SEED={seed} {pair:?}: no relaxation fit"));
        let base = Baseline::fit(&train);
        let hot = f.samples(&Draw::hotter(&f, 200, pair), seed + 2000);
        let salty = f.samples(&Draw::saltier(&f, 200, pair), seed + 3000);
        let (eh, _) = validate(relax, &hot);
        let (es, _) = validate(relax, &salty);
        let (ch, _) = validate(cmp.chosen_fit(), &hot);
        let (cs, _) = validate(cmp.chosen_fit(), &salty);
        let (bh, bs) = (baseline_sep(&base, &hot), baseline_sep(&base, &salty));
        println!(
            "FRINGE_SEED={seed} grain {pair:?}: relaxation T+10 C {:.3}, 2x salt {:.3}; chosen ({}) {:.3}, {:.3}; baseline {bh:.3}, {bs:.3}",
            sep(&eh),
            sep(&es),
            cmp.chosen.name(),
            sep(&ch),
            sep(&cs)
        );
        assert!(
            sep(&es) < bs,
            "FRINGE_SEED={seed} {pair:?}: salt {} vs {bs}",
            sep(&es)
        );
        assert!(
            sep(&eh) < 1.15 * bh,
            "FRINGE_SEED={seed} {pair:?}: temperature {} vs {bh}",
            sep(&eh)
        );
    }
}

/// Regression (cause of the winner's curse): on sand at 5/50 MHz (seed 11
/// of the zoo, 60 samples) the single-frequency model had the smallest
/// cross-validated SEP of the four and was chosen by it; on 200 fresh
/// samples it did 1.84 times worse than the generic baseline. It is no
/// longer chosen: its paired advantage over the kept model is not
/// significant. (At 60 samples ridge's penalty is held to the gate's five
/// samples per parameter; the model written, ridge with 7 effective
/// parameters, does 1.5 times worse than the unconstrained baseline on
/// fresh samples: BENCHMARKS.md; the zoo test above uses 100 samples.)
/// What is chosen must do at least 10 % better on the fresh samples than
/// the lucky model (measured: 0.410 % against 0.505 %).
/// (Fixed data: one seed of the zoo.)
#[test]
fn a_lucky_cross_validated_sep_does_not_choose_the_model() {
    let f = Family::sand();
    let pair = FREQ_PAIRS[2];
    let train = f.samples(&Draw::new(60, pair), 11);
    let val = f.samples(&Draw::new(200, pair), 11 + 1000);
    let cmp = compare_models(&train, &compare_opts(&f)).expect("sand fits");
    let cv_sep = |c: Candidate| {
        cmp.results
            .iter()
            .find(|r| r.0 == c)
            .and_then(|r| r.1.as_ref().ok())
            .map(|f| f.stats.cross_validation.sep)
            .expect("fitted")
    };
    // The case: the single-frequency model's cross-validated SEP is within
    // 2 % of the smallest of the eligible models'. (It was the smallest,
    // below ridge's, until ridge's penalty was held within the gate's
    // budget: now 0.363 % against ridge's 0.357 %.)
    assert!(
        cv_sep(Candidate::SingleFrequency) < 1.02 * cmp.best_sep,
        "single-frequency {:.3} against the best {:.3}",
        cv_sep(Candidate::SingleFrequency),
        cmp.best_sep
    );
    assert_ne!(cmp.chosen, Candidate::SingleFrequency);
    match cmp
        .paired
        .iter()
        .find(|p| p.candidate == Candidate::SingleFrequency)
    {
        // Compared with the default: its advantage is not significant.
        Some(single) => assert!(
            !single.significant(),
            "single-frequency advantage z {:.2} against {:.2}",
            single.z,
            single.critical_z
        ),
        // It was the default (the smallest SEP with ridge not eligible):
        // another model was significantly better than it.
        None => {
            assert_eq!(cmp.default_model, Candidate::SingleFrequency);
            assert!(cmp.paired.iter().any(|p| p.significant()));
        }
    }
    let fit = cmp.chosen_fit();
    assert!(
        fit.stats.n >= 5 * fit.stats.n_coef,
        "{} coefficients",
        fit.stats.n_coef
    );
    let (e, _) = validate(fit, &val);
    let (s, b) = (sep(&e), baseline_sep(&Baseline::fit(&train), &val));
    let single = cmp
        .results
        .iter()
        .find(|r| r.0 == Candidate::SingleFrequency)
        .and_then(|r| r.1.as_ref().ok())
        .expect("fitted");
    let s1 = sep(&validate(single, &val).0);
    println!(
        "chosen {} SEP {s:.3}, the lucky single-frequency model {s1:.3}, baseline {b:.3}",
        cmp.chosen.name()
    );
    // What was chosen holds better on fresh samples than the lucky model.
    assert!(s < 0.9 * s1, "chosen {s:.3} vs single-frequency {s1:.3}");
}

/// Regression (a single high-leverage sample): on the cereal with bound
/// water at 5/50 MHz (seed 15 of the zoo, 60 samples) one calibration
/// sample had a leverage of about 0.999 in the ridge model; its
/// leave-one-out error carried most of the cross-validated sum of squares,
/// the prediction intervals built from it covered all 200 fresh samples
/// (the product's three pairs 99.8 %, above the 99.5 % the zoo test
/// allows). The intervals now count it as at leverage 0.5 (`LEVERAGE_CAP`)
/// and the fit names it in a note; the cross-validated statistics keep it
/// as it is. (With ridge's penalty held within the gate's budget, 60
/// samples no longer give such a sample; the case was then 100 samples of
/// the same product at 1/20 MHz, seed 15, a sample of leverage 0.990, found
/// by a sweep of seeds 1-30. Since ridge may choose the squares and
/// products of the logarithms alone, that case has none either; it is now
/// the same seed at 5/50 MHz, leverage 0.994, found by the same sweep.)
#[test]
fn one_high_leverage_sample_does_not_set_the_intervals() {
    let f = Family::cereal_bound_water();
    let pair = FREQ_PAIRS[2];
    let train = f.samples(&Draw::new(100, pair), 15);
    let val = f.samples(&Draw::new(200, pair), 15 + 1000);
    let fit = fit_multivariate(
        &train,
        &MultivariateOptions {
            eps_sd: f.eps_noise_sd.max(1e-3),
            ..MultivariateOptions::default()
        },
    )
    .expect("ridge fits");
    let far: Vec<&str> = fit
        .samples
        .iter()
        .filter(|s| s.leverage > fringe_calibration::fit::product::LEVERAGE_CAP)
        .map(|s| s.id.as_str())
        .collect();
    assert!(
        fit.samples.iter().any(|s| s.leverage > 0.99),
        "the case has a sample of leverage above 0.99"
    );
    let note = fit
        .notes
        .iter()
        .find(|n| n.contains("leverage above"))
        .expect("a note names the high-leverage samples");
    for id in &far {
        assert!(note.contains(id), "note {note:?} does not name {id}");
    }
    assert!(
        fit.interval_sd < 0.9 * fit.stats.cross_validation.rmsep,
        "interval SD {:.3} against the cross-validated RMSEP {:.3}",
        fit.interval_sd,
        fit.stats.cross_validation.rmsep
    );
    let (_, cov) = validate(&fit, &val);
    assert!((0.85..=0.995).contains(&cov), "coverage {cov:.3}");
}

/// A zoo case as `cal fit --model compare` fits it (60 calibration samples,
/// leave-one-out), with 200 fresh samples of the same product.
fn case60(f: &Family, pair: [f64; 2], seed: u64) -> (Vec<Sample>, Vec<Sample>, ModelComparison) {
    let train = f.samples(&Draw::new(60, pair), seed);
    let val = f.samples(&Draw::new(200, pair), seed + 1000);
    let cmp = compare_models(&train, &compare_opts(f))
        .unwrap_or_else(|e| panic!("{} {pair:?} seed {seed}: {e}", f.name));
    (train, val, cmp)
}

/// One model's fit of a comparison (the case needs it).
fn fitted(cmp: &ModelComparison, c: Candidate) -> &ProductFit {
    cmp.results
        .iter()
        .find(|r| r.0 == c)
        .and_then(|r| r.1.as_ref().ok())
        .unwrap_or_else(|| panic!("the {} model fits (the case)", c.name()))
}

/// Left-out samples the fit gave no moisture for.
fn missing_cv(fit: &ProductFit) -> usize {
    fit.samples
        .iter()
        .filter(|s| !s.cv_predicted_pct.is_finite())
        .count()
}

/// Regression (a model without moisture for fresh readings): on wood chips
/// at 0.1/20 MHz (seed 3 of the zoo) the relaxation model's device estimate
/// gave no moisture for 2 of its 60 left-out samples and for 5 of 200
/// fresh readings (2.5 %, above the 2 % the zoo test allows); it was
/// chosen. A model missing more than 2 % of its cross-validation
/// predictions is now not eligible (`ModelComparison::eligible`). (Since
/// the joint law fit keeps each sample inside the inversion's bounds,
/// seed 3 misses none; seed 6 misses 2 and is the case now.)
#[test]
fn a_model_without_moisture_for_its_left_out_samples_is_not_chosen() {
    let (_, val, cmp) = case60(&Family::wood_chips(), FREQ_PAIRS[1], 6);
    let relax = fitted(&cmp, Candidate::Relaxation);
    let missing = missing_cv(relax);
    assert!(missing * 50 > relax.samples.len(), "{missing} missing");
    assert!(!ModelComparison::eligible(relax));
    assert_ne!(cmp.chosen, Candidate::Relaxation);
    let (e, _) = validate(cmp.chosen_fit(), &val);
    assert!(e.len() * 50 >= val.len() * 49, "{} of 200", e.len());
}

/// Regression (a model compared only where it gave a moisture): on the
/// aggregate at 0.1/20 MHz (60 samples, seed 2 of the zoo) the relaxation
/// model gave no moisture for one of its 60 left-out samples (eligible: at
/// most 2 % may miss), beat ridge in the paired test on the other 59, was
/// chosen, and did 1.9 times worse than the generic baseline on 200 fresh
/// samples (0.853 % against 0.443 %; a few readings 3-5 % off). A missing
/// prediction now counts against its model in the paired test (as the mean
/// of the other samples' lab values, or the other model's error where that
/// is larger). Since ridge chooses among three feature sets that case no
/// longer shows it (the relaxation model is not better than ridge on its 59
/// either); the case is now the sand at 1/20 MHz, seed 14, found by a sweep
/// of seeds 1-30: the relaxation model misses one of 60, wins on the other
/// 59 (one-sided p 0.022), and does 0.420 % on the fresh samples, where
/// ridge, now chosen, does 0.319 % and the baseline 0.392 %.
#[test]
fn a_missing_left_out_prediction_counts_against_its_model() {
    let (train, val, cmp) = case60(&Family::sand(), FREQ_PAIRS[0], 14);
    let relax = fitted(&cmp, Candidate::Relaxation);
    assert_eq!(
        missing_cv(relax),
        1,
        "the case: one left-out sample without moisture"
    );
    assert!(ModelComparison::eligible(relax));
    let paired = cmp
        .paired
        .iter()
        .find(|p| p.candidate == Candidate::Relaxation)
        .expect("relaxation compared");
    assert_eq!(paired.n, 60, "{paired:?}");
    assert_ne!(cmp.chosen, Candidate::Relaxation, "{paired:?}");
    // On the samples both predict, the relaxation model wins (the case):
    // Wilcoxon's signed-rank test of ridge's absolute error minus the
    // relaxation model's, one-sided at 5 %.
    assert_eq!(cmp.default_model, Candidate::MultivariateRidge);
    let ridge = fitted(&cmp, Candidate::MultivariateRidge);
    let both: Vec<_> = ridge
        .samples
        .iter()
        .zip(&relax.samples)
        .filter(|(_, r)| r.cv_predicted_pct.is_finite())
        .collect();
    let sq: f64 = both
        .iter()
        .map(|(g, r)| {
            (g.cv_predicted_pct - g.reference_pct).powi(2)
                - (r.cv_predicted_pct - r.reference_pct).powi(2)
        })
        .sum();
    assert!(sq > 0.0, "mean squared advantage on the 59: {sq}");
    let d: Vec<f64> = both
        .iter()
        .map(|(g, r)| {
            (g.cv_predicted_pct - g.reference_pct).abs()
                - (r.cv_predicted_pct - r.reference_pct).abs()
        })
        .collect();
    assert_eq!(d.len(), 59);
    let on_59 = fringe_calibration::stats::signed_rank(&d).expect("differences");
    assert!(on_59.p_greater() < 0.05, "{on_59:?}");
    let (e, _) = validate(cmp.chosen_fit(), &val);
    let (er, _) = validate(relax, &val);
    let b = baseline_sep(&Baseline::fit(&train), &val);
    assert!(
        sep(&e) <= 0.9 * sep(&er) && sep(&e) <= b,
        "chosen SEP {:.3}, relaxation {:.3}, baseline {b:.3}",
        sep(&e),
        sep(&er)
    );
}

/// The device's flags mark readings beyond the calibration, not good ones:
/// ridge calibrated on 60 samples of each product of the zoo at each of
/// its pairs flags at most 8 % of 200 fresh readings from the product's
/// own ranges (seeds 1-6: 2.8-5.8 %; 13.4 % on seed 1 with each valid
/// range the samples' exact span), and the temperature flag marks at
/// least 70 % of readings 0-10 C above the calibrated temperatures (seeds
/// 1-6: 82-100 %; those beyond the margin, 1.7-3.1 C for the zoo's
/// temperature spans of 33-60 C).
#[test]
fn flags_mark_readings_beyond_the_calibration_not_good_ones() {
    let seed = seed();
    let (mut fresh, mut fresh_flagged, mut hot, mut hot_flagged) = (0, 0, 0, 0);
    for f in Family::all() {
        for pair in FREQ_PAIRS {
            let train = f.samples(&Draw::new(60, pair), seed);
            let fit = fit_multivariate(&train, &MultivariateOptions::default())
                .unwrap_or_else(|e| panic!("FRINGE_SEED={seed} {} {pair:?}: {e}", f.name));
            let flags = |s: &fringe_calibration::fit::product::Sample| {
                fit.predict(&s.channels, s.temperature_c, s.bulk_density_kg_m3, 0.95)
                    .map(|p| p.estimate.flags)
                    .unwrap_or_else(|e| panic!("FRINGE_SEED={seed} {} {pair:?}: {e}", f.name))
            };
            for s in f.samples(&Draw::new(200, pair), seed + 1000) {
                fresh += 1;
                fresh_flagged += usize::from(!flags(&s).is_empty());
            }
            for s in f.samples(&Draw::hotter(&f, 200, pair), seed + 2000) {
                hot += 1;
                hot_flagged += usize::from(flags(&s).contains(EstimateFlags::TEMP_OUT_OF_RANGE));
            }
        }
    }
    let (a, b) = (
        fresh_flagged as f64 / fresh as f64,
        hot_flagged as f64 / hot as f64,
    );
    println!("FRINGE_SEED={seed}: fresh readings flagged {a:.3}, hotter ones {b:.3}");
    assert!(
        a <= 0.08,
        "FRINGE_SEED={seed}: {a:.3} of fresh readings flagged"
    );
    assert!(
        b >= 0.70,
        "FRINGE_SEED={seed}: {b:.3} of hotter readings flagged"
    );
}

/// The optional density input (issue 11, item 4): on every product whose
/// bulk density varies 5 % or more between samples (invented variations,
/// the zoo's gauge reading it with 1 % noise), ridge with the density as an
/// input has a validation SEP at most 0.9 times that of ridge without it
/// ([`TRAIN`] calibration samples, 200 validation samples, 1 and 20 MHz).
/// Read without a density, the same calibration falls back to its
/// reference density: every reading still gets a moisture, flagged, and
/// its widened 95 % intervals still cover 90-100 % of the samples.
#[test]
fn a_density_input_recovers_what_density_variation_costs() {
    let seed = seed();
    let mut ratios = Vec::new();
    for f in Family::all()
        .into_iter()
        .filter(|f| f.density_variation >= 0.05)
    {
        let pair = FREQ_PAIRS[0];
        let train = f.samples(&Draw::new(TRAIN, pair), seed);
        let val = f.samples(&Draw::new(200, pair), seed + 1000);
        let fit = |density_input| {
            fit_multivariate(
                &train,
                &MultivariateOptions {
                    eps_sd: f.eps_noise_sd.max(1e-3),
                    density_input,
                    ..MultivariateOptions::default()
                },
            )
            .unwrap_or_else(|e| panic!("FRINGE_SEED={seed} {}: {e}", f.name))
        };
        let (plain, dens) = (fit(false), fit(true));
        let (e0, _) = validate(&plain, &val);
        let (e1, cov1) = validate(&dens, &val);
        let without: Vec<Sample> = val
            .iter()
            .map(|s| Sample {
                bulk_density_kg_m3: None,
                ..s.clone()
            })
            .collect();
        let (e2, cov2) = validate(&dens, &without);
        for s in &without {
            let p = dens
                .predict(&s.channels, s.temperature_c, None, 0.95)
                .unwrap();
            assert!(
                p.estimate.flags.contains(EstimateFlags::DENSITY_MISSING),
                "{}",
                f.name
            );
        }
        let r = sep(&e1) / sep(&e0);
        println!(
            "{}: SEP without density {:.3}, with {:.3} ({r:.2}x, coverage {cov1:.3}); \
             read without density {:.3} (coverage {cov2:.3})",
            f.name,
            sep(&e0),
            sep(&e1),
            sep(&e2)
        );
        assert_eq!((e1.len(), e2.len()), (val.len(), val.len()), "{}", f.name);
        assert!(
            (0.90..=1.0).contains(&cov2),
            "FRINGE_SEED={seed} {}: fallback coverage {cov2}",
            f.name
        );
        ratios.push((f.name, r));
    }
    assert!(ratios.len() >= 4, "{ratios:?}");
    assert!(
        ratios.iter().all(|(_, r)| *r <= 0.9),
        "FRINGE_SEED={seed}: {ratios:?}"
    );
}

/// The relaxation model's static terms (the held mixing-model moisture of
/// eps_hf + d_eps) stay only where they predict the left-out samples
/// better than the same model without them (a smaller mean absolute
/// error), and the fit's notes say which (BENCHMARKS.md, the static
/// terms). Fixed draws of the grain at 5/50 MHz with 60 samples, found in
/// the sweep over FRINGE_SEED 1-16: with seed 4 they cut the mean absolute
/// cross-validated error from 0.238 to 0.163 %; with seed 16 they do not
/// (0.188 % with them, 0.182 % without).
#[test]
fn the_static_terms_stay_only_where_they_predict_better() {
    let f = Family::grain();
    let pair = FREQ_PAIRS[2];
    for (seed, kept) in [(4, true), (16, false)] {
        let train = f.samples(&Draw::new(60, pair), seed);
        let fit = fit_relaxation(&train, &relax_opts(&f)).expect("relaxation fit");
        let fringe_calibration::product::ProductModel::Relaxation(m) = fit.calibration.model else {
            panic!("seed {seed}: not a relaxation model");
        };
        assert_eq!(m.uses_static(), kept, "seed {seed}: {:?}", fit.notes);
        // The regression's coefficients and the mixing parameter.
        assert_eq!(fit.stats.n_coef, if kept { 8 } else { 6 }, "seed {seed}");
        let note = if kept {
            "with the static terms"
        } else {
            "fitted without the static terms"
        };
        assert!(
            fit.notes
                .iter()
                .any(|n| n.contains(note) && n.contains("mean absolute")),
            "seed {seed}: {:?}",
            fit.notes
        );
    }
}

/// Regression (one left-out sample decided the static terms): the grain at
/// 5/50 MHz, 60 samples, seed 14 of the zoo. Its driest sample has a
/// conductivity of 8.0e-5 S/m, a seventh of the lowest of the others; in
/// its fold the conductivity term was extrapolated to it, 5.7 % off with
/// the static terms (1.3 % without), and that one squared error dropped the
/// terms although they predicted the other 59 better. The model written
/// did 0.428 % on 200 fresh samples (0.612 % 10 C beyond the calibrated
/// temperatures). Now the conductivity term holds sigma below the
/// samples' lowest (that sample: 3.5 % off), the terms are weighed by the
/// mean absolute error and kept, and the model does 0.274 % (0.407 %).
#[test]
fn one_sample_at_the_end_of_the_conductivity_range_does_not_decide() {
    let f = Family::grain();
    let pair = FREQ_PAIRS[2];
    let train = f.samples(&Draw::new(60, pair), 14);
    let fit = fit_relaxation(&train, &relax_opts(&f)).expect("relaxation fit");
    let fringe_calibration::product::ProductModel::Relaxation(m) = fit.calibration.model else {
        panic!("not a relaxation model");
    };
    assert!(m.uses_static(), "{:?}", fit.notes);
    // The hold lies below every calibration sample's sigma.
    let lowest = train
        .iter()
        .filter_map(|s| {
            fit.predict(&s.channels, s.temperature_c, s.bulk_density_kg_m3, 0.95)
                .ok()?
                .estimate
                .inversion
                .map(|i| f64::from(i.params.sigma_s_m))
        })
        .fold(f64::INFINITY, f64::min);
    assert!(
        m.sigma_hold.min > 0.0 && f64::from(m.sigma_hold.min) < lowest,
        "{:?} {lowest}",
        m.sigma_hold
    );
    let val = f.samples(&Draw::new(200, pair), 1014);
    let (e, _) = validate(&fit, &val);
    assert_eq!(e.len(), 200);
    assert!(sep(&e) < 0.35, "validation SEP {:.3}", sep(&e));
}

/// Regression (the joint law fit outside the inversion's bounds): the law
/// fit held each sample's (eps_hf, d_eps, sigma) to no bounds, and on the
/// salted feed it settled on a law at which most samples had a negative
/// eps_hf ("eps_hf -4.105, d_eps 14.020 ... lie outside the inversion's
/// bounds"); on the dry products sigma went to 1e-22 S/m and below. The
/// relaxation model was refused on 10 of the 24 rows of the zoo table.
/// The law fit now keeps every sample inside the device's bounds, and the
/// device accepts sigma on its lower bound (less conduction than the two
/// frequencies resolve), so these fit. Fixed cases, each refused before
/// (the salted feed as in the 200-sample rows of the zoo table; it still
/// leaves out a few samples whose eps_hf the law presses onto 1; where that
/// refused the model, the fit now falls back on another law:
/// a_law_the_device_can_invert_is_taken_over_a_cheaper_one).
#[test]
fn the_law_fit_keeps_every_sample_where_the_device_can_find_it() {
    // (product, pair, seed, samples, whether none may be left out for bounds)
    for (f, pair, seed, n, none_outside) in [
        (Family::salted_feed(), FREQ_PAIRS[0], 8, 200, false),
        (Family::food_powder(), FREQ_PAIRS[0], 1, TRAIN, true),
        (Family::polymer_pellets(), FREQ_PAIRS[1], 1, TRAIN, true),
    ] {
        let train = f.samples(&Draw::new(n, pair), seed);
        let fit = fit_relaxation(&train, &relax_opts(&f))
            .unwrap_or_else(|e| panic!("{} {pair:?}: {e}", f.name));
        let outside: Vec<&str> = fit
            .excluded
            .iter()
            .filter(|x| x.reason.contains("outside the inversion's bounds"))
            .map(|x| x.id.as_str())
            .collect();
        assert!(
            !none_outside || outside.is_empty(),
            "{} {pair:?}: {outside:?}",
            f.name
        );
        assert!(
            fit.excluded.len() * 20 <= train.len(),
            "{} {pair:?}: {} left out",
            f.name,
            fit.excluded.len()
        );
        // On the dry products the device gives a moisture for nearly every
        // left-out sample (the comparison's eligibility rule: at most 2 %
        // without). (The salted feed's misses 6 of 194: fitted, but not
        // eligible.)
        let missing = fit
            .samples
            .iter()
            .filter(|s| !s.cv_predicted_pct.is_finite())
            .count();
        assert!(
            !none_outside || missing * 50 <= fit.samples.len(),
            "{} {pair:?}: {missing} cross-validation predictions without a moisture",
            f.name
        );
    }
}

/// Regression: on the salted feed at 1/20 MHz (seed 1, 60 samples) the
/// joint law fit's lowest-cost law put the interfacial relaxation's
/// frequency far above the band (121 MHz) and pressed eps_hf onto its lower
/// bound for six samples; each refit without them found more, and the
/// relaxation model was refused ("did not settle"), as on 37 of the zoo's
/// 48 salted-feed cases (FRINGE_SEED 1-16, three pairs). The fit now falls
/// back on the law among the same starts that puts the fewest samples on
/// the bounds, and says so: here every sample is used, the device gives a
/// moisture for nearly every fresh reading, and the validation SEP is
/// within 1.4 times the generic baseline's (measured 0.646 % against
/// 0.542 %: the one Cole-Cole law does not describe this product's two
/// relaxations, and the comparison writes ridge, 0.539 %). (Fixed data:
/// one seed of the zoo.)
#[test]
fn a_law_the_device_can_invert_is_taken_over_a_cheaper_one() {
    let f = Family::salted_feed();
    let pair = FREQ_PAIRS[0];
    let train = f.samples(&Draw::new(60, pair), 1);
    let fit = fit_relaxation(&train, &relax_opts(&f)).expect("fitted with the fallback law");
    assert!(
        fit.notes.iter().any(|n| n.contains("fewest samples")),
        "notes: {:?}",
        fit.notes
    );
    assert!(fit.excluded.is_empty(), "left out: {:?}", fit.excluded);
    let val = f.samples(&Draw::new(200, pair), 1 + 1000);
    let (e, _) = validate(&fit, &val);
    assert!(
        e.len() * 50 >= val.len() * 49,
        "{} of 200 with a moisture",
        e.len()
    );
    let b = baseline_sep(&Baseline::fit(&train), &val);
    assert!(
        sep(&e) < 1.4 * b,
        "SEP {:.3} against the baseline's {b:.3}",
        sep(&e)
    );
}

/// The relaxation model with the plant's density input
/// ([`RelaxationOptions::density_input`]; parameter layout 4): its mixing
/// model takes each sample's (and on the device each reading's) bulk
/// density. On the wood chips, whose bulk density varies 10 % between
/// samples, the validation SEP is at most 0.6 times that of the same model
/// without the density at every pair (measured over FRINGE_SEED 1-16,
/// 60 samples: 0.25-0.59, median 0.31); on the cereal with bound water
/// (5 %) at 1/20 and 0.1/20 MHz it is no worse (0.51-0.99). (A pair where
/// the model refuses the table without the density is skipped: the wood
/// chips at 0.1/20 MHz with seeds 4 and 10; with it, it refused them
/// too.) Read without a density, every reading is flagged, falls back on
/// the calibration's reference density, and its widened 95 % interval
/// still covers 85-100 % of the samples, as the zoo test asks of each case
/// (measured 0.90-1.00 on the wood chips, but 0.875 at 0.1/20 MHz with
/// seed 9, a poor fit with the density, 1.45 % SEP, that both fits refused
/// before the fallback law of
/// a_law_the_device_can_invert_is_taken_over_a_cheaper_one). (Synthetic
/// products of `fit::zoo`; the density gauge reads with 1 % noise,
/// invented.)
#[test]
fn the_relaxation_model_follows_the_plants_density() {
    let seed = seed();
    let cases = FREQ_PAIRS
        .iter()
        .map(|p| (Family::wood_chips(), *p, 0.6))
        .chain(
            FREQ_PAIRS[..2]
                .iter()
                .map(|p| (Family::cereal_bound_water(), *p, 1.0)),
        );
    for (f, pair, bound) in cases {
        let train = f.samples(&Draw::new(60, pair), seed);
        let val = f.samples(&Draw::new(200, pair), seed + 1000);
        // (Where the model refuses the table without the density, as it
        // does the wood chips at 0.1/20 MHz with some seeds, there is
        // nothing to compare.)
        let Ok(without) = fit_relaxation(&train, &relax_opts(&f)) else {
            continue;
        };
        let with = fit_relaxation(
            &train,
            &RelaxationOptions {
                density_input: true,
                ..relax_opts(&f)
            },
        )
        .unwrap_or_else(|e| panic!("FRINGE_SEED={seed} {} {pair:?}: {e}", f.name));
        let fringe_calibration::product::ProductModel::Relaxation(m) = with.model else {
            panic!("kind")
        };
        assert!(m.density_input && with.params[0] == 4.0);
        let (e0, _) = validate(&without, &val);
        let (e1, _) = validate(&with, &val);
        let r = sep(&e1) / sep(&e0);
        println!(
            "FRINGE_SEED={seed} {} {pair:?}: relaxation SEP without the density {:.3}, with it {:.3} ({r:.2}x)",
            f.name,
            sep(&e0),
            sep(&e1)
        );
        assert!(r <= bound, "FRINGE_SEED={seed} {} {pair:?}: {r}", f.name);
        if f.name == "wood-chips" {
            let no_density: Vec<Sample> = val
                .iter()
                .map(|s| Sample {
                    bulk_density_kg_m3: None,
                    ..s.clone()
                })
                .collect();
            let (e2, cov) = validate(&with, &no_density);
            for s in &no_density {
                let p = with
                    .predict(&s.channels, s.temperature_c, None, 0.95)
                    .unwrap();
                assert!(
                    p.estimate.moisture_pct.is_none()
                        || p.estimate.flags.contains(EstimateFlags::DENSITY_MISSING)
                );
            }
            // Every reading that has a moisture with its density has one
            // without.
            assert_eq!(e2.len(), e1.len(), "FRINGE_SEED={seed} {pair:?}");
            assert!(
                (0.85..=1.0).contains(&cov),
                "FRINGE_SEED={seed} {pair:?}: fallback coverage {cov}"
            );
        }
    }
}

/// A reading whose f64 inversion does not converge to its tolerance, where
/// the device's f32 inversion does, takes its leverage from the device's
/// parameters (those its moisture comes from): it gets a finite leverage
/// and a prediction interval. Without that it would have no leverage and
/// so no interval (before, it got the interval of a reading at average
/// leverage). Green coffee (a held-out product) at 0.5/10 MHz, seed 1,
/// the relaxation model fitted as `compare_models` fits it (leave-one-out):
/// 10 of its 200 validation readings, found with
/// `chosen_model_holds_on_products_and_pairs_not_designed_on`.
#[test]
fn a_reading_the_f64_inversion_misses_takes_the_device_parameters() {
    use fringe_calibration::invert::{invert, InvertOptions, Observation};
    use fringe_calibration::product::ProductModel;
    use fringe_calibration::Cx;
    let f = Family::green_coffee();
    let pair = [0.5e6, 10.0e6];
    let train = f.samples(&Draw::new(TRAIN, pair), 1);
    let val = f.samples(&Draw::new(200, pair), 1001);
    let fit = fit_relaxation(
        &train,
        &RelaxationOptions {
            folds: Folds::LeaveOneOut,
            ..relax_opts(&f)
        },
    )
    .expect("relaxation fit");
    let ProductModel::Relaxation(m) = &fit.model else {
        panic!("not a relaxation model");
    };
    let mut missed = 0;
    for s in &val {
        let p = fit
            .predict(&s.channels, s.temperature_c, s.bulk_density_kg_m3, 0.95)
            .expect("reading at the calibration's frequencies");
        if p.estimate.moisture_pct.is_none() {
            continue;
        }
        let mut ch = s.channels.clone();
        ch.sort_by(|a, b| a.freq_hz.total_cmp(&b.freq_hz));
        let obs = [0, 1].map(|k| Observation {
            freq_hz: ch[k].freq_hz,
            eps: Cx::new(ch[k].eps_re, -ch[k].eps_loss),
            sd: fit.eps_sd,
        });
        if invert(&obs, &m.law, s.temperature_c, &InvertOptions::default()).is_err() {
            missed += 1;
            assert!(
                p.leverage.is_finite() && p.interval_pct.is_some(),
                "{}: {p:?}",
                s.id
            );
        }
    }
    println!(
        "readings with a moisture the f64 inversion missed: {missed} of {}",
        val.len()
    );
    assert!(
        missed > 0,
        "no such reading: the test no longer tests the fallback"
    );
}
