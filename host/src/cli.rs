//! Command-line definition (clap derive, no I/O).

use clap::{Parser, Subcommand};

/// fringe: host tool for the Fringe inline moisture sensor.
#[derive(Debug, Parser)]
#[command(name = "fringe", version, about, long_about = None)]
pub struct Cli {
    /// What to do.
    #[command(subcommand)]
    pub command: Command,
}

/// Commands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run the whole job on simulated devices (not built yet: prints what is missing).
    Demo,
}

#[cfg(test)]
mod tests {
    use super::*;
    use clap::CommandFactory;

    #[test]
    fn verify_cli() {
        Cli::command().debug_assert();
    }
}
