//! # fringe-store: the record store as traits
//!
//! The host's `store` stage (docs/DESIGN.md, docs/ARCHITECTURE.md): what
//! the line session, the calibration commands and the quality tools write
//! and read, independent of the database that holds it.
//!
//! - [`value`]: the store's own value type ([`Value`]);
//! - [`record`]: the record model (devices, readings, events, calibrations,
//!   lab samples, reference checks; read back as [`Stored<T>`]) and the row
//!   codec every back end shares;
//! - [`chain`]: the SHA-256 hash chain over every record, defined on
//!   [`Value`], so every back end yields the same hashes;
//! - [`RecordLog`] and [`RecordRead`]: what a back end implements
//!   (`fringe-sqlite`; a PostgreSQL one follows the same traits);
//!   [`verify_chain`] checks any of them;
//! - [`Batcher`]: the batching policy of streamed readings;
//! - [`StoreError`]: why an operation failed, the same for every back end.
//!
//! It hands on nothing but records: no I/O of its own, no link, no terminal.
#![forbid(unsafe_code)]
#![warn(missing_docs)]

mod batch;
pub mod chain;
#[cfg(feature = "conformance")]
pub mod conformance;
mod error;
pub mod record;
mod traits;
pub mod value;
mod verify;

pub use batch::{Batcher, BATCH_MAX_AGE, BATCH_MAX_LEN};
pub use chain::{ChainProblem, ChainReport, ChainedRecord, Hash, Table};
pub use error::StoreError;
pub use record::{
    BootClock, CalKind, CalibrationRecord, DeviceInfo, DeviceRecord, Gap, InsertStats,
    LabSampleRecord, LoggedReading, NewCalibration, NewLabSample, Recorded, RefCheckRecord, Source,
    Stored, StoredCalibration, StoredDevice, StoredEvent, StoredLabSample, StoredReading,
    StoredRefCheck,
};
pub use traits::{RecordLog, RecordRead, RecordStore};
pub use value::Value;
pub use verify::verify_chain;

/// Milliseconds since the Unix epoch, from the system clock (for callers
/// at the edge; the libraries take time as an argument where it matters).
pub fn now_unix_ms() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_millis() as i64)
        .unwrap_or(0)
}
