//! What a back end offers: writing records ([`RecordLog`]) and reading them
//! back ([`RecordRead`]).
//!
//! Every write is idempotent (a record already stored is counted, never
//! stored twice) and takes the next chain position in one transaction per
//! call: a failed call stores nothing of its batch. Readers see committed
//! records only.

use std::collections::BTreeMap;
use std::path::Path;

use fringe_protocol::{Event, Reading, RefCheck, Seq};

use crate::chain::{ChainedRecord, Hash};
use crate::error::StoreError;
use crate::record::{
    BootClock, DeviceInfo, Gap, InsertStats, NewCalibration, NewLabSample, Recorded, Source,
    StoredCalibration, StoredDevice, StoredEvent, StoredLabSample, StoredReading, StoredRefCheck,
};

/// Writing records.
pub trait RecordLog {
    /// Records a device if it is not yet known (its first sighting is kept).
    ///
    /// # Errors
    /// [`StoreError`].
    fn ensure_device(&mut self, info: &DeviceInfo) -> Result<(), StoreError>;

    /// Stores readings of device `serial` in one transaction; readings
    /// already stored are counted as duplicates (or conflicts, when stored
    /// under the same sequence with other values) and never stored twice.
    /// An unknown device is recorded first.
    ///
    /// # Errors
    /// [`StoreError`]; nothing of the batch is stored then.
    fn insert_readings(
        &mut self,
        serial: &str,
        readings: &[Reading],
        source: Source,
    ) -> Result<InsertStats, StoreError>;

    /// Stores events of device `serial` in one transaction, idempotently
    /// (keyed by event number).
    ///
    /// # Errors
    /// [`StoreError`]; nothing of the batch is stored then.
    fn insert_events(&mut self, serial: &str, events: &[Event]) -> Result<InsertStats, StoreError>;

    /// Records a calibration of device `serial`; an identical record
    /// already stored is returned as a duplicate.
    ///
    /// # Errors
    /// [`StoreError::BadSupersedes`]; [`StoreError`].
    fn insert_calibration(
        &mut self,
        serial: &str,
        cal: &NewCalibration,
    ) -> Result<Recorded, StoreError>;

    /// Records a lab reference sample of device `serial`; an identical
    /// record already stored is returned as a duplicate.
    ///
    /// # Errors
    /// [`StoreError::SampleConflict`], [`StoreError::BadSupersedes`]; [`StoreError`].
    fn insert_lab_sample(&mut self, serial: &str, s: &NewLabSample)
        -> Result<Recorded, StoreError>;

    /// Records an internal reference check of device `serial` made at
    /// device time `time_ms`; an identical record is returned as a duplicate.
    ///
    /// # Errors
    /// [`StoreError`].
    fn insert_reference_check(
        &mut self,
        serial: &str,
        time_ms: i64,
        check: &RefCheck,
    ) -> Result<Recorded, StoreError>;

    /// Stamps calibration, lab and reference-check records inserted from
    /// now on with `unix_ms` instead of the system clock (`None` restores
    /// it): for a replay or simulation on its own clock (`fringe demo`).
    fn set_record_clock(&mut self, unix_ms: Option<i64>);

    /// After a call failed as [`StoreError::Unreachable`]: makes the store
    /// usable again if it can (a database server's store opens a new
    /// connection when the old one is gone; a file store has nothing to
    /// do). A long-running writer (the gateway) calls it before it tries
    /// again.
    ///
    /// # Errors
    /// [`StoreError::Unreachable`] while the server is still away;
    /// [`StoreError`].
    fn reopen(&mut self) -> Result<(), StoreError> {
        Ok(())
    }
}

/// Reading records back.
pub trait RecordRead {
    /// The database, for messages (a file path, or a connection's name).
    fn path(&self) -> &Path;

    /// Devices in the order first seen.
    ///
    /// # Errors
    /// [`StoreError`].
    fn devices(&self) -> Result<Vec<StoredDevice>, StoreError>;

    /// The highest stored reading sequence of `serial`, if any.
    ///
    /// # Errors
    /// [`StoreError`].
    fn last_seq(&self, serial: &str) -> Result<Option<Seq>, StoreError>;

    /// The highest stored event number of `serial`, if any.
    ///
    /// # Errors
    /// [`StoreError`].
    fn last_event(&self, serial: &str) -> Result<Option<u32>, StoreError>;

