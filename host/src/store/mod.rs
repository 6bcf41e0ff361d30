//! The durable log: the record model and hash chain of `fringe-store`, on
//! the SQLite back end of `fringe-sqlite` (`host/SCHEMA.md`).

pub use fringe_sqlite::{Store, BUSY_TIMEOUT, SCHEMA_VERSION};
pub use fringe_store::chain;
pub use fringe_store::record::{
    CalibrationRecord, DeviceRecord, LabSampleRecord, LoggedReading, RefCheckRecord,
};
pub use fringe_store::*;

use std::path::Path;

/// A store opened from a `--db` value (or a line file's `db`): a SQLite
/// file, or a PostgreSQL database named by a `postgres://` URL
/// (`fringe-postgres`). Commands that only read or add records go through
/// the store traits and work on both.
pub enum AnyStore {
    /// A SQLite file.
    Sqlite(Store),
    /// A PostgreSQL database (boxed: the connection is the larger).
    Postgres(Box<fringe_postgres::Store>),
}

/// Whether `db` names a PostgreSQL database (`postgres://...`) rather
/// than a file.
pub fn is_postgres(db: &Path) -> bool {
    db.to_str().is_some_and(fringe_postgres::is_url)
}

/// `db` as it may be shown or written into a file (a URL without its
/// password).
pub fn db_label(db: &Path) -> String {
    match db.to_str() {
        Some(url) if fringe_postgres::is_url(url) => fringe_postgres::display_name(url),
        _ => db.display().to_string(),
    }
}

impl AnyStore {
    /// Opens `db` to read only: a SQLite file read-only, or a read-only
    /// PostgreSQL session (never migrates, refuses writes).
    ///
    /// # Errors
    /// [`StoreError`] naming the database (a URL without its password).
    pub fn open_read_only(db: &Path) -> Result<Self, StoreError> {
        match db.to_str() {
            Some(url) if fringe_postgres::is_url(url) => {
                fringe_postgres::Store::connect_read_only(url)
                    .map(|s| AnyStore::Postgres(Box::new(s)))
            }
            _ => Store::open_read_only(db).map(AnyStore::Sqlite),
        }
    }

    /// Opens `db` to add records to a store that exists (never creates a
    /// file or a store).
    ///
    /// # Errors
    /// [`StoreError`] naming the database.
    pub fn open_existing(db: &Path) -> Result<Self, StoreError> {
        match db.to_str() {
            Some(url) if fringe_postgres::is_url(url) => {
                fringe_postgres::Store::connect_existing(url)
                    .map(|s| AnyStore::Postgres(Box::new(s)))
            }
            _ => Store::open_existing(db).map(AnyStore::Sqlite),
        }
    }

    /// The store behind the traits.
    pub fn get(&self) -> &dyn RecordStore {
        match self {
            AnyStore::Sqlite(s) => s,
            AnyStore::Postgres(s) => &**s,
        }
    }

    /// The store behind the traits, to write.
    pub fn get_mut(&mut self) -> &mut dyn RecordStore {
        match self {
            AnyStore::Sqlite(s) => s,
            AnyStore::Postgres(s) => &mut **s,
        }
    }

    /// The check a command runs when it opens a database to read: SQLite's
    /// quick check (costs in BENCHMARKS.md). A PostgreSQL server keeps its
    /// own storage and the check needs its `amcheck` extension, so there it
    /// runs in `audit verify` and `audit export` only.
    ///
    /// # Errors
    /// [`StoreError::Corrupt`]; [`StoreError`].
    pub fn check_on_open(&self) -> Result<(), StoreError> {
        match self {
            AnyStore::Sqlite(s) => s.check_integrity(false),
            AnyStore::Postgres(_) => Ok(()),
        }
    }

    /// Runs `f` on one consistent view of the store: on PostgreSQL a
    /// read-only REPEATABLE READ transaction (gateways may be writing);
    /// on SQLite one read transaction (found by review: each read was its
    /// own snapshot, so a device's rows could run later than another's).
    ///
    /// # Errors
    /// [`StoreError`] starting or ending the view.
    pub fn consistent<R>(&self, f: impl FnOnce(&dyn RecordRead) -> R) -> Result<R, StoreError> {
        match self {
            AnyStore::Sqlite(s) => s.read_snapshot(|s| Ok(f(s))),
            AnyStore::Postgres(s) => s.read_snapshot(|s| Ok(f(s))),
        }
    }
}

/// The commands that write through the SQLite back end only.
pub const WRITERS: &str =
    "`fringe monitor`, `pull`, `cal cell|push|select` and `device config set`";

/// A command that works on a SQLite file only was given a PostgreSQL URL.
#[derive(Debug, thiserror::Error)]
#[error("{command} write a SQLite file only, not {db}: give --db FILE (a PostgreSQL store is read by drift, report, cal history, cal adjust and audit, and takes lab samples from lab add)")]
pub struct SqliteOnly {
    /// The commands that need a file.
    pub command: &'static str,
    /// The database as given (without its password).
    pub db: String,
}

/// Refuses a PostgreSQL URL for `command` (the commands that write
/// through the SQLite back end only).
///
/// # Errors
/// [`SqliteOnly`] naming the URL (without its password).
pub fn sqlite_only(db: &Path) -> Result<(), SqliteOnly> {
    let command = WRITERS;
    if is_postgres(db) {
        return Err(SqliteOnly {
            command,
            db: db_label(db),
        });
    }
    Ok(())
}
