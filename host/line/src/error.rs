//! Why a line session or a pull stopped.

use fringe_link::LinkError;
use fringe_store::StoreError;

/// Why a line session or a pull stopped. Readings received but not
/// committed are still in the device log: the next session reads them back.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum LineError {
    /// The link failed (and a reconnect could not cure it, or was not tried).
    #[error("{0}")]
    Link(#[from] LinkError),
    /// The store failed outside a commit of readings.
    #[error("{0}")]
    Store(#[from] StoreError),
    /// A commit of readings failed.
    #[error("committing readings (those not committed are still in the device log; the next run pulls them)")]
    Commit(#[source] StoreError),
    /// Another device answered on the port after a reconnect.
    #[error(
        "the device on {port} is now {now}, not {was}: stopping so their readings are not mixed"
    )]
    OtherDevice {
        /// The port.
        port: String,
        /// The serial of the session.
        was: String,
        /// The serial that answered.
        now: String,
    },
    /// The device numbers its readings from below what the store already
    /// holds of its serial: its log was erased (a new board, a wiped
    /// flash) or another unit carries the serial. Its new readings would
    /// be taken for stored ones and dropped.
    #[error(
        "{serial} numbers its next reading {device_next}, but this database already holds readings of {serial} up to {stored}: the device's log was erased (a new board, a wiped flash, a simulator started again) or another unit carries this serial, and its readings up to {stored} will be taken for ones already stored and not stored; use another database for it (or check the serial)"
    )]
    SequenceBehind {
        /// The serial.
        serial: String,
        /// The highest sequence stored.
        stored: fringe_protocol::Seq,
        /// The device's next sequence.
        device_next: fringe_protocol::Seq,
    },
}

impl LineError {
    /// Whether reconnecting may cure it: the port went away, or the device
    /// stopped answering or only garbled data came.
    pub fn is_disconnect(&self) -> bool {
        matches!(
            self,
            LineError::Link(
                LinkError::Disconnected { .. }
                    | LinkError::NoAnswer { .. }
                    | LinkError::Garbled { .. }
            )
        )
    }
}
