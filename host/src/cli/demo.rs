//! The command line of `fringe demo`.
use clap::Args;
use std::path::PathBuf;

/// `fringe demo`.
#[derive(Debug, Clone, Args)]
#[command(after_help = "Example:\n  fringe demo\n  fringe demo --out /tmp/hgm --short")]
pub struct DemoArgs {
    /// Output folder: a new or empty folder, or one a previous demo wrote (its
    /// files are replaced); a folder holding anything else is refused, nothing deleted.
    #[arg(long, value_name = "DIR", default_value = "fringe-demo")]
    pub out: PathBuf,
    /// A shorter run (2 h shift, fewer reference samples) for tests.
    #[arg(long)]
    pub short: bool,
    /// Seed of the simulated world (the same seed gives the same run).
    #[arg(long, default_value_t = 2026)]
    pub seed: u64,
}
