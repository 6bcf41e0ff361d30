//! The command lines of `fringe lab`, `drift`, `report` and `audit`.
use crate::timefmt::{parse_time, parse_time_end};
use clap::{Args, Subcommand};
use std::path::PathBuf;

/// `fringe lab`.
#[derive(Debug, Clone, Args)]
pub struct LabArgs {
    /// What to do.
    #[command(subcommand)]
    pub command: LabCommand,
}

/// `fringe lab ...`.
#[derive(Debug, Clone, Subcommand)]
pub enum LabCommand {
    /// Record a lab grab-sample result against the inline reading at that time.
    #[command(
        after_help = "Example:\n  fringe lab add --db line2.db --time 2026-12-01T09:40Z --moisture 14.2 \\\n      --method \"oven 130 C 2 h, ground\" --operator \"R. Okafor\" --sample-id G-0412"
    )]
    Add(LabAddArgs),
}

/// `fringe lab add`.
#[derive(Debug, Clone, Args)]
pub struct LabAddArgs {
    /// Database: a file, or a PostgreSQL URL postgres://USER@HOST:PORT/DB
    /// [default: `db` in the line file].
    #[arg(long, value_name = "FILE|URL")]
    pub db: Option<PathBuf>,
    /// When the sample was taken: RFC 3339 with an offset
    /// (2026-12-01T09:40+01:00, 2026-12-01T08:40Z); without an offset
    /// (2026-12-01 09:40) it is local time.
    #[arg(long, value_name = "T", value_parser = parse_time)]
    pub time: i64,
    /// Lab moisture, % (basis as --basis; 0 to 100 wet, 0 to 1000 dry).
    /// A negative value is read as a number (and refused with its range).
    #[arg(long, value_name = "PCT", allow_negative_numbers = true)]
    pub moisture: f64,
    /// Reference method (e.g. "oven 130 C 2 h, ground").
    #[arg(long)]
    pub method: String,
    /// Who took and measured it.
    #[arg(long)]
    pub operator: String,
    /// The lab's sample id [default: LAB-<time>].
    #[arg(long)]
    pub sample_id: Option<String>,
    /// Correct the lab sample recorded at this chain position (the refusal
    /// of a repeated sample id names it): the old record stays, the new
    /// one says it supersedes it.
    #[arg(long, value_name = "POSITION")]
    pub supersedes: Option<u64>,
    /// Device serial [default: the database's only device].
    #[arg(long)]
    pub serial: Option<String>,
    /// Moisture basis of the lab value.
    #[arg(long, value_parser = ["wet", "dry"], default_value = "wet")]
    pub basis: String,
    /// Furthest a matched reading may lie from --time, s.
    #[arg(long, default_value_t = 300)]
    pub match_within_s: i64,
    /// Print the result as JSON.
    #[arg(long)]
    pub json: bool,
}

/// `fringe drift`.
#[derive(Debug, Clone, Args)]
#[command(
    after_help = "Example:\n  fringe drift --db line2.db\n  fringe drift --db line2.db --plot drift.svg --json"
)]
pub struct DriftArgs {
    /// Database: a file, or a PostgreSQL URL postgres://USER@HOST:PORT/DB
    /// [default: `db` in the line file].
    #[arg(long, value_name = "FILE|URL")]
    pub db: Option<PathBuf>,
    /// Device serial [default: the first device].
    #[arg(long)]
    pub serial: Option<String>,
    /// Draw the control charts to this SVG file.
    #[arg(long, value_name = "FILE.svg")]
    pub plot: Option<PathBuf>,
    /// Print JSON.
    #[arg(long)]
    pub json: bool,
}

/// `fringe report`.
#[derive(Debug, Clone, Args)]
#[command(
    after_help = "Example:\n  fringe report --db line2.db --out report/   # then open report/index.html"
)]
pub struct ReportArgs {
    /// Database: a file, or a PostgreSQL URL postgres://USER@HOST:PORT/DB
    /// [default: `db` in the line file].
    #[arg(long, value_name = "FILE|URL")]
    pub db: Option<PathBuf>,
    /// Output folder (index.html and the plots as SVG files).
    #[arg(long, value_name = "DIR")]
    pub out: PathBuf,
    /// Device serial [default: the first device].
    #[arg(long)]
    pub serial: Option<String>,
    /// Page title.
    #[arg(long)]
    pub title: Option<String>,
    /// Print what was written as one JSON object (docs/JSON.md).
    #[arg(long)]
    pub json: bool,
}

