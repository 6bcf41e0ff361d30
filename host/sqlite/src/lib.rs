//! # fringe-sqlite: the SQLite back end of the record store
//!
//! One SQLite file (bundled SQLite) per line or site, behind the traits of
//! `fringe-store` ([`RecordLog`], [`RecordRead`]). Schema, canonical
//! encoding and the rules are written down in `host/SCHEMA.md`; in short:
//!
//! - tables `devices`, `readings`, `events`, `calibrations`,
//!   `lab_samples`, `reference_checks`, each row keyed by device serial and
//!   a sequence;
//! - triggers refuse every `UPDATE` and `DELETE` on them: a correction is
//!   a new record whose `supersedes` names the old record's position;
//! - inserts are idempotent: a record already stored is counted as a
//!   duplicate and never stored twice;
//! - every record takes the next position of the one SHA-256 chain of
//!   `fringe_store::chain`, computed on the store's own values (the row
//!   codec here only maps them to SQLite's and back, losslessly);
//! - [`Store::check_integrity`] runs SQLite's `integrity_check` (or
//!   `quick_check`): a damaged page is found before the chain is trusted.
//!
//! Durability: WAL with `synchronous = FULL`, so a committed batch survives
//! a killed process and a power cut. A file this crate created is removed
//! again if opening it fails; nothing else is ever removed.
#![forbid(unsafe_code)]
#![warn(missing_docs)]

mod schema;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::time::Duration;

use fringe_protocol::{Event, Reading, RefCheck, Seq};
use fringe_store::chain::{self, ChainReport, ChainedRecord, Hash, Table};
use fringe_store::record::{self, DeviceRecord, LoggedReading};
use fringe_store::{
    now_unix_ms, BootClock, DeviceInfo, Gap, InsertStats, NewCalibration, NewLabSample, RecordLog,
    RecordRead, Recorded, Source, StoreError, StoredCalibration, StoredDevice, StoredEvent,
    StoredLabSample, StoredReading, StoredRefCheck, Value,
};
use rusqlite::types::{ToSqlOutput, ValueRef};
use rusqlite::{params, Connection, OpenFlags, OptionalExtension, ToSql, TransactionBehavior};

pub use schema::SCHEMA_VERSION;

/// How long a write waits for another process's lock before giving up.
pub const BUSY_TIMEOUT: Duration = Duration::from_millis(2000);

/// What to do with a damaged SQLite file.
fn repair_advice(path: &Path) -> String {
    format!("run `sqlite3 {} .recover` into a new file", path.display())
}

/// Maps a SQLite error to the store's error kinds.
fn from_sqlite(path: &Path, e: rusqlite::Error) -> StoreError {
    use rusqlite::ErrorCode as C;
    let path = path.to_path_buf();
    match e.sqlite_error_code() {
        Some(C::DatabaseBusy | C::DatabaseLocked) => StoreError::Locked { path },
        Some(C::ReadOnly) => StoreError::ReadOnly { path },
        Some(C::DiskFull) => StoreError::DiskFull { path },
        Some(C::NotADatabase) => StoreError::NotADatabase { path },
        Some(C::DatabaseCorrupt) => StoreError::Corrupt {
            repair: repair_advice(&path),
            detail: "SQLite reports a damaged page".into(),
            path,
        },
        Some(C::CannotOpen) => StoreError::CannotOpen {
            reason: cannot_open_reason(&path),
            path,
        },
        _ => StoreError::Backend {
            path,
            source: Box::new(e),
        },
    }
}

fn cannot_open_reason(path: &Path) -> String {
    match path.parent().filter(|p| !p.as_os_str().is_empty()) {
        Some(dir) if !dir.exists() => format!("folder {} does not exist", dir.display()),
        _ if path.is_dir() => "it is a folder".into(),
        _ => match std::fs::metadata(path) {
            Err(e) if e.kind() != std::io::ErrorKind::NotFound => e.to_string(),
            _ => "SQLite could not open it (check the folder's permissions)".into(),
        },
    }
}

/// Whether the SQLite file at `path` holds no table (a file this process
/// created and nobody has made a store yet). When it cannot be read: whether
/// no write-ahead log lies beside it (a store open elsewhere has one).
fn holds_no_tables(path: &Path) -> bool {
    Connection::open_with_flags(path, OpenFlags::SQLITE_OPEN_READ_ONLY)
        .and_then(|c| {
            c.query_row(
                "SELECT count(*) FROM sqlite_master WHERE type = 'table'",
                [],
                |r| r.get::<_, i64>(0),
            )
        })
        .map_or_else(|_| !wal_path(path).is_file(), |n| n == 0)
}

/// The write-ahead log beside a database file.
pub fn wal_path(db: &Path) -> PathBuf {
    let mut s = db.as_os_str().to_owned();
    s.push("-wal");
    PathBuf::from(s)
}

/// The shared-memory index beside a database file.
pub fn shm_path(db: &Path) -> PathBuf {
    let mut s = db.as_os_str().to_owned();
    s.push("-shm");
    PathBuf::from(s)
}

/// A store value bound as a SQL parameter (the row codec, one way).
struct Bind<'a>(&'a Value);

impl ToSql for Bind<'_> {
    fn to_sql(&self) -> rusqlite::Result<ToSqlOutput<'_>> {
        Ok(match self.0 {
            Value::Null => ToSqlOutput::Borrowed(ValueRef::Null),
            Value::Integer(i) => ToSqlOutput::Borrowed(ValueRef::Integer(*i)),
            Value::Real(x) => ToSqlOutput::Borrowed(ValueRef::Real(*x)),
            Value::Text(s) => ToSqlOutput::Borrowed(ValueRef::Text(s.as_bytes())),
            Value::Blob(b) => ToSqlOutput::Borrowed(ValueRef::Blob(b)),
        })
    }
}

/// A SQLite value as a store value (the row codec, the other way). Text
/// that is not UTF-8 was not written by fringe: its bytes are kept as a
/// blob (the hash will not verify).
fn value_of(v: ValueRef<'_>) -> Value {
    match v {
        ValueRef::Null => Value::Null,
        ValueRef::Integer(i) => Value::Integer(i),
        ValueRef::Real(x) => Value::Real(x),
        ValueRef::Text(t) => match std::str::from_utf8(t) {
            Ok(s) => Value::Text(s.to_owned()),
            Err(_) => Value::Blob(t.to_vec()),
        },
        ValueRef::Blob(b) => Value::Blob(b.to_vec()),
    }
}

/// `SELECT position, hash, serial, cols... FROM t ... ` for a table.
fn select_sql(t: Table) -> String {
    let cols = t.columns();
    if t == Table::Devices {
        return format!("SELECT position, hash, {} FROM devices", cols.join(", "));
    }
    let rest: Vec<String> = cols[1..].iter().map(|c| format!("t.{c}")).collect();
    format!(
        "SELECT t.position, t.hash, d.serial, {} FROM {} t JOIN devices d ON d.id = t.device",
        rest.join(", "),
        t.name()
    )
}

/// An open store.
#[derive(Debug)]
pub struct Store {
    conn: Connection,
    path: PathBuf,
    /// Fixed time for new records (see [`Store::set_record_clock`]);
    /// `None`: the system clock.
    record_clock_ms: Option<i64>,
}

impl Store {
    /// Stamps calibration and lab records inserted from now on with
    /// `unix_ms` instead of the system clock (`None` restores it). For a
    /// replay or simulation whose events happen at their own time, as in
    /// `fringe demo`; the plant's commands never set it.
    pub fn set_record_clock(&mut self, unix_ms: Option<i64>) {
        self.record_clock_ms = unix_ms;
    }

