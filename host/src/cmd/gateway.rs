//! `fringe gateway --config SITE.toml`: the site file read and checked,
//! its simulated devices booted, the store opened, then
//! `fringe_gateway::run::Gateway` until Ctrl-C or SIGTERM; this file only
//! draws (one status line per device on a terminal, plain or JSON lines
//! otherwise).

use std::io::Write as _;
use std::path::Path;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use anyhow::Context as _;
use fringe_gateway::density::DensityInbox;
use fringe_gateway::lease::{LeaseRefused, Leases};
use fringe_gateway::mqtt::{Format, MqttConfig, Publisher};
use fringe_gateway::run::{DeviceRun, DeviceState, DeviceStatus, Gateway, Level, Notice};
use fringe_gateway::site::{DensitySource, DevicePort, Site};
use fringe_link::{LinkOptions, Opener, SerialOpener};
use fringe_sim::live::LiveSim;
use fringe_sim::scenario::Scenario;

use crate::cli::gateway::GatewayArgs;
use crate::config::LineConfig;
use crate::exit::UsageError;
use crate::out::{self, Style};
use crate::store::Store;

/// `fringe gateway`.
///
/// # Errors
/// A missing or bad site file (nothing is written then), a scenario or key
/// file that cannot be used, a store that cannot be opened, a server
/// address that cannot be bound.
pub fn gateway(
    args: &GatewayArgs,
    site_path: Option<&Path>,
    stop: Arc<AtomicBool>,
) -> anyhow::Result<()> {
    let site_path = site_path.ok_or_else(|| {
        UsageError("fringe gateway needs the site file: fringe gateway --config SITE.toml".into())
    })?;
    // Everything is read and checked before the store is opened.
    let site = Site::load(site_path)?;
    let link = LinkOptions {
        timeout: Duration::from_millis(args.timeout_ms),
        handshakes: super::HANDSHAKES,
        ..LinkOptions::default()
    };
    let style = Style::detect();
    let view = Arc::new(Mutex::new(View {
        style,
        json: args.json,
        drawn: 0,
        pending: Vec::new(),
    }));
    let v = Arc::clone(&view);
    let tell: Arc<dyn Fn(Notice) + Send + Sync> = Arc::new(move |n: Notice| {
        v.lock().unwrap_or_else(|e| e.into_inner()).notice(n);
    });
    // The plant's densities, from the broker or a PLC to the devices that take them.
    let density = site.devices.iter().any(|d| d.density.is_some()).then(|| {
        let tell = Arc::clone(&tell);
        Arc::new(DensityInbox::new(Arc::new(move |unit, serial, text| {
            tell(Notice {
                unit,
                serial,
                level: Level::Error,
                text,
            });
        })))
    });
    let mut runs = Vec::new();
    let started_ms = crate::store::now_unix_ms().max(0) as u64;
    for d in &site.devices {
        let file_key = match &d.key_file {
            Some(p) => Some(fringe_device::key::load_key(p).with_context(|| {
                format!(
                    "{}:{}: key_file of unit {}",
                    site.path.display(),
                    d.line,
                    d.unit
                )
            })?),
            None => None,
        };
        if let Some(w) = d.key_file.as_deref().and_then(fringe_device::key::exposure) {
            eprintln!("fringe gateway: warning: unit {}: {w}", d.unit);
        }
        let (open, key): (Box<dyn Fn() -> Box<dyn Opener> + Send + Sync>, _) = match &d.port {
            DevicePort::Serial { path, baud } => {
                let o = SerialOpener {
                    path: path.clone(),
                    baud: *baud,
                };
                (
                    Box::new(move || Box::new(o.clone()) as Box<dyn Opener>),
                    file_key,
                )
            }
            DevicePort::Sim { scenario } => {
                let sc = Scenario::load(scenario).with_context(|| {
                    format!(
                        "{}:{}: the scenario of unit {}",
                        site.path.display(),
                        d.line,
                        d.unit
                    )
                })?;
                // Booting writes nothing to disk (the flash is in memory).
                let sim = LiveSim::start(&sc, started_ms)
                    .with_context(|| format!("starting the simulated device of unit {}", d.unit))?;
                let name = d.port_text.clone();
                (
                    Box::new(move || sim.opener(&name)),
                    // The scenario's key is the simulated device's own.
                    file_key.or_else(|| sc.key()),
                )
            }
        };
        if d.density.is_some() && key.is_none() {
            return Err(UsageError(format!(
                "{}:{}: unit {} has [device.density] but no key_file (a density is a signed write)",
                site.path.display(),
                d.line,
                d.unit
            ))
            .into());
        }
        runs.push(DeviceRun {
            spec: d.clone(),
            open,
            key,
            link,
            density: d.density.and(density.clone()),
        });
    }
    let url = site.store_is_url();
    let db = if url {
        site.store.clone()
    } else {
        super::db_path(Some(&site.store), &LineConfig::default())?
    };
    // Never the password: `postgres://USER@HOST:PORT/DATABASE`.
    let label = crate::store::db_label(&db);
    // The MQTT buffer lies beside the store file, or beside the site file
    // when the store is a database server.
    let outbox_beside = if url { &site.path } else { &site.store };
    let modbus_fed: Vec<String> = site
        .devices
        .iter()
        .filter(|d| d.takes_density_from(DensitySource::Modbus))
        .map(|d| d.unit.to_string())
        .collect();
    if !modbus_fed.is_empty() {
        eprintln!(
            "fringe gateway: Modbus TCP takes the bulk density of unit(s) {} from {} only; \
             a density changes the moisture these devices report, and Modbus has no \
             authentication: keep the port inside the control zone (docs/MODBUS.md)",
            modbus_fed.join(", "),
            site.density_writers
                .iter()
                .map(ToString::to_string)
                .collect::<Vec<_>>()
                .join(", ")
        );
    }
    // A server on the loopback address hears no PLC elsewhere.
    if !modbus_fed.is_empty() && site.modbus.is_some_and(|a| a.ip().is_loopback()) {
        for w in site.density_writers.iter().filter(|w| !w.is_loopback()) {
            eprintln!(
                "fringe gateway: warning: no density from {w} can arrive: the Modbus TCP \
                 server listens on {} (set [modbus] listen to an address of the control network)",
                site.modbus.map(|a| a.to_string()).unwrap_or_default()
            );
        }
    }
    // The broker's density commands only where a device takes them from there.
    let mqtt_fed = site
        .devices
        .iter()
        .any(|d| d.takes_density_from(DensitySource::Mqtt));
    let publisher = match &site.mqtt {
        Some(m) => Some(start_mqtt(
            m,
            outbox_beside,
            density.clone().filter(|_| mqtt_fed),
        )?),
        None => None,
    };
    let gw = match db.to_str().filter(|_| url) {
        Some(u) => {
            let owner = site.gateway.clone().unwrap_or_default();
            let mut store = fringe_postgres::Store::connect(u)?;
            // Every write checks that this gateway holds the device's
            // lease: one that stalled past it cannot write behind the new
            // owner's back.
            store.set_fence(Some(&owner));
            let leases = PgLeases {
                store: Mutex::new(fringe_postgres::Store::connect(u)?),
                held: Mutex::new(std::collections::HashMap::new()),
                owner,
                ttl: site.lease,
            };
            Gateway::start_leased(
                &site,
                store,
                runs,
                publisher,
                Some(Arc::new(leases)),
                tell,
                Arc::clone(&stop),
            )?
        }
        None => {
            let store = Store::open(&db)?;
            Gateway::start(&site, store, runs, publisher, tell, Arc::clone(&stop))?
        }
    };
    eprintln!(
        "fringe gateway: {}{} devices into {}{}{}{}",
        if site.name.is_empty() {
            String::new()
        } else {
            format!("{}: ", site.name)
        },
        site.devices.len(),
        label,
        site.gateway
            .as_deref()
            .filter(|_| url)
            .map_or(String::new(), |g| format!(
                " as gateway {g:?} (device leases of {:.0} s)",
                site.lease.as_secs_f64()
            )),
        gw.modbus_addr().map_or(String::new(), |a| format!(
            "; Modbus TCP on {a} (units {})",
            site.devices
                .iter()
                .map(|d| d.unit.to_string())
                .collect::<Vec<_>>()
                .join(", ")
        )),
        gw.web_addr()
            .map_or(String::new(), |a| format!("; live page http://{a}/")),
    );
    if site.mqtt.is_some() {
        eprintln!("fringe gateway: publishing to MQTT (buffered on disk while the broker is away)");
    }
    let deadline = args
        .duration_s
        .map(|s| Instant::now() + Duration::from_secs_f64(s));
    let mut last_status = Instant::now();
    let tick = if style.tty && !args.json {
        Duration::from_millis(500)
    } else {
        Duration::from_millis(100)
    };
    let mut broken = None;
    // The MQTT connection's state as last said (a refused password, an
    // unreachable broker, a bad certificate: said once each time it changes).
    let mut said_mqtt: (bool, Option<String>) = (false, None);
    while !stop.load(Ordering::Relaxed) {
        if deadline.is_some_and(|d| Instant::now() >= d) {
            stop.store(true, Ordering::Relaxed);
            break;
        }
        std::thread::sleep(tick);
        let mut v = view.lock().unwrap_or_else(|e| e.into_inner());
        v.flush_notices();
        if let Some(m) = gw.mqtt() {
            let now = (m.connected, m.last_error.clone());
            if now != said_mqtt {
                v.clear();
                match (&now.1, now.0) {
                    (_, true) if !said_mqtt.0 => {
                        eprintln!("fringe gateway: MQTT: connected to the broker");
                    }
                    (Some(e), false) => eprintln!(
                        "fringe gateway: MQTT: not connected ({e}); readings wait in the buffer, trying again"
                    ),
                    _ => {}
                }
                said_mqtt = now;
            }
        }
        let due = last_status.elapsed() >= site.status_every;
        if v.style.tty && !v.json {
            v.draw(&gw.status());
        } else if due {
            last_status = Instant::now();
            if let Err(e) = v.lines(&gw.status()) {
                broken = Some(e);
                stop.store(true, Ordering::Relaxed);
            }
        }
    }
    eprintln!("fringe gateway: stopping: committing every device's readings");
    let summary = gw.wait();
    let mut v = view.lock().unwrap_or_else(|e| e.into_inner());
    v.flush_notices();
    v.clear();
    if let Some(e) = broken {
        if e.kind() != std::io::ErrorKind::BrokenPipe {
            return Err(e.into());
        }
    }
    if args.json {
        let mut j = serde_json::to_value(&summary)?;
        if let Some(devices) = j.get_mut("devices").and_then(|d| d.as_array_mut()) {
            devices.iter_mut().for_each(split_seq);
        }
        out::json(&out::typed("summary", j))?;
    } else {
        for d in &summary.devices {
            let _ = out::line(&plain(d));
        }
    }
    eprintln!(
        "fringe gateway: stopped; {} readings committed in this run into {label}",
        summary.committed,
    );
    Ok(())
}

