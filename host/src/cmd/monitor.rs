//! `fringe monitor`: stream readings, show them live, store every one.
//!
//! Readings are committed in batches at most [`crate::store::BATCH_MAX_AGE`]
//! old. On (re)start and after each reconnect the monitor first stores what
//! the device logged that the database lacks (before, between and after
//! what it holds, up to where the device is now: as `fringe pull`), sets the
//! device clock when it is unset or off by more than a second (with the
//! device key), then subscribes to the readings of the device's own
//! schedule. A reading whose sequence does not follow the last one starts a
//! backfill of the missing ones from the device log, so a killed monitor
//! loses nothing the device still holds. When the port vanishes the monitor
//! commits what it has and reconnects with backoff.
//!
//! Drift: every `--drift-every-s` seconds (after a commit) the monitor runs
//! the same four monitors as `fringe drift` ([`crate::analysis`]) over all
//! that is stored for the device, and announces each alarm episode it has
//! not announced before; those already in the record when it started are
//! counted in one line. The episodes are those `fringe drift` prints, as
//! both read the same store with the same code.

use std::io::Write;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

use anyhow::Context;
use fringe_protocol::{DeviceFrame, Flags, Reading, Request, Seq};

use super::ingest::{backfill, next_seq, pull_events};
use crate::cli::MonitorArgs;
use crate::config::{AlarmLimits, LineConfig};
use crate::drift::{Direction, Quantity};
use crate::link::{Link, LinkError};
use crate::out::{self, Style};
use crate::store::{Batcher, Source, Store};

/// What a monitor run did (printed at the end, `--json` for scripts).
#[derive(Debug, Clone, Default, serde::Serialize)]
pub struct MonitorSummary {
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
    /// Drift alarm episodes already in the record when the monitor started.
    pub drift_alarms_before: usize,
    /// Drift checks that failed (the readings were stored regardless).
    pub drift_check_failures: u32,
    /// Drift alarm episodes raised while it ran, as `fringe drift --json`
    /// prints them, each with `announced_after_streamed` (readings streamed
    /// when it was announced).
    pub drift_alarms: Vec<serde_json::Value>,
}

/// The live drift check (see the module doc).
struct DriftWatch {
    every: Option<Duration>,
    last: Option<Instant>,
    /// Episodes announced (or found at start): quantity, direction, time
    /// of the episode's first alarm.
    known: std::collections::HashSet<(Quantity, Direction, i64)>,
    /// The check at the start of the run has been made.
    primed: bool,
    /// What was read from the store so far.
    data: Option<crate::analysis::LineData>,
}

struct Monitor<'a> {
    link: Link,
    store: Store,
    batcher: Batcher,
    serial: String,
    last: Option<Seq>,
    sum: MonitorSummary,
    style: Style,
    alarm: AlarmLimits,
    /// The device's measurement interval (or the stream period asked of a
    /// protocol 1.0 device), ms.
    period_ms: u32,
    key: Option<fringe_protocol::auth::Key>,
    quiet: bool,
    stop: &'a AtomicBool,
    started: Instant,
    last_draw: Instant,
    last_reading: Instant,
    rate: RateMeter,
    latest: Option<Reading>,
    drift: DriftWatch,
}

/// Readings per second over a sliding window.
#[derive(Debug)]
struct RateMeter {
    times: std::collections::VecDeque<Instant>,
}

impl RateMeter {
    fn tick(&mut self, now: Instant) {
        self.times.push_back(now);
        while self
            .times
            .front()
            .is_some_and(|t| now.duration_since(*t) > Duration::from_secs(5))
        {
            self.times.pop_front();
        }
    }
    fn per_s(&self) -> f64 {
        match (self.times.front(), self.times.back()) {
            (Some(a), Some(b)) if self.times.len() > 1 => {
                let d = b.duration_since(*a).as_secs_f64();
                if d > 0.0 {
                    (self.times.len() - 1) as f64 / d
                } else {
                    0.0
                }
            }
            _ => 0.0,
        }
    }
}

