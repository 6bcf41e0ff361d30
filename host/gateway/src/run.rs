//! The gateway: a line session per device of a site, all into one store,
//! feeding the live table that the Modbus TCP server, the MQTT publisher
//! and the live page serve.
//!
//! Each device runs on its own thread (a port that vanishes makes only its
//! own session wait and reconnect) with a [`SharedStore`] handle, so the
//! sessions of all devices write through one store, one transaction per
//! batch. Each session has what `fringe monitor` has (`fringe_line`):
//! gapless streaming with gap backfill, catch-up from the device log at
//! the start and after each reconnect, batching (so a kill loses at most
//! the batch in hand, which the next start reads back from the device
//! log), the device clock checked and set with the device key, and the
//! live drift check of `fringe drift` (`fringe_quality::watch`) with its
//! alarms on the live page and MQTT.
//!
//! When several gateways write one store (PostgreSQL), each device is run
//! under a lease ([`crate::lease`]): taken after the device answers and
//! before anything of it is written, renewed by one keeper thread while
//! the session runs, released on a clean stop. A device another live
//! gateway holds is reported ([`DeviceState::LeasedElsewhere`]) and tried
//! again when that lease would run out. After a store failure (the server
//! restarted) the store is reopened ([`RecordLog::reopen`]) before the
//! device is tried again; the new session reads back from the device log
//! what the failed batch and the outage left out.
//!
//! Setting the stop flag commits every session's batch and ends the run
//! ([`Gateway::wait`]). Nothing here prints: what happens is told to a
//! callback ([`Notice`]) and the state of each device is read with
//! [`Gateway::status`].

use std::collections::BTreeMap;
use std::net::SocketAddr;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use fringe_line::{ClockCheck, Ctx, LineError, Note, Session, SessionOptions, Summary};
use fringe_link::{Link, LinkOptions, Opener};
use fringe_protocol::auth::Key;
use fringe_protocol::{CalId, Flags};
use fringe_quality::limits::LimitBasis;
use fringe_quality::watch::DriftWatch;
use fringe_store::{RecordLog, RecordStore};

use crate::density::DensityInbox;
use crate::lease::{LeaseRefused, Leases};
use crate::live::{AlarmNote, LiveTable};
use crate::modbus::{DensityWrites, ModbusServer};
use crate::mqtt::Publisher;
use crate::shared::SharedStore;
use crate::site::{DeviceSpec, Site};
use crate::web::WebServer;

/// Wait before a device whose session failed is tried again.
pub const RETRY_AFTER: Duration = Duration::from_secs(5);

/// Wait before a density is sent again after a try (the link failed, or
/// the device's readings show it has lost the density).
pub const DENSITY_RETRY: Duration = Duration::from_secs(5);

/// What a worker knows of the moisture basis of its device's product
/// calibrations: a reading's moisture is on the basis of the calibration
/// whose content id it carries.
#[derive(Debug, Default)]
struct Bases {
    /// Known: from the device's active calibration, or the store's
    /// calibration records.
    known: BTreeMap<CalId, LimitBasis>,
    /// Neither the store nor the device said (alarm limits are checked as
    /// written for its readings; said once). Asked again in the next
    /// session.
    unknown: std::collections::BTreeSet<CalId>,
    /// Not in the store: the device is asked after a poll, from when, and
    /// the tries that failed so far.
    ask: Option<(CalId, Instant, u32)>,
}

/// Tries of the device for a calibration's basis before its readings are
/// checked as written (each [`RETRY_AFTER`] after the one before).
const BASIS_TRIES: u32 = 3;

/// The basis of a reading's calibration, as far as it is known.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum BasisOf {
    /// Known.
    Known(LimitBasis),
    /// Being asked of the device: the reading is not checked against the
    /// moisture band (its alarms stay as they were).
    Asking,
    /// Not known (no calibration, or neither the store nor the device
    /// said): checked as written.
    Unknown,
}

/// A device's density feed during one session.
struct Feeder {
    inbox: Arc<DensityInbox>,
    hold: Duration,
    key: Key,
    /// The order last dealt with (acknowledged or given up), by its number.
    sent: u64,
    /// The order the device acknowledged last.
    acked: Option<u64>,
    /// The last failed try that is worth another: (order, when).
    failed: Option<(u64, Instant)>,
    /// The last send (or try) again of an order the device had lost.
    resent: Option<Instant>,
    /// The last reading received before the device acknowledged the last
    /// send (before it, at a try): only a later one shows a loss.
    latest_at_send: Option<fringe_protocol::Seq>,
    /// The boot and counter of the last density sent.
    counter: Option<(u32, u32)>,
}

/// Whether the reading `seq` was taken after the reading `at` (another
/// boot counts as after: a reboot loses a density).
fn taken_after(seq: fringe_protocol::Seq, at: Option<fringe_protocol::Seq>) -> bool {
    at.is_none_or(|at| seq.boot != at.boot || seq.counter > at.counter)
}

/// Whether a density that was not taken may be taken on another try: the
/// link failed, the device was busy or holding writes off, or another
/// sender's density used the counter.
fn worth_retrying(e: &fringe_line::DensityError) -> bool {
    use fringe_link::LinkError;
    use fringe_protocol::{AuthFailure, ErrorCode};
    match e {
        fringe_line::DensityError::NoInput { .. } => false,
        fringe_line::DensityError::Link(l) => {
            l.is_transient()
                || matches!(l, LinkError::Garbled { .. })
                || matches!(l, LinkError::Refused { code, reason, .. }
                    if *code == ErrorCode::Busy.code()
                        || (*code == ErrorCode::AuthFailed.code()
                            && (reason.as_str() == AuthFailure::Replay.reason()
                                || reason.as_str() == AuthFailure::Throttled.reason())))
        }
    }
}