/// Device leases in the PostgreSQL store (`fringe_postgres::lease`), on a
/// connection of their own so a renewal never waits behind a batch.
struct PgLeases {
    store: Mutex<fringe_postgres::Store>,
    /// The leases held, by serial (their tokens).
    held: Mutex<std::collections::HashMap<String, fringe_postgres::lease::Lease>>,
    owner: String,
    ttl: Duration,
}

impl PgLeases {
    /// Runs `f` on the lease connection, reopening it first when the
    /// server went away.
    fn with<R>(
        &self,
        f: impl FnOnce(&mut fringe_postgres::Store) -> Result<R, fringe_postgres::lease::LeaseError>,
    ) -> Result<R, LeaseRefused> {
        use fringe_postgres::lease::LeaseError;
        let mut s = self.store.lock().unwrap_or_else(|e| e.into_inner());
        if s.is_closed() {
            s.reconnect()
                .map_err(|e| LeaseRefused::Failed(e.to_string()))?;
        }
        match f(&mut s) {
            Ok(r) => Ok(r),
            Err(LeaseError::Held {
                holder, remaining, ..
            }) => Err(LeaseRefused::Held { holder, remaining }),
            Err(LeaseError::Lost { why, .. }) => Err(LeaseRefused::Lost { why }),
            Err(LeaseError::Store(e)) => {
                if matches!(e, crate::store::StoreError::Unreachable { .. }) {
                    // Tried once more on a new connection next time.
                    let _ = s.reconnect();
                }
                Err(LeaseRefused::Failed(e.to_string()))
            }
            Err(e) => Err(LeaseRefused::Failed(e.to_string())),
        }
    }
}