fn flag_words(f: Flags) -> String {
    let v: Vec<&str> = f.names().collect();
    if v.is_empty() {
        "ok".into()
    } else {
        v.join(",")
    }
}

fn is_disconnect(e: &anyhow::Error) -> bool {
    e.chain().any(|c| {
        c.downcast_ref::<LinkError>().is_some_and(|l| {
            matches!(
                l,
                LinkError::Disconnected { .. }
                    | LinkError::NoAnswer { .. }
                    | LinkError::Garbled { .. }
            )
        })
    })
}

impl Monitor<'_> {
    fn flush(&mut self) -> anyhow::Result<()> {
        let st = self
            .batcher
            .flush(&mut self.store)
            .context("committing readings (those not committed are still in the device log; the next run pulls them)")?;
        self.sum.stored += st.inserted;
        self.sum.duplicates += st.duplicates + st.conflicts;
        Ok(())
    }

    fn fill_gap(&mut self, until: Option<Seq>) -> anyhow::Result<()> {
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
            &mut self.store,
            &mut self.batcher,
            from,
            until,
            &mut |_, last| reached = last,
        );
        // Keep what a cut-short backfill got: the next one starts after it.
        if let Some(l) = reached {
            self.last = Some(self.last.map_or(l, |x| x.max(l)));
        }
        let b = b?;
        self.sum.backfilled += b.received;
        self.sum.lost += b.lost;
        if b.lost > 0 {
            self.notice(&format!(
                "{} readings after {} were no longer in the device log (lost)",
                b.lost, last
            ))?;
        }
        Ok(())
    }

    /// Stores every reading the device log holds that the store lacks, up
    /// to `until` (see [`super::ingest::backfill_missing`]).
    fn backfill_missing(&mut self, until: Seq) -> anyhow::Result<()> {
        let serial = self.serial.clone();
        let b = super::ingest::backfill_missing(
            &mut self.link,
            &mut self.store,
            &mut self.batcher,
            &serial,
            Some(until),
            &mut |_, _| {},
        );
        self.flush()?;
        let b = b?;
        self.sum.backfilled += b.received;
        self.sum.lost += b.lost;
        if b.received > 0 && !self.quiet {
            self.notice(&format!(
                "{} readings from the device log stored (taken while no monitor ran)",
                b.received
            ))?;
        }
        // Continue after what is stored now (the stream starts at `until`).
        self.last = self.store.last_seq(&serial)?.max(self.last);
        Ok(())
    }

    /// The drift check, never fatal: the readings keep being stored if it
    /// fails (the failure is said, and counted in the summary).
    fn watch_drift(&mut self, force: bool) -> anyhow::Result<()> {
        if let Err(e) = self.check_drift(force) {
            self.sum.drift_check_failures += 1;
            self.notice(&format!(
                "drift check failed ({e:#}); readings are still being stored, `fringe drift` can be run on the database"
            ))?;
        }
        Ok(())
    }

    /// Runs the drift monitors if due (or `force`d) and announces new alarms.
    fn check_drift(&mut self, force: bool) -> anyhow::Result<()> {
        let Some(every) = self.drift.every else {
            return Ok(());
        };
        if !force && self.drift.last.is_some_and(|t| t.elapsed() < every) {
            return Ok(());
        }
        self.drift.last = Some(Instant::now());
        // The first check is the one at the start of the run (before the
        // stream), even when nothing is stored yet: what it finds was there
        // before.
        let at_start = !self.drift.primed;
        self.drift.primed = true;
        // Read once, then only what was added since (see `LineData::refresh`).
        let data = match self.drift.data.as_mut() {
            Some(d) => {
                d.refresh(&self.store)
                    .context("reading the stored data for the drift monitors")?;
                d
            }
            None => match crate::analysis::load(&self.store, Some(&self.serial)) {
                Ok(d) => self.drift.data.insert(d),
                // Nothing stored for the device yet: nothing to watch.
                Err(_) if self.store.last_seq(&self.serial)?.is_none() => return Ok(()),
                Err(e) => {
                    return Err(anyhow::Error::new(e)
                        .context("reading the stored data for the drift monitors"))
                }
            },
        };
        let mut fresh = Vec::new();
        for t in data.traces() {
            for a in t.episodes() {
                if self
                    .drift
                    .known
                    .insert((a.quantity, a.direction, a.time_ms))
                {
                    fresh.push(a);
                }
            }
        }
        if at_start {
            self.sum.drift_alarms_before = fresh.len();
            if !fresh.is_empty() {
                self.notice(&format!(
                    "{} drift alarm(s) already in the record for {} (details: `fringe drift`)",
                    fresh.len(),
                    self.serial
                ))?;
            }
            return Ok(());
        }
        for a in fresh {
            let text = format!("DRIFT ALARM: {}", a.message());
            let text = if self.style.tty {
                self.style.paint("1;31", &text)
            } else {
                text
            };
            self.notice(&text)?;
            let mut v = fringe_quality::views::alarm_json(&a);
            v["announced_after_streamed"] = self.sum.streamed.into();
            self.sum.drift_alarms.push(v);
        }
        Ok(())
    }

    fn notice(&mut self, text: &str) -> anyhow::Result<()> {
        if self.style.tty && !self.quiet {
            let mut o = std::io::stdout().lock();
            let _ = write!(o, "\r\x1b[2K").and_then(|()| o.flush());
        }
        eprintln!("fringe monitor: {text}");
        Ok(())
    }

    fn on_reading(&mut self, r: Reading) -> anyhow::Result<()> {
        let now = Instant::now();
        self.last_reading = now;
        self.sum.streamed += 1;
        self.rate.tick(now);
        match self.last {
            Some(last) if r.seq <= last => return Ok(()),
            Some(last) if r.seq != next_seq(last) => {
                self.sum.gaps += 1;
                self.fill_gap(Some(r.seq))?;
            }
            _ => {}
        }
        self.batcher.push(r, Source::Stream, now);
        self.last = Some(self.last.map_or(r.seq, |x| x.max(r.seq)));
        self.latest = Some(r);
        if !self.style.tty && !self.quiet {
            out::line(&self.plain_line(&r))?;
        }
        Ok(())
    }

    fn plain_line(&self, r: &Reading) -> String {
        let alarms = self.alarm.check(r.moisture_pct, r.uncertainty_pct);
        format!(
            "{} {} moisture_pct={} uncertainty_pct={} temperature_c={:.2} flags={}{}",
            r.seq,
            r.time_ms,
            r.moisture_pct.map_or("none".into(), |m| format!("{m:.3}")),
            if r.moisture_pct.is_some() && r.uncertainty_pct.is_finite() {
                format!("{:.3}", r.uncertainty_pct)
            } else {
                "none".into()
            },
            r.temperature_c,
            flag_words(r.flags),
            if alarms.is_empty() {
                String::new()
            } else {
                format!(" alarm={}", alarms.join(","))
            }
        )
    }

    fn draw(&mut self) {
        if !self.style.tty || self.quiet || self.last_draw.elapsed() < Duration::from_millis(200) {
            return;
        }
        self.last_draw = Instant::now();
        let s = self.style;
        let stats = self.link.stats();
        let body = match &self.latest {
            Some(r) => {
                let alarms = self.alarm.check(r.moisture_pct, r.uncertainty_pct);
                let m = r
                    .moisture_pct
                    .map_or("  --.--".to_string(), |m| format!("{m:7.2}"));
                let m = if alarms.is_empty() {
                    s.paint("1", &m)
                } else {
                    s.paint("1;31", &m)
                };
                let flags = if r.flags.is_empty() {
                    s.paint("32", "ok")
                } else {
                    s.paint("33", &flag_words(r.flags))
                };
                let u = if r.moisture_pct.is_some() && r.uncertainty_pct.is_finite() {
                    format!("{:.2}", r.uncertainty_pct)
                } else {
                    "--".into()
                };
                format!(
                    "{m} % ±{u}  {:6.2} °C  {flags}{}  seq {}",
                    r.temperature_c,
                    if alarms.is_empty() {
                        String::new()
                    } else {
                        format!("  {}", s.paint("1;31", &alarms.join(" ")))
                    },
                    r.seq
                )
            }
            None => "waiting for readings".into(),
        };
        let mut o = std::io::stdout().lock();
        // A failed draw (closed terminal) is not worth stopping the log for.
        let _ = write!(
            o,
            "\r\x1b[2K{}  {body}  {:.1}/s  stored {}  link errs {}",
            self.serial,
            self.rate.per_s(),
            self.sum.stored,
            stats.damaged
        )
        .and_then(|()| o.flush());
    }

    fn start_stream(&mut self) -> anyhow::Result<()> {
        self.link.request(Request::StartStream {
            period_ms: self.period_ms,
        })?;
        self.last_reading = Instant::now();
        Ok(())
    }

    fn reconnect(&mut self, why: &anyhow::Error) -> anyhow::Result<bool> {
        self.flush()?;
        self.notice(&format!("{why}: reconnecting"))?;
        match self.link.reconnect(self.stop) {
            Ok(id) => {
                if id.serial.as_str() != self.serial {
                    anyhow::bail!(
                        "the device on {} is now {}, not {}: stopping so their readings are not mixed",
                        self.link.port_name(),
                        id.serial,
                        self.serial
                    );
                }
                self.sum.reconnects += 1;
                self.notice("reconnected")?;
                let key = self.key;
                super::sync_clock(&mut self.link, key.as_ref(), "monitor")?;
                Ok(true)
            }
            Err(LinkError::Stopped) => Ok(false),
            Err(e) => Err(e.into()),
        }
    }
}

