//! `fringe cal fit`, `cal predict`, `cal adjust`: the command lines, and
//! the files and output around `fringe_quality::cal`.

use std::io::Write as _;
use std::path::PathBuf;

use anyhow::Context as _;
use clap::{Args, ValueEnum};
use fringe_quality::cal::{self, AdjustCorrection, AdjustOptions, FitModel, FitOptions};

/// Which model `cal fit` fits.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum FitModelArg {
    /// Polynomial in eps' at one frequency plus a temperature term.
    Single,
    /// Two-frequency relaxation inversion, mixing model, temperature and conductivity terms.
    Relaxation,
    /// Ridge regression on physically chosen features of both frequencies (penalty by cross-validation).
    Multivariate,
    /// PLS regression on the same features (components by cross-validation).
    Pls,
    /// Every model under the same cross-validation; `--out` gets the one chosen by SEP with the parsimony rule.
    Compare,
}

impl From<FitModelArg> for FitModel {
    fn from(m: FitModelArg) -> Self {
        match m {
            FitModelArg::Single => FitModel::Single,
            FitModelArg::Relaxation => FitModel::Relaxation,
            FitModelArg::Multivariate => FitModel::Multivariate,
            FitModelArg::Pls => FitModel::Pls,
            FitModelArg::Compare => FitModel::Compare,
        }
    }
}

/// `fringe cal fit`.
#[derive(Debug, Clone, Args)]
#[command(
    after_help = "Example:\n  fringe cal fit --samples lab-2026-11.csv --model compare --bulk-density-kg-m3 760 \\\n      --particle-density-kg-m3 1400 --out wheat-l2.toml --plot wheat-l2.svg"
)]
pub struct FitArgs {
    /// Reference-sample table (CSV: sample_id, moisture_pct, temperature_c, freq1_hz, eps1_re, eps1_im, freq2_hz, eps2_re, eps2_im).
    #[arg(long, value_name = "FILE.csv")]
    pub samples: PathBuf,
    /// Model to fit.
    #[arg(long, value_enum, default_value_t = FitModelArg::Compare)]
    pub model: FitModelArg,
    /// Where to write the product calibration (TOML).
    #[arg(long, value_name = "PRODUCT.toml")]
    pub out: PathBuf,
    /// Product name as the plant calls it (at most 16 bytes) [default: the output file's stem].
    #[arg(long)]
    pub name: Option<String>,
    /// Wet bulk density of the product at the sensor, kg/m^3 (relaxation model; measure it).
    #[arg(long, value_name = "KG_M3")]
    pub bulk_density_kg_m3: Option<f64>,
    /// Particle density of the dry matter, kg/m^3 (relaxation model; measured or handbook).
    #[arg(long, value_name = "KG_M3")]
    pub particle_density_kg_m3: Option<f64>,
    /// Polynomial degree of the regression, 1-3.
    #[arg(long, default_value_t = 2, value_parser = clap::value_parser!(u8).range(1..=3))]
    pub degree: u8,
    /// Cross-validation: 0 for leave-one-out below 100 samples and 10 folds from 100 on,
    /// else the number of folds (venetian blinds; the number of samples is leave-one-out).
    #[arg(long, default_value_t = 0)]
    pub folds: usize,
    /// Noise standard deviation of eps' and eps'' (for the uncertainty the device reports).
    #[arg(long, default_value_t = 0.02)]
    pub eps_sd: f64,
    /// Moisture basis of the lab values.
    #[arg(long, value_parser = ["wet", "dry"], default_value = "wet")]
    pub basis: String,
    /// Print the result as one JSON object.
    #[arg(long)]
    pub json: bool,
    /// Draw predicted vs lab and residuals vs each input to this SVG file.
    #[arg(long, value_name = "FILE.svg")]
    pub plot: Option<PathBuf>,
    /// Write the calibration even if it fails the quality gate (RPD < 2, R^2 < 0.8,
    /// fewer than 5 samples per parameter, a range set by one sample); the
    /// overridden refusals are kept in the file and in `cal push`'s audit record.
    #[arg(long)]
    pub force: bool,
}

