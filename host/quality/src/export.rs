//! Bulk export of a store's readings, events or lab samples as CSV or JSON
//! Lines (`fringe export`), for spreadsheets and data tools.
//!
//! - One row per record, in device order and, within a device, in the
//!   device's order (readings by sequence, events by number, lab samples by
//!   record).
//! - Numbers as [`crate::numbers`] writes them in every file (the precision
//!   the device measured or the lab gave, no float noise); a value that
//!   does not exist is an empty CSV cell or a JSON `null`, never `NaN`.
//! - Times: `time_unix_ms` (ms since the Unix epoch) in both formats; the
//!   CSV adds `time` as a person reads it ([`crate::timefmt::fmt_person`]:
//!   local time with its offset, or UTC under `--utc`), the JSON Lines
//!   `time_utc` (the JSON habit of docs/JSON.md). A reading or event taken
//!   before its device's clock was set has the wall-clock time re-based
//!   from its boot's `ClockSet` event (`rebased` true), or none at all
//!   when the store holds no such event (empty time cells).
//! - `--from`/`--to` select by that wall-clock time, both ends included; a
//!   record without one cannot be placed in a range and is left out and
//!   counted ([`Summary::untimed_left_out`]). Without a range every record
//!   is exported.
//!
//! - CSV text that starts with `=`, `+`, `-`, `@`, a tab or a carriage
//!   return gets a leading apostrophe, so that a spreadsheet does not run
//!   it as a formula ([`spreadsheet_text`]); JSON Lines keep it as stored.
//!
//! The readings are streamed from the store ([`RecordRead::for_each_reading`]),
//! never held in memory all at once; the range is applied while reading
//! (the store has no index by wall-clock time, so every reading of the
//! chosen devices is read once).

use std::collections::BTreeMap;
use std::io::Write;

use fringe_protocol::{CalId, Event, Seq};
use fringe_store::record::{event_kind_name, BootClock, SINCE_BOOT_BELOW_MS};
use fringe_store::{RecordRead, StoreError};
use serde_json::Value as Json;

use crate::numbers;
use crate::timefmt::{fmt_person, fmt_time};

/// File format of an export.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    /// RFC 4180 CSV with a header row (the `csv` crate).
    Csv,
    /// JSON Lines: one object per record.
    Jsonl,
}

/// What to export.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Kind {
    /// The readings (moisture, uncertainty, temperature, flags, permittivities).
    Readings,
    /// The device events (boots, calibration changes, clock settings, faults, ...).
    Events,
    /// The lab grab samples recorded against the device.
    Lab,
}

impl Kind {
    /// Its name in messages and summaries.
    pub const fn as_str(self) -> &'static str {
        match self {
            Kind::Readings => "readings",
            Kind::Events => "events",
            Kind::Lab => "lab samples",
        }
    }

    /// The columns of its rows, in order.
    pub const fn columns(self) -> &'static [&'static str] {
        match self {
            Kind::Readings => &READING_COLUMNS,
            Kind::Events => &EVENT_COLUMNS,
            Kind::Lab => &LAB_COLUMNS,
        }
    }
}

/// Columns of a reading row (`time` is `time_utc` in JSON Lines).
pub const READING_COLUMNS: [&str; 19] = [
    "serial",
    "boot",
    "counter",
    "time",
    "time_unix_ms",
    "rebased",
    "moisture_pct",
    "uncertainty_pct",
    "temperature_c",
    "flags",
    "eps1_re",
    "eps1_im",
    "eps2_re",
    "eps2_im",
    "product_cal_id",
    "cell_cal_id",
    "source",
    "position",
    // Added after the others (2026-12-04), last so that a reader taking
    // the columns by position finds the earlier ones where they were.
    "moisture_basis",
];

/// Columns of an event row (`time` is `time_utc` in JSON Lines).
pub const EVENT_COLUMNS: [&str; 9] = [
    "serial",
    "number",
    "boot",
    "time",
    "time_unix_ms",
    "rebased",
    "kind",
    "detail",
    "position",
];

