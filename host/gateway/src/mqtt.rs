//! The MQTT publisher: every reading and alarm of the gateway's devices to
//! the plant's broker, as Sparkplug B (the default) or plain JSON, QoS 1,
//! through the store-and-forward [`Outbox`].
//!
//! One worker thread runs broker sessions one after another. A session
//! connects (credentials and TLS from the site file; the will is the
//! NDEATH of a new `bdSeq`), publishes NBIRTH and a DBIRTH per device, then
//! sends the buffer in order with up to [`WINDOW`] messages awaiting their
//! acknowledgement, deleting the rows acknowledged (PUBACK) in batches
//! ([`ACK_BATCH`]). When the broker goes
//! away the session ends; rows not acknowledged stay buffered, and the next
//! session (after a back-off of 0.5 s doubling to 10 s) sends them first,
//! marked historical when they were buffered before it began. A Sparkplug
//! rebirth request (NCMD `Node Control/Rebirth`) is answered with births.
//!
//! With a [`DensityInbox`] (devices with `[device.density]`), each session
//! also subscribes to the devices' commands, DCMD (or
//! `{prefix}/+/density` in JSON), and posts each bulk density that comes
//! to the inbox (`crate::density`); a fed device's DBIRTH declares the
//! metric it takes. A retained message, which the broker hands over when
//! the gateway subscribes, is refused: its age is unknown.

use std::collections::{BTreeSet, HashMap, VecDeque};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use fringe_protocol::Reading;
use std::sync::mpsc::RecvTimeoutError;

use rumqttc::{Client, Event, Incoming, LastWill, MqttOptions, Outgoing, QoS};

use crate::density::{self, DensityInbox};
use crate::outbox::{Item, Outbox, OutboxError, Row};
use crate::sparkplug::{self, Payload};

/// Messages in flight (sent, not yet acknowledged) per session.
pub const WINDOW: usize = 32;

/// Acknowledged rows are deleted from the buffer together, in one
/// transaction, once this many have come or [`ACK_FLUSH_EVERY`] after the
/// first of them, and at the end of every session. One transaction per
/// acknowledgement made a flush to disk per message the limit of how
/// fast a backlog went out (BENCHMARKS.md, "The MQTT buffer's catch-up").
/// A gateway killed or a power cut in between sends those rows again:
/// MQTT's QoS 1 is "at least once" anyway.
pub const ACK_BATCH: usize = 256;

/// See [`ACK_BATCH`].
pub const ACK_FLUSH_EVERY: Duration = Duration::from_millis(100);

/// Acknowledged rows waiting for their delete at most: while deletes fail
/// (a full disk), no more rows are sent past this, so that what waits in
/// memory, the retried transaction and what a restart sends again stay
/// bounded; the rows not sent wait in the buffer.
pub const ACK_PENDING_MAX: usize = 4 * ACK_BATCH;

/// Least time between two answers to Rebirth requests (1 s): a burst of
/// them is answered at most once a second, the last answer after its last
/// request.
pub const REBIRTH_EVERY: Duration = Duration::from_secs(1);

/// How the gateway speaks MQTT.
#[derive(Debug, Clone, PartialEq)]
pub enum Format {
    /// Sparkplug B: `spBv1.0/{group}/.../{edge node}/{device}`.
    Sparkplug {
        /// Group id.
        group: String,
        /// Edge node id (this gateway).
        edge_node: String,
    },
    /// Plain JSON on `{prefix}/{device}/reading` and `{prefix}/{device}/alarm`.
    Json {
        /// Topic prefix.
        prefix: String,
    },
}

/// Where and how to publish.
#[derive(Debug, Clone)]
pub struct MqttConfig {
    /// Broker host.
    pub host: String,
    /// Broker port (1883 plain, 8883 TLS by convention).
    pub port: u16,
    /// Client id (unique per gateway).
    pub client_id: String,
    /// User name and password, if the broker wants them.
    pub credentials: Option<(String, String)>,
    /// PEM of the CA that signed the broker's certificate: TLS when set.
    pub tls_ca_pem: Option<Vec<u8>>,
    /// Topic layout and payloads.
    pub format: Format,
    /// MQTT keep-alive.
    pub keep_alive: Duration,
    /// Where the bulk densities the plant sends go (none: no subscription).
    pub density: Option<Arc<DensityInbox>>,
}

/// What the publisher has done, for status lines.
#[derive(Debug, Clone, Default, PartialEq, Eq, serde::Serialize)]
pub struct MqttStats {
    /// Connected to the broker now.
    pub connected: bool,
    /// Sessions started.
    pub sessions: u64,
    /// Messages acknowledged by the broker.
    pub acknowledged: u64,
    /// The last connection error (or dropped row), in words.
    pub last_error: Option<String>,
    /// Buffered rows this version could not read, dropped (none expected).
    pub dropped: u64,
    /// The oldest buffered rows dropped to keep the buffer within its
    /// limit (a broker away for weeks).
    pub overflowed: u64,
}

/// The running publisher.
#[derive(Debug)]
pub struct Publisher {
    outbox: Mutex<Outbox>,
    /// Rows handed in and not yet written ([`Publisher::push`]).
    group: Mutex<Group>,
    written: std::sync::Condvar,
    stop: Arc<AtomicBool>,
    stats: Arc<Mutex<MqttStats>>,
    worker: Option<std::thread::JoinHandle<()>>,
}

/// Rows waiting to be written to the buffer together (a group commit):
/// each device's session hands in its reading and waits until a
/// transaction holding it has been written; whoever finds no transaction
/// under way writes every row waiting, in one, with one flush to disk.
/// One transaction per reading made a flush to disk per reading, on the
/// device sessions' path (BENCHMARKS.md, "The MQTT buffer's catch-up").
#[derive(Debug, Default)]
struct Group {
    /// Rows waiting, in the order of their tickets (from `written_below`).
    waiting: Vec<(Item, u64)>,
    /// The ticket of the next row handed in.
    next_ticket: u64,
    /// Every row of a ticket below this has been written, or its
    /// transaction failed.
    written_below: u64,
    /// A transaction is being written.
    writing: bool,
    /// The tickets of the transactions that failed, with the error and
    /// how many of their rows' sessions have not been told yet.
    failed: Vec<(std::ops::Range<u64>, OutboxError, usize)>,
}

fn now_ms() -> u64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map_or(0, |d| d.as_millis() as u64)
}

