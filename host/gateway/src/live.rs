//! The latest reading of every device, keyed by its Modbus unit id.

use std::collections::{BTreeMap, VecDeque};
use std::sync::RwLock;
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use fringe_protocol::{Basis, Reading};
use fringe_registers::Snapshot;

/// Points of trend history kept per device (at one point per
/// [`LiveTable::history_step_ms`]: 1440 points cover 4 h at 10 s).
pub const HISTORY_POINTS: usize = 1440;
/// Drift alarms kept per device (the newest).
pub const ALARMS_KEPT: usize = 20;

/// One point of a device's trend.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct Point {
    /// Time of the reading, ms since the Unix epoch (the device's, re-based
    /// when its clock was unset; else the gateway's receive time).
    pub time_ms: u64,
    /// Moisture, % (None: no valid value).
    pub moisture_pct: Option<f32>,
    /// Its standard uncertainty, %.
    pub uncertainty_pct: f32,
    /// Product temperature, C.
    pub temperature_c: f32,
    /// Quality flag bits.
    pub flags: u16,
}

/// A drift alarm as the page shows it.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct AlarmNote {
    /// When it was raised, ms since the Unix epoch.
    pub time_ms: u64,
    /// What drifted, since when, by how much.
    pub text: String,
    /// What to do.
    pub advice: String,
}

/// What is known of one device.
#[derive(Debug, Clone)]
struct Entry {
    serial: String,
    reading: Option<(Reading, Instant)>,
    connected: bool,
    tag: String,
    history: VecDeque<Point>,
    alarms: VecDeque<AlarmNote>,
    calibration: Option<String>,
    moisture_basis: Option<Basis>,
    /// The device's measurement interval, when known.
    interval: Option<Duration>,
}

/// Everything known of one device, for the live page.
#[derive(Debug, Clone)]
pub struct UnitView {
    /// Modbus unit id.
    pub unit: u8,
    /// Device serial.
    pub serial: String,
    /// The device's tag (plant name), if set.
    pub tag: String,
    /// The register-map view (latest reading, age, stale, connected).
    pub snapshot: Snapshot,
    /// Trend, oldest first.
    pub history: Vec<Point>,
    /// Drift alarms, oldest first.
    pub alarms: Vec<AlarmNote>,
    /// The product calibration in force, in words.
    pub calibration: Option<String>,
    /// The basis of the latest reading's moisture (`wet`, `dry`; none:
    /// not known).
    pub moisture_basis: Option<&'static str>,
}

/// The latest values of the gateway's devices.
///
/// A reading older than the stale limit is shown as stale (and so as no
/// valid value), as is every reading of a device whose link is down.
#[derive(Debug)]
pub struct LiveTable {
    stale_after: Duration,
    /// Least time between two history points of a device, ms.
    pub history_step_ms: u64,
    units: RwLock<BTreeMap<u8, Entry>>,
}

impl LiveTable {
    /// An empty table whose readings go stale after `stale_after`.
    pub fn new(stale_after: Duration) -> Self {
        Self {
            stale_after,
            history_step_ms: 10_000,
            units: RwLock::new(BTreeMap::new()),
        }
    }

    /// Serves device `serial` as Modbus unit `unit` (no reading yet, not
    /// connected). Registering a unit again with the same serial keeps its
    /// reading; with another (a device replaced on the unit's line) drops
    /// the old device's reading, trend, alarms and calibration, whose
    /// sequence numbers would otherwise hold back every reading of the new
    /// one and serve the old device's frozen values.
    pub fn register(&self, unit: u8, serial: &str) {
        let mut units = self.units.write().unwrap_or_else(|e| e.into_inner());
        units
            .entry(unit)
            .and_modify(|e| {
                if !e.serial.is_empty() && e.serial != serial {
                    e.reading = None;
                    e.connected = false;
                    e.history.clear();
                    e.alarms.clear();
                    e.calibration = None;
                    e.moisture_basis = None;
                    e.interval = None;
                }
                e.serial = serial.to_string();
            })
            .or_insert_with(|| Entry {
                serial: serial.to_string(),
                reading: None,
                connected: false,
                tag: String::new(),
                history: VecDeque::new(),
                alarms: VecDeque::new(),
                calibration: None,
                moisture_basis: None,
                interval: None,
            });
    }

    /// The stale limit of the table (the site's `stale_after_s`).
    pub fn stale_after(&self) -> Duration {
        self.stale_after
    }

    /// The measurement interval of unit `unit`'s device: its readings go
    /// stale after twice the interval where that is longer than the
    /// table's stale limit (a device measuring every 30 s served stale
    /// for 20 s of every 30 with the default 10 s limit; found by review).
    /// Returns the limit now in force for the unit.
    pub fn set_interval(&self, unit: u8, interval: Duration) -> Duration {
        let mut units = self.units.write().unwrap_or_else(|e| e.into_inner());
        if let Some(e) = units.get_mut(&unit) {
            e.interval = Some(interval);
        }
        self.stale_after.max(interval * 2)
    }

    /// A new reading of unit `unit`, received at `at`. Ignored for a unit
    /// not registered, and when it is older (by sequence) than the one held.
    pub fn update(&self, unit: u8, reading: &Reading, at: Instant) {
        self.update_at(unit, reading, at, reading.time_ms);
    }

    /// As [`LiveTable::update`], with the reading's wall-clock time
    /// `time_ms` for the trend (a re-based time for a device whose clock
    /// was unset).
    pub fn update_at(&self, unit: u8, reading: &Reading, at: Instant, time_ms: u64) {
        self.put(unit, reading, at, time_ms, None);
    }