/// One device to run: its place in the site file, how to open its port
/// (again on every retry), and its key.
pub struct DeviceRun {
    /// The device as the site file gives it.
    pub spec: DeviceSpec,
    /// Makes an opener of its port (a serial port, or a simulated device).
    pub open: Box<dyn Fn() -> Box<dyn Opener> + Send + Sync>,
    /// The device key: lets the session set the device clock.
    pub key: Option<Key>,
    /// Link options (answer timeout, handshakes, reconnect backoff).
    pub link: LinkOptions,
    /// Where its bulk densities come from, when its site entry has
    /// `[device.density]` (the hold is the site file's).
    pub density: Option<Arc<DensityInbox>>,
}

impl std::fmt::Debug for DeviceRun {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("DeviceRun")
            .field("spec", &self.spec)
            .field("key", &self.key.map(|_| "<key>"))
            .finish()
    }
}

/// What a device is doing.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum DeviceState {
    /// Opening the port, handshake, catching up from the device log.
    Connecting,
    /// Streaming readings.
    Streaming,
    /// The port vanished or the device went quiet: reopening it.
    Reconnecting,
    /// The session failed (the error says why); tried again after a while.
    Failed,
    /// Another live gateway holds the device's lease: left to it, tried
    /// again when that lease would run out.
    LeasedElsewhere,
    /// Stopped (committed).
    Stopped,
}

/// The state of one device, for status lines.
#[derive(Debug, Clone, serde::Serialize)]
pub struct DeviceStatus {
    /// Modbus unit id.
    pub unit: u8,
    /// The port as the site file gives it.
    pub port: String,
    /// The device's tag in the site file.
    pub tag: String,
    /// Device serial (once it has answered).
    pub serial: Option<String>,
    /// What it is doing.
    pub state: DeviceState,
    /// The latest reading: sequence (`boot:counter`).
    pub seq: Option<String>,
    /// Its moisture, % (none: no valid value).
    pub moisture_pct: Option<f32>,
    /// Its standard uncertainty, %.
    pub uncertainty_pct: Option<f32>,
    /// Its product temperature, C.
    pub temperature_c: Option<f32>,
    /// Its quality flags, by name.
    pub flags: Vec<String>,
    /// The basis of its moisture (`wet`, `dry`; none: not known), that of
    /// the product calibration it was computed with.
    pub moisture_basis: Option<&'static str>,
    /// The alarm limits of the site file its latest reading breaks
    /// (`LOW`, `HIGH`, `UNCERTAIN`), checked on the limits' basis: a
    /// reading on the other one is converted to it.
    pub alarms: Vec<String>,
    /// What the line sessions of this run did (summed over reconnects).
    #[serde(flatten)]
    pub line: Summary,
    /// Drift alarm episodes raised during this run.
    pub drift_alarms: u64,
    /// The plant's bulk density it holds, kg/m3: the last one sent to it
    /// and acknowledged (`[device.density]`), until a reading flags
    /// `density_missing`.
    pub density_kg_m3: Option<f32>,
    /// The last error, in words.
    pub error: Option<String>,
}

/// How weighty a notice is.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Level {
    /// Something that happened (clock set, caught up, reconnected).
    Info,
    /// A drift alarm, or an alarm limit of the site file newly broken.
    Alarm,
    /// A failure (the device is tried again).
    Error,
}

/// Something that happened to one device.
#[derive(Debug, Clone, serde::Serialize)]
pub struct Notice {
    /// Modbus unit id.
    pub unit: u8,
    /// Device serial, once known.
    pub serial: Option<String>,
    /// How weighty.
    pub level: Level,
    /// What happened, in words.
    pub text: String,
}

/// Why the gateway could not start.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum GatewayError {
    /// The Modbus TCP server could not listen.
    #[error("Modbus TCP server on {addr}: {source}")]
    Modbus {
        /// Address.
        addr: SocketAddr,
        /// Why.
        source: std::io::Error,
    },
    /// The live page could not listen.
    #[error("live page on {addr}: {source}")]
    Web {
        /// Address.
        addr: SocketAddr,
        /// Why.
        source: std::io::Error,
    },
    /// A device thread could not start.
    #[error("starting the thread of unit {unit}: {source}")]
    Thread {
        /// Unit.
        unit: u8,
        /// Why.
        source: std::io::Error,
    },
}

/// What a gateway run did.
#[derive(Debug, Clone, serde::Serialize)]
pub struct GatewaySummary {
    /// Readings newly committed to the store, all devices.
    pub committed: u64,
    /// Per device.
    pub devices: Vec<DeviceStatus>,
}

/// A running gateway.
pub struct Gateway {
    status: Arc<Vec<Mutex<DeviceStatus>>>,
    threads: Vec<std::thread::JoinHandle<()>>,
    modbus: Option<ModbusServer>,
    web: Option<WebServer>,
    publisher: Option<Arc<Publisher>>,
    table: Arc<LiveTable>,
    keeper: Option<std::thread::JoinHandle<()>>,
}

/// A lease this gateway holds, as the keeper sees it.
struct Slot {
    unit: u8,
    /// Set by the keeper when a renewal found the lease taken over.
    lost: Mutex<Option<LeaseRefused>>,
    /// Whether the last renewal failed (said once, not at every renewal).
    failing: AtomicBool,
}

type Held = Arc<Mutex<BTreeMap<String, Arc<Slot>>>>;

fn lock<T>(m: &Mutex<T>) -> std::sync::MutexGuard<'_, T> {
    m.lock().unwrap_or_else(|e| e.into_inner())
}

