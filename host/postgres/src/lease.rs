//! Which gateway owns which device, when several gateways write one
//! database: a lease row per device with an expiry on the server's clock.
//!
//! A gateway names itself (an `owner` unique among the gateways, e.g.
//! `site-a/gw-2`) and, for each device of its site file:
//!
//! 1. [`Store::acquire`]s the device's lease for a time to live (say 30 s)
//!    before it opens the device's line session. Another gateway holding a
//!    live lease makes it fail as [`LeaseError::Held`], naming the holder
//!    and how long the lease still runs: the gateway leaves that device
//!    alone and tries again after that time.
//! 2. [`Store::renew`]s it well within the time to live (every third of
//!    it). A renewal fails as [`LeaseError::Lost`] once another gateway
//!    took the device over (after the lease expired): the gateway then
//!    stops the device's session.
//! 3. [`Store::release`]s it when it stops the device (SIGTERM), so another
//!    gateway can take it over at once instead of after the expiry.
//!
//! With [`Store::set_fence`] the store also refuses, inside each write
//! transaction, to write a device whose lease this owner does not hold
//! live ([`fringe_store::StoreError::NotOwner`]): a gateway that stalled
//! past its lease cannot write behind the new owner's back.
//!
//! Why a lease row and not a session advisory lock: ownership must survive
//! what a gateway does survive. A session lock is gone the moment the
//! connection drops (a server restart, a network blip, a connection
//! pooler), and every device then goes to whichever gateway asks first; it
//! also stays held while the server has not noticed a dead client (hours
//! with default TCP keepalive), and it cannot be seen in a table. A lease
//! survives reconnects and server restarts, expires on the server's clock
//! whatever the gateways' clocks say, and `SELECT * FROM device_leases`
//! shows who owns what. The price is that a crashed gateway's devices wait
//! for the expiry (one time to live) before another takes them over; a
//! gateway restarted under the same name takes its live leases back at once.
//!
//! Each lease carries a token that grows with every change of hands, so a
//! renewal or release by a former holder never touches the new one.

use std::time::Duration;

use fringe_store::StoreError;

use crate::Store;

/// The holder of a device's lease and whether it is live (the fence).
pub(crate) const HOLDER_SQL: &str =
    "SELECT owner, expires_at > now() FROM device_leases WHERE serial = $1";

const ACQUIRE_SQL: &str = "INSERT INTO device_leases AS l
        (serial, owner, token, acquired_at, renewed_at, expires_at)
    VALUES ($1, $2, 1, now(), now(), now() + make_interval(secs => $3::float8))
    ON CONFLICT (serial) DO UPDATE SET
        token = CASE WHEN l.owner = EXCLUDED.owner AND l.expires_at > now()
                     THEN l.token ELSE l.token + 1 END,
        acquired_at = CASE WHEN l.owner = EXCLUDED.owner AND l.expires_at > now()
                           THEN l.acquired_at ELSE now() END,
        owner = EXCLUDED.owner,
        renewed_at = now(),
        expires_at = EXCLUDED.expires_at
    WHERE l.expires_at <= now() OR l.owner = EXCLUDED.owner
    RETURNING token, greatest(0, extract(epoch FROM l.expires_at - now()) * 1000)::int8";

const WHO_SQL: &str = "SELECT owner, token,
        greatest(0, extract(epoch FROM expires_at - now()) * 1000)::int8, expires_at > now()
    FROM device_leases WHERE serial = $1";

const RENEW_SQL: &str = "UPDATE device_leases
    SET renewed_at = now(), expires_at = now() + make_interval(secs => $4::float8)
    WHERE serial = $1 AND owner = $2 AND token = $3
    RETURNING greatest(0, extract(epoch FROM expires_at - now()) * 1000)::int8";

const RELEASE_SQL: &str = "UPDATE device_leases SET expires_at = now()
    WHERE serial = $1 AND owner = $2 AND token = $3 AND expires_at > now()
    RETURNING token";

const LIST_SQL: &str = "SELECT serial, owner, token, expires_at > now(),
        greatest(0, extract(epoch FROM expires_at - now()) * 1000)::int8,
        (extract(epoch FROM acquired_at) * 1000)::int8,
        (extract(epoch FROM renewed_at) * 1000)::int8,
        (extract(epoch FROM expires_at) * 1000)::int8
    FROM device_leases ORDER BY serial";

/// Longest time to live a lease may have.
pub const MAX_TTL: Duration = Duration::from_secs(24 * 3600);

/// A lease this writer holds.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Lease {
    /// Device serial.
    pub serial: String,
    /// This writer's name.
    pub owner: String,
    /// Grows with every change of hands.
    pub token: i64,
    /// Time to live given at each renewal.
    pub ttl: Duration,
    /// How long it ran when acquired or last renewed (server clock).
    pub expires_in: Duration,
}

/// A lease row as stored (for status displays).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct LeaseInfo {
    /// Device serial.
    pub serial: String,
    /// Holder (or last holder, when not live).
    pub owner: String,
    /// Token.
    pub token: i64,
    /// Whether it has not expired (server clock).
    pub live: bool,
    /// Time left, zero when expired.
    pub remaining: Duration,
    /// When the holder acquired it, ms since the Unix epoch.
    pub acquired_unix_ms: i64,
    /// When it was last renewed.
    pub renewed_unix_ms: i64,
    /// When it expires (expired).
    pub expires_unix_ms: i64,
}

