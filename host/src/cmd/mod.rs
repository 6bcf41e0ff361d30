//! Command bodies. Each takes its argument struct from [`crate::cli`] and
//! the line configuration, and returns `anyhow::Result` (the error chain is
//! printed and mapped to an exit code by `main`).

pub mod device;
pub mod ingest;
pub mod monitor;
pub mod pull;
pub mod sim;

use std::time::Duration;

use crate::cli::PortArgs;
use crate::config::{ConfigError, LineConfig, DEFAULT_BAUD};
use crate::link::{Link, LinkError, LinkOptions};

/// Port and baud from the flags, else the line file, else the default baud.
///
/// # Errors
/// [`ConfigError::Missing`] when no port is given anywhere.
pub fn resolve_port(args: &PortArgs, cfg: &LineConfig) -> Result<(String, u32), ConfigError> {
    let port = args
        .port
        .clone()
        .or_else(|| cfg.port.clone())
        .ok_or(ConfigError::Missing {
            what: "serial port",
            flag: "--port",
            key: "port",
        })?;
    Ok((port, args.baud.or(cfg.baud).unwrap_or(DEFAULT_BAUD)))
}

/// Link options from the flags.
pub fn link_options(args: &PortArgs) -> LinkOptions {
    LinkOptions {
        timeout: Duration::from_millis(args.timeout_ms),
        ..LinkOptions::default()
    }
}

/// Opens the port named by flags or line file and runs the handshake.
///
/// # Errors
/// [`ConfigError`] or [`LinkError`].
pub fn connect(args: &PortArgs, cfg: &LineConfig) -> anyhow::Result<Link> {
    let (port, baud) = resolve_port(args, cfg)?;
    let link: Result<Link, LinkError> = Link::serial(&port, baud, link_options(args));
    Ok(link?)
}