/// The keeper: renews every lease held, every `leases.renew_every()`,
/// until `stop`.
fn keep(
    leases: &dyn Leases,
    held: &Held,
    tell: &(dyn Fn(Notice) + Send + Sync),
    stop: &AtomicBool,
) {
    loop {
        let until = Instant::now() + leases.renew_every();
        while Instant::now() < until {
            if stop.load(Ordering::Relaxed) {
                return;
            }
            std::thread::sleep(Duration::from_millis(50));
        }
        let slots: Vec<(String, Arc<Slot>)> = lock(held)
            .iter()
            .map(|(k, v)| (k.clone(), Arc::clone(v)))
            .collect();
        for (serial, slot) in slots {
            if stop.load(Ordering::Relaxed) {
                return;
            }
            let say = |level, text: String| {
                tell(Notice {
                    unit: slot.unit,
                    serial: Some(serial.clone()),
                    level,
                    text,
                });
            };
            match leases.renew(&serial) {
                Ok(()) => {
                    if slot.failing.swap(false, Ordering::Relaxed) {
                        say(Level::Info, "lease renewed again".into());
                    }
                }
                Err(e @ LeaseRefused::Failed(_)) => {
                    if !slot.failing.swap(true, Ordering::Relaxed) {
                        say(
                            Level::Error,
                            format!(
                                "{e}; renewing again in {:.1} s",
                                leases.renew_every().as_secs_f64()
                            ),
                        );
                    }
                }
                Err(e) => {
                    *lock(&slot.lost) = Some(e);
                    lock(held).remove(&serial);
                }
            }
        }
    }
}

impl std::fmt::Debug for Gateway {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Gateway")
            .field("devices", &self.status.len())
            .finish()
    }
}

fn wall_ms() -> i64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map_or(0, |d| d.as_millis() as i64)
}

fn add(total: &mut Summary, s: Summary) {
    total.streamed += s.streamed;
    total.backfilled += s.backfilled;
    total.stored += s.stored;
    total.duplicates += s.duplicates;
    total.lost += s.lost;
    total.gaps += s.gaps;
    total.reconnects += s.reconnects;
    total.link_errors += s.link_errors;
}

impl Gateway {
    /// Starts the servers the site asks for and one line session per
    /// device, all into `store`; runs until `stop` is set. `publisher`:
    /// the MQTT publisher, if the site has one (the caller starts it).
    ///
    /// # Errors
    /// [`GatewayError`] when a server cannot listen (nothing was written).
    pub fn start<S: RecordStore + Send + 'static>(
        site: &Site,
        store: S,
        devices: Vec<DeviceRun>,
        publisher: Option<Publisher>,
        tell: Arc<dyn Fn(Notice) + Send + Sync>,
        stop: Arc<AtomicBool>,
    ) -> Result<Self, GatewayError> {
        Self::start_leased(site, store, devices, publisher, None, tell, stop)
    }

    /// As [`Gateway::start`], with each device run under a lease of
    /// `leases` when given (several gateways on one store: [`crate::lease`]).
    ///
    /// # Errors
    /// [`GatewayError`] when a server cannot listen (nothing was written).
    pub fn start_leased<S: RecordStore + Send + 'static>(
        site: &Site,
        store: S,
        devices: Vec<DeviceRun>,
        publisher: Option<Publisher>,
        leases: Option<Arc<dyn Leases>>,
        tell: Arc<dyn Fn(Notice) + Send + Sync>,
        stop: Arc<AtomicBool>,
    ) -> Result<Self, GatewayError> {
        let table = Arc::new(LiveTable::new(site.stale_after));
        for d in &devices {
            table.register(d.spec.unit, "");
            table.set_tag(d.spec.unit, &d.spec.tag);
        }
        // The units a PLC feeds their density over Modbus, and their inbox.
        let modbus_fed: Vec<(u8, Arc<DensityInbox>)> = devices
            .iter()
            .filter(|d| {
                d.spec
                    .takes_density_from(crate::site::DensitySource::Modbus)
            })
            .filter_map(|d| Some((d.spec.unit, d.density.clone()?)))
            .collect();
        let density_writes = modbus_fed.first().map(|(_, inbox)| {
            DensityWrites::new(
                Arc::clone(inbox),
                modbus_fed.iter().map(|(u, _)| *u).collect(),
                site.density_writers.clone(),
            )
        });
        // What the Modbus server and the live page say of themselves (a
        // failed accept), as the site's own error.
        let said: Arc<dyn Fn(String) + Send + Sync> = {
            let tell = Arc::clone(&tell);
            Arc::new(move |text: String| {
                tell(Notice {
                    unit: 0,
                    serial: None,
                    level: Level::Error,
                    text,
                })
            })
        };
        let modbus = match site.modbus {
            Some(addr) => Some(
                ModbusServer::start_with(
                    addr,
                    Arc::clone(&table),
                    site.modbus_word_order,
                    density_writes,
                    Some(Arc::clone(&said)),
                )
                .map_err(|source| GatewayError::Modbus { addr, source })?,
            ),
            None => None,
        };
        let web = match site.web {
            Some(addr) => Some(
                WebServer::start_with(
                    addr,
                    &site.name,
                    Arc::clone(&table),
                    Some(Arc::clone(&said)),
                )
                .map_err(|source| GatewayError::Web { addr, source })?,
            ),
            None => None,
        };
        let publisher = publisher.map(Arc::new);
        let status: Arc<Vec<Mutex<DeviceStatus>>> = Arc::new(
            devices
                .iter()
                .map(|d| {
                    Mutex::new(DeviceStatus {
                        unit: d.spec.unit,
                        port: d.spec.port_text.clone(),
                        tag: d.spec.tag.clone(),
                        serial: None,
                        state: DeviceState::Connecting,
                        seq: None,
                        moisture_pct: None,
                        uncertainty_pct: None,
                        temperature_c: None,
                        flags: Vec::new(),
                        moisture_basis: None,
                        alarms: Vec::new(),
                        line: Summary::default(),
                        drift_alarms: 0,
                        density_kg_m3: None,
                        error: None,
                    })
                })
                .collect(),
        );
        let store = SharedStore::new(store);
        let held: Held = Arc::default();
        let mut threads = Vec::new();
        for (i, d) in devices.into_iter().enumerate() {
            let unit = d.spec.unit;
            let worker = Worker {
                index: i,
                run: d,
                store: store.clone(),
                table: Arc::clone(&table),
                publisher: publisher.clone(),
                status: Arc::clone(&status),
                tell: Arc::clone(&tell),
                stop: Arc::clone(&stop),
                drift_every: site.drift_every,
                leases: leases.clone(),
                held: Arc::clone(&held),
                bases: Mutex::default(),
            };
            let t = std::thread::Builder::new()
                .name(format!("unit-{unit}"))
                // A simulated device in process runs its firmware core on
                // the thread that reads its port.
                .stack_size(1 << 20)
                .spawn(move || worker.run())
                .map_err(|source| {
                    // Stop the threads already started.
                    stop.store(true, Ordering::Relaxed);
                    GatewayError::Thread { unit, source }
                })?;
            threads.push(t);
        }
        let keeper = match leases {
            Some(leases) => {
                let (held, tell, stop2) = (held, Arc::clone(&tell), Arc::clone(&stop));
                Some(
                    std::thread::Builder::new()
                        .name("leases".into())
                        .spawn(move || keep(&*leases, &held, &*tell, &stop2))
                        .map_err(|source| {
                            stop.store(true, Ordering::Relaxed);
                            GatewayError::Thread { unit: 0, source }
                        })?,
                )
            }
            None => None,
        };
        Ok(Self {
            status,
            threads,
            modbus,
            web,
            publisher,
            table,
            keeper,
        })
    }

    /// The state of every device, in site-file order.
    pub fn status(&self) -> Vec<DeviceStatus> {
        self.status
            .iter()
            .map(|s| s.lock().unwrap_or_else(|e| e.into_inner()).clone())
            .collect()
    }

    /// Where the Modbus TCP server listens.
    pub fn modbus_addr(&self) -> Option<SocketAddr> {
        self.modbus.as_ref().map(ModbusServer::local_addr)
    }

    /// Where the live page is served.
    pub fn web_addr(&self) -> Option<SocketAddr> {
        self.web.as_ref().map(WebServer::local_addr)
    }

    /// What the MQTT publisher has done (connected, acknowledged, its last
    /// error), if the site has one.
    pub fn mqtt(&self) -> Option<crate::mqtt::MqttStats> {
        self.publisher.as_ref().map(|p| p.stats())
    }

    /// The live table the servers serve.
    pub fn table(&self) -> &Arc<LiveTable> {
        &self.table
    }

    /// Whether every device thread has ended (after the stop flag).
    pub fn finished(&self) -> bool {
        self.threads
            .iter()
            .all(std::thread::JoinHandle::is_finished)
    }

    /// Waits for every device to commit and stop (set the stop flag
    /// first), then stops the servers.
    pub fn wait(mut self) -> GatewaySummary {
        for t in self.threads.drain(..) {
            // A device thread that panicked has committed what it could;
            // its status says what it did.
            let _ = t.join();
        }
        if let Some(k) = self.keeper.take() {
            let _ = k.join();
        }
        if let Some(m) = self.modbus.take() {
            m.stop();
        }
        if let Some(w) = self.web.take() {
            w.stop();
        }
        if let Some(p) = self.publisher.take() {
            if let Ok(p) = Arc::try_unwrap(p) {
                p.stop();
            }
        }
        let devices = self.status();
        GatewaySummary {
            committed: devices.iter().map(|d| d.line.stored).sum(),
            devices,
        }
    }
}

