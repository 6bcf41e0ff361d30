//! Command-line definition (clap derive, no I/O).
//!
//! Every command's arguments are a struct; commands of other modules add a
//! variant to [`Command`] with their own argument struct.

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand};

/// fringe: host tool for the Fringe inline moisture sensor.
#[derive(Debug, Parser)]
#[command(
    name = "fringe",
    version,
    about,
    long_about = None,
    after_help = "Exit codes are listed in the README (0 success, 2 usage, 3 bad file, 10-16 port and device, 20-23 database)."
)]
pub struct Cli {
    /// Line configuration file (TOML: port, baud, db, alarm limits); flags override it.
    #[arg(long, global = true, value_name = "FILE")]
    pub config: Option<PathBuf>,

    /// What to do.
    #[command(subcommand)]
    pub command: Command,
}

/// Commands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Show the device's identity: serial, firmware, protocol, frequencies.
    #[command(
        after_help = "Example:\n  fringe identify --port /dev/ttyUSB0\n  fringe identify --port /dev/ttyUSB0 --json"
    )]
    Identify(IdentifyArgs),
    /// Show the device's status: time, counters, calibrations in force, flags.
    #[command(
        after_help = "Example:\n  fringe status --port /dev/ttyUSB0\n  fringe --config line2.toml status --json"
    )]
    Status(StatusArgs),
    /// Run the whole job on simulated devices (not built yet: prints what is missing).
    Demo,
}

/// Which port, at which speed.
#[derive(Debug, Clone, Args)]
pub struct PortArgs {
    /// Serial port of the device (e.g. /dev/ttyUSB0, or the path `fringe sim` prints).
    #[arg(long, short = 'p', value_name = "PORT")]
    pub port: Option<String>,
    /// Baud rate [default: 115200, or `baud` in the line file].
    #[arg(long, short = 'b', value_name = "BAUD", value_parser = clap::value_parser!(u32).range(300..=4_000_000))]
    pub baud: Option<u32>,
    /// Wait for each answer, ms.
    #[arg(long, value_name = "MS", default_value_t = 400, value_parser = clap::value_parser!(u64).range(10..=60_000))]
    pub timeout_ms: u64,
}

/// `fringe identify`.
#[derive(Debug, Clone, Args)]
pub struct IdentifyArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// Print JSON instead of text.
    #[arg(long)]
    pub json: bool,
}

/// `fringe status`.
#[derive(Debug, Clone, Args)]
pub struct StatusArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// Print JSON instead of text.
    #[arg(long)]
    pub json: bool,
}

#[cfg(test)]
mod tests {
    use super::*;
    use clap::CommandFactory;

    #[test]
    fn verify_cli() {
        Cli::command().debug_assert();
    }

    #[test]
    fn bad_baud_is_a_usage_error() {
        let e = Cli::try_parse_from(["fringe", "status", "--baud", "12"]).unwrap_err();
        assert_eq!(e.kind(), clap::error::ErrorKind::ValueValidation);
    }
}