/// Columns of a lab sample row (`time` is `time_utc` in JSON Lines).
pub const LAB_COLUMNS: [&str; 14] = [
    "serial",
    "sample_id",
    "time",
    "time_unix_ms",
    "lab_moisture_pct",
    "basis",
    "product",
    "method",
    "matched_boot",
    "matched_counter",
    "note",
    "supersedes_position",
    "recorded_unix_ms",
    "position",
];

/// Which records: devices and a wall-clock range.
#[derive(Debug, Clone, Default)]
pub struct Selection {
    /// Device serials; empty: every device of the store.
    pub serials: Vec<String>,
    /// First wall-clock time, ms since the Unix epoch (included).
    pub from_ms: Option<i64>,
    /// Last wall-clock time, ms since the Unix epoch (included).
    pub to_ms: Option<i64>,
}

impl Selection {
    fn ranged(&self) -> bool {
        self.from_ms.is_some() || self.to_ms.is_some()
    }

    fn contains(&self, t: i64) -> bool {
        self.from_ms.is_none_or(|f| t >= f) && self.to_ms.is_none_or(|e| t <= e)
    }
}

/// What an export wrote.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize)]
pub struct Summary {
    /// What was exported.
    pub kind: Kind,
    /// Rows written (the header not counted).
    pub rows: u64,
    /// Rows per device, for every device exported (also those with none).
    pub per_device: BTreeMap<String, u64>,
    /// Records in the chosen devices without a wall-clock time, left out
    /// because a range was given.
    pub untimed_left_out: u64,
    /// Earliest and latest wall-clock time of the rows written, ms.
    pub first_unix_ms: Option<i64>,
    /// See `first_unix_ms`.
    pub last_unix_ms: Option<i64>,
}

/// Why an export did not finish.
#[derive(Debug, thiserror::Error)]
pub enum ExportError {
    /// A serial the store does not hold.
    #[error("device {serial:?} is not in {db} (it holds {known})")]
    UnknownDevice {
        /// The serial asked for.
        serial: String,
        /// The store.
        db: String,
        /// The serials it holds, for a person.
        known: String,
    },
    /// `from` after `to`.
    #[error("the range ends before it starts: --from {from} is after --to {to}")]
    EmptyRange {
        /// `--from`, as a person reads it.
        from: String,
        /// `--to`, as a person reads it.
        to: String,
    },
    /// The store failed.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// Writing the rows failed.
    #[error("writing the export: {0}")]
    Write(#[source] std::io::Error),
}

/// One value of a row.
#[derive(Debug, Clone)]
enum Cell {
    Null,
    Int(i64),
    Bool(bool),
    /// A number written by the rule of its column.
    Num(f64),
    Text(String),
    List(Vec<&'static str>),
}

fn opt_num(v: Option<f32>) -> Cell {
    v.filter(|x| x.is_finite())
        .map_or(Cell::Null, |x| Cell::Num(f64::from(x)))
}

fn opt_int(v: Option<i64>) -> Cell {
    v.map_or(Cell::Null, Cell::Int)
}

fn opt_text(v: Option<&str>) -> Cell {
    v.map_or(Cell::Null, |s| Cell::Text(s.to_owned()))
}

fn cal_id(id: CalId) -> Cell {
    if id == CalId::NONE {
        Cell::Null
    } else {
        Cell::Text(id.to_string())
    }
}

/// The rows' writer: CSV or JSON Lines onto `out`.
struct Rows<'w> {
    format: Format,
    columns: &'static [&'static str],
    csv: Option<csv::Writer<&'w mut dyn Write>>,
    json: Option<&'w mut dyn Write>,
}