/// One device's thread.
struct Worker<S> {
    index: usize,
    run: DeviceRun,
    store: SharedStore<S>,
    table: Arc<LiveTable>,
    publisher: Option<Arc<Publisher>>,
    status: Arc<Vec<Mutex<DeviceStatus>>>,
    tell: Arc<dyn Fn(Notice) + Send + Sync>,
    stop: Arc<AtomicBool>,
    drift_every: Option<Duration>,
    leases: Option<Arc<dyn Leases>>,
    held: Held,
    bases: Mutex<Bases>,
}

/// Why a device's session ended other than by the stop flag.
enum Ended {
    Line(LineError),
    Lease(LeaseRefused),
}

impl From<LineError> for Ended {
    fn from(e: LineError) -> Self {
        Ended::Line(e)
    }
}

impl<S: RecordStore> Worker<S> {
    fn unit(&self) -> u8 {
        self.run.spec.unit
    }

    fn update(&self, f: impl FnOnce(&mut DeviceStatus)) {
        if let Some(s) = self.status.get(self.index) {
            f(&mut s.lock().unwrap_or_else(|e| e.into_inner()));
        }
    }

    fn say(&self, serial: Option<&str>, level: Level, text: String) {
        (self.tell)(Notice {
            unit: self.unit(),
            serial: serial.map(str::to_string),
            level,
            text,
        });
    }

    fn stopped(&self) -> bool {
        self.stop.load(Ordering::Relaxed)
    }

    fn run(self) {
        let mut total = Summary::default();
        let mut drift = DriftWatch::new(self.drift_every);
        let mut serial: Option<String> = None;
        while !self.stopped() {
            let result = self.session(&mut total, &mut drift, &mut serial);
            self.table.set_connected(self.unit(), false);
            let (wait, store_failed) = match result {
                Ok(()) => break,
                Err(Ended::Lease(LeaseRefused::Held { holder, remaining })) => {
                    // Tried again just after the holder's lease would run
                    // out (or once it releases it, at the latest then).
                    let wait = (remaining + Duration::from_millis(250)).max(Duration::from_secs(1));
                    let text = LeaseRefused::Held { holder, remaining }.to_string();
                    self.update(|s| {
                        s.state = DeviceState::LeasedElsewhere;
                        s.error = Some(text.clone());
                    });
                    self.say(serial.as_deref(), Level::Info, text);
                    (wait, false)
                }
                Err(e) => {
                    let store_failed =
                        matches!(&e, Ended::Line(LineError::Store(_) | LineError::Commit(_)));
                    let text = match e {
                        Ended::Line(e) => e.to_string(),
                        Ended::Lease(e) => e.to_string(),
                    };
                    self.update(|s| {
                        s.state = DeviceState::Failed;
                        s.error = Some(text.clone());
                    });
                    self.say(
                        serial.as_deref(),
                        Level::Error,
                        format!("{text}; trying again in {} s", RETRY_AFTER.as_secs()),
                    );
                    if let (Some(p), Some(s)) = (&self.publisher, serial.as_deref()) {
                        let _ = p.device_lost(s);
                    }
                    (RETRY_AFTER, store_failed)
                }
            };
            let until = Instant::now() + wait;
            while Instant::now() < until && !self.stopped() {
                std::thread::sleep(Duration::from_millis(50));
            }
            if store_failed && !self.stopped() {
                // A server that went away: a new connection (shared by
                // every device; one that answers is kept). If the server
                // is still away, the next session fails the same way.
                let mut store = self.store.clone();
                if let Err(e) = store.reopen() {
                    self.update(|s| s.error = Some(e.to_string()));
                }
            }
        }
        self.update(|s| {
            s.state = DeviceState::Stopped;
            s.line = total;
        });
    }