impl Publisher {
    /// Starts publishing for `devices` (serials, born in every session),
    /// buffering in the file `outbox_path`.
    ///
    /// # Errors
    /// When the buffer file cannot be opened.
    pub fn start(
        config: MqttConfig,
        outbox_path: &Path,
        devices: Vec<String>,
    ) -> Result<Self, OutboxError> {
        let outbox = Outbox::open(outbox_path)?;
        let worker_box = Outbox::open(outbox_path)?;
        let stop = Arc::new(AtomicBool::new(false));
        let stats = Arc::new(Mutex::new(MqttStats::default()));
        let (s, st) = (Arc::clone(&stop), Arc::clone(&stats));
        let worker = std::thread::Builder::new()
            .name("mqtt".into())
            .spawn(move || {
                Worker {
                    config,
                    outbox: worker_box,
                    devices: devices.into_iter().collect(),
                    lost: BTreeSet::new(),
                    said_connected: HashMap::new(),
                    boot_origins: HashMap::new(),
                    stop: s,
                    stats: st,
                    acked: BTreeSet::new(),
                    acked_since: None,
                    flush_failed: None,
                    bd_seq: None,
                    bd_seq_unkept: None,
                }
                .run();
            })
            .ok();
        Ok(Self {
            outbox: Mutex::new(outbox),
            group: Mutex::new(Group::default()),
            written: std::sync::Condvar::new(),
            stop,
            stats,
            worker,
        })
    }

    /// Buffers `item`: returns once it is written (in a transaction with
    /// the rows handed in meanwhile, [`Group`]), or with the error of that
    /// transaction.
    fn push(&self, item: &Item) -> Result<(), OutboxError> {
        let lock = || self.group.lock().unwrap_or_else(|e| e.into_inner());
        let mut g = lock();
        let ticket = g.next_ticket;
        g.next_ticket += 1;
        g.waiting.push((item.clone(), now_ms()));
        loop {
            if g.written_below > ticket {
                let Some(k) = g.failed.iter().position(|(r, ..)| r.contains(&ticket)) else {
                    return Ok(());
                };
                let e = g.failed[k].1.clone();
                g.failed[k].2 -= 1;
                if g.failed[k].2 == 0 {
                    g.failed.swap_remove(k);
                }
                return Err(e);
            }
            if g.writing {
                g = self.written.wait(g).unwrap_or_else(|e| e.into_inner());
                continue;
            }
            // Write every row waiting (this one among them).
            g.writing = true;
            let rows = std::mem::take(&mut g.waiting);
            let first = g.written_below;
            drop(g);
            // (A panic in the write is that transaction's failure: the
            // sessions waiting on it must not wait for ever.)
            let result = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
                self.outbox
                    .lock()
                    .unwrap_or_else(|e| e.into_inner())
                    .push_many(&rows)
            }))
            .unwrap_or_else(|_| Err(crate::outbox::OutboxError::internal("write panicked")));
            g = lock();
            g.writing = false;
            g.written_below = first + rows.len() as u64;
            match result {
                Ok(dropped) => self.overflowed(dropped),
                Err(e) => {
                    let end = g.written_below;
                    g.failed.push((first..end, e, rows.len()));
                }
            }
            self.written.notify_all();
        }
    }

    /// `dropped` of the oldest rows were dropped to keep the buffer within
    /// its limit: counted and said.
    fn overflowed(&self, dropped: u64) {
        if dropped > 0 {
            let mut s = self.stats.lock().unwrap_or_else(|e| e.into_inner());
            s.overflowed += dropped;
            s.last_error = Some(format!(
                "the MQTT buffer is full ({} rows): its {dropped} oldest dropped, {} in all (the store keeps every reading)",
                crate::outbox::DEFAULT_MAX_ROWS,
                s.overflowed
            ));
        }
    }

    /// Buffers a reading of `device` for publishing, its moisture on
    /// `basis` (`wet`, `dry`; `None`: not known).
    ///
    /// # Errors
    /// When the buffer cannot be written (the reading is then only in the store).
    pub fn reading(
        &self,
        device: &str,
        r: &Reading,
        basis: Option<&str>,
    ) -> Result<(), OutboxError> {
        let json = reading_body(r, basis);
        self.push(&Item::Reading {
            device: device.to_string(),
            json,
        })
    }

    /// Buffers a reading of `device` read back from its log (a gap filled,
    /// a catch-up): published as historical (Sparkplug), `"from_log":
    /// true` (plain JSON).
    ///
    /// # Errors
    /// As [`Publisher::reading`].
    pub fn logged_reading(
        &self,
        device: &str,
        r: &Reading,
        basis: Option<&str>,
    ) -> Result<(), OutboxError> {
        self.push(&Item::Reading {
            device: device.to_string(),
            json: reading_body_of(r, basis, true),
        })
    }

    /// Buffers a drift alarm of `device`.
    ///
    /// # Errors
    /// As [`Publisher::reading`].
    pub fn alarm(&self, device: &str, text: &str, time_ms: u64) -> Result<(), OutboxError> {
        self.push(&Item::Alarm {
            device: device.to_string(),
            text: text.to_string(),
            time_ms,
        })
    }

    /// Buffers a DDEATH: the link to `device` was lost.
    ///
    /// # Errors
    /// As [`Publisher::reading`].
    pub fn device_lost(&self, device: &str) -> Result<(), OutboxError> {
        self.push(&Item::DeviceLost {
            device: device.to_string(),
        })
    }

    /// Messages waiting for the broker.
    ///
    /// # Errors
    /// When the buffer cannot be read.
    pub fn queued(&self) -> Result<u64, OutboxError> {
        self.outbox.lock().unwrap_or_else(|e| e.into_inner()).len()
    }

    /// What it has done so far.
    pub fn stats(&self) -> MqttStats {
        self.stats.lock().unwrap_or_else(|e| e.into_inner()).clone()
    }

    /// Stops: a Sparkplug edge node publishes its NDEATH and disconnects;
    /// what was not acknowledged stays buffered for the next start.
    pub fn stop(mut self) {
        self.shutdown();
    }

    fn shutdown(&mut self) {
        self.stop.store(true, Ordering::Relaxed);
        if let Some(w) = self.worker.take() {
            let _ = w.join();
        }
    }
}

impl Drop for Publisher {
    fn drop(&mut self) {
        self.shutdown();
    }
}

