//! The zoo benchmark (not a test): the eight products of `fit::zoo`
//! (`Family::all`) at its three frequency pairs (`FREQ_PAIRS`), every model of `compare_models` and the generic
//! quadratic ridge baseline; validation SEP on fresh samples, on samples
//! 10 C beyond the calibrated temperatures and at up to twice the
//! calibrated water conductivity; bias and 95 % interval coverage of the
//! chosen model; the time of the whole comparison (every model with its
//! cross-validation) for 60 and 200 samples; the chosen model's and the
//! baseline's SEP on the validation readings the chosen model does not
//! mark (no flag of the device's estimate, leverage within the
//! calibration set's), and how many it marks.
//!
//! `cargo run --release -p fringe-calibration --example zoo_bench [-- --quick]`
//! (`--quick`: 60 samples only; `--density`: the density table only;
//! `--timing`: each model's fit time; `--kfold-time`: the 10-fold
//! comparison of 200 samples alone, every row, median of 5, with the
//! relaxation fit's share; FRINGE_FAMILY=name for one of the eight products;
//! `--held-out`: the table at 60 samples on the products and frequency
//! pairs nothing was designed on, `fit::zoo::Family::held_out` at all six
//! pairs and the zoo's products at `HELD_OUT_PAIRS`; `--gross-errors`: the
//! chosen models' readings off by more than 4 times their cross-validated
//! SEP on all eleven products at all six pairs, and what marks them). Seed: FRINGE_SEED (default 1).
#[path = "../tests/common/baseline.rs"]
mod baseline;

use fringe_calibration::fit::product::{
    compare_models, fit_multivariate, fit_relaxation, fit_single, Candidate, CompareOptions,
    MultivariateOptions, MvMethod, ProductFit, RelaxationOptions, Sample, SingleOptions,
};
use fringe_calibration::fit::zoo::{all_pairs, held_out_cases, Draw, Family, FREQ_PAIRS};
use fringe_calibration::stats::Folds;
use std::time::Instant;

fn sep(e: &[f64]) -> f64 {
    let n = e.len() as f64;
    let m = e.iter().sum::<f64>() / n;
    (e.iter().map(|v| (v - m).powi(2)).sum::<f64>() / (n - 1.0)).sqrt()
}

/// Errors of a fit on `val` through the device path (readings without a
/// moisture are counted apart), and how many lie inside their 95 %
/// interval (a reading without an interval, as one without a leverage,
/// is not inside).
fn errors(f: &ProductFit, val: &[Sample]) -> (Vec<f64>, usize, usize) {
    let (mut e, mut missing, mut inside) = (Vec::new(), 0, 0);
    for s in val {
        match f.predict(&s.channels, s.temperature_c, s.bulk_density_kg_m3, 0.95) {
            Ok(p) => match p.estimate.moisture_pct {
                Some(m) => {
                    e.push(f64::from(m) - s.moisture_pct);
                    if p.interval_pct
                        .is_some_and(|(lo, hi)| (lo..=hi).contains(&s.moisture_pct))
                    {
                        inside += 1;
                    }
                }
                None => missing += 1,
            },
            Err(_) => missing += 1,
        }
    }
    (e, missing, inside)
}

/// The chosen model's and the baseline's errors on the validation readings
/// the chosen model gives a moisture without marking it (no flag of the
/// device's estimate, leverage within the calibration set's): what a plant
/// reads as a good value, compared on the same readings.
fn unmarked_errors(
    f: &ProductFit,
    base: &baseline::Baseline,
    val: &[Sample],
) -> (Vec<f64>, Vec<f64>) {
    let (mut ec, mut eb) = (Vec::new(), Vec::new());
    for s in val {
        let Ok(p) = f.predict(&s.channels, s.temperature_c, s.bulk_density_kg_m3, 0.95) else {
            continue;
        };
        if let (Some(m), false) = (p.estimate.moisture_pct, p.marked()) {
            ec.push(f64::from(m) - s.moisture_pct);
            eb.push(base.predict(&s.channels, s.temperature_c) - s.moisture_pct);
        }
    }
    (ec, eb)
}