/// Why a lease operation failed.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum LeaseError {
    /// Another writer holds a live lease on the device.
    #[error("device {serial} is owned by {holder} for another {} ms; leave it to that gateway and try again after that (or once it releases it)", remaining.as_millis())]
    Held {
        /// Device serial.
        serial: String,
        /// The holder's name.
        holder: String,
        /// How long its lease still runs.
        remaining: Duration,
    },
    /// The lease was taken over (or its row removed): the writer must stop
    /// writing the device.
    #[error("the lease of device {serial} by {owner} is lost ({why}); stop the device's session and acquire it again")]
    Lost {
        /// Device serial.
        serial: String,
        /// This writer's name.
        owner: String,
        /// Who holds it now, or that no row is left.
        why: String,
    },
    /// A request that cannot be a lease (empty owner, time to live out of
    /// range).
    #[error("lease of device {serial}: {reason}")]
    Invalid {
        /// Device serial.
        serial: String,
        /// What is wrong.
        reason: String,
    },
    /// The database failed.
    #[error(transparent)]
    Store(#[from] StoreError),
}

fn check(serial: &str, owner: &str, ttl: Duration) -> Result<(), LeaseError> {
    let invalid = |reason: String| LeaseError::Invalid {
        serial: serial.into(),
        reason,
    };
    if owner.is_empty() || owner.contains('\0') {
        return Err(invalid(format!(
            "owner name {owner:?} must be non-empty text"
        )));
    }
    if serial.contains('\0') {
        return Err(invalid("the serial holds a NUL character".into()));
    }
    if ttl.is_zero() || ttl > MAX_TTL {
        return Err(invalid(format!(
            "time to live {ttl:?} must be above zero and at most {MAX_TTL:?}"
        )));
    }
    Ok(())
}

fn ms(v: i64) -> Duration {
    Duration::from_millis(v.max(0) as u64)
}

impl Store {
    /// Acquires the lease of device `serial` for `owner` for `ttl`, unless
    /// another owner holds a live one. An owner that holds it already keeps
    /// it (same token) and has it extended.
    ///
    /// # Errors
    /// [`LeaseError::Held`] naming the holder and the time its lease still
    /// runs; [`LeaseError::Invalid`]; [`LeaseError::Store`].
    pub fn acquire(
        &mut self,
        serial: &str,
        owner: &str,
        ttl: Duration,
    ) -> Result<Lease, LeaseError> {
        check(serial, owner, ttl)?;
        let secs = ttl.as_secs_f64();
        // A holder that releases between the two statements makes the
        // second find no live lease: ask again (a few times at most).
        for _ in 0..3 {
            if let Some(r) = self.rows(ACQUIRE_SQL, &[&serial, &owner, &secs])?.first() {
                return Ok(Lease {
                    serial: serial.into(),
                    owner: owner.into(),
                    token: r.get(0),
                    ttl,
                    expires_in: ms(r.get(1)),
                });
            }
            if let Some(r) = self.rows(WHO_SQL, &[&serial])?.first() {
                let live: bool = r.get(3);
                if live {
                    return Err(LeaseError::Held {
                        serial: serial.into(),
                        holder: r.get(0),
                        remaining: ms(r.get(2)),
                    });
                }
            }
        }
        Err(LeaseError::Held {
            serial: serial.into(),
            holder: "another gateway (changing hands)".into(),
            remaining: Duration::ZERO,
        })
    }

    /// Extends `lease` by its time to live from now, if it is still this
    /// writer's (same owner and token; an expired lease nobody took over is
    /// renewed too).
    ///
    /// # Errors
    /// [`LeaseError::Lost`] once another owner took it over;
    /// [`LeaseError::Store`].
    pub fn renew(&mut self, lease: &Lease) -> Result<Lease, LeaseError> {
        check(&lease.serial, &lease.owner, lease.ttl)?;
        let secs = lease.ttl.as_secs_f64();
        let rows = self.rows(
            RENEW_SQL,
            &[&lease.serial, &lease.owner, &lease.token, &secs],
        )?;
        if let Some(r) = rows.first() {
            return Ok(Lease {
                expires_in: ms(r.get(0)),
                ..lease.clone()
            });
        }
        let why = match self.rows(WHO_SQL, &[&lease.serial])?.first() {
            Some(r) => {
                let holder: String = r.get(0);
                let token: i64 = r.get(1);
                format!("now held by {holder} with token {token}")
            }
            None => "its row was removed".into(),
        };
        Err(LeaseError::Lost {
            serial: lease.serial.clone(),
            owner: lease.owner.clone(),
            why,
        })
    }

    /// Ends `lease` now, so another gateway can take the device over at
    /// once. Returns whether it was still held (a lost lease is left alone).
    ///
    /// # Errors
    /// [`LeaseError::Store`].
    pub fn release(&mut self, lease: &Lease) -> Result<bool, LeaseError> {
        let rows = self.rows(RELEASE_SQL, &[&lease.serial, &lease.owner, &lease.token])?;
        Ok(!rows.is_empty())
    }

    /// Every lease row, by serial (who owns what, for a status display).
    ///
    /// # Errors
    /// [`StoreError`].
    pub fn leases(&self) -> Result<Vec<LeaseInfo>, StoreError> {
        Ok(self
            .rows(LIST_SQL, &[])?
            .iter()
            .map(|r| LeaseInfo {
                serial: r.get(0),
                owner: r.get(1),
                token: r.get(2),
                live: r.get(3),
                remaining: ms(r.get(4)),
                acquired_unix_ms: r.get(5),
                renewed_unix_ms: r.get(6),
                expires_unix_ms: r.get(7),
            })
            .collect())
    }
}
