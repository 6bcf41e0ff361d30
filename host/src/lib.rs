//! # fringe-host: the `fringe` command-line tool
//!
//! Library half of the host tool (docs/DESIGN.md stages `link`, `store`, `watch`,
//! `audit`); `main.rs` only parses, runs and maps the result to an exit code.
//!
//! - [`cli`]: the command line (clap derive, no I/O);
//! - [`config`]: the line configuration file and TOML loading;
//! - [`link`]: a connection to a device (handshake, requests, reconnect);
//! - [`session`]: the line session's logic without a terminal: the device
//!   clock on each connection, which parts of the device log to read;
//! - [`sim`]: the simulated device on a pseudo-terminal, scenario files;
//! - [`store`]: the durable log (SQLite, append-only, hash chain);
//! - [`drift`]: drift monitors; [`samples`]: reference-sample files;
//! - [`cal`], [`device_cal`], [`product_file`]: product and cell calibration;
//! - [`analysis`], [`quality`], [`report`], [`plots`], [`audit`]: drift, lab
//!   checks, reports and audit bundles over a store;
//! - [`demo`] on [`simport`]: the whole job on a simulated device in this process;
//! - [`cmd`]: the command bodies; [`exit`]: the exit codes.
#![forbid(unsafe_code)]
#![warn(missing_docs)]

/// `println!` that returns the write error instead of panicking (a closed
/// pipe, as in `fringe drift --json | head`, then ends the command quietly).
#[macro_export]
macro_rules! outln {
    ($($t:tt)*) => {{
        use std::io::Write as _;
        writeln!(std::io::stdout().lock(), $($t)*)?;
    }};
}

pub use fringe_quality::{analysis, audit, drift, plots, product_file, report, samples, timefmt};
pub mod cli;
pub mod cmd;
pub mod config;
pub mod demo;
pub mod demo_folder;
pub mod exit;
pub use fringe_link as link;
pub mod out;
pub mod quality;
pub mod store;
pub mod terminal;

use cli::{Cli, Command};
use config::LineConfig;

/// A flag set by Ctrl-C (SIGINT) or SIGTERM, for commands that stop cleanly.
///
/// # Errors
/// If the handler cannot be installed.
pub fn stop_flag() -> anyhow::Result<std::sync::Arc<std::sync::atomic::AtomicBool>> {
    use std::sync::atomic::{AtomicBool, Ordering};
    use std::sync::Arc;
    let flag = Arc::new(AtomicBool::new(false));
    let f = flag.clone();
    ctrlc::set_handler(move || f.store(true, Ordering::Relaxed))
        .map_err(|e| anyhow::anyhow!("cannot install the Ctrl-C handler: {e}"))?;
    Ok(flag)
}

/// Runs one parsed command line.
///
/// # Errors
/// The command's error; [`exit::ExitCode::for_error`] maps it to an exit code.
pub fn run(cli: Cli) -> anyhow::Result<()> {
    // For the gateway, --config names the site file, not a line file.
    let cfg = match (&cli.config, &cli.command) {
        (_, Command::Gateway(_)) | (None, _) => LineConfig::default(),
        (Some(p), _) => LineConfig::load(p)?,
    };
    timefmt::set_utc(cli.utc);
    match &cli.command {
        Command::Identify(a) => cmd::device::identify(a, &cfg),
        Command::Status(a) => cmd::device::status(a, &cfg),
        Command::Sim(a) => cmd::sim::sim(a, &*stop_flag()?),
        Command::Monitor(a) => cmd::monitor::monitor(a, &cfg, &*stop_flag()?),
        Command::Pull(a) => cmd::pull::pull(a, &cfg),
        Command::Device(a) => cmd::device::device(a, &cfg),
        Command::Cal(a) => cmd::quality::cal(a, &cfg),
        Command::Lab(a) => cmd::quality::lab(a, &cfg),
        Command::Drift(a) => quality::drift(a, &cfg),
        Command::Report(a) => {
            let page = quality::report(a, &cfg)?;
            if a.json {
                let dir = page.parent().unwrap_or(&a.out);
                let files: Vec<String> = ["index.html", "trend.svg", "drift.svg"]
                    .iter()
                    .map(|f| dir.join(f))
                    .filter(|p| p.exists())
                    .map(|p| p.display().to_string())
                    .collect();
                out::json(&serde_json::json!({
                    "page": page.display().to_string(),
                    "files": files,
                }))?;
            } else {
                outln!("wrote {} (open it in a browser)", page.display());
            }
            Ok(())
        }
        Command::Audit(a) => quality::audit_cmd(a, &cfg),
        Command::Export(a) => quality::export_cmd(a, &cfg),
        Command::Demo(a) => demo::run(a).map(|_| ()),
        Command::Gateway(a) => cmd::gateway::gateway(a, cli.config.as_deref(), stop_flag()?),
    }
}