struct Worker {
    config: MqttConfig,
    outbox: Outbox,
    devices: BTreeSet<String>,
    /// Devices whose link was lost (a DeviceLost row) and no reading has
    /// come from since: not born again at a new session or a Rebirth.
    lost: BTreeSet<String>,
    /// Plain JSON: what this session last published on each device's
    /// status topic (`connected` true or false).
    said_connected: HashMap<String, bool>,
    /// Per device and boot whose clock was unset: the wall-clock time of
    /// its time since boot 0, from a reading streamed as it was taken (its
    /// buffering time less its time since boot), for the readings of that
    /// boot read back from the log.
    boot_origins: HashMap<(String, u32), u64>,
    stop: Arc<AtomicBool>,
    stats: Arc<Mutex<MqttStats>>,
    /// Rows acknowledged and not yet deleted ([`ACK_BATCH`]), and when
    /// the first of them came.
    acked: BTreeSet<i64>,
    acked_since: Option<Instant>,
    /// When deleting them last failed (the next try waits
    /// [`FLUSH_RETRY`]); they are not sent again meanwhile.
    flush_failed: Option<Instant>,
    /// Sparkplug: the bdSeq of the last session.
    bd_seq: Option<u64>,
    /// Why this session's bdSeq is not kept in the file, if it is not
    /// (said in the status while the session lasts).
    bd_seq_unkept: Option<String>,
}

/// The bdSeq of a new Sparkplug session: the one after this run's last
/// session's, kept in the file or not, else after the one the file keeps
/// from an earlier run, else 0; 0-255. (Taken from the file alone, a
/// session after one whose number the file could not take used that
/// number again, and a Sparkplug host can take the earlier session's
/// death for the new one's; found by review.)
fn bd_seq_after(last_in_this_run: Option<u64>, stored: Option<u64>) -> u64 {
    last_in_this_run.or(stored).map_or(0, |b| (b + 1) % 256)
}

/// What the status says of acknowledged rows a delete failed for (and is
/// cleared by once one succeeds).
const STAY: &str = "stay in the buffer until they can be deleted";

/// How long after a failed delete of acknowledged rows the next is tried.
const FLUSH_RETRY: Duration = Duration::from_secs(1);

/// Why a session ended.
enum End {
    Stopped,
    Lost(String),
}

impl Worker {
    fn run(mut self) {
        let mut backoff = Duration::from_millis(500);
        while !self.stop.load(Ordering::Relaxed) {
            let t0 = Instant::now();
            let end = self.session();
            self.stat(|s| s.connected = false);
            // What the broker acknowledged is deleted before the next
            // session reads the buffer from its start (rows it could not
            // delete are skipped there, not sent again).
            let flushed = self.flush_acks();
            if let Err(e) = &flushed {
                self.stat(|s| s.last_error = Some(e.clone()));
            }
            match end {
                End::Stopped => break,
                End::Lost(why) => {
                    let why = match flushed {
                        Ok(()) => why,
                        Err(e) => format!("{why}; and {e}"),
                    };
                    self.stat(|s| s.last_error = Some(why));
                    if t0.elapsed() > Duration::from_secs(30) {
                        backoff = Duration::from_millis(500);
                    }
                    let until = Instant::now() + backoff;
                    while Instant::now() < until && !self.stop.load(Ordering::Relaxed) {
                        std::thread::sleep(Duration::from_millis(50));
                    }
                    backoff = (backoff * 2).min(Duration::from_secs(10));
                }
            }
        }
    }

    /// The bdSeq of a new Sparkplug session (0 in plain JSON, which has
    /// none; [`bd_seq_after`]), kept in the buffer's file. Where the file
    /// takes no write (a full disk) the session starts all the same, and
    /// the status says the number is not kept: sending the buffer is what
    /// frees the space (before, no session started, and nothing was sent
    /// until the disk was cleared by hand; found by review).
    fn next_bd_seq(&mut self) -> u64 {
        if !matches!(self.config.format, Format::Sparkplug { .. }) {
            return 0;
        }
        let stored = match self.bd_seq {
            Some(_) => None,
            None => self.outbox.stored_bd_seq().ok().flatten(),
        };
        let b = bd_seq_after(self.bd_seq, stored);
        self.bd_seq = Some(b);
        self.bd_seq_unkept = self.outbox.store_bd_seq(b).err().map(|e| {
            format!(
                "{e}: this session's bdSeq {b} is not kept in the file (a restart of the gateway before it is may repeat a bdSeq)"
            )
        });
        if let Some(t) = self.bd_seq_unkept.clone() {
            self.stat(|s| s.last_error = Some(t));
        }
        b
    }

    /// Row `id` was acknowledged: deleted with the next batch.
    fn ack(&mut self, id: i64) {
        self.acked.insert(id);
        self.acked_since.get_or_insert_with(Instant::now);
        if self.acked.len() >= ACK_BATCH {
            self.flush_acks_due_now();
        }
    }

    /// Deletes the acknowledged rows when [`ACK_FLUSH_EVERY`] has passed
    /// since the first of them. A failure (a full disk) is said in the
    /// status and tried again after [`FLUSH_RETRY`]; the session goes on
    /// (it ended at each failure before, and every new session sent its
    /// births and the start of the buffer again).
    fn flush_acks_due(&mut self) {
        if self
            .acked_since
            .is_some_and(|t| t.elapsed() >= ACK_FLUSH_EVERY)
        {
            self.flush_acks_due_now();
        }
    }

    fn flush_acks_due_now(&mut self) {
        if self.flush_failed.is_some_and(|t| t.elapsed() < FLUSH_RETRY) {
            return;
        }
        if let Err(e) = self.flush_acks() {
            self.stat(|s| s.last_error = Some(e));
        }
    }

    /// Deletes the acknowledged rows (kept for another try if that
    /// fails; the error then says so, in words the status clears by once
    /// a delete succeeds).
    fn flush_acks(&mut self) -> Result<(), String> {
        if self.acked.is_empty() {
            return Ok(());
        }
        let ids: Vec<i64> = self.acked.iter().copied().collect();
        if let Err(e) = self.outbox.done_many(&ids) {
            self.flush_failed = Some(Instant::now());
            return Err(format!(
                "{e} ({} rows acknowledged by the broker {STAY}; a restart of the gateway before then publishes them again)",
                ids.len()
            ));
        }
        self.acked.clear();
        self.acked_since = None;
        if self.flush_failed.take().is_some() {
            // The failure said in the status is over.
            self.stat(|s| {
                if s.last_error.as_deref().is_some_and(|e| e.contains(STAY)) {
                    s.last_error = None;
                }
            });
        }
        Ok(())
    }

    fn stat(&self, f: impl FnOnce(&mut MqttStats)) {
        f(&mut self.stats.lock().unwrap_or_else(|e| e.into_inner()));
    }