    /// One session: connect, catch up, stream until stopped. `Ok` when
    /// stopped; an error that a reconnect could not cure otherwise.
    fn session(
        &self,
        total: &mut Summary,
        drift: &mut DriftWatch,
        serial_out: &mut Option<String>,
    ) -> Result<(), Ended> {
        self.update(|s| s.state = DeviceState::Connecting);
        let link = Link::connect((self.run.open)(), self.run.link).map_err(LineError::from)?;
        // The lease is keyed by the serial the device answered with, and
        // taken before the session writes anything of the device.
        let slot = match &self.leases {
            Some(leases) => {
                let serial = link.serial_number().to_string();
                *serial_out = Some(serial.clone());
                leases.acquire(&serial).map_err(Ended::Lease)?;
                let slot = Arc::new(Slot {
                    unit: self.unit(),
                    lost: Mutex::new(None),
                    failing: AtomicBool::new(false),
                });
                lock(&self.held).insert(serial.clone(), Arc::clone(&slot));
                Some((serial, slot))
            }
            None => None,
        };
        let result =
            self.leased_session(link, total, drift, serial_out, slot.as_ref().map(|s| &*s.1));
        if let (Some(leases), Some((serial, _))) = (&self.leases, &slot) {
            lock(&self.held).remove(serial);
            // Released on a clean stop only: after a failure the device is
            // tried again soon under the same lease (renewed then), and a
            // lost lease is another gateway's now.
            if result.is_ok() {
                if let Err(e) = leases.release(serial) {
                    self.say(
                        Some(serial),
                        Level::Error,
                        format!("{e}; it runs out on its own"),
                    );
                }
            }
        }
        result
    }

    /// The session of a device whose lease (if any) is held.
    fn leased_session(
        &self,
        link: Link,
        total: &mut Summary,
        drift: &mut DriftWatch,
        serial_out: &mut Option<String>,
        slot: Option<&Slot>,
    ) -> Result<(), Ended> {
        let lost = || slot.and_then(|s| lock(&s.lost).take());
        let mut store = self.store.clone();
        let unit = self.unit();
        let now = Instant::now;
        let wall = wall_ms;
        let serial_cell: Mutex<Option<String>> = Mutex::new(None);
        let mut tell = |n: Note<'_>| self.on_note(unit, &serial_cell, n);
        let mut ctx = Ctx {
            stop: &self.stop,
            wall_ms: &wall,
            now: &now,
            tell: &mut tell,
        };
        let mut session = Session::open(
            link,
            &mut store,
            SessionOptions {
                key: self.run.key,
                period_ms: None,
            },
            &mut ctx,
        )?;
        let serial = session.serial().to_string();
        *serial_cell.lock().unwrap_or_else(|e| e.into_inner()) = Some(serial.clone());
        *serial_out = Some(serial.clone());
        self.table.register(unit, &serial);
        let mut interval = Duration::from_millis(u64::from(session.period_ms()));
        let limit = self.table.set_interval(unit, interval);
        if limit > self.table.stale_after() {
            self.say(
                Some(&serial),
                Level::Info,
                format!(
                    "measures every {} s: its readings are served stale after {} s (twice its interval), not the site's stale_after_s {}",
                    interval.as_secs_f64(),
                    limit.as_secs_f64(),
                    self.table.stale_after().as_secs_f64()
                ),
            );
        }
        self.update(|s| s.serial = Some(serial.clone()));
        let mut feeder = match (&self.run.density, self.run.spec.density, self.run.key) {
            (Some(inbox), Some(feed), Some(key)) => {
                inbox.feed(&serial, unit, feed.from);
                Some(Feeder {
                    inbox: Arc::clone(inbox),
                    hold: feed.hold,
                    key,
                    sent: 0,
                    acked: None,
                    failed: None,
                    resent: None,
                    latest_at_send: None,
                    counter: None,
                })
            }
            _ => None,
        };
        self.learn_bases(&mut session, &serial);
        let result = (|| -> Result<(), Ended> {
            session.catch_up(&mut store, &mut ctx)?;
            self.drift(drift, &serial, true);
            session.subscribe(&mut ctx)?;
            self.table.set_connected(unit, true);
            self.update(|s| {
                s.state = DeviceState::Streaming;
                s.error = None;
            });
            while !self.stopped() {
                if let Some(e) = lost() {
                    return Err(Ended::Lease(e));
                }
                let polled = session.poll(&mut store, &mut ctx)?;
                if polled.stopped {
                    break;
                }
                // An interval changed while the link was away (read again
                // at a reconnect): the unit's stale limit follows it.
                let now_interval = Duration::from_millis(u64::from(session.period_ms()));
                if now_interval != interval {
                    interval = now_interval;
                    self.table.set_interval(unit, interval);
                }
                self.ask_basis(&mut session, &serial);
                let sum = session.summary();
                let mut t = *total;
                add(&mut t, sum);
                self.update(|s| s.line = t);
                if polled.committed.is_some() {
                    self.drift(drift, &serial, false);
                }
                if let Some(f) = feeder.as_mut() {
                    self.feed_density(f, &mut session, &serial);
                }
            }
            Ok(())
        })();
        let (sum, flushed) = session.finish(&mut store);
        add(total, sum);
        let t = *total;
        self.update(|s| s.line = t);
        result?;
        Ok(flushed?)
    }

