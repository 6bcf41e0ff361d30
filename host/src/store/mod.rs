//! The durable log: SQLite (bundled), WAL, append-only, one hash chain.
//!
//! This is the host's `store` stage (docs/DESIGN.md). Schema, canonical encoding
//! and the rules are written down in `host/SCHEMA.md`; in short:
//!
//! - tables `devices`, `readings`, `events`, `calibrations`, `lab_samples`,
//!   each row keyed by device serial and a sequence (reading sequence, event
//!   number, or a per-device record number the store assigns);
//! - triggers refuse every `UPDATE` and `DELETE` on them: a correction is a
//!   new record whose `supersedes` names the old record's position;
//! - inserts are idempotent: a record already stored is counted as a
//!   duplicate and never stored twice;
//! - every record takes the next position of one SHA-256 chain
//!   ([`chain`]); [`Store::verify_chain`] reports a changed, removed or
//!   reordered record by position.
//!
//! Durability: WAL with `synchronous = FULL`, so a committed batch survives a
//! killed process and a power cut. Callers batch readings ([`Batcher`]) so
//! that commits are at most [`BATCH_MAX_AGE`] apart.

pub mod chain;
mod schema;

use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use fringe_protocol::{CalId, ChannelValue, Event, Flags, Reading, RefCheck, Seq, N_FREQ};
use rusqlite::types::{Value, ValueRef};
use rusqlite::{params, Connection, OpenFlags, OptionalExtension, TransactionBehavior};

use chain::{ChainProblem, ChainReport, Hash, Table, GENESIS, MAX_PROBLEMS};
pub use schema::SCHEMA_VERSION;

/// Longest time a reading may wait in a [`Batcher`] before it is committed.
pub const BATCH_MAX_AGE: Duration = Duration::from_millis(50);
/// Most readings in one batch.
pub const BATCH_MAX_LEN: usize = 1000;
/// How long a write waits for another process's lock before giving up.
pub const BUSY_TIMEOUT: Duration = Duration::from_millis(2000);

/// Why a store operation failed. Each names the database file.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum StoreError {
    /// Another process holds the database's write lock.
    #[error("database {path} is locked by another process (another `fringe monitor` or `fringe pull` on the same file?); stop it or use another --db")]
    Locked {
        /// Database file.
        path: PathBuf,
    },
    /// The database or its folder is read-only.
    #[error("database {path} is read-only: check the file's and its folder's permissions (WAL mode needs to create {path}-wal and {path}-shm beside it)")]
    ReadOnly {
        /// Database file.
        path: PathBuf,
    },
    /// The disk (or the database's size limit) is full.
    #[error("disk full while writing database {path}: free space on that disk; readings not committed are still on the device and are pulled on the next run")]
    DiskFull {
        /// Database file.
        path: PathBuf,
    },
    /// The file could not be opened or created.
    #[error("cannot open database {path}: {reason}")]
    CannotOpen {
        /// Database file.
        path: PathBuf,
        /// What the system said.
        reason: String,
    },
    /// The file is not a SQLite database.
    #[error("{path} is not a fringe database (not SQLite, or encrypted)")]
    NotADatabase {
        /// Database file.
        path: PathBuf,
    },
    /// SQLite found the file damaged.
    #[error("database {path} is damaged; keep a copy and run `sqlite3 {path} .recover`")]
    Corrupt {
        /// Database file.
        path: PathBuf,
    },
    /// The file was written by a newer fringe.
    #[error("database {path} has schema version {found}; this fringe knows up to {known}: use a newer fringe")]
    NewerSchema {
        /// Database file.
        path: PathBuf,
        /// Version found in the file.
        found: u32,
        /// Highest version this build knows.
        known: u32,
    },
    /// The file has fringe-looking tables but no schema version.
    #[error("database {path} already holds tables that are not a fringe store")]
    Foreign {
        /// Database file.
        path: PathBuf,
    },
    /// A lab sample id was recorded before with other values.
    #[error("lab sample {sample_id:?} of {serial} is already recorded (position {position}) with other values; to correct it, record it again with supersedes = {position}")]
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
    /// Any other SQLite failure.
    #[error("database {path}: {source}")]
    Sqlite {
        /// Database file.
        path: PathBuf,
        /// SQLite's error.
        source: rusqlite::Error,
    },
}

impl StoreError {
    fn from_sqlite(path: &Path, e: rusqlite::Error) -> Self {
        use rusqlite::ErrorCode as C;
        let path = path.to_path_buf();
        match e.sqlite_error_code() {
            Some(C::DatabaseBusy | C::DatabaseLocked) => StoreError::Locked { path },
            Some(C::ReadOnly) => StoreError::ReadOnly { path },
            Some(C::DiskFull) => StoreError::DiskFull { path },
            Some(C::NotADatabase) => StoreError::NotADatabase { path },
            Some(C::DatabaseCorrupt) => StoreError::Corrupt { path },
            Some(C::CannotOpen) => StoreError::CannotOpen {
                reason: cannot_open_reason(&path),
                path,
            },
            _ => StoreError::Sqlite { path, source: e },
        }
    }
}

fn cannot_open_reason(path: &Path) -> String {
    match path.parent().filter(|p| !p.as_os_str().is_empty()) {
        Some(dir) if !dir.exists() => format!("folder {} does not exist", dir.display()),
        _ if path.is_dir() => "it is a folder".into(),
        _ => match std::fs::OpenOptions::new()
            .read(true)
            .write(true)
            .create(true)
            .truncate(false)
            .open(path)
        {
            Err(e) => e.to_string(),
            Ok(_) => "SQLite could not open it".into(),
        },
    }
}

/// How a reading reached the host.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Source {
    /// Streamed live.
    Stream = 0,
    /// Read back from the device's stored log (backfill or pull).
    Log = 1,
}

impl Source {
    fn from_i64(v: i64) -> Self {
        if v == 1 {
            Source::Log
        } else {
            Source::Stream
        }
    }
}

/// What a device said about itself when first seen.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct DeviceInfo {
    /// Serial number.
    pub serial: String,
    /// Firmware version, `major.minor.patch`.
    pub firmware: Option<String>,
    /// Protocol version, `major.minor`.
    pub protocol: Option<String>,
    /// Excitation frequencies, Hz, lower first.
    pub freqs_hz: Option<[f32; N_FREQ]>,
}