impl Leases for PgLeases {
    fn owner(&self) -> &str {
        &self.owner
    }

    fn acquire(&self, serial: &str) -> Result<(), LeaseRefused> {
        let lease = self.with(|s| s.acquire(serial, &self.owner, self.ttl))?;
        self.held
            .lock()
            .unwrap_or_else(|e| e.into_inner())
            .insert(serial.to_string(), lease);
        Ok(())
    }

    fn renew(&self, serial: &str) -> Result<(), LeaseRefused> {
        let Some(lease) = self
            .held
            .lock()
            .unwrap_or_else(|e| e.into_inner())
            .get(serial)
            .cloned()
        else {
            return Err(LeaseRefused::Lost {
                why: "not held by this gateway".into(),
            });
        };
        let renewed = self.with(|s| s.renew(&lease))?;
        self.held
            .lock()
            .unwrap_or_else(|e| e.into_inner())
            .insert(serial.to_string(), renewed);
        Ok(())
    }

    fn release(&self, serial: &str) -> Result<(), LeaseRefused> {
        let lease = self
            .held
            .lock()
            .unwrap_or_else(|e| e.into_inner())
            .remove(serial);
        match lease {
            Some(l) => self.with(|s| s.release(&l)).map(|_| ()),
            None => Ok(()),
        }
    }