    /// Sends the plant's latest bulk density when a new one has come, or
    /// again when the device's readings show it has lost one it had
    /// acknowledged (a reboot, a reconnect, another product), for what is
    /// left of its hold. Never fatal: a density that cannot be sent is
    /// said; a try that failed for a reason that may pass (the link, a busy
    /// device, writes held off) is made again after [`DENSITY_RETRY`], and
    /// so is a send again of a lost one; a value the device refuses is not.
    fn feed_density(&self, f: &mut Feeder, session: &mut Session, serial: &str) {
        let Some(order) = f.inbox.latest(serial) else {
            return;
        };
        let now = Instant::now();
        let since = |t: Option<Instant>| {
            t.is_none_or(|t| now.saturating_duration_since(t) >= DENSITY_RETRY)
        };
        let fresh = order.seq != f.sent;
        let lost = !fresh
            && f.acked == Some(order.seq)
            && session.latest().is_some_and(|r| {
                r.flags.contains(Flags::DENSITY_MISSING) && taken_after(r.seq, f.latest_at_send)
            });
        // The device holds it (its newest reading does not show a loss): a
        // reading taken before the acknowledgement and received after it,
        // still flagged, cleared the status's value; show it again.
        if !fresh
            && f.acked == Some(order.seq)
            && session
                .latest()
                .is_some_and(|r| !r.flags.contains(Flags::DENSITY_MISSING))
        {
            self.update(|s| {
                if s.density_kg_m3.is_none() {
                    s.density_kg_m3 = Some(order.kg_m3);
                }
            });
        }
        let due = if fresh {
            // A try of this order that failed waits; a new order goes now.
            f.failed
                .is_none_or(|(seq, t)| seq != order.seq || since(Some(t)))
        } else {
            lost && since(f.resent)
        };
        if !due {
            return;
        }
        let left = f
            .hold
            .saturating_sub(now.saturating_duration_since(order.received));
        let hold_ms = u32::try_from(left.as_millis()).unwrap_or(u32::MAX);
        if hold_ms < fringe_protocol::DENSITY_HOLD_MIN_MS {
            if fresh {
                f.sent = order.seq;
                self.say(
                    Some(serial),
                    Level::Error,
                    format!(
                        "density {} kg/m3 from {} not sent: its hold of {:.0} s ran out before the device could take it",
                        order.kg_m3,
                        order.source,
                        f.hold.as_secs_f64()
                    ),
                );
            }
            return;
        }
        if lost {
            f.resent = Some(now);
        }
        f.latest_at_send = session.latest().map(|r| r.seq);
        match session.set_density(&f.key, order.kg_m3, hold_ms, f.counter) {
            Ok(used) => {
                // Readings taken before the device applied the density
                // (flagged missing) may still be handed out after this:
                // only a later one shows it lost.
                f.latest_at_send = session.last_received();
                f.sent = order.seq;
                f.acked = Some(order.seq);
                f.failed = None;
                f.counter = Some(used);
                self.update(|s| s.density_kg_m3 = Some(order.kg_m3));
                self.say(
                    Some(serial),
                    Level::Info,
                    format!(
                        "bulk density {} kg/m3 from {} {}, held {:.0} s",
                        order.kg_m3,
                        order.source,
                        if fresh {
                            "sent"
                        } else {
                            "sent again (the device had lost it)"
                        },
                        f64::from(hold_ms) / 1000.0
                    ),
                );
            }
            Err(e) if worth_retrying(&e) => {
                if fresh {
                    f.failed = Some((order.seq, now));
                }
                self.say(
                    Some(serial),
                    Level::Error,
                    format!(
                        "density {} kg/m3 from {} not sent ({e}); tried again in {} s",
                        order.kg_m3,
                        order.source,
                        DENSITY_RETRY.as_secs()
                    ),
                );
            }
            Err(e) => {
                // The device refused the value (or cannot take one): not
                // sent again, and not sent again when "lost" either.
                f.sent = order.seq;
                f.failed = None;
                self.say(
                    Some(serial),
                    Level::Error,
                    format!(
                        "density {} kg/m3 from {} not taken: {e}",
                        order.kg_m3, order.source
                    ),
                );
            }
        }
    }

    /// The live drift check (never fatal: the readings are stored anyway).
    fn drift(&self, drift: &mut DriftWatch, serial: &str, force: bool) {
        let checked = match drift.check(&self.store, serial, Instant::now(), force) {
            Ok(c) => c,
            Err(e) => {
                self.say(
                    Some(serial),
                    Level::Error,
                    format!("drift check failed ({e}); readings are still being stored"),
                );
                return;
            }
        };
        if let Some(n) = checked.before.filter(|n| *n > 0) {
            self.say(
                Some(serial),
                Level::Info,
                format!("{n} drift alarm(s) already in the record (details: `fringe drift`)"),
            );
        }
        for a in checked.fresh {
            let text = a.message();
            self.table.alarm(
                self.unit(),
                AlarmNote {
                    time_ms: u64::try_from(a.time_ms).unwrap_or(0),
                    text: text.clone(),
                    advice: a.action.advice().to_string(),
                },
            );
            if let Some(p) = &self.publisher {
                if let Err(e) = p.alarm(serial, &text, u64::try_from(a.time_ms).unwrap_or(0)) {
                    self.say(Some(serial), Level::Error, format!("MQTT buffer: {e}"));
                }
            }
            self.update(|s| s.drift_alarms += 1);
            self.say(Some(serial), Level::Alarm, format!("DRIFT ALARM: {text}"));
        }
    }