    /// Opens (creating if needed) the store at `path`, in WAL mode, and
    /// applies any pending migrations.
    ///
    /// # Errors
    /// [`StoreError`] naming the file: cannot open, locked, read-only, not
    /// a database, newer schema, ...
    pub fn open(path: impl AsRef<Path>) -> Result<Self, StoreError> {
        let path = path.as_ref().to_path_buf();
        let existed = path.exists();
        let opened = (|| {
            let conn = Connection::open_with_flags(
                &path,
                OpenFlags::SQLITE_OPEN_READ_WRITE
                    | OpenFlags::SQLITE_OPEN_CREATE
                    | OpenFlags::SQLITE_OPEN_NO_MUTEX,
            )
            .map_err(|e| from_sqlite(&path, e))?;
            let mut store = Store {
                conn,
                path: path.clone(),
                record_clock_ms: None,
            };
            store.configure(true)?;
            store.migrate()?;
            Ok(store)
        })();
        if opened.is_err() && !existed && holds_no_tables(&path) {
            // Nothing of the user's was there: leave nothing behind. (Not
            // when another process has made the file a store meanwhile: it
            // may be writing to it.)
            for p in [path.clone(), wal_path(&path), shm_path(&path)] {
                let _ = std::fs::remove_file(p);
            }
        }
        opened
    }

    /// Opens an existing store for writing (never creates one). For a
    /// command that must not leave a new file behind when it fails.
    ///
    /// # Errors
    /// [`StoreError::CannotOpen`] when there is no such file; as [`Store::open`].
    pub fn open_existing(path: impl AsRef<Path>) -> Result<Self, StoreError> {
        let path = path.as_ref();
        if !path.is_file() {
            return Err(StoreError::CannotOpen {
                path: path.to_path_buf(),
                reason: if path.exists() {
                    "it is not a file".into()
                } else {
                    "no such file".into()
                },
            });
        }
        Self::open(path)
    }

    /// Opens an existing store read-only (reports, audit). Never migrates.
    ///
    /// # Errors
    /// As [`Store::open`]; a store of an older schema is refused too.
    pub fn open_read_only(path: impl AsRef<Path>) -> Result<Self, StoreError> {
        let path = path.as_ref().to_path_buf();
        if !path.exists() {
            return Err(StoreError::CannotOpen {
                reason: "no such file".into(),
                path,
            });
        }
        let conn = Connection::open_with_flags(
            &path,
            OpenFlags::SQLITE_OPEN_READ_ONLY | OpenFlags::SQLITE_OPEN_NO_MUTEX,
        )
        .map_err(|e| from_sqlite(&path, e))?;
        let store = Store {
            conn,
            path,
            record_clock_ms: None,
        };
        store.configure(false)?;
        let v = store.user_version()?;
        if v != SCHEMA_VERSION {
            return Err(if v > SCHEMA_VERSION {
                StoreError::NewerSchema {
                    path: store.path.clone(),
                    found: v,
                    known: SCHEMA_VERSION,
                }
            } else {
                StoreError::CannotOpen {
                    path: store.path.clone(),
                    reason: format!(
                        "schema version {v} is older than {SCHEMA_VERSION}; open it once with a writing command to migrate"
                    ),
                }
            });
        }
        Ok(store)
    }

    /// An in-memory store (tests, benchmarks).
    ///
    /// # Errors
    /// [`StoreError::Sqlite`] if SQLite fails.
    pub fn open_in_memory() -> Result<Self, StoreError> {
        let path = PathBuf::from(":memory:");
        let conn = Connection::open_in_memory().map_err(|e| from_sqlite(&path, e))?;
        let mut store = Store {
            conn,
            path,
            record_clock_ms: None,
        };
        store.configure(false)?;
        store.migrate()?;
        Ok(store)
    }

    /// The database file.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// The underlying connection, for read-only queries (reports). Writes
    /// through it are refused by the triggers for chained tables.
    pub fn connection(&self) -> &Connection {
        &self.conn
    }

    /// Installs (or with `None` removes) a hook SQLite calls every `every`
    /// virtual-machine steps of any statement; returning `true` interrupts
    /// the statement (its transaction rolls back). For fault-injection tests
    /// and tools: an interrupted write must lose no committed record and
    /// store none twice.
    ///
    /// # Errors
    /// [`StoreError`] if SQLite refuses the hook.
    pub fn set_step_hook(
        &mut self,
        every: i32,
        hook: Option<Box<dyn FnMut() -> bool + Send>>,
    ) -> Result<(), StoreError> {
        let path = self.path.clone();
        self.conn
            .progress_handler(every, hook)
            .map_err(|e| from_sqlite(&path, e))
    }

    fn err(&self, e: rusqlite::Error) -> StoreError {
        from_sqlite(&self.path, e)
    }

    /// Runs `f` in one read transaction: every read in it sees the file as
    /// it was at its first read, whatever a writer (a gateway, a monitor)
    /// commits meanwhile (WAL). Not for writes.
    ///
    /// # Errors
    /// [`StoreError`] starting or ending the transaction; `f`'s own.
    pub fn read_snapshot<R>(
        &self,
        f: impl FnOnce(&Self) -> Result<R, StoreError>,
    ) -> Result<R, StoreError> {
        self.conn
            .execute_batch("BEGIN DEFERRED")
            .map_err(|e| self.err(e))?;
        let out = f(self);
        // A read transaction commits nothing; its end only releases the
        // snapshot.
        let end = self.conn.execute_batch("COMMIT").map_err(|e| self.err(e));
        let out = out?;
        end?;
        Ok(out)
    }

    fn configure(&self, write: bool) -> Result<(), StoreError> {
        self.conn
            .busy_timeout(BUSY_TIMEOUT)
            .map_err(|e| self.err(e))?;
        if write {
            // Switching a new file to WAL needs it to itself for a moment,
            // and SQLite answers "busy" at once, without the busy handler,
            // when another connection is opening it too (a gateway and a
            // pull started together): try again for the busy timeout.
            let deadline = std::time::Instant::now() + BUSY_TIMEOUT;
            let mode: String = loop {
                match self
                    .conn
                    .query_row("PRAGMA journal_mode = WAL", [], |r| r.get(0))
                {
                    Err(rusqlite::Error::SqliteFailure(e, _))
                        if e.code == rusqlite::ErrorCode::DatabaseBusy
                            && std::time::Instant::now() < deadline =>
                    {
                        std::thread::sleep(std::time::Duration::from_millis(5));
                    }
                    other => break other.map_err(|e| self.err(e))?,
                }
            };
            if !mode.eq_ignore_ascii_case("wal") && !mode.eq_ignore_ascii_case("memory") {
                return Err(StoreError::CannotOpen {
                    path: self.path.clone(),
                    reason: format!("could not switch to WAL mode (journal mode is {mode})"),
                });
            }
            self.conn
                .execute_batch("PRAGMA synchronous = FULL; PRAGMA foreign_keys = ON;")
                .map_err(|e| self.err(e))?;
        }
        Ok(())
    }

    fn user_version(&self) -> Result<u32, StoreError> {
        self.conn
            .query_row("PRAGMA user_version", [], |r| r.get::<_, i64>(0))
            .map(|v| v as u32)
            .map_err(|e| self.err(e))
    }

    fn migrate(&mut self) -> Result<(), StoreError> {
        let v = self.user_version()?;
        if v > SCHEMA_VERSION {
            return Err(StoreError::NewerSchema {
                path: self.path.clone(),
                found: v,
                known: SCHEMA_VERSION,
            });
        }
        if v == SCHEMA_VERSION {
            return Ok(());
        }
        let path = self.path.clone();
        // Each step reads the version inside its own write transaction:
        // another process opening the same new file at the same moment
        // (a gateway and a pull) has migrated it, or has not, and what it
        // did is not done again (before, the second failed with "table ...
        // already exists").
        loop {
            let tx = self
                .conn
                .transaction_with_behavior(TransactionBehavior::Immediate)
                .map_err(|e| from_sqlite(&path, e))?;
            let v: u32 = tx
                .query_row("PRAGMA user_version", [], |r| r.get::<_, i64>(0))
                .map(|v| v as u32)
                .map_err(|e| from_sqlite(&path, e))?;
            if v >= SCHEMA_VERSION {
                tx.commit().map_err(|e| from_sqlite(&path, e))?;
                if v > SCHEMA_VERSION {
                    return Err(StoreError::NewerSchema {
                        path,
                        found: v,
                        known: SCHEMA_VERSION,
                    });
                }
                return Ok(());
            }
            if v == 0 {
                let tables: i64 = tx
                    .query_row(
                        "SELECT count(*) FROM sqlite_master WHERE type = 'table'",
                        [],
                        |r| r.get(0),
                    )
                    .map_err(|e| from_sqlite(&path, e))?;
                if tables > 0 {
                    return Err(StoreError::Foreign { path });
                }
            }
            let sql = schema::MIGRATIONS[v as usize];
            tx.execute_batch(sql)
                .and_then(|()| tx.pragma_update(None, "user_version", i64::from(v + 1)))
                .and_then(|()| tx.commit())
                .map_err(|e| from_sqlite(&path, e))?;
        }
    }