/// The effect of density variation: for each product whose bulk density
/// varies, at 1/20 MHz, the chosen model's validation SEP with the density
/// varying as the product says and with it held at its nominal value, and
/// the ridge model with and without Trabelsi-Kraszewski-Nelson's
/// density-independent psi (on fresh samples and at twice the calibrated
/// salt), and the ridge model with the plant's density as an input
/// (`density_input`, the gauge reading with 1 % noise), on fresh samples
/// with the density and without it (the device's fallback to the
/// reference density, flagged).
fn density_table(seed: u64) {
    println!();
    println!("| product | density varies | chosen, density varying | chosen, density fixed | ridge without psi | ridge with psi | ridge 2x salt without / with psi | ridge with density input | same, no density given | relaxation without / with density input | chosen with density input |");
    println!("| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |");
    for f in Family::all()
        .into_iter()
        .filter(|f| f.density_variation > 0.0)
    {
        let pair = FREQ_PAIRS[0];
        let fixed = Family {
            density_variation: 0.0,
            ..f
        };
        let mut cells = Vec::new();
        for g in [f, fixed] {
            let opts = loo_compare(&g, false);
            let train = g.samples(&Draw::new(60, pair), seed);
            let val = g.samples(&Draw::new(200, pair), seed + 1000);
            cells.push(match compare_models(&train, &opts) {
                Ok(c) => format!(
                    "{} {:.3}",
                    c.chosen.name(),
                    sep(&errors(c.chosen_fit(), &val).0)
                ),
                Err(e) => format!("none: {e}"),
            });
        }
        let train = f.samples(&Draw::new(60, pair), seed);
        let val = f.samples(&Draw::new(200, pair), seed + 1000);
        let salty = f.samples(&Draw::saltier(&f, 200, pair), seed + 3000);
        let mut ridge = Vec::new();
        for psi in [false, true] {
            let o = MultivariateOptions {
                eps_sd: f.eps_noise_sd.max(1e-3),
                density_independent: psi,
                ..MultivariateOptions::default()
            };
            ridge.push(match fit_multivariate(&train, &o) {
                Ok(fit) => (sep(&errors(&fit, &val).0), sep(&errors(&fit, &salty).0)),
                Err(_) => (f64::NAN, f64::NAN),
            });
        }
        let o = MultivariateOptions {
            eps_sd: f.eps_noise_sd.max(1e-3),
            density_input: true,
            ..MultivariateOptions::default()
        };
        let no_density: Vec<Sample> = val
            .iter()
            .map(|s| Sample {
                bulk_density_kg_m3: None,
                ..s.clone()
            })
            .collect();
        let (with, without) = match fit_multivariate(&train, &o) {
            Ok(fit) => (
                sep(&errors(&fit, &val).0),
                sep(&errors(&fit, &no_density).0),
            ),
            Err(_) => (f64::NAN, f64::NAN),
        };
        // The relaxation model without and with the density input, and the
        // comparison with it (every model given the density).
        let relax = |density_input| {
            let o = RelaxationOptions {
                refit_nonlinear_in_cv: true,
                density_input,
                ..f.relaxation_options()
            };
            match fit_relaxation(&train, &o) {
                Ok(fit) => format!("{:.3}", sep(&errors(&fit, &val).0)),
                Err(_) => "refused".into(),
            }
        };
        let chosen_dens = match compare_models(&train, &loo_compare(&f, true)) {
            Ok(c) => format!(
                "{} {:.3}",
                c.chosen.name(),
                sep(&errors(c.chosen_fit(), &val).0)
            ),
            Err(e) => format!("none: {e}"),
        };
        println!(
            "| {} | +/-{:.0} % | {} | {} | {:.3} | {:.3} | {:.3} / {:.3} | {:.3} | {:.3} | {} / {} | {chosen_dens} |",
            f.name,
            100.0 * f.density_variation,
            cells[0],
            cells[1],
            ridge[0].0,
            ridge[1].0,
            ridge[0].1,
            ridge[1].1,
            with,
            without,
            relax(false),
            relax(true)
        );
    }
}

/// The comparison of `cal fit --model compare` below 100 samples (leave-one-
/// out, the relaxation model refitted in every fold), with the density
/// input or without.
fn loo_compare(f: &Family, density_input: bool) -> CompareOptions {
    CompareOptions {
        single: SingleOptions::default(),
        relaxation: Some(RelaxationOptions {
            refit_nonlinear_in_cv: true,
            ..f.relaxation_options()
        }),
        eps_sd: f.eps_noise_sd.max(1e-3),
        folds: Folds::LeaveOneOut,
        density_input,
    }
}

