//! The latest reading of every device, keyed by its Modbus unit id.

use std::collections::BTreeMap;
use std::sync::RwLock;
use std::time::{Duration, Instant};

use fringe_protocol::Reading;
use fringe_registers::Snapshot;

/// What is known of one device.
#[derive(Debug, Clone)]
struct Entry {
    serial: String,
    reading: Option<(Reading, Instant)>,
    connected: bool,
}

/// The latest values of the gateway's devices.
///
/// A reading older than the stale limit is shown as stale (and so as no
/// valid value), as is every reading of a device whose link is down.
#[derive(Debug)]
pub struct LiveTable {
    stale_after: Duration,
    units: RwLock<BTreeMap<u8, Entry>>,
}

impl LiveTable {
    /// An empty table whose readings go stale after `stale_after`.
    pub fn new(stale_after: Duration) -> Self {
        Self {
            stale_after,
            units: RwLock::new(BTreeMap::new()),
        }
    }

    /// Serves device `serial` as Modbus unit `unit` (no reading yet, not
    /// connected). Registering a unit again keeps its reading.
    pub fn register(&self, unit: u8, serial: &str) {
        let mut units = self.units.write().unwrap_or_else(|e| e.into_inner());
        units
            .entry(unit)
            .and_modify(|e| e.serial = serial.to_string())
            .or_insert_with(|| Entry {
                serial: serial.to_string(),
                reading: None,
                connected: false,
            });
    }

    /// A new reading of unit `unit`, received at `at`. Ignored for a unit
    /// not registered, and when it is older (by sequence) than the one held.
    pub fn update(&self, unit: u8, reading: &Reading, at: Instant) {
        let mut units = self.units.write().unwrap_or_else(|e| e.into_inner());
        if let Some(e) = units.get_mut(&unit) {
            if e.reading.as_ref().is_none_or(|(r, _)| r.seq <= reading.seq) {
                e.reading = Some((*reading, at));
            }
            e.connected = true;
        }
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
            stale: age > self.stale_after,
            connected: e.connected,
        })
    }

    /// The units served, with their device serials.
    pub fn units(&self) -> Vec<(u8, String)> {
        let units = self.units.read().unwrap_or_else(|e| e.into_inner());
        units.iter().map(|(u, e)| (*u, e.serial.clone())).collect()
    }
}
