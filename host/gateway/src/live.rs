//! The latest reading of every device, keyed by its Modbus unit id.

use std::collections::{BTreeMap, VecDeque};
use std::sync::atomic::{AtomicU64, Ordering};
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
    /// Its number in the table: every point the table adds, of any
    /// device, takes the next one (so that the page asks only for the
    /// points it has not had: [`LiveTable::views_since`]).
    pub mark: u64,
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
    /// Trend, oldest first: all of it, or (`history_full` false) only
    /// the points numbered from the `after` asked for on.
    pub history: Vec<Point>,
    /// Whether `history` is the whole trend (else the points to add to
    /// what the asker had; [`LiveTable::views_since`]).
    pub history_full: bool,
    /// How many points the whole trend has now.
    pub history_len: usize,
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
    /// The number the next trend point takes.
    next_mark: AtomicU64,
    /// Tells this table from one of an earlier run of the gateway, whose
    /// numbers a page may still hold: its creation time, ns.
    epoch: String,
}

/// What a page asks for: the trends' points from a number on, of the
/// table it had them from ([`LiveTable::epoch`]).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Since {
    /// The table's epoch the page had its points from.
    pub epoch: String,
    /// The `mark` of the answer it had last: it has every point numbered
    /// below it.
    pub after: u64,
}

impl LiveTable {
    /// An empty table whose readings go stale after `stale_after`.
    pub fn new(stale_after: Duration) -> Self {
        Self {
            stale_after,
            history_step_ms: 10_000,
            units: RwLock::new(BTreeMap::new()),
            next_mark: AtomicU64::new(1),
            epoch: SystemTime::now()
                .duration_since(UNIX_EPOCH)
                .map_or(0, |d| d.as_nanos())
                .to_string(),
        }
    }

    /// Tells this table from one of another run of the gateway.
    pub fn epoch(&self) -> &str {
        &self.epoch
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
                        // Taken under the table's write lock, so that a
                        // reader who loaded the counter before it locks
                        // sees every point numbered below.
                        mark: self.next_mark.fetch_add(1, Ordering::SeqCst),
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
        self.views_since(now, None).1
    }

    /// As [`LiveTable::views`], with each trend's points numbered from
    /// `since.after` on only, where the asker's points are of this table
    /// (`since.epoch`); else whole (`UnitView::history_full`). Also
    /// returns the `mark` to ask from next time: every point numbered
    /// below it is in the answer or was before it. A point numbered from
    /// it on may come again in the next answer (the asker keeps each
    /// number once). The asker adds the points to what it had of the
    /// unit's device and keeps the last `history_len`: a trend dropped
    /// since (another device on the unit) has only points numbered after
    /// the asker's mark, all in the answer.
    ///
    /// On a site of 247 devices with whole trends a page asked for
    /// every trend whole every 2 s: 22 MB each time, where the answer
    /// from its mark is 108 KB (BENCHMARKS.md, "The live page's answer").
    pub fn views_since(&self, now: Instant, since: Option<&Since>) -> (u64, Vec<UnitView>) {
        // Loaded before any unit is read: a point numbered below it was
        // numbered under a write lock the reads below wait for.
        let mark = self.next_mark.load(Ordering::SeqCst);
        let after = since
            .filter(|s| s.epoch == self.epoch && s.after <= mark)
            .map(|s| s.after);
        let units: Vec<u8> = {
            let u = self.units.read().unwrap_or_else(|e| e.into_inner());
            u.keys().copied().collect()
        };
        let views = units
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
                    history: match after {
                        // Numbered in the order they were added.
                        Some(a) => e
                            .history
                            .range(e.history.partition_point(|p| p.mark < a)..)
                            .copied()
                            .collect(),
                        None => e.history.iter().copied().collect(),
                    },
                    history_full: after.is_none(),
                    history_len: e.history.len(),
                    alarms: e.alarms.iter().cloned().collect(),
                    calibration: e.calibration.clone(),
                    moisture_basis: e
                        .moisture_basis
                        .map(|b| fringe_quality::limits::LimitBasis::from(b).word()),
                })
            })
            .collect();
        (mark, views)
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

#[cfg(test)]
mod tests {
    use super::*;
    use fringe_protocol::Seq;

    /// A page as `web/app.js` keeps its trends: each answer's points added
    /// to what it had (each number once), as many kept as the gateway
    /// has, asked for whole next time where that does not come out.
    #[derive(Default)]
    struct Page {
        since: Option<Since>,
        trends: BTreeMap<(u8, String), Vec<Point>>,
        points_sent: usize,
        partial_answers: usize,
    }