/// Time of each model's fit with its cross-validation, 200 samples, leave-
/// one-out and 10-fold (the median of 3 runs).
fn timing_table(seed: u64) {
    println!();
    println!("| product, 200 samples, 1/20 MHz | folds | single | relaxation | PLS | ridge |");
    println!("| --- | --- | --- | --- | --- | --- |");
    for f in [Family::grain(), Family::sand(), Family::food_powder()] {
        let train = f.samples(&Draw::new(200, FREQ_PAIRS[0]), seed);
        for folds in [Folds::LeaveOneOut, Folds::KFold(10)] {
            let time = |run: &dyn Fn() -> bool| -> String {
                let mut t: Vec<f64> = (0..3)
                    .map(|_| {
                        let t0 = Instant::now();
                        let ok = run();
                        let dt = t0.elapsed().as_secs_f64() * 1e3;
                        if ok {
                            dt
                        } else {
                            f64::NAN
                        }
                    })
                    .collect();
                t.sort_by(f64::total_cmp);
                if t[1].is_nan() {
                    "refused".into()
                } else {
                    format!("{:.0} ms", t[1])
                }
            };
            let single = time(&|| {
                fit_single(
                    &train,
                    &SingleOptions {
                        folds,
                        ..SingleOptions::default()
                    },
                )
                .is_ok()
            });
            let relax = time(&|| {
                fit_relaxation(
                    &train,
                    &RelaxationOptions {
                        refit_nonlinear_in_cv: true,
                        folds,
                        ..f.relaxation_options()
                    },
                )
                .is_ok()
            });
            let mv = |method| {
                time(&|| {
                    fit_multivariate(
                        &train,
                        &MultivariateOptions {
                            method,
                            folds,
                            ..MultivariateOptions::default()
                        },
                    )
                    .is_ok()
                })
            };
            println!(
                "| {} | {} | {single} | {relax} | {} | {} |",
                f.name,
                match folds {
                    Folds::LeaveOneOut => "leave-one-out".to_string(),
                    Folds::KFold(k) => format!("{k}-fold"),
                },
                mv(MvMethod::Pls),
                mv(MvMethod::Ridge)
            );
        }
    }
}

/// The 10-fold comparison of 200 samples (what `cal fit` does from 100
/// samples on) on every row, median of 5 runs, and the relaxation fit
/// alone with the same options (the comparison runs it on a thread of its
/// own beside the other three models).
fn kfold_time_table(seed: u64) {
    println!("| product | f1/f2 MHz | compare, 10-fold | relaxation alone | chosen | relaxation CV SEP |");
    println!("| --- | --- | --- | --- | --- | --- |");
    let median = |run: &dyn Fn()| -> f64 {
        let mut t: Vec<f64> = (0..5)
            .map(|_| {
                let t0 = Instant::now();
                run();
                t0.elapsed().as_secs_f64() * 1e3
            })
            .collect();
        t.sort_by(f64::total_cmp);
        t[2]
    };
    let only = std::env::var("FRINGE_FAMILY").ok();
    for f in Family::all() {
        if only.as_deref().is_some_and(|o| o != f.name) {
            continue;
        }
        for pair in FREQ_PAIRS {
            let relax = RelaxationOptions {
                refit_nonlinear_in_cv: true,
                folds: Folds::KFold(10),
                ..f.relaxation_options()
            };
            let opts = CompareOptions {
                single: SingleOptions::default(),
                relaxation: Some(relax),
                eps_sd: f.eps_noise_sd.max(1e-3),
                folds: Folds::KFold(10),
                density_input: false,
            };
            let big = f.samples(&Draw::new(200, pair), seed + 7);
            let chosen = match compare_models(&big, &opts) {
                Ok(m) => m.chosen.name().to_string(),
                Err(_) => "none".into(),
            };
            let tc = median(&|| {
                let _ = compare_models(&big, &opts);
            });
            let tr = median(&|| {
                let _ = fit_relaxation(&big, &relax);
            });
            let cv = match fit_relaxation(&big, &relax) {
                Ok(r) => format!("{:.9}", r.stats.cross_validation.sep),
                Err(e) => format!("refused: {e}"),
            };
            println!(
                "| {} | {}/{} | {tc:.0} ms | {tr:.0} ms | {chosen} | {cv} |",
                f.name,
                pair[0] / 1e6,
                pair[1] / 1e6
            );
        }
    }
}