    /// As [`LiveTable::update`], with the product calibration the reading
    /// was computed with, in words, and the basis of its moisture, set
    /// with it (under one lock, so that no read sees the reading with the
    /// basis of another) and only where the reading is taken.
    pub fn update_calibrated(
        &self,
        unit: u8,
        reading: &Reading,
        at: Instant,
        calibration: Option<String>,
        basis: Option<Basis>,
    ) {
        self.put(
            unit,
            reading,
            at,
            reading.time_ms,
            Some((calibration, basis)),
        );
    }

    fn put(
        &self,
        unit: u8,
        reading: &Reading,
        at: Instant,
        time_ms: u64,
        calibration: Option<(Option<String>, Option<Basis>)>,
    ) {
        // A reading taken before its device's clock was set carries its
        // time since boot: the trend takes the time it was received (it was
        // drawn in 1970, and after the device's next boot its trend stopped
        // until the time since boot passed the old one; found by review).
        let time_ms = if time_ms < fringe_store::record::SINCE_BOOT_BELOW_MS {
            SystemTime::now()
                .duration_since(UNIX_EPOCH)
                .map_or(0, |d| d.as_millis() as u64)
        } else {
            time_ms
        };
        let mut units = self.units.write().unwrap_or_else(|e| e.into_inner());
        if let Some(e) = units.get_mut(&unit) {
            if e.reading.as_ref().is_none_or(|(r, _)| r.seq <= reading.seq) {
                e.reading = Some((*reading, at));
                if let Some((text, basis)) = calibration {
                    e.calibration = text;
                    e.moisture_basis = basis;
                }
                let due = e
                    .history
                    .back()
                    .is_none_or(|p| time_ms >= p.time_ms + self.history_step_ms);
                if due {
                    if e.history.len() == HISTORY_POINTS {
                        e.history.pop_front();
                    }
                    e.history.push_back(Point {
                        time_ms,
                        moisture_pct: reading.moisture_pct,
                        uncertainty_pct: reading.uncertainty_pct,
                        temperature_c: reading.temperature_c,
                        flags: reading.flags.bits(),
                    });
                }
            }
            e.connected = true;
        }
    }

    /// Sets the device's tag (its plant name) as shown on the page.
    pub fn set_tag(&self, unit: u8, tag: &str) {
        let mut units = self.units.write().unwrap_or_else(|e| e.into_inner());
        if let Some(e) = units.get_mut(&unit) {
            e.tag = tag.to_string();
        }
    }

    /// A new drift alarm of unit `unit`.
    pub fn alarm(&self, unit: u8, note: AlarmNote) {
        let mut units = self.units.write().unwrap_or_else(|e| e.into_inner());
        if let Some(e) = units.get_mut(&unit) {
            if e.alarms.len() == ALARMS_KEPT {
                e.alarms.pop_front();
            }
            e.alarms.push_back(note);
        }
    }

    /// The product calibration in force on unit `unit`, in words, and the
    /// basis of its moisture.
    pub fn set_calibration(&self, unit: u8, text: Option<String>, basis: Option<Basis>) {
        let mut units = self.units.write().unwrap_or_else(|e| e.into_inner());
        if let Some(e) = units.get_mut(&unit) {
            e.calibration = text;
            e.moisture_basis = basis;
        }
    }

    /// Everything about every unit at `now`, for the live page.
    pub fn views(&self, now: Instant) -> Vec<UnitView> {
        let units: Vec<u8> = {
            let u = self.units.read().unwrap_or_else(|e| e.into_inner());
            u.keys().copied().collect()
        };
        units
            .into_iter()
            .filter_map(|unit| {
                let snapshot = self.snapshot(unit, now)?;
                let u = self.units.read().unwrap_or_else(|e| e.into_inner());
                let e = u.get(&unit)?;
                Some(UnitView {
                    unit,
                    serial: e.serial.clone(),
                    tag: e.tag.clone(),
                    snapshot,
                    history: e.history.iter().copied().collect(),
                    alarms: e.alarms.iter().cloned().collect(),
                    calibration: e.calibration.clone(),
                    moisture_basis: e
                        .moisture_basis
                        .map(|b| fringe_quality::limits::LimitBasis::from(b).word()),
                })
            })
            .collect()
    }

    /// Whether the link to unit `unit` is up.
    pub fn set_connected(&self, unit: u8, connected: bool) {
        let mut units = self.units.write().unwrap_or_else(|e| e.into_inner());
        if let Some(e) = units.get_mut(&unit) {
            e.connected = connected;
        }
    }

    /// The register-map view of unit `unit` at `now`; `None` for a unit the
    /// gateway does not serve.
    pub fn snapshot(&self, unit: u8, now: Instant) -> Option<Snapshot> {
        let units = self.units.read().unwrap_or_else(|e| e.into_inner());
        let e = units.get(&unit)?;
        let (reading, age) = match &e.reading {
            Some((r, at)) => (Some(*r), now.saturating_duration_since(*at)),
            None => (None, Duration::ZERO),
        };
        Some(Snapshot {
            reading,
            age_s: u32::try_from(age.as_secs()).unwrap_or(u32::MAX),
            stale: age > self.stale_after.max(e.interval.unwrap_or_default() * 2),
            connected: e.connected,
            basis: e.moisture_basis,
        })
    }

    /// The units served, with their device serials.
    pub fn units(&self) -> Vec<(u8, String)> {
        let units = self.units.read().unwrap_or_else(|e| e.into_inner());
        units.iter().map(|(u, e)| (*u, e.serial.clone())).collect()
    }
}