    fn options(&self, bd_seq: u64) -> MqttOptions {
        let c = &self.config;
        let mut o = MqttOptions::new(c.client_id.clone(), c.host.clone(), c.port);
        o.set_keep_alive(c.keep_alive);
        o.set_clean_session(true);
        o.set_max_packet_size(1 << 20, 1 << 20);
        if let Format::Sparkplug { group, edge_node } = &c.format {
            let death = sparkplug::node_death(bd_seq, now_ms());
            o.set_last_will(LastWill::new(
                sparkplug::topic(group, "NDEATH", edge_node, None),
                death.to_bytes(),
                QoS::AtLeastOnce,
                false,
            ));
        }
        if let Some((u, p)) = &c.credentials {
            o.set_credentials(u.clone(), p.clone());
        }
        if let Some(ca) = &c.tls_ca_pem {
            let _ = rustls::crypto::ring::default_provider().install_default();
            o.set_transport(rumqttc::Transport::tls(ca.clone(), None, None));
        }
        o
    }

    fn session(&mut self) -> End {
        let bd_seq = self.next_bd_seq();
        let started_ms = now_ms();
        // The client's request queue is emptied only by this thread's
        // polling, and a publish into a full one blocks it for good: room
        // for the window of readings (twice over), the subscription, the
        // NBIRTH and a DBIRTH for every device a Rebirth can ask for at
        // once. With room for the window alone, a site of 63 devices locked
        // up at its first reconnect (found by review).
        let births = self.devices.len().max(usize::from(u8::MAX)) * 2;
        let (client, conn) = Client::new(self.options(bd_seq), 2 * WINDOW + births + 8);
        let conn = Events::start(conn);
        // Wait for the broker's CONNACK.
        let deadline = Instant::now() + Duration::from_secs(10);
        loop {
            if self.stop.load(Ordering::Relaxed) {
                return End::Stopped;
            }
            if Instant::now() > deadline {
                return End::Lost("no CONNACK within 10 s".into());
            }
            match conn.recv_timeout(Duration::from_millis(100)) {
                Ok(Ok(Event::Incoming(Incoming::ConnAck(_)))) => break,
                Ok(Ok(_)) | Err(RecvTimeoutError::Timeout) => {}
                Ok(Err(e)) => {
                    return End::Lost(format!(
                        "connect to {}:{}: {e}",
                        self.config.host, self.config.port
                    ))
                }
                Err(RecvTimeoutError::Disconnected) => return End::Lost("client closed".into()),
            }
        }
        let unkept = self.bd_seq_unkept.clone();
        self.stat(|s| {
            s.connected = true;
            s.sessions += 1;
            // (A delete of acknowledged rows that still fails stays said,
            // and so does a bdSeq the file could not take.)
            if self.flush_failed.is_none() {
                s.last_error = unkept;
            }
        });
        // Plain JSON: each session says each device's status again (what
        // the last one said may not have reached the broker).
        self.said_connected.clear();
        let mut s = Session {
            client,
            seq: 0,
            born: BTreeSet::new(),
            awaiting_pkid: VecDeque::new(),
            in_flight: HashMap::new(),
            last_sent: 0,
            started_ms,
        };
        // One SUBSCRIBE, so that its SUBACK says which filter was refused.
        let mut filters = Vec::new();
        if let Format::Sparkplug { group, edge_node } = &self.config.format {
            filters.push(sparkplug::topic(group, "NCMD", edge_node, None));
        }
        if self.config.density.is_some() {
            filters.push(self.density_filter());
        }
        if !filters.is_empty() {
            let _ = s.client.subscribe_many(
                filters
                    .iter()
                    .map(|f| rumqttc::SubscribeFilter::new(f.clone(), QoS::AtLeastOnce)),
            );
        }
        if let Err(e) = self.births(&mut s, bd_seq) {
            return End::Lost(e);
        }
        // Rebirth requests are answered at most once per REBIRTH_EVERY: the
        // births after the last request of a burst serve every host that
        // asked (a host that asked in a loop made the gateway publish its
        // whole site over and over; found by review).
        let (mut births_at, mut rebirth_due) = (Instant::now(), false);
        loop {
            if rebirth_due && births_at.elapsed() >= REBIRTH_EVERY {
                if let Err(e) = self.births(&mut s, bd_seq) {
                    return End::Lost(e);
                }
                (births_at, rebirth_due) = (Instant::now(), false);
            }
            if self.stop.load(Ordering::Relaxed) {
                self.goodbye(&mut s, &conn, bd_seq);
                return End::Stopped;
            }
            if s.in_flight.len() + s.awaiting_pkid.len() < WINDOW
                && self.acked.len() < ACK_PENDING_MAX
            {
                let room = WINDOW - s.in_flight.len() - s.awaiting_pkid.len();
                match self.outbox.next(s.last_sent, room) {
                    Ok(rows) => {
                        for row in rows {
                            // Acknowledged in an earlier session, not yet
                            // deleted (a delete that failed): not again.
                            if self.acked.contains(&row.id) {
                                s.last_sent = row.id;
                                continue;
                            }
                            if let Err(e) = self.send_row(&mut s, &row) {
                                return End::Lost(e);
                            }
                        }
                    }
                    Err(e) => return End::Lost(e.to_string()),
                }
            }
            match conn.recv_timeout(Duration::from_millis(20)) {
                Ok(Ok(Event::Outgoing(Outgoing::Publish(pkid)))) => {
                    if let Some(row) = s.awaiting_pkid.pop_front() {
                        s.in_flight.insert(pkid, row);
                    }
                }
                Ok(Ok(Event::Incoming(Incoming::PubAck(ack)))) => {
                    if let Some(row) = s.in_flight.remove(&ack.pkid) {
                        if let Some(id) = row {
                            self.ack(id);
                        }
                        self.stat(|st| st.acknowledged += 1);
                    }
                }
                Ok(Ok(Event::Incoming(Incoming::SubAck(ack)))) => {
                    for (code, filter) in ack.return_codes.iter().zip(&filters) {
                        if *code == rumqttc::SubscribeReasonCode::Failure {
                            let text = format!(
                                "the broker refused the subscription to {filter} (its ACL?)"
                            );
                            match (&self.config.density, filter == &self.density_filter()) {
                                (Some(inbox), true) => inbox.say(&format!(
                                    "{text}: no density can arrive; the devices flag density_missing"
                                )),
                                _ => self.stat(|st| st.last_error = Some(text)),
                            }
                        }
                    }
                }
                Ok(Ok(Event::Incoming(Incoming::Publish(p)))) => {
                    if let Some(serial) = self.density_device(&p.topic) {
                        self.on_density(&serial, &p);
                    } else if self.is_rebirth(&p.payload) {
                        rebirth_due = true;
                    }
                }
                Ok(Ok(_)) | Err(RecvTimeoutError::Timeout) => {}
                Ok(Err(e)) => return End::Lost(format!("broker connection: {e}")),
                Err(RecvTimeoutError::Disconnected) => return End::Lost("client closed".into()),
            }
            self.flush_acks_due();
        }
    }