    /// The bases of the device's product calibrations the store has
    /// records of (`cal push`, `cal select`, `cal adjust` with this store)
    /// into `bases`; never fatal.
    fn bases_from_store(&self, serial: &str) {
        match fringe_quality::analysis::calibration_bases(&self.store, serial) {
            Ok(found) => {
                let mut b = lock(&self.bases);
                for (id, basis) in found {
                    b.known.insert(id, LimitBasis::from(basis));
                }
            }
            Err(e) => self.say(
                Some(serial),
                Level::Error,
                format!("could not read the calibration records ({e}); the basis of a reading is asked of the device"),
            ),
        }
    }

    /// At the start of a session: the bases the store knows and that of
    /// the device's active calibration; says when the site's alarm band is
    /// on the other basis and how it is taken.
    fn learn_bases(&self, session: &mut Session, serial: &str) {
        lock(&self.bases).unknown.clear();
        self.bases_from_store(serial);
        match session.active_product_cal() {
            Ok(Some(c)) => {
                let basis = LimitBasis::from(c.basis);
                lock(&self.bases).known.insert(c.content_id(), basis);
                self.say_band(serial, basis);
            }
            Ok(None) => {}
            // Asked again when a reading needs it.
            Err(e) => self.say(
                Some(serial),
                Level::Error,
                format!("could not read the active product calibration ({e}); asked again when a reading needs it"),
            ),
        }
    }

    /// Says how the site's alarm band is taken for readings on `basis`,
    /// where that is not the band's.
    fn say_band(&self, serial: &str, basis: LimitBasis) {
        if let Some(text) = self.run.spec.alarm.taken_as(basis) {
            self.say(Some(serial), Level::Info, text);
        }
    }

    /// The basis of readings computed with calibration `id`: known, or
    /// looked up in the store, else to be asked of the device after this
    /// poll ([`Worker::ask_basis`]).
    fn basis_of(&self, serial: Option<&str>, id: CalId) -> BasisOf {
        if id == CalId::NONE {
            return BasisOf::Unknown;
        }
        {
            let b = lock(&self.bases);
            if let Some(k) = b.known.get(&id) {
                return BasisOf::Known(*k);
            }
            if b.unknown.contains(&id) {
                return BasisOf::Unknown;
            }
            if b.ask.is_some_and(|(a, ..)| a == id) {
                return BasisOf::Asking;
            }
        }
        if let Some(s) = serial {
            self.bases_from_store(s);
        }
        let mut b = lock(&self.bases);
        if let Some(k) = b.known.get(&id).copied() {
            // Newly learned from the store (a calibration recorded since,
            // one the session found on the device among them): said as
            // when the device is asked.
            drop(b);
            if let Some(s) = serial {
                self.say_band(s, k);
            }
            return BasisOf::Known(k);
        }
        b.ask = Some((id, Instant::now(), 0));
        BasisOf::Asking
    }

    /// Asks the device for its active calibration when a reading's basis
    /// was not known (a calibration selected while the gateway runs, with
    /// no record in this store). A request that fails is made again after
    /// [`RETRY_AFTER`], [`BASIS_TRIES`] times in all; a calibration the
    /// device does not have active, or whose basis it never says, is
    /// checked as written for the rest of the session, said once.
    fn ask_basis(&self, session: &mut Session, serial: &str) {
        let (id, tries) = {
            let mut b = lock(&self.bases);
            match b.ask {
                Some((id, at, tries)) if Instant::now() >= at => {
                    b.ask = None;
                    if b.known.contains_key(&id) {
                        return;
                    }
                    (id, tries)
                }
                _ => return,
            }
        };
        let asked = session.active_product_cal();
        let mut b = lock(&self.bases);
        if let Ok(Some(c)) = &asked {
            let basis = LimitBasis::from(c.basis);
            b.known.insert(c.content_id(), basis);
            if c.content_id() == id {
                drop(b);
                self.say_band(serial, basis);
                return;
            }
        }
        if b.known.contains_key(&id) {
            return;
        }
        if asked.is_err() && tries + 1 < BASIS_TRIES {
            b.ask = Some((id, Instant::now() + RETRY_AFTER, tries + 1));
            return;
        }
        b.unknown.insert(id);
        drop(b);
        let why = match asked {
            Err(e) => format!("the device did not say ({BASIS_TRIES} tries; the last: {e})"),
            Ok(_) => {
                "it is not the device's active calibration and the store has no record of it".into()
            }
        };
        self.say(
            Some(serial),
            Level::Error,
            format!("the moisture basis of product calibration {id} is not known: {why}; its readings are checked against the alarm limits as written"),
        );
    }