    /// Records a device if it is not yet known (its first sighting is kept;
    /// later firmware versions show in its events and identities).
    ///
    /// # Errors
    /// [`StoreError`] on a database failure.
    pub fn ensure_device(&mut self, info: &DeviceInfo) -> Result<(), StoreError> {
        let path = self.path.clone();
        let tx = self
            .conn
            .transaction_with_behavior(TransactionBehavior::Immediate)
            .map_err(|e| from_sqlite(&path, e))?;
        let now = self.record_clock_ms.unwrap_or_else(now_unix_ms);
        let mut w = ChainWriter::begin(&tx).map_err(|e| from_sqlite(&path, e))?;
        w.device_id(info, now)
            .and_then(|_| w.finish())
            .and_then(|()| tx.commit())
            .map_err(|e| from_sqlite(&path, e))
    }

    /// Stores readings of device `serial` in one transaction; readings
    /// already stored are skipped (duplicates) and never stored twice. An
    /// unknown device is recorded first.
    ///
    /// # Errors
    /// [`StoreError`] on a database failure; nothing of the batch is stored then.
    pub fn insert_readings(
        &mut self,
        serial: &str,
        readings: &[Reading],
        source: Source,
    ) -> Result<InsertStats, StoreError> {
        // A reading stored earlier by the other path (stream or log) is the
        // same reading: the source column (11) is left out of the comparison.
        self.insert_keyed(
            serial,
            Table::Readings,
            readings
                .iter()
                .map(|r| record::reading_values(serial, r, source)),
            "t.device = ?1 AND t.boot = ?2 AND t.counter = ?3",
            &[1, 2],
            &[record::READING_SOURCE_COLUMN],
        )
    }

    /// Stores events of device `serial` in one transaction, idempotently
    /// (keyed by event number).
    ///
    /// # Errors
    /// [`StoreError`] on a database failure; nothing of the batch is stored then.
    pub fn insert_events(
        &mut self,
        serial: &str,
        events: &[Event],
    ) -> Result<InsertStats, StoreError> {
        self.insert_keyed(
            serial,
            Table::Events,
            events.iter().map(|e| record::event_values(serial, e)),
            "t.device = ?1 AND t.number = ?2",
            &[1],
            &[],
        )
    }

    /// Shared body of the keyed batch inserts: each row (values serial
    /// first, in [`columns`] order) is inserted unless its key (the unique
    /// index of the table; `find` selects it by device and the `key` value
    /// columns) is stored already, in which case it counts as a duplicate
    /// (equal but for the `ignore` columns) or a conflict.
    fn insert_keyed(
        &mut self,
        serial: &str,
        table: Table,
        rows: impl Iterator<Item = Vec<Value>>,
        find: &str,
        key: &[usize],
        ignore: &[usize],
    ) -> Result<InsertStats, StoreError> {
        let path = self.path.clone();
        let cols = &table.columns()[1..];
        let conflict: Vec<&str> = key.iter().map(|&i| table.columns()[i]).collect();
        let sql = format!(
            "INSERT INTO {} (position, device, {}, hash) VALUES ({}) ON CONFLICT (device, {}) DO NOTHING",
            table.name(),
            cols.join(", "),
            (1..=cols.len() + 3)
                .map(|i| format!("?{i}"))
                .collect::<Vec<_>>()
                .join(", "),
            conflict.join(", ")
        );
        let now = self.record_clock_ms.unwrap_or_else(now_unix_ms);
        let run = || -> rusqlite::Result<InsertStats> {
            let tx = self
                .conn
                .transaction_with_behavior(TransactionBehavior::Immediate)?;
            let mut w = ChainWriter::begin(&tx)?;
            let device = Value::Integer(w.device_id(
                &DeviceInfo {
                    serial: serial.into(),
                    ..Default::default()
                },
                now,
            )?);
            let mut stats = InsertStats::default();
            {
                let mut ins = tx.prepare_cached(&sql)?;
                for values in rows {
                    let (pos, hash) = w.next(table, &values);
                    let (pos_v, hash_v) = (Value::Integer(pos as i64), Value::Blob(hash.to_vec()));
                    let bind = [&pos_v, &device]
                        .into_iter()
                        .chain(&values[1..])
                        .chain(std::iter::once(&hash_v));
                    if ins.execute(rusqlite::params_from_iter(bind.map(Bind)))? == 1 {
                        w.advance(pos, hash);
                        stats.inserted += 1;
                        continue;
                    }
                    let key_values =
                        std::iter::once(&device).chain(key.iter().map(|&i| &values[i]));
                    let stored = stored_values(
                        &tx,
                        table,
                        find,
                        rusqlite::params_from_iter(key_values.map(Bind)),
                    )?;
                    if stored.is_some_and(|s| record::same_record(&s, &values, ignore)) {
                        stats.duplicates += 1;
                    } else {
                        stats.conflicts += 1;
                    }
                }
            }
            w.finish()?;
            tx.commit()?;
            Ok(stats)
        };
        run().map_err(|e| from_sqlite(&path, e))
    }

    /// Records a calibration of device `serial`. An identical record (same
    /// kind, id, slot, name, body, note, supersedes) already stored is
    /// returned as a duplicate instead.
    ///
    /// # Errors
    /// [`StoreError::BadSupersedes`] if `supersedes` names no calibration
    /// of this device; [`StoreError`] on a database failure.
    pub fn insert_calibration(
        &mut self,
        serial: &str,
        cal: &NewCalibration,
    ) -> Result<Recorded, StoreError> {
        let values = |seq: i64, created: i64| record::calibration_values(serial, seq, created, cal);
        self.insert_record(
            serial,
            Table::Calibrations,
            cal.supersedes,
            &values,
            "t.device = ?1 AND t.cal_id = ?2",
            3,
            None,
        )
    }

    /// Records a lab reference sample of device `serial`. An identical
    /// record already stored is returned as a duplicate.
    ///
    /// # Errors
    /// [`StoreError::SampleConflict`] if the sample id is stored with other
    /// values and this record does not supersede it;
    /// [`StoreError::BadSupersedes`]; [`StoreError`] on a database failure.
    pub fn insert_lab_sample(
        &mut self,
        serial: &str,
        s: &NewLabSample,
    ) -> Result<Recorded, StoreError> {
        let values = |seq: i64, created: i64| record::lab_sample_values(serial, seq, created, s);
        self.insert_record(
            serial,
            Table::LabSamples,
            s.supersedes,
            &values,
            "t.device = ?1 AND t.sample_id = ?2",
            2,
            Some(&s.sample_id),
        )
    }