impl<'w> Rows<'w> {
    fn new(format: Format, kind: Kind, out: &'w mut dyn Write) -> Result<Self, ExportError> {
        let columns = kind.columns();
        match format {
            Format::Csv => {
                let mut w = csv::Writer::from_writer(out);
                w.write_record(columns).map_err(csv_io)?;
                Ok(Self {
                    format,
                    columns,
                    csv: Some(w),
                    json: None,
                })
            }
            Format::Jsonl => Ok(Self {
                format,
                columns,
                csv: None,
                json: Some(out),
            }),
        }
    }

    fn write(&mut self, cells: &[Cell]) -> Result<(), ExportError> {
        debug_assert_eq!(cells.len(), self.columns.len());
        match self.format {
            Format::Csv => {
                let row: Vec<String> = self
                    .columns
                    .iter()
                    .zip(cells)
                    .map(|(c, v)| match v {
                        Cell::Null => String::new(),
                        Cell::Int(i) => i.to_string(),
                        Cell::Bool(b) => b.to_string(),
                        Cell::Num(x) => numbers::cell(c, Some(*x)),
                        Cell::Text(s) => spreadsheet_text(s),
                        Cell::List(l) => spreadsheet_text(&l.join("|")),
                    })
                    .collect();
                self.csv
                    .as_mut()
                    .expect("CSV writer")
                    .write_record(&row)
                    .map_err(csv_io)
            }
            Format::Jsonl => {
                let mut o = serde_json::Map::new();
                for (c, v) in self.columns.iter().zip(cells) {
                    let (name, value) = match (*c, v) {
                        ("time", Cell::Int(ms)) => ("time_utc", Json::from(fmt_time(*ms))),
                        ("time", _) => ("time_utc", Json::Null),
                        (c, v) => (c, json_of(c, v)),
                    };
                    o.insert(name.to_owned(), value);
                }
                let out = self.json.as_mut().expect("JSON writer");
                serde_json::to_writer(&mut **out, &Json::Object(o))
                    .map_err(|e| ExportError::Write(e.into()))?;
                out.write_all(b"\n").map_err(ExportError::Write)
            }
        }
    }

    fn finish(self) -> Result<(), ExportError> {
        if let Some(mut w) = self.csv {
            w.flush().map_err(ExportError::Write)?;
        }
        if let Some(w) = self.json {
            w.flush().map_err(ExportError::Write)?;
        }
        Ok(())
    }
}

/// Text for a CSV cell a spreadsheet opens: text that starts with `=`,
/// `+`, `-`, `@`, a tab or a carriage return gets a leading apostrophe, so
/// that the spreadsheet shows it as text instead of evaluating it as a
/// formula (a sample id, lab method or note typed by a person, or a tag;
/// the OWASP "CSV Injection" advice, from memory). JSON Lines keep the
/// text as stored.
fn spreadsheet_text(s: &str) -> String {
    if s.starts_with(['=', '+', '-', '@', '\t', '\r']) {
        format!("'{s}")
    } else {
        s.to_owned()
    }
}

fn csv_io(e: csv::Error) -> ExportError {
    ExportError::Write(std::io::Error::other(e))
}

/// A cell as JSON: a number by its column's rule (the same digits the CSV
/// has), `null` for what does not exist.
fn json_of(column: &str, v: &Cell) -> Json {
    match v {
        Cell::Null => Json::Null,
        Cell::Int(i) => Json::from(*i),
        Cell::Bool(b) => Json::from(*b),
        Cell::Num(x) => numbers::cell(column, Some(*x))
            .parse::<f64>()
            .ok()
            .and_then(serde_json::Number::from_f64)
            .map_or(Json::Null, Json::Number),
        Cell::Text(s) => Json::from(s.as_str()),
        Cell::List(l) => Json::from(l.clone()),
    }
}

/// The CSV `time` cell holds the person's time; the JSON the UTC one
/// (see [`Rows::write`]): both from the wall-clock ms.
fn time_cells(format: Format, wall: Option<i64>) -> Cell {
    match (format, wall) {
        (_, None) => Cell::Null,
        (Format::Csv, Some(ms)) => Cell::Text(fmt_person(ms)),
        (Format::Jsonl, Some(ms)) => Cell::Int(ms),
    }
}

