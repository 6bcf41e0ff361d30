//! Product calibration from reference samples (`fringe cal fit`), the
//! device's own evaluation applied to a table (`cal predict`), and the bias
//! and slope check against lab pairs (`cal adjust`). Nothing here prints:
//! the summaries are written to a writer the caller gives.
//!
//! The fitting and statistics are `fringe_calibration::fit` (`fit_single`,
//! `fit_relaxation`, `compare`); the evaluation is
//! `fringe_calibration::estimate::estimate` on the calibration parsed by the
//! firmware's own `parse_product`, so a prediction here is the number the
//! device would report for the same permittivities and temperature.

use std::path::{Path, PathBuf};

use fringe_calibration::estimate::{estimate, Channel, EstimateInput};
use fringe_calibration::fit::product::{
    compare_models, fit_multivariate, fit_relaxation, fit_single, ChannelReading, CompareOptions,
    IntervalModel, MixingFit, ModelComparison, MultivariateOptions, MvMethod, PairedTest,
    ProductFit, RelaxationOptions, Sample, SingleOptions, MV_MIN_SAMPLES,
};
use fringe_calibration::stats::{Folds, PredictionStats, StatsError};
use fringe_protocol::{short_string, Basis, Flags, ModelKind, ProductCal, Range};
use serde_json::json;
use sha2::{Digest, Sha256};

use crate::plots;
use crate::product_file::{ProductFile, ProductFileError, Source, Statistics};
use crate::samples::{read_samples, MoistureColumn, RefSample, SampleError, SampleSet};