    /// Shared body of [`Store::insert_calibration`] and
    /// [`Store::insert_lab_sample`]: `values(seq, created)` builds the row;
    /// candidates for a duplicate are found by `find` with the device and
    /// value `find_col`; `conflict_id` makes a differing candidate an error.
    #[allow(clippy::too_many_arguments)]
    fn insert_record(
        &mut self,
        serial: &str,
        table: Table,
        supersedes: Option<u64>,
        values: &dyn Fn(i64, i64) -> Vec<Value>,
        find: &str,
        find_col: usize,
        conflict_id: Option<&str>,
    ) -> Result<Recorded, StoreError> {
        let path = self.path.clone();
        let tx = self
            .conn
            .transaction_with_behavior(TransactionBehavior::Immediate)
            .map_err(|e| from_sqlite(&path, e))?;
        let mut w = ChainWriter::begin(&tx).map_err(|e| from_sqlite(&path, e))?;
        let sql_err = |e| from_sqlite(&path, e);
        let created = self.record_clock_ms.unwrap_or_else(now_unix_ms);
        let device = w
            .device_id(
                &DeviceInfo {
                    serial: serial.into(),
                    ..Default::default()
                },
                created,
            )
            .map_err(sql_err)?;
        if let Some(p) = supersedes {
            let found: Option<i64> = tx
                .query_row(
                    &format!(
                        "SELECT position FROM {} WHERE position = ?1 AND device = ?2",
                        table.name()
                    ),
                    params![p as i64, device],
                    |r| r.get(0),
                )
                .optional()
                .map_err(sql_err)?;
            if found.is_none() {
                return Err(StoreError::BadSupersedes {
                    serial: serial.into(),
                    table,
                    position: p,
                });
            }
        }
        let probe = values(0, created);
        let candidates =
            all_stored_values(&tx, table, find, params![device, Bind(&probe[find_col])])
                .map_err(sql_err)?;
        for (pos, stored) in &candidates {
            // Ignore seq and created time.
            if record::same_record(stored, &probe, &record::numbered_columns(table)) {
                return Ok(Recorded {
                    position: *pos,
                    seq: record::int_at(stored, 1) as u64,
                    duplicate: true,
                });
            }
        }
        // The newest record of that id is the one a correction supersedes
        // (candidates come in chain order; an older one is superseded).
        if let (Some(id), Some((pos, _)), None) = (conflict_id, candidates.last(), supersedes) {
            return Err(StoreError::SampleConflict {
                serial: serial.into(),
                sample_id: id.into(),
                position: *pos,
            });
        }
        let seq: i64 = tx
            .query_row(
                &format!(
                    "SELECT coalesce(max(seq), 0) + 1 FROM {} WHERE device = ?1",
                    table.name()
                ),
                [device],
                |r| r.get(0),
            )
            .map_err(sql_err)?;
        let row = values(seq, created);
        let (pos, hash) = w.next(table, &row);
        let cols = table.columns();
        let names: Vec<&str> = cols[1..].to_vec();
        let marks: Vec<String> = (0..names.len() + 3)
            .map(|i| format!("?{}", i + 1))
            .collect();
        let sql = format!(
            "INSERT INTO {} (position, device, {}, hash) VALUES ({})",
            table.name(),
            names.join(", "),
            marks.join(", ")
        );
        let mut bind: Vec<Value> = vec![Value::Integer(pos as i64), Value::Integer(device)];
        bind.extend(row[1..].iter().cloned());
        bind.push(Value::Blob(hash.to_vec()));
        tx.execute(&sql, rusqlite::params_from_iter(bind.iter().map(Bind)))
            .map_err(sql_err)?;
        w.advance(pos, hash);
        w.finish().map_err(sql_err)?;
        tx.commit().map_err(sql_err)?;
        Ok(Recorded {
            position: pos,
            seq: seq as u64,
            duplicate: false,
        })
    }

    fn device_key(&self, serial: &str) -> Result<Option<i64>, StoreError> {
        self.conn
            .query_row("SELECT id FROM devices WHERE serial = ?1", [serial], |r| {
                r.get(0)
            })
            .optional()
            .map_err(|e| self.err(e))
    }

    /// Devices in the store, in the order first seen.
    ///
    /// # Errors
    /// [`StoreError`] on a database failure.
    pub fn devices(&self) -> Result<Vec<StoredDevice>, StoreError> {
        let mut st = self
            .conn
            .prepare(
                "SELECT position, serial, first_seen_unix_ms, firmware, protocol FROM devices ORDER BY position",
            )
            .map_err(|e| self.err(e))?;
        let rows = st
            .query_map([], |r| {
                Ok(StoredDevice {
                    position: r.get::<_, i64>(0)? as u64,
                    record: DeviceRecord {
                        serial: r.get(1)?,
                        first_seen_unix_ms: r.get(2)?,
                        firmware: r.get(3)?,
                        protocol: r.get(4)?,
                    },
                })
            })
            .map_err(|e| self.err(e))?;
        rows.collect::<Result<_, _>>().map_err(|e| self.err(e))
    }

    /// The highest stored reading sequence of `serial`, if any.
    ///
    /// # Errors
    /// [`StoreError`] on a database failure.
    pub fn last_seq(&self, serial: &str) -> Result<Option<Seq>, StoreError> {
        let Some(dev) = self.device_key(serial)? else {
            return Ok(None);
        };
        self.conn
            .query_row(
                "SELECT boot, counter FROM readings WHERE device = ?1 ORDER BY boot DESC, counter DESC LIMIT 1",
                [dev],
                |r| {
                    Ok(Seq {
                        boot: r.get::<_, i64>(0)? as u32,
                        counter: r.get::<_, i64>(1)? as u32,
                    })
                },
            )
            .optional()
            .map_err(|e| self.err(e))
    }

    /// The highest stored event number of `serial`, if any.
    ///
    /// # Errors
    /// [`StoreError`] on a database failure.
    pub fn last_event(&self, serial: &str) -> Result<Option<u32>, StoreError> {
        let Some(dev) = self.device_key(serial)? else {
            return Ok(None);
        };
        self.conn
            .query_row(
                "SELECT max(number) FROM events WHERE device = ?1",
                [dev],
                |r| r.get::<_, Option<i64>>(0),
            )
            .map(|v| v.map(|n| n as u32))
            .map_err(|e| self.err(e))
    }

    /// Number of stored readings of `serial`.
    ///
    /// # Errors
    /// [`StoreError`] on a database failure.
    pub fn reading_count(&self, serial: &str) -> Result<u64, StoreError> {
        let Some(dev) = self.device_key(serial)? else {
            return Ok(0);
        };
        self.conn
            .query_row(
                "SELECT count(*) FROM readings WHERE device = ?1",
                [dev],
                |r| r.get::<_, i64>(0),
            )
            .map(|n| n as u64)
            .map_err(|e| self.err(e))
    }

    /// Calls `f` for every stored reading of `serial` with `from <= seq <= to`,
    /// in sequence order.
    ///
    /// # Errors
    /// [`StoreError`] on a database failure, or what `f` returns.
    pub fn for_each_reading(
        &self,
        serial: &str,
        from: Seq,
        to: Seq,
        mut f: impl FnMut(StoredReading) -> Result<(), StoreError>,
    ) -> Result<(), StoreError> {
        let Some(dev) = self.device_key(serial)? else {
            return Ok(());
        };
        let sql = format!(
            "{} WHERE t.device = ?1 AND (t.boot, t.counter) >= (?2, ?3) AND (t.boot, t.counter) <= (?4, ?5) \
             ORDER BY t.boot, t.counter",
            select_sql(Table::Readings)
        );
        let mut st = self.conn.prepare(&sql).map_err(|e| self.err(e))?;
        let mut rows = st
            .query(params![
                dev,
                i64::from(from.boot),
                i64::from(from.counter),
                i64::from(to.boot),
                i64::from(to.counter)
            ])
            .map_err(|e| self.err(e))?;
        let clocks = self.boot_clocks(serial)?;
        while let Some(row) = rows.next().map_err(|e| self.err(e))? {
            let rec = record_from_row(row, Table::Readings).map_err(|e| self.err(e))?;
            let (reading, source) = record::reading_from_values(&rec.values);
            let (wall_ms, rebased) =
                BootClock::reading_time(clocks.get(&reading.seq.boot), &reading);
            f(StoredReading {
                position: rec.position,
                record: LoggedReading {
                    reading,
                    source,
                    wall_ms,
                    rebased,
                },
            })?;
        }
        Ok(())
    }

    /// For each boot of `serial` whose clock was set while the store holds
    /// its `ClockSet` event with a time since boot, when: the first such
    /// event of the boot (a later one corrects a clock already set).
    ///
    /// # Errors
    /// [`StoreError`] on a database failure.
    pub fn boot_clocks(&self, serial: &str) -> Result<BTreeMap<u32, BootClock>, StoreError> {
        let Some(dev) = self.device_key(serial)? else {
            return Ok(BTreeMap::new());
        };
        let recs = all_stored_values(
            &self.conn,
            Table::Events,
            "t.device = ?1 AND t.kind = 'clock_set'",
            [dev],
        )
        .map_err(|e| self.err(e))?;
        // An event that does not decode sets no clock (verify_chain and
        // `events` report it).
        let mut events: Vec<Event> = recs
            .iter()
            .filter_map(|(_, v)| record::event_from_values(v).ok())
            .collect();
        events.sort_by_key(|e| e.number);
        Ok(BootClock::from_events(&events))
    }

