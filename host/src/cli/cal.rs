//! The command lines of `fringe cal fit`, `cal predict` and `cal adjust`.
use clap::{Args, ValueEnum};
use std::path::PathBuf;

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
    /// Every model under the same cross-validation; `--out` gets ridge unless another is significantly better (paired signed-rank test); only models within five samples per parameter are chosen.
    Compare,
}

/// `fringe cal fit`.
#[derive(Debug, Clone, Args)]
#[command(
    after_help = "Example:\n  fringe cal fit --samples lab-2026-11.csv --model compare --bulk-density-kg-m3 760 \\\n      --particle-density-kg-m3 1400 --out wheat-l2.toml --plot wheat-l2.svg"
)]
pub struct FitArgs {
    /// Reference-sample table (CSV: sample_id, moisture_pct, temperature_c, freq1_hz, eps1_re, eps1_im, freq2_hz, eps2_re, eps2_im;
    /// optional bulk_density_kg_m3, moisture_basis).
    #[arg(long, value_name = "FILE.csv")]
    pub samples: PathBuf,
    /// Model to fit.
    #[arg(long, value_enum, default_value_t = FitModelArg::Compare)]
    pub model: FitModelArg,
    /// Where to write the product calibration (TOML); replaces only a product calibration file fringe wrote.
    #[arg(long, value_name = "PRODUCT.toml")]
    pub out: PathBuf,
    /// Product name as the plant calls it (at most 16 bytes) [default: the output file's stem].
    #[arg(long)]
    pub name: Option<String>,
    /// Wet bulk density of the product at the sensor, kg/m^3 (relaxation model; measure it).
    #[arg(long, value_name = "KG_M3", value_parser = density)]
    pub bulk_density_kg_m3: Option<f64>,
    /// Particle density of the dry matter, kg/m^3 (relaxation model; measured or handbook).
    #[arg(long, value_name = "KG_M3", value_parser = density)]
    pub particle_density_kg_m3: Option<f64>,
    /// Use the table's bulk_density_kg_m3 column (the density at the sensor from a weigh
    /// belt or gauge, every row) as an input of the multivariate models and in the
    /// relaxation model's mixing model; the device then needs the plant's density with each
    /// reading (without one it flags density_missing).
    #[arg(long)]
    pub density_input: bool,
    /// Polynomial degree of the regression, 1-3.
    #[arg(long, default_value_t = 2, value_parser = clap::value_parser!(u8).range(1..=3))]
    pub degree: u8,
    /// Cross-validation: 0 for leave-one-out below 100 samples and 10 folds from 100 on,
    /// else the number of folds (venetian blinds; the number of samples is leave-one-out).
    #[arg(long, default_value_t = 0, value_parser = folds)]
    pub folds: usize,
    /// Noise standard deviation of eps' and eps'' (for the uncertainty the device reports).
    #[arg(long, default_value_t = 0.02, value_parser = noise_sd)]
    pub eps_sd: f64,
    /// Moisture basis of the lab values (water / wet mass, below 100 %; or
    /// water / dry mass, as timber and biomass are often given, below
    /// 1000 %); the device reports on the same basis (up to 327.67 %, the
    /// most a reading carries: beyond, flagged out of range).
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
    /// Noise standard deviation of eps' and eps'' used for the uncertainty
    /// [default: the one the calibration was fitted with (`cal fit
    /// --eps-sd`), 0.02 for a file that does not say].
    #[arg(long, value_parser = noise_sd_f32)]
    pub eps_sd: Option<f32>,
    /// Confidence level of the prediction interval.
    #[arg(long, default_value_t = 0.95, value_parser = confidence_level)]
    pub confidence: f64,
    /// Print the rows and the statistics as one JSON object on stdout (no CSV).
    #[arg(long)]
    pub json: bool,
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
    /// (those whose reading this calibration made): a file or a postgres://
    /// URL.
    #[arg(long, value_name = "FILE|URL")]
    pub db: Option<PathBuf>,
    /// Device serial in the database [default: its first device].
    #[arg(long)]
    pub serial: Option<String>,
    /// Where to write the adjusted calibration; replaces only a product calibration file fringe wrote, never --cal.
    #[arg(long, value_name = "PRODUCT.toml")]
    pub out: PathBuf,
    /// Which correction to write.
    #[arg(long, value_enum, default_value_t = AdjustCorrectionArg::Auto)]
    pub correct: AdjustCorrectionArg,
    /// Significance level of the bias and slope tests (0.05 for 95 %
    /// confidence; at most 0.5).
    #[arg(long, default_value_t = 0.05, value_parser = significance_level)]
    pub alpha: f64,
    /// Print the result as one JSON object.
    #[arg(long)]
    pub json: bool,
}

