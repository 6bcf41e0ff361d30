//! The record model: what the store keeps, in one shape when read back
//! ([`Stored`]), and the canonical values of each record (the row codec
//! every back end shares, so that every back end hashes the same bytes).
//!
//! Records are keyed by device serial and a sequence: readings by the
//! device's `Seq`, events by the device's event number, calibrations, lab
//! samples and reference checks by a per-device record number the store
//! assigns from 1 (`seq`).

use std::collections::BTreeMap;

use fringe_protocol::{CalId, ChannelValue, Event, Flags, Reading, RefCheck, Seq, N_FREQ};

use crate::chain::Table;
use crate::value::Value;

/// A record as the store holds it: its chain position and the record.
/// Derefs to the record, so `stored.reading` reads the record's field.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Stored<T> {
    /// Chain position.
    pub position: u64,
    /// The record.
    #[serde(flatten)]
    pub record: T,
}

impl<T> std::ops::Deref for Stored<T> {
    type Target = T;
    fn deref(&self) -> &T {
        &self.record
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
    /// The stored number (anything but 1 reads as [`Source::Stream`]).
    pub fn from_i64(v: i64) -> Self {
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

/// A device as recorded.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct DeviceRecord {
    /// Serial number.
    pub serial: String,
    /// When the store first saw it, ms since the Unix epoch.
    pub first_seen_unix_ms: i64,
    /// Firmware version then.
    pub firmware: Option<String>,
    /// Protocol version then.
    pub protocol: Option<String>,
}

/// A stored device.
pub type StoredDevice = Stored<DeviceRecord>;

/// A reading as stored, with the time it was taken on the wall clock.
#[derive(Debug, Clone, PartialEq)]
pub struct LoggedReading {
    /// The reading as the device sent it (NaN temperature or uncertainty
    /// are stored as NULL and read back as NaN; -0.0 there reads back as 0.0).
    pub reading: Reading,
    /// How it arrived.
    pub source: Source,
    /// When it was taken, ms since the Unix epoch: the device time when its
    /// clock was set; for a reading taken before (flag `clock_unset`, time
    /// since boot) the boot's wall-clock origin plus that time, once the
    /// store holds the boot's `ClockSet` event ([`BootClock`]); `None` while
    /// it does not. Computed when read; not stored.
    pub wall_ms: Option<i64>,
    /// `wall_ms` was re-based from a time since boot (computed, not what
    /// the device sent; the stored row keeps the device time).
    pub rebased: bool,
}

/// A stored reading.
pub type StoredReading = Stored<LoggedReading>;

/// A stored event.
pub type StoredEvent = Stored<Event>;

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
        if !r.flags.contains(Flags::CLOCK_UNSET) {
            return (Some(r.time_ms as i64), false);
        }
        match clock {
            Some(c) => (Some(c.origin_ms + r.time_ms as i64), true),
            None => (None, false),
        }
    }

    /// The boot clocks of a device from its events in number order: for
    /// each boot, the first `ClockSet` event whose old time counts from
    /// boot (a later one corrects a clock already set).
    pub fn from_events<'a>(events: impl IntoIterator<Item = &'a Event>) -> BTreeMap<u32, Self> {
        let mut out = BTreeMap::new();
        for e in events {
            if let fringe_protocol::EventKind::ClockSet { old_ms, new_ms } = e.kind {
                if old_ms < SINCE_BOOT_BELOW_MS {
                    out.entry(e.boot).or_insert(BootClock {
                        origin_ms: new_ms as i64 - old_ms as i64,
                        event_number: e.number,
                    });
                }
            }
        }
        out
    }
}