    /// The topic filter of the devices' density commands.
    fn density_filter(&self) -> String {
        density_filter(&self.config.format)
    }

    /// The device a density command on `topic` is for.
    fn density_device(&self, topic: &str) -> Option<String> {
        self.config.density.as_ref()?;
        density_device(&self.config.format, topic)
    }

    fn on_density(&self, serial: &str, p: &rumqttc::Publish) {
        let Some(inbox) = &self.config.density else {
            return;
        };
        let value = if p.retain {
            Err("a retained message (its age is unknown); publish it not retained".to_string())
        } else {
            match &self.config.format {
                Format::Sparkplug { .. } => match density::from_sparkplug(&p.payload) {
                    Some(v) => v,
                    // A command of another metric: not Fringe's.
                    None => return,
                },
                Format::Json { .. } => density::from_json(&p.payload),
            }
        };
        let _ = inbox.post(
            serial,
            value,
            crate::site::DensitySource::Mqtt,
            &p.topic,
            Instant::now(),
        );
    }

    fn is_rebirth(&self, payload: &[u8]) -> bool {
        <Payload as prost::Message>::decode(payload).is_ok_and(|p| {
            p.metrics.iter().any(|m| {
                m.name.as_deref() == Some(sparkplug::metric::REBIRTH)
                    && m.value == Some(sparkplug::Value::BooleanValue(true))
            })
        })
    }

    /// NBIRTH (sequence 0) and a DBIRTH for every known device.
    fn births(&mut self, s: &mut Session, bd_seq: u64) -> Result<(), String> {
        let Format::Sparkplug { group, edge_node } = self.config.format.clone() else {
            return Ok(());
        };
        s.seq = 0;
        s.born.clear();
        let t = now_ms();
        s.publish(
            sparkplug::topic(&group, "NBIRTH", &edge_node, None),
            sparkplug::node_birth(bd_seq, t).to_bytes(),
            None,
        )?;
        // Not the devices whose link is down (they were declared dead; a
        // birth would show them online until their link came back; found
        // by review): each is born again with its next reading.
        for d in self.devices.clone() {
            if !self.lost.contains(&d) {
                self.device_birth(s, &group, &edge_node, &d)?;
            }
        }
        Ok(())
    }

    fn device_birth(
        &mut self,
        s: &mut Session,
        group: &str,
        node: &str,
        device: &str,
    ) -> Result<(), String> {
        let seq = s.next_seq();
        let mut p = sparkplug::empty_device_birth(seq, now_ms());
        if self
            .config
            .density
            .as_ref()
            .is_some_and(|i| i.is_fed_from(device, crate::site::DensitySource::Mqtt))
        {
            p.metrics.push(sparkplug::density_metric(now_ms()));
        }
        s.publish(
            sparkplug::topic(group, "DBIRTH", node, Some(device)),
            p.to_bytes(),
            None,
        )?;
        s.born.insert(device.to_string());
        self.devices.insert(device.to_string());
        Ok(())
    }

    /// The time of a reading's metrics. A reading taken before its device's
    /// clock was set carries its time since boot (its metrics were dated
    /// 1970; found by review): streamed as it was taken, it is dated when it
    /// was buffered, and that gives its boot's origin; read back from the
    /// log, it is dated from that origin where one is known (the time of a
    /// catch-up would place a whole backlog at one instant), else it keeps
    /// the device's own. `device_time` keeps the device's own throughout.
    fn metric_time(&mut self, device: &str, r: &Reading, queued_ms: u64, from_log: bool) -> u64 {
        if r.time_ms >= fringe_store::record::SINCE_BOOT_BELOW_MS {
            return r.time_ms;
        }
        let key = (device.to_string(), r.seq.boot);
        if from_log {
            return self
                .boot_origins
                .get(&key)
                .map_or(r.time_ms, |o| o.saturating_add(r.time_ms));
        }
        self.boot_origins
            .insert(key, queued_ms.saturating_sub(r.time_ms));
        queued_ms
    }

    fn send_row(&mut self, s: &mut Session, row: &Row) -> Result<(), String> {
        s.last_sent = row.id;
        let historical = row.queued_ms < s.started_ms;
        match self.config.format.clone() {
            Format::Json { prefix } => {
                let (topic, body) = match &row.item {
                    Item::Reading { device, json } => {
                        // Connected, said on its status topic before its
                        // first reading of this run and its first after
                        // its link was lost (a consumer that keys on the
                        // status showed it lost for good).
                        if self.said_connected.insert(device.clone(), true) != Some(true) {
                            s.publish(
                                format!("{prefix}/{device}/status"),
                                serde_json::json!({"connected": true})
                                    .to_string()
                                    .into_bytes(),
                                None,
                            )?;
                        }
                        (format!("{prefix}/{device}/reading"), json.clone())
                    }
                    Item::Alarm {
                        device,
                        text,
                        time_ms,
                    } => (
                        format!("{prefix}/{device}/alarm"),
                        serde_json::json!({"time_ms": time_ms, "alarm": text}).to_string(),
                    ),
                    Item::DeviceLost { device } => {
                        // Said once: the session buffers one at each
                        // failed try to reach the device again.
                        if self.said_connected.insert(device.clone(), false) == Some(false) {
                            self.ack(row.id);
                            return Ok(());
                        }
                        (
                            format!("{prefix}/{device}/status"),
                            serde_json::json!({"connected": false}).to_string(),
                        )
                    }
                };
                s.publish(topic, body.into_bytes(), Some(row.id))
            }
            Format::Sparkplug { group, edge_node } => {
                let device = match &row.item {
                    Item::Reading { device, .. }
                    | Item::Alarm { device, .. }
                    | Item::DeviceLost { device } => device.clone(),
                };
                if let Item::DeviceLost { .. } = row.item {
                    self.lost.insert(device.clone());
                    if !s.born.remove(&device) {
                        // Nothing to declare dead in this session (done
                        // with it, deleted with the next batch).
                        self.ack(row.id);
                        return Ok(());
                    }
                    let seq = s.next_seq();
                    let p = sparkplug::device_death(seq, now_ms());
                    return s.publish(
                        sparkplug::topic(&group, "DDEATH", &edge_node, Some(&device)),
                        p.to_bytes(),
                        Some(row.id),
                    );
                }
                if matches!(row.item, Item::Reading { .. }) {
                    self.lost.remove(&device);
                }
                if !s.born.contains(&device) {
                    self.device_birth(s, &group, &edge_node, &device)?;
                }
                let seq = s.next_seq();
                let payload = match &row.item {
                    // A reading read back from the device's log (a gap, a
                    // catch-up after a restart) is historical too: it went
                    // out as current data, and SCADA took 30-minute-old
                    // moisture for the present (found by review).
                    Item::Reading { json, .. } => match buffered_parts(json) {
                        Ok((r, basis, from_log)) => sparkplug::device_data(
                            &r,
                            basis.as_deref(),
                            self.metric_time(&device, &r, row.queued_ms, from_log),
                            historical || from_log,
                            seq,
                            now_ms(),
                        ),
                        Err(e) => {
                            // A row this version cannot read: dropped rather
                            // than block the buffer, counted and said.
                            let why = format!(
                                "dropped buffered reading {} of {device}, unreadable: {e}",
                                row.id
                            );
                            self.stat(|s| {
                                s.dropped += 1;
                                s.last_error = Some(why);
                            });
                            self.ack(row.id);
                            return Ok(());
                        }
                    },
                    Item::Alarm { text, time_ms, .. } => {
                        sparkplug::alarm_data(text, *time_ms, historical, seq, now_ms())
                    }
                    Item::DeviceLost { .. } => unreachable!("handled above"),
                };
                s.publish(
                    sparkplug::topic(&group, "DDATA", &edge_node, Some(&device)),
                    payload.to_bytes(),
                    Some(row.id),
                )
            }
        }
    }

