//! Why a store operation failed.
//!
//! One error type for every back end, so that a caller (the binary's exit
//! codes, a gateway's retry policy) tells an I/O failure (locked,
//! read-only, disk full), a database it must not use (not ours, newer,
//! damaged) and a refused record apart without knowing the back end.

use std::path::PathBuf;

use crate::chain::Table;

/// Why a store operation failed. Each names the database.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum StoreError {
    /// Another process holds the database's write lock.
    #[error("{}", locked_words(path))]
    Locked {
        /// Database.
        path: PathBuf,
    },
    /// The database or its folder is read-only.
    #[error("database {path} is read-only: check the file's and its folder's permissions (WAL mode needs to create {path}-wal and {path}-shm beside it)")]
    ReadOnly {
        /// Database.
        path: PathBuf,
    },
    /// The disk (or the database's size limit) is full.
    #[error("disk full while writing database {path}: free space on that disk; readings not committed are still on the device and are pulled on the next run")]
    DiskFull {
        /// Database.
        path: PathBuf,
    },
    /// The database could not be opened or created.
    #[error("cannot open database {path}: {reason}")]
    CannotOpen {
        /// Database.
        path: PathBuf,
        /// What the system said.
        reason: String,
    },
    /// The file is not a database of this back end.
    #[error("{path} is not a fringe database (not SQLite, or encrypted)")]
    NotADatabase {
        /// Database.
        path: PathBuf,
    },
    /// The database is damaged (the back end's own check, or a read, found it).
    #[error("database {path} is damaged ({detail}); keep a copy of the file and {repair}")]
    Corrupt {
        /// Database.
        path: PathBuf,
        /// What was found.
        detail: String,
        /// What to do, for this back end.
        repair: String,
    },
    /// The database was written by a newer fringe.
    #[error("database {path} has schema version {found}; this fringe knows up to {known}: use a newer fringe")]
    NewerSchema {
        /// Database.
        path: PathBuf,
        /// Version found.
        found: u32,
        /// Highest version this build knows.
        known: u32,
    },
    /// The database holds tables but no fringe schema version.
    #[error("database {path} already holds tables that are not a fringe store")]
    Foreign {
        /// Database.
        path: PathBuf,
    },
    /// A lab sample id was recorded before with other values.
    #[error("lab sample {sample_id:?} of {serial} is already recorded (position {position}) with other values; to correct it, record it again superseding it (fringe lab add ... --supersedes {position})")]
    SampleConflict {
        /// Device serial.
        serial: String,
        /// The lab's sample id.
        sample_id: String,
        /// Position of the earlier record.
        position: u64,
    },
    /// `supersedes` names no record of that table and device.
    #[error("supersedes = {position}: no {table} record of {serial} at that position")]
    BadSupersedes {
        /// Device serial.
        serial: String,
        /// Table.
        table: Table,
        /// Position given.
        position: u64,
    },
    /// A stored record cannot be read back as its type (written by
    /// something else than fringe, or changed).
    #[error("database {path}: the {table} record at position {position} cannot be read: {reason}")]
    BadRecord {
        /// Database.
        path: PathBuf,
        /// Table.
        table: Table,
        /// Chain position.
        position: u64,
        /// Why.
        reason: String,
    },
    /// The database server cannot be reached, or the connection to it was
    /// lost (a server back end only; the operation may succeed after a
    /// reconnect).
    #[error("database {path} is unreachable: {reason}; nothing of this operation was stored: reconnect and retry")]
    Unreachable {
        /// Database (its connection, without the password).
        path: PathBuf,
        /// What the client or the server said.
        reason: String,
    },
    /// The device is leased to another writer (or to none), and this
    /// writer only writes devices it holds (a back end shared by several
    /// gateways).
    #[error("database {path}: device {serial} is not leased to this writer ({holder}); nothing was stored")]
    NotOwner {
        /// Database.
        path: PathBuf,
        /// Device serial.
        serial: String,
        /// Who holds it, or why it is not held (for a person).
        holder: String,
    },
    /// Any other failure of the back end.
    #[error("database {path}: {source}")]
    Backend {
        /// Database.
        path: PathBuf,
        /// The back end's error.
        source: Box<dyn std::error::Error + Send + Sync>,
    },
}

/// What [`StoreError::Locked`] says: for a SQLite file, another process
/// holds its write lock; for a PostgreSQL database (`postgres://...`), a
/// lock wait timed out or the server broke a deadlock.
fn locked_words(path: &std::path::Path) -> String {
    let shown = path.display();
    let name = path.to_string_lossy();
    if name.starts_with("postgres://") || name.starts_with("postgresql://") {
        format!("database {shown}: a lock wait timed out or the server broke a deadlock (another writer holds what this operation needs); nothing of this operation was stored: retry, and if it happens again look for a long-running transaction on the server (pg_stat_activity)")
    } else {
        format!("database {shown} is locked by another process (another `fringe monitor` or `fringe pull` on the same file?); stop it or use another --db")
    }
}

impl StoreError {
    /// Whether the failure is of the disk, of another process or of the
    /// connection (locked, read-only, full, unreachable), so that the same
    /// operation may succeed later.
    pub fn is_transient(&self) -> bool {
        matches!(
            self,
            StoreError::Locked { .. }
                | StoreError::ReadOnly { .. }
                | StoreError::DiskFull { .. }
                | StoreError::Unreachable { .. }
        )
    }

    /// Whether the database must not be used (not ours, newer, damaged,
    /// cannot be opened).
    pub fn is_unusable(&self) -> bool {
        matches!(
            self,
            StoreError::CannotOpen { .. }
                | StoreError::NotADatabase { .. }
                | StoreError::Corrupt { .. }
                | StoreError::NewerSchema { .. }
                | StoreError::Foreign { .. }
                | StoreError::BadRecord { .. }
        )
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A lock on a PostgreSQL database is not another process holding a
    /// file: its words say what happened there.
    #[test]
    fn a_lock_is_described_for_the_back_end_it_happened_on() {
        let pg = StoreError::Locked {
            path: PathBuf::from("postgres://fringe@db.plant.example:5432/fringe"),
        }
        .to_string();
        assert!(
            pg.contains("pg_stat_activity") && !pg.contains("fringe monitor"),
            "{pg}"
        );
        let file = StoreError::Locked {
            path: PathBuf::from("line2.db"),
        }
        .to_string();
        assert!(
            file.contains("fringe monitor") && file.contains("line2.db"),
            "{file}"
        );
        // A file whose name starts with the word is a file.
        let file = StoreError::Locked {
            path: PathBuf::from("postgres-mirror.db"),
        }
        .to_string();
        assert!(file.contains("fringe monitor"), "{file}");
    }
}