/// Gross errors and whether anything marks them: the chosen model (60
/// samples) of every product, the held-out ones too, at all six pairs,
/// on 200 fresh readings each; a reading off by more than 4 times the
/// cross-validated SEP counts, with whether the device's estimate flagged
/// it, whether its leverage lay beyond the calibration set's, and whether
/// its 95 % interval missed the lab value.
fn gross_errors(seed: u64) {
    let (mut readings, mut gross, mut device, mut leverage, mut neither, mut missed) =
        (0, 0, 0, 0, 0, 0);
    let mut worst: Vec<(f64, String)> = Vec::new();
    for f in Family::all().into_iter().chain(Family::held_out()) {
        for pair in all_pairs() {
            let train = f.samples(&Draw::new(60, pair), seed);
            let val = f.samples(&Draw::new(200, pair), seed + 1000);
            let Ok(m) = compare_models(&train, &loo_compare(&f, false)) else {
                println!("{} {:?}: no comparison", f.name, pair);
                continue;
            };
            let fit = m.chosen_fit();
            let cv = fit.stats.cross_validation.sep;
            for s in &val {
                let Ok(p) = fit.predict(&s.channels, s.temperature_c, s.bulk_density_kg_m3, 0.95)
                else {
                    continue;
                };
                let Some(v) = p.estimate.moisture_pct else {
                    continue;
                };
                readings += 1;
                let e = f64::from(v) - s.moisture_pct;
                if e.abs() <= 4.0 * cv {
                    continue;
                }
                gross += 1;
                device += usize::from(!p.estimate.flags.is_empty());
                leverage += usize::from(p.extrapolation);
                if !p.marked() {
                    neither += 1;
                    if p.interval_pct
                        .is_some_and(|(lo, hi)| !(lo..=hi).contains(&s.moisture_pct))
                    {
                        missed += 1;
                    }
                    worst.push((
                        e.abs() / cv,
                        format!(
                            "{} {}/{} MHz, {}: {e:+.2} % (cross-validated SEP {cv:.3})",
                            f.name,
                            pair[0] / 1e6,
                            pair[1] / 1e6,
                            m.chosen.name()
                        ),
                    ));
                }
            }
        }
    }
    println!("readings with a moisture {readings}; off by more than 4 x the cross-validated SEP {gross}: flagged by the device {device}, leverage beyond the calibration set's {leverage}, neither {neither} (of these outside their 95 % interval {missed})");
    worst.sort_by(|a, b| b.0.total_cmp(&a.0));
    for (k, w) in worst.iter().take(5) {
        println!("  unmarked, {k:.1} x: {w}");
    }
}