/// `fringe monitor`.
///
/// # Errors
/// Port, link, database and output errors, each with its exit code.
pub fn monitor(args: &MonitorArgs, cfg: &LineConfig, stop: &AtomicBool) -> anyhow::Result<()> {
    let (db, mut store) = super::open_db(args.db.as_deref(), cfg)?;
    let key = super::optional_key(args.key_file.as_deref(), cfg)?;
    let mut link = super::connect(&args.port, cfg)?;
    let id = link
        .identity()
        .cloned()
        .context("no identity after the handshake")?;
    let serial = super::register(&mut store, &id)?;
    super::sync_clock(&mut link, key.as_ref(), "monitor")?;
    let own_schedule = id
        .capabilities
        .contains(fringe_protocol::Capabilities::SETTINGS);
    let period_ms = if own_schedule {
        let interval = super::device::read_settings(&mut link)?.interval_ms;
        if let Some(p) = args.period_ms.filter(|p| *p != interval) {
            eprintln!(
                "fringe monitor: --period-ms {p} is not used: {serial} measures every {interval} ms on its own (change it with `fringe device config set --interval-ms`)"
            );
        }
        interval
    } else {
        args.period_ms.unwrap_or(1000)
    };
    let last = store.last_seq(&serial)?;
    let last_event = store.last_event(&serial)?;
    let style = Style::detect();
    let mut m = Monitor {
        link,
        batcher: Batcher::new(&serial),
        store,
        serial,
        last,
        sum: MonitorSummary::default(),
        style,
        alarm: cfg.alarm,
        period_ms,
        key,
        // With --json, stdout carries only the summary.
        quiet: args.quiet || args.json,
        stop,
        started: Instant::now(),
        last_draw: Instant::now() - Duration::from_secs(1),
        last_reading: Instant::now(),
        rate: RateMeter {
            times: Default::default(),
        },
        latest: None,
        drift: DriftWatch {
            every: (args.drift_every_s > 0.0).then(|| Duration::from_secs_f64(args.drift_every_s)),
            last: None,
            known: Default::default(),
            primed: false,
            data: None,
        },
    };
    if !args.quiet {
        m.notice(&format!(
            "{} on {}, database {}{}",
            m.serial,
            m.link.port_name(),
            db.display(),
            match last {
                Some(s) => format!(", stored up to {s}"),
                None => ", new device in this database".into(),
            }
        ))?;
    }
    let events_from = last_event.map_or(0, |n| n.saturating_add(1));
    let mut events_done = false;
    let deadline = args
        .duration_s
        .map(|s| Instant::now() + Duration::from_secs_f64(s));
    let result = loop {
        let run = (|| -> anyhow::Result<()> {
            if !events_done {
                pull_events(&mut m.link, &mut m.store, &m.serial.clone(), events_from)?;
                events_done = true;
            }
            m.session_until(args.count, deadline)
        })();
        match run {
            Ok(()) => break Ok(()),
            Err(e) if is_disconnect(&e) && !stop.load(Ordering::Relaxed) => match m.reconnect(&e) {
                Ok(true) => continue,
                Ok(false) => break Ok(()),
                Err(e) => break Err(e),
            },
            Err(e) => break Err(e),
        }
    };
    // Commit whatever arrived, whatever happened.
    let flushed = m.flush();
    // The last batch's alarms.
    let drift_checked = if flushed.is_ok() && result.is_ok() {
        m.watch_drift(true)
    } else {
        Ok(())
    };
    if m.link.is_connected() {
        let _ = m.link.request(Request::StopStream);
    }
    if m.style.tty && !args.quiet {
        let mut o = std::io::stdout().lock();
        let _ = writeln!(o, "\r\x1b[2K").and_then(|()| o.flush());
    }
    m.sum.link_errors = m.link.stats().damaged;
    result?;
    flushed?;
    drift_checked?;
    let s = m.sum;
    if args.json {
        out::json(&serde_json::to_value(s)?)?;
    } else if !args.quiet {
        eprintln!(
            "fringe monitor: {} readings streamed, {} backfilled, {} stored, {} already stored, {} lost, {} gaps, {} reconnects, {} damaged frames in {}",
            s.streamed,
            s.backfilled,
            s.stored,
            s.duplicates,
            s.lost,
            s.gaps,
            s.reconnects,
            s.link_errors,
            out::duration_ms(m.started.elapsed().as_millis() as u64)
        );
    }
    Ok(())
}

