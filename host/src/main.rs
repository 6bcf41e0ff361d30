#![forbid(unsafe_code)]
use clap::Parser;
use fringe_host::cli::{Cli, Command};
use std::process::ExitCode;

fn main() -> ExitCode {
    let cli = Cli::parse();
    match cli.command {
        Command::Demo => {
            eprintln!("fringe demo: placeholder. The simulated device and the calibration workflow are not built yet; see the open issues.");
            ExitCode::from(2)
        }
    }
}