    /// A clean stop: NDEATH (Sparkplug), then DISCONNECT, waiting briefly.
    fn goodbye(&mut self, s: &mut Session, conn: &Events, bd_seq: u64) {
        if let Format::Sparkplug { group, edge_node } = &self.config.format {
            let p = sparkplug::node_death(bd_seq, now_ms());
            let _ = s.publish(
                sparkplug::topic(group, "NDEATH", edge_node, None),
                p.to_bytes(),
                None,
            );
        }
        let deadline = Instant::now() + Duration::from_secs(2);
        // Let the acknowledgements of what is in flight arrive first.
        while Instant::now() < deadline && (!s.in_flight.is_empty() || !s.awaiting_pkid.is_empty())
        {
            match conn.recv_timeout(Duration::from_millis(50)) {
                Ok(Ok(Event::Outgoing(Outgoing::Publish(pkid)))) => {
                    if let Some(row) = s.awaiting_pkid.pop_front() {
                        s.in_flight.insert(pkid, row);
                    }
                }
                Ok(Ok(Event::Incoming(Incoming::PubAck(ack)))) => {
                    if let Some(Some(id)) = s.in_flight.remove(&ack.pkid) {
                        self.ack(id);
                    }
                }
                Ok(Ok(_)) | Err(RecvTimeoutError::Timeout) => {}
                Ok(Err(_)) | Err(RecvTimeoutError::Disconnected) => return,
            }
        }
        let _ = s.client.disconnect();
        let deadline = Instant::now() + Duration::from_millis(500);
        while Instant::now() < deadline {
            match conn.recv_timeout(Duration::from_millis(50)) {
                Ok(Ok(Event::Outgoing(Outgoing::Disconnect)))
                | Ok(Err(_))
                | Err(RecvTimeoutError::Disconnected) => return,
                _ => {}
            }
        }
    }
}

/// The client's event loop on a thread of its own, its events through a
/// channel the session waits on with a timeout. (The client's own
/// `recv_timeout` drops the event loop's future when the time is up, and
/// with it a connection half made (DNS, TCP, TLS, CONNECT and CONNACK all
/// happen within one poll) or a packet half written to a full socket: a
/// broker that took over 100 ms to accept, over TLS across a plant's wide
/// area network or behind a slow authentication, was never reached; found
/// by review.) The thread ends with the connection's first error, or at
/// the first event after the session has let go of the events (a
/// keep-alive ping at the latest: the event loop keeps a sender of its
/// own, so dropping the client does not end it).
struct Events {
    rx: std::sync::mpsc::Receiver<Result<Event, rumqttc::ConnectionError>>,
}

impl Events {
    fn start(mut conn: rumqttc::Connection) -> Self {
        // Unbounded: a full channel would stop the event loop while the
        // session waits for room in the client's queue, which only the
        // event loop makes (a burst of Rebirths locked both up).
        let (tx, rx) = std::sync::mpsc::channel();
        let _ = std::thread::Builder::new()
            .name("mqtt-events".into())
            .spawn(move || {
                while let Ok(event) = conn.recv() {
                    let end = event.is_err();
                    if tx.send(event).is_err() || end {
                        break;
                    }
                }
            });
        Self { rx }
    }

    fn recv_timeout(
        &self,
        timeout: Duration,
    ) -> Result<Result<Event, rumqttc::ConnectionError>, RecvTimeoutError> {
        self.rx.recv_timeout(timeout)
    }
}

struct Session {
    client: Client,
    seq: u8,
    born: BTreeSet<String>,
    /// Publishes handed to the client whose packet id is not known yet, in order.
    awaiting_pkid: VecDeque<Option<i64>>,
    /// Packet id -> buffer row (None for births and deaths).
    in_flight: HashMap<u16, Option<i64>>,
    last_sent: i64,
    started_ms: u64,
}

impl Session {
    fn next_seq(&mut self) -> u8 {
        self.seq = self.seq.wrapping_add(1);
        self.seq
    }

    fn publish(&mut self, topic: String, payload: Vec<u8>, row: Option<i64>) -> Result<(), String> {
        self.client
            .publish(topic, QoS::AtLeastOnce, false, payload)
            .map_err(|e| format!("publish: {e}"))?;
        self.awaiting_pkid.push_back(row);
        Ok(())
    }
}

/// The topic filter of the devices' density commands in `format`:
/// `spBv1.0/{group}/DCMD/{node}/+`, or `{prefix}/+/density`.
pub fn density_filter(format: &Format) -> String {
    match format {
        Format::Sparkplug { group, edge_node } => {
            sparkplug::topic(group, "DCMD", edge_node, Some("+"))
        }
        Format::Json { prefix } => format!("{prefix}/+/density"),
    }
}

/// The device (serial) a density command on `topic` is for, if the topic
/// is one of [`density_filter`]'s.
pub fn density_device(format: &Format, topic: &str) -> Option<String> {
    let filter = density_filter(format);
    let (head, tail) = filter.split_once('+')?;
    topic
        .strip_prefix(head)?
        .strip_suffix(tail)
        .filter(|d| !d.is_empty() && !d.contains('/'))
        .map(str::to_string)
}