/// Why a fit failed (nothing is written then).
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum FitError {
    /// The sample table is missing or invalid (file, line, column, field).
    #[error("{0}")]
    Samples(#[from] SampleError),
    /// The quality gate refused the calibration.
    #[error("{0}")]
    Gate(#[from] GateRefused),
    /// The relaxation model was asked for without the densities.
    #[error("the relaxation model needs --bulk-density-kg-m3 and --particle-density-kg-m3 (measured for this product)")]
    NoDensities,
    /// `--density-input` on a table where a sample has no bulk density.
    #[error("{}: {}: --density-input needs the `bulk_density_kg_m3` column with a value on every row (the density at the sensor when the sample was taken)", file.display(), match (line, id) { (Some(l), Some(i)) => format!("line {l} (sample `{}`) has no bulk density", crate::samples::shorten(i, 80)), _ => "no row has a bulk density".to_string() })]
    NoDensity {
        /// The sample table.
        file: PathBuf,
        /// Line of the first row without one (None: no row has one).
        line: Option<u64>,
        /// Its sample id.
        id: Option<String>,
    },
    /// The model could not be fitted.
    #[error("{what}")]
    Model {
        /// What was fitted, from which file.
        what: String,
        /// Why not.
        #[source]
        source: fringe_calibration::fit::product::ProductFitError,
    },
    /// Every lab value lies above the moisture a device reading carries.
    #[error("{}: the lab values on a dry basis start at {lowest:.2} %, above the {} % a device reading carries, so every reading would be out of range: fit on a wet basis (M_wb = 100 M_db / (100 + M_db)) with --basis wet", file.display(), fringe_protocol::quant::MOISTURE_MAX_PCT)]
    BeyondReading {
        /// The sample table.
        file: PathBuf,
        /// The lowest lab value, %.
        lowest: f64,
    },
    /// The product name does not fit the device.
    #[error("product name `{name}` must be 1 to {max} bytes (use --name)")]
    BadName {
        /// The name.
        name: String,
        /// Most bytes allowed.
        max: usize,
    },
    /// The fit does not fit the wire form.
    #[error("the fit gave too many {what} for the device")]
    TooMany {
        /// Parameters or input ranges.
        what: &'static str,
    },
    /// A file could not be read.
    #[error("reading {path}: {source}")]
    Read {
        /// File.
        path: PathBuf,
        /// What the system said.
        source: std::io::Error,
    },
    /// The plot could not be drawn.
    #[error("drawing the fit plot: {0}")]
    Plot(String),
}

/// Why a prediction failed (nothing is written then).
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum PredictError {
    /// The calibration file is missing or invalid.
    #[error("{0}")]
    File(#[from] ProductFileError),
    /// The sample table is missing or invalid.
    #[error("{0}")]
    Samples(#[from] SampleError),
    /// The device's own check refuses the calibration.
    #[error("{path}: the device would refuse this calibration ({reason})")]
    Refused {
        /// Calibration file.
        path: PathBuf,
        /// The device's reason.
        reason: String,
    },
    /// The table was measured at other frequencies than the calibration's.
    #[error("{input}: sample {sample} was measured at {}, but {cal} holds only at {} (its reference samples' frequencies); nothing written", crate::product_file::freq_pair_label(*.got_hz), crate::product_file::freq_pair_label(*.want_hz))]
    OtherFrequencies {
        /// The table.
        input: PathBuf,
        /// The sample.
        sample: String,
        /// Its frequencies.
        got_hz: [f64; 2],
        /// The calibration file.
        cal: PathBuf,
        /// The calibration's frequencies.
        want_hz: [f64; 2],
    },
    /// The interval model failed (a bad confidence level).
    #[error("{0}")]
    Interval(#[from] fringe_calibration::fit::product::ProductFitError),
    /// The CSV could not be written.
    #[error("writing the predictions: {0}")]
    Write(#[from] csv::Error),
}

/// Why `cal adjust` failed (nothing is written then).
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum AdjustError {
    /// The calibration file is missing or invalid.
    #[error("{0}")]
    File(#[from] ProductFileError),
    /// A reference-sample table of pairs could not be evaluated.
    #[error("{0}")]
    Predict(#[from] PredictError),
    /// A value of the pairs table is not a number.
    #[error("{0}")]
    Samples(#[from] SampleError),
    /// Too few pairs for the tests.
    #[error("{source_words}: {n} lab pair(s) with both values; the bias and slope tests need at least 3 (take more grab samples)")]
    TooFewPairs {
        /// Where the pairs came from.
        source_words: String,
        /// Pairs with both values.
        n: usize,
    },
    /// The tests could not be computed.
    #[error("{source_words}: {source}")]
    Tests {
        /// Where the pairs came from.
        source_words: String,
        /// Why not.
        source: StatsError,
    },
    /// The device's own check refuses the calibration.
    #[error("{path}: the device would refuse this calibration ({reason})")]
    Refused {
        /// Calibration file.
        path: PathBuf,
        /// The device's reason.
        reason: String,
    },
    /// The adjusted model does not fit the wire form.
    #[error("the adjusted model has too many parameters for the device")]
    TooMany,
    /// A slope correction asked for where the pairs give no positive slope.
    #[error("{source_words}: no slope correction: {}", if slope.is_nan() { "the predicted values do not vary, so the pairs determine no slope (take pairs over a range of moisture, or correct the bias alone)".to_string() } else { format!("the slope of lab on predicted is {slope:.3}, and a calibration corrected by it would read moisture flat or backwards; check that the pairs belong together") })]
    NoSlope {
        /// Where the pairs came from.
        source_words: String,
        /// The pairs' slope (NaN: none).
        slope: f64,
    },
    /// Pairs predicted with another calibration than the one adjusted.
    #[error("{}: line {line}: predicted with calibration {predicted_with} (its cal_id), and the calibration adjusted is {adjusted}: its bias would be judged on another's readings; predict the pairs again with --cal of the one adjusted", file.display())]
    OtherCalibration {
        /// The pairs' file.
        file: PathBuf,
        /// Line of the first such pair.
        line: u64,
        /// The id the pairs name.
        predicted_with: String,
        /// The calibration adjusted.
        adjusted: String,
    },
}

/// Which model `cal fit` fits.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FitModel {
    /// Polynomial in eps' at one frequency plus a temperature term.
    Single,
    /// Two-frequency relaxation inversion, mixing model, temperature and conductivity terms.
    Relaxation,
    /// Ridge regression on physically chosen features of both frequencies (penalty by cross-validation).
    Multivariate,
    /// PLS regression on the same features (components by cross-validation).
    Pls,
    /// Every model under the same cross-validation; `--out` gets ridge unless another is significantly better (paired signed-rank test).
    Compare,
}

/// What `cal fit` fits, from what.
#[derive(Debug, Clone, PartialEq)]
pub struct FitOptions {
    /// Reference-sample table (CSV: sample_id, moisture_pct, temperature_c,
    /// freq1_hz, eps1_re, eps1_im, freq2_hz, eps2_re, eps2_im).
    pub samples: PathBuf,
    /// Model to fit.
    pub model: FitModel,
    /// Where the product calibration will be written (its stem is the
    /// default product name).
    pub out: PathBuf,
    /// Product name as the plant calls it (at most 16 bytes).
    pub name: Option<String>,
    /// Wet bulk density of the product at the sensor, kg/m^3 (relaxation model).
    pub bulk_density_kg_m3: Option<f64>,
    /// Particle density of the dry matter, kg/m^3 (relaxation model).
    pub particle_density_kg_m3: Option<f64>,
    /// The multivariate models take the table's `bulk_density_kg_m3`
    /// column (a plant's weigh belt or gauge) as an input, and the
    /// relaxation model's mixing model takes it; every sample needs a
    /// value.
    pub density_input: bool,
    /// Polynomial degree of the regression, 1-3.
    pub degree: u8,
    /// Cross-validation: 0 for leave-one-out below 100 samples and 10
    /// folds from 100 on, else the number of folds.
    pub folds: usize,
    /// Noise standard deviation of eps' and eps'' (for the uncertainty).
    pub eps_sd: f64,
    /// Moisture basis of the lab values, `wet` or `dry`.
    pub basis: String,
    /// Keep a calibration the quality gate refuses (the refusals are kept
    /// in the file).
    pub force: bool,
}

/// The quality gate refused a calibration; nothing was written.
#[derive(Debug, Clone, PartialEq)]
pub struct GateRefused {
    /// What was refused (the file or calibration).
    pub what: String,
    /// Each refusal, in words.
    pub refusals: Vec<String>,
    /// Refused at `cal push` (the file is not changed; an override goes
    /// into the audit record) rather than at `cal fit`.
    pub at_push: bool,
}

impl std::fmt::Display for GateRefused {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        writeln!(
            f,
            "{}: refused by the quality gate; nothing written:",
            self.what
        )?;
        for r in &self.refusals {
            writeln!(f, "  - {r}")?;
        }
        if self.at_push {
            write!(
                f,
                "--force pushes it anyway and records the override in the audit record"
            )
        } else {
            write!(
                f,
                "--force writes it anyway and records the override (in the file and the audit record)"
            )
        }
    }
}

impl std::error::Error for GateRefused {}

/// The quality gate (`fringe_calibration::fit::gate`) on a fit and its
/// samples: the refusals in words.
pub fn gate_of_fit(f: &ProductFit, samples: &[Sample]) -> Vec<String> {
    use fringe_calibration::fit::gate::{check, GateInput, Limits};
    let cv = &f.stats.cross_validation;
    // The samples the model used (a model may have left some out).
    let used: Vec<&Sample> = samples
        .iter()
        .filter(|s| !f.excluded.iter().any(|x| x.id == s.id))
        .collect();
    let input = GateInput {
        n: f.stats.n,
        n_params: f.stats.n_coef,
        rpd: cv.rpd,
        r2: cv.r_squared,
        ranges: vec![
            (
                "moisture_pct",
                used.iter()
                    .map(|s| (s.id.as_str(), s.moisture_pct))
                    .collect(),
            ),
            (
                "temperature_c",
                used.iter()
                    .map(|s| (s.id.as_str(), s.temperature_c))
                    .collect(),
            ),
        ],
    };
    check(&input, &Limits::default())
        .iter()
        .map(ToString::to_string)
        .collect()
}

/// How a refusal overridden by `cal fit --force` is recorded in the file's
/// `gate_overridden`.
pub const FIT_OVERRIDE_PREFIX: &str = "at fit (--force): ";

/// The quality gate on a calibration file's statistics (what `cal push`
/// can check again: RPD, R^2, samples per parameter), and every refusal
/// overridden at fit that it cannot check again (a valid range set by one
/// sample: the file keeps the ranges, not the samples), so that a
/// calibration written with `--force` needs `--force` again to be pushed:
/// the refusals in words.
pub fn gate_of_file(s: &Statistics) -> Vec<String> {
    use fringe_calibration::fit::gate::{check, GateInput, Limits};
    let input = GateInput {
        n: s.n,
        // Files from before the gate do not say; five, the fewest a
        // two-frequency model fits. (A relaxation file written before its
        // mixing parameter was counted says one fewer than a refit would:
        // five coefficients at the default degree, where a refit says six.)
        n_params: s.n_params.unwrap_or(5),
        rpd: s.rpd,
        r2: s.r2,
        ranges: Vec::new(),
    };
    let mut refusals: Vec<String> = check(&input, &Limits::default())
        .iter()
        .map(ToString::to_string)
        .collect();
    for r in s
        .gate_overridden
        .iter()
        .filter_map(|o| o.strip_prefix(FIT_OVERRIDE_PREFIX))
    {
        if !refusals.iter().any(|x| x == r) {
            refusals.push(format!("{r} (overridden at fit)"));
        }
    }
    refusals
}

fn to_fit_samples(set: &SampleSet) -> Vec<Sample> {
    set.samples
        .iter()
        .map(|s| Sample {
            id: s.sample_id.clone(),
            moisture_pct: s.moisture_pct.unwrap_or(f64::NAN),
            temperature_c: s.temperature_c,
            channels: (0..2)
                .map(|k| ChannelReading {
                    freq_hz: s.freqs_hz[k],
                    eps_re: s.eps_re[k],
                    eps_loss: s.eps_im[k],
                })
                .collect(),
            bulk_density_kg_m3: s.bulk_density_kg_m3,
        })
        .collect()
}

/// Parameters each model fits against the lab values (for the "+3" rule,
/// stated before fitting): coefficients, and the relaxation model's mixing
/// parameter.
fn n_coef(model: FitModel, degree: usize) -> usize {
    match model {
        // c0..c_degree + temperature term (also the least any model of a
        // comparison needs; each refuses on its own below its minimum)
        FitModel::Single | FitModel::Compare => degree + 2,
        // p0..p_degree + temperature + conductivity terms + the mixing
        // parameter (the two static terms are tried only from five samples
        // per parameter on)
        FitModel::Relaxation => degree + 4,
        FitModel::Multivariate | FitModel::Pls => MV_MIN_SAMPLES - 3,
    }
}

/// One model of a comparison, for printing.
#[derive(Debug, Clone)]
pub struct Compared {
    /// Model name in words.
    pub model: &'static str,
    /// Its fit, or why it has none.
    pub fit: Result<ProductFit, String>,
}

/// How `--model compare` chose: the model kept unless another is
/// significantly better, and each other eligible model's paired test
/// against it (`fringe_calibration::fit::compare_models`).
#[derive(Debug, Clone)]
pub struct Choice {
    /// The smallest cross-validated SEP of the eligible models, %.
    pub best_sep: f64,
    /// The model kept unless another is significantly better.
    pub kept: &'static str,
    /// Its cross-validated SEP, %.
    pub kept_sep: f64,
    /// Each other eligible model's paired test against the kept one.
    pub paired: Vec<(&'static str, PairedTest)>,
}

/// Result of a fit, for printing and files.
#[derive(Debug, Clone)]
pub struct FitOutcome {
    /// The fit written to the file.
    pub chosen: ProductFit,
    /// Every model of a comparison, chosen included (compare only).
    pub compared: Vec<Compared>,
    /// How the comparison chose (compare only).
    pub rule: Option<Choice>,
    /// Cross-validated SEP single-frequency / chosen (compare only).
    pub sep_ratio: Option<f64>,
    /// The file written.
    pub file: ProductFile,
    /// Its wire form.
    pub wire: ProductCal,
}

fn statistics_of(f: &ProductFit) -> Statistics {
    let cv = &f.stats.cross_validation;
    Statistics {
        n: f.stats.n,
        sec: f.stats.sec_pct,
        sep: cv.sep,
        bias: cv.bias,
        slope: cv.slope,
        r2: cv.r_squared,
        rpd: cv.rpd,
        n_params: Some(f.stats.n_coef),
        gate_overridden: Vec::new(),
        cross_validation: {
            let split = match f.stats.folds {
                Folds::LeaveOneOut => "leave-one-out".to_string(),
                Folds::KFold(k) => format!("{k}-fold venetian blinds"),
            };
            match f.model.kind() {
                fringe_calibration::product::ModelKind::Relaxation
                | fringe_calibration::product::ModelKind::Multivariate => {
                    format!("{split}, whole fit repeated per fold")
                }
                fringe_calibration::product::ModelKind::SingleFrequency => split,
            }
        },
    }
}

fn model_words(k: fringe_calibration::product::ModelKind) -> &'static str {
    match k {
        fringe_calibration::product::ModelKind::SingleFrequency => "single-frequency",
        fringe_calibration::product::ModelKind::Relaxation => "relaxation",
        fringe_calibration::product::ModelKind::Multivariate => "multivariate",
    }
}

/// The highest moisture a calibration's valid range reaches on `basis`: 100 %
/// wet; on a dry basis the highest a reading carries
/// ([`fringe_protocol::quant::MOISTURE_MAX_PCT`], 327.67 %), so that the
/// device flags a reading above it rather than sending it clipped.
fn basis_top_pct(basis: Basis) -> f32 {
    match basis {
        Basis::Wet => 100.0,
        _ => fringe_protocol::quant::MOISTURE_MAX_PCT,
    }
}

/// Wire form of a fit.
///
/// # Errors
/// [`FitError::TooMany`] when the fit does not fit the wire form.
pub fn wire_of(
    f: &ProductFit,
    name: &str,
    basis: Basis,
    made_s: u64,
) -> Result<ProductCal, FitError> {
    let c = &f.calibration;
    let model = match c.model.kind() {
        fringe_calibration::product::ModelKind::SingleFrequency => ModelKind::SingleFrequency,
        fringe_calibration::product::ModelKind::Relaxation => ModelKind::Relaxation,
        fringe_calibration::product::ModelKind::Multivariate => ModelKind::Multivariate,
    };
    let inputs: Vec<Range> = c
        .input_ranges()
        .iter()
        .map(|r| Range {
            min: r.min,
            max: r.max,
        })
        .collect();
    Ok(ProductCal {
        name: short_string(name),
        model,
        basis,
        params: heapless::Vec::from_slice(&f.params)
            .map_err(|_| FitError::TooMany { what: "parameters" })?,
        // The valid range reaches beyond the samples (a margin of three
        // sample spacings), not beyond what the basis allows or a reading
        // carries.
        moisture_pct: Range {
            min: c.moisture_pct.min,
            max: c.moisture_pct.max.min(basis_top_pct(basis)),
        },
        temperature_c: Range {
            min: c.temperature_c.min,
            max: c.temperature_c.max,
        },
        inputs: heapless::Vec::from_slice(&inputs).map_err(|_| FitError::TooMany {
            what: "input ranges",
        })?,
        sec_pct: c.sec_pct,
        made_s,
    })
}

/// Fits as `args` says, without writing anything. `made_s` is the time
/// the calibration is made, s since the Unix epoch (kept on the device).
///
/// # Errors
/// A bad sample table ([`SampleError`], naming file, line, column and
/// field), too few samples, missing densities, a failed fit, or the
/// quality gate ([`GateRefused`]) unless `force`.
pub fn fit(args: &FitOptions, made_s: u64) -> Result<FitOutcome, FitError> {
    let basis = if args.basis == "dry" {
        Basis::Dry
    } else {
        Basis::Wet
    };
    // Read once: the digest in the file's source is of the bytes fitted
    // (a table changed meanwhile, by `cal capture` say, is not misnamed).
    let bytes = std::fs::read(&args.samples).map_err(|e| crate::samples::SampleError::Io {
        file: args.samples.clone(),
        reason: e.to_string(),
    })?;
    let set = crate::samples::parse_samples(
        &args.samples,
        &bytes,
        MoistureColumn::Required,
        crate::samples::basis_named(&args.basis),
    )?;
    let degree = usize::from(args.degree);
    let words = match args.model {
        FitModel::Single => "single-frequency",
        FitModel::Relaxation => "relaxation",
        FitModel::Multivariate => "multivariate (ridge)",
        FitModel::Pls => "multivariate (PLS)",
        FitModel::Compare => "every",
    };
    if args.density_input {
        let any = set.samples.iter().any(|s| s.bulk_density_kg_m3.is_some());
        if let Some(s) = set.samples.iter().find(|s| s.bulk_density_kg_m3.is_none()) {
            return Err(FitError::NoDensity {
                file: args.samples.clone(),
                line: any.then_some(s.line),
                id: any.then(|| s.sample_id.clone()),
            });
        }
    }
    set.require(n_coef(args.model, degree), words)?;
    let samples = to_fit_samples(&set);
    // Leave-one-out repeats the whole fit per sample; from 100 samples on,
    // 10 folds keep `compare` under 0.1 s for 200 samples (BENCHMARKS.md).
    let folds = if args.folds == 0 && samples.len() < 100 {
        Folds::LeaveOneOut
    } else if args.folds == 0 {
        Folds::KFold(10)
    } else if args.folds >= samples.len() {
        Folds::LeaveOneOut
    } else {
        Folds::KFold(args.folds)
    };
    let single = SingleOptions {
        degree,
        eps_sd: args.eps_sd,
        folds,
        ..SingleOptions::default()
    };
    let relax = || -> Result<RelaxationOptions, FitError> {
        let (Some(b), Some(p)) = (args.bulk_density_kg_m3, args.particle_density_kg_m3) else {
            return Err(FitError::NoDensities);
        };
        Ok(RelaxationOptions {
            degree,
            eps_sd: args.eps_sd,
            folds,
            mixing: MixingFit::DryPermittivity { exponent: 0.5 },
            // Honest cross-validation: the relaxation law and the mixing
            // parameter were chosen with the lab values too, so each fold
            // refits them (about 0.1 s for 40 samples, release build).
            refit_nonlinear_in_cv: true,
            // With --density-input the mixing model takes each sample's
            // (and on the device each reading's) bulk density.
            density_input: args.density_input,
            lab_basis: match basis {
                Basis::Dry => fringe_calibration::moisture::Basis::Dry,
                _ => fringe_calibration::moisture::Basis::Wet,
            },
            ..RelaxationOptions::new(b, p)
        })
    };
    let ctx = |source| FitError::Model {
        what: match args.model {
            FitModel::Compare => {
                format!("{}: fitting the models to compare", args.samples.display())
            }
            _ => format!("{}: fitting the {words} model", args.samples.display()),
        },
        source,
    };
    let mv = |method| MultivariateOptions {
        method,
        eps_sd: args.eps_sd,
        folds,
        density_independent: false,
        density_input: args.density_input,
    };
    let (mut chosen, compared, rule, sep_ratio) = match args.model {
        FitModel::Single => (
            fit_single(&samples, &single).map_err(ctx)?,
            Vec::new(),
            None,
            None,
        ),
        FitModel::Relaxation => (
            fit_relaxation(&samples, &relax()?).map_err(ctx)?,
            Vec::new(),
            None,
            None,
        ),
        FitModel::Multivariate | FitModel::Pls => (
            fit_multivariate(
                &samples,
                &mv(if args.model == FitModel::Pls {
                    MvMethod::Pls
                } else {
                    MvMethod::Ridge
                }),
            )
            .map_err(ctx)?,
            Vec::new(),
            None,
            None,
        ),
        FitModel::Compare => {
            // The relaxation model joins when the densities are given.
            let relaxation = match (args.bulk_density_kg_m3, args.particle_density_kg_m3) {
                (Some(_), Some(_)) => Some(relax()?),
                _ => None,
            };
            let c = compare_models(
                &samples,
                &CompareOptions {
                    single,
                    relaxation,
                    eps_sd: args.eps_sd,
                    folds,
                    density_input: args.density_input,
                },
            )
            .map_err(ctx)?;
            let chosen = c.chosen_fit().clone();
            let single_sep = c.results.iter().find_map(|(k, r)| {
                (*k == fringe_calibration::fit::product::Candidate::SingleFrequency)
                    .then(|| r.as_ref().ok().map(|f| f.stats.cross_validation.sep))
                    .flatten()
            });
            let compared = c
                .results
                .iter()
                .map(|(k, r)| Compared {
                    model: k.name(),
                    fit: r.clone().map_err(|e| e.to_string()),
                })
                .collect();
            let ratio = single_sep.map(|s| s / chosen.stats.cross_validation.sep);
            let choice = Choice {
                best_sep: c.best_sep,
                kept: c.default_model.name(),
                kept_sep: c.threshold,
                paired: c.paired.iter().map(|p| (p.candidate.name(), *p)).collect(),
            };
            (chosen, compared, Some(choice), ratio)
        }
    };
    // Above 100 % on a dry basis the scale stretches with moisture, and the
    // models fitted worse than on the same values converted to a wet basis
    // (BENCHMARKS.md, "Lab values on a dry basis").
    let top = samples.iter().map(|s| s.moisture_pct).fold(0.0, f64::max);
    if basis == Basis::Dry && top > 100.0 {
        chosen.notes.push(format!(
            "lab values on a dry basis up to {top:.1} %: on synthetic wood chips of 25-150 % dry basis the models fitted to the same values on a wet basis did 1.1-2.4 times better; unless the plant needs the dry basis at the output, convert them (M_wb = 100 M_db / (100 + M_db)) and fit with --basis wet"
        ));
    }
    let carried = fringe_protocol::quant::MOISTURE_MAX_PCT;
    let lowest = samples
        .iter()
        .map(|s| s.moisture_pct)
        .fold(f64::INFINITY, f64::min);
    if basis == Basis::Dry && lowest >= f64::from(carried) {
        return Err(FitError::BeyondReading {
            file: args.samples.clone(),
            lowest,
        });
    }
    if basis == Basis::Dry && chosen.calibration.moisture_pct.max > carried {
        chosen.notes.push(format!(
            "the valid moisture range ends at {carried} %, the highest moisture the device's readings carry: readings above it are flagged out of range (and sent as {carried} %); on a wet basis the same product stays below 100 %"
        ));
    }
    let refusals = gate_of_fit(&chosen, &samples);
    if !refusals.is_empty() && !args.force {
        return Err(GateRefused {
            what: format!(
                "{}: the {} calibration",
                args.samples.display(),
                model_words(chosen.calibration.model.kind())
            ),
            refusals,
            at_push: false,
        }
        .into());
    }
    let name = args
        .name
        .clone()
        .or_else(|| {
            args.out
                .file_stem()
                .map(|s| s.to_string_lossy().into_owned())
        })
        .unwrap_or_else(|| "product".into());
    if name.is_empty() || name.len() > fringe_protocol::NAME_LEN {
        return Err(FitError::BadName {
            name,
            max: fringe_protocol::NAME_LEN,
        });
    }
    let wire = wire_of(&chosen, &name, basis, made_s)?;
    let mut statistics = statistics_of(&chosen);
    statistics.gate_overridden = refusals
        .iter()
        .map(|r| format!("{FIT_OVERRIDE_PREFIX}{r}"))
        .collect();
    let file = ProductFile::from_wire(
        &wire,
        chosen.calibration.model.input_names(),
        statistics,
        Source {
            samples: args.samples.display().to_string(),
            samples_sha256: Sha256::digest(&bytes)
                .iter()
                .map(|b| format!("{b:02x}"))
                .collect(),
            outliers: chosen
                .samples
                .iter()
                .filter(|s| s.outlier)
                .map(|s| s.id.clone())
                .collect(),
            freqs_hz: Some(chosen.freqs_hz),
            parent_id: None,
            derivation: None,
        },
    );
    let im = fringe_calibration::fit::product::IntervalModel::of(&chosen);
    let mut file = file;
    file.prediction = Some(crate::product_file::Prediction {
        columns: im.columns,
        leverage_matrix: im.leverage_matrix,
        residual_sd: im.residual_sd,
        interval_sd: im.interval_sd,
        mean_leverage: im.mean_leverage,
        max_leverage: im.max_leverage,
        dof: im.dof,
        eps_sd: im.eps_sd,
    });
    Ok(FitOutcome {
        chosen,
        compared,
        rule,
        sep_ratio,
        file,
        wire,
    })
}

fn stats_json(f: &ProductFit) -> serde_json::Value {
    let s = statistics_of(f);
    json!({
        "model": model_words(f.calibration.model.kind()),
        "n": s.n, "sec": s.sec, "sep": s.sep, "bias": s.bias, "slope": s.slope, "r2": s.r2, "rpd": s.rpd,
        "rmsep": f.stats.cross_validation.rmsep,
        "cross_validation": s.cross_validation,
        "outliers": f.samples.iter().filter(|x| x.outlier).map(|x| x.id.clone()).collect::<Vec<_>>(),
        "high_leverage": f.samples.iter().filter(|x| x.high_leverage).map(|x| x.id.clone()).collect::<Vec<_>>(),
        "excluded": f.excluded.iter().map(|x| json!({"id": x.id, "reason": x.reason})).collect::<Vec<_>>(),
        "notes": f.notes,
        "detail": f.detail,
    })
}

/// The JSON object `--json` prints.
pub fn outcome_json(o: &FitOutcome, out: &Path) -> serde_json::Value {
    let mut v = stats_json(&o.chosen);
    let c = &o.wire;
    v["id"] = json!(c.content_id().to_string());
    v["file"] = json!(out.display().to_string());
    v["gate_overridden"] = json!(o.file.statistics.gate_overridden);
    v["valid_ranges"] = json!({
        "moisture_pct": [c.moisture_pct.min, c.moisture_pct.max],
        "temperature_c": [c.temperature_c.min, c.temperature_c.max],
        "inputs": o.file.inputs.iter().map(|r| json!({"name": r.name, "min": r.min, "max": r.max})).collect::<Vec<_>>(),
    });
    if !o.compared.is_empty() {
        v["comparison"] = json!({
            "models": o.compared.iter().map(|c| match &c.fit {
                Ok(f) => {
                    let mut j = stats_json(f);
                    j["model"] = json!(c.model);
                    j["excluded"] = json!(f.excluded.iter().map(|x| json!({"id": x.id, "reason": x.reason})).collect::<Vec<_>>());
                    j["notes"] = json!(f.notes);
                    j["detail"] = json!(f.detail);
                    j
                }
                Err(e) => json!({"model": c.model, "refused": e}),
            }).collect::<Vec<_>>(),
            "best_sep": o.rule.as_ref().map(|r| r.best_sep),
            "kept_unless_beaten": o.rule.as_ref().map(|r| json!({"model": r.kept, "sep": r.kept_sep})),
            "paired_tests": o.rule.as_ref().map(|r| r.paired.iter().map(|(m, p)| json!({
                "model": m,
                "n": p.n,
                "one_missing": p.one_missing,
                "mean_advantage_pct2": p.mean_advantage,
                "t": p.t,
                "critical_t": p.critical_t,
                "z": p.z,
                "critical_z": p.critical_z,
                "p": p.p,
                "significant": p.significant(),
            })).collect::<Vec<_>>()),
            "sep_ratio_single_over_chosen": o.sep_ratio,
        });
    }
    v
}

/// The verdict of a paired test in words, with the reason where the
/// signed ranks alone would say otherwise.
fn paired_words(p: &PairedTest) -> &'static str {
    if p.significant() {
        "significantly better"
    } else if p.p < 0.05 {
        "not significantly better (smaller errors on most samples, but not a smaller mean squared error)"
    } else {
        "not significantly better"
    }
}

/// Writes a fit's statistics for a person.
///
/// # Errors
/// A failed write.
pub fn write_fit(f: &ProductFit, w: &mut dyn std::io::Write) -> std::io::Result<()> {
    let s = statistics_of(f);
    writeln!(
        w,
        "{} model, {} samples ({} cross-validation):",
        model_words(f.calibration.model.kind()),
        s.n,
        s.cross_validation
    )?;
    writeln!(w, "  SEC   {:.3} % moisture (fit)", s.sec)?;
    writeln!(w, "  SEP   {:.3} % moisture (cross-validated)", s.sep)?;
    writeln!(w, "  bias  {:+.3} % (predicted - lab)", s.bias)?;
    writeln!(w, "  slope {:.4} (lab on predicted)", s.slope)?;
    writeln!(w, "  R^2   {:.4}", s.r2)?;
    writeln!(w, "  RPD   {:.2}", s.rpd)?;
    let out: Vec<&str> = f
        .samples
        .iter()
        .filter(|x| x.outlier)
        .map(|x| x.id.as_str())
        .collect();
    let lev: Vec<&str> = f
        .samples
        .iter()
        .filter(|x| x.high_leverage)
        .map(|x| x.id.as_str())
        .collect();
    writeln!(
        w,
        "  outliers (|studentized residual| > 3): {}",
        if out.is_empty() {
            "none".into()
        } else {
            out.join(", ")
        }
    )?;
    if !lev.is_empty() {
        writeln!(w, "  high leverage: {}", lev.join(", "))?;
    }
    if !f.detail.is_empty() {
        writeln!(w, "  {}", f.detail)?;
    }
    for x in &f.excluded {
        writeln!(w, "  left out {}: {}", x.id, x.reason)?;
    }
    for n in &f.notes {
        writeln!(w, "  note: {n}")?;
    }
    Ok(())
}

/// Writes what `cal fit` did for a person: the comparison (if any), the
/// chosen model's statistics, the valid ranges and the files written.
///
/// # Errors
/// A failed write.
pub fn write_fit_summary(
    o: &FitOutcome,
    out: &Path,
    plot: Option<&Path>,
    w: &mut dyn std::io::Write,
) -> std::io::Result<()> {
    if let Some(rule) = &o.rule {
        writeln!(w, "model comparison (same samples, same cross-validation):")?;
        writeln!(
            w,
            "  {:<22} {:>8} {:>8} {:>8} {:>7}",
            "model", "SEC %", "SEP %", "bias %", "RPD"
        )?;
        for c in &o.compared {
            match &c.fit {
                Ok(f) => {
                    let st = statistics_of(f);
                    write!(
                        w,
                        "  {:<22} {:>8.3} {:>8.3} {:>+8.3} {:>7.2}",
                        c.model, st.sec, st.sep, st.bias, st.rpd
                    )?;
                    if !f.excluded.is_empty() {
                        let ids: Vec<&str> =
                            f.excluded.iter().take(5).map(|x| x.id.as_str()).collect();
                        writeln!(
                            w,
                            "  (left out {} sample(s), {}{}: not eligible; --json says why)",
                            f.excluded.len(),
                            ids.join(", "),
                            if f.excluded.len() > 5 { ", ..." } else { "" },
                        )?;
                    } else if f.stats.n < 5 * f.stats.n_coef {
                        writeln!(
                            w,
                            "  ({} parameters for {} samples, under five samples each: not eligible)",
                            f.stats.n_coef, f.stats.n
                        )?;
                    } else if !ModelComparison::eligible(f) {
                        writeln!(
                            w,
                            "  (no moisture for some left-out samples or its cross-validation does not describe it: not eligible)"
                        )?;
                    } else {
                        writeln!(w)?;
                    }
                }
                Err(e) => writeln!(w, "  {:<22} refused: {e}", c.model)?,
            }
        }
        writeln!(
            w,
            "  kept unless another model is significantly better (signed-rank test on the same samples, 5 %): {} (SEP {:.3} %)",
            rule.kept, rule.kept_sep
        )?;
        for (m, p) in &rule.paired {
            writeln!(
                w,
                "    {m:<20} z = {:>6.2}, p {} over {} samples{}: {}",
                p.z,
                if p.p < 0.001 {
                    "< 0.001".to_string()
                } else {
                    format!("= {:.3}", p.p)
                },
                p.n,
                match p.one_missing {
                    0 => String::new(),
                    k => format!(" ({k} with no moisture from one of the two, counted against it)"),
                },
                paired_words(p)
            )?;
        }
        writeln!(
            w,
            "  writing the {} model",
            model_words(o.chosen.calibration.model.kind())
        )?;
        writeln!(w)?;
    }
    write_fit(&o.chosen, w)?;
    let c = &o.wire;
    writeln!(
        w,
        "valid ranges (the samples' span and three average spacings beyond it; readings outside are flagged): moisture {:.2}..{:.2} %, temperature {:.1}..{:.1} C",
        c.moisture_pct.min, c.moisture_pct.max, c.temperature_c.min, c.temperature_c.max
    )?;
    for r in &o.file.inputs {
        writeln!(w, "  {} {:.4}..{:.4}", r.name, r.min, r.max)?;
    }
    writeln!(w, "wrote {} (calibration id {})", out.display(), o.file.id)?;
    if !o.file.statistics.gate_overridden.is_empty() {
        writeln!(
            w,
            "caution: written with --force past the quality gate (recorded in the file, and in the audit record at push, which needs --force again):"
        )?;
        for r in &o.file.statistics.gate_overridden {
            writeln!(w, "  {r}")?;
        }
    }
    if let Some(p) = plot {
        writeln!(w, "plot  {}", p.display())?;
    }
    Ok(())
}

/// The `--plot` figure: cross-validated predicted vs lab, then the CV
/// residual against temperature and each permittivity input.
///
/// # Errors
/// A plotting failure.
pub fn fit_plot(o: &FitOutcome, samples_path: &Path) -> Result<String, FitError> {
    // Read as the fit read it, on the calibration's basis.
    let set = read_samples(
        samples_path,
        MoistureColumn::Required,
        match o.wire.basis {
            Basis::Wet => crate::samples::Basis::Wet,
            Basis::Dry => crate::samples::Basis::Dry,
        },
    )?;
    let f = &o.chosen;
    let pv: Vec<(f64, f64)> = f
        .samples
        .iter()
        .map(|s| (s.reference_pct, s.cv_predicted_pct))
        .collect();
    let mut parts = vec![plots::scatter_svg(
        &format!(
            "{} model: predicted (CV) vs lab",
            model_words(f.calibration.model.kind())
        ),
        "lab moisture, %",
        "predicted, %",
        &pv,
        true,
        false,
    )
    .map_err(FitError::Plot)?];
    type Get = fn(&RefSample) -> f64;
    let (f1, f2) = (
        crate::product_file::hz_label(set.freqs_hz[0]),
        crate::product_file::hz_label(set.freqs_hz[1]),
    );
    let inputs: [(String, Get); 5] = [
        ("temperature, C".into(), |s| s.temperature_c),
        (format!("eps' at {f1}"), |s| s.eps_re[0]),
        (format!("eps'' at {f1}"), |s| s.eps_im[0]),
        (format!("eps' at {f2}"), |s| s.eps_re[1]),
        (format!("eps'' at {f2}"), |s| s.eps_im[1]),
    ];
    for (label, get) in inputs {
        let label = label.as_str();
        let pts = residuals_against(&set.samples, &f.samples, get);
        parts.push(
            plots::scatter_svg(
                &format!("residual vs {label}"),
                label,
                "predicted - lab, %",
                &pts,
                false,
                true,
            )
            .map_err(FitError::Plot)?,
        );
    }
    Ok(plots::combine_svgs(&parts, 3, (480, 380)))
}

/// Each fitted sample's cross-validated residual (predicted - lab) against
/// an input of its row in the table (`get`), paired by sample id: a sample
/// the model left out has no residual and no point (paired by position, the
/// rows after it were drawn against the next sample's input).
fn residuals_against(
    table: &[RefSample],
    fitted: &[fringe_calibration::fit::SampleResult],
    get: fn(&RefSample) -> f64,
) -> Vec<(f64, f64)> {
    let by_id: std::collections::HashMap<&str, &RefSample> =
        table.iter().map(|s| (s.sample_id.as_str(), s)).collect();
    fitted
        .iter()
        .filter_map(|r| {
            let s = by_id.get(r.id.as_str())?;
            Some((get(s), r.cv_predicted_pct - r.reference_pct))
        })
        .collect()
}

/// One predicted row.
#[derive(Debug, Clone, PartialEq)]
pub struct Predicted {
    /// Sample id.
    pub sample_id: String,
    /// Predicted moisture, % (None when the estimate failed; flags say why).
    pub moisture_pct: Option<f32>,
    /// Standard uncertainty the device reports, %.
    pub uncertainty_pct: f32,
    /// Prediction interval for a lab value, % (None without a moisture, for
    /// a file without its interval model, or where the reading's leverage
    /// cannot be computed).
    pub interval_pct: Option<(f64, f64)>,
    /// Leverage of the reading in the calibration (NaN when unknown).
    pub leverage: f64,
    /// The leverage exceeds every calibration sample's.
    pub beyond_calibration: bool,
    /// Flags.
    pub flags: Flags,
    /// Lab moisture if the input had one.
    pub lab_pct: Option<f64>,
    /// Content id of the calibration that made the prediction.
    pub cal_id: String,
}

/// Evaluates every sample of `input` with the calibration, as the device
/// does, with the prediction interval at `confidence` and the leverage
/// where the file keeps its interval model. `eps_sd`: the noise SD of eps'
/// and eps'' for the uncertainty, `None` for the one the calibration was
/// fitted with (0.02 for a file that does not say).
///
/// # Errors
/// A bad calibration file or table.
pub fn predict(
    cal_path: &Path,
    input: &Path,
    eps_sd: Option<f32>,
    confidence: f64,
) -> Result<Vec<Predicted>, PredictError> {
    let (file, wire) = ProductFile::load(cal_path)?;
    let eps_sd =
        eps_sd.unwrap_or_else(|| file.prediction.as_ref().map_or(0.02, |p| p.eps_sd as f32));
    let cal = fringe_firmware::device::parse_product(&wire).map_err(|e| PredictError::Refused {
        path: cal_path.to_path_buf(),
        reason: format!("{e:?}"),
    })?;
    let set = read_samples(input, MoistureColumn::Optional, cal.basis)?;
    if let Some(want) = file.source.freqs_hz {
        if let Some(s) = set
            .samples
            .iter()
            .find(|s| !crate::product_file::same_freqs(s.freqs_hz, want))
        {
            return Err(PredictError::OtherFrequencies {
                input: input.to_path_buf(),
                sample: s.sample_id.clone(),
                got_hz: s.freqs_hz,
                cal: cal_path.to_path_buf(),
                want_hz: want,
            });
        }
    }
    let model = cal.model.cast::<f64>();
    let interval = file.prediction.as_ref().map(|p| IntervalModel {
        columns: p.columns.clone(),
        leverage_matrix: p.leverage_matrix.clone(),
        residual_sd: p.residual_sd,
        interval_sd: p.interval_sd,
        mean_leverage: p.mean_leverage,
        max_leverage: p.max_leverage,
        dof: p.dof,
        freqs_hz: set.freqs_hz,
        eps_sd: f64::from(eps_sd),
    });
    set.samples
        .iter()
        .map(|s| {
            let ch = |k: usize| Channel {
                freq_hz: s.freqs_hz[k] as f32,
                eps_re: s.eps_re[k] as f32,
                eps_loss: s.eps_im[k] as f32,
                sd: eps_sd,
            };
            let e = estimate(
                &EstimateInput {
                    channels: [ch(0), ch(1)],
                    temperature_c: s.temperature_c as f32,
                    bulk_density_kg_m3: s.bulk_density_kg_m3.map(|r| r as f32),
                },
                Some(&cal),
            );
            let (interval_pct, leverage, beyond) = match &interval {
                Some(im) => {
                    let eps = [(s.eps_re[0], s.eps_im[0]), (s.eps_re[1], s.eps_im[1])];
                    let p = im.predict(
                        &model,
                        &cal,
                        eps,
                        s.temperature_c,
                        s.bulk_density_kg_m3,
                        confidence,
                    )?;
                    (p.interval_pct, p.leverage, p.extrapolation)
                }
                None => (None, f64::NAN, false),
            };
            Ok(Predicted {
                sample_id: s.sample_id.clone(),
                moisture_pct: e.moisture_pct,
                uncertainty_pct: e.uncertainty_pct,
                interval_pct,
                leverage,
                beyond_calibration: beyond,
                // As the device flags it: beyond what a reading carries
                // (a calibration fitted before its range was held there).
                flags: Flags::from_bits_truncate(e.flags.bits())
                    | if e
                        .moisture_pct
                        .is_some_and(fringe_protocol::quant::moisture_beyond_reading)
                    {
                        Flags::OUT_OF_RANGE
                    } else {
                        Flags::empty()
                    },
                lab_pct: s.moisture_pct,
                cal_id: file.id.clone(),
            })
        })
        .collect()
}

/// Columns of `cal predict`'s CSV (`cal_id`, the calibration that
/// predicted, last: files written before it have the others alone).
pub const PREDICT_COLUMNS: [&str; 9] = [
    "sample_id",
    "moisture_pct",
    "predicted_moisture_pct",
    "uncertainty_pct",
    "interval_low_pct",
    "interval_high_pct",
    "leverage",
    "flags",
    "cal_id",
];

/// Flag names of a row: the device's, plus `beyond_calibration` when the
/// leverage exceeds every calibration sample's.
fn flag_names(r: &Predicted) -> Vec<String> {
    let mut f: Vec<String> = r.flags.names().map(str::to_string).collect();
    if r.beyond_calibration {
        f.push("beyond_calibration".into());
    }
    f
}

/// Writes predictions as CSV with [`PREDICT_COLUMNS`]: the lab value
/// (`moisture_pct`, empty when the input had none) beside the predicted one,
/// the device's uncertainty, the prediction interval, the leverage and the
/// flags (`|`-separated); numbers by [`crate::numbers`]' column rules.
///
/// # Errors
/// I/O errors.
pub fn write_predictions<W: std::io::Write>(w: W, rows: &[Predicted]) -> Result<(), csv::Error> {
    use crate::numbers::cell;
    let mut c = csv::Writer::from_writer(w);
    c.write_record(PREDICT_COLUMNS)?;
    for r in rows {
        c.write_record([
            r.sample_id.clone(),
            // The lab value as the lab gave it.
            cell("lab_moisture_pct", r.lab_pct),
            cell(PREDICT_COLUMNS[2], r.moisture_pct.map(f64::from)),
            cell(PREDICT_COLUMNS[3], Some(f64::from(r.uncertainty_pct))),
            cell(PREDICT_COLUMNS[4], r.interval_pct.map(|i| i.0)),
            cell(PREDICT_COLUMNS[5], r.interval_pct.map(|i| i.1)),
            cell(PREDICT_COLUMNS[6], Some(r.leverage)),
            flag_names(r).join("|"),
            r.cal_id.clone(),
        ])?;
    }
    c.flush()?;
    Ok(())
}

/// The statistics of the predictions against the lab values the table
/// had (`None` without any pair).
pub fn against_lab(rows: &[Predicted]) -> Option<Result<PredictionStats, StatsError>> {
    let pairs: Vec<(f64, f64)> = rows
        .iter()
        .filter_map(|r| Some((r.lab_pct?, f64::from(r.moisture_pct?))))
        .collect();
    if pairs.is_empty() {
        return None;
    }
    let (lab, pred): (Vec<f64>, Vec<f64>) = pairs.into_iter().unzip();
    Some(PredictionStats::new(&lab, &pred))
}

/// The JSON object `cal predict --json` prints.
pub fn predictions_json(rows: &[Predicted], confidence: f64) -> serde_json::Value {
    let num = |v: Option<f64>| {
        v.filter(|x| x.is_finite())
            .map_or(json!(null), |x| json!(x))
    };
    let pairs: Vec<(f64, f64)> = rows
        .iter()
        .filter_map(|r| Some((r.lab_pct?, f64::from(r.moisture_pct?))))
        .collect();
    let stats = if pairs.len() >= 3 {
        let (lab, pred): (Vec<f64>, Vec<f64>) = pairs.into_iter().unzip();
        PredictionStats::new(&lab, &pred).ok().map(|s| {
            json!({"n": s.n, "sep": s.sep, "bias": s.bias, "rmsep": s.rmsep, "slope": s.slope, "r2": s.r_squared})
        })
    } else {
        None
    };
    json!({
        "confidence": confidence,
        "rows": rows.iter().map(|r| json!({
            "sample_id": r.sample_id,
            "moisture_pct": num(r.lab_pct),
            "predicted_moisture_pct": num(r.moisture_pct.map(f64::from)),
            "uncertainty_pct": num(Some(f64::from(r.uncertainty_pct))),
            "interval_pct": r.interval_pct.map_or(json!(null), |(a, b)| json!([a, b])),
            "leverage": num(Some(r.leverage)),
            "flags": flag_names(r),
            "cal_id": r.cal_id,
        })).collect::<Vec<_>>(),
        "against_lab": stats,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The residual plots pair each residual with its own sample's input:
    /// a sample the model left out (the second of three) has no point, and
    /// the third's residual is drawn at the third's temperature, not the
    /// second's. (Made-up values.)
    #[test]
    fn residual_plots_pair_by_sample_not_by_position() {
        let row = |id: &str, t: f64| RefSample {
            sample_id: id.into(),
            moisture_pct: Some(12.0),
            temperature_c: t,
            freqs_hz: [1e6, 2e7],
            eps_re: [4.0, 3.5],
            eps_im: [1.0, 0.2],
            bulk_density_kg_m3: None,
            moisture_basis: None,
            line: 2,
        };
        let fitted = |id: &str, lab: f64, cv: f64| fringe_calibration::fit::SampleResult {
            id: id.into(),
            reference_pct: lab,
            fitted_pct: cv,
            cv_predicted_pct: cv,
            leverage: 0.1,
            studentized: 0.0,
            outlier: false,
            high_leverage: false,
        };
        let table = [row("a", 10.0), row("b", 20.0), row("c", 30.0)];
        let pts = residuals_against(
            &table,
            &[fitted("a", 12.0, 12.5), fitted("c", 14.0, 13.0)],
            |s| s.temperature_c,
        );
        assert_eq!(pts, vec![(10.0, 0.5), (30.0, -1.0)]);
    }
    use fringe_calibration::fit::product::{synthetic_samples, SynthSpec};
    use fringe_calibration::synth::SynthProduct;

    /// A signed-rank p below 5 % with a larger mean squared error is not
    /// called better, and the text says why; the three verdicts by hand.
    #[test]
    fn a_paired_verdict_says_why_it_is_not_better() {
        let p = |p: f64, mean_advantage: f64| PairedTest {
            candidate: fringe_calibration::fit::product::Candidate::Relaxation,
            n: 60,
            one_missing: 1,
            mean_advantage,
            z: 1.7,
            critical_z: 1.645,
            p,
            t: 0.0,
            critical_t: 1.67,
        };
        assert_eq!(paired_words(&p(0.01, 0.02)), "significantly better");
        assert!(paired_words(&p(0.042, -0.01)).contains("not a smaller mean squared error"));
        assert_eq!(paired_words(&p(0.2, 0.02)), "not significantly better");
    }

    /// Writes `n` synthetic reference samples (published physics in
    /// `fringe_calibration::synth`: water permittivity vs temperature, a
    /// mixing model, conductivity loss, interfacial relaxation), with
    /// temperature and salt varying between samples.
    fn synth_csv(dir: &Path, name: &str, n: usize, seed: u64) -> PathBuf {
        let grain = SynthProduct::<f64>::grain();
        let s = synthetic_samples(
            &grain,
            &SynthSpec {
                n,
                ..SynthSpec::default()
            },
            seed,
        );
        write_table(dir, name, &s)
    }

    /// Writes fit samples as a reference-sample table.
    fn write_table(dir: &Path, name: &str, s: &[Sample]) -> PathBuf {
        let rows: Vec<RefSample> = s
            .iter()
            .map(|x| RefSample {
                sample_id: x.id.clone(),
                moisture_pct: Some(x.moisture_pct),
                temperature_c: x.temperature_c,
                freqs_hz: [x.channels[0].freq_hz, x.channels[1].freq_hz],
                eps_re: [x.channels[0].eps_re, x.channels[1].eps_re],
                eps_im: [x.channels[0].eps_loss, x.channels[1].eps_loss],
                bulk_density_kg_m3: x.bulk_density_kg_m3,
                moisture_basis: None,
                line: 0,
            })
            .collect();
        let p = dir.join(name);
        crate::samples::write_samples(std::fs::File::create(&p).expect("create"), &rows)
            .expect("write");
        p
    }

    fn args(samples: PathBuf, out: PathBuf, model: FitModel) -> FitOptions {
        let g = SynthProduct::<f64>::grain();
        FitOptions {
            samples,
            model,
            out,
            name: Some("HM wheat L2".into()),
            bulk_density_kg_m3: Some(g.mixture.bulk_density_kg_m3),
            particle_density_kg_m3: Some(g.mixture.particle_density_kg_m3),
            degree: 2,
            folds: 0,
            eps_sd: 0.02,
            basis: "wet".into(),
            force: false,
            density_input: false,
        }
    }

    #[test]
    fn compare_through_the_csv_path_beats_single_frequency_and_keeps_ridge_unless_beaten() {
        let seed = 77;
        let dir = tempfile::tempdir().expect("dir");
        let csv = synth_csv(dir.path(), "lab.csv", 40, seed);
        let o = fit(&args(csv, dir.path().join("p.toml"), FitModel::Compare), 0).expect("fit");
        let ratio = o.sep_ratio.expect("compare gives a ratio");
        eprintln!("seed {seed}: SEP single / SEP chosen = {ratio:.2}");
        assert!(ratio > 3.0, "seed {seed}: ratio {ratio}");
        // Both two-frequency models separate water from salt: each beats
        // the single-frequency model by more than 3 times on the grain.
        let sep = |m: &str| {
            o.compared
                .iter()
                .find(|c| c.model == m)
                .and_then(|c| c.fit.as_ref().ok())
                .map(|f| f.stats.cross_validation.sep)
                .unwrap_or_else(|| panic!("{m} fitted"))
        };
        let single = sep("single-frequency");
        for m in ["relaxation", "multivariate (ridge)"] {
            assert!(single > 3.0 * sep(m), "{m}: {} vs single {single}", sep(m));
        }
        // The rule: ridge unless a paired test says another is better.
        let rule = o.rule.as_ref().expect("compare says how it chose");
        // At 40 samples the gate's five samples per parameter leave ridge's
        // 15-19 effective parameters out; the kept model is then the
        // eligible one with the smallest SEP.
        let winner = rule
            .paired
            .iter()
            .filter(|(_, p)| p.significant())
            .max_by(|a, b| a.1.mean_advantage.total_cmp(&b.1.mean_advantage))
            .map(|(m, _)| *m);
        let kind = |m: &str| match m {
            "multivariate (ridge)" | "multivariate (PLS)" => ModelKind::Multivariate,
            "relaxation" => ModelKind::Relaxation,
            _ => ModelKind::SingleFrequency,
        };
        let expected = kind(winner.unwrap_or(rule.kept));
        assert!(
            o.chosen.stats.n >= 5 * o.chosen.stats.n_coef,
            "the chosen model passes the gate's parameter count"
        );
        assert_eq!(o.wire.model, expected, "winner {winner:?}");
        let j = outcome_json(&o, Path::new("p.toml"));
        for k in ["n", "sec", "sep", "bias", "slope", "r2", "rpd"] {
            assert!(j.get(k).is_some_and(|v| v.is_number()), "key {k} in {j}");
        }
        assert_eq!(j["n"], 40);
        let tests = j["comparison"]["paired_tests"]
            .as_array()
            .expect("paired tests");
        assert_eq!(tests.len(), rule.paired.len());
        assert_eq!(j["comparison"]["kept_unless_beaten"]["model"], rule.kept);
        let mut text = Vec::new();
        write_fit_summary(&o, Path::new("p.toml"), None, &mut text).expect("summary");
        let text = String::from_utf8(text).expect("utf8");
        assert!(
            text.contains("kept unless another model is significantly better"),
            "{text}"
        );
    }

    /// `cal fit --density-input` and `cal predict` through the CSV path, on
    /// the zoo's wood chips (bulk density varying 10 % between samples, a
    /// gauge reading it with 1 % noise; invented data): the calibration
    /// takes the density as an input and cross-validates better than
    /// without it; `cal predict` uses the table's density, and flags every
    /// row without one `density_missing` with a wider uncertainty; a table
    /// with a row without a density is refused naming its line and id.
    #[test]
    fn a_density_input_through_the_csv_path() {
        use fringe_calibration::fit::zoo::{Draw, Family, FREQ_PAIRS};
        let dir = tempfile::tempdir().expect("dir");
        let chips = Family::wood_chips();
        let table = |name: &str, n: usize, seed: u64, density: bool| -> PathBuf {
            let mut s = chips.samples(&Draw::new(n, FREQ_PAIRS[0]), seed);
            if !density {
                s.iter_mut().for_each(|x| x.bulk_density_kg_m3 = None);
            }
            write_table(dir.path(), name, &s)
        };
        let csv = table("lab.csv", 100, 5, true);
        let toml = dir.path().join("chips.toml");
        let a = FitOptions {
            density_input: true,
            bulk_density_kg_m3: None,
            particle_density_kg_m3: None,
            ..args(csv.clone(), toml.clone(), FitModel::Multivariate)
        };
        let o = fit(&a, 0).expect("fit with the density");
        let plain = fit(
            &FitOptions {
                density_input: false,
                ..a.clone()
            },
            0,
        )
        .expect("fit without");
        let (sep_d, sep_p) = (
            o.chosen.stats.cross_validation.sep,
            plain.chosen.stats.cross_validation.sep,
        );
        eprintln!("cross-validated SEP with the density {sep_d:.3}, without {sep_p:.3}");
        assert!(sep_d < 0.6 * sep_p, "{sep_d} vs {sep_p}");
        assert_eq!(o.chosen.calibration.input_ranges().len(), 5);
        o.file.save(&toml).expect("save");

        let with = predict(&toml, &table("check.csv", 30, 6, true), None, 0.95).expect("predict");
        let without =
            predict(&toml, &table("check-nd.csv", 30, 6, false), None, 0.95).expect("predict");
        for (w, n) in with.iter().zip(&without) {
            assert!(!w.flags.contains(Flags::DENSITY_MISSING), "{w:?}");
            assert!(n.flags.contains(Flags::DENSITY_MISSING), "{n:?}");
            assert!(n.moisture_pct.is_some() && n.uncertainty_pct > w.uncertainty_pct);
            let (wi, ni) = (w.interval_pct.unwrap(), n.interval_pct.unwrap());
            assert!(ni.1 - ni.0 > wi.1 - wi.0, "{wi:?} {ni:?}");
        }
        let mut buf = Vec::new();
        write_predictions(&mut buf, &without).expect("csv");
        assert!(String::from_utf8(buf).unwrap().contains("density_missing"));

        // One row without a density: refused, naming the row.
        let text = std::fs::read_to_string(&csv).unwrap();
        let mut lines: Vec<String> = text.lines().map(str::to_string).collect();
        let cut = lines[4].rfind(',').unwrap();
        lines[4].truncate(cut + 1);
        std::fs::write(&csv, lines.join("\n") + "\n").unwrap();
        let e = fit(&a, 0).expect_err("a row without density").to_string();
        assert!(
            e.contains("lab.csv") && e.contains("line 5") && e.contains("wood-chips-004"),
            "{e}"
        );
        let e = fit(
            &FitOptions {
                samples: table("none.csv", 100, 5, false),
                ..a.clone()
            },
            0,
        )
        .expect_err("no densities")
        .to_string();
        assert!(e.contains("no row has a bulk density"), "{e}");
    }

    /// `cal predict` takes the noise SD the calibration was fitted with
    /// unless told another: the device's reported uncertainty scales with
    /// it, so a calibration fitted with `--eps-sd 0.05` and predicted with
    /// the default 0.02 would report too small an uncertainty.
    #[test]
    fn predict_takes_the_calibrations_noise_sd() {
        let dir = tempfile::tempdir().expect("dir");
        let csv = synth_csv(dir.path(), "lab.csv", 40, 79);
        let toml = dir.path().join("p.toml");
        let o = fit(
            &FitOptions {
                eps_sd: 0.05,
                ..args(csv, toml.clone(), FitModel::Relaxation)
            },
            0,
        )
        .expect("fit");
        o.file.save(&toml).expect("save");
        let check = synth_csv(dir.path(), "check.csv", 10, 80);
        let u = |sd: Option<f32>| -> Vec<f32> {
            predict(&toml, &check, sd, 0.95)
                .expect("predict")
                .iter()
                .map(|r| r.uncertainty_pct)
                .collect()
        };
        let (own, given, small) = (u(None), u(Some(0.05)), u(Some(0.02)));
        assert_eq!(own, given);
        assert!(
            own.iter().zip(&small).all(|(a, b)| a > b),
            "{own:?} against {small:?}"
        );
    }

    #[test]
    fn predict_reproduces_the_fit_on_new_samples() {
        let seed = 78;
        let dir = tempfile::tempdir().expect("dir");
        let csv = synth_csv(dir.path(), "lab.csv", 40, seed);
        let toml = dir.path().join("p.toml");
        let o = fit(&args(csv, toml.clone(), FitModel::Relaxation), 0).expect("fit");
        o.file.save(&toml).expect("save");
        // Fresh samples of the same product: the prediction error is of the
        // size of the cross-validated SEP (within a factor of 2).
        let check = synth_csv(dir.path(), "check.csv", 30, seed + 1);
        let rows = predict(&toml, &check, None, 0.95).expect("predict");
        let (lab, pred): (Vec<f64>, Vec<f64>) = rows
            .iter()
            .filter_map(|r| Some((r.lab_pct?, f64::from(r.moisture_pct?))))
            .unzip();
        assert!(
            lab.len() >= 28,
            "seed {seed}: {} of 30 predicted",
            lab.len()
        );
        let s = PredictionStats::new(&lab, &pred).expect("stats");
        let sep_cv = o.file.statistics.sep;
        eprintln!(
            "seed {seed}: new-sample SEP {:.3}, cross-validated SEP {sep_cv:.3}",
            s.sep
        );
        assert!(
            s.sep < 2.0 * sep_cv + 0.05,
            "seed {seed}: SEP {} vs {sep_cv}",
            s.sep
        );
        let mut buf = Vec::new();
        write_predictions(&mut buf, &rows).expect("csv");
        let text = String::from_utf8(buf).expect("utf8");
        assert!(
            text.starts_with(
                "sample_id,moisture_pct,predicted_moisture_pct,uncertainty_pct,interval_low_pct,interval_high_pct,leverage,flags,cal_id\n"
            ),
            "{text}"
        );
        // The lab value is kept beside the prediction, and the interval
        // brackets the prediction.
        for r in rows.iter().filter(|r| r.moisture_pct.is_some()) {
            let (lo, hi) = r.interval_pct.expect("interval");
            let m = f64::from(r.moisture_pct.expect("m"));
            assert!(lo < m && m < hi && r.leverage.is_finite(), "{r:?}");
        }
        let j = predictions_json(&rows, 0.95);
        assert_eq!(j["rows"].as_array().map(Vec::len), Some(30));
        assert!(j["rows"][0]["moisture_pct"].is_number());
        assert!(j["rows"][0]["predicted_moisture_pct"].is_number());
    }

    #[test]
    fn too_few_samples_and_missing_densities_are_refused() {
        let dir = tempfile::tempdir().expect("dir");
        let csv = synth_csv(dir.path(), "few.csv", 5, 1);
        let e = fit(
            &args(csv.clone(), dir.path().join("p.toml"), FitModel::Single),
            0,
        )
        .expect_err("5 < 4 + 3")
        .to_string();
        assert!(e.contains("needs at least 7"), "{e}");
        let csv = synth_csv(dir.path(), "ok.csv", 20, 2);
        let mut a = args(csv, dir.path().join("p.toml"), FitModel::Relaxation);
        a.bulk_density_kg_m3 = None;
        let e = fit(&a, 0).expect_err("no density").to_string();
        assert!(e.contains("--bulk-density-kg-m3"), "{e}");
        assert!(!dir.path().join("p.toml").exists(), "nothing written");
    }

    /// Regression: a lab-pairs table that was not valid CSV (cut short, not
    /// UTF-8) was a plain CSV error (exit status 1, the line only inside
    /// the parser's words), and a sample listed twice was counted twice.
    /// Each is now an input error naming file and line.
    #[test]
    fn malformed_or_repeated_lab_pairs_are_input_errors() {
        let dir = tempfile::tempdir().expect("dir");
        let p = dir.path().join("pairs.csv");
        // A wet-basis calibration of the synthetic grain.
        let csv = synth_csv(dir.path(), "lab.csv", 40, 81);
        let cal = dir.path().join("p.toml");
        fit(&args(csv, cal.clone(), FitModel::Relaxation), 0)
            .expect("fit")
            .file
            .save(&cal)
            .expect("save");
        let head = "sample_id,moisture_pct,predicted_moisture_pct\n";
        let cases: [(&[u8], &str); 6] = [
            (b"G1,12.1,12.0\nG2,13.4\nG3,11.0,11.2\n", "line 3"),
            (b"G1,12.1,12.0\nG\xfc,13.4,13.3\n", "line 3"),
            (b"G1,12.1,12.0\nG2,13.4,13.3\nG1,12.1,12.0\n", "line 4"),
            // A decimal point lost (14.5 as 145), and a negative one: a
            // moisture on the calibration's wet basis is 0-100 %.
            (
                b"G1,12.1,12.0\nG2,145,14.4\n",
                "line 3, column 2 (moisture_pct): `145`",
            ),
            (b"G1,-3,12.0\n", "line 2, column 2 (moisture_pct): `-3`"),
            // The same in the predicted column.
            (
                b"G1,12.1,12.0\nG2,14.5,144\n",
                "line 3, column 3 (predicted_moisture_pct): `144`",
            ),
        ];
        for (rows, want) in cases {
            std::fs::write(&p, [head.as_bytes(), rows].concat()).expect("write");
            let e = pairs_from_csv(&p, &cal).expect_err("malformed");
            assert!(
                matches!(e, AdjustError::Samples(_)),
                "an input error (exit 3): {e:?}"
            );
            let e = e.to_string();
            assert!(e.contains("pairs.csv") && e.contains(want), "{want}: {e}");
        }
        std::fs::write(&p, format!("{head}G1,12.1,12.0\nG2,13.4,13.3\n")).expect("write");
        assert_eq!(
            pairs_from_csv(&p, &cal).expect("good").lab,
            vec![12.1, 13.4]
        );
        // A basis column that says otherwise than the calibration.
        std::fs::write(
            &p,
            "sample_id,moisture_pct,predicted_moisture_pct,moisture_basis\nG1,12.1,12.0,wet\nG2,15.2,13.3,dry\n",
        )
        .expect("write");
        let e = pairs_from_csv(&p, &cal)
            .expect_err("dry on wet")
            .to_string();
        assert!(
            e.contains("line 3, column 4 (moisture_basis): `dry`"),
            "{e}"
        );
    }

    /// The pairs `cal adjust --db` tests a calibration on are the samples
    /// whose reading that calibration made: not those measured under a
    /// calibration in force before it, or after it, or while it was pushed
    /// but not selected (common practice, no source: a bias is a property
    /// of one calibration).
    #[test]
    fn line_pairs_are_those_the_calibration_made() {
        use crate::analysis::{LabRow, LineData};
        use fringe_protocol::CalId;
        let ours = CalId([0x4c, 0x99, 0x14, 0xd5]);
        let other = CalId([0x12, 0x34, 0x56, 0x78]);
        let row = |t: i64, lab: f64, inline: Option<f64>, made_with: Option<CalId>| LabRow {
            sample_id: format!("G{t}"),
            time_ms: t,
            lab_pct: lab,
            inline_pct: inline,
            made_with,
        };
        let mut data = LineData::default();
        data.serial = "HGM-TEST".into();
        data.lab = vec![
            // Before ours was selected, after it, under ours, no reading.
            row(1, 11.0, Some(12.0), Some(other)),
            row(2, 13.0, Some(13.3), Some(ours)),
            row(3, 14.0, Some(14.2), Some(ours)),
            row(4, 12.5, None, None),
            row(5, 15.0, Some(17.0), Some(other)),
            row(6, 12.0, Some(12.4), Some(ours)),
        ];
        let p = pairs_from_line(&data, &ours.to_string(), Path::new("line.db"));
        assert_eq!(p.lab, vec![13.0, 14.0, 12.0]);
        assert_eq!(p.predicted, vec![13.3, 14.2, 12.4]);
        assert!(
            p.source.contains("measured under 4c9914d5")
                && p.source
                    .contains("2 samples measured under other calibrations left out"),
            "{}",
            p.source
        );
    }
}

/// Which correction `cal adjust` writes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum AdjustCorrection {
    /// What the tests call for: slope and bias if the slope differs significantly from 1, else the bias if significant, else nothing.
    Auto,
    /// The bias alone, significant or not.
    Bias,
    /// Slope and bias (lab regressed on predicted), significant or not.
    BiasSlope,
}

/// What `cal adjust` checks and writes.
#[derive(Debug, Clone, PartialEq)]
pub struct AdjustOptions {
    /// The calibration in force (TOML from `fringe cal fit` or an earlier adjust).
    pub cal: PathBuf,
    /// Where to write the adjusted calibration.
    pub out: PathBuf,
    /// Which correction to write.
    pub correct: AdjustCorrection,
    /// Significance level of the bias and slope tests.
    pub alpha: f64,
}

/// Lab and predicted values of `cal adjust`'s pairs, with where they came from.
#[derive(Debug, Clone, PartialEq)]
pub struct Pairs {
    /// Lab moisture, %.
    pub lab: Vec<f64>,
    /// Predicted (inline) moisture, %.
    pub predicted: Vec<f64>,
    /// Where they came from, in words.
    pub source: String,
}

/// The lab pairs of a CSV: `moisture_pct` (lab) beside
/// `predicted_moisture_pct` (as `cal predict` writes them), or a
/// reference-sample table, evaluated with the calibration `cal`.
///
/// # Errors
/// An unreadable file, a value that is not a number (file, line, column
/// and field named), or a table the calibration cannot evaluate.
pub fn pairs_from_csv(path: &Path, cal: &Path) -> Result<Pairs, AdjustError> {
    // A malformed table is an input error naming the file and line (exit
    // status 3), as the reference-sample reader says it.
    let csv_err = |e: csv::Error| SampleError::Malformed {
        file: path.to_path_buf(),
        line: e.position().map_or(1, csv::Position::line),
        reason: e.to_string(),
    };
    let text = std::fs::read(path).map_err(|e| SampleError::Io {
        file: path.to_path_buf(),
        reason: e.to_string(),
    })?;
    let mut rdr = csv::ReaderBuilder::new()
        .trim(csv::Trim::All)
        .from_reader(text.as_slice());
    let header = rdr.headers().map_err(csv_err)?.clone();
    let col = |n: &str| header.iter().position(|h| h.eq_ignore_ascii_case(n));
    let id_c = col("sample_id");
    let mut seen: Vec<(String, u64)> = Vec::new();
    let (lab_c, pred_c) = match (col("moisture_pct"), col("predicted_moisture_pct")) {
        (Some(l), Some(p)) => (l, p),
        _ => {
            // A reference-sample table: evaluate it with the calibration.
            let rows = predict(cal, path, None, 0.95)?;
            let (lab, predicted) = rows
                .iter()
                .filter_map(|r| Some((r.lab_pct?, f64::from(r.moisture_pct?))))
                .unzip();
            return Ok(Pairs {
                lab,
                predicted,
                source: format!("{} (evaluated with {})", path.display(), cal.display()),
            });
        }
    };
    // The lab values are on the calibration's basis, within what a
    // moisture on it can be, as a reference table's are (found by review:
    // a value of 145 for 14.5 went into the tests and the correction).
    let (cal_file, cal_wire) = ProductFile::load(cal)?;
    let basis = cal_wire.basis;
    let basis_c = col("moisture_basis");
    // Pairs `cal predict` made with another calibration (the parent of the
    // one adjusted, say) tell nothing of this one: its bias would be
    // removed twice (found by review).
    let cal_id_c = col("cal_id");
    let (mut lab, mut predicted) = (Vec::new(), Vec::new());
    for rec in rdr.records() {
        let rec = rec.map_err(csv_err)?;
        let line = rec.position().map_or(0, |p| p.line());
        // A sample counted twice would weigh twice in the bias test.
        if let Some(id) = id_c.and_then(|c| rec.get(c)).filter(|id| !id.is_empty()) {
            if let Some((_, first_line)) = seen.iter().find(|(s, _)| s == id) {
                return Err(SampleError::DuplicateId {
                    file: path.to_path_buf(),
                    line,
                    first_line: *first_line,
                    id: id.to_string(),
                }
                .into());
            }
            seen.push((id.to_string(), line));
        }
        let get = |c: usize, name: &str| -> Result<Option<f64>, SampleError> {
            let t = rec.get(c).unwrap_or("");
            if t.is_empty() {
                return Ok(None);
            }
            let v: f64 = t
                .parse()
                .ok()
                .filter(|v: &f64| v.is_finite())
                .ok_or_else(|| SampleError::BadValue {
                    file: path.to_path_buf(),
                    line,
                    column: c + 1,
                    field: if name == "moisture_pct" {
                        "moisture_pct"
                    } else {
                        "predicted_moisture_pct"
                    },
                    value: t.to_string(),
                    expected: "a finite number",
                })?;
            Ok(Some(v))
        };
        if let Some(c) = cal_id_c {
            let id = rec.get(c).unwrap_or("");
            if !id.is_empty() && id != cal_file.id {
                return Err(AdjustError::OtherCalibration {
                    file: path.to_path_buf(),
                    line,
                    predicted_with: id.to_string(),
                    adjusted: cal_file.id.clone(),
                });
            }
        }
        let l = get(lab_c, "moisture_pct")?;
        if let Some(v) = l {
            let (ok, expected) = match basis {
                Basis::Dry => (
                    (0.0..crate::samples::MAX_DRY_BASIS_PCT).contains(&v),
                    "a lab moisture in % dry basis, 0 <= m < 1000 (the calibration's basis)",
                ),
                _ => (
                    (0.0..100.0).contains(&v),
                    "a lab moisture in % wet basis, 0 <= m < 100 (the calibration's basis)",
                ),
            };
            if !ok {
                return Err(SampleError::BadValue {
                    file: path.to_path_buf(),
                    line,
                    column: lab_c + 1,
                    field: "moisture_pct",
                    value: rec.get(lab_c).unwrap_or("").to_string(),
                    expected,
                }
                .into());
            }
            if let Some(c) = basis_c {
                let said = rec.get(c).unwrap_or("").to_ascii_lowercase();
                let (wet, dry) = (
                    ["wet", "wb", "w.b.", "wet basis"].contains(&said.as_str()),
                    ["dry", "db", "d.b.", "dry basis"].contains(&said.as_str()),
                );
                let agrees = said.is_empty()
                    || match basis {
                        Basis::Dry => dry,
                        _ => wet,
                    };
                if !agrees {
                    return Err(SampleError::BadValue {
                        file: path.to_path_buf(),
                        line,
                        column: c + 1,
                        field: "moisture_basis",
                        value: rec.get(c).unwrap_or("").to_string(),
                        expected: match basis {
                            Basis::Dry => "dry (or an empty cell): the calibration is on a dry basis, and so must its lab values be",
                            _ => "wet (or an empty cell): the calibration is on a wet basis, and so must its lab values be",
                        },
                    }
                    .into());
                }
            }
        }
        let p = get(pred_c, "predicted")?;
        // A predicted value may lie a little below 0 (a model read past
        // its range), but not past the basis's top either way (a decimal
        // point lost: found by review).
        if let Some(v) = p {
            let (top, expected) = match basis {
                Basis::Dry => (
                    crate::samples::MAX_DRY_BASIS_PCT,
                    "a predicted moisture in % dry basis, -1000 < m < 1000 (the calibration's basis)",
                ),
                _ => (
                    100.0,
                    "a predicted moisture in % wet basis, -100 < m < 100 (the calibration's basis)",
                ),
            };
            if v.abs() >= top {
                return Err(SampleError::BadValue {
                    file: path.to_path_buf(),
                    line,
                    column: pred_c + 1,
                    field: "predicted_moisture_pct",
                    value: rec.get(pred_c).unwrap_or("").to_string(),
                    expected,
                }
                .into());
            }
        }
        if let (Some(l), Some(p)) = (l, p) {
            lab.push(l);
            predicted.push(p);
        }
    }
    Ok(Pairs {
        lab,
        predicted,
        source: path.display().to_string(),
    })
}

/// Why a slope that differs significantly from 1 is not corrected
/// (`None` where it does not, or can be).
fn slope_left_words(t: &fringe_calibration::fit::adjust::BiasSlope) -> Option<String> {
    (t.slope_significant && !t.slope_correctable()).then(|| {
        format!(
            "; the slope {:.3} (t {:.2} vs {:.2}) is not corrected: {}",
            t.slope,
            t.slope_t,
            t.slope_t_crit,
            if t.slope > 0.0 {
                format!(
                    "the lab values spread too little (SD {:.3} %, less than {} times the SEP {:.3} %), so it is mostly the readings' own scatter; for a slope take pairs over a wider range of moisture",
                    t.lab_sd,
                    fringe_calibration::fit::adjust::SLOPE_SPREAD,
                    t.sep
                )
            } else {
                "lab and predicted do not rise together; check that the pairs belong together".to_string()
            }
        )
    })
}

/// Result of `cal adjust`.
#[derive(Debug, Clone)]
pub struct AdjustOutcome {
    /// The tests.
    pub tests: fringe_calibration::fit::adjust::BiasSlope,
    /// The correction written (`None` when nothing was written).
    pub applied: fringe_calibration::fit::adjust::Correction,
    /// The new file, when one was written.
    pub file: Option<ProductFile>,
    /// Where the pairs came from.
    pub source: String,
    /// ISO 12099's unexplained-error check of the pairs' SEP against the
    /// calibration's SEC (absent for a file without its parameter count).
    pub unexplained: Option<Unexplained>,
    /// The correction was written though the tests do not call for it
    /// (`--correct` asked for it).
    pub forced: bool,
}

/// The pairs' SEP against the calibration's SEC:
/// [`fringe_calibration::fit::adjust::unexplained_error_limit`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Unexplained {
    /// The calibration's SEC, %.
    pub sec: f64,
    /// Its degrees of freedom (samples less parameters).
    pub dof: usize,
    /// The limit T_UE, %.
    pub limit: f64,
    /// The pairs' SEP is above it.
    pub exceeded: bool,
}

/// The lab pairs of a line's data ([`crate::analysis`]) whose inline value
/// the calibration `cal_id` made (the matched reading carries the id of the
/// calibration that computed it): a sample measured under another
/// calibration, one selected before or after, or one that was pushed but
/// not put in force, tells nothing about this one.
pub fn pairs_from_line(data: &crate::analysis::LineData, cal_id: &str, db: &Path) -> Pairs {
    let mut other = 0usize;
    let (lab, predicted) = data
        .lab
        .iter()
        .filter_map(|l| Some((l.lab_pct, l.inline_pct?, l.made_with?)))
        .filter(|(_, _, made_with)| {
            let ours = made_with.to_string() == cal_id;
            other += usize::from(!ours);
            ours
        })
        .map(|(lab, inline, _)| (lab, inline))
        .unzip();
    let left = match other {
        0 => String::new(),
        1 => "; 1 sample measured under another calibration left out".to_string(),
        n => format!("; {n} samples measured under other calibrations left out"),
    };
    Pairs {
        lab,
        predicted,
        source: format!(
            "lab grab samples of {} in {} measured under {cal_id}{left}",
            data.serial,
            db.display()
        ),
    }
}

/// `cal adjust` on pairs already gathered: the bias and slope tests, and
/// the corrected calibration written to `args.out` when a correction
/// applies (`made_s`: its time, s since the Unix epoch).
///
/// # Errors
/// A bad calibration file, too few pairs, or a failed write.
pub fn adjust(
    args: &AdjustOptions,
    pairs: Pairs,
    made_s: u64,
) -> Result<AdjustOutcome, AdjustError> {
    use fringe_calibration::fit::adjust::{bias_slope, Correction};
    let (file, wire) = ProductFile::load(&args.cal)?;
    if pairs.lab.len() < 3 {
        return Err(AdjustError::TooFewPairs {
            source_words: pairs.source,
            n: pairs.lab.len(),
        });
    }
    let tests = bias_slope(&pairs.lab, &pairs.predicted, args.alpha).map_err(|source| {
        AdjustError::Tests {
            source_words: pairs.source.clone(),
            source,
        }
    })?;
    let applied = match args.correct {
        AdjustCorrection::Auto => tests.recommended(),
        AdjustCorrection::Bias => Correction::Bias,
        AdjustCorrection::BiasSlope => Correction::BiasAndSlope,
    };
    // A slope correction, even asked for, needs a positive slope: with
    // none (predicted values that do not vary) or one at or below zero the
    // corrected calibration would read moisture flat or backwards (found
    // by review).
    if applied == Correction::BiasAndSlope && (!tests.slope_determined() || tests.slope <= 0.0) {
        return Err(AdjustError::NoSlope {
            source_words: pairs.source,
            slope: tests.slope,
        });
    }
    // A forced correction the tests do not call for: a bias correction
    // where the bias is not significant or the tests call for a slope one
    // as well, a slope one where the slope is not significant, or where
    // the pairs cannot correct a slope.
    let forced = match applied {
        Correction::None => false,
        Correction::Bias => {
            !tests.bias_significant || tests.recommended() == Correction::BiasAndSlope
        }
        Correction::BiasAndSlope => !tests.slope_significant || !tests.slope_correctable(),
    };
    let st = &file.statistics;
    // An adjusted calibration keeps its parent's statistics; its own SEC
    // is the parent's scaled by the slope, or the line's error where that
    // was larger (found by review: T_UE came from the parent's).
    let sec = if file.source.parent_id.is_some() {
        f64::from(wire.sec_pct)
    } else {
        st.sec
    };
    // Its degrees of freedom: where a line's error set it, the lab pairs'
    // (`sec_dof`, which the adjust wrote), the fit's otherwise (found by
    // review).
    let unexplained = st
        .n_params
        .and_then(|p| st.n.checked_sub(p).filter(|d| *d > 0))
        .map(|m| match file.sec_dof {
            Some(d) => d,
            // A file adjusted before `sec_dof` was written: the intervals'
            // degrees of freedom where a line's error set them, as then.
            None if file.source.parent_id.is_some() => {
                file.prediction.as_ref().map_or(m, |p| m.min(p.dof))
            }
            None => m,
        })
        .filter(|d| *d > 0)
        .and_then(|dof| {
            let limit = fringe_calibration::fit::adjust::unexplained_error_limit(
                sec, dof, tests.n, args.alpha,
            )
            .ok()?;
            Some(Unexplained {
                sec,
                dof,
                limit,
                exceeded: tests.sep > limit,
            })
        });
    if applied == Correction::None {
        return Ok(AdjustOutcome {
            tests,
            applied,
            file: None,
            source: pairs.source,
            unexplained,
            forced,
        });
    }
    let (a, b) = tests.map(applied);
    // The error left on the line after this correction: the bias-corrected
    // SEP after a bias correction, the residual SD of lab on predicted after
    // a slope one. The child's uncertainty (the device's SEC term and the
    // host's intervals) is the parent's scaled by the slope, or this where
    // it is larger: a calibration does not claim to be better on its line
    // than its line shows (our rule, no source).
    //
    // The correction's own error adds to it for a new sample (found by
    // review): the bias's, SEP^2 / n; after a slope correction that of the
    // line, s_res^2 (1/n + (x - mean)^2 / Sxx), taken at the pair of
    // predicted values farthest from their mean, so that it holds over
    // the pairs' range (general least squares, from memory).
    let nf = tests.n as f64;
    let spread = match applied {
        Correction::BiasAndSlope => {
            let mean = pairs.predicted.iter().sum::<f64>() / nf;
            let sxx: f64 = pairs.predicted.iter().map(|x| (x - mean).powi(2)).sum();
            let far = pairs
                .predicted
                .iter()
                .map(|x| (x - mean).powi(2))
                .fold(0.0, f64::max);
            1.0 / nf + far / sxx
        }
        _ => 1.0 / nf,
    };
    let line_raw = match applied {
        Correction::BiasAndSlope => tests.s_res,
        _ => tests.sep,
    };
    let line_sd = line_raw * (1.0 + spread).sqrt();
    let scaled_sec = f64::from(wire.sec_pct) * b.abs();
    let raised = line_sd > scaled_sec;
    let cal = fringe_firmware::device::parse_product(&wire).map_err(|e| AdjustError::Refused {
        path: args.cal.clone(),
        reason: format!("{e:?}"),
    })?;
    let model = cal.model.cast::<f64>().rescaled(a, b);
    let (params, n) = model.to_params();
    let map = |x: f32| (a + b * f64::from(x)) as f32;
    let (lo, hi) = (map(wire.moisture_pct.min), map(wire.moisture_pct.max));
    // The corrected range stays a moisture on the calibration's basis.
    let top = basis_top_pct(wire.basis);
    let new_wire = ProductCal {
        params: heapless::Vec::from_slice(&params[..n]).map_err(|_| AdjustError::TooMany)?,
        moisture_pct: Range {
            min: lo.min(hi).clamp(0.0, top),
            max: lo.max(hi).clamp(0.0, top),
        },
        made_s,
        sec_pct: scaled_sec.max(line_sd) as f32,
        ..wire.clone()
    };
    let words = match applied {
        Correction::Bias => format!(
            "bias {:+.3} % removed (t {:.2} vs {:.2}, {} pairs, alpha {})",
            tests.bias, tests.bias_t, tests.bias_t_crit, tests.n, args.alpha
        ),
        _ => format!(
            "lab = {a:.4} + {b:.4} x predicted (slope t {:.2} vs {:.2}, bias {:+.3} %, {} pairs, alpha {})",
            tests.slope_t, tests.slope_t_crit, tests.bias, tests.n, args.alpha
        ),
    };
    // Said where the range was held (a parent written before its range
    // was held to what a reading carries, or a correction past the basis's
    // top).
    let held = if lo.max(hi) > top {
        format!(
            "; valid range held at {top} % (corrected {:.2} %: the most a reading carries on this basis)",
            lo.max(hi)
        )
    } else {
        String::new()
    };
    let forced_words = if forced {
        let lean = slope_left_words(&tests).unwrap_or_default();
        match tests.recommended() {
            Correction::None => format!(
                "; forced with --correct: the tests at this alpha call for no correction{lean}"
            ),
            Correction::Bias => format!("; forced with --correct: the tests at this alpha call for a bias correction only{lean}"),
            Correction::BiasAndSlope => "; forced with --correct: the tests at this alpha call for a bias and slope correction".to_string(),
        }
    } else if applied != Correction::BiasAndSlope {
        // A significant slope left as it is: said why.
        slope_left_words(&tests).unwrap_or_default()
    } else {
        String::new()
    };
    let raised_words = if raised {
        format!(
            "; uncertainty from the pairs' {} {line_raw:.3} %, {line_sd:.3} % with the correction's own error (the parent's SEC{} gives {scaled_sec:.3} %)",
            if applied == Correction::BiasAndSlope {
                "residual SD"
            } else {
                "SEP"
            },
            if b == 1.0 { "" } else { " scaled by the slope" }
        )
    } else {
        String::new()
    };
    let excess_words = match unexplained {
        Some(u) if u.exceeded => format!(
            "; the pairs' SEP {:.3} % is significantly above the calibration's SEC {:.3} % (T_UE {:.3} %, ISO 12099): a correction does not remove that",
            tests.sep, u.sec, u.limit
        ),
        _ => String::new(),
    };
    let mut source = file.source.clone();
    source.parent_id = Some(file.id.clone());
    source.derivation = Some(format!(
        "{words}{held}{forced_words}{raised_words}{excess_words}; pairs: {}",
        pairs.source
    ));
    let input_names: Vec<&str> = file.inputs.iter().map(|r| r.name.as_str()).collect();
    let mut new_file =
        ProductFile::from_wire(&new_wire, &input_names, file.statistics.clone(), source);
    new_file.prediction = file.prediction.clone();
    // The SEC's degrees of freedom: the pairs' where their error set it,
    // else the parent's.
    let line_dof = match applied {
        Correction::BiasAndSlope => tests.n.saturating_sub(2),
        _ => tests.n.saturating_sub(1),
    }
    .max(1);
    new_file.sec_dof = if raised { Some(line_dof) } else { file.sec_dof };
    if let Some(p) = &mut new_file.prediction {
        // Intervals scale with the slope, and are no narrower than the
        // line's error after the correction; where that sets them, their t
        // quantile has its degrees of freedom (n - 1 for the SEP, n - 2
        // for the residual SD after a slope correction).
        // (The line's, also where a parent's adjust had set fewer: found by
        // review.)
        if line_sd > p.interval_sd * b.abs() {
            p.dof = line_dof;
        }
        p.residual_sd = (p.residual_sd * b.abs()).max(line_sd);
        p.interval_sd = (p.interval_sd * b.abs()).max(line_sd);
    }
    new_file.save(&args.out)?;
    Ok(AdjustOutcome {
        tests,
        applied,
        file: Some(new_file),
        source: pairs.source,
        unexplained,
        forced,
    })
}

/// Writes a `cal adjust` outcome for a person (or one JSON object).
///
/// # Errors
/// A failed write.
pub fn write_adjust(
    args: &AdjustOptions,
    o: &AdjustOutcome,
    json: bool,
    w: &mut dyn std::io::Write,
) -> std::io::Result<()> {
    use fringe_calibration::fit::adjust::Correction;
    let t = &o.tests;
    if json {
        let v = json!({
            "pairs": t.n,
            "source": o.source,
            "alpha": t.alpha,
            "bias": {"value": t.bias, "ci": [t.bias_ci.0, t.bias_ci.1], "t": t.bias_t, "t_crit": t.bias_t_crit, "significant": t.bias_significant},
            "slope": {"value": t.slope, "intercept": t.intercept, "se": t.slope_se, "ci": [t.slope_ci.0, t.slope_ci.1], "t": t.slope_t, "t_crit": t.slope_t_crit, "significant": t.slope_significant, "correctable": t.slope_correctable(), "lab_sd": t.lab_sd},
            "sep": {"value": t.sep, "ci": [t.sep_ci.0, t.sep_ci.1]},
            "rmsep": t.rmsep,
            "residual_sd": t.s_res,
            "unexplained_error": o.unexplained.map(|u| json!({"sec": u.sec, "dof": u.dof, "t_ue": u.limit, "exceeded": u.exceeded})),
            "forced": o.forced,
            "applied": format!("{:?}", o.applied),
            "written": o.file.as_ref().map(|f| json!({"file": args.out.display().to_string(), "id": f.id, "parent_id": f.source.parent_id})),
        });
        writeln!(w, "{v}")?;
        return Ok(());
    }
    // 95, or 99.9: as many digits as the level has (not 100 for 99.9).
    let conf = (100.0 * (1.0 - t.alpha) * 1e4).round() / 1e4;
    writeln!(w, "{} lab pairs ({})", t.n, o.source)?;
    writeln!(
        w,
        "  bias  {:+.3} % (predicted - lab; lab - inline {:+.3} % as the drift chart has it), {conf} % CI {:+.3}..{:+.3}; t {:.2} vs {:.2}: {}",
        t.bias,
        -t.bias,
        t.bias_ci.0,
        t.bias_ci.1,
        t.bias_t,
        t.bias_t_crit,
        if t.bias_significant {
            "significant"
        } else {
            "not significant"
        }
    )?;
    if !t.slope_determined() {
        writeln!(
            w,
            "  slope none: the predicted values do not vary (a slope needs pairs over a range of moisture)"
        )?;
    } else {
        writeln!(
            w,
            "  slope {:.4} (lab on predicted), {conf} % CI {:.4}..{:.4}; t {:.2} vs {:.2}: {}",
            t.slope,
            t.slope_ci.0,
            t.slope_ci.1,
            t.slope_t,
            t.slope_t_crit,
            if t.slope_significant {
                "differs from 1"
            } else {
                "not different from 1"
            }
        )?;
    }
    writeln!(
        w,
        "  SEP   {:.3} %, {conf} % CI {:.3}..{:.3}; RMSEP {:.3} % (bias included)",
        t.sep, t.sep_ci.0, t.sep_ci.1, t.rmsep
    )?;
    if let Some(u) = o.unexplained {
        writeln!(
            w,
            "  SEP against the calibration's SEC {:.3} % ({} degrees of freedom): T_UE {:.3} %, {}",
            u.sec,
            u.dof,
            u.limit,
            if u.exceeded {
                "significantly larger: the calibration does not hold as well on these samples as on its own, and a bias or slope correction does not change that; look for the cause (sampling, the lab, the product) and consider refitting with samples from the line"
            } else {
                "within"
            }
        )?;
    }
    match (&o.file, o.applied) {
        (Some(f), _) => writeln!(
            w,
            "wrote {} (calibration id {}, parent {}): {}\npush it with `fringe cal push` like any other",
            args.out.display(),
            f.id,
            f.source.parent_id.as_deref().unwrap_or("-"),
            f.source.derivation.as_deref().unwrap_or("")
        )?,
        (None, Correction::None) => match slope_left_words(&o.tests) {
            Some(why) => writeln!(
                w,
                "the bias is not significant{why}: no correction, nothing written"
            )?,
            None => writeln!(
                w,
                "neither bias nor slope is significant: no correction, nothing written"
            )?,
        },
        (None, _) => {}
    }
    Ok(())
}
