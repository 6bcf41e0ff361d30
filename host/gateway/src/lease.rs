//! Which gateway runs which device, when several gateways write one store.
//!
//! The gateway takes a device's lease ([`Leases::acquire`]) after the
//! device has answered (its serial is the lease's key) and before its line
//! session writes anything; one keeper thread renews every lease the
//! gateway holds ([`Leases::renew`], every [`Leases::renew_every`]); a
//! clean stop releases them ([`Leases::release`]). A device whose lease
//! another live gateway holds is reported and left alone, and tried again
//! when that lease would run out: so a device of a gateway that died is
//! taken over once its lease expires. A renewal that finds the lease taken
//! over ends the device's session at once.
//!
//! The gateway does not know how leases are kept: the binary gives it an
//! implementation over the store's back end (for PostgreSQL, the lease
//! rows of `fringe-postgres`). A gateway alone on its store (a SQLite
//! file) runs without leases.

use std::time::Duration;

/// Why a lease was not had.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[non_exhaustive]
pub enum LeaseRefused {
    /// Another gateway holds a live lease on the device.
    #[error("owned by gateway {holder:?} for another {:.1} s: left to it, tried again then", remaining.as_secs_f64())]
    Held {
        /// The holder's name.
        holder: String,
        /// How long its lease still runs.
        remaining: Duration,
    },
    /// Another gateway took the device over (after this one's lease ran
    /// out): this gateway must stop writing it.
    #[error("the lease was taken over ({why}): stopping the device's session")]
    Lost {
        /// Who holds it now.
        why: String,
    },
    /// The lease could not be read or written (the database is away): the
    /// words of the store's error, naming the database without password.
    #[error("lease not reachable: {0}")]
    Failed(String),
}

/// Device leases among the gateways of one store.
pub trait Leases: Send + Sync {
    /// This gateway's name among those writing the store.
    fn owner(&self) -> &str;

    /// Takes (or keeps and extends) the lease of device `serial`.
    ///
    /// # Errors
    /// [`LeaseRefused::Held`] while another gateway holds it live;
    /// [`LeaseRefused::Failed`].
    fn acquire(&self, serial: &str) -> Result<(), LeaseRefused>;

    /// Extends the lease of `serial` this gateway holds.
    ///
    /// # Errors
    /// [`LeaseRefused::Lost`] once another gateway took it over;
    /// [`LeaseRefused::Failed`] (tried again at the next renewal).
    fn renew(&self, serial: &str) -> Result<(), LeaseRefused>;

    /// Ends the lease of `serial` now (a clean stop), so another gateway
    /// may take the device at once.
    ///
    /// # Errors
    /// [`LeaseRefused::Failed`] (the lease then runs out on its own).
    fn release(&self, serial: &str) -> Result<(), LeaseRefused>;

    /// How often the keeper renews (well within the time to live).
    fn renew_every(&self) -> Duration;
}
