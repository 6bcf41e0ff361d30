//! The hash chain over every stored record.
//!
//! Every row of `devices`, `readings`, `events`, `calibrations` and
//! `lab_samples` takes the next chain position (its `position` column, one
//! counter shared by all tables) and stores
//!
//! ```text
//! hash(p) = SHA-256( "fringe-chain/1" || hash(p-1) || p as u64 LE || table tag as u8 || canonical row )
//! hash(0) = 32 zero bytes (before the first record)
//! ```
//!
//! The canonical row is the device serial (as text) followed by the row's
//! columns in the order documented in `host/SCHEMA.md` and listed by
//! [`Table::columns`] (all but `position`, `device` and `hash`), each as a
//! [`Value`] of the store's own type, written by [`Canon::value`]:
//!
//! ```text
//! NULL     0x00
//! INTEGER  0x01 i64 LE (8 bytes)
//! REAL     0x02 f64 bits LE (8 bytes)
//! TEXT     0x03 u32 LE length, UTF-8 bytes
//! BLOB     0x04 u32 LE length, bytes
//! ```
//!
//! Encoding by kind means a change of any value, or of its kind, in the
//! database changes the hash. Devices appear by serial (never by a back
//! end's internal device number), so a hash depends only on what a person
//! can read in the row, and every back end (SQLite, PostgreSQL) that keeps
//! the same values yields the same chain.

use sha2::{Digest, Sha256};

use crate::value::Value;

/// Domain-separation prefix of every chain hash.
pub const DOMAIN: &[u8] = b"fringe-chain/1";

/// A SHA-256 value.
pub type Hash = [u8; 32];

/// The hash before the first record.
pub const GENESIS: Hash = [0u8; 32];

/// Which table a chained record lives in (its tag in the hash input).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Table {
    /// `devices`.
    Devices = 1,
    /// `readings`.
    Readings = 2,
    /// `events`.
    Events = 3,
    /// `calibrations`.
    Calibrations = 4,
    /// `lab_samples`.
    LabSamples = 5,
    /// `reference_checks` (schema version 2).
    ReferenceChecks = 6,
}

impl Table {
    /// All chained tables.
    pub const ALL: [Table; 6] = [
        Table::Devices,
        Table::Readings,
        Table::Events,
        Table::Calibrations,
        Table::LabSamples,
        Table::ReferenceChecks,
    ];

    /// The SQL table name.
    pub const fn name(self) -> &'static str {
        match self {
            Table::Devices => "devices",
            Table::Readings => "readings",
            Table::Events => "events",
            Table::Calibrations => "calibrations",
            Table::LabSamples => "lab_samples",
            Table::ReferenceChecks => "reference_checks",
        }
    }
}

impl Table {
    /// The hashed columns of the table's records, serial first, in hash
    /// order (`host/SCHEMA.md`).
    pub const fn columns(self) -> &'static [&'static str] {
        match self {
            Table::Devices => DEVICE_COLS,
            Table::Readings => READING_COLS,
            Table::Events => EVENT_COLS,
            Table::Calibrations => CAL_COLS,
            Table::LabSamples => LAB_COLS,
            Table::ReferenceChecks => REFCHECK_COLS,
        }
    }

    /// The table of a name ([`Table::name`]).
    pub fn named(name: &str) -> Option<Table> {
        Table::ALL.into_iter().find(|t| t.name() == name)
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

/// One chained record as a back end hands it out, in position order (see
/// [`crate::RecordRead::for_each_record`]).
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
        canonical(&self.values)
    }

    /// The value of column `col`, if the table has it.
    pub fn value_of(&self, col: &str) -> Option<&Value> {
        self.columns
            .iter()
            .position(|c| *c == col)
            .and_then(|i| self.values.get(i))
    }

    /// A short key for a person (`SERIAL reading 3.17`, `SERIAL event 4`, ...).
    pub fn key(&self) -> String {
        let serial = self.values.first().and_then(Value::as_text).unwrap_or("?");
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

impl std::fmt::Display for Table {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.name())
    }
}

/// Builder of a canonical row encoding (see the module doc).
#[derive(Debug, Default, Clone)]
pub struct Canon(Vec<u8>);

impl Canon {
    /// An empty encoding.
    pub fn new() -> Self {
        Self(Vec::with_capacity(128))
    }

    /// Appends one value by its kind.
    pub fn value(&mut self, v: &Value) -> &mut Self {
        match v {
            Value::Null => self.0.push(0),
            Value::Integer(i) => {
                self.0.push(1);
                self.0.extend_from_slice(&i.to_le_bytes());
            }
            Value::Real(x) => {
                self.0.push(2);
                self.0.extend_from_slice(&x.to_bits().to_le_bytes());
            }
            Value::Text(t) => {
                self.0.push(3);
                self.len_bytes(t.as_bytes());
            }
            Value::Blob(b) => {
                self.0.push(4);
                self.len_bytes(b);
            }
        }
        self
    }

    fn len_bytes(&mut self, b: &[u8]) {
        // Rows are far below 4 GiB; saturate rather than wrap if one were not.
        let n = u32::try_from(b.len()).unwrap_or(u32::MAX);
        self.0.extend_from_slice(&n.to_le_bytes());
        self.0.extend_from_slice(b);
    }

    /// The encoding so far.
    pub fn as_bytes(&self) -> &[u8] {
        &self.0
    }

    /// The encoding.
    pub fn into_bytes(self) -> Vec<u8> {
        self.0
    }
}