/// Where the buffer file of a gateway's publisher lives beside its store.
pub fn outbox_path_beside(store: &Path) -> PathBuf {
    let mut name = store
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| "fringe".into());
    name.push_str(".mqtt-outbox");
    store.with_file_name(name)
}

/// A reading as the MQTT buffer keeps it (and as the plain JSON topic
/// carries it): the reading's own JSON, except that every float is an
/// `Option` (a value that is not a number, such as the permittivity of an
/// uncalibrated device or the temperature of a failed sensor, is `null`
/// and reads back as NaN). `serde_json` writes NaN as `null`, which an
/// `f32` field cannot read back: the reading's own `Deserialize` refused
/// such rows, and the publisher dropped them.
#[derive(serde::Serialize, serde::Deserialize)]
struct BufferedReading {
    seq: fringe_protocol::Seq,
    time_ms: u64,
    channels: [BufferedChannel; fringe_protocol::N_FREQ],
    temperature_c: Option<f32>,
    moisture_pct: Option<f32>,
    uncertainty_pct: Option<f32>,
    flags: fringe_protocol::Flags,
    cell_cal: fringe_protocol::CalId,
    product_cal: fringe_protocol::CalId,
    /// The basis of the moisture (null when not known; absent in rows
    /// buffered before it was added).
    #[serde(default)]
    moisture_basis: Option<String>,
    /// Read back from the device's log (a gap or a catch-up), not streamed
    /// as it was taken: published as historical. Absent when false.
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    from_log: bool,
}

#[derive(serde::Serialize, serde::Deserialize)]
struct BufferedChannel {
    g_s: Option<f32>,
    b_s: Option<f32>,
    eps_re: Option<f32>,
    eps_im: Option<f32>,
}

fn finite(x: f32) -> Option<f32> {
    x.is_finite().then_some(x)
}

/// The buffer's text of `r` ([`BufferedReading`]), its moisture on `basis`.
pub fn reading_body(r: &Reading, basis: Option<&str>) -> String {
    reading_body_of(r, basis, false)
}

/// [`reading_body`] of a reading streamed (`from_log` false) or read back
/// from the device's log (true: `"from_log": true` in the text).
pub fn reading_body_of(r: &Reading, basis: Option<&str>, from_log: bool) -> String {
    let ch = |c: &fringe_protocol::ChannelValue| BufferedChannel {
        g_s: finite(c.g_s),
        b_s: finite(c.b_s),
        eps_re: finite(c.eps_re),
        eps_im: finite(c.eps_im),
    };
    let b = BufferedReading {
        seq: r.seq,
        time_ms: r.time_ms,
        channels: [ch(&r.channels[0]), ch(&r.channels[1])],
        temperature_c: finite(r.temperature_c),
        moisture_pct: r.moisture_pct.and_then(finite),
        uncertainty_pct: finite(r.uncertainty_pct),
        flags: r.flags,
        cell_cal: r.cell_cal,
        product_cal: r.product_cal,
        moisture_basis: basis.map(str::to_string),
        from_log,
    };
    serde_json::to_string(&b).unwrap_or_default()
}

/// The reading of a buffer text written by [`reading_body`] (or by an
/// earlier version, which wrote the reading's own JSON).
///
/// # Errors
/// Text that is not such a reading.
pub fn reading_from_body(text: &str) -> Result<Reading, serde_json::Error> {
    buffered_from_body(text).map(|(r, _)| r)
}

/// [`reading_from_body`] with the basis of its moisture, if the row has it.
///
/// # Errors
/// Text that is not such a reading.
pub fn buffered_from_body(text: &str) -> Result<(Reading, Option<String>), serde_json::Error> {
    buffered_parts(text).map(|(r, basis, _)| (r, basis))
}

/// [`buffered_from_body`] and whether the reading was read back from the
/// device's log.
///
/// # Errors
/// Text that is not such a reading.
pub fn buffered_parts(text: &str) -> Result<(Reading, Option<String>, bool), serde_json::Error> {
    let b: BufferedReading = serde_json::from_str(text)?;
    let nan = |x: Option<f32>| x.unwrap_or(f32::NAN);
    let ch = |c: &BufferedChannel| fringe_protocol::ChannelValue {
        g_s: nan(c.g_s),
        b_s: nan(c.b_s),
        eps_re: nan(c.eps_re),
        eps_im: nan(c.eps_im),
    };
    Ok((
        Reading {
            seq: b.seq,
            time_ms: b.time_ms,
            channels: [ch(&b.channels[0]), ch(&b.channels[1])],
            temperature_c: nan(b.temperature_c),
            moisture_pct: b.moisture_pct,
            uncertainty_pct: nan(b.uncertainty_pct),
            flags: b.flags,
            cell_cal: b.cell_cal,
            product_cal: b.product_cal,
        },
        b.moisture_basis,
        b.from_log,
    ))
}

#[cfg(test)]
mod body_tests {
    use super::*;
    use fringe_protocol::{CalId, ChannelValue, Flags, Seq};

    /// A session's bdSeq follows this run's last one, also where the file
    /// could not take that one (it still holds the one before): taken
    /// from the file, the number was used twice in a row. An earlier
    /// run's number is followed on; 255 is followed by 0 (Sparkplug B
    /// 3.0: bdSeq 0-255, one more each connection, from memory).
    #[test]
    fn the_bd_seq_follows_the_last_one_used_not_the_last_one_kept() {
        assert_eq!(bd_seq_after(Some(6), Some(5)), 7);
        assert_eq!(bd_seq_after(Some(6), None), 7);
        assert_eq!(bd_seq_after(None, Some(5)), 6);
        assert_eq!(bd_seq_after(None, None), 0);
        assert_eq!(bd_seq_after(Some(255), Some(254)), 0);
    }

    #[test]
    fn density_commands_are_told_apart_by_their_topic() {
        let sp = Format::Sparkplug {
            group: "plant-a".into(),
            edge_node: "gw-1".into(),
        };
        let js = Format::Json {
            prefix: "fringe".into(),
        };
        assert_eq!(density_filter(&sp), "spBv1.0/plant-a/DCMD/gw-1/+");
        assert_eq!(density_filter(&js), "fringe/+/density");
        let dev = |f: &Format, t: &str| density_device(f, t);
        assert_eq!(
            dev(&sp, "spBv1.0/plant-a/DCMD/gw-1/HGM-1").as_deref(),
            Some("HGM-1")
        );
        assert_eq!(dev(&js, "fringe/HGM-1/density").as_deref(), Some("HGM-1"));
        for t in [
            "spBv1.0/plant-a/NCMD/gw-1",
            "spBv1.0/plant-a/DCMD/gw-2/HGM-1",
            "spBv1.0/plant-a/DCMD/gw-1/",
            "spBv1.0/plant-a/DCMD/gw-1/a/b",
        ] {
            assert_eq!(dev(&sp, t), None, "{t}");
        }
        for t in [
            "fringe/HGM-1/reading",
            "fringe//density",
            "other/HGM-1/density",
        ] {
            assert_eq!(dev(&js, t), None, "{t}");
        }
    }