/// A device row.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct StoredDevice {
    /// Chain position.
    pub position: u64,
    /// Serial number.
    pub serial: String,
    /// When the store first saw it, ms since the Unix epoch.
    pub first_seen_unix_ms: i64,
    /// Firmware version then.
    pub firmware: Option<String>,
    /// Protocol version then.
    pub protocol: Option<String>,
}

/// Result of a batch insert.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize)]
pub struct InsertStats {
    /// Records newly stored.
    pub inserted: u64,
    /// Records already stored with the same values (skipped).
    pub duplicates: u64,
    /// Records already stored under the same key with other values (the
    /// first stored one is kept; the device sent two different records
    /// under one sequence).
    pub conflicts: u64,
}

impl std::ops::AddAssign for InsertStats {
    fn add_assign(&mut self, o: Self) {
        self.inserted += o.inserted;
        self.duplicates += o.duplicates;
        self.conflicts += o.conflicts;
    }
}

/// A stored reading.
#[derive(Debug, Clone, PartialEq)]
pub struct StoredReading {
    /// Chain position.
    pub position: u64,
    /// The reading as the device sent it (NaN temperature or uncertainty
    /// are stored as NULL and read back as NaN; -0.0 there reads back as 0.0).
    pub reading: Reading,
    /// How it arrived.
    pub source: Source,
    /// When it was taken, ms since the Unix epoch: the device time when its
    /// clock was set; for a reading taken before (flag `clock_unset`, time
    /// since boot) the boot's wall-clock origin plus that time, once the
    /// store holds the boot's `ClockSet` event ([`BootClock`]); `None` while
    /// it does not.
    pub wall_ms: Option<i64>,
    /// `wall_ms` was re-based from a time since boot (computed, not what
    /// the device sent; the stored row keeps the device time).
    pub rebased: bool,
}

/// When a boot's clock was first set, from its `ClockSet` event: what
/// re-bases the readings and events of that boot taken before.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct BootClock {
    /// Wall-clock time of the boot's time 0: `new_ms - old_ms` of the event
    /// (where `old_ms` was the time since boot).
    pub origin_ms: i64,
    /// Number of the `ClockSet` event: the boot's events numbered below it
    /// carry times since boot.
    pub event_number: u32,
}

impl BootClock {
    /// Wall-clock time of a reading of this boot: `(time, re-based)`.
    pub fn reading_time(clock: Option<&BootClock>, r: &Reading) -> (Option<i64>, bool) {
        if !r.flags.contains(fringe_protocol::Flags::CLOCK_UNSET) {
            return (Some(r.time_ms as i64), false);
        }
        match clock {
            Some(c) => (Some(c.origin_ms + r.time_ms as i64), true),
            None => (None, false),
        }
    }
}

/// Device times below this (2000-01-01) count from boot.
const SINCE_BOOT_BELOW_MS: u64 = 946_684_800_000;

/// A stored event.
#[derive(Debug, Clone, PartialEq)]
pub struct StoredEvent {
    /// Chain position.
    pub position: u64,
    /// The event.
    pub event: Event,
}

/// Kind of a calibration record.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum CalKind {
    /// Sensor-cell calibration.
    Cell,
    /// Product calibration.
    Product,
    /// Device settings (tag, interval, 4-20 mA span, failure level,
    /// stale-output timeout), written with `fringe device config set`.
    Settings,
}

impl CalKind {
    /// The stored text.
    pub const fn as_str(self) -> &'static str {
        match self {
            CalKind::Cell => "cell",
            CalKind::Product => "product",
            CalKind::Settings => "settings",
        }
    }
    fn parse(s: &str) -> Self {
        match s {
            "cell" => CalKind::Cell,
            "settings" => CalKind::Settings,
            _ => CalKind::Product,
        }
    }
}

/// A calibration to record.
#[derive(Debug, Clone, PartialEq)]
pub struct NewCalibration {
    /// Cell or product.
    pub kind: CalKind,
    /// Content id (as the device computes it).
    pub cal_id: CalId,
    /// Product slot on the device, if any.
    pub slot: Option<u8>,
    /// Product name, if any.
    pub name: Option<String>,
    /// The calibration and whatever the caller keeps with it, as JSON.
    pub body: serde_json::Value,
    /// Free note for a person.
    pub note: Option<String>,
    /// Position of the calibration record this one corrects.
    pub supersedes: Option<u64>,
}

/// A stored calibration.
#[derive(Debug, Clone, PartialEq)]
pub struct StoredCalibration {
    /// Chain position.
    pub position: u64,
    /// Per-device record number, from 1.
    pub seq: u64,
    /// When it was recorded, ms since the Unix epoch.
    pub created_unix_ms: i64,
    /// The record.
    pub cal: NewCalibration,
}

/// A lab reference sample to record.
#[derive(Debug, Clone, PartialEq)]
pub struct NewLabSample {
    /// The lab's id for the sample (unique per device unless superseding).
    pub sample_id: String,
    /// When the sample was taken, ms since the Unix epoch.
    pub taken_unix_ms: i64,
    /// Product name.
    pub product: Option<String>,
    /// Reference moisture, %.
    pub lab_moisture_pct: f64,
    /// `"wet"` or `"dry"` basis.
    pub basis: String,
    /// Reference method (e.g. "oven-dry 103 C 24 h").
    pub method: Option<String>,
    /// The reading it was matched to, if any.
    pub reading: Option<Seq>,
    /// Free note.
    pub note: Option<String>,
    /// Position of the lab sample record this one corrects.
    pub supersedes: Option<u64>,
}

/// A stored lab sample.
#[derive(Debug, Clone, PartialEq)]
pub struct StoredLabSample {
    /// Chain position.
    pub position: u64,
    /// Per-device record number, from 1.
    pub seq: u64,
    /// When it was recorded, ms since the Unix epoch.
    pub created_unix_ms: i64,
    /// The record.
    pub sample: NewLabSample,
}

/// A stored internal reference check.
#[derive(Debug, Clone, PartialEq)]
pub struct StoredRefCheck {
    /// Chain position.
    pub position: u64,
    /// Device time of the check, ms.
    pub time_ms: i64,
    /// The check as the device reported it.
    pub check: RefCheck,
}