    impl Page {
        fn ask(&mut self, table: &LiveTable) {
            let (mark, views) = table.views_since(Instant::now(), self.since.as_ref());
            let mut whole = true;
            let mut now = BTreeMap::new();
            for v in views {
                self.points_sent += v.history.len();
                let key = (v.unit, v.serial.clone());
                let mut h = if v.history_full {
                    v.history.clone()
                } else {
                    self.partial_answers += 1;
                    let mut had = self.trends.get(&key).cloned().unwrap_or_default();
                    let last = had.last().map(|p| p.mark);
                    had.extend(v.history.iter().filter(|p| last.is_none_or(|l| p.mark > l)));
                    had
                };
                if h.len() > v.history_len {
                    h.drain(..h.len() - v.history_len);
                }
                whole &= h.len() == v.history_len;
                now.insert(key, h);
            }
            self.trends = now;
            self.since = whole.then(|| Since {
                epoch: table.epoch().to_string(),
                after: mark,
            });
        }

        fn agrees_with(&self, table: &LiveTable) -> Result<(), String> {
            let whole: BTreeMap<(u8, String), Vec<Point>> = table
                .views(Instant::now())
                .into_iter()
                .map(|v| ((v.unit, v.serial), v.history))
                .collect();
            if whole == self.trends {
                Ok(())
            } else {
                let lens = |m: &BTreeMap<(u8, String), Vec<Point>>| {
                    m.iter()
                        .map(|(k, v)| (k.clone(), v.len()))
                        .collect::<Vec<_>>()
                };
                Err(format!(
                    "the page has {:?}, the gateway {:?}",
                    lens(&self.trends),
                    lens(&whole)
                ))
            }
        }
    }

    fn reading(counter: u32, moisture: f32) -> Reading {
        Reading {
            seq: Seq { boot: 1, counter },
            time_ms: 1_796_083_200_000 + u64::from(counter) * 1000,
            moisture_pct: Some(moisture),
            ..Reading::default()
        }
    }

    /// Asking from its last answer's mark, a page holds every trend as the
    /// gateway does: through readings on many units, trends at their
    /// length limit, a device replaced on a unit, a unit added, answers
    /// lost on the way, and the gateway run again; and it is sent a small
    /// part of what whole answers would have been.
    #[test]
    fn a_page_asking_from_its_mark_holds_every_trend_as_the_gateway_does() {
        let mut table = LiveTable::new(Duration::from_secs(30));
        table.history_step_ms = 0;
        for unit in 1..=4 {
            table.register(unit, &format!("PLT-T-{unit:04}"));
        }
        let mut page = Page::default();
        let mut counters = [0u32; 6];
        // A fixed pseudo-random walk (xorshift): which unit reads, when the
        // page asks, when an answer is lost.
        let mut x: u64 = 0x9E37_79B9_7F4A_7C15;
        let mut next = move || {
            x ^= x << 13;
            x ^= x >> 7;
            x ^= x << 17;
            x
        };
        let mut whole_points = 0usize;
        for step in 0..11000u32 {
            let unit = (next() % 4) as u8 + 1;
            let c = &mut counters[usize::from(unit)];
            *c += 1;
            table.update(
                unit,
                &reading(*c, 10.0 + (*c % 50) as f32 / 10.0),
                Instant::now(),
            );
            if step == 2500 {
                // Another device on unit 2: its trend starts again.
                table.register(2, "PLT-T-0099");
                counters[2] = 0;
            }
            if step == 3000 {
                table.register(5, "PLT-T-0005");
            }
            if step == 4000 {
                // Another device on unit 3 and the first back, between two
                // answers: the same unit and serial, a new trend.
                table.register(3, "PLT-T-0077");
                table.update(3, &reading(1, 10.0), Instant::now());
                table.register(3, "PLT-T-0003");
                counters[3] = 0;
            }
            match next() % 10 {
                0 => {
                    page.ask(&table);
                    whole_points += table
                        .views(Instant::now())
                        .iter()
                        .map(|v| v.history.len())
                        .sum::<usize>();
                    page.agrees_with(&table)
                        .unwrap_or_else(|e| panic!("step {step}: {e}"));
                }
                // An answer that never reached the page.
                1 => drop(table.views_since(Instant::now(), page.since.as_ref())),
                _ => {}
            }
        }
        assert!(page.partial_answers > 0);
        // Each trend reached its limit.
        assert!(
            page.trends
                .values()
                .filter(|t| t.len() == HISTORY_POINTS)
                .count()
                >= 3
        );
        assert!(
            page.points_sent * 20 < whole_points,
            "{} points sent, {whole_points} in whole answers",
            page.points_sent
        );
        // The gateway run again: its numbers start afresh, and a page
        // holding the last run's is sent everything (here the new run has
        // numbered more points than the page had from the last).
        let mut again = LiveTable::new(Duration::from_secs(30));
        again.history_step_ms = 0;
        for unit in 1..=3 {
            again.register(unit, &format!("PLT-T-{unit:04}"));
        }
        for c in 1..=4500 {
            for unit in 1..=3 {
                again.update(unit, &reading(c, 12.0 + (c % 7) as f32), Instant::now());
            }
        }
        let had = page.since.as_ref().map(|s| s.after);
        assert!(had.is_some_and(|a| a < again.views_since(Instant::now(), None).0));
        page.ask(&again);
        page.agrees_with(&again).unwrap();
    }
}
