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