    /// Number of stored readings of `serial`.
    ///
    /// # Errors
    /// [`StoreError`].
    fn reading_count(&self, serial: &str) -> Result<u64, StoreError>;

    /// Number of stored readings of `serial` with `from <= seq < until`.
    ///
    /// # Errors
    /// [`StoreError`].
    fn count_between(&self, serial: &str, from: Seq, until: Seq) -> Result<u64, StoreError>;

    /// The runs of consecutive stored readings of `serial`: `(first, last)`
    /// within one boot, in sequence order (what a backfill plans around).
    ///
    /// # Errors
    /// [`StoreError`].
    fn runs(&self, serial: &str) -> Result<Vec<(Seq, Seq)>, StoreError>;

    /// Missing reading counters within each boot of `serial` (a boot's
    /// first stored counter above 0 counts as a gap from 0).
    ///
    /// # Errors
    /// [`StoreError`].
    fn gaps(&self, serial: &str) -> Result<Vec<Gap>, StoreError>;

    /// Calls `f` for every stored reading of `serial` with
    /// `from <= seq <= to`, in sequence order, with its wall-clock time.
    ///
    /// # Errors
    /// [`StoreError`], or what `f` returns.
    fn for_each_reading(
        &self,
        serial: &str,
        from: Seq,
        to: Seq,
        f: &mut dyn FnMut(StoredReading) -> Result<(), StoreError>,
    ) -> Result<(), StoreError>;

    /// Stored events of `serial` in number order.
    ///
    /// # Errors
    /// [`StoreError`].
    fn events(&self, serial: &str) -> Result<Vec<StoredEvent>, StoreError>;

    /// Stored calibrations of `serial` in record order.
    ///
    /// # Errors
    /// [`StoreError`].
    fn calibrations(&self, serial: &str) -> Result<Vec<StoredCalibration>, StoreError>;

    /// Stored lab samples of `serial` in record order.
    ///
    /// # Errors
    /// [`StoreError`].
    fn lab_samples(&self, serial: &str) -> Result<Vec<StoredLabSample>, StoreError>;

    /// Stored reference checks of `serial` at chain positions after
    /// `after` (all for `None`), in record order.
    ///
    /// # Errors
    /// [`StoreError`].
    fn reference_checks_after(
        &self,
        serial: &str,
        after: Option<u64>,
    ) -> Result<Vec<StoredRefCheck>, StoreError>;

    /// For each boot of `serial` whose `ClockSet` event is stored, when its
    /// clock was first set ([`BootClock::from_events`]).
    ///
    /// # Errors
    /// [`StoreError`].
    fn boot_clocks(&self, serial: &str) -> Result<BTreeMap<u32, BootClock>, StoreError>;

    /// The chain head: last position and its hash ((0, genesis) when empty).
    ///
    /// # Errors
    /// [`StoreError`].
    fn chain_head(&self) -> Result<(u64, Hash), StoreError>;

    /// Calls `f` for every chained record of every table in position order.
    ///
    /// # Errors
    /// [`StoreError`], or what `f` returns.
    fn for_each_record(
        &self,
        f: &mut dyn FnMut(ChainedRecord) -> Result<(), StoreError>,
    ) -> Result<(), StoreError>;

    /// The back end's own check of its files or tables (SQLite's
    /// `integrity_check`, or the quicker `quick_check` when `full` is
    /// false), before the chain is trusted.
    ///
    /// # Errors
    /// [`StoreError::Corrupt`] naming what it found; [`StoreError`].
    fn check_integrity(&self, full: bool) -> Result<(), StoreError>;

    /// All stored readings of `serial` in sequence order (tests, small exports).
    ///
    /// # Errors
    /// [`StoreError`].
    fn readings(&self, serial: &str) -> Result<Vec<StoredReading>, StoreError> {
        let mut out = Vec::new();
        self.for_each_reading(
            serial,
            Seq::from_u64(0),
            Seq::from_u64(u64::MAX),
            &mut |r| {
                out.push(r);
                Ok(())
            },
        )?;
        Ok(out)
    }

    /// Stored reference checks of `serial` in record order.
    ///
    /// # Errors
    /// [`StoreError`].
    fn reference_checks(&self, serial: &str) -> Result<Vec<StoredRefCheck>, StoreError> {
        self.reference_checks_after(serial, None)
    }
}

/// A store that is written and read: what a line session and the
/// calibration commands need.
pub trait RecordStore: RecordLog + RecordRead {}

impl<T: RecordLog + RecordRead + ?Sized> RecordStore for T {}
