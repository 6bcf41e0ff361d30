//! Command bodies. Each takes its argument struct from [`crate::cli`] and
//! the line configuration, and returns `anyhow::Result` (the error chain is
//! printed and mapped to an exit code by `main`).

pub mod cal;
pub mod device;
pub mod ingest;
pub mod monitor;
pub mod pull;
pub mod quality;
pub mod sim;

use std::path::{Path, PathBuf};
use std::time::Duration;

use anyhow::Context as _;
use fringe_protocol::{Identity, Request, Response, Status};

use crate::cli::PortArgs;
use crate::config::{ConfigError, LineConfig, DEFAULT_BAUD};
use crate::link::{Link, LinkError, LinkOptions};
use crate::store::{DeviceInfo, Store};

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

/// Handshakes tried before a garbled or silent line is reported.
pub const HANDSHAKES: u32 = 3;

/// Opens the port named by flags or line file and runs the handshake
/// (up to [`HANDSHAKES`] times on a garbled or silent line).
///
/// # Errors
/// [`ConfigError`] or [`LinkError`].
pub fn connect(args: &PortArgs, cfg: &LineConfig) -> anyhow::Result<Link> {
    let (port, baud) = resolve_port(args, cfg)?;
    // A noisy line can spoil one handshake; a wrong baud rate or a silent
    // device spoils every one.
    let mut tries = 0;
    loop {
        tries += 1;
        match Link::serial(&port, baud, link_options(args)) {
            Ok(link) => return Ok(link),
            Err(e @ (LinkError::Garbled { .. } | LinkError::NoAnswer { .. }))
                if tries < HANDSHAKES =>
            {
                let _ = e;
            }
            Err(e) => return Err(e.into()),
        }
    }
}

/// The device key from `--key-file`, else the line file's `key_file`, if any.
///
/// # Errors
/// An unreadable key file or one that is not 64 hex digits.
pub fn optional_key(
    flag: Option<&Path>,
    cfg: &LineConfig,
) -> anyhow::Result<Option<fringe_protocol::auth::Key>> {
    match flag.map(Path::to_path_buf).or_else(|| cfg.key_file.clone()) {
        Some(p) => Ok(Some(crate::device_cal::load_key(&p)?)),
        None => Ok(None),
    }
}

/// The device clock on a connection: set when it is unset or off by more
/// than a second and a key is at hand ([`crate::session::sync_clock`]);
/// the result said on stderr in one line (nothing when it was right).
///
/// # Errors
/// Link errors; a refused write (wrong key).
pub fn sync_clock(
    link: &mut Link,
    key: Option<&fringe_protocol::auth::Key>,
    who: &str,
) -> anyhow::Result<crate::session::ClockSync> {
    use crate::session::ClockCheck;
    let s = match crate::session::sync_clock(link, key, &|| crate::store::now_unix_ms()) {
        Ok(s) => s,
        // A refused clock write (a wrong key) is said and left: the
        // command's own write, if any, meets the same refusal with its
        // own message.
        Err(e @ LinkError::Refused { .. }) => {
            eprintln!("fringe {who}: the device clock was not set: {e}");
            return crate::session::sync_clock(link, None, &|| crate::store::now_unix_ms())
                .context("checking the device clock");
        }
        Err(e) => return Err(anyhow::Error::new(e).context("checking the device clock")),
    };
    let was = match s.before {
        ClockCheck::Unset { since_boot_ms } => format!(
            "was not set ({} since boot)",
            crate::out::duration_ms(since_boot_ms)
        ),
        ClockCheck::Set { off_ms, .. } => format!("was off by {:+.3} s", off_ms as f64 / 1000.0),
    };
    if let Some(t) = s.set_to_ms {
        eprintln!(
            "fringe {who}: device clock {was}; set to {} (the device logs the change as a clock_set event)",
            crate::timefmt::fmt_time(t)
        );
    } else if s.needs_key {
        eprintln!(
            "fringe {who}: device clock {was}; give --key-file (or key_file in the line file) to set it"
        );
    }
    Ok(s)
}

/// Opens the database named by `--db` or the line file.
///
/// # Errors
/// [`ConfigError::Missing`] when neither names one; [`crate::store::StoreError`].
pub fn open_db(db: Option<&Path>, cfg: &LineConfig) -> anyhow::Result<(PathBuf, Store)> {
    let db = db
        .map(Path::to_path_buf)
        .or_else(|| cfg.db.clone())
        .ok_or(ConfigError::Missing {
            what: "database",
            flag: "--db",
            key: "db",
        })?;
    let store = Store::open(&db)?;
    Ok((db, store))
}

/// Records the device of a handshake in the store; returns its serial.
///
/// # Errors
/// [`crate::store::StoreError`].
pub fn register(store: &mut Store, id: &Identity) -> anyhow::Result<String> {
    let serial = id.serial.to_string();
    store.ensure_device(&DeviceInfo {
        serial: serial.clone(),
        firmware: Some(format!(
            "{}.{}.{}",
            id.firmware[0], id.firmware[1], id.firmware[2]
        )),
        protocol: Some(id.protocol.to_string()),
        freqs_hz: Some(id.freqs_hz),
    })?;
    Ok(serial)
}

/// Asks the device for its status.
///
/// # Errors
/// [`LinkError`].
pub fn request_status(link: &mut Link) -> Result<Status, LinkError> {
    match link.request(Request::Status)? {
        Response::Status(s) => Ok(s),
        other => Err(LinkError::Unexpected {
            request: "Status",
            got: format!("{other:?}"),
        }),
    }
}
