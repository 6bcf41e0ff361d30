//! The streaming line session ([`Session`]) and the pull of a whole device
//! log ([`pull`]).
//!
//! A session subscribes to the readings the device takes on its own
//! schedule and commits them in batches (`fringe_store::Batcher`). A
//! reading whose sequence does not follow the last one starts a backfill
//! of the missing ones from the device log; when the port vanishes (or the
//! device stops answering) the session commits what it has, reopens the
//! port with backoff, checks it is the same device, sets its clock, reads
//! back what it logged meanwhile and subscribes again. So a session stopped
//! or killed loses nothing the device still holds: the next one reads it
//! back.

use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

use fringe_link::{Link, LinkError};
use fringe_protocol::auth::Key;
use fringe_protocol::{
    CalId, Capabilities, DeviceFrame, Identity, ProductCal, Reading, Request, Response, Seq,
};
use fringe_store::{Batcher, DeviceInfo, InsertStats, RecordStore, StoreError};

use crate::backfill::{backfill, backfill_missing, next_seq, pull_events};
use crate::clock::{sync_clock, ClockSync};
use crate::error::LineError;

/// What a session needs from its caller on every call: time, the stop
/// flag, and an ear for what happens.
pub struct Ctx<'a> {
    /// Set to stop (Ctrl-C): a reconnect stops waiting, a poll returns.
    pub stop: &'a AtomicBool,
    /// The host's wall clock, ms since the Unix epoch (for the device clock).
    pub wall_ms: &'a dyn Fn() -> i64,
    /// The host's monotonic clock (for batching and silence).
    pub now: &'a dyn Fn() -> Instant,
    /// Hears what happens.
    pub tell: &'a mut dyn FnMut(Note<'_>),
}

impl std::fmt::Debug for Ctx<'_> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Ctx")
            .field("stop", &self.stop.load(Ordering::Relaxed))
            .finish()
    }
}