    /// The records of `serial` in `table` at chain positions after `after`
    /// (all for `None`), in position order, as (position, values); none for
    /// an unknown device.
    fn device_records(
        &self,
        serial: &str,
        table: Table,
        after: Option<u64>,
    ) -> Result<Vec<(u64, Vec<Value>)>, StoreError> {
        let Some(dev) = self.device_key(serial)? else {
            return Ok(Vec::new());
        };
        let after = after.map_or(-1, |p| p as i64);
        all_stored_values(
            &self.conn,
            table,
            "t.device = ?1 AND t.position > ?2",
            params![dev, after],
        )
        .map_err(|e| self.err(e))
    }

    /// All stored readings of `serial` in sequence order (tests, small exports).
    ///
    /// # Errors
    /// [`StoreError`] on a database failure.
    pub fn readings(&self, serial: &str) -> Result<Vec<StoredReading>, StoreError> {
        RecordRead::readings(self, serial)
    }

    /// Stored events of `serial` in number order.
    ///
    /// # Errors
    /// [`StoreError`] on a database failure.
    pub fn events(&self, serial: &str) -> Result<Vec<StoredEvent>, StoreError> {
        let recs = self.device_records(serial, Table::Events, None)?;
        let mut out = Vec::new();
        for (position, v) in recs {
            let event = record::event_from_values(&v).map_err(|reason| StoreError::BadRecord {
                path: self.path.clone(),
                table: Table::Events,
                position,
                reason,
            })?;
            out.push(StoredEvent {
                position,
                record: event,
            });
        }
        out.sort_by_key(|e| e.number);
        Ok(out)
    }

    /// Stored calibrations of `serial` in record order.
    ///
    /// # Errors
    /// [`StoreError`] on a database failure.
    pub fn calibrations(&self, serial: &str) -> Result<Vec<StoredCalibration>, StoreError> {
        let recs = self.device_records(serial, Table::Calibrations, None)?;
        Ok(recs
            .into_iter()
            .map(|(position, v)| StoredCalibration {
                position,
                record: record::calibration_from_values(&v),
            })
            .collect())
    }

    /// Stored lab samples of `serial` in record order.
    ///
    /// # Errors
    /// [`StoreError`] on a database failure.
    pub fn lab_samples(&self, serial: &str) -> Result<Vec<StoredLabSample>, StoreError> {
        let recs = self.device_records(serial, Table::LabSamples, None)?;
        Ok(recs
            .into_iter()
            .map(|(position, v)| StoredLabSample {
                position,
                record: record::lab_sample_from_values(&v),
            })
            .collect())
    }

    /// Records an internal reference check of device `serial` made at
    /// device time `time_ms`. An identical record already stored is
    /// returned as a duplicate.
    ///
    /// # Errors
    /// [`StoreError`] on a database failure.
    pub fn insert_reference_check(
        &mut self,
        serial: &str,
        time_ms: i64,
        check: &RefCheck,
    ) -> Result<Recorded, StoreError> {
        let values = |seq: i64, created: i64| {
            record::reference_check_values(serial, seq, created, time_ms, check)
        };
        self.insert_record(
            serial,
            Table::ReferenceChecks,
            None,
            &values,
            "t.device = ?1 AND t.time_ms = ?2",
            2,
            None,
        )
    }

    /// Stored reference checks of `serial` in record order.
    ///
    /// # Errors
    /// [`StoreError`] on a database failure.
    pub fn reference_checks(&self, serial: &str) -> Result<Vec<StoredRefCheck>, StoreError> {
        self.reference_checks_after(serial, None)
    }

    /// Stored reference checks of `serial` at chain positions after
    /// `after` (all for `None`), in record order: for a reader that keeps
    /// what it read before (`fringe monitor`'s drift check).
    ///
    /// # Errors
    /// [`StoreError`] on a database failure.
    pub fn reference_checks_after(
        &self,
        serial: &str,
        after: Option<u64>,
    ) -> Result<Vec<StoredRefCheck>, StoreError> {
        let recs = self.device_records(serial, Table::ReferenceChecks, after)?;
        Ok(recs
            .into_iter()
            .map(|(position, v)| StoredRefCheck {
                position,
                record: record::reference_check_from_values(&v),
            })
            .collect())
    }