/// Result of recording one calibration or lab sample.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
pub struct Recorded {
    /// Chain position of the record (the earlier one if a duplicate).
    pub position: u64,
    /// Per-device record number.
    pub seq: u64,
    /// Whether an identical record was already stored (nothing written).
    pub duplicate: bool,
}

/// Missing readings within one boot: counters `first..=last` of `boot`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
pub struct Gap {
    /// Boot counter.
    pub boot: u32,
    /// First missing counter.
    pub first: u32,
    /// Last missing counter.
    pub last: u32,
}

/// One chained record, in position order (see [`Store::for_each_record`]).
#[derive(Debug, Clone, PartialEq)]
pub struct ChainedRecord {
    /// Chain position.
    pub position: u64,
    /// Table.
    pub table: Table,
    /// Stored hash.
    pub hash: Hash,
    /// Column names of `values` (serial first), as in SCHEMA.md.
    pub columns: &'static [&'static str],
    /// The hashed values, serial first.
    pub values: Vec<Value>,
}

impl ChainedRecord {
    /// The canonical encoding the hash covers.
    pub fn canonical(&self) -> Vec<u8> {
        chain::canonical(&self.values)
    }
    /// A short key for a person (`SERIAL 3.17`, `SERIAL event 4`, ...).
    pub fn key(&self) -> String {
        let serial = match self.values.first() {
            Some(Value::Text(s)) => s.as_str(),
            _ => "?",
        };
        let int = |i: usize| match self.values.get(i) {
            Some(Value::Integer(v)) => v.to_string(),
            _ => "?".into(),
        };
        match self.table {
            Table::Devices => format!("device {serial}"),
            Table::Readings => format!("{serial} reading {}.{}", int(1), int(2)),
            Table::Events => format!("{serial} event {}", int(1)),
            Table::Calibrations => format!("{serial} calibration #{}", int(1)),
            Table::LabSamples => format!("{serial} lab sample #{}", int(1)),
            Table::ReferenceChecks => format!("{serial} reference check #{}", int(1)),
        }
    }
}

const DEVICE_COLS: &[&str] = &[
    "serial",
    "first_seen_unix_ms",
    "firmware",
    "protocol",
    "freq_low_hz",
    "freq_high_hz",
];
const READING_COLS: &[&str] = &[
    "serial",
    "boot",
    "counter",
    "time_ms",
    "channels",
    "temperature_c",
    "moisture_pct",
    "uncertainty_pct",
    "flags",
    "cell_cal",
    "product_cal",
    "source",
];
const EVENT_COLS: &[&str] = &["serial", "number", "boot", "time_ms", "kind", "detail"];
const CAL_COLS: &[&str] = &[
    "serial",
    "seq",
    "kind",
    "cal_id",
    "slot",
    "name",
    "body",
    "note",
    "supersedes",
    "created_unix_ms",
];
const LAB_COLS: &[&str] = &[
    "serial",
    "seq",
    "sample_id",
    "taken_unix_ms",
    "product",
    "lab_moisture_pct",
    "basis",
    "method",
    "reading_boot",
    "reading_counter",
    "note",
    "supersedes",
    "created_unix_ms",
];

const REFCHECK_COLS: &[&str] = &[
    "serial",
    "seq",
    "time_ms",
    "ratio_low",
    "ratio_high",
    "baseline",
    "ok",
    "created_unix_ms",
];

fn columns(t: Table) -> &'static [&'static str] {
    match t {
        Table::Devices => DEVICE_COLS,
        Table::Readings => READING_COLS,
        Table::Events => EVENT_COLS,
        Table::Calibrations => CAL_COLS,
        Table::LabSamples => LAB_COLS,
        Table::ReferenceChecks => REFCHECK_COLS,
    }
}

/// `SELECT position, hash, serial, cols... FROM t ... ` for a table.
fn select_sql(t: Table) -> String {
    let cols = columns(t);
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

/// A REAL value as it round-trips through SQLite: NaN is stored as NULL,
/// and -0.0 comes back as 0.0 (integral REALs are stored as integers).
fn real(x: f64) -> Value {
    if x.is_nan() {
        Value::Null
    } else if x == 0.0 {
        Value::Real(0.0)
    } else {
        Value::Real(x)
    }
}

fn opt_text(s: &Option<String>) -> Value {
    s.as_ref().map_or(Value::Null, |s| Value::Text(s.clone()))
}

fn opt_int(v: Option<i64>) -> Value {
    v.map_or(Value::Null, Value::Integer)
}

fn channels_blob(ch: &[ChannelValue; N_FREQ]) -> Vec<u8> {
    let mut b = Vec::with_capacity(32);
    for c in ch {
        for x in [c.g_s, c.b_s, c.eps_re, c.eps_im] {
            b.extend_from_slice(&x.to_le_bytes());
        }
    }
    b
}

fn channels_from_blob(b: &[u8]) -> [ChannelValue; N_FREQ] {
    let mut f = [0f32; 8];
    for (i, x) in f.iter_mut().enumerate() {
        let mut w = [0u8; 4];
        if let Some(s) = b.get(i * 4..i * 4 + 4) {
            w.copy_from_slice(s);
        }
        *x = f32::from_le_bytes(w);
    }
    [
        ChannelValue {
            g_s: f[0],
            b_s: f[1],
            eps_re: f[2],
            eps_im: f[3],
        },
        ChannelValue {
            g_s: f[4],
            b_s: f[5],
            eps_re: f[6],
            eps_im: f[7],
        },
    ]
}

/// The hashed values of a reading (serial first), in [`READING_COLS`] order.
fn reading_values(serial: &str, r: &Reading, source: Source) -> Vec<Value> {
    vec![
        Value::Text(serial.to_owned()),
        Value::Integer(i64::from(r.seq.boot)),
        Value::Integer(i64::from(r.seq.counter)),
        Value::Integer(r.time_ms as i64),
        Value::Blob(channels_blob(&r.channels)),
        real(f64::from(r.temperature_c)),
        r.moisture_pct.map_or(Value::Null, |m| real(f64::from(m))),
        real(f64::from(r.uncertainty_pct)),
        Value::Integer(i64::from(r.flags.bits())),
        Value::Integer(i64::from(r.cell_cal.as_u32())),
        Value::Integer(i64::from(r.product_cal.as_u32())),
        Value::Integer(source as i64),
    ]
}

fn event_kind_name(k: &fringe_protocol::EventKind) -> &'static str {
    use fringe_protocol::EventKind as K;
    match k {
        K::Boot { .. } => "boot",
        K::CellCalChanged { .. } => "cell_cal_changed",
        K::ProductCalChanged { .. } => "product_cal_changed",
        K::ProductSelected { .. } => "product_selected",
        K::AuthFailed { .. } => "auth_failed",
        K::ClockSet { .. } => "clock_set",
        K::Fault { .. } => "fault",
        K::ReferenceDrift { .. } => "reference_drift",
        K::StorageRepaired => "storage_repaired",
        K::SettingsChanged { .. } => "settings_changed",
    }
}