    fn on_note(&self, unit: u8, serial: &Mutex<Option<String>>, n: Note<'_>) {
        let serial = serial.lock().unwrap_or_else(|e| e.into_inner()).clone();
        let serial = serial.as_deref();
        match n {
            Note::Reading(r) => {
                let basis = self.basis_of(serial, r.product_cal);
                let known = match basis {
                    BasisOf::Known(b) => Some(b),
                    _ => None,
                };
                // The calibrations the reading was computed with, by their
                // content ids (`fringe cal list` names them).
                let text = if r.product_cal == fringe_protocol::CalId::NONE {
                    None
                } else {
                    Some(format!(
                        "product calibration {}{}, cell calibration {}",
                        r.product_cal,
                        known.map_or(String::new(), |b| format!(" ({} basis)", b.word())),
                        r.cell_cal
                    ))
                };
                // The reading with its calibration and basis in one write:
                // Modbus register 15 never shows a reading with another's
                // basis.
                self.table
                    .update_calibrated(unit, r, Instant::now(), text, known.map(Into::into));
                if let (Some(p), Some(s)) = (&self.publisher, serial) {
                    if let Err(e) = p.reading(s, r, known.map(LimitBasis::word)) {
                        self.say(Some(s), Level::Error, format!("MQTT buffer: {e}"));
                    }
                }
                // The site's alarm limits, on their basis (a reading on
                // the other one converted to it): a limit newly broken is
                // said, shown on the live page and published; one no
                // longer broken is said once. A reading whose basis is
                // being asked leaves the alarms as they were.
                let limits = self.run.spec.alarm;
                let before = self
                    .status
                    .get(self.index)
                    .map(|s| s.lock().unwrap_or_else(|e| e.into_inner()).alarms.clone())
                    .unwrap_or_default();
                let now: Vec<String> = if basis == BasisOf::Asking {
                    before.clone()
                } else {
                    limits
                        .check_reading(r.moisture_pct, r.uncertainty_pct, known)
                        .into_iter()
                        .map(str::to_string)
                        .collect()
                };
                for word in now.iter().filter(|w| !before.contains(w)) {
                    let text = format!(
                        "{word} ALARM: {}",
                        limits.describe_reading(word, r.moisture_pct, r.uncertainty_pct, known)
                    );
                    self.table.alarm(
                        unit,
                        AlarmNote {
                            time_ms: r.time_ms,
                            text: text.clone(),
                            advice: "check the line and the product; the limits are the site file's [alarm]".into(),
                        },
                    );
                    if let (Some(p), Some(s)) = (&self.publisher, serial) {
                        if let Err(e) = p.alarm(s, &text, r.time_ms) {
                            self.say(Some(s), Level::Error, format!("MQTT buffer: {e}"));
                        }
                    }
                    self.say(serial, Level::Alarm, text);
                }
                for word in before.iter().filter(|w| !now.contains(w)) {
                    let m = r
                        .moisture_pct
                        .map_or("--".to_string(), |m| format!("{m:.2}"));
                    self.say(
                        serial,
                        Level::Info,
                        format!(
                            "{word} alarm cleared: moisture {m} %{}",
                            known.map_or(String::new(), |b| format!(" {} basis", b.word()))
                        ),
                    );
                }
                self.update(|s| {
                    s.alarms = now;
                    s.seq = Some(r.seq.to_string());
                    s.moisture_pct = r.moisture_pct;
                    s.moisture_basis = known.map(LimitBasis::word);
                    s.uncertainty_pct = r.moisture_pct.map(|_| r.uncertainty_pct);
                    s.temperature_c = Some(r.temperature_c);
                    s.flags = r.flags.names().map(str::to_string).collect();
                    if r.flags.contains(Flags::DENSITY_MISSING) {
                        s.density_kg_m3 = None;
                    }
                });
            }
            Note::Logged(r) => {
                // Read back from the device log: published (in the log's
                // order, before the stream resumes) so that the plant's
                // MQTT consumers get every reading the store gets; not put
                // on the live table and Modbus, which show the newest.
                // (The basis as far as known now: not asked of the device
                // for a logged reading.)
                let basis = lock(&self.bases)
                    .known
                    .get(&r.product_cal)
                    .map(|b| b.word());
                if let (Some(p), Some(s)) = (&self.publisher, serial) {
                    if let Err(e) = p.logged_reading(s, r, basis) {
                        self.say(Some(s), Level::Error, format!("MQTT buffer: {e}"));
                    }
                }
            }
            Note::Clock(c) => {
                let was = match c.before {
                    ClockCheck::Unset { .. } => "was not set".to_string(),
                    ClockCheck::Set { off_ms, .. } => {
                        format!("was off by {:+.3} s", off_ms as f64 / 1000.0)
                    }
                };
                if c.set_to_ms.is_some() {
                    self.say(serial, Level::Info, format!("device clock {was}; set"));
                } else if c.too_far {
                    self.say(
                        serial,
                        Level::Error,
                        format!(
                            "device clock {was}, more than {} min: not set automatically (the device's clock or this host's is wrong); check both, then set it with `fringe device clock --set`",
                            fringe_line::CLOCK_AUTO_LIMIT_MS / 60_000
                        ),
                    );
                } else if c.needs_key {
                    self.say(
                        serial,
                        Level::Info,
                        format!("device clock {was}; give key_file in the site file to set it"),
                    );
                }
            }
            Note::SequenceBehind(e) => {
                self.say(serial, Level::Error, e.to_string());
            }
            Note::ClockRefused(e) => {
                self.say(
                    serial,
                    Level::Error,
                    format!("the device clock was not set: {e}"),
                );
            }
            Note::CaughtUp { received, lost } if received > 0 || lost > 0 => self.say(
                serial,
                Level::Info,
                format!(
                    "{received} readings from the device log stored{}",
                    if lost > 0 {
                        format!(", {lost} no longer in it (lost)")
                    } else {
                        String::new()
                    }
                ),
            ),
            Note::Lost { count, after } => self.say(
                serial,
                Level::Error,
                format!("{count} readings after {after} were no longer in the device log (lost)"),
            ),
            Note::Reconnecting(why) => {
                self.table.set_connected(unit, false);
                self.update(|s| s.state = DeviceState::Reconnecting);
                if let (Some(p), Some(s)) = (&self.publisher, serial) {
                    let _ = p.device_lost(s);
                }
                self.say(serial, Level::Error, format!("{why}: reconnecting"));
            }
            Note::Reconnected => {
                self.update(|s| s.state = DeviceState::Streaming);
                self.table.set_connected(unit, true);
                self.say(serial, Level::Info, "reconnected".into());
            }
            Note::CalibrationObserved(o) => self.say(serial, Level::Info, o.to_string()),
            Note::CalibrationsNotRead(e) => self.say(
                serial,
                Level::Error,
                format!("the device's calibrations could not be read or recorded ({e}); going on"),
            ),
            _ => {}
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use fringe_protocol::Seq;

    #[test]
    fn only_a_reading_after_the_acknowledgement_shows_a_lost_density() {
        let at = Some(Seq {
            boot: 3,
            counter: 40,
        });
        let seq = |boot, counter| Seq { boot, counter };
        // Taken before the device applied it, handed out after the answer.
        assert!(!taken_after(seq(3, 39), at));
        assert!(!taken_after(seq(3, 40), at));
        assert!(taken_after(seq(3, 41), at));
        // A reboot loses it.
        assert!(taken_after(seq(4, 0), at));
        // Nothing received before the send: any reading counts.
        assert!(taken_after(seq(3, 0), None));
    }
}