    /// The runs of consecutive stored readings of `serial`: `(first, last)`
    /// within one boot, in sequence order (what a backfill plans around,
    /// `fringe_line::plan_backfill`).
    ///
    /// # Errors
    /// [`StoreError`] on a database failure.
    pub fn runs(&self, serial: &str) -> Result<Vec<(Seq, Seq)>, StoreError> {
        let Some(dev) = self.device_key(serial)? else {
            return Ok(Vec::new());
        };
        let mut st = self
            .conn
            .prepare(
                "SELECT boot, min(counter), max(counter) FROM (
                   SELECT boot, counter,
                          counter - row_number() OVER (PARTITION BY boot ORDER BY counter) AS grp
                   FROM readings WHERE device = ?1)
                 GROUP BY boot, grp ORDER BY boot, min(counter)",
            )
            .map_err(|e| self.err(e))?;
        let rows = st
            .query_map([dev], |r| {
                let boot = r.get::<_, i64>(0)? as u32;
                Ok((
                    Seq {
                        boot,
                        counter: r.get::<_, i64>(1)? as u32,
                    },
                    Seq {
                        boot,
                        counter: r.get::<_, i64>(2)? as u32,
                    },
                ))
            })
            .map_err(|e| self.err(e))?;
        rows.collect::<Result<_, _>>().map_err(|e| self.err(e))
    }

    /// Number of stored readings of `serial` with `from <= seq < until`.
    ///
    /// # Errors
    /// [`StoreError`] on a database failure.
    pub fn count_between(&self, serial: &str, from: Seq, until: Seq) -> Result<u64, StoreError> {
        let Some(dev) = self.device_key(serial)? else {
            return Ok(0);
        };
        self.conn
            .query_row(
                "SELECT count(*) FROM readings WHERE device = ?1 \
                 AND (boot, counter) >= (?2, ?3) AND (boot, counter) < (?4, ?5)",
                params![
                    dev,
                    i64::from(from.boot),
                    i64::from(from.counter),
                    i64::from(until.boot),
                    i64::from(until.counter)
                ],
                |r| r.get::<_, i64>(0),
            )
            .map(|n| n as u64)
            .map_err(|e| self.err(e))
    }

    /// Missing reading counters within each boot of `serial` (a boot's
    /// first stored counter above 0 counts as a gap from 0).
    ///
    /// # Errors
    /// [`StoreError`] on a database failure.
    pub fn gaps(&self, serial: &str) -> Result<Vec<Gap>, StoreError> {
        let Some(dev) = self.device_key(serial)? else {
            return Ok(Vec::new());
        };
        let mut st = self
            .conn
            .prepare(
                "SELECT boot, prev, counter FROM (
                   SELECT boot, counter,
                          lag(counter, 1, -1) OVER (PARTITION BY boot ORDER BY counter) AS prev
                   FROM readings WHERE device = ?1)
                 WHERE counter - prev > 1 ORDER BY boot, counter",
            )
            .map_err(|e| self.err(e))?;
        let rows = st
            .query_map([dev], |r| {
                let boot: i64 = r.get(0)?;
                let prev: i64 = r.get(1)?;
                let counter: i64 = r.get(2)?;
                Ok(Gap {
                    boot: boot as u32,
                    first: (prev + 1) as u32,
                    last: (counter - 1) as u32,
                })
            })
            .map_err(|e| self.err(e))?;
        rows.collect::<Result<_, _>>().map_err(|e| self.err(e))
    }

    /// The chain head: last position and its hash ((0, genesis) when empty).
    ///
    /// # Errors
    /// [`StoreError`] on a database failure.
    pub fn chain_head(&self) -> Result<(u64, Hash), StoreError> {
        read_head(&self.conn).map_err(|e| self.err(e))
    }

    /// Calls `f` for every chained record of every table in position order.
    ///
    /// # Errors
    /// [`StoreError`] on a database failure, or what `f` returns.
    pub fn for_each_record(
        &self,
        mut f: impl FnMut(ChainedRecord) -> Result<(), StoreError>,
    ) -> Result<(), StoreError> {
        let mut stmts = Vec::new();
        for t in Table::ALL {
            let sql = format!(
                "{} ORDER BY {}position",
                select_sql(t),
                if t == Table::Devices { "" } else { "t." }
            );
            stmts.push((t, self.conn.prepare(&sql).map_err(|e| self.err(e))?));
        }
        let mut cursors = Vec::new();
        for (t, st) in &mut stmts {
            cursors.push((*t, st.query([]).map_err(|e| self.err(e))?));
        }
        let mut heads: Vec<Option<ChainedRecord>> = Vec::new();
        for (t, rows) in &mut cursors {
            heads.push(next_record(rows, *t).map_err(|e| self.err(e))?);
        }
        loop {
            let Some(i) = heads
                .iter()
                .enumerate()
                .filter_map(|(i, h)| h.as_ref().map(|r| (i, r.position)))
                .min_by_key(|&(_, p)| p)
                .map(|(i, _)| i)
            else {
                return Ok(());
            };
            let (t, rows) = &mut cursors[i];
            let next = next_record(rows, *t).map_err(|e| self.err(e))?;
            if let Some(rec) = std::mem::replace(&mut heads[i], next) {
                f(rec)?;
            }
        }
    }

    /// SQLite's own check of the file: `PRAGMA integrity_check` when
    /// `full` (every page, every index against its table), else `PRAGMA
    /// quick_check` (every page, without comparing index and table
    /// contents). Costs are in BENCHMARKS.md ("Integrity check").
    ///
    /// # Errors
    /// [`StoreError::Corrupt`] with SQLite's first finding;
    /// [`StoreError`] when the check itself fails.
    pub fn check_integrity(&self, full: bool) -> Result<(), StoreError> {
        let check = if full {
            "integrity_check"
        } else {
            "quick_check"
        };
        let corrupt = |detail: String| StoreError::Corrupt {
            path: self.path.clone(),
            detail,
            repair: repair_advice(&self.path),
        };
        let found: Result<Vec<String>, rusqlite::Error> = self
            .conn
            .prepare(&format!("PRAGMA {check}(20)"))
            .and_then(|mut st| {
                st.query_map([], |r| r.get::<_, String>(0))
                    .and_then(|rows| rows.collect())
            });
        match found {
            Ok(found) => match found.as_slice() {
                [ok] if ok == "ok" => Ok(()),
                _ => Err(corrupt(format!(
                    "SQLite's {check}: {}",
                    found.first().map_or("no answer", String::as_str)
                ))),
            },
            Err(e) => match self.err(e) {
                StoreError::Corrupt { .. } => Err(corrupt(format!(
                    "SQLite's {check} stopped at a damaged page"
                ))),
                other => Err(other),
            },
        }
    }

    /// Walks the whole chain and reports every changed, removed or
    /// reordered record by position ([`fringe_store::verify_chain`]).
    ///
    /// # Errors
    /// [`StoreError`] on a database failure (a damaged chain is not an error: it is the report).
    pub fn verify_chain(&self) -> Result<ChainReport, StoreError> {
        fringe_store::verify_chain(self)
    }
}

fn read_head(conn: &Connection) -> rusqlite::Result<(u64, Hash)> {
    conn.query_row(
        "SELECT position, hash FROM chain_head WHERE id = 1",
        [],
        |r| {
            let p: i64 = r.get(0)?;
            let h: Vec<u8> = r.get(1)?;
            let mut hash = [0u8; 32];
            if h.len() == 32 {
                hash.copy_from_slice(&h);
            }
            Ok((p as u64, hash))
        },
    )
}

fn record_from_row(row: &rusqlite::Row<'_>, table: Table) -> rusqlite::Result<ChainedRecord> {
    let position: i64 = row.get(0)?;
    let h: Vec<u8> = row.get(1)?;
    let mut hash = [0u8; 32];
    if h.len() == 32 {
        hash.copy_from_slice(&h);
    }
    let cols = table.columns();
    let mut values = Vec::with_capacity(cols.len());
    for i in 0..cols.len() {
        values.push(value_of(row.get_ref(i + 2)?));
    }
    Ok(ChainedRecord {
        position: position as u64,
        table,
        hash,
        columns: cols,
        values,
    })
}

fn next_record(rows: &mut rusqlite::Rows<'_>, t: Table) -> rusqlite::Result<Option<ChainedRecord>> {
    match rows.next()? {
        Some(row) => record_from_row(row, t).map(Some),
        None => Ok(None),
    }
}

fn stored_values(
    conn: &Connection,
    table: Table,
    filter: &str,
    p: impl rusqlite::Params,
) -> rusqlite::Result<Option<Vec<Value>>> {
    let sql = format!("{} WHERE {filter}", select_sql(table));
    let mut st = conn.prepare_cached(&sql)?;
    let mut rows = st.query(p)?;
    match rows.next()? {
        Some(row) => Ok(Some(record_from_row(row, table)?.values)),
        None => Ok(None),
    }
}

fn all_stored_values(
    conn: &Connection,
    table: Table,
    filter: &str,
    p: impl rusqlite::Params,
) -> rusqlite::Result<Vec<(u64, Vec<Value>)>> {
    let sql = format!("{} WHERE {filter} ORDER BY t.position", select_sql(table));
    let mut st = conn.prepare_cached(&sql)?;
    let mut rows = st.query(p)?;
    let mut out = Vec::new();
    while let Some(row) = rows.next()? {
        let r = record_from_row(row, table)?;
        out.push((r.position, r.values));
    }
    Ok(out)
}

/// Hands out chain positions inside one write transaction and moves the
/// head at the end.
struct ChainWriter<'c> {
    conn: &'c Connection,
    position: u64,
    hash: Hash,
    moved: bool,
}

impl<'c> ChainWriter<'c> {
    fn begin(conn: &'c Connection) -> rusqlite::Result<Self> {
        let (position, hash) = read_head(conn)?;
        Ok(Self {
            conn,
            position,
            hash,
            moved: false,
        })
    }

    /// The position and hash the next record would take.
    fn next(&self, table: Table, values: &[Value]) -> (u64, Hash) {
        let pos = self.position + 1;
        (
            pos,
            chain::link(&self.hash, pos, table, &chain::canonical(values)),
        )
    }

    /// The record at `pos` was stored.
    fn advance(&mut self, pos: u64, hash: Hash) {
        self.position = pos;
        self.hash = hash;
        self.moved = true;
    }

    /// The device's row id; a device not yet known is recorded as first
    /// seen at `now_ms`.
    fn device_id(&mut self, info: &DeviceInfo, now_ms: i64) -> rusqlite::Result<i64> {
        if let Some(id) = self
            .conn
            .prepare_cached("SELECT id FROM devices WHERE serial = ?1")?
            .query_row([&info.serial], |r| r.get(0))
            .optional()?
        {
            return Ok(id);
        }
        let values = record::device_values(info, now_ms);
        let (pos, hash) = self.next(Table::Devices, &values);
        let mut bind = values;
        bind.push(Value::Integer(pos as i64));
        bind.push(Value::Blob(hash.to_vec()));
        self.conn.execute(
            "INSERT INTO devices (serial, first_seen_unix_ms, firmware, protocol, freq_low_hz, \
             freq_high_hz, position, hash) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8)",
            rusqlite::params_from_iter(bind.iter().map(Bind)),
        )?;
        self.advance(pos, hash);
        Ok(self.conn.last_insert_rowid())
    }