fn event_values(serial: &str, e: &Event) -> Vec<Value> {
    vec![
        Value::Text(serial.to_owned()),
        Value::Integer(i64::from(e.number)),
        Value::Integer(i64::from(e.boot)),
        Value::Integer(e.time_ms as i64),
        Value::Text(event_kind_name(&e.kind).to_owned()),
        Value::Text(serde_json::to_string(&e.kind).unwrap_or_default()),
    ]
}

fn int_at(v: &[Value], i: usize) -> i64 {
    match v.get(i) {
        Some(Value::Integer(x)) => *x,
        Some(Value::Real(x)) => *x as i64,
        _ => 0,
    }
}

fn opt_int_at(v: &[Value], i: usize) -> Option<i64> {
    match v.get(i) {
        Some(Value::Integer(x)) => Some(*x),
        _ => None,
    }
}

fn f32_at(v: &[Value], i: usize) -> f32 {
    match v.get(i) {
        Some(Value::Real(x)) => *x as f32,
        Some(Value::Integer(x)) => *x as f32,
        _ => f32::NAN,
    }
}

fn text_at(v: &[Value], i: usize) -> Option<String> {
    match v.get(i) {
        Some(Value::Text(s)) => Some(s.clone()),
        _ => None,
    }
}

fn reading_from_values(v: &[Value]) -> (Reading, Source) {
    let channels = match v.get(4) {
        Some(Value::Blob(b)) => channels_from_blob(b),
        _ => Default::default(),
    };
    let moisture_pct = match v.get(6) {
        Some(Value::Null) | None => None,
        _ => Some(f32_at(v, 6)),
    };
    let r = Reading {
        seq: Seq {
            boot: int_at(v, 1) as u32,
            counter: int_at(v, 2) as u32,
        },
        time_ms: int_at(v, 3) as u64,
        channels,
        temperature_c: f32_at(v, 5),
        moisture_pct,
        uncertainty_pct: f32_at(v, 7),
        flags: Flags::from_bits_retain(int_at(v, 8) as u16),
        cell_cal: CalId((int_at(v, 9) as u32).to_be_bytes()),
        product_cal: CalId((int_at(v, 10) as u32).to_be_bytes()),
    };
    (r, Source::from_i64(int_at(v, 11)))
}

/// Whether two rows' values are equal except in the `ignore` columns (for
/// comparing a candidate duplicate with what is stored).
fn same_record(a: &[Value], b: &[Value], ignore: &[usize]) -> bool {
    a.len() == b.len()
        && a.iter()
            .zip(b)
            .enumerate()
            .all(|(i, (x, y))| ignore.contains(&i) || x == y)
}

/// Milliseconds since the Unix epoch, from the system clock.
pub fn now_unix_ms() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_millis() as i64)
        .unwrap_or(0)
}

/// An open store.
#[derive(Debug)]
pub struct Store {
    conn: Connection,
    path: PathBuf,
    /// Fixed time for new calibration and lab records (see
    /// [`Store::set_record_clock`]); `None`: the system clock.
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
        let conn = Connection::open_with_flags(
            &path,
            OpenFlags::SQLITE_OPEN_READ_WRITE
                | OpenFlags::SQLITE_OPEN_CREATE
                | OpenFlags::SQLITE_OPEN_NO_MUTEX,
        )
        .map_err(|e| StoreError::from_sqlite(&path, e))?;
        let mut store = Store {
            conn,
            path,
            record_clock_ms: None,
        };
        store.configure(true)?;
        store.migrate()?;
        Ok(store)
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
        .map_err(|e| StoreError::from_sqlite(&path, e))?;
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
        let conn = Connection::open_in_memory().map_err(|e| StoreError::from_sqlite(&path, e))?;
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

    fn err(&self, e: rusqlite::Error) -> StoreError {
        StoreError::from_sqlite(&self.path, e)
    }

