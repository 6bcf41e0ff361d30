//! `fringe monitor`: a line session (`fringe_line::Session`) with a live
//! view on a terminal (plain lines otherwise), and the drift monitors of
//! `fringe drift` run on what is stored as it streams.
//!
//! Drift: every `--drift-every-s` seconds (after a commit) the monitor runs
//! the same four monitors as `fringe drift` (`fringe_quality::analysis`)
//! over all that is stored for the device, and announces each alarm
//! episode it has not announced before; those already in the record when
//! it started are counted in one line. The episodes are those `fringe
//! drift` prints, as both read the same store with the same code.

use std::io::Write;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

use fringe_line::{Ctx, Note, Session, SessionOptions, Summary};
use fringe_protocol::{Flags, Reading};

use crate::cli::MonitorArgs;
use crate::config::{AlarmLimits, LineConfig};
use crate::out::{self, Style};
use crate::store::Store;
use fringe_quality::limits::LimitBasis;

/// What a monitor run did (printed at the end, `--json` for scripts).
#[derive(Debug, Clone, Default, serde::Serialize)]
pub struct MonitorSummary {
    /// What the line session did.
    #[serde(flatten)]
    pub line: Summary,
    /// Drift alarm episodes already in the record when the monitor started.
    pub drift_alarms_before: usize,
    /// Drift checks that failed (the readings were stored regardless).
    pub drift_check_failures: u32,
    /// Drift alarm episodes raised while it ran, as `fringe drift --json`
    /// prints them, each with `announced_after_streamed` (readings streamed
    /// when it was announced).
    pub drift_alarms: Vec<serde_json::Value>,
}

/// The live drift check (see the module doc): `fringe_quality::watch`,
/// with what the monitor says and counts.
struct DriftWatch {
    watch: fringe_quality::watch::DriftWatch,
    alarms_before: usize,
    failures: u32,
    alarms: Vec<serde_json::Value>,
}

impl DriftWatch {
    /// The drift check, never fatal: the readings keep being stored if it
    /// fails (the failure is said, and counted in the summary).
    fn watch(&mut self, store: &Store, serial: &str, streamed: u64, view: &mut View, force: bool) {
        let checked = match self.watch.check(store, serial, Instant::now(), force) {
            Ok(c) => c,
            Err(e) => {
                self.failures += 1;
                view.notice(&format!(
                    "drift check failed (reading the stored data for the drift monitors: {e}); readings are still being stored, `fringe drift` can be run on the database"
                ));
                return;
            }
        };
        if let Some(before) = checked.before {
            self.alarms_before = before;
            if before > 0 {
                view.notice(&format!(
                    "{before} drift alarm(s) already in the record for {serial} (details: `fringe drift`)",
                ));
            }
        }
        for a in checked.fresh {
            let text = format!("DRIFT ALARM: {}", a.message());
            let text = if view.style.tty {
                view.style.paint("1;31", &text)
            } else {
                text
            };
            view.notice(&text);
            let mut v = fringe_quality::views::alarm_json(&a);
            v["announced_after_streamed"] = streamed.into();
            if view.json_lines && view.broken.is_none() {
                let mut line = serde_json::json!({"type": "drift_alarm"});
                if let (Some(o), Some(a)) = (line.as_object_mut(), v.as_object()) {
                    o.extend(a.clone());
                }
                if let Err(e) = out::json(&line) {
                    view.broken = Some(e);
                }
            }
            self.alarms.push(v);
        }
    }
}

/// The terminal side: the live status line, plain lines, notices.
struct View {
    style: Style,
    alarm: AlarmLimits,
    /// The basis of each product calibration known, by id (wet, dry).
    bases: std::collections::BTreeMap<fringe_protocol::CalId, LimitBasis>,
    /// A calibration a reading carried whose basis is not known: looked
    /// up after this poll (the store's records, then the device).
    unknown: Option<fringe_protocol::CalId>,
    /// The readings of this poll from the first of such a calibration on,
    /// shown once its basis is looked up (shown before, they were checked
    /// against the band as written: a false alarm where the basis is the
    /// band's other one), in the order they came.
    held: Vec<Reading>,
    /// Calibrations neither the store nor the device said the basis of
    /// (said once).
    not_found: std::collections::BTreeSet<fringe_protocol::CalId>,
    /// Requests for a calibration's basis the device did not answer, by id.
    failed_asks: std::collections::BTreeMap<fringe_protocol::CalId, u32>,
    quiet: bool,
    /// `--json` without `--quiet`: each reading and drift alarm as a JSON line.
    json_lines: bool,
    serial: String,
    last_draw: Instant,
    rate: RateMeter,
    /// A write to stdout failed (a closed pipe): the run ends.
    broken: Option<std::io::Error>,
}