fn main() {
    let quick = std::env::args().any(|a| a == "--quick");
    let seed: u64 = std::env::var("FRINGE_SEED")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(1);
    println!("seed {seed}");
    if std::env::args().any(|a| a == "--density") {
        density_table(seed);
        return;
    }
    if std::env::args().any(|a| a == "--timing") {
        timing_table(seed);
        return;
    }
    if std::env::args().any(|a| a == "--gross-errors") {
        gross_errors(seed);
        return;
    }
    if std::env::args().any(|a| a == "--kfold-time") {
        kfold_time_table(seed);
        return;
    }
    println!("| product | f1/f2 MHz | single | relaxation | PLS | ridge | baseline | chosen | bias | coverage 95 % | T+10 C chosen / baseline | 2x sigma chosen / baseline | fit 60 | fit 200 | fit 200, 10-fold | unmarked readings: chosen / baseline |");
    println!(
        "| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |"
    );
    // `--held-out`: the products and frequency pairs nothing was designed
    // on (the held-out products at all six pairs, the zoo's at the held-out
    // pairs), 60 samples as `--quick`.
    let held_out = std::env::args().any(|a| a == "--held-out");
    let quick = quick || held_out;
    let cases: Vec<(Family, Vec<[f64; 2]>)> = if held_out {
        held_out_cases()
    } else {
        Family::all()
            .into_iter()
            .map(|f| (f, FREQ_PAIRS.to_vec()))
            .collect()
    };
    for (f, pairs) in cases {
        for pair in pairs {
            let opts = loo_compare(&f, false);
            let train = f.samples(&Draw::new(60, pair), seed);
            let t0 = Instant::now();
            let cmp = compare_models(&train, &opts);
            let t60 = t0.elapsed().as_secs_f64();
            let (t200, t200k) = if quick {
                (f64::NAN, f64::NAN)
            } else {
                let big = f.samples(&Draw::new(200, pair), seed + 7);
                let t0 = Instant::now();
                let _ = compare_models(&big, &opts);
                let a = t0.elapsed().as_secs_f64();
                let t0 = Instant::now();
                let _ = compare_models(
                    &big,
                    &CompareOptions {
                        folds: Folds::KFold(10),
                        ..opts
                    },
                );
                (a, t0.elapsed().as_secs_f64())
            };
            let val = f.samples(&Draw::new(200, pair), seed + 1000);
            let hot = f.samples(&Draw::hotter(&f, 200, pair), seed + 2000);
            let salty = f.samples(&Draw::saltier(&f, 200, pair), seed + 3000);
            let base = baseline::Baseline::fit(&train);
            let base_sep = |v: &[Sample]| {
                sep(&v
                    .iter()
                    .map(|s| base.predict(&s.channels, s.temperature_c) - s.moisture_pct)
                    .collect::<Vec<_>>())
            };
            let cell = |c: Candidate| -> String {
                match &cmp {
                    Ok(m) => match m.results.iter().find(|r| r.0 == c).map(|r| &r.1) {
                        Some(Ok(fit)) => {
                            let (e, miss, _) = errors(fit, &val);
                            let mark = if fit.excluded.is_empty() { "" } else { "*" };
                            if e.len() < 3 {
                                "no values".into()
                            } else if miss > 0 {
                                format!("{:.3}{mark} ({miss} none)", sep(&e))
                            } else {
                                format!("{:.3}{mark}", sep(&e))
                            }
                        }
                        Some(Err(_)) => "refused".into(),
                        None => "-".into(),
                    },
                    Err(_) => "-".into(),
                }
            };
            let (chosen, bias, cov, hot_s, salty_s, unmarked) = match &cmp {
                Ok(m) => {
                    let fit = m.chosen_fit();
                    let (e, _, inside) = errors(fit, &val);
                    let bias = e.iter().sum::<f64>() / e.len() as f64;
                    let (eh, _, _) = errors(fit, &hot);
                    let (es, _, _) = errors(fit, &salty);
                    let (ec, eb) = unmarked_errors(fit, &base, &val);
                    (
                        format!("{} {:.3}", m.chosen.name(), sep(&e)),
                        format!("{bias:+.3}"),
                        format!("{:.1} %", 100.0 * inside as f64 / val.len() as f64),
                        format!("{:.3} / {:.3}", sep(&eh), base_sep(&hot)),
                        format!("{:.3} / {:.3}", sep(&es), base_sep(&salty)),
                        format!(
                            "{:.3} / {:.3} ({} marked)",
                            sep(&ec),
                            sep(&eb),
                            val.len() - ec.len()
                        ),
                    )
                }
                Err(e) => (
                    format!("none: {e}"),
                    "-".into(),
                    "-".into(),
                    "-".into(),
                    "-".into(),
                    "-".into(),
                ),
            };
            println!(
                "| {} | {}/{} | {} | {} | {} | {} | {:.3} | {} | {} | {} | {} | {} | {:.2} s | {:.2} s | {:.0} ms | {} |",
                f.name,
                pair[0] / 1e6,
                pair[1] / 1e6,
                cell(Candidate::SingleFrequency),
                cell(Candidate::Relaxation),
                cell(Candidate::MultivariatePls),
                cell(Candidate::MultivariateRidge),
                base_sep(&val),
                chosen,
                bias,
                cov,
                hot_s,
                salty_s,
                t60,
                t200,
                1e3 * t200k,
                unmarked
            );
        }
    }
}
