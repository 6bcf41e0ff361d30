//! `fringe gateway` arguments.

use clap::Args;

/// `fringe gateway --config SITE.toml`.
#[derive(Debug, Clone, Args)]
pub struct GatewayArgs {
    /// Status lines as JSON objects on stdout, one per line (each device
    /// every `status_every_s` of the site file, then a summary object).
    #[arg(long)]
    pub json: bool,
    /// Stop after this many seconds (default: until Ctrl-C or SIGTERM).
    #[arg(long, value_name = "S")]
    pub duration_s: Option<f64>,
    /// Wait for each answer of a device, ms.
    #[arg(long, value_name = "MS", default_value_t = 400, value_parser = clap::value_parser!(u64).range(10..=60_000))]
    pub timeout_ms: u64,
}