    fn renew_every(&self) -> Duration {
        self.ttl / 3
    }
}

fn start_mqtt(
    m: &fringe_gateway::site::MqttSite,
    store: &Path,
    density: Option<Arc<DensityInbox>>,
) -> anyhow::Result<Publisher> {
    let tls_ca_pem = match &m.tls_ca {
        Some(p) => Some(
            std::fs::read(p)
                .with_context(|| format!("reading the MQTT CA file {}", p.display()))?,
        ),
        None => None,
    };
    let credentials = match &m.credentials {
        Some((user, file)) => {
            let pw = std::fs::read_to_string(file)
                .with_context(|| format!("reading the MQTT password file {}", file.display()))?;
            Some((user.clone(), pw.trim_end_matches(['\n', '\r']).to_string()))
        }
        None => None,
    };
    let format = match &m.json_prefix {
        Some(prefix) => Format::Json {
            prefix: prefix.clone(),
        },
        None => Format::Sparkplug {
            group: m.group.clone(),
            edge_node: m.node.clone(),
        },
    };
    let config = MqttConfig {
        host: m.host.clone(),
        port: m.port,
        client_id: m.client_id.clone(),
        credentials,
        tls_ca_pem,
        format,
        keep_alive: Duration::from_secs(30),
        density,
    };
    let outbox = m
        .buffer_file
        .clone()
        .unwrap_or_else(|| fringe_gateway::mqtt::outbox_path_beside(store));
    Publisher::start(config, &outbox, Vec::new()).with_context(|| {
        format!(
            "opening the MQTT store-and-forward buffer {} (set [mqtt] buffer_file in the site file to a file in a folder the gateway may write)",
            outbox.display()
        )
    })
}

/// What the person or the script sees.
struct View {
    style: Style,
    json: bool,
    /// Status lines drawn on the terminal last time.
    drawn: usize,
    pending: Vec<Notice>,
}

fn state_word(s: DeviceState) -> &'static str {
    match s {
        DeviceState::Connecting => "connecting",
        DeviceState::Streaming => "streaming",
        DeviceState::Reconnecting => "reconnecting",
        DeviceState::Failed => "failed",
        DeviceState::LeasedElsewhere => "leased_elsewhere",
        DeviceState::Stopped => "stopped",
    }
}

/// One device as a plain line (`key=value`, for logs and grep).
fn plain(d: &DeviceStatus) -> String {
    format!(
        "unit={} serial={} state={} seq={} moisture_pct={} moisture_basis={} uncertainty_pct={} temperature_c={} flags={} alarms={} streamed={} backfilled={} stored={} lost={} reconnects={} drift_alarms={} density_kg_m3={}",
        d.unit,
        d.serial.as_deref().unwrap_or("-"),
        state_word(d.state),
        d.seq.as_deref().unwrap_or("-"),
        d.moisture_pct.map_or("none".into(), |m| format!("{m:.3}")),
        d.moisture_basis.unwrap_or("none"),
        d.uncertainty_pct.map_or("none".into(), |u| format!("{u:.3}")),
        d.temperature_c.map_or("none".into(), |t| format!("{t:.2}")),
        if d.flags.is_empty() { "ok".into() } else { d.flags.join(",") },
        if d.alarms.is_empty() { "none".into() } else { d.alarms.join(",") },
        d.line.streamed,
        d.line.backfilled,
        d.line.stored,
        d.line.lost,
        d.line.reconnects,
        d.drift_alarms,
        d.density_kg_m3.map_or("none".into(), |k| format!("{k}")),
    )
}