    fn finish(self) -> rusqlite::Result<()> {
        if self.moved {
            self.conn
                .prepare_cached("UPDATE chain_head SET position = ?1, hash = ?2 WHERE id = 1")?
                .execute(params![self.position as i64, &self.hash[..]])?;
        }
        Ok(())
    }
}

impl RecordLog for Store {
    fn ensure_device(&mut self, info: &DeviceInfo) -> Result<(), StoreError> {
        Store::ensure_device(self, info)
    }
    fn insert_readings(
        &mut self,
        serial: &str,
        readings: &[Reading],
        source: Source,
    ) -> Result<InsertStats, StoreError> {
        Store::insert_readings(self, serial, readings, source)
    }
    fn insert_events(&mut self, serial: &str, events: &[Event]) -> Result<InsertStats, StoreError> {
        Store::insert_events(self, serial, events)
    }
    fn insert_calibration(
        &mut self,
        serial: &str,
        cal: &NewCalibration,
    ) -> Result<Recorded, StoreError> {
        Store::insert_calibration(self, serial, cal)
    }
    fn insert_lab_sample(
        &mut self,
        serial: &str,
        s: &NewLabSample,
    ) -> Result<Recorded, StoreError> {
        Store::insert_lab_sample(self, serial, s)
    }
    fn insert_reference_check(
        &mut self,
        serial: &str,
        time_ms: i64,
        check: &RefCheck,
    ) -> Result<Recorded, StoreError> {
        Store::insert_reference_check(self, serial, time_ms, check)
    }
    fn set_record_clock(&mut self, unix_ms: Option<i64>) {
        Store::set_record_clock(self, unix_ms);
    }
}

impl RecordRead for Store {
    fn path(&self) -> &Path {
        &self.path
    }
    fn devices(&self) -> Result<Vec<StoredDevice>, StoreError> {
        Store::devices(self)
    }
    fn last_seq(&self, serial: &str) -> Result<Option<Seq>, StoreError> {
        Store::last_seq(self, serial)
    }
    fn last_event(&self, serial: &str) -> Result<Option<u32>, StoreError> {
        Store::last_event(self, serial)
    }
    fn reading_count(&self, serial: &str) -> Result<u64, StoreError> {
        Store::reading_count(self, serial)
    }
    fn count_between(&self, serial: &str, from: Seq, until: Seq) -> Result<u64, StoreError> {
        Store::count_between(self, serial, from, until)
    }
    fn runs(&self, serial: &str) -> Result<Vec<(Seq, Seq)>, StoreError> {
        Store::runs(self, serial)
    }
    fn gaps(&self, serial: &str) -> Result<Vec<Gap>, StoreError> {
        Store::gaps(self, serial)
    }
    fn for_each_reading(
        &self,
        serial: &str,
        from: Seq,
        to: Seq,
        f: &mut dyn FnMut(StoredReading) -> Result<(), StoreError>,
    ) -> Result<(), StoreError> {
        Store::for_each_reading(self, serial, from, to, f)
    }
    fn events(&self, serial: &str) -> Result<Vec<StoredEvent>, StoreError> {
        Store::events(self, serial)
    }
    fn calibrations(&self, serial: &str) -> Result<Vec<StoredCalibration>, StoreError> {
        Store::calibrations(self, serial)
    }
    fn lab_samples(&self, serial: &str) -> Result<Vec<StoredLabSample>, StoreError> {
        Store::lab_samples(self, serial)
    }
    fn reference_checks_after(
        &self,
        serial: &str,
        after: Option<u64>,
    ) -> Result<Vec<StoredRefCheck>, StoreError> {
        Store::reference_checks_after(self, serial, after)
    }
    fn boot_clocks(&self, serial: &str) -> Result<BTreeMap<u32, BootClock>, StoreError> {
        Store::boot_clocks(self, serial)
    }
    fn chain_head(&self) -> Result<(u64, Hash), StoreError> {
        Store::chain_head(self)
    }
    fn for_each_record(
        &self,
        f: &mut dyn FnMut(ChainedRecord) -> Result<(), StoreError>,
    ) -> Result<(), StoreError> {
        Store::for_each_record(self, f)
    }
    fn check_integrity(&self, full: bool) -> Result<(), StoreError> {
        Store::check_integrity(self, full)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use fringe_protocol::{EventKind, ResetCause};
    use fringe_store::chain::{self, ChainProblem};
    use fringe_store::conformance::{reading, SERIAL};

    fn file_store() -> (tempfile::TempDir, Store) {
        let dir = tempfile::tempdir().unwrap();
        let s = Store::open(dir.path().join("line2.db")).unwrap();
        (dir, s)
    }

    /// A second connection that can drop the triggers, as a tamperer would.
    fn tamper(store: &Store, sql: &str) {
        let c = Connection::open(store.path()).unwrap();
        c.execute_batch(&format!(
            "DROP TRIGGER IF EXISTS readings_no_update; DROP TRIGGER IF EXISTS readings_no_delete; {sql}"
        ))
        .unwrap();
    }

    #[test]
    fn triggers_refuse_update_and_delete() {
        let (_d, mut s) = file_store();
        s.insert_readings(SERIAL, &[reading(1, 0)], Source::Stream)
            .unwrap();
        s.insert_events(
            SERIAL,
            &[Event {
                number: 0,
                boot: 1,
                time_ms: 0,
                kind: EventKind::Boot {
                    reset_cause: ResetCause::PowerOn,
                },
            }],
        )
        .unwrap();
        for sql in [
            "UPDATE readings SET temperature_c = 30",
            "DELETE FROM readings",
            "UPDATE events SET kind = 'x'",
            "DELETE FROM events",
            "DELETE FROM devices",
            "UPDATE chain_head SET position = 0",
        ] {
            let e = s.connection().execute(sql, []).unwrap_err();
            assert!(e.to_string().contains("fringe store"), "{sql}: {e}");
        }
    }

    #[test]
    fn verify_locates_changed_removed_and_reordered_records() {
        let (_d, mut s) = file_store();
        let batch: Vec<Reading> = (0..20).map(|c| reading(1, c)).collect();
        s.insert_readings(SERIAL, &batch, Source::Stream).unwrap();
        let report = s.verify_chain().unwrap();
        assert!(report.ok());
        // Position 1 is the device, readings take 2..=21.
        assert_eq!((report.records, report.last_position), (21, 21));
        assert_eq!(report.last_hash, chain::hex(&s.chain_head().unwrap().1));

        tamper(
            &s,
            "UPDATE readings SET moisture_pct = 11.0 WHERE position = 5",
        );
        tamper(&s, "DELETE FROM readings WHERE position IN (9, 10)");
        // Swap the contents of positions 14 and 15 (hashes stay in place).
        tamper(
            &s,
            "CREATE TEMP TABLE c AS SELECT * FROM readings WHERE position IN (14, 15);
             DELETE FROM readings WHERE position IN (14, 15);
             INSERT INTO readings SELECT 29 - position, device, boot, counter, time_ms, channels,
               temperature_c, moisture_pct, uncertainty_pct, flags, cell_cal, product_cal, source,
               (SELECT hash FROM c c2 WHERE c2.position = 29 - c.position) FROM c;",
        );
        let report = s.verify_chain().unwrap();
        let p = &report.problems;
        assert_eq!(p.len(), 4, "{p:#?}");
        assert!(
            matches!(p[0], ChainProblem::Changed { position: 5, .. }),
            "{p:?}"
        );
        assert_eq!(p[1], ChainProblem::Missing { first: 9, last: 10 });
        assert!(
            matches!(
                p[2],
                ChainProblem::Moved {
                    position: 14,
                    belongs_at: 15,
                    ..
                }
            ),
            "{p:?}"
        );
        assert!(
            matches!(
                p[3],
                ChainProblem::Moved {
                    position: 15,
                    belongs_at: 14,
                    ..
                }
            ),
            "{p:?}"
        );
        assert!(
            p[0].to_string().contains("HGM-L2-0001 reading 1.3"),
            "{}",
            p[0]
        );
    }

    #[test]
    fn removing_the_last_records_is_seen_through_the_head() {
        let (_d, mut s) = file_store();
        let batch: Vec<Reading> = (0..5).map(|c| reading(1, c)).collect();
        s.insert_readings(SERIAL, &batch, Source::Stream).unwrap();
        tamper(&s, "DELETE FROM readings WHERE position = 6");
        let p = s.verify_chain().unwrap().problems;
        assert_eq!(p[0], ChainProblem::Missing { first: 6, last: 6 });
        assert!(matches!(
            p[1],
            ChainProblem::HeadMismatch {
                head_position: 6,
                last_position: 5
            }
        ));
    }

    /// A record put beyond the head behind the chain's back (the head not
    /// moved) is reported, though the walk leaves records beyond the head
    /// it read first to the next verification (a writer's, meanwhile).
    #[test]
    fn a_record_added_beyond_the_head_is_seen() {
        let (_d, mut s) = file_store();
        let batch: Vec<Reading> = (0..5).map(|c| reading(1, c)).collect();
        s.insert_readings(SERIAL, &batch, Source::Stream).unwrap();
        let (head, _) = s.chain_head().unwrap();
        tamper(
            &s,
            &format!(
                "INSERT INTO readings SELECT {}, device, boot, counter + 100, time_ms, channels, \
                 temperature_c, moisture_pct, uncertainty_pct, flags, cell_cal, product_cal, \
                 source, hash FROM readings WHERE position = {head}",
                head + 1
            ),
        );
        let p = s.verify_chain().unwrap().problems;
        assert!(
            p.iter().any(|x| matches!(
                x,
                ChainProblem::HeadMismatch { head_position, last_position }
                    if *head_position == head && *last_position == head + 1
            )),
            "{p:?}"
        );
    }

    #[test]
    fn disk_full_is_reported_as_such() {
        let (_d, mut s) = file_store();
        s.connection()
            .execute_batch("PRAGMA max_page_count = 12")
            .unwrap();
        let batch: Vec<Reading> = (0..2000).map(|c| reading(1, c)).collect();
        let e = s
            .insert_readings(SERIAL, &batch, Source::Stream)
            .unwrap_err();
        assert!(matches!(e, StoreError::DiskFull { .. }), "{e:?}");
        assert!(e.to_string().contains("disk full"));
        // Nothing of the failed batch was stored.
        assert_eq!(s.reading_count(SERIAL).unwrap(), 0);
    }

    #[test]
    fn read_only_locked_foreign_and_newer_files_are_named() {
        let (d, mut s) = file_store();
        s.insert_readings(SERIAL, &[reading(1, 0)], Source::Stream)
            .unwrap();
        let path = d.path().join("line2.db");
        let mut ro = Store::open_read_only(&path).unwrap();
        let e = ro
            .insert_readings(SERIAL, &[reading(1, 1)], Source::Stream)
            .unwrap_err();
        assert!(matches!(e, StoreError::ReadOnly { .. }), "{e:?}");

        let other = Connection::open(&path).unwrap();
        other.execute_batch("BEGIN IMMEDIATE").unwrap();
        s.conn.busy_timeout(Duration::from_millis(50)).unwrap();
        let e = s
            .insert_readings(SERIAL, &[reading(1, 2)], Source::Stream)
            .unwrap_err();
        assert!(matches!(e, StoreError::Locked { .. }), "{e:?}");
        assert!(e.to_string().contains("line2.db"));
        other.execute_batch("ROLLBACK").unwrap();
        drop(other);

        let foreign = d.path().join("foreign.db");
        Connection::open(&foreign)
            .unwrap()
            .execute_batch("CREATE TABLE t (x)")
            .unwrap();
        assert!(matches!(
            Store::open(&foreign),
            Err(StoreError::Foreign { .. })
        ));

        let newer = d.path().join("newer.db");
        Connection::open(&newer)
            .unwrap()
            .execute_batch("PRAGMA user_version = 99")
            .unwrap();
        let e = Store::open(&newer).unwrap_err();
        assert!(
            matches!(e, StoreError::NewerSchema { found: 99, .. }),
            "{e:?}"
        );

        let text = d.path().join("notes.txt");
        std::fs::write(&text, "this is not a database, just some words long enough").unwrap();
        assert!(matches!(
            Store::open(&text),
            Err(StoreError::NotADatabase { .. })
        ));

        let e = Store::open(d.path().join("no/such/folder/x.db")).unwrap_err();
        assert!(e.to_string().contains("does not exist"), "{e}");
    }

    #[test]
    fn reopening_migrates_nothing_twice() {
        let (d, mut s) = file_store();
        s.insert_readings(SERIAL, &[reading(1, 0)], Source::Stream)
            .unwrap();
        drop(s);
        let s = Store::open(d.path().join("line2.db")).unwrap();
        assert_eq!(s.user_version().unwrap(), SCHEMA_VERSION);
        assert_eq!(s.reading_count(SERIAL).unwrap(), 1);
    }
}

#[cfg(test)]
mod backend_tests {
    use super::*;
    use fringe_store::conformance::{self, reading, SERIAL};