impl Monitor<'_> {
    /// Backfill from the last stored reading, then stream until stopped,
    /// `count` readings streamed, or the deadline.
    fn session_until(
        &mut self,
        count: Option<u64>,
        deadline: Option<Instant>,
    ) -> anyhow::Result<()> {
        let stop_at = count.unwrap_or(u64::MAX);
        // Store what the device logged that the database lacks, up to where
        // the device is now; what it takes from here on comes by the stream
        // (a backfill chasing the log's moving end on a noisy line might
        // never finish).
        let now_at = super::request_status(&mut self.link)?.next_seq;
        self.backfill_missing(now_at)?;
        self.flush()?;
        self.watch_drift(!self.drift.primed)?;
        self.start_stream()?;
        let silence = Duration::from_millis(u64::from(self.period_ms) * 5 + 2000);
        loop {
            if self.stop.load(Ordering::Relaxed)
                || self.sum.streamed >= stop_at
                || deadline.is_some_and(|d| Instant::now() >= d)
            {
                return Ok(());
            }
            let wait = self
                .batcher
                .deadline()
                .map_or(Duration::from_millis(50), |d| {
                    d.saturating_duration_since(Instant::now())
                })
                .min(Duration::from_millis(50));
            match self.link.next_frame(wait)? {
                Some(DeviceFrame::Reading(r)) => self.on_reading(r)?,
                Some(DeviceFrame::Event(e)) => {
                    self.store.insert_events(&self.serial, &[e])?;
                }
                _ => {}
            }
            if self.batcher.due(Instant::now()) {
                self.flush()?;
                self.watch_drift(false)?;
            }
            if self.last_reading.elapsed() > silence {
                // The stream went quiet: ask the device; no answer means reconnect.
                self.link.request(Request::Status)?;
                self.start_stream()?;
            }
            self.draw();
        }
    }
}