impl FitArgs {
    /// The library's options.
    pub fn options(&self) -> FitOptions {
        FitOptions {
            samples: self.samples.clone(),
            model: self.model.into(),
            out: self.out.clone(),
            name: self.name.clone(),
            bulk_density_kg_m3: self.bulk_density_kg_m3,
            particle_density_kg_m3: self.particle_density_kg_m3,
            degree: self.degree,
            folds: self.folds,
            eps_sd: self.eps_sd,
            basis: self.basis.clone(),
            force: self.force,
        }
    }
}

fn now_s() -> u64 {
    (fringe_store::now_unix_ms() / 1000).max(0) as u64
}

/// `fringe cal fit`: fit, then write the file (and plot) only when all went well.
///
/// # Errors
/// As `fringe_quality::cal::fit`, or a failed write.
pub fn run_fit(args: &FitArgs) -> anyhow::Result<()> {
    let o = cal::fit(&args.options(), now_s())?;
    let plot = match &args.plot {
        Some(_) => Some(cal::fit_plot(&o, &args.samples)?),
        None => None,
    };
    o.file.save(&args.out)?;
    if let (Some(p), Some(svg)) = (&args.plot, plot) {
        std::fs::write(p, svg).with_context(|| format!("writing {}", p.display()))?;
    }
    let mut w = std::io::stdout().lock();
    if args.json {
        writeln!(w, "{}", cal::outcome_json(&o, &args.out))?;
        return Ok(());
    }
    cal::write_fit_summary(&o, &args.out, args.plot.as_deref(), &mut w)?;
    Ok(())
}

/// `fringe cal predict`.
#[derive(Debug, Clone, Args)]
#[command(
    after_help = "Example:\n  fringe cal predict --cal wheat-l2.toml --input check-samples.csv --out predicted.csv"
)]
pub struct PredictArgs {
    /// Product calibration (TOML written by `fringe cal fit`).
    #[arg(long, value_name = "PRODUCT.toml")]
    pub cal: PathBuf,
    /// Table of samples (reference-sample columns; moisture_pct optional).
    #[arg(long, value_name = "FILE.csv")]
    pub input: PathBuf,
    /// Output CSV [default: stdout].
    #[arg(long, value_name = "FILE.csv")]
    pub out: Option<PathBuf>,
    /// Noise standard deviation of eps' and eps'' used for the uncertainty.
    #[arg(long, default_value_t = 0.02)]
    pub eps_sd: f32,
    /// Confidence level of the prediction interval.
    #[arg(long, default_value_t = 0.95, value_parser = confidence_level)]
    pub confidence: f64,
    /// Print the rows and the statistics as one JSON object on stdout (no CSV).
    #[arg(long)]
    pub json: bool,
}

fn confidence_level(s: &str) -> Result<f64, String> {
    let v: f64 = s
        .trim()
        .parse()
        .map_err(|_| format!("`{s}` is not a number"))?;
    if v > 0.5 && v < 1.0 {
        Ok(v)
    } else {
        Err(format!(
            "{s} is not a confidence level between 0.5 and 1 (e.g. 0.95)"
        ))
    }
}

/// `fringe cal predict`.
///
/// # Errors
/// As `fringe_quality::cal::predict`, or a failed write.
pub fn run_predict(args: &PredictArgs) -> anyhow::Result<()> {
    let rows = cal::predict(&args.cal, &args.input, args.eps_sd, args.confidence)?;
    if args.json {
        let v = cal::predictions_json(&rows, args.confidence);
        match &args.out {
            Some(p) => std::fs::write(p, format!("{v}\n"))
                .with_context(|| format!("writing {}", p.display()))?,
            None => writeln!(std::io::stdout().lock(), "{v}")?,
        }
        return Ok(());
    }
    match &args.out {
        Some(p) => {
            let tmp = p.with_extension("csv.part");
            let f = std::fs::File::create(&tmp)
                .with_context(|| format!("creating {}", tmp.display()))?;
            cal::write_predictions(f, &rows)?;
            std::fs::rename(&tmp, p).with_context(|| format!("writing {}", p.display()))?;
        }
        None => cal::write_predictions(std::io::stdout().lock(), &rows)?,
    }
    match cal::against_lab(&rows) {
        Some(Ok(s)) => eprintln!(
            "against moisture_pct of {} samples: SEP {:.3} %, bias {:+.3} % (predicted - lab)",
            s.n, s.sep, s.bias
        ),
        Some(Err(e)) => eprintln!("against moisture_pct: no statistics ({e})"),
        None => {}
    }
    let failed = rows.iter().filter(|r| r.moisture_pct.is_none()).count();
    if failed > 0 {
        eprintln!("{failed} sample(s) gave no moisture (see their flags)");
    }
    Ok(())
}

