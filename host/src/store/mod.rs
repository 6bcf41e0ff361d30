//! The durable log: the record model and hash chain of `fringe-store`, on
//! the SQLite back end of `fringe-sqlite` (`host/SCHEMA.md`).

pub use fringe_sqlite::{Store, BUSY_TIMEOUT, SCHEMA_VERSION};
pub use fringe_store::chain;
pub use fringe_store::record::{
    CalibrationRecord, DeviceRecord, LabSampleRecord, LoggedReading, RefCheckRecord,
};
pub use fringe_store::*;