/// What a session or a pull tells its caller.
#[derive(Debug)]
#[non_exhaustive]
pub enum Note<'a> {
    /// The device clock was checked, and set when it needed it and the
    /// key was at hand.
    Clock(ClockSync),
    /// The device numbers its next reading at or below what the store
    /// holds of its serial ([`LineError::SequenceBehind`]'s words): its
    /// readings up to the stored one will be taken for stored ones.
    SequenceBehind(&'a LineError),
    /// Setting the device clock was refused (a wrong key): it was left.
    ClockRefused(&'a LinkError),
    /// A stream period was asked of a device that measures on its own
    /// interval: not used.
    PeriodIgnored {
        /// What was asked, ms.
        asked_ms: u32,
        /// The device's interval, ms.
        interval_ms: u32,
    },
    /// What the device logged that the store lacked was read back (at the
    /// start of a session and after each reconnect).
    CaughtUp {
        /// Readings received from the device log.
        received: u64,
        /// Readings the log no longer held.
        lost: u64,
    },
    /// Readings after `after` were no longer in the device log.
    Lost {
        /// How many.
        count: u64,
        /// The last reading before them.
        after: Seq,
    },
    /// A streamed reading was queued for the store (not told for one
    /// already stored).
    Reading(&'a Reading),
    /// A reading read back from the device log (one the store lacked) was
    /// queued for the store: taken while no host listened or the link was
    /// down. Told in the log's order, before the stream resumes.
    Logged(&'a Reading),
    /// The link failed: committing and reconnecting.
    Reconnecting(&'a LineError),
    /// The device answers again.
    Reconnected,
    /// A calibration found on the device with no record in the store was
    /// recorded as found ([`crate::observe`]).
    CalibrationObserved(crate::Observed),
    /// The device's calibrations could not be read or recorded (a refused
    /// read, a store that refused the record): the session goes on
    /// without ([`crate::observe`]).
    CalibrationsNotRead(&'a LineError),
}

/// What a session did so far.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, serde::Serialize)]
pub struct Summary {
    /// Streamed readings received.
    pub streamed: u64,
    /// Readings received from the device log (backfill).
    pub backfilled: u64,
    /// Readings newly stored.
    pub stored: u64,
    /// Readings received that were already stored.
    pub duplicates: u64,
    /// Readings the device log no longer held.
    pub lost: u64,
    /// Gaps detected in the stream.
    pub gaps: u64,
    /// Reconnects after the port vanished.
    pub reconnects: u32,
    /// Damaged frames seen by the host.
    pub link_errors: u32,
}

/// What one [`Session::poll`] did.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Polled {
    /// A batch was committed (what it stored).
    pub committed: Option<InsertStats>,
    /// The stop flag was set while reconnecting: the session is over.
    pub stopped: bool,
}

/// How a session talks to its device.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct SessionOptions {
    /// The device key: lets the session set the device clock.
    pub key: Option<Key>,
    /// The stream period asked of a device without settings of its own
    /// (protocol 1.0), ms [default: 1000]; a newer device measures on its
    /// own interval and this is not used.
    pub period_ms: Option<u32>,
}

/// Records the device of a handshake in the store; returns its serial.
///
/// # Errors
/// [`StoreError`].
pub fn register(
    store: &mut (impl RecordStore + ?Sized),
    id: &Identity,
) -> Result<String, StoreError> {
    let serial = id.serial.to_string();
    store.ensure_device(&DeviceInfo {
        serial: serial.clone(),
        firmware: Some(format!(
            "{}.{}.{}",
            id.firmware[0], id.firmware[1], id.firmware[2]
        )),
        protocol: Some(id.protocol.to_string()),
        freqs_hz: Some(id.freqs_hz),
    })?;
    Ok(serial)
}

/// The device clock: checked, and set when it needs it and `key` is at
/// hand; a refused write (a wrong key) is told and left (the caller's own
/// write, if any, meets the same refusal with its own message).
fn clock(link: &mut Link, key: Option<&Key>, ctx: &mut Ctx<'_>) -> Result<ClockSync, LinkError> {
    match sync_clock(link, key, ctx.wall_ms) {
        Ok(s) => {
            (ctx.tell)(Note::Clock(s));
            Ok(s)
        }
        Err(e @ LinkError::Refused { .. }) => {
            (ctx.tell)(Note::ClockRefused(&e));
            sync_clock(link, None, ctx.wall_ms)
        }
        Err(e) => Err(e),
    }
}

/// The device's active product calibration: `None` when it has none
/// selected (or the selected slot is empty). Its basis is the basis of the
/// moisture in the readings that carry its content id.
///
/// # Errors
/// [`LinkError`], also for an answer of another kind.
pub fn active_product_cal(link: &mut Link) -> Result<Option<ProductCal>, LinkError> {
    let active = match link.request(Request::ListProducts)? {
        Response::Products { active, .. } => active,
        other => {
            return Err(LinkError::Unexpected {
                request: "ListProducts",
                got: format!("{other:?}"),
            })
        }
    };
    let Some(slot) = active else {
        return Ok(None);
    };
    match link.request(Request::ReadProductCal { slot })? {
        Response::ProductCal { cal, .. } => Ok(cal),
        other => Err(LinkError::Unexpected {
            request: "ReadProductCal",
            got: format!("{other:?}"),
        }),
    }
}

/// Records the calibrations found on the device with no record in the
/// store, and tells each. Best effort: a failure is told and the session
/// goes on; only a link that failed (which the caller reconnects) is
/// returned.
fn observe(
    link: &mut Link,
    store: &mut (impl RecordStore + ?Sized),
    serial: &str,
    ctx: &mut Ctx<'_>,
) -> Result<(), LineError> {
    match crate::observe::record_unrecorded(link, store, serial) {
        Ok(found) => {
            for o in found {
                (ctx.tell)(Note::CalibrationObserved(o));
            }
            Ok(())
        }
        Err(e) if e.is_disconnect() => Err(e),
        Err(e) => {
            (ctx.tell)(Note::CalibrationsNotRead(&e));
            Ok(())
        }
    }
}

fn identity(link: &Link) -> Result<Identity, LinkError> {
    link.identity().cloned().ok_or(LinkError::Unexpected {
        request: "Identify",
        got: "no identity after the handshake".into(),
    })
}

/// One line session: one device, streaming into a store the caller holds.
#[derive(Debug)]
pub struct Session {
    link: Link,
    serial: String,
    batcher: Batcher,
    /// The last sequence stored or queued.
    last: Option<Seq>,
    key: Option<Key>,
    /// The device's measurement interval (or the stream period asked of a
    /// protocol 1.0 device), ms.
    period_ms: u32,
    last_reading: Instant,
    latest: Option<Reading>,
    summary: Summary,
    /// A reconnect left it to be caught up and subscribed again.
    resume: bool,
    /// Calibration ids the store has a record of, or that were looked for
    /// on the device once: a reading carrying another (a calibration
    /// written or selected by another tool while the session runs) has the
    /// device's calibrations read and recorded ([`crate::observe`]).
    known_cals: Vec<CalId>,
}

/// The calibration ids `store` has a record of for `serial`.
fn recorded_ids(
    store: &(impl RecordStore + ?Sized),
    serial: &str,
) -> Result<Vec<CalId>, StoreError> {
    Ok(store
        .calibrations(serial)?
        .into_iter()
        .map(|c| c.cal.cal_id)
        .collect())
}

impl Session {
    /// Starts a session on a connected link: the device is registered in
    /// the store and its clock checked (and set with the key); its interval
    /// is read. Call [`Session::catch_up`] and [`Session::subscribe`]
    /// next, then [`Session::poll`] until done, then [`Session::finish`].
    ///
    /// # Errors
    /// [`LineError`].
    pub fn open(
        mut link: Link,
        store: &mut (impl RecordStore + ?Sized),
        opts: SessionOptions,
        ctx: &mut Ctx<'_>,
    ) -> Result<Self, LineError> {
        let id = identity(&link)?;
        let serial = register(store, &id)?;
        sequence_ahead(&mut link, store, &serial, ctx)?;
        clock(&mut link, opts.key.as_ref(), ctx)?;
        observe(&mut link, store, &serial, ctx)?;
        let period_ms = if id.capabilities.contains(Capabilities::SETTINGS) {
            let interval = link.settings()?.interval_ms;
            if let Some(p) = opts.period_ms.filter(|p| *p != interval) {
                (ctx.tell)(Note::PeriodIgnored {
                    asked_ms: p,
                    interval_ms: interval,
                });
            }
            interval
        } else {
            opts.period_ms.unwrap_or(1000)
        };
        let last = store.last_seq(&serial)?;
        let known_cals = recorded_ids(store, &serial)?;
        Ok(Session {
            link,
            batcher: Batcher::new(&serial),
            serial,
            last,
            key: opts.key,
            period_ms,
            last_reading: (ctx.now)(),
            latest: None,
            summary: Summary::default(),
            resume: false,
            known_cals,
        })
    }

    /// The device serial.
    pub fn serial(&self) -> &str {
        &self.serial
    }

    /// The device's measurement interval (its setting; the stream period
    /// asked of a device without settings), ms.
    pub fn period_ms(&self) -> u32 {
        self.period_ms
    }

    /// The link (its port name and counters).
    pub fn link(&self) -> &Link {
        &self.link
    }

    /// The latest reading queued.
    pub fn latest(&self) -> Option<&Reading> {
        self.latest.as_ref()
    }

    /// The sequence number of the last reading received from the device:
    /// one the link holds for the next [`Session::poll`] (streamed while a
    /// request was answered), or else [`Session::latest`]'s. A device
    /// sends its frames in order, so every reading it took before it
    /// answered a request has been received once the answer has.
    pub fn last_received(&self) -> Option<fringe_protocol::Seq> {
        self.link
            .last_queued_reading()
            .or(self.latest.as_ref().map(|r| r.seq))
    }

    /// What the session did so far.
    pub fn summary(&self) -> Summary {
        // Every commit goes through the batcher, also those a backfill
        // makes while it fills a gap; count them all there.
        let t = self.batcher.total();
        Summary {
            link_errors: self.link.stats().damaged,
            stored: t.inserted,
            duplicates: t.duplicates + t.conflicts,
            ..self.summary
        }
    }

    fn flush(&mut self, store: &mut (impl RecordStore + ?Sized)) -> Result<InsertStats, LineError> {
        self.batcher.flush(store).map_err(LineError::Commit)
    }

    /// Reads back what the device logged that the store lacks (before,
    /// between and after what it holds, up to where the device is now:
    /// what it takes from here on comes by the stream) and the events
    /// after the last stored one, and commits it.
    ///
    /// A link failure that a reconnect may cure (a port that went away,
    /// no answer, only damaged frames on a noisy line) is cured here as in
    /// [`Session::poll`], and the catch-up goes on from what is committed;
    /// when the stop flag is set meanwhile it returns `Ok`.
    ///
    /// # Errors
    /// [`LineError`] that a reconnect cannot cure; what was received is
    /// committed first.
    pub fn catch_up(
        &mut self,
        store: &mut (impl RecordStore + ?Sized),
        ctx: &mut Ctx<'_>,
    ) -> Result<(), LineError> {
        loop {
            match self.catch_up_once(store, ctx) {
                Err(e) if e.is_disconnect() && !ctx.stop.load(Ordering::Relaxed) => {
                    if !self.reconnect(store, &e, ctx)? {
                        return Ok(());
                    }
                }
                other => return other,
            }
        }
    }

    fn catch_up_once(
        &mut self,
        store: &mut (impl RecordStore + ?Sized),
        ctx: &mut Ctx<'_>,
    ) -> Result<(), LineError> {
        let events_from = store
            .last_event(&self.serial)?
            .map_or(0, |n| n.saturating_add(1));
        pull_events(&mut self.link, store, &self.serial, events_from)?;
        let now_at = self.link.status()?.next_seq;
        let serial = self.serial.clone();
        let b = backfill_missing(
            &mut self.link,
            store,
            &mut self.batcher,
            &serial,
            Some(now_at),
            &mut |r| (ctx.tell)(Note::Logged(r)),
            &mut |_, _| {},
        );
        self.flush(store)?;
        let b = b?;
        self.summary.backfilled += b.received;
        self.summary.lost += b.lost;
        (ctx.tell)(Note::CaughtUp {
            received: b.received,
            lost: b.lost,
        });
        // Continue after what is stored now (the stream starts at `now_at`).
        self.last = store.last_seq(&serial)?.max(self.last);
        Ok(())
    }

    /// Subscribes to the device's readings. A failure that a reconnect
    /// may cure is left to the next [`Session::poll`], which reconnects,
    /// catches up and subscribes.
    ///
    /// # Errors
    /// [`LineError::Link`] that a reconnect cannot cure.
    pub fn subscribe(&mut self, ctx: &mut Ctx<'_>) -> Result<(), LineError> {
        match self.request_stream(ctx) {
            Err(e) if e.is_disconnect() => {
                self.resume = true;
                Ok(())
            }
            other => other,
        }
    }

    fn request_stream(&mut self, ctx: &mut Ctx<'_>) -> Result<(), LineError> {
        self.link.request(Request::StartStream {
            period_ms: self.period_ms,
        })?;
        self.last_reading = (ctx.now)();
        Ok(())
    }

    /// One step: waits at most 50 ms (less when a batch falls due) for a
    /// frame, queues a reading (filling a gap before it from the device
    /// log), stores an event, commits a batch that is due, and asks the
    /// device when the stream has gone quiet. A link failure that a
    /// reconnect may cure is cured here (told as [`Note::Reconnecting`]).
    ///
    /// # Errors
    /// [`LineError`] that a reconnect cannot cure.
    pub fn poll(
        &mut self,
        store: &mut (impl RecordStore + ?Sized),
        ctx: &mut Ctx<'_>,
    ) -> Result<Polled, LineError> {
        let mut result = if self.resume {
            self.resume(store, ctx).map(|()| Polled::default())
        } else {
            self.step(store, ctx)
        };
        loop {
            match result {
                Err(e) if e.is_disconnect() && !ctx.stop.load(Ordering::Relaxed) => {
                    match self.reconnect(store, &e, ctx) {
                        Ok(true) => result = self.resume(store, ctx).map(|()| Polled::default()),
                        Ok(false) => {
                            return Ok(Polled {
                                committed: None,
                                stopped: true,
                            })
                        }
                        Err(e) => return Err(e),
                    }
                }
                other => return other,
            }
        }
    }

    fn resume(
        &mut self,
        store: &mut (impl RecordStore + ?Sized),
        ctx: &mut Ctx<'_>,
    ) -> Result<(), LineError> {
        self.resume = true;
        self.catch_up_once(store, ctx)?;
        self.request_stream(ctx)?;
        self.resume = false;
        Ok(())
    }

    fn step(
        &mut self,
        store: &mut (impl RecordStore + ?Sized),
        ctx: &mut Ctx<'_>,
    ) -> Result<Polled, LineError> {
        let now = (ctx.now)();
        let wait = self
            .batcher
            .deadline()
            .map_or(Duration::from_millis(50), |d| {
                d.saturating_duration_since(now)
            })
            .min(Duration::from_millis(50));
        match self.link.next_frame(wait)? {
            Some(DeviceFrame::Reading(r)) => self.on_reading(r, store, ctx)?,
            Some(DeviceFrame::Event(e)) => {
                // An event after a gap in the numbers (a frame lost on the
                // line, or one the device logs without sending): those in
                // between are read from the device's event log first. A
                // later catch-up reads only after the highest stored, so a
                // gap left here was never filled (found by review).
                if let Some(last) = store.last_event(&self.serial)? {
                    if e.number > last.saturating_add(1) {
                        pull_events(&mut self.link, store, &self.serial, last + 1)?;
                    }
                }
                store.insert_events(&self.serial, &[e])?;
            }
            _ => {}
        }
        let mut polled = Polled::default();
        if self.batcher.due((ctx.now)()) {
            polled.committed = Some(self.flush(store)?);
        }
        let silence = Duration::from_millis(u64::from(self.period_ms) * 5 + 2000);
        if (ctx.now)().saturating_duration_since(self.last_reading) > silence {
            // The stream went quiet: ask the device; no answer means reconnect.
            self.link.request(Request::Status)?;
            self.request_stream(ctx)?;
        }
        Ok(polled)
    }

    fn on_reading(
        &mut self,
        r: Reading,
        store: &mut (impl RecordStore + ?Sized),
        ctx: &mut Ctx<'_>,
    ) -> Result<(), LineError> {
        let now = (ctx.now)();
        self.last_reading = now;
        self.summary.streamed += 1;
        match self.last {
            Some(last) if r.seq <= last => return Ok(()),
            Some(last) if r.seq != next_seq(last) => {
                self.summary.gaps += 1;
                self.fill_gap(Some(r.seq), store, ctx)?;
            }
            _ => {}
        }
        self.batcher.push(r, fringe_store::Source::Stream, now);
        self.last = Some(self.last.map_or(r.seq, |x| x.max(r.seq)));
        // Queued first: a link that fails while the device is asked loses
        // nothing.
        let unknown = [r.cell_cal, r.product_cal]
            .into_iter()
            .filter(|id| *id != CalId::NONE && !self.known_cals.contains(id))
            .collect::<Vec<_>>();
        if !unknown.is_empty() {
            // Asked once: an id the device no longer has active stays
            // unknown.
            self.known_cals.extend(unknown);
            observe(&mut self.link, store, &self.serial, ctx)?;
            self.known_cals.extend(recorded_ids(store, &self.serial)?);
        }
        self.latest = Some(r);
        (ctx.tell)(Note::Reading(&r));
        Ok(())
    }

    /// Reads the readings after the last one up to `until` from the log.
    fn fill_gap(
        &mut self,
        until: Option<Seq>,
        store: &mut (impl RecordStore + ?Sized),
        ctx: &mut Ctx<'_>,
    ) -> Result<(), LineError> {
        let Some(last) = self.last else {
            return Ok(());
        };
        let from = next_seq(last);
        if until.is_some_and(|u| u <= from) {
            return Ok(());
        }
        let mut reached: Option<Seq> = None;
        let b = backfill(
            &mut self.link,
            store,
            &mut self.batcher,
            from,
            until,
            &mut |r| (ctx.tell)(Note::Logged(r)),
            &mut |_, last| reached = last,
        );
        // Keep what a cut-short backfill got: the next one starts after it.
        if let Some(l) = reached {
            self.last = Some(self.last.map_or(l, |x| x.max(l)));
        }
        let b = b?;
        self.summary.backfilled += b.received;
        self.summary.lost += b.lost;
        if b.lost > 0 {
            (ctx.tell)(Note::Lost {
                count: b.lost,
                after: last,
            });
        }
        Ok(())
    }

    /// Commits, reopens the port until the same device answers (or the
    /// stop flag is set: `Ok(false)`), and sets its clock.
    fn reconnect(
        &mut self,
        store: &mut (impl RecordStore + ?Sized),
        why: &LineError,
        ctx: &mut Ctx<'_>,
    ) -> Result<bool, LineError> {
        self.flush(store)?;
        (ctx.tell)(Note::Reconnecting(why));
        match self.link.reconnect(ctx.stop) {
            Ok(id) => {
                if id.serial.as_str() != self.serial {
                    return Err(LineError::OtherDevice {
                        port: self.link.port_name().into(),
                        was: self.serial.clone(),
                        now: id.serial.to_string(),
                    });
                }
                // The same serial numbering below what is stored (a board
                // swapped, a flash wiped while the port was away) is
                // refused by name here too: its readings would be dropped
                // as already stored (found by review).
                sequence_ahead(&mut self.link, store, &self.serial, ctx)?;
                // Its interval may have been changed while the port was
                // away (a laptop on the line): read again.
                if self
                    .link
                    .identity()
                    .is_some_and(|i| i.capabilities.contains(Capabilities::SETTINGS))
                {
                    self.period_ms = self.link.settings()?.interval_ms;
                }
                self.summary.reconnects += 1;
                (ctx.tell)(Note::Reconnected);
                let key = self.key;
                clock(&mut self.link, key.as_ref(), ctx)?;
                self.resume = true;
                // A link that fails again here is found by the next poll.
                if let Err(e) = observe(&mut self.link, store, &self.serial, ctx) {
                    (ctx.tell)(Note::CalibrationsNotRead(&e));
                }
                Ok(true)
            }
            Err(LinkError::Stopped) => Ok(false),
            Err(e) => Err(e.into()),
        }
    }

    /// Sends the plant's bulk density to the device between readings of
    /// the stream ([`crate::set_density_after`]: `after` is the boot and
    /// counter of this sender's last density, the result those of this
    /// one; the readings that arrive meanwhile are kept for the next
    /// [`Session::poll`]).
    ///
    /// # Errors
    /// As [`crate::set_density`]; a link that failed is found and cured by
    /// the next [`Session::poll`].
    pub fn set_density(
        &mut self,
        key: &Key,
        kg_m3: f32,
        hold_ms: u32,
        after: Option<(u32, u32)>,
    ) -> Result<(u32, u32), crate::DensityError> {
        crate::density::set_density_after(&mut self.link, key, kg_m3, hold_ms, after)
    }

    /// The device's active product calibration ([`active_product_cal`]),
    /// asked while streaming: readings that arrive meanwhile wait for the
    /// next [`Session::poll`].
    ///
    /// # Errors
    /// [`LinkError`]; a link that failed is found and cured by the next
    /// [`Session::poll`].
    pub fn active_product_cal(&mut self) -> Result<Option<ProductCal>, LinkError> {
        active_product_cal(&mut self.link)
    }

    /// Ends the session: commits what arrived (whatever happened before)
    /// and unsubscribes if the device is still there.
    ///
    /// # Errors
    /// [`LineError::Commit`] when the last commit fails; the summary is
    /// returned either way.
    pub fn finish(
        mut self,
        store: &mut (impl RecordStore + ?Sized),
    ) -> (Summary, Result<(), LineError>) {
        let flushed = self.flush(store).map(|_| ());
        if self.link.is_connected() {
            let _ = self.link.request(Request::StopStream);
        }
        (self.summary(), flushed)
    }
}

/// What a pull did.
#[derive(Debug, Clone, serde::Serialize)]
pub struct PullSummary {
    /// Device serial.
    pub serial: String,
    /// The device log: first sequence held.
    pub log_first: fringe_protocol::Seq,
    /// Readings the device log holds.
    pub log_len: u32,
    /// The device clock before, and whether it was set.
    pub clock: ClockSync,
    /// Readings received.
    pub received: u64,
    /// Readings newly stored.
    pub stored: u64,
    /// Readings already stored.
    pub duplicates: u64,
    /// Readings the device log no longer held.
    pub lost: u64,
    /// Events newly stored.
    pub events_stored: u64,
    /// Damaged frames on the link.
    pub link_errors: u32,
    /// Wall time, ms.
    pub elapsed_ms: u64,
}

/// Says ([`Note::SequenceBehind`]) where the device's next reading does
/// not lie past every reading the store holds of its serial (found by
/// review: a device whose log was erased numbered its readings from the
/// start again, and every one the store already had a number for was
/// dropped as already stored, silently). Said, not refused: a simulator
/// started again is such a device, and its readings past the stored ones
/// are stored as before.
///
/// # Errors
/// Link and store errors.
fn sequence_ahead(
    link: &mut Link,
    store: &(impl RecordStore + ?Sized),
    serial: &str,
    ctx: &mut Ctx<'_>,
) -> Result<(), LineError> {
    let Some(stored) = store.last_seq(serial)? else {
        return Ok(());
    };
    let device_next = link.status()?.next_seq;
    if device_next <= stored {
        (ctx.tell)(Note::SequenceBehind(&LineError::SequenceBehind {
            serial: serial.to_string(),
            stored,
            device_next,
        }));
    }
    Ok(())
}

/// Stores every reading the device log holds that the store lacks (before,
/// between and after what it holds, up to the reading the device was about
/// to take when the pull began), and the events after the last stored
/// one; idempotent. With the key the device clock is set first when it
/// needs it. `progress` gets the readings received so far and how many
/// were expected when the pull began (the device goes on measuring).
///
/// # Errors
/// [`LineError`]; what was received before a failure is committed.
pub fn pull(
    link: &mut Link,
    store: &mut (impl RecordStore + ?Sized),
    key: Option<&Key>,
    ctx: &mut Ctx<'_>,
    progress: &mut dyn FnMut(u64, u64),
) -> Result<PullSummary, LineError> {
    let t0 = (ctx.now)();
    let id = identity(link)?;
    let serial = register(store, &id)?;
    sequence_ahead(link, store, &serial, ctx)?;
    let clock = clock(link, key, ctx)?;
    observe(link, store, &serial, ctx)?;
    let status = link.status()?;
    // Readings to expect: those the log holds that the store lacks.
    let held = store.count_between(&serial, status.log_first, status.next_seq)?;
    let expected = u64::from(status.log_len).saturating_sub(held);
    let mut batcher = Batcher::new(&serial);
    let b = backfill_missing(
        link,
        store,
        &mut batcher,
        &serial,
        // Up to where the device was when the pull began: on a device that
        // logs faster than the line carries (or a slow line) a pull to the
        // moving end would never finish; the next pull or monitor gets the rest.
        Some(status.next_seq),
        &mut |r| (ctx.tell)(Note::Logged(r)),
        &mut |n, _| progress(n, expected),
    );
    // Commit what came even if the link failed half way.
    let flushed = batcher.flush(store).map_err(LineError::Commit);
    let b = b?;
    flushed?;
    let events_from = store
        .last_event(&serial)?
        .map_or(0, |n| n.saturating_add(1));
    let ev = pull_events(link, store, &serial, events_from)?;
    let total = batcher.total();
    Ok(PullSummary {
        serial,
        log_first: status.log_first,
        log_len: status.log_len,
        clock,
        received: b.received,
        stored: total.inserted,
        duplicates: total.duplicates + total.conflicts,
        lost: b.lost,
        events_stored: ev.inserted,
        link_errors: link.stats().damaged,
        elapsed_ms: (ctx.now)().saturating_duration_since(t0).as_millis() as u64,
    })
}