/// Device times below this (2000-01-01, ms since the Unix epoch) count
/// from boot: the device clock was not set.
pub const SINCE_BOOT_BELOW_MS: u64 = 946_684_800_000;

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

    /// The kind of a stored text (anything unknown reads as product).
    pub fn parse(s: &str) -> Self {
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

/// A calibration as recorded.
#[derive(Debug, Clone, PartialEq)]
pub struct CalibrationRecord {
    /// Per-device record number, from 1.
    pub seq: u64,
    /// When it was recorded, ms since the Unix epoch.
    pub created_unix_ms: i64,
    /// The record.
    pub cal: NewCalibration,
}

/// A stored calibration.
pub type StoredCalibration = Stored<CalibrationRecord>;

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

/// A lab sample as recorded.
#[derive(Debug, Clone, PartialEq)]
pub struct LabSampleRecord {
    /// Per-device record number, from 1.
    pub seq: u64,
    /// When it was recorded, ms since the Unix epoch.
    pub created_unix_ms: i64,
    /// The record.
    pub sample: NewLabSample,
}

/// A stored lab sample.
pub type StoredLabSample = Stored<LabSampleRecord>;

/// An internal reference check as recorded.
#[derive(Debug, Clone, PartialEq)]
pub struct RefCheckRecord {
    /// Device time of the check, ms.
    pub time_ms: i64,
    /// The check as the device reported it.
    pub check: RefCheck,
}

/// A stored internal reference check.
pub type StoredRefCheck = Stored<RefCheckRecord>;

/// Result of recording one calibration, lab sample or reference check.
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

// ------------------------------------------------------------ the row codec

/// A float as every back end stores it in a canonical record: NaN as
/// [`Value::Null`], -0.0 as 0.0 (SQLite keeps integral reals as integers
/// and returns 0.0 for -0.0; the canonical form follows, so a reading hashes
/// the same in every back end).
pub fn real(x: f64) -> Value {
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

/// The integer in column `i` (0 if absent or not a number).
pub fn int_at(v: &[Value], i: usize) -> i64 {
    v.get(i).and_then(Value::as_i64).unwrap_or(0)
}

/// The integer in column `i`, if it holds one.
pub fn opt_int_at(v: &[Value], i: usize) -> Option<i64> {
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

fn f64_at(v: &[Value], i: usize) -> f64 {
    match v.get(i) {
        Some(Value::Real(x)) => *x,
        Some(Value::Integer(x)) => *x as f64,
        _ => f64::NAN,
    }
}

/// The text in column `i`, if it holds text.
pub fn text_at(v: &[Value], i: usize) -> Option<String> {
    v.get(i).and_then(Value::as_text).map(str::to_owned)
}

/// The hashed values of a device (serial first), in
/// [`Table::Devices`]' column order.
pub fn device_values(info: &DeviceInfo, first_seen_unix_ms: i64) -> Vec<Value> {
    vec![
        Value::Text(info.serial.clone()),
        Value::Integer(first_seen_unix_ms),
        opt_text(&info.firmware),
        opt_text(&info.protocol),
        info.freqs_hz.map_or(Value::Null, |f| real(f64::from(f[0]))),
        info.freqs_hz.map_or(Value::Null, |f| real(f64::from(f[1]))),
    ]
}

/// A device record from its values.
pub fn device_from_values(v: &[Value]) -> DeviceRecord {
    DeviceRecord {
        serial: text_at(v, 0).unwrap_or_default(),
        first_seen_unix_ms: int_at(v, 1),
        firmware: text_at(v, 2),
        protocol: text_at(v, 3),
    }
}

/// The hashed values of a reading (serial first), in
/// [`Table::Readings`]' column order.
pub fn reading_values(serial: &str, r: &Reading, source: Source) -> Vec<Value> {
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

/// The column of `source` in a reading's values: two stored readings equal
/// but for it are the same reading (streamed and read back from the log).
pub const READING_SOURCE_COLUMN: usize = 11;

/// A reading and its source from its values.
pub fn reading_from_values(v: &[Value]) -> (Reading, Source) {
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

/// The stored name of an event's kind.
pub fn event_kind_name(k: &fringe_protocol::EventKind) -> &'static str {
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
        K::ModbusChanged { .. } => "modbus_changed",
    }
}

/// The hashed values of an event (serial first), in [`Table::Events`]'
/// column order; the detail is the event's JSON (serde form).
pub fn event_values(serial: &str, e: &Event) -> Vec<Value> {
    vec![
        Value::Text(serial.to_owned()),
        Value::Integer(i64::from(e.number)),
        Value::Integer(i64::from(e.boot)),
        Value::Integer(e.time_ms as i64),
        Value::Text(event_kind_name(&e.kind).to_owned()),
        Value::Text(serde_json::to_string(&e.kind).unwrap_or_default()),
    ]
}

/// An event from its values.
///
/// # Errors
/// A detail that is not the JSON of an event kind (as text).
pub fn event_from_values(v: &[Value]) -> Result<Event, String> {
    let detail = text_at(v, 5).unwrap_or_default();
    let kind = serde_json::from_str(&detail).map_err(|e| format!("detail: {e}"))?;
    Ok(Event {
        number: int_at(v, 1) as u32,
        boot: int_at(v, 2) as u32,
        time_ms: int_at(v, 3) as u64,
        kind,
    })
}

/// The hashed values of a calibration record (serial first), in
/// [`Table::Calibrations`]' column order.
pub fn calibration_values(
    serial: &str,
    seq: i64,
    created: i64,
    cal: &NewCalibration,
) -> Vec<Value> {
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
}

/// A calibration record from its values.
pub fn calibration_from_values(v: &[Value]) -> CalibrationRecord {
    CalibrationRecord {
        seq: int_at(v, 1) as u64,
        created_unix_ms: int_at(v, 9),
        cal: NewCalibration {
            kind: CalKind::parse(&text_at(v, 2).unwrap_or_default()),
            cal_id: CalId((int_at(v, 3) as u32).to_be_bytes()),
            slot: opt_int_at(v, 4).map(|s| s as u8),
            name: text_at(v, 5),
            body: text_at(v, 6)
                .and_then(|b| serde_json::from_str(&b).ok())
                .unwrap_or(serde_json::Value::Null),
            note: text_at(v, 7),
            supersedes: opt_int_at(v, 8).map(|p| p as u64),
        },
    }
}

/// The hashed values of a lab sample record (serial first), in
/// [`Table::LabSamples`]' column order.
pub fn lab_sample_values(serial: &str, seq: i64, created: i64, s: &NewLabSample) -> Vec<Value> {
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
}

/// A lab sample record from its values.
pub fn lab_sample_from_values(v: &[Value]) -> LabSampleRecord {
    LabSampleRecord {
        seq: int_at(v, 1) as u64,
        created_unix_ms: int_at(v, 12),
        sample: NewLabSample {
            sample_id: text_at(v, 2).unwrap_or_default(),
            taken_unix_ms: int_at(v, 3),
            product: text_at(v, 4),
            lab_moisture_pct: f64_at(v, 5),
            basis: text_at(v, 6).unwrap_or_default(),
            method: text_at(v, 7),
            reading: match (opt_int_at(v, 8), opt_int_at(v, 9)) {
                (Some(b), Some(c)) => Some(Seq {
                    boot: b as u32,
                    counter: c as u32,
                }),
                _ => None,
            },
            note: text_at(v, 10),
            supersedes: opt_int_at(v, 11).map(|p| p as u64),
        },
    }
}

/// The hashed values of a reference check record (serial first), in
/// [`Table::ReferenceChecks`]' column order.
pub fn reference_check_values(
    serial: &str,
    seq: i64,
    created: i64,
    time_ms: i64,
    check: &RefCheck,
) -> Vec<Value> {
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
}

/// A reference check record from its values.
pub fn reference_check_from_values(v: &[Value]) -> RefCheckRecord {
    RefCheckRecord {
        time_ms: int_at(v, 2),
        check: RefCheck {
            ratio: [f32_at(v, 3), f32_at(v, 4)],
            baseline: f32_at(v, 5),
            ok: int_at(v, 6) != 0,
        },
    }
}

/// For the records the store numbers (calibrations, lab samples, reference
/// checks): the column of the record number (1) and of the time it was
/// recorded (the last), which a duplicate may differ in.
pub fn numbered_columns(table: Table) -> [usize; 2] {
    [1, table.columns().len() - 1]
}

/// Whether two records' values are equal except in the `ignore` columns
/// (for comparing a candidate duplicate with what is stored).
pub fn same_record(a: &[Value], b: &[Value], ignore: &[usize]) -> bool {
    a.len() == b.len()
        && a.iter()
            .zip(b)
            .enumerate()
            .all(|(i, (x, y))| ignore.contains(&i) || x == y)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_codec_has_its_tables_column_count() {
        let r = Reading::default();
        assert_eq!(
            reading_values("S", &r, Source::Log).len(),
            Table::Readings.columns().len()
        );
        let e = Event {
            number: 1,
            boot: 1,
            time_ms: 0,
            kind: fringe_protocol::EventKind::StorageRepaired,
        };
        assert_eq!(event_values("S", &e).len(), Table::Events.columns().len());
        assert_eq!(
            device_values(&DeviceInfo::default(), 0).len(),
            Table::Devices.columns().len()
        );
        let cal = NewCalibration {
            kind: CalKind::Cell,
            cal_id: CalId::NONE,
            slot: None,
            name: None,
            body: serde_json::Value::Null,
            note: None,
            supersedes: None,
        };
        assert_eq!(
            calibration_values("S", 1, 0, &cal).len(),
            Table::Calibrations.columns().len()
        );
        let lab = NewLabSample {
            sample_id: "x".into(),
            taken_unix_ms: 0,
            product: None,
            lab_moisture_pct: 1.0,
            basis: "wet".into(),
            method: None,
            reading: None,
            note: None,
            supersedes: None,
        };
        assert_eq!(
            lab_sample_values("S", 1, 0, &lab).len(),
            Table::LabSamples.columns().len()
        );
        let rc = RefCheck {
            ratio: [1.0, 1.0],
            baseline: 1.0,
            ok: true,
        };
        assert_eq!(
            reference_check_values("S", 1, 0, 0, &rc).len(),
            Table::ReferenceChecks.columns().len()
        );
    }

    #[test]
    fn records_come_back_from_their_values() {
        let r = Reading {
            seq: Seq {
                boot: 3,
                counter: 17,
            },
            moisture_pct: Some(14.25),
            flags: Flags::NO_PRODUCT,
            ..Reading::default()
        };
        let (back, src) = reading_from_values(&reading_values("S", &r, Source::Log));
        assert_eq!((back, src), (r, Source::Log));
        let e = Event {
            number: 9,
            boot: 2,
            time_ms: 5,
            kind: fringe_protocol::EventKind::ClockSet {
                old_ms: 4000,
                new_ms: 1_796_000_000_000,
            },
        };
        assert_eq!(event_from_values(&event_values("S", &e)), Ok(e.clone()));
        let clocks = BootClock::from_events([&e]);
        assert_eq!(clocks[&2].origin_ms, 1_796_000_000_000 - 4000);
    }
}