/// Wall-clock time of an event: its device time when the clock was set,
/// else re-based from its boot's first `ClockSet` (events numbered below
/// it carry time since boot), else none.
fn event_time(clocks: &BTreeMap<u32, BootClock>, e: &Event) -> (Option<i64>, bool) {
    if e.time_ms >= SINCE_BOOT_BELOW_MS {
        return (Some(e.time_ms as i64), false);
    }
    match clocks.get(&e.boot) {
        Some(c) if e.number < c.event_number => (Some(c.origin_ms + e.time_ms as i64), true),
        _ => (None, false),
    }
}

/// Writes the records of `kind` chosen by `sel` from `store` onto `out` as
/// `format`, calling `progress` with the rows written so far every 10,000
/// rows and at the end.
///
/// # Errors
/// [`ExportError`]: an unknown serial, an empty range, the store, the writer.
pub fn export(
    store: &(impl RecordRead + ?Sized),
    db_label: &str,
    kind: Kind,
    sel: &Selection,
    format: Format,
    out: &mut dyn Write,
    progress: &mut dyn FnMut(u64),
) -> Result<Summary, ExportError> {
    if let (Some(f), Some(t)) = (sel.from_ms, sel.to_ms) {
        if f > t {
            return Err(ExportError::EmptyRange {
                from: fmt_person(f),
                to: fmt_person(t),
            });
        }
    }
    let known: Vec<String> = store
        .devices()?
        .into_iter()
        .map(|d| d.record.serial)
        .collect();
    let serials = if sel.serials.is_empty() {
        known.clone()
    } else {
        for s in &sel.serials {
            if !known.contains(s) {
                return Err(ExportError::UnknownDevice {
                    serial: s.clone(),
                    db: db_label.to_owned(),
                    known: if known.is_empty() {
                        "no device".to_owned()
                    } else {
                        known.join(", ")
                    },
                });
            }
        }
        // Each device once, in the order first named (`--device A
        // --device B --device A` wrote A's rows twice: dedup removes only
        // neighbours).
        let mut s: Vec<String> = Vec::new();
        for serial in &sel.serials {
            if !s.contains(serial) {
                s.push(serial.clone());
            }
        }
        s
    };
    let mut sum = Summary {
        kind,
        rows: 0,
        per_device: BTreeMap::new(),
        untimed_left_out: 0,
        first_unix_ms: None,
        last_unix_ms: None,
    };
    let mut rows = Rows::new(format, kind, out)?;
    // Counts one row written at wall time `t` (if known).
    let tally = |sum: &mut Summary, serial: &str, t: Option<i64>, progress: &mut dyn FnMut(u64)| {
        sum.rows += 1;
        *sum.per_device.entry(serial.to_owned()).or_default() += 1;
        if let Some(t) = t {
            sum.first_unix_ms = Some(sum.first_unix_ms.map_or(t, |f| f.min(t)));
            sum.last_unix_ms = Some(sum.last_unix_ms.map_or(t, |l| l.max(t)));
        }
        if sum.rows.is_multiple_of(10_000) {
            progress(sum.rows);
        }
    };
    for serial in &serials {
        sum.per_device.entry(serial.clone()).or_default();
        match kind {
            Kind::Readings => {
                // The basis of each product calibration of the device, by
                // id, from its records: a reading's moisture is on its
                // calibration's basis.
                let bases = crate::analysis::calibration_bases(store, serial)?;
                let mut failed: Option<ExportError> = None;
                let r = store.for_each_reading(
                    serial,
                    Seq::from_u64(0),
                    Seq::from_u64(u64::MAX),
                    &mut |s| {
                        let wall = s.wall_ms;
                        match wall {
                            Some(t) if !sel.contains(t) => return Ok(()),
                            None if sel.ranged() => {
                                sum.untimed_left_out += 1;
                                return Ok(());
                            }
                            _ => {}
                        }
                        let r = &s.reading;
                        let moisture = r.moisture_pct.filter(|m| m.is_finite());
                        let ch = &r.channels;
                        let cells = [
                            Cell::Text(serial.clone()),
                            Cell::Int(i64::from(r.seq.boot)),
                            Cell::Int(i64::from(r.seq.counter)),
                            time_cells(format, wall),
                            opt_int(wall),
                            Cell::Bool(s.rebased),
                            opt_num(moisture),
                            opt_num(moisture.and(Some(r.uncertainty_pct))),
                            opt_num(Some(r.temperature_c)),
                            Cell::List(r.flags.names().collect()),
                            opt_num(Some(ch[0].eps_re)),
                            opt_num(Some(ch[0].eps_im)),
                            opt_num(Some(ch[1].eps_re)),
                            opt_num(Some(ch[1].eps_im)),
                            cal_id(r.product_cal),
                            cal_id(r.cell_cal),
                            Cell::Text(
                                match s.source {
                                    fringe_store::record::Source::Stream => "stream",
                                    fringe_store::record::Source::Log => "log",
                                }
                                .to_owned(),
                            ),
                            Cell::Int(s.position as i64),
                            bases.get(&r.product_cal).map_or(Cell::Null, |b| {
                                Cell::Text(crate::limits::LimitBasis::from(*b).word().to_owned())
                            }),
                        ];
                        if let Err(e) = rows.write(&cells) {
                            failed = Some(e);
                            // Stops the store's loop; the write error is returned below.
                            return Err(StoreError::Backend {
                                path: std::path::PathBuf::from(db_label),
                                source: "export stopped".into(),
                            });
                        }
                        tally(&mut sum, serial, wall, progress);
                        Ok(())
                    },
                );
                if let Some(e) = failed {
                    return Err(e);
                }
                r?;
            }
            Kind::Events => {
                let events = store.events(serial)?;
                let clocks = BootClock::from_events(events.iter().map(|e| &e.record));
                for e in &events {
                    let (wall, rebased) = event_time(&clocks, e);
                    match wall {
                        Some(t) if !sel.contains(t) => continue,
                        None if sel.ranged() => {
                            sum.untimed_left_out += 1;
                            continue;
                        }
                        _ => {}
                    }
                    let cells = [
                        Cell::Text(serial.clone()),
                        Cell::Int(i64::from(e.number)),
                        Cell::Int(i64::from(e.boot)),
                        time_cells(format, wall),
                        opt_int(wall),
                        Cell::Bool(rebased),
                        Cell::Text(event_kind_name(&e.kind).to_owned()),
                        Cell::Text(serde_json::to_string(&e.kind).unwrap_or_default()),
                        Cell::Int(e.position as i64),
                    ];
                    rows.write(&cells)?;
                    tally(&mut sum, serial, wall, progress);
                }
            }
            Kind::Lab => {
                for l in store.lab_samples(serial)? {
                    let s = &l.sample;
                    let wall = Some(s.taken_unix_ms);
                    if !sel.contains(s.taken_unix_ms) {
                        continue;
                    }
                    let cells = [
                        Cell::Text(serial.clone()),
                        Cell::Text(s.sample_id.clone()),
                        time_cells(format, wall),
                        opt_int(wall),
                        Cell::Num(s.lab_moisture_pct),
                        Cell::Text(s.basis.clone()),
                        opt_text(s.product.as_deref()),
                        opt_text(s.method.as_deref()),
                        opt_int(s.reading.map(|q| i64::from(q.boot))),
                        opt_int(s.reading.map(|q| i64::from(q.counter))),
                        opt_text(s.note.as_deref()),
                        opt_int(s.supersedes.map(|p| p as i64)),
                        Cell::Int(l.created_unix_ms),
                        Cell::Int(l.position as i64),
                    ];
                    rows.write(&cells)?;
                    tally(&mut sum, serial, wall, progress);
                }
            }
        }
    }
    rows.finish()?;
    progress(sum.rows);
    Ok(sum)
}
