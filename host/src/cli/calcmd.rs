//! The command line of `fringe cal`: its subcommands and their arguments.
use super::cal::{AdjustArgs, FitArgs, PredictArgs};
use crate::cli::quality::HistoryArgs;
use crate::cli::PortArgs;
use clap::{Args, Subcommand};
use std::path::PathBuf;

/// `fringe cal`.
#[derive(Debug, Clone, Args)]
pub struct CalArgs {
    /// What to do.
    #[command(subcommand)]
    pub command: CalCommand,
}

/// `fringe cal ...`.
#[derive(Debug, Clone, Subcommand)]
pub enum CalCommand {
    /// Fit a product calibration from reference samples (statistics, outliers, valid ranges).
    Fit(FitArgs),
    /// Evaluate a product calibration on a sample table exactly as the device does.
    Predict(PredictArgs),
    /// Bias/slope check of a calibration against lab pairs (ISO 12099 tests); write the corrected one.
    Adjust(AdjustArgs),
    /// Bench cell calibration: air, a reference liquid, verification with a further liquid.
    Cell(CellArgs),
    /// Record reference samples from a connected device.
    Capture(CaptureArgs),
    /// Write a product calibration to the device (authenticated, read back, audited).
    Push(PushArgs),
    /// List the product calibrations on the device and which is active.
    List(ListArgs),
    /// Switch the active product (authenticated, audited).
    Select(SelectArgs),
    /// Every calibration change recorded in a database.
    History(HistoryArgs),
}

/// Where the device key comes from.
#[derive(Debug, Clone, Args)]
pub struct KeyArgs {
    /// File holding the device's write key as 64 hex digits (keep it like a
    /// password) [default: `key_file` in the line file].
    #[arg(long, value_name = "FILE")]
    pub key_file: Option<PathBuf>,
}

/// `fringe cal cell`.
#[derive(Debug, Clone, Args)]
#[command(
    after_help = "Example:\n  fringe cal cell --port /dev/ttyUSB0 --key-file hgm-l2-0007.key --db line2.db \\\n      --liquid methanol --verify-liquid ethanol --temperature-c 21.4 --operator \"R. Okafor\""
)]
pub struct CellArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// The key.
    #[command(flatten)]
    pub key: KeyArgs,
    /// Database that records the calibration [default: `db` in the line file].
    #[arg(long, value_name = "FILE")]
    pub db: Option<PathBuf>,
    /// Reference liquid for the second point (from the calibration crate's table).
    #[arg(long, default_value = "methanol")]
    pub liquid: String,
    /// A further liquid to verify with.
    #[arg(long, default_value = "ethanol")]
    pub verify_liquid: String,
    /// Liquid temperature, C, measured with a thermometer [default: the device's temperature reading].
    #[arg(long)]
    pub temperature_c: Option<f64>,
    /// The verification liquid's temperature, C, measured with a thermometer (its beaker may be warmer or cooler) [default: --temperature-c if given, else the device's temperature reading].
    #[arg(long)]
    pub verify_temperature_c: Option<f64>,
    /// Readings averaged per step.
    #[arg(long, default_value_t = 8, value_parser = clap::value_parser!(u32).range(1..=200))]
    pub readings: u32,
    /// Who does the calibration.
    #[arg(long)]
    pub operator: String,
    /// Do not ask before writing.
    #[arg(long)]
    pub yes: bool,
    /// Print the result as one JSON object (docs/JSON.md); the guide's steps stay on stderr.
    #[arg(long)]
    pub json: bool,
}

/// `fringe cal capture`.
#[derive(Debug, Clone, Args)]
#[command(after_help = "Example:\n  fringe cal capture --port /dev/ttyUSB0 --out lab-2026-11.csv")]
pub struct CaptureArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// Reference-sample table to write (appended to if it exists).
    #[arg(long, value_name = "FILE.csv")]
    pub out: PathBuf,
    /// Readings averaged per sample.
    #[arg(long, default_value_t = 5, value_parser = clap::value_parser!(u32).range(1..=200))]
    pub readings: u32,
    /// Basis of the lab moisture values asked for (`cal fit --basis` must
    /// be the same): wet (water / wet mass, below 100 %) or dry (water /
    /// dry mass, below 1000 %).
    #[arg(long, value_parser = ["wet", "dry"], default_value = "wet")]
    pub basis: String,
    /// Print the result as one JSON object (docs/JSON.md); the guide's steps stay on stderr.
    #[arg(long)]
    pub json: bool,
}

/// `fringe cal push`.
#[derive(Debug, Clone, Args)]
#[command(
    after_help = "Example:\n  fringe cal push --port /dev/ttyUSB0 --key-file hgm-l2-0007.key --db line2.db \\\n      --cal wheat-l2.toml --operator \"R. Okafor\" --reason \"new wheat crop, 40 samples\""
)]
pub struct PushArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// The key.
    #[command(flatten)]
    pub key: KeyArgs,
    /// Product calibration (TOML from `fringe cal fit`).
    #[arg(long, value_name = "PRODUCT.toml")]
    pub cal: PathBuf,
    /// Database that records the change [default: `db` in the line file].
    #[arg(long, value_name = "FILE")]
    pub db: Option<PathBuf>,
    /// Product slot [default: the slot holding this product name, else the first free one].
    #[arg(long, value_parser = clap::value_parser!(u8).range(0..8))]
    pub slot: Option<u8>,
    /// Who makes the change.
    #[arg(long)]
    pub operator: String,
    /// Why.
    #[arg(long)]
    pub reason: String,
    /// Make it the active product too.
    #[arg(long, default_value_t = true, action = clap::ArgAction::Set)]
    pub activate: bool,
    /// Do not ask for confirmation.
    #[arg(long)]
    pub yes: bool,
    /// Push even if the calibration fails the quality gate (RPD < 2, R^2 < 0.8,
    /// fewer than 5 samples per parameter, a range set by one sample); the
    /// override is kept in the audit record.
    #[arg(long)]
    pub force: bool,
    /// Print the result as one JSON object (docs/JSON.md); the guide's steps stay on stderr.
    #[arg(long)]
    pub json: bool,
}

/// `fringe cal list`.
#[derive(Debug, Clone, Args)]
pub struct ListArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// Print JSON.
    #[arg(long)]
    pub json: bool,
}

/// `fringe cal select`.
#[derive(Debug, Clone, Args)]
#[command(
    after_help = "Example:\n  fringe cal select --port /dev/ttyUSB0 --key-file k.key --db line2.db \"HM barley L2\" --operator \"R. Okafor\" --reason \"product change\""
)]
pub struct SelectArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// The key.
    #[command(flatten)]
    pub key: KeyArgs,
    /// Database that records the change [default: `db` in the line file].
    #[arg(long, value_name = "FILE")]
    pub db: Option<PathBuf>,
    /// Product name or slot number.
    pub product: String,
    /// Who makes the change.
    #[arg(long)]
    pub operator: String,
    /// Why.
    #[arg(long)]
    pub reason: String,
    /// Do not ask for confirmation.
    #[arg(long)]
    pub yes: bool,
    /// Print the result as one JSON object (docs/JSON.md); the guide's steps stay on stderr.
    #[arg(long)]
    pub json: bool,
}