/// Readings per second over a sliding window.
#[derive(Debug, Default)]
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

/// Whether a reading's time is wall-clock time (else time since boot).
fn clock_set(r: &Reading) -> bool {
    !r.flags.contains(Flags::CLOCK_UNSET) && r.time_ms >= 946_684_800_000
}

/// A reading's time for the plain line: local (or `--utc`) time with its
/// offset, or `boot+S.SSSs` while the device clock is not set.
fn reading_time(r: &Reading) -> String {
    if clock_set(r) {
        crate::timefmt::fmt_person(r.time_ms as i64)
    } else {
        format!("boot+{:.3}s", r.time_ms as f64 / 1000.0)
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

impl View {
    fn notice(&mut self, text: &str) {
        if self.style.tty && !self.quiet {
            let mut o = std::io::stdout().lock();
            let _ = write!(o, "\r\x1b[2K").and_then(|()| o.flush());
        }
        eprintln!("fringe monitor: {text}");
    }

    /// What the session told.
    fn note(&mut self, n: Note<'_>) {
        match n {
            Note::Clock(s) => super::say_clock("monitor", &s),
            Note::ClockRefused(e) => {
                eprintln!("fringe monitor: the device clock was not set: {e}");
            }
            Note::PeriodIgnored {
                asked_ms,
                interval_ms,
            } => eprintln!(
                "fringe monitor: --period-ms {asked_ms} is not used: {} measures every {interval_ms} ms on its own (change it with `fringe device config set --interval-ms`)",
                self.serial
            ),
            Note::CaughtUp { received, .. } if received > 0 && !self.quiet => self.notice(
                &format!("{received} readings from the device log stored (taken while no monitor ran)"),
            ),
            Note::Lost { count, after } => self.notice(&format!(
                "{count} readings after {after} were no longer in the device log (lost)"
            )),
            Note::Reading(r) => {
                self.rate.tick(Instant::now());
                if r.product_cal != fringe_protocol::CalId::NONE
                    && !self.bases.contains_key(&r.product_cal)
                    && !self.not_found.contains(&r.product_cal)
                {
                    self.unknown = Some(r.product_cal);
                }
                if self.unknown.is_some() {
                    self.held.push(*r);
                } else {
                    self.show(r);
                }
            }
            // Read back from the device log (taken while no monitor ran, or
            // in a gap): written as a streamed one is, marked, and checked
            // against the alarm band, which it was not (found by review:
            // a HIGH during an outage was never said).
            Note::Logged(r) => {
                let alarms = self.alarms_of(r);
                if !alarms.is_empty() && self.style.tty && !self.quiet {
                    self.notice(&format!(
                        "reading {} read back from the device log (taken {}) crossed {}",
                        r.seq,
                        reading_time(r),
                        alarms.join(", ")
                    ));
                }
                self.show_as(r, true);
            }
            Note::SequenceBehind(e) => self.notice(&format!("WARNING: {e}")),
            Note::Reconnecting(why) => self.notice(&format!("{why}: reconnecting")),
            Note::Reconnected => self.notice("reconnected"),
            Note::CalibrationObserved(o) => self.notice(&o.to_string()),
            Note::CalibrationsNotRead(e) => self.notice(&format!(
                "the device's calibrations could not be read or recorded ({e}); monitoring goes on"
            )),
            _ => {}
        }
    }

    /// Writes reading `r` to stdout (a JSON line, or a plain one where
    /// stdout is not a terminal).
    fn show(&mut self, r: &Reading) {
        self.show_as(r, false);
    }

    /// [`View::show`] of a streamed reading, or one read back from the
    /// device log (`from_log`: `"from_log": true` in JSON, ` from=log` at
    /// the end of the plain line).
    fn show_as(&mut self, r: &Reading, from_log: bool) {
        let written = if self.broken.is_some() {
            Ok(())
        } else if self.json_lines {
            let mut v = self.reading_json(r);
            if from_log {
                v["from_log"] = serde_json::json!(true);
            }
            out::json(&v)
        } else if !self.style.tty && !self.quiet {
            let mut line = self.plain_line(r);
            if from_log {
                line.push_str(" from=log");
            }
            out::line(&line)
        } else {
            Ok(())
        };
        if let Err(e) = written {
            self.broken = Some(e);
        }
    }

    /// Shows the readings held for a calibration's basis ([`View::held`]).
    fn show_held(&mut self) {
        for r in std::mem::take(&mut self.held) {
            self.show(&r);
        }
    }

    /// The plain line of a reading (stdout not a terminal), every field
    /// labelled (README "The plain monitor line"):
    /// `boot=1 n=10 t=2026-12-01T07:29:00+01:00 moisture=14.27% u=0.10% temperature=21.50C flags=ok`,
    /// `t=boot+12.345s` while the device clock is not set, `moisture=none`
    /// without a valid value, ` alarm=HIGH,...` at the end when a limit of
    /// the line file is crossed.
    fn plain_line(&self, r: &Reading) -> String {
        let alarms = self.alarms_of(r);
        let (m, u) = match r.moisture_pct {
            Some(m) if m.is_finite() => (
                format!("{m:.2}%"),
                if r.uncertainty_pct.is_finite() {
                    format!("{:.2}%", r.uncertainty_pct)
                } else {
                    "none".into()
                },
            ),
            _ => ("none".into(), "none".into()),
        };
        format!(
            "boot={} n={} t={} moisture={m} u={u} temperature={:.2}C flags={}{}",
            r.seq.boot,
            r.seq.counter,
            reading_time(r),
            r.temperature_c,
            flag_words(r.flags),
            if alarms.is_empty() {
                String::new()
            } else {
                format!(" alarm={}", alarms.join(","))
            }
        )
    }

    /// The alarm limits a reading breaks, on the limits' basis (the reading
    /// converted to it where its calibration is on the other one).
    fn alarms_of(&self, r: &Reading) -> Vec<&'static str> {
        self.alarm.check_reading(
            r.moisture_pct,
            r.uncertainty_pct,
            self.bases.get(&r.product_cal).copied(),
        )
    }

    /// A reading as one JSON line (docs/JSON.md, `fringe monitor --json`).
    fn reading_json(&self, r: &Reading) -> serde_json::Value {
        let clock_set = clock_set(r);
        let valid = r.moisture_pct.filter(|m| m.is_finite());
        serde_json::json!({
            "type": "reading",
            "serial": self.serial,
            "boot": r.seq.boot,
            "counter": r.seq.counter,
            "clock_set": clock_set,
            "time_ms": r.time_ms,
            "time_utc": clock_set.then(|| crate::timefmt::fmt_time(r.time_ms as i64)),
            "moisture_pct": valid,
            "moisture_basis": self.bases.get(&r.product_cal).map(|b| b.word()),
            "uncertainty_pct": valid.and(Some(r.uncertainty_pct).filter(|u| u.is_finite())),
            "temperature_c": Some(r.temperature_c).filter(|t| t.is_finite()),
            "flags": r.flags.names().collect::<Vec<_>>(),
            "alarms": self.alarms_of(r),
        })
    }

    fn draw(&mut self, latest: Option<&Reading>, sum: &Summary) {
        if !self.style.tty || self.quiet || self.last_draw.elapsed() < Duration::from_millis(200) {
            return;
        }
        self.last_draw = Instant::now();
        let s = self.style;
        let body = match latest {
            Some(r) => {
                let alarms = self.alarms_of(r);
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
            sum.stored,
            sum.link_errors
        )
        .and_then(|()| o.flush());
    }
}

/// `fringe monitor`.
///
/// # Errors
/// Port, link, database and output errors, each with its exit code.
pub fn monitor(args: &MonitorArgs, cfg: &LineConfig, stop: &AtomicBool) -> anyhow::Result<()> {
    // Inputs first, then the device, then the database (nothing is
    // created or changed before the device has answered).
    let db = super::db_path(args.db.as_deref(), cfg)?;
    let key = super::optional_key(args.key_file.as_deref(), cfg)?;
    let mut link = super::connect(&args.port, cfg)?;
    // Each reading is checked against the alarm band on the band's basis,
    // converted where its calibration is on the other one; said at start
    // when the device's active calibration is. A reading of a calibration
    // not known then (the device did not answer this request) has it
    // looked up after that poll ([`learn_basis`]).
    let active = active_calibration(&mut link);
    if let Some(text) = active.and_then(|(_, basis)| cfg.alarm.taken_as(basis)) {
        eprintln!("{text}");
    }
    super::with_db(&db, |store| {
        run(args, cfg, stop, link, key, store, &db, active)
    })
}

/// The id and basis of the device's active product calibration, if it has
/// one and says.
fn active_calibration(
    link: &mut fringe_link::Link,
) -> Option<(fringe_protocol::CalId, LimitBasis)> {
    fringe_line::active_product_cal(link)
        .ok()
        .flatten()
        .map(|c| (c.content_id(), LimitBasis::from(c.basis)))
}

/// The basis of calibration `id`, which a reading carried and `view` did
/// not know (a calibration selected while the monitor runs): from the
/// database's records (`cal select` with this database), else the
/// device's active calibration; said when it is on the band's other basis,
/// and once when neither says (its readings are then checked as written).
/// The readings of the poll that brought it are shown after this
/// ([`View::held`]).
fn learn_basis(view: &mut View, store: &Store, session: &mut Session, id: fringe_protocol::CalId) {
    let serial = view.serial.clone();
    view.bases.extend(calibration_bases(store, &serial, None));
    if !view.bases.contains_key(&id) {
        match session.active_product_cal() {
            Ok(Some(c)) => {
                view.bases.insert(c.content_id(), LimitBasis::from(c.basis));
            }
            Ok(None) => {}
            // The device did not answer: asked again with a later reading
            // of it, three times in all (its readings meanwhile are
            // checked as written, and said to be).
            Err(e) => {
                let tries = view.failed_asks.entry(id).or_insert(0);
                *tries += 1;
                if *tries < 3 {
                    view.notice(&format!(
                        "could not ask the device for product calibration {id} ({e}); its readings are checked against the alarm band as written until it answers"
                    ));
                    return;
                }
            }
        }
    }
    match view.bases.get(&id).copied() {
        Some(basis) => {
            if let Some(text) = view.alarm.taken_as(basis) {
                view.notice(&format!("product calibration {id}: {text}"));
            }
        }
        None => {
            view.not_found.insert(id);
            view.notice(&format!(
                "the moisture basis of product calibration {id} is not known (no record in the database, not the device's active one); its readings are checked against the alarm band as written"
            ));
        }
    }
}

/// The basis of each product calibration of `serial` the database has a
/// record of, and of the device's active one, by id: a reading's moisture
/// is on its calibration's basis.
fn calibration_bases(
    store: &Store,
    serial: &str,
    active: Option<(fringe_protocol::CalId, LimitBasis)>,
) -> std::collections::BTreeMap<fringe_protocol::CalId, LimitBasis> {
    let mut bases: std::collections::BTreeMap<_, _> =
        fringe_quality::analysis::calibration_bases(store, serial)
            .unwrap_or_default()
            .into_iter()
            .map(|(id, b)| (id, LimitBasis::from(b)))
            .collect();
    if let Some((id, b)) = active {
        bases.insert(id, b);
    }
    bases
}

#[allow(clippy::too_many_arguments)]
fn run(
    args: &MonitorArgs,
    cfg: &LineConfig,
    stop: &AtomicBool,
    link: fringe_link::Link,
    key: Option<fringe_protocol::auth::Key>,
    store: &mut Store,
    db: &std::path::Path,
    active: Option<(fringe_protocol::CalId, LimitBasis)>,
) -> anyhow::Result<()> {
    let style = Style::detect();
    let mut view = View {
        style,
        alarm: cfg.alarm,
        // With --json, stdout carries only JSON lines.
        quiet: args.quiet || args.json,
        json_lines: args.json && !args.quiet,
        serial: link.serial_number().to_string(),
        last_draw: Instant::now() - Duration::from_secs(1),
        rate: RateMeter::default(),
        broken: None,
        bases: calibration_bases(store, link.serial_number(), active),
        unknown: None,
        not_found: std::collections::BTreeSet::new(),
        held: Vec::new(),
        failed_asks: std::collections::BTreeMap::new(),
    };
    let mut drift = DriftWatch {
        watch: fringe_quality::watch::DriftWatch::new(
            (args.drift_every_s > 0.0).then(|| Duration::from_secs_f64(args.drift_every_s)),
        ),
        alarms_before: 0,
        failures: 0,
        alarms: Vec::new(),
    };
    let started = Instant::now();
    let wall = crate::store::now_unix_ms;
    let now = Instant::now;
    let mut session = {
        let mut tell = |n: Note<'_>| view.note(n);
        let mut ctx = Ctx {
            stop,
            wall_ms: &wall,
            now: &now,
            tell: &mut tell,
        };
        Session::open(
            link,
            store,
            SessionOptions {
                key,
                period_ms: args.period_ms,
            },
            &mut ctx,
        )?
    };
    let serial = session.serial().to_string();
    if !args.quiet {
        let last = store.last_seq(&serial)?;
        view.notice(&format!(
            "{serial} on {}, database {}{}",
            session.link().port_name(),
            db.display(),
            match last {
                Some(s) => format!(", stored up to {s}"),
                None => ", new device in this database".into(),
            }
        ));
    }
    let deadline = args
        .duration_s
        .map(|s| Instant::now() + Duration::from_secs_f64(s));
    let stop_at = args.count.unwrap_or(u64::MAX);
    let result = (|| -> anyhow::Result<()> {
        {
            let mut tell = |n: Note<'_>| view.note(n);
            let mut ctx = Ctx {
                stop,
                wall_ms: &wall,
                now: &now,
                tell: &mut tell,
            };
            session.catch_up(store, &mut ctx)?;
        }
        drift.watch(store, &serial, 0, &mut view, true);
        {
            let mut tell = |n: Note<'_>| view.note(n);
            let mut ctx = Ctx {
                stop,
                wall_ms: &wall,
                now: &now,
                tell: &mut tell,
            };
            session.subscribe(&mut ctx)?;
        }
        loop {
            if stop.load(Ordering::Relaxed)
                || session.summary().streamed >= stop_at
                || deadline.is_some_and(|d| Instant::now() >= d)
            {
                return Ok(());
            }
            let polled = {
                let mut tell = |n: Note<'_>| view.note(n);
                let mut ctx = Ctx {
                    stop,
                    wall_ms: &wall,
                    now: &now,
                    tell: &mut tell,
                };
                session.poll(store, &mut ctx)?
            };
            if let Some(id) = view.unknown.take() {
                learn_basis(&mut view, store, &mut session, id);
            }
            view.show_held();
            if let Some(e) = view.broken.take() {
                return Err(e.into());
            }
            if polled.stopped {
                return Ok(());
            }
            if polled.committed.is_some() {
                drift.watch(store, &serial, session.summary().streamed, &mut view, false);
            }
            view.draw(session.latest(), &session.summary());
        }
    })();
    // Commit whatever arrived, whatever happened.
    let (line, flushed) = session.finish(store);
    // The last batch's alarms.
    if flushed.is_ok() && result.is_ok() {
        drift.watch(store, &serial, line.streamed, &mut view, true);
    }
    if view.style.tty && !args.quiet {
        let mut o = std::io::stdout().lock();
        let _ = writeln!(o, "\r\x1b[2K").and_then(|()| o.flush());
    }
    result?;
    flushed?;
    let s = MonitorSummary {
        line,
        drift_alarms_before: drift.alarms_before,
        drift_check_failures: drift.failures,
        drift_alarms: drift.alarms,
    };
    if args.json {
        out::json(&out::typed("summary", serde_json::to_value(&s)?))?;
    } else if !args.quiet {
        let l = &s.line;
        eprintln!(
            "fringe monitor: {} readings streamed, {} backfilled, {} stored, {} already stored, {} lost, {} gaps, {} reconnects, {} damaged frames in {}",
            l.streamed,
            l.backfilled,
            l.stored,
            l.duplicates,
            l.lost,
            l.gaps,
            l.reconnects,
            l.link_errors,
            out::duration_ms(started.elapsed().as_millis() as u64)
        );
    }
    Ok(())
}