    #[test]
    fn a_file_store_shows_the_behaviour_of_every_back_end() {
        let dir = tempfile::tempdir().unwrap();
        let mut n = 0;
        conformance::run_all(&mut || {
            n += 1;
            Box::new(Store::open(dir.path().join(format!("c{n}.db"))).unwrap())
        });
    }

    #[test]
    fn an_in_memory_store_shows_it_too() {
        conformance::run_all(&mut || Box::new(Store::open_in_memory().unwrap()));
    }

    /// The damaged index page of the issue: the chain (read by position,
    /// through the tables) still verifies, SQLite's integrity check finds it.
    #[test]
    fn a_damaged_index_page_is_found_by_the_integrity_check() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("line2.db");
        let mut s = Store::open(&path).unwrap();
        let batch: Vec<Reading> = (0..2000).map(|c| reading(1, c)).collect();
        s.insert_readings(SERIAL, &batch, Source::Stream).unwrap();
        let (root, page_size): (i64, i64) = s
            .connection()
            .query_row(
                "SELECT (SELECT rootpage FROM sqlite_master WHERE name = 'readings_key'), \
                 (SELECT page_size FROM pragma_page_size)",
                [],
                |r| Ok((r.get(0)?, r.get(1)?)),
            )
            .unwrap();
        assert!(s.check_integrity(true).is_ok());
        drop(s); // the last connection checkpoints the WAL into the file
        let mut bytes = std::fs::read(&path).unwrap();
        let at = ((root - 1) * page_size) as usize;
        // Keep the page header's type byte, garble the cell pointers and cells.
        for b in &mut bytes[at + 8..at + page_size as usize] {
            *b = 0x5a;
        }
        std::fs::write(&path, &bytes).unwrap();
        let s = Store::open_read_only(&path).unwrap();
        let chain = s.verify_chain().unwrap();
        assert!(chain.ok(), "the chain alone misses it: {chain:?}");
        for full in [true, false] {
            match s.check_integrity(full) {
                Err(StoreError::Corrupt { detail, repair, .. }) => {
                    assert!(detail.contains("check"), "{detail}");
                    assert!(repair.contains(".recover"), "{repair}");
                }
                other => panic!("full {full}: {other:?}"),
            }
        }
    }

    #[test]
    fn a_failed_open_leaves_no_new_file_behind() {
        let dir = tempfile::tempdir().unwrap();
        // Refused after creating the file: a newer schema cannot be
        // staged on a new file, but a folder where the WAL should go can.
        let path = dir.path().join("new.db");
        std::fs::create_dir(wal_path(&path)).unwrap();
        assert!(Store::open(&path).is_err());
        assert!(!path.exists(), "the file it created is gone");
        assert!(wal_path(&path).is_dir(), "what was there stays");
        // An existing file is never removed, whatever goes wrong.
        let notes = dir.path().join("notes.txt");
        std::fs::write(&notes, "shift notes, long enough to look like a header").unwrap();
        assert!(Store::open(&notes).is_err());
        assert!(notes.exists());
        assert!(matches!(
            Store::open_existing(dir.path().join("missing.db")),
            Err(StoreError::CannotOpen { .. })
        ));
        assert!(!dir.path().join("missing.db").exists());
    }
}