/// A number, or the reason it is not one.
fn number(s: &str) -> Result<f64, String> {
    s.trim()
        .parse()
        .map_err(|_| format!("`{s}` is not a number"))
}

/// A density, kg/m^3: within the limits the reference-sample table's
/// density column and `device density` take (the lower one at least 10:
/// a value in g/cm^3 given for kg/m^3, 0.76 for 760, was taken before and
/// put the water fraction off a thousandfold; found by review), and at most
/// `fringe_calibration::fit::product::MAX_DENSITY_KG_M3`.
fn density(s: &str) -> Result<f64, String> {
    let v = number(s)?;
    let (lo, _) = fringe_calibration::product::DENSITY_LIMITS_KG_M3;
    let max = fringe_calibration::fit::product::MAX_DENSITY_KG_M3;
    if v.is_finite() && v >= lo && v <= max {
        Ok(v)
    } else if v.is_finite() && v > 0.0 && v < lo {
        Err(format!(
            "{s} kg/m^3 is below {lo}: a density in g/cm^3 given for kg/m^3? ({s} g/cm^3 is {} kg/m^3)",
            v * 1000.0
        ))
    } else {
        Err(format!("{s} is not a density of {lo} to {max} kg/m^3"))
    }
}

/// A number of cross-validation folds: 0 (automatic) or at least 2.
fn folds(s: &str) -> Result<usize, String> {
    match s.trim().parse::<usize>() {
        Ok(1) => Err("1 fold cannot cross-validate: give 0 (automatic) or at least 2".into()),
        Ok(v) => Ok(v),
        Err(_) => Err(format!("`{s}` is not a whole number of folds")),
    }
}

/// A noise standard deviation: a positive finite number.
fn noise_sd(s: &str) -> Result<f64, String> {
    let v = number(s)?;
    if v.is_finite() && v > 0.0 {
        Ok(v)
    } else {
        Err(format!(
            "{s} is not a standard deviation above 0 (e.g. 0.02)"
        ))
    }
}

/// [`noise_sd`] as the device's f32.
fn noise_sd_f32(s: &str) -> Result<f32, String> {
    let v = noise_sd(s)? as f32;
    if v.is_finite() && v > 0.0 {
        Ok(v)
    } else {
        Err(format!(
            "{s} is not a standard deviation above 0 (e.g. 0.02)"
        ))
    }
}

/// A significance level above 0 and at most 0.5 (a test's alpha): a
/// confidence level typed in its place (0.95) is refused, not taken as an
/// alpha that makes every bias significant.
fn significance_level(s: &str) -> Result<f64, String> {
    let v = number(s)?;
    if v > 0.0 && v <= 0.5 {
        Ok(v)
    } else if (0.5..1.0).contains(&v) {
        Err(format!(
            "{s} is a confidence level, not a significance level: for {} % confidence give {}",
            (100.0 * v * 1e4).round() / 1e4,
            ((1.0 - v) * 1e6).round() / 1e6
        ))
    } else {
        Err(format!(
            "{s} is not a significance level above 0 and at most 0.5 (e.g. 0.05)"
        ))
    }
}

/// A confidence level between 0.5 and 1 (the prediction interval's).
fn confidence_level(s: &str) -> Result<f64, String> {
    let v = number(s)?;
    if v > 0.5 && v < 1.0 {
        Ok(v)
    } else {
        Err(format!(
            "{s} is not a confidence level between 0.5 and 1 (e.g. 0.95)"
        ))
    }
}