impl View {
    fn notice(&mut self, n: Notice) {
        self.pending.push(n);
    }

    /// Says the notices that came in (stderr), above the status block.
    fn flush_notices(&mut self) {
        if self.pending.is_empty() {
            return;
        }
        self.clear();
        for n in self.pending.drain(..) {
            let who = match &n.serial {
                Some(s) => format!("unit {} {s}", n.unit),
                None => format!("unit {}", n.unit),
            };
            let text = match n.level {
                Level::Alarm if self.style.tty => self.style.paint("1;31", &n.text),
                _ => n.text,
            };
            eprintln!("fringe gateway: {who}: {text}");
        }
    }

    /// Removes the status block from the terminal.
    fn clear(&mut self) {
        if self.drawn > 0 {
            let mut o = std::io::stdout().lock();
            let _ = write!(o, "\x1b[{}F\x1b[J", self.drawn).and_then(|()| o.flush());
            self.drawn = 0;
        }
    }

    /// One status line per device on the terminal, redrawn in place.
    fn draw(&mut self, devices: &[DeviceStatus]) {
        self.clear();
        let s = self.style;
        let mut o = std::io::stdout().lock();
        for d in devices {
            let m = d
                .moisture_pct
                .map_or("  --.--".to_string(), |m| format!("{m:7.2}"));
            let u = d
                .uncertainty_pct
                .map_or("--".to_string(), |u| format!("{u:.2}"));
            let t = d
                .temperature_c
                .map_or("  --.-".to_string(), |t| format!("{t:6.1}"));
            let state = match d.state {
                DeviceState::Streaming => s.paint("32", "streaming"),
                DeviceState::Failed => s.paint("1;31", "failed"),
                other => s.paint("33", state_word(other)),
            };
            let flags = if d.flags.is_empty() {
                String::new()
            } else {
                format!("  {}", s.paint("33", &d.flags.join(",")))
            };
            // The basis of a dry-basis moisture is said; wet is the default.
            let basis = match d.moisture_basis {
                Some("dry") => " dry",
                _ => "",
            };
            let _ = writeln!(
                o,
                "unit {:>3} {:<16} {}  {} %{basis} ±{u} {t} °C  seq {}  stored {}  alarms {}{flags}",
                d.unit,
                d.serial.as_deref().unwrap_or(&d.port),
                state,
                s.paint("1", &m),
                d.seq.as_deref().unwrap_or("-"),
                d.line.stored,
                d.drift_alarms,
            );
        }
        let _ = o.flush();
        self.drawn = devices.len();
    }

    /// Plain or JSON status lines, one per device.
    fn lines(&mut self, devices: &[DeviceStatus]) -> std::io::Result<()> {
        let now = crate::store::now_unix_ms();
        for d in devices {
            if self.json {
                let mut j = serde_json::to_value(d).map_err(std::io::Error::other)?;
                split_seq(&mut j);
                j["time_ms"] = now.into();
                out::json(&out::typed("status", j))?;
            } else {
                out::line(&plain(d))?;
            }
        }
        Ok(())
    }
}

/// A device's `seq` (`"1.7"`) as the numbers `boot` and `counter`
/// (docs/JSON.md: counters are numbers), `null` both before a reading.
fn split_seq(j: &mut serde_json::Value) {
    let Some(o) = j.as_object_mut() else {
        return;
    };
    let parsed = o
        .remove("seq")
        .and_then(|v| v.as_str().map(str::to_string))
        .and_then(|s| {
            let (b, c) = s.split_once(['.', ':'])?;
            Some((b.parse::<u64>().ok()?, c.parse::<u64>().ok()?))
        });
    let (boot, counter) = match parsed {
        Some((b, c)) => (b.into(), c.into()),
        None => (serde_json::Value::Null, serde_json::Value::Null),
    };
    o.insert("boot".into(), boot);
    o.insert("counter".into(), counter);
}
