//! One store shared by the gateway's device threads.
//!
//! [`SharedStore`] is a handle on one store back end (any
//! [`RecordStore`]: a SQLite file or a PostgreSQL database) that implements the store traits itself by locking the back end
//! for each call only. So every device's line session holds its own handle
//! and waits on its own port without holding the store; the writes of all
//! devices go through one connection, one transaction per batch, in one
//! hash chain.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex, MutexGuard};

use fringe_protocol::{Event, Reading, RefCheck, Seq};
use fringe_store::chain::{ChainedRecord, Hash};
use fringe_store::{
    BootClock, DeviceInfo, Gap, InsertStats, NewCalibration, NewLabSample, RecordLog, RecordRead,
    RecordStore, Recorded, Source, StoreError, StoredCalibration, StoredDevice, StoredEvent,
    StoredLabSample, StoredReading, StoredRefCheck,
};

/// A cloneable handle on one store; each call locks it for that call.
#[derive(Debug)]
pub struct SharedStore<S> {
    inner: Arc<Mutex<S>>,
    path: PathBuf,
}

impl<S> Clone for SharedStore<S> {
    fn clone(&self) -> Self {
        Self {
            inner: Arc::clone(&self.inner),
            path: self.path.clone(),
        }
    }
}

impl<S: RecordStore> SharedStore<S> {
    /// Shares `store`.
    pub fn new(store: S) -> Self {
        let path = store.path().to_path_buf();
        Self {
            inner: Arc::new(Mutex::new(store)),
            path,
        }
    }

    /// Locks the store (a poisoned lock is taken over: a panicking thread
    /// left no half-done transaction, as every write is one transaction).
    pub fn lock(&self) -> MutexGuard<'_, S> {
        self.inner.lock().unwrap_or_else(|p| p.into_inner())
    }
}

impl<S: RecordStore> RecordLog for SharedStore<S> {
    fn ensure_device(&mut self, info: &DeviceInfo) -> Result<(), StoreError> {
        self.lock().ensure_device(info)
    }
    fn insert_readings(
        &mut self,
        serial: &str,
        readings: &[Reading],
        source: Source,
    ) -> Result<InsertStats, StoreError> {
        self.lock().insert_readings(serial, readings, source)
    }
    fn insert_events(&mut self, serial: &str, events: &[Event]) -> Result<InsertStats, StoreError> {
        self.lock().insert_events(serial, events)
    }
    fn insert_calibration(
        &mut self,
        serial: &str,
        cal: &NewCalibration,
    ) -> Result<Recorded, StoreError> {
        self.lock().insert_calibration(serial, cal)
    }
    fn insert_lab_sample(
        &mut self,
        serial: &str,
        s: &NewLabSample,
    ) -> Result<Recorded, StoreError> {
        self.lock().insert_lab_sample(serial, s)
    }
    fn insert_reference_check(
        &mut self,
        serial: &str,
        time_ms: i64,
        check: &RefCheck,
    ) -> Result<Recorded, StoreError> {
        self.lock().insert_reference_check(serial, time_ms, check)
    }
    fn set_record_clock(&mut self, unix_ms: Option<i64>) {
        self.lock().set_record_clock(unix_ms);
    }
    fn reopen(&mut self) -> Result<(), StoreError> {
        self.lock().reopen()
    }
}

impl<S: RecordStore> RecordRead for SharedStore<S> {
    fn path(&self) -> &Path {
        &self.path
    }
    fn devices(&self) -> Result<Vec<StoredDevice>, StoreError> {
        self.lock().devices()
    }
    fn last_seq(&self, serial: &str) -> Result<Option<Seq>, StoreError> {
        self.lock().last_seq(serial)
    }
    fn last_event(&self, serial: &str) -> Result<Option<u32>, StoreError> {
        self.lock().last_event(serial)
    }
    fn reading_count(&self, serial: &str) -> Result<u64, StoreError> {
        self.lock().reading_count(serial)
    }
    fn count_between(&self, serial: &str, from: Seq, until: Seq) -> Result<u64, StoreError> {
        self.lock().count_between(serial, from, until)
    }
    fn runs(&self, serial: &str) -> Result<Vec<(Seq, Seq)>, StoreError> {
        self.lock().runs(serial)
    }
    fn gaps(&self, serial: &str) -> Result<Vec<Gap>, StoreError> {
        self.lock().gaps(serial)
    }
    fn for_each_reading(
        &self,
        serial: &str,
        from: Seq,
        to: Seq,
        f: &mut dyn FnMut(StoredReading) -> Result<(), StoreError>,
    ) -> Result<(), StoreError> {
        self.lock().for_each_reading(serial, from, to, f)
    }
    fn events(&self, serial: &str) -> Result<Vec<StoredEvent>, StoreError> {
        self.lock().events(serial)
    }
    fn calibrations(&self, serial: &str) -> Result<Vec<StoredCalibration>, StoreError> {
        self.lock().calibrations(serial)
    }
    fn lab_samples(&self, serial: &str) -> Result<Vec<StoredLabSample>, StoreError> {
        self.lock().lab_samples(serial)
    }
    fn reference_checks_after(
        &self,
        serial: &str,
        after: Option<u64>,
    ) -> Result<Vec<StoredRefCheck>, StoreError> {
        self.lock().reference_checks_after(serial, after)
    }
    fn boot_clocks(&self, serial: &str) -> Result<BTreeMap<u32, BootClock>, StoreError> {
        self.lock().boot_clocks(serial)
    }
    fn chain_head(&self) -> Result<(u64, Hash), StoreError> {
        self.lock().chain_head()
    }
    fn for_each_record(
        &self,
        f: &mut dyn FnMut(ChainedRecord) -> Result<(), StoreError>,
    ) -> Result<(), StoreError> {
        self.lock().for_each_record(f)
    }
    fn check_integrity(&self, full: bool) -> Result<(), StoreError> {
        self.lock().check_integrity(full)
    }
}