/// Which correction `cal adjust` writes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum AdjustCorrectionArg {
    /// What the tests call for: slope and bias if the slope differs significantly from 1, else the bias if significant, else nothing.
    Auto,
    /// The bias alone, significant or not.
    Bias,
    /// Slope and bias (lab regressed on predicted), significant or not.
    BiasSlope,
}

impl From<AdjustCorrectionArg> for AdjustCorrection {
    fn from(c: AdjustCorrectionArg) -> Self {
        match c {
            AdjustCorrectionArg::Auto => AdjustCorrection::Auto,
            AdjustCorrectionArg::Bias => AdjustCorrection::Bias,
            AdjustCorrectionArg::BiasSlope => AdjustCorrection::BiasSlope,
        }
    }
}

/// `fringe cal adjust`.
#[derive(Debug, Clone, Args)]
#[command(
    after_help = "Examples:\n  fringe cal adjust --cal wheat-l2.toml --db line2.db --out wheat-l2-adj.toml\n  fringe cal predict --cal wheat-l2.toml --input grabs.csv --out pairs.csv\n  fringe cal adjust --cal wheat-l2.toml --pairs pairs.csv --out wheat-l2-adj.toml\nThen push the new file with `fringe cal push` like any other."
)]
pub struct AdjustArgs {
    /// The calibration in force (TOML from `fringe cal fit` or an earlier adjust).
    #[arg(long, value_name = "PRODUCT.toml")]
    pub cal: PathBuf,
    /// Lab pairs: a CSV with `moisture_pct` (lab) and `predicted_moisture_pct`
    /// (as `cal predict` writes), or a reference-sample table (evaluated with --cal).
    #[arg(
        long,
        value_name = "FILE.csv",
        conflicts_with = "db",
        required_unless_present = "db"
    )]
    pub pairs: Option<PathBuf>,
    /// Take the lab grab samples and their inline readings from this database
    /// (those since the calibration was pushed, when the records say): a
    /// file or a postgres:// URL.
    #[arg(long, value_name = "FILE|URL")]
    pub db: Option<PathBuf>,
    /// Device serial in the database [default: its first device].
    #[arg(long)]
    pub serial: Option<String>,
    /// Where to write the adjusted calibration.
    #[arg(long, value_name = "PRODUCT.toml")]
    pub out: PathBuf,
    /// Which correction to write.
    #[arg(long, value_enum, default_value_t = AdjustCorrectionArg::Auto)]
    pub correct: AdjustCorrectionArg,
    /// Significance level of the bias and slope tests.
    #[arg(long, default_value_t = 0.05)]
    pub alpha: f64,
    /// Print the result as one JSON object.
    #[arg(long)]
    pub json: bool,
}

impl AdjustArgs {
    /// The library's options.
    pub fn options(&self) -> AdjustOptions {
        AdjustOptions {
            cal: self.cal.clone(),
            out: self.out.clone(),
            correct: self.correct.into(),
            alpha: self.alpha,
        }
    }
}

/// `fringe cal adjust`: tests, prints, and writes the corrected calibration
/// when a correction applies.
///
/// # Errors
/// Bad files, too few pairs, a database failure, or a write failure.
pub fn run_adjust(args: &AdjustArgs) -> anyhow::Result<()> {
    let opts = args.options();
    let (file, _) = fringe_quality::product_file::ProductFile::load(&args.cal)?;
    let pairs = match (&args.pairs, &args.db) {
        (Some(p), _) => cal::pairs_from_csv(p, &args.cal)?,
        (None, Some(db)) => {
            let store = crate::store::AnyStore::open_read_only(db)?;
            let data = fringe_quality::analysis::load(store.get(), args.serial.as_deref())?;
            cal::pairs_from_line(&data, &file.id, store.get().path())
        }
        (None, None) => anyhow::bail!("give the lab pairs with --pairs FILE.csv or --db FILE"),
    };
    let o = cal::adjust(&opts, pairs, now_s())?;
    cal::write_adjust(&opts, &o, args.json, &mut std::io::stdout().lock())?;
    Ok(())
}