    /// Regression: a reading with a float that is not a number (an
    /// uncalibrated device's permittivity, a failed temperature sensor's
    /// temperature) was buffered as JSON with `null` there, could not be
    /// read back, and was dropped instead of published (found by the
    /// gateway's MQTT test with uncalibrated simulated devices).
    #[test]
    fn a_reading_with_nan_values_survives_the_buffer() {
        let r = Reading {
            seq: Seq {
                boot: 3,
                counter: 77,
            },
            time_ms: 1_796_000_000_123,
            channels: [
                ChannelValue {
                    g_s: 1.5e-6,
                    b_s: 2.5e-4,
                    eps_re: f32::NAN,
                    eps_im: f32::NAN,
                },
                ChannelValue {
                    g_s: f32::NAN,
                    b_s: 3.25e-4,
                    eps_re: 6.5,
                    eps_im: 0.8125,
                },
            ],
            temperature_c: f32::NAN,
            moisture_pct: None,
            uncertainty_pct: f32::NAN,
            flags: Flags::NOT_CALIBRATED | Flags::TEMP_SENSOR_FAULT,
            cell_cal: CalId::NONE,
            product_cal: CalId([1, 2, 3, 4]),
        };
        // The reading's own JSON does not come back (the defect).
        let own = serde_json::to_string(&r).unwrap();
        assert!(serde_json::from_str::<Reading>(&own).is_err());
        let back = reading_from_body(&reading_body(&r, None)).expect("read back");
        // Same bits where a value exists, NaN where none does.
        assert_eq!(format!("{back:?}"), format!("{r:?}"));
        // The basis of its moisture comes back with it, and a row without
        // one (buffered before it was added) has none.
        let (_, basis) = buffered_from_body(&reading_body(&r, Some("dry"))).expect("read back");
        assert_eq!(basis.as_deref(), Some("dry"));
        assert_eq!(buffered_from_body(&reading_body(&r, None)).unwrap().1, None);
        // And a reading with every value, as earlier versions buffered it,
        // still reads (rows left in a buffer by an older gateway).
        let full = Reading {
            temperature_c: 21.5,
            uncertainty_pct: 0.25,
            moisture_pct: Some(14.25),
            channels: [ChannelValue {
                g_s: 1.25e-6,
                ..r.channels[1]
            }; 2],
            ..r
        };
        let old = serde_json::to_string(&full).unwrap();
        assert_eq!(buffered_from_body(&old).unwrap(), (full, None));
    }
}

#[cfg(test)]
mod group_tests {
    use super::*;
    use fringe_protocol::Seq;

    /// Readings handed in by many device sessions at once are written in
    /// shared transactions: every reading whose hand-in returned Ok is in
    /// the buffer once, each session's in its order, and every one whose
    /// transaction failed (a row the file refuses fails its whole
    /// transaction) returned that error and is not in the buffer.
    #[test]
    fn readings_handed_in_at_once_are_buffered_exactly_when_said_so() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("outbox.db");
        let config = MqttConfig {
            host: "127.0.0.1".into(),
            // Nothing listens: everything stays buffered.
            port: 1,
            client_id: "fringe-test".into(),
            credentials: None,
            tls_ca_pem: None,
            format: Format::Json {
                prefix: "fringe".into(),
            },
            keep_alive: Duration::from_secs(5),
            density: None,
        };
        let p = Publisher::start(config, &path, Vec::new()).unwrap();
        // The file refuses the readings of one device, as a full disk
        // would refuse a transaction.
        rusqlite::Connection::open(&path)
            .unwrap()
            .execute_batch(
                "CREATE TRIGGER refuse BEFORE INSERT ON outbox WHEN NEW.device = 'REFUSED' \
                 BEGIN SELECT RAISE(ABORT, 'refused for the test'); END;",
            )
            .unwrap();
        let threads = 16u32;
        let each = 300u32;
        let said: Vec<Vec<(u32, bool)>> = std::thread::scope(|sc| {
            let handles: Vec<_> = (0..threads)
                .map(|t| {
                    let p = &p;
                    sc.spawn(move || {
                        (1..=each)
                            .map(|n| {
                                let device = if n % 97 == t {
                                    "REFUSED".to_string()
                                } else {
                                    format!("D{t}")
                                };
                                let r = Reading {
                                    seq: Seq {
                                        boot: t,
                                        counter: n,
                                    },
                                    ..Reading::default()
                                };
                                let res = p.reading(&device, &r, None);
                                if let Err(e) = &res {
                                    assert!(e.to_string().contains("refused for the test"), "{e}");
                                }
                                (n, res.is_ok())
                            })
                            .collect()
                    })
                })
                .collect();
            handles.into_iter().map(|h| h.join().unwrap()).collect()
        });
        p.stop();
        let rows = Outbox::open(&path).unwrap().next(0, 1_000_000).unwrap();
        let mut failed = 0;
        for (t, said) in said.iter().enumerate() {
            let kept: Vec<u32> = rows
                .iter()
                .filter(|r| matches!(&r.item, Item::Reading { device, .. } if *device == format!("D{t}")))
                .map(|r| match &r.item {
                    Item::Reading { json, .. } => reading_from_body(json).unwrap().seq.counter,
                    _ => unreachable!(),
                })
                .collect();
            let ok: Vec<u32> = said.iter().filter(|(_, ok)| *ok).map(|(n, _)| *n).collect();
            assert_eq!(kept, ok, "session {t}");
            failed += said.iter().filter(|(_, ok)| !ok).count();
        }
        // Some transactions failed, and with them readings of other
        // devices (shared transactions), not only the refused ones.
        let refused = (0..threads)
            .map(|t| (1..=each).filter(|n| n % 97 == t).count())
            .sum::<usize>();
        assert!(failed >= refused, "{failed} failed, {refused} refused");
        println!("{failed} readings failed with the {refused} refused");
        assert_eq!(rows.len(), (threads * each) as usize - failed);
    }
}