    fn configure(&self, write: bool) -> Result<(), StoreError> {
        self.conn
            .busy_timeout(BUSY_TIMEOUT)
            .map_err(|e| self.err(e))?;
        if write {
            let mode: String = self
                .conn
                .query_row("PRAGMA journal_mode = WAL", [], |r| r.get(0))
                .map_err(|e| self.err(e))?;
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
        if v == 0 {
            let tables: i64 = self
                .conn
                .query_row(
                    "SELECT count(*) FROM sqlite_master WHERE type = 'table'",
                    [],
                    |r| r.get(0),
                )
                .map_err(|e| self.err(e))?;
            if tables > 0 {
                return Err(StoreError::Foreign {
                    path: self.path.clone(),
                });
            }
        }
        let path = self.path.clone();
        for (i, sql) in schema::MIGRATIONS.iter().enumerate().skip(v as usize) {
            let tx = self
                .conn
                .transaction_with_behavior(TransactionBehavior::Immediate)
                .map_err(|e| StoreError::from_sqlite(&path, e))?;
            tx.execute_batch(sql)
                .and_then(|()| tx.pragma_update(None, "user_version", (i + 1) as i64))
                .and_then(|()| tx.commit())
                .map_err(|e| StoreError::from_sqlite(&path, e))?;
        }
        Ok(())
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
            .map_err(|e| StoreError::from_sqlite(&path, e))?;
        let mut w = ChainWriter::begin(&tx).map_err(|e| StoreError::from_sqlite(&path, e))?;
        w.device_id(info)
            .and_then(|_| w.finish())
            .and_then(|()| tx.commit())
            .map_err(|e| StoreError::from_sqlite(&path, e))
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
            readings.iter().map(|r| reading_values(serial, r, source)),
            "t.device = ?1 AND t.boot = ?2 AND t.counter = ?3",
            &[1, 2],
            &[11],
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
            events.iter().map(|e| event_values(serial, e)),
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
        let cols = &columns(table)[1..];
        let conflict: Vec<&str> = key.iter().map(|&i| columns(table)[i]).collect();
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
        let run = || -> rusqlite::Result<InsertStats> {
            let tx = self
                .conn
                .transaction_with_behavior(TransactionBehavior::Immediate)?;
            let mut w = ChainWriter::begin(&tx)?;
            let device = Value::Integer(w.device_id(&DeviceInfo {
                serial: serial.into(),
                ..Default::default()
            })?);
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
                    if ins.execute(rusqlite::params_from_iter(bind))? == 1 {
                        w.advance(pos, hash);
                        stats.inserted += 1;
                        continue;
                    }
                    let key_values =
                        std::iter::once(&device).chain(key.iter().map(|&i| &values[i]));
                    let stored =
                        stored_values(&tx, table, find, rusqlite::params_from_iter(key_values))?;
                    if stored.is_some_and(|s| same_record(&s, &values, ignore)) {
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
        run().map_err(|e| StoreError::from_sqlite(&path, e))
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
        let values = |seq: i64, created: i64| {
            vec![
                Value::Text(serial.to_owned()),
                Value::Integer(seq),
                Value::Text(cal.kind.as_str().into()),
                Value::Integer(i64::from(cal.cal_id.as_u32())),
                opt_int(cal.slot.map(i64::from)),
                opt_text(&cal.name),
                Value::Text(cal.body.to_string()),
                opt_text(&cal.note),
                opt_int(cal.supersedes.map(|p| p as i64)),
                Value::Integer(created),
            ]
        };
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
        let values = |seq: i64, created: i64| {
            vec![
                Value::Text(serial.to_owned()),
                Value::Integer(seq),
                Value::Text(s.sample_id.clone()),
                Value::Integer(s.taken_unix_ms),
                opt_text(&s.product),
                real(s.lab_moisture_pct),
                Value::Text(s.basis.clone()),
                opt_text(&s.method),
                opt_int(s.reading.map(|q| i64::from(q.boot))),
                opt_int(s.reading.map(|q| i64::from(q.counter))),
                opt_text(&s.note),
                opt_int(s.supersedes.map(|p| p as i64)),
                Value::Integer(created),
            ]
        };
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
            .map_err(|e| StoreError::from_sqlite(&path, e))?;
        let mut w = ChainWriter::begin(&tx).map_err(|e| StoreError::from_sqlite(&path, e))?;
        let sql_err = |e| StoreError::from_sqlite(&path, e);
        let device = w
            .device_id(&DeviceInfo {
                serial: serial.into(),
                ..Default::default()
            })
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
        let created = self.record_clock_ms.unwrap_or_else(now_unix_ms);
        let probe = values(0, created);
        let candidates =
            all_stored_values(&tx, table, find, params![device, probe[find_col].clone()])
                .map_err(sql_err)?;
        let last = probe.len() - 1;
        for (pos, stored) in &candidates {
            // Ignore seq (1) and created time (last).
            if same_record(stored, &probe, &[1, last]) {
                return Ok(Recorded {
                    position: *pos,
                    seq: int_at(stored, 1) as u64,
                    duplicate: true,
                });
            }
        }
        if let (Some(id), Some((pos, _)), None) = (conflict_id, candidates.first(), supersedes) {
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
        let cols = columns(table);
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
        tx.execute(&sql, rusqlite::params_from_iter(bind))
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
                    serial: r.get(1)?,
                    first_seen_unix_ms: r.get(2)?,
                    firmware: r.get(3)?,
                    protocol: r.get(4)?,
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
            let (reading, source) = reading_from_values(&rec.values);
            let (wall_ms, rebased) =
                BootClock::reading_time(clocks.get(&reading.seq.boot), &reading);
            f(StoredReading {
                position: rec.position,
                reading,
                source,
                wall_ms,
                rebased,
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
    pub fn boot_clocks(
        &self,
        serial: &str,
    ) -> Result<std::collections::BTreeMap<u32, BootClock>, StoreError> {
        let mut out = std::collections::BTreeMap::new();
        let Some(dev) = self.device_key(serial)? else {
            return Ok(out);
        };
        let mut st = self
            .conn
            .prepare(
                "SELECT number, boot, detail FROM events WHERE device = ?1 AND kind = 'clock_set' ORDER BY number",
            )
            .map_err(|e| self.err(e))?;
        let rows = st
            .query_map([dev], |r| {
                Ok((
                    r.get::<_, i64>(0)? as u32,
                    r.get::<_, i64>(1)? as u32,
                    r.get::<_, String>(2)?,
                ))
            })
            .map_err(|e| self.err(e))?;
        for row in rows {
            let (number, boot, detail) = row.map_err(|e| self.err(e))?;
            if let Ok(fringe_protocol::EventKind::ClockSet { old_ms, new_ms }) =
                serde_json::from_str(&detail)
            {
                if old_ms < SINCE_BOOT_BELOW_MS {
                    out.entry(boot).or_insert(BootClock {
                        origin_ms: new_ms as i64 - old_ms as i64,
                        event_number: number,
                    });
                }
            }
        }
        Ok(out)
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
        let mut out = Vec::new();
        self.for_each_reading(serial, Seq::from_u64(0), Seq::from_u64(u64::MAX), |r| {
            out.push(r);
            Ok(())
        })?;
        Ok(out)
    }

    /// Stored events of `serial` in number order.
    ///
    /// # Errors
    /// [`StoreError`] on a database failure.
    pub fn events(&self, serial: &str) -> Result<Vec<StoredEvent>, StoreError> {
        let recs = self.device_records(serial, Table::Events, None)?;
        let mut out = Vec::new();
        for (position, v) in recs {
            let detail = text_at(&v, 5).unwrap_or_default();
            let kind = serde_json::from_str(&detail).map_err(|e| StoreError::Sqlite {
                path: self.path.clone(),
                source: rusqlite::Error::FromSqlConversionFailure(
                    5,
                    rusqlite::types::Type::Text,
                    Box::new(e),
                ),
            })?;
            out.push(StoredEvent {
                position,
                event: Event {
                    number: int_at(&v, 1) as u32,
                    boot: int_at(&v, 2) as u32,
                    time_ms: int_at(&v, 3) as u64,
                    kind,
                },
            });
        }
        out.sort_by_key(|e| e.event.number);
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
                seq: int_at(&v, 1) as u64,
                created_unix_ms: int_at(&v, 9),
                cal: NewCalibration {
                    kind: CalKind::parse(&text_at(&v, 2).unwrap_or_default()),
                    cal_id: CalId((int_at(&v, 3) as u32).to_be_bytes()),
                    slot: opt_int_at(&v, 4).map(|s| s as u8),
                    name: text_at(&v, 5),
                    body: text_at(&v, 6)
                        .and_then(|b| serde_json::from_str(&b).ok())
                        .unwrap_or(serde_json::Value::Null),
                    note: text_at(&v, 7),
                    supersedes: opt_int_at(&v, 8).map(|p| p as u64),
                },
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
                seq: int_at(&v, 1) as u64,
                created_unix_ms: int_at(&v, 12),
                sample: NewLabSample {
                    sample_id: text_at(&v, 2).unwrap_or_default(),
                    taken_unix_ms: int_at(&v, 3),
                    product: text_at(&v, 4),
                    lab_moisture_pct: match v.get(5) {
                        Some(Value::Real(x)) => *x,
                        Some(Value::Integer(x)) => *x as f64,
                        _ => f64::NAN,
                    },
                    basis: text_at(&v, 6).unwrap_or_default(),
                    method: text_at(&v, 7),
                    reading: match (opt_int_at(&v, 8), opt_int_at(&v, 9)) {
                        (Some(b), Some(c)) => Some(Seq {
                            boot: b as u32,
                            counter: c as u32,
                        }),
                        _ => None,
                    },
                    note: text_at(&v, 10),
                    supersedes: opt_int_at(&v, 11).map(|p| p as u64),
                },
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
            vec![
                Value::Text(serial.to_owned()),
                Value::Integer(seq),
                Value::Integer(time_ms),
                real(f64::from(check.ratio[0])),
                real(f64::from(check.ratio[1])),
                real(f64::from(check.baseline)),
                Value::Integer(i64::from(check.ok)),
                Value::Integer(created),
            ]
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
                time_ms: int_at(&v, 2),
                check: RefCheck {
                    ratio: [f32_at(&v, 3), f32_at(&v, 4)],
                    baseline: f32_at(&v, 5),
                    ok: int_at(&v, 6) != 0,
                },
            })
            .collect())
    }

    /// The runs of consecutive stored readings of `serial`: `(first, last)`
    /// within one boot, in sequence order (what a backfill plans around,
    /// [`crate::session::plan_backfill`]).
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
            cursors.push((
                *t,
                st.query([]).map_err(|e| StoreError::Sqlite {
                    path: self.path.clone(),
                    source: e,
                })?,
            ));
        }
        let mut heads: Vec<Option<ChainedRecord>> = Vec::new();
        for (t, rows) in &mut cursors {
            heads.push(next_record(rows, *t).map_err(|e| StoreError::Sqlite {
                path: self.path.clone(),
                source: e,
            })?);
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
            let next = next_record(rows, *t).map_err(|e| StoreError::Sqlite {
                path: self.path.clone(),
                source: e,
            })?;
            if let Some(rec) = std::mem::replace(&mut heads[i], next) {
                f(rec)?;
            }
        }
    }

    /// Walks the whole chain and reports every changed, removed or
    /// reordered record by position (see [`ChainProblem`]).
    ///
    /// # Errors
    /// [`StoreError`] on a database failure (a damaged chain is not an error: it is the report).
    pub fn verify_chain(&self) -> Result<ChainReport, StoreError> {
        struct Bad {
            rec: ChainedRecord,
            prev: Hash,
        }
        let mut records = 0u64;
        let mut expected = 1u64;
        let mut prev = GENESIS;
        let mut last_position = 0u64;
        let mut problems = Vec::new();
        let mut bad: Vec<Bad> = Vec::new();
        let mut truncated = false;
        self.for_each_record(|rec| {
            records += 1;
            if rec.position > expected {
                problems.push(ChainProblem::Missing {
                    first: expected,
                    last: rec.position - 1,
                });
            }
            let h = chain::link(&prev, rec.position, rec.table, &rec.canonical());
            // A record right after a gap cannot be checked against its
            // predecessor's hash: the gap is already reported.
            if h != rec.hash && rec.position <= expected {
                if bad.len() < MAX_PROBLEMS {
                    bad.push(Bad {
                        rec: rec.clone(),
                        prev,
                    });
                } else {
                    truncated = true;
                }
            }
            prev = rec.hash;
            last_position = rec.position;
            expected = rec.position.saturating_add(1);
            Ok(())
        })?;
        // Reordering: a bad record that verifies at another bad record's place.
        for b in &bad {
            let canon = b.rec.canonical();
            let home = bad.iter().find(|o| {
                o.rec.position != b.rec.position && o.rec.table == b.rec.table && {
                    let h = chain::link(&o.prev, o.rec.position, b.rec.table, &canon);
                    h == o.rec.hash || h == b.rec.hash
                }
            });
            problems.push(match home {
                Some(o) => ChainProblem::Moved {
                    position: b.rec.position,
                    belongs_at: o.rec.position,
                    table: b.rec.table,
                    key: b.rec.key(),
                },
                None => ChainProblem::Changed {
                    position: b.rec.position,
                    table: b.rec.table,
                    key: b.rec.key(),
                },
            });
        }
        let (head_pos, head_hash) = self.chain_head()?;
        if head_pos > last_position {
            problems.push(ChainProblem::Missing {
                first: last_position + 1,
                last: head_pos,
            });
        }
        if head_pos != last_position || head_hash != prev {
            problems.push(ChainProblem::HeadMismatch {
                head_position: head_pos,
                last_position,
            });
        }
        problems.sort_by_key(|p| match p {
            ChainProblem::Changed { position, .. } | ChainProblem::Moved { position, .. } => {
                *position
            }
            ChainProblem::Missing { first, .. } => *first,
            ChainProblem::HeadMismatch { .. } => u64::MAX,
        });
        if problems.len() > MAX_PROBLEMS {
            problems.truncate(MAX_PROBLEMS);
            truncated = true;
        }
        Ok(ChainReport {
            records,
            last_position,
            last_hash: chain::hex(&prev),
            problems,
            truncated,
        })
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
    let cols = columns(table);
    let mut values = Vec::with_capacity(cols.len());
    for i in 0..cols.len() {
        values.push(match row.get_ref(i + 2)? {
            ValueRef::Text(t) => match std::str::from_utf8(t) {
                Ok(s) => Value::Text(s.to_owned()),
                // Not written by fringe: keep the bytes (the hash will not verify).
                Err(_) => Value::Blob(t.to_vec()),
            },
            v => Value::try_from(v).unwrap_or(Value::Null),
        });
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

    fn device_id(&mut self, info: &DeviceInfo) -> rusqlite::Result<i64> {
        if let Some(id) = self
            .conn
            .prepare_cached("SELECT id FROM devices WHERE serial = ?1")?
            .query_row([&info.serial], |r| r.get(0))
            .optional()?
        {
            return Ok(id);
        }
        let values = vec![
            Value::Text(info.serial.clone()),
            Value::Integer(now_unix_ms()),
            opt_text(&info.firmware),
            opt_text(&info.protocol),
            info.freqs_hz.map_or(Value::Null, |f| real(f64::from(f[0]))),
            info.freqs_hz.map_or(Value::Null, |f| real(f64::from(f[1]))),
        ];
        let (pos, hash) = self.next(Table::Devices, &values);
        let mut bind = values;
        bind.push(Value::Integer(pos as i64));
        bind.push(Value::Blob(hash.to_vec()));
        self.conn.execute(
            "INSERT INTO devices (serial, first_seen_unix_ms, firmware, protocol, freq_low_hz, \
             freq_high_hz, position, hash) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8)",
            rusqlite::params_from_iter(bind),
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

/// Collects readings and commits them in batches at most
/// [`BATCH_MAX_AGE`] after the first one of a batch arrived.
#[derive(Debug)]
pub struct Batcher {
    serial: String,
    pending: Vec<(Reading, Source)>,
    since: Option<Instant>,
    max_age: Duration,
    total: InsertStats,
}

impl Batcher {
    /// A batcher for device `serial`.
    pub fn new(serial: &str) -> Self {
        Self {
            serial: serial.into(),
            pending: Vec::new(),
            since: None,
            max_age: BATCH_MAX_AGE,
            total: InsertStats::default(),
        }
    }

    /// Queues a reading.
    pub fn push(&mut self, r: Reading, source: Source, now: Instant) {
        if self.pending.is_empty() {
            self.since = Some(now);
        }
        self.pending.push((r, source));
    }

    /// Whether a commit is due (the oldest pending reading is old enough,
    /// or the batch is full).
    pub fn due(&self, now: Instant) -> bool {
        self.pending.len() >= BATCH_MAX_LEN
            || self
                .since
                .is_some_and(|s| now.saturating_duration_since(s) >= self.max_age)
    }

    /// When the next commit falls due, if anything is pending.
    pub fn deadline(&self) -> Option<Instant> {
        self.since.map(|s| s + self.max_age)
    }

    /// Readings waiting.
    pub fn pending(&self) -> usize {
        self.pending.len()
    }

    /// Everything stored so far through this batcher.
    pub fn total(&self) -> InsertStats {
        self.total
    }

    /// Commits what is pending (one transaction per source).
    ///
    /// # Errors
    /// [`StoreError`]; the readings stay pending and a later flush retries.
    pub fn flush(&mut self, store: &mut Store) -> Result<InsertStats, StoreError> {
        let mut stats = InsertStats::default();
        if self.pending.is_empty() {
            return Ok(stats);
        }
        for src in [Source::Stream, Source::Log] {
            let batch: Vec<Reading> = self
                .pending
                .iter()
                .filter(|(_, s)| *s == src)
                .map(|(r, _)| *r)
                .collect();
            if !batch.is_empty() {
                stats += store.insert_readings(&self.serial, &batch, src)?;
                self.pending.retain(|(_, s)| *s != src);
            }
        }
        self.since = None;
        self.total += stats;
        Ok(stats)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use fringe_protocol::{EventKind, ResetCause};

    const SERIAL: &str = "HGM-L2-0001";

    fn reading(boot: u32, counter: u32) -> Reading {
        let x = counter as f32;
        Reading {
            seq: Seq { boot, counter },
            time_ms: 1_700_000_000_000 + u64::from(counter) * 100,
            channels: [
                ChannelValue {
                    g_s: 1e-6 * x,
                    b_s: 2e-5,
                    eps_re: 4.0 + x * 1e-3,
                    eps_im: 0.3,
                },
                ChannelValue {
                    g_s: 3e-6,
                    b_s: 4e-4,
                    eps_re: 3.5,
                    eps_im: 0.1,
                },
            ],
            temperature_c: 21.5,
            moisture_pct: Some(14.2 + x * 1e-3),
            uncertainty_pct: 0.4,
            flags: Flags::CLOCK_UNSET,
            cell_cal: CalId([0xde, 0xad, 0xbe, 0xef]),
            product_cal: CalId([1, 2, 3, 4]),
        }
    }

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
    fn readings_round_trip_exactly_and_never_twice() {
        let (_d, mut s) = file_store();
        let batch: Vec<Reading> = (0..50).map(|c| reading(1, c)).collect();
        let st = s.insert_readings(SERIAL, &batch, Source::Stream).unwrap();
        assert_eq!(st.inserted, 50);
        // Overlapping batch from the log: only the new ones are stored.
        let again: Vec<Reading> = (40..60).map(|c| reading(1, c)).collect();
        let st = s.insert_readings(SERIAL, &again, Source::Log).unwrap();
        assert_eq!((st.inserted, st.duplicates, st.conflicts), (10, 10, 0));
        let back = s.readings(SERIAL).unwrap();
        assert_eq!(back.len(), 60);
        for (i, r) in back.iter().enumerate() {
            assert_eq!(r.reading, reading(1, i as u32));
            assert_eq!(r.source, if i < 50 { Source::Stream } else { Source::Log });
        }
        assert_eq!(
            s.last_seq(SERIAL).unwrap(),
            Some(Seq {
                boot: 1,
                counter: 59
            })
        );
        assert_eq!(s.reading_count(SERIAL).unwrap(), 60);
        // Same key, other values: kept out and counted.
        let mut odd = reading(1, 5);
        odd.temperature_c = 99.0;
        let st = s.insert_readings(SERIAL, &[odd], Source::Log).unwrap();
        assert_eq!(st.conflicts, 1);
        assert_eq!(s.readings(SERIAL).unwrap()[5].reading, reading(1, 5));
        assert!(s.verify_chain().unwrap().ok());
    }

    #[test]
    fn nan_and_negative_zero_keep_the_chain_valid() {
        let (_d, mut s) = file_store();
        let mut r = reading(2, 0);
        r.temperature_c = f32::NAN;
        r.uncertainty_pct = -0.0;
        r.moisture_pct = None;
        r.channels[0].eps_re = f32::NAN;
        s.insert_readings(SERIAL, &[r], Source::Stream).unwrap();
        let back = s.readings(SERIAL).unwrap()[0].reading;
        assert!(back.temperature_c.is_nan());
        assert_eq!(back.uncertainty_pct.to_bits(), 0.0f32.to_bits());
        assert_eq!(back.moisture_pct, None);
        assert_eq!(back.channels[0].eps_re.to_bits(), f32::NAN.to_bits());
        assert!(s.verify_chain().unwrap().ok(), "{:?}", s.verify_chain());
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

    #[test]
    fn events_are_idempotent() {
        let (_d, mut s) = file_store();
        let ev: Vec<Event> = (0..3)
            .map(|n| Event {
                number: n,
                boot: 1,
                time_ms: u64::from(n) * 10,
                kind: EventKind::ReferenceDrift {
                    ratio: 1.01,
                    baseline: 1.0,
                },
            })
            .collect();
        assert_eq!(s.insert_events(SERIAL, &ev).unwrap().inserted, 3);
        assert_eq!(s.insert_events(SERIAL, &ev).unwrap().duplicates, 3);
        let back: Vec<Event> = s
            .events(SERIAL)
            .unwrap()
            .into_iter()
            .map(|e| e.event)
            .collect();
        assert_eq!(back, ev);
        assert_eq!(s.last_event(SERIAL).unwrap(), Some(2));
    }

    #[test]
    fn calibrations_and_lab_samples_append_with_corrections() {
        let (_d, mut s) = file_store();
        let cal = NewCalibration {
            kind: CalKind::Product,
            cal_id: CalId([9, 9, 9, 9]),
            slot: Some(0),
            name: Some("wheat".into()),
            body: serde_json::json!({"params": [1.0, 2.0]}),
            note: None,
            supersedes: None,
        };
        let a = s.insert_calibration(SERIAL, &cal).unwrap();
        let b = s.insert_calibration(SERIAL, &cal).unwrap();
        assert!(!a.duplicate && b.duplicate && a.position == b.position && a.seq == 1);
        let sample = NewLabSample {
            sample_id: "HGM-2026-0117".into(),
            taken_unix_ms: 1_700_000_000_000,
            product: Some("wheat".into()),
            lab_moisture_pct: 14.6,
            basis: "wet".into(),
            method: Some("oven-dry 130 C 2 h".into()),
            reading: Some(Seq {
                boot: 1,
                counter: 4,
            }),
            note: None,
            supersedes: None,
        };
        let first = s.insert_lab_sample(SERIAL, &sample).unwrap();
        assert!(s.insert_lab_sample(SERIAL, &sample).unwrap().duplicate);
        let mut fixed = sample.clone();
        fixed.lab_moisture_pct = 14.8;
        match s.insert_lab_sample(SERIAL, &fixed) {
            Err(StoreError::SampleConflict { position, .. }) => {
                assert_eq!(position, first.position)
            }
            other => panic!("{other:?}"),
        }
        fixed.supersedes = Some(first.position);
        let second = s.insert_lab_sample(SERIAL, &fixed).unwrap();
        assert_eq!(second.seq, 2);
        fixed.supersedes = Some(9999);
        fixed.sample_id = "other".into();
        assert!(matches!(
            s.insert_lab_sample(SERIAL, &fixed),
            Err(StoreError::BadSupersedes { position: 9999, .. })
        ));
        let labs = s.lab_samples(SERIAL).unwrap();
        assert_eq!(labs.len(), 2);
        assert_eq!(labs[0].sample, sample);
        assert_eq!(s.calibrations(SERIAL).unwrap()[0].cal, cal);
        assert!(s.verify_chain().unwrap().ok());
    }

    #[test]
    fn gaps_are_found_per_boot() {
        let mut s = Store::open_in_memory().unwrap();
        let mut b: Vec<Reading> = [0, 1, 2, 5, 6, 9].iter().map(|&c| reading(1, c)).collect();
        b.extend([3, 4].iter().map(|&c| reading(2, c)));
        s.insert_readings(SERIAL, &b, Source::Stream).unwrap();
        assert_eq!(
            s.gaps(SERIAL).unwrap(),
            vec![
                Gap {
                    boot: 1,
                    first: 3,
                    last: 4
                },
                Gap {
                    boot: 1,
                    first: 7,
                    last: 8
                },
                Gap {
                    boot: 2,
                    first: 0,
                    last: 2
                },
            ]
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

    #[test]
    fn batcher_commits_when_due() {
        let mut s = Store::open_in_memory().unwrap();
        let mut b = Batcher::new(SERIAL);
        let t0 = Instant::now();
        b.push(reading(1, 0), Source::Stream, t0);
        b.push(reading(1, 1), Source::Log, t0);
        assert!(!b.due(t0 + Duration::from_millis(10)));
        assert!(b.due(t0 + BATCH_MAX_AGE));
        assert_eq!(b.deadline(), Some(t0 + BATCH_MAX_AGE));
        assert_eq!(b.flush(&mut s).unwrap().inserted, 2);
        assert_eq!(b.pending(), 0);
        assert_eq!(b.deadline(), None);
        assert_eq!(s.reading_count(SERIAL).unwrap(), 2);
    }
}