/// The canonical encoding of a row given as its values (serial first).
pub fn canonical(values: &[Value]) -> Vec<u8> {
    let mut c = Canon::new();
    for v in values {
        c.value(v);
    }
    c.into_bytes()
}

/// The chain hash of the record at `position` (see the module doc).
pub fn link(prev: &Hash, position: u64, table: Table, canonical: &[u8]) -> Hash {
    let mut h = Sha256::new();
    h.update(DOMAIN);
    h.update(prev);
    h.update(position.to_le_bytes());
    h.update([table as u8]);
    h.update(canonical);
    let out = h.finalize();
    let mut hash = [0u8; 32];
    hash.copy_from_slice(&out);
    hash
}

/// Lower-case hex of a hash (for messages and JSON).
pub fn hex(hash: &Hash) -> String {
    use std::fmt::Write;
    let mut s = String::with_capacity(64);
    for b in hash {
        let _ = write!(s, "{b:02x}");
    }
    s
}

/// One problem found by [`crate::verify_chain`].
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize)]
#[serde(tag = "problem", rename_all = "snake_case")]
pub enum ChainProblem {
    /// The record at `position` does not hash to its stored hash given the
    /// stored hash before it: the row was changed (or its hash was
    /// recomputed, which breaks the next link instead).
    Changed {
        /// Chain position.
        position: u64,
        /// Table of the record.
        table: Table,
        /// The record's key for a person (`serial boot.counter`, ...).
        key: String,
    },
    /// Positions `first..=last` hold no record: records were removed.
    Missing {
        /// First missing position.
        first: u64,
        /// Last missing position.
        last: u64,
    },
    /// The record stored at `position` verifies only at `belongs_at`: records
    /// were reordered.
    Moved {
        /// Where the record is now.
        position: u64,
        /// Where its hash says it belongs.
        belongs_at: u64,
        /// Table of the record.
        table: Table,
        /// The record's key for a person.
        key: String,
    },
    /// The chain head (last position and hash) does not match the last record.
    HeadMismatch {
        /// Position recorded in the head.
        head_position: u64,
        /// Last position found in the tables.
        last_position: u64,
    },
}

impl serde::Serialize for Table {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(self.name())
    }
}

impl std::fmt::Display for ChainProblem {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            ChainProblem::Changed {
                position,
                table,
                key,
            } => write!(
                f,
                "position {position}: {table} record {key} does not match its hash (changed after it was stored)"
            ),
            ChainProblem::Missing { first, last } if first == last => {
                write!(f, "position {first}: record removed")
            }
            ChainProblem::Missing { first, last } => {
                write!(f, "positions {first}..={last}: records removed")
            }
            ChainProblem::Moved {
                position,
                belongs_at,
                table,
                key,
            } => write!(
                f,
                "position {position}: {table} record {key} belongs at position {belongs_at} (records reordered)"
            ),
            ChainProblem::HeadMismatch {
                head_position,
                last_position,
            } => write!(
                f,
                "chain head says the last record is at position {head_position}, the tables end at {last_position}"
            ),
        }
    }
}

/// What [`crate::verify_chain`] found.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize)]
pub struct ChainReport {
    /// Records checked.
    pub records: u64,
    /// Last position in the tables (0 if empty).
    pub last_position: u64,
    /// Stored hash of the last record (hex), genesis if empty.
    pub last_hash: String,
    /// Problems in position order (at most [`MAX_PROBLEMS`]).
    pub problems: Vec<ChainProblem>,
    /// Whether more problems were found than listed.
    pub truncated: bool,
}

impl ChainReport {
    /// Whether the chain verified with no problem.
    pub fn ok(&self) -> bool {
        self.problems.is_empty()
    }
}

/// Most problems a report lists.
pub const MAX_PROBLEMS: usize = 1000;

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sha256_of_abc_matches_fips_180_2_example() {
        // FIPS 180-2, Appendix B.1: SHA-256("abc").
        let d = Sha256::digest(b"abc");
        let mut h = [0u8; 32];
        h.copy_from_slice(&d);
        assert_eq!(
            hex(&h),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
    }

    #[test]
    fn canon_layout_is_fixed() {
        let bytes = canonical(&[
            Value::Text("ab".into()),
            Value::Null,
            Value::Integer(-2),
            Value::Real(1.0),
            Value::Blob(vec![7]),
        ]);
        let mut want = vec![3, 2, 0, 0, 0, b'a', b'b', 0, 1];
        want.extend_from_slice(&(-2i64).to_le_bytes());
        want.push(2);
        want.extend_from_slice(&1.0f64.to_bits().to_le_bytes());
        want.extend_from_slice(&[4, 1, 0, 0, 0, 7]);
        assert_eq!(bytes, want);
        // Same number, other storage class: other encoding.
        assert_ne!(
            canonical(&[Value::Integer(1)]),
            canonical(&[Value::Real(1.0)])
        );
    }

    #[test]
    fn link_depends_on_every_input() {
        let base = link(&GENESIS, 1, Table::Readings, b"row");
        assert_ne!(base, link(&[1; 32], 1, Table::Readings, b"row"));
        assert_ne!(base, link(&GENESIS, 2, Table::Readings, b"row"));
        assert_ne!(base, link(&GENESIS, 1, Table::Events, b"row"));
        assert_ne!(base, link(&GENESIS, 1, Table::Readings, b"rox"));
        assert_eq!(base, link(&GENESIS, 1, Table::Readings, b"row"));
    }
}
