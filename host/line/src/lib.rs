//! # fringe-line: the line session
//!
//! What the host does with one device on a line, with a store for the
//! record (docs/ARCHITECTURE.md): the handshake's device is registered,
//! its clock checked and set ([`clock`]), what its log holds that the
//! store lacks read back ([`backfill`]), then its readings streamed into
//! the store in batches, gaps in the stream filled from the log, and the
//! port reopened when it vanishes ([`Session`]); or everything the log
//! holds pulled at once ([`pull`]).
//!
//! Time, the stop flag and the store come in as arguments; what happens is
//! told to a callback ([`Note`]); nothing here draws or prints. A session
//! owns only its link, so one process runs as many as it has devices
//! (each on its own port or simulated device), into one store.
#![forbid(unsafe_code)]
#![warn(missing_docs)]

pub mod backfill;
pub mod clock;
pub mod density;
mod error;
pub mod observe;
mod session;

pub use backfill::{next_seq, plan_backfill, Backfill, LogRange};
pub use clock::{check_clock, set_clock, sync_clock, ClockCheck, ClockSync, CLOCK_AUTO_LIMIT_MS};
pub use density::{check_density, density_counter, set_density, set_density_after, DensityError};
pub use error::LineError;
pub use observe::{record_unrecorded, Observed};
pub use session::{
    active_product_cal, pull, register, Ctx, Note, Polled, PullSummary, Session, SessionOptions,
    Summary,
};
