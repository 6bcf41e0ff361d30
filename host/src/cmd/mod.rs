//! Command bodies. Each takes its argument struct from [`crate::cli`] and
//! the line configuration, and returns `anyhow::Result` (the error chain is
//! printed and mapped to an exit code by `main`).

pub mod cal;
pub mod device;
pub mod gateway;
pub mod monitor;
pub mod pull;
pub mod quality;
pub mod sim;

use std::path::{Path, PathBuf};
use std::time::Duration;

use anyhow::Context as _;
use fringe_line::{ClockCheck, ClockSync, Note};

use crate::cli::PortArgs;
use crate::config::{ConfigError, LineConfig, DEFAULT_BAUD};
use crate::link::{Link, LinkError, LinkOptions};
use crate::store::Store;

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

/// Link options from the flags (handshakes tried before a garbled or
/// silent line is reported: [`HANDSHAKES`]).
pub fn link_options(args: &PortArgs) -> LinkOptions {
    LinkOptions {
        timeout: Duration::from_millis(args.timeout_ms),
        handshakes: HANDSHAKES,
        ..LinkOptions::default()
    }
}

/// Handshakes tried before a garbled or silent line is reported: a noisy
/// line can spoil one; a wrong baud rate or a silent device spoils every one.
pub const HANDSHAKES: u32 = 3;

/// Opens the port named by flags or line file and runs the handshake.
///
/// # Errors
/// [`ConfigError`] or [`LinkError`].
pub fn connect(args: &PortArgs, cfg: &LineConfig) -> anyhow::Result<Link> {
    let (port, baud) = resolve_port(args, cfg)?;
    Ok(Link::serial(&port, baud, link_options(args))?)
}

/// The error for a signed write without the device key: [`crate::config::ConfigError::Missing`]
/// (exit status 3, as a missing port or database), saying what needed it.
pub fn missing_key(what: &str) -> anyhow::Error {
    anyhow::Error::new(crate::config::ConfigError::Missing {
        what: "device key",
        flag: "--key-file",
        key: "key_file",
    })
    .context(format!(
        "{what} needs the device key (a signed write); nothing sent"
    ))
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
        Some(p) => {
            let key = fringe_device::key::load_key(&p)?;
            if let Some(w) = fringe_device::key::exposure(&p) {
                eprintln!("fringe: warning: {w}");
            }
            Ok(Some(key))
        }
        None => Ok(None),
    }
}

/// Says in one line on stderr what the clock check of a connection did
/// (nothing when the clock was right).
pub fn say_clock(who: &str, s: &ClockSync) {
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
    } else if s.too_far {
        eprintln!(
            "fringe {who}: device clock {was}, more than {} min: not set automatically (the device's clock or this computer's is wrong; readings keep the device's time meanwhile); check both, then set it with `fringe device clock --set`",
            fringe_line::CLOCK_AUTO_LIMIT_MS / 60_000
        );
    } else if s.needs_key {
        eprintln!(
            "fringe {who}: device clock {was}; give --key-file (or key_file in the line file) to set it"
        );
    }
}

/// Says on stderr what a line session or pull told, for the notes a
/// command without a view of its own shows.
pub fn say_note(who: &str, n: Note<'_>) {
    match n {
        Note::Clock(s) => say_clock(who, &s),
        Note::ClockRefused(e) => eprintln!("fringe {who}: the device clock was not set: {e}"),
        Note::SequenceBehind(e) => eprintln!("fringe {who}: WARNING: {e}"),
        Note::Lost { count, after } => eprintln!(
            "fringe {who}: {count} readings after {after} were no longer in the device log (lost)"
        ),
        Note::CalibrationObserved(o) => eprintln!("fringe {who}: {o}"),
        Note::CalibrationsNotRead(e) => eprintln!(
            "fringe {who}: the device's calibrations could not be read or recorded ({e}); going on"
        ),
        _ => {}
    }
}

/// The device clock on a connection: set when it is unset or off by more
/// than a second and a key is at hand ([`fringe_line::sync_clock`]); the
/// result said on stderr in one line (nothing when it was right).
///
/// # Errors
/// Link errors.
pub fn sync_clock(
    link: &mut Link,
    key: Option<&fringe_protocol::auth::Key>,
    who: &str,
) -> anyhow::Result<ClockSync> {
    let wall = crate::store::now_unix_ms;
    match fringe_line::sync_clock(link, key, &wall) {
        Ok(s) => {
            say_clock(who, &s);
            Ok(s)
        }
        // A refused clock write (a wrong key) is said and left: the
        // command's own write, if any, meets the same refusal with its
        // own message.
        Err(e @ LinkError::Refused { .. }) => {
            eprintln!("fringe {who}: the device clock was not set: {e}");
            fringe_line::sync_clock(link, None, &wall).context("checking the device clock")
        }
        Err(e) => Err(anyhow::Error::new(e).context("checking the device clock")),
    }
}

/// The database named by `--db` or the line file, checked before anything
/// is opened: an existing file must be a file; a new one's folder must exist.
///
/// # Errors
/// [`ConfigError::Missing`] when neither names one; a path that cannot be
/// a database file ([`crate::store::StoreError::CannotOpen`]).
pub fn db_path(db: Option<&Path>, cfg: &LineConfig) -> anyhow::Result<PathBuf> {
    let db = db
        .map(Path::to_path_buf)
        .or_else(|| cfg.db.clone())
        .ok_or(ConfigError::Missing {
            what: "database",
            flag: "--db",
            key: "db",
        })?;
    // Refused before any device is connected or file touched.
    crate::store::sqlite_only(&db)?;
    let cannot = |reason: String| crate::store::StoreError::CannotOpen {
        path: db.clone(),
        reason,
    };
    if db.is_dir() {
        return Err(cannot("it is a folder".into()).into());
    }
    if !db.exists() {
        match db.parent().filter(|p| !p.as_os_str().is_empty()) {
            Some(dir) if !dir.is_dir() => {
                return Err(cannot(format!("folder {} does not exist", dir.display())).into())
            }
            _ => {}
        }
    }
    Ok(db)
}

/// Opens (or creates) the database at `db` and runs `work` on it. When
/// `work` fails and this call created the file, the file is removed again
/// if it holds nothing but the device's registration (a failed command
/// leaves the disk as it was; a reading or any other record is never
/// removed).
///
/// # Errors
/// The store's error opening it, or what `work` returns.
pub fn with_db<T>(
    db: &Path,
    work: impl FnOnce(&mut Store) -> anyhow::Result<T>,
) -> anyhow::Result<T> {
    crate::store::sqlite_only(db)?;
    let existed = db.exists();
    let mut store = Store::open(db)?;
    let result = work(&mut store);
    drop(store);
    if result.is_err() && !existed {
        remove_if_unused(db);
    }
    result
}

/// Removes a database this command created if it holds no record but
/// device registrations (and its WAL and shared-memory files).
fn remove_if_unused(db: &Path) {
    let unused = Store::open_read_only(db).is_ok_and(|s| {
        let mut other = false;
        let walked = s.for_each_record(|r| {
            other |= r.table != fringe_store::Table::Devices;
            Ok(())
        });
        walked.is_ok() && !other
    });
    if unused {
        for p in [
            db.to_path_buf(),
            fringe_sqlite::wal_path(db),
            fringe_sqlite::shm_path(db),
        ] {
            let _ = std::fs::remove_file(p);
        }
    }
}