/// `fringe cal history`.
#[derive(Debug, Clone, Args)]
pub struct HistoryArgs {
    /// Database: a file, or a PostgreSQL URL postgres://USER@HOST:PORT/DB
    /// [default: `db` in the line file].
    #[arg(long, value_name = "FILE|URL")]
    pub db: Option<PathBuf>,
    /// Device serial [default: every device].
    #[arg(long)]
    pub serial: Option<String>,
    /// Print JSON.
    #[arg(long)]
    pub json: bool,
}

/// `fringe audit`.
#[derive(Debug, Clone, Args)]
pub struct AuditArgs {
    /// What to do.
    #[command(subcommand)]
    pub command: AuditCommand,
}

/// `fringe audit ...`.
#[derive(Debug, Clone, Subcommand)]
pub enum AuditCommand {
    /// Write a tamper-evident bundle of the records in a time range.
    #[command(
        after_help = "Example:\n  fringe audit export --db line2.db --from 2026-12-01T06:00Z --to 2026-12-01T14:00Z --out audit-2026-12-01"
    )]
    Export(AuditExportArgs),
    /// Check a bundle (and/or a database) and report every changed, removed or reordered record.
    #[command(
        after_help = "Example:\n  fringe audit verify audit-2026-12-01\n  fringe audit verify audit-2026-12-01 --db line2.db\n  fringe audit verify --db line2.db"
    )]
    Verify(AuditVerifyArgs),
}

/// `fringe audit export`.
#[derive(Debug, Clone, Args)]
pub struct AuditExportArgs {
    /// Database: a file, or a PostgreSQL URL postgres://USER@HOST:PORT/DB
    /// [default: `db` in the line file].
    #[arg(long, value_name = "FILE|URL")]
    pub db: Option<PathBuf>,
    /// Start of the range [default: the beginning]: RFC 3339 with an
    /// offset (2026-12-01T06:00+01:00, ...Z); without an offset it is local
    /// time. Readings taken before the device clock was set count at their
    /// re-based wall-clock time.
    #[arg(long, value_name = "T", value_parser = parse_time)]
    pub from: Option<i64>,
    /// End of the range [default: now], included as written: to the second
    /// the whole second, to the minute the whole minute, a date its whole
    /// day; otherwise as --from.
    #[arg(long, value_name = "T", value_parser = parse_time_end)]
    pub to: Option<i64>,
    /// Output folder (created; must not hold files).
    #[arg(long, value_name = "DIR")]
    pub out: PathBuf,
    /// Print the manifest as JSON.
    #[arg(long)]
    pub json: bool,
}

/// `fringe audit verify`.
#[derive(Debug, Clone, Args)]
pub struct AuditVerifyArgs {
    /// Bundle folder.
    #[arg(value_name = "DIR")]
    pub dir: Option<PathBuf>,
    /// Database to check (its integrity, its own chain, and the bundle
    /// against it): a file or a postgres:// URL [default without a bundle:
    /// `db` in the line file].
    #[arg(long, value_name = "FILE|URL")]
    pub db: Option<PathBuf>,
    /// Print JSON.
    #[arg(long)]
    pub json: bool,
}

/// `fringe export`.
#[derive(Debug, Clone, Args)]
pub struct ExportArgs {
    /// Database: a file, or a PostgreSQL URL postgres://USER@HOST:PORT/DB
    /// [default: `db` in the line file].
    #[arg(long, value_name = "FILE|URL")]
    pub db: Option<PathBuf>,
    /// First time exported (included) [default: the first record]: RFC 3339
    /// with an offset (2026-12-01T06:00+01:00, ...Z); without an offset it
    /// is local time; a date alone is its local midnight. Records taken
    /// before the device clock was set count at their re-based time; those
    /// with no wall-clock time at all are left out of a range and counted.
    #[arg(long, value_name = "T", value_parser = parse_time)]
    pub from: Option<i64>,
    /// Last time exported (included as written: to the second the whole
    /// second, as the export shows times; to the minute the whole minute; a
    /// date its whole day) [default: the last record]; as --from.
    #[arg(long, value_name = "T", value_parser = parse_time_end)]
    pub to: Option<i64>,
    /// Device serial; repeat for several [default: every device of the database].
    #[arg(long = "device", value_name = "SERIAL")]
    pub devices: Vec<String>,
    /// What to export.
    #[arg(long, value_parser = ["readings", "events", "lab"], default_value = "readings")]
    pub what: String,
    /// File format [default: from the --out file's extension (.csv, .jsonl), else csv].
    #[arg(long, value_parser = ["csv", "jsonl"])]
    pub format: Option<String>,
    /// Output file (a new one: an existing file is never overwritten)
    /// [default: stdout].
    #[arg(long, value_name = "FILE")]
    pub out: Option<PathBuf>,
    /// Print the summary as JSON on stdout (needs --out: without it stdout
    /// carries the export).
    #[arg(long)]
    pub json: bool,
}
