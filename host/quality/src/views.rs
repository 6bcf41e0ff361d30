//! What the quality commands show, built from a store: drift summaries
//! (text, JSON, charts), the report's input and page, the calibration
//! history, lab grab samples matched to readings, and the summaries of an
//! audit export and verification. Nothing here prints: text goes to a
//! writer the caller gives.

use std::io::Write;
use std::path::{Path, PathBuf};

use fringe_protocol::Flags;
use fringe_store::{chain, CalKind, NewLabSample, RecordRead, RecordStore, Recorded, StoreError};
use serde_json::json;

use crate::analysis::{self, CalRecordBody, LineData, LoadError};
use crate::audit;
use crate::drift::{ChartKind, CusumParams, EwmaParams, Quantity, Trace};
use crate::plots::{self, LabPoint, TrendPoint};
use crate::report::{self, ReportInput};
use crate::timefmt::{fmt_person, fmt_time};

/// Why a view could not be made.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ViewError {
    /// The store failed.
    #[error("{0}")]
    Store(#[from] StoreError),
    /// The device's data could not be read.
    #[error("{0}")]
    Load(#[from] LoadError),
    /// Which device is meant is not clear.
    #[error("{db}: {what}")]
    Device {
        /// The database.
        db: String,
        /// What is unclear.
        what: String,
    },
    /// A value given is out of its range (the flag named).
    #[error("{0}")]
    BadValue(String),
    /// A chart or page could not be drawn.
    #[error("drawing {what}: {reason}")]
    Draw {
        /// What.
        what: &'static str,
        /// Why not.
        reason: String,
    },
    /// A file could not be written.
    #[error("writing {path}: {source}")]
    Write {
        /// File.
        path: PathBuf,
        /// What the system said.
        source: std::io::Error,
    },
}

/// The device `serial`, or the store's only device.
///
/// # Errors
/// [`ViewError::Device`] when the store holds none, or several and none was
/// named; [`ViewError::BadValue`] for a serial it does not hold.
pub fn only_device(
    store: &(impl RecordRead + ?Sized),
    serial: Option<&str>,
) -> Result<String, ViewError> {
    let d = store.devices()?;
    let db = store.path().display().to_string();
    if let Some(s) = serial {
        // Only a device the store knows: a mistyped serial would otherwise
        // add a device to the append-only chain for good.
        if d.iter().any(|x| x.serial == s) {
            return Ok(s.to_string());
        }
        return Err(ViewError::BadValue(format!(
            "--serial {s}: no such device in {db} ({}); check the serial",
            if d.is_empty() {
                "none yet: connect the device once (fringe monitor) first".to_string()
            } else {
                format!(
                    "its devices: {}",
                    d.iter()
                        .map(|x| x.serial.as_str())
                        .collect::<Vec<_>>()
                        .join(", ")
                )
            }
        )));
    }
    match d.as_slice() {
        [one] => Ok(one.serial.clone()),
        [] => Err(ViewError::Device {
            db,
            what: "no device recorded yet; connect the device once (fringe monitor) first".into(),
        }),
        _ => Err(ViewError::Device {
            db,
            what: format!(
                "several devices ({}); choose one with --serial",
                d.iter()
                    .map(|x| x.serial.as_str())
                    .collect::<Vec<_>>()
                    .join(", ")
            ),
        }),
    }
}

/// A lab grab sample to record against the inline reading at its time.
#[derive(Debug, Clone, PartialEq)]
pub struct GrabSample {
    /// When it was taken, ms since the Unix epoch.
    pub time_ms: i64,
    /// Lab moisture, % (on `basis`).
    pub moisture_pct: f64,
    /// `wet` or `dry`.
    pub basis: String,
    /// Reference method.
    pub method: String,
    /// Who took and measured it.
    pub operator: String,
    /// The lab's sample id (`LAB-<time>` when none).
    pub sample_id: Option<String>,
    /// Furthest a matched reading may lie from `time_ms`, s.
    pub match_within_s: i64,
    /// The chain position of the lab sample this one corrects (the old
    /// record stays; the store checks that it is a lab sample).
    pub supersedes: Option<u64>,
}

/// Flags that keep a reading out of a lab pair: its moisture is in
/// question (clipped, outside the calibration's ranges, the fit not
/// converged, an electrode or temperature-sensor fault, the reference
/// drifted, a low signal, the density missing), so lab - inline would
/// charge the calibration with the reading's trouble.
pub const PAIR_UNUSABLE: Flags = Flags::SATURATED
    .union(Flags::OUT_OF_RANGE)
    .union(Flags::TEMP_OUT_OF_RANGE)
    .union(Flags::FIT_NOT_CONVERGED)
    .union(Flags::ELECTRODE_FAULT)
    .union(Flags::REFERENCE_DRIFT)
    .union(Flags::LOW_SNR)
    .union(Flags::TEMP_SENSOR_FAULT)
    .union(Flags::DENSITY_MISSING);

/// What recording a grab sample did.
#[derive(Debug, Clone, PartialEq)]
pub struct GrabRecorded {
    /// The sample id stored.
    pub sample_id: String,
    /// The device.
    pub serial: String,
    /// The reading it was matched to, with its wall-clock time and whether
    /// that was re-based.
    pub matched: Option<(fringe_protocol::Reading, i64, bool)>,
    /// Why it was stored unmatched, in words (`None` when matched).
    pub unmatched: Option<String>,
    /// The store's answer.
    pub recorded: Recorded,
}

impl GrabSample {
    /// Checks the values before anything is opened or written.
    ///
    /// # Errors
    /// [`ViewError::BadValue`] naming the flag.
    pub fn validate(&self) -> Result<(), ViewError> {
        let limit = if self.basis == "dry" {
            fringe_calibration::moisture::MAX_DRY_BASIS_PCT
        } else {
            100.0
        };
        if !(self.moisture_pct.is_finite() && self.moisture_pct >= 0.0 && self.moisture_pct < limit)
        {
            return Err(ViewError::BadValue(format!(
                "--moisture {}: must be a moisture in % {} basis, 0 <= m < {limit}",
                self.moisture_pct, self.basis
            )));
        }
        if self.operator.trim().is_empty() || self.method.trim().is_empty() {
            return Err(ViewError::BadValue(
                "--operator and --method must not be empty (the audit trail needs who and how)"
                    .into(),
            ));
        }
        Ok(())
    }

    /// Records the sample for device `serial` (the store's only device
    /// when `None`), matched by wall-clock time (re-based for readings
    /// taken before the clock was set) to the nearest reading with a
    /// moisture and no flag that questions it ([`PAIR_UNUSABLE`]) within
    /// `match_within_s`; stored unmatched, with the reason, where there is
    /// none or where the reading nearest to the sample's time says the
    /// line was empty (a pair across an empty spell compares the sample
    /// with product from before or after it).
    ///
    /// # Errors
    /// [`ViewError`]: a bad value, an unclear device, a store failure.
    pub fn record(
        &self,
        store: &mut (impl RecordStore + ?Sized),
        serial: Option<&str>,
    ) -> Result<GrabRecorded, ViewError> {
        self.validate()?;
        let serial = only_device(store, serial)?;
        let readings = store.readings(&serial)?;
        let within = self.match_within_s * 1000;
        let nearest_of = |usable: &dyn Fn(&fringe_store::LoggedReading) -> bool| {
            readings
                .iter()
                .filter(|r| usable(r))
                .filter_map(|r| r.wall_ms.map(|t| (r, t)))
                .filter(|(_, t)| (t - self.time_ms).abs() <= within)
                .min_by_key(|(_, t)| (t - self.time_ms).abs())
        };
        let any = nearest_of(&|_| true);
        let usable = nearest_of(&|r| {
            r.reading.moisture_pct.is_some() && !r.reading.flags.intersects(PAIR_UNUSABLE)
        });
        let (matched, unmatched) = match (any, usable) {
            (Some((r, t)), _) if r.reading.flags.contains(Flags::NO_PRODUCT) => (
                None,
                Some(format!(
                    "the line was empty at that time (the nearest reading, {} at {}, is flagged no_product): a pair would compare the sample with product from before or after the empty spell; check the time entered",
                    r.reading.seq,
                    fmt_time(t)
                )),
            ),
            (_, Some(m)) => (Some(m), None),
            (Some((r, t)), None) => (
                None,
                Some(format!(
                    "no reading without a questioning flag within {} s (the nearest, {} at {}, is flagged {})",
                    self.match_within_s,
                    r.reading.seq,
                    fmt_time(t),
                    r.reading.flags.names().collect::<Vec<_>>().join("|")
                )),
            ),
            (None, None) => (
                None,
                Some(format!("no inline reading within {} s", self.match_within_s)),
            ),
        };
        let sample_id = self
            .sample_id
            .clone()
            .unwrap_or_else(|| format!("LAB-{}", fmt_time(self.time_ms)));
        let recorded = store.insert_lab_sample(
            &serial,
            &NewLabSample {
                sample_id: sample_id.clone(),
                taken_unix_ms: self.time_ms,
                product: None,
                lab_moisture_pct: self.moisture_pct,
                basis: self.basis.clone(),
                method: Some(self.method.clone()),
                reading: matched.map(|(r, _)| r.reading.seq),
                note: Some(format!("operator: {}", self.operator)),
                supersedes: self.supersedes,
            },
        )?;
        Ok(GrabRecorded {
            sample_id,
            serial,
            matched: matched.map(|(r, t)| (r.reading, t, r.rebased)),
            unmatched,
            recorded,
        })
    }
}

/// One monitor as `fringe drift --json` prints it.
pub fn trace_json(t: &Trace) -> serde_json::Value {
    let m = &t.monitor;
    json!({
        "quantity": m.quantity,
        "unit": m.quantity.unit(),
        "observations": t.obs.len(),
        "target": m.target,
        "sigma": m.sigma,
        "range": m.range,
        "cusum": { "k": m.cusum.k, "h": m.cusum.h, "arl0": m.cusum.arl(0.0, 64), "arl_1sigma": m.cusum.arl(1.0, 64) },
        "ewma": if m.range.is_none() {
            json!({ "lambda": m.ewma.lambda, "l": m.ewma.l, "arl0": m.ewma.arl(0.0, 120), "arl_1sigma": m.ewma.arl(1.0, 120) })
        } else { serde_json::Value::Null },
        "alarms": t.episodes().iter().map(alarm_json).collect::<Vec<_>>(),
    })
}

/// One alarm as `fringe drift --json` and `fringe monitor --json` print it:
/// its fields, the message for a person and both times in UTC.
pub fn alarm_json(a: &crate::drift::Alarm) -> serde_json::Value {
    let mut v = serde_json::to_value(a).unwrap_or_default();
    // The shift to 4 decimals of its unit and 2 of sigma, as the message
    // gives them to 3 and 1 (a mean of f32 readings carries no more).
    v["shift"] = json!((a.shift * 1e4).round() / 1e4);
    v["shift_sigma"] = json!((a.shift_sigma * 100.0).round() / 100.0);
    v["message"] = json!(a.message());
    v["since_utc"] = json!(fmt_time(a.since_ms));
    v["time_utc"] = json!(fmt_time(a.time_ms));
    v
}

/// Writes a drift summary of `data` for a person; returns the alarm count.
///
/// # Errors
/// I/O.
pub fn write_drift(
    data: &LineData,
    traces: &[Trace],
    w: &mut dyn std::io::Write,
) -> std::io::Result<usize> {
    let c = CusumParams::default();
    let e = EwmaParams::default();
    writeln!(
        w,
        "drift monitors of {} (CUSUM k {} h {}: in-control ARL {:.0}; EWMA lambda {} L {}: {:.0}):",
        data.serial,
        c.k,
        c.h,
        c.arl(0.0, 64),
        e.lambda,
        e.l,
        e.arl(0.0, 120)
    )?;
    let mut n = 0;
    for t in traces {
        let m = &t.monitor;
        let alarms = t.episodes();
        let what = match m.range {
            Some((lo, hi)) => format!("calibrated range {lo:.1}..{hi:.1} {}", m.quantity.unit()),
            None => format!("target {:.4} {}", m.target, m.quantity.unit()),
        };
        writeln!(
            w,
            "  {:<28} {:>5} obs, {what}, sigma {:.4}: {}",
            m.quantity.describe(),
            t.obs.len(),
            m.sigma,
            if alarms.is_empty() {
                "in control".to_string()
            } else {
                format!("{} alarm(s)", alarms.len())
            }
        )?;
        let scope = match m.quantity {
            Quantity::LabResidual => {
                let p = data.lab_chart_pairs();
                Some((
                    p.calibration,
                    p.other_calibrations,
                    ["pairs", "pair(s)"],
                    "product",
                ))
            }
            Quantity::EmptyBaseline => {
                let r = data.empty_chart_rows();
                Some((
                    r.calibration,
                    r.other_calibrations,
                    ["empty readings", "empty reading(s)"],
                    "cell",
                ))
            }
            Quantity::Temperature => {
                let r = data.temperature_chart_rows();
                Some((
                    r.calibration,
                    r.other_calibrations,
                    ["readings", "reading(s)"],
                    "product",
                ))
            }
            _ => None,
        };
        if let Some((Some(id), left_out @ 1.., [these, what], kind)) = scope {
            writeln!(
                w,
                "    (the {these} made under {id}, the {kind} calibration in force; {left_out} {what} made under earlier calibrations not charted)",
            )?;
        }
        for a in alarms {
            n += 1;
            writeln!(w, "    ALARM {}", a.message())?;
        }
    }
    Ok(n)
}

/// What `fringe drift --json` prints.
pub fn drift_json(data: &LineData, traces: &[Trace]) -> serde_json::Value {
    let pairs = data.lab_chart_pairs();
    let monitors: Vec<serde_json::Value> = traces
        .iter()
        .map(|t| {
            let mut v = trace_json(t);
            if t.monitor.quantity == Quantity::LabResidual {
                v["calibration"] = json!(pairs.calibration);
                v["under_other_calibrations"] = json!(pairs.other_calibrations);
            }
            if t.monitor.quantity == Quantity::EmptyBaseline {
                let rows = data.empty_chart_rows();
                v["calibration"] = json!(rows.calibration);
                v["under_other_calibrations"] = json!(rows.other_calibrations);
            }
            if t.monitor.quantity == Quantity::Temperature {
                let rows = data.temperature_chart_rows();
                v["calibration"] = json!(rows.calibration);
                v["under_other_calibrations"] = json!(rows.other_calibrations);
            }
            v
        })
        .collect();
    json!({ "serial": data.serial, "monitors": monitors })
}

/// All control charts of `traces` stacked in one SVG.
///
/// # Errors
/// A plotting failure.
pub fn drift_svg(traces: &[Trace]) -> Result<String, ViewError> {
    let mut parts = Vec::new();
    for t in traces.iter().filter(|t| !t.obs.is_empty()) {
        parts.push(
            plots::control_chart_svg(t, ChartKind::Cusum).map_err(|reason| ViewError::Draw {
                what: "the control charts",
                reason,
            })?,
        );
        if !t.ewma.is_empty() {
            parts.push(
                plots::control_chart_svg(t, ChartKind::Ewma).map_err(|reason| ViewError::Draw {
                    what: "the control charts",
                    reason,
                })?,
            );
        }
    }
    Ok(plots::combine_svgs(&parts, 1, (900, 280)))
}

/// Builds the report's input from a store.
///
/// # Errors
/// Store failure.
pub fn report_input(
    store: &(impl RecordRead + ?Sized),
    serial: Option<&str>,
    title: Option<&str>,
) -> Result<ReportInput, ViewError> {
    let data = analysis::load(store, serial)?;
    // Readings whose wall-clock time is not known (a boot whose clock was
    // never set, no clock event stored) are counted in the flag table, not
    // drawn: their time since boot put them in 1970, and the trend's axis
    // and the report's span reached over 56 years (found by review).
    let trend: Vec<TrendPoint> = data
        .rows
        .iter()
        .filter(|r| r.clock_known)
        .map(|r| TrendPoint {
            time_ms: r.time_ms,
            moisture_pct: r
                .reading
                .moisture_pct
                .map(f64::from)
                .filter(|m| m.is_finite()),
            uncertainty_pct: f64::from(r.reading.uncertainty_pct),
            temperature_c: Some(f64::from(r.reading.temperature_c)).filter(|t| t.is_finite()),
            flags: r.reading.flags - Flags::CLOCK_UNSET,
        })
        .collect();
    let lab: Vec<LabPoint> = data
        .lab
        .iter()
        .map(|l| LabPoint {
            time_ms: l.time_ms,
            moisture_pct: l.lab_pct,
        })
        .collect();
    let mut flag_counts: Vec<(String, u64)> = Vec::new();
    for (f, name) in Flags::NAMES {
        let n = data
            .rows
            .iter()
            .filter(|r| r.reading.flags.contains(f))
            .count() as u64;
        if n > 0 {
            flag_counts.push((name.to_string(), n));
        }
    }
    // Times: readings taken before the device clock was set are placed at
    // their re-based wall-clock time; those of a boot whose clock was never
    // set keep their time since boot.
    let rebased = data.rows.iter().filter(|r| r.rebased).count() as u64;
    if rebased > 0 {
        flag_counts.push((
            "clock_unset, re-based onto wall-clock time".to_string(),
            rebased,
        ));
    }
    let unknown = data.rows.iter().filter(|r| !r.clock_known).count() as u64;
    if unknown > 0 {
        flag_counts.push((
            "clock_unset, wall-clock time unknown (time since boot)".to_string(),
            unknown,
        ));
    }
    let mut calibrations = Vec::new();
    for kind in [CalKind::Cell, CalKind::Product, CalKind::Settings] {
        // The calibrations the readings carry (as the drift charts below
        // take them: a product pushed for later without activating it is
        // not in force; found by review), the latest record for settings.
        let in_force = match kind {
            CalKind::Cell => data.cell_in_force_id(),
            CalKind::Product => data.product_in_force_id(),
            _ => None,
        };
        let found = data
            .cals
            .iter()
            .rev()
            .find(|c| c.2 == kind && in_force.as_ref().is_none_or(|id| c.3.new_id == *id));
        if let Some((pos, created, _, body, name)) = found {
            let mut rows = vec![
                ("calibration id".to_string(), body.new_id.clone()),
                ("recorded (UTC)".to_string(), fmt_time(*created)),
                ("chain position".to_string(), pos.to_string()),
                ("operator".to_string(), body.operator.clone()),
                ("reason".to_string(), body.reason.clone()),
                ("replaced".to_string(), body.old_id.clone()),
            ];
            if let Some(s) = &body.statistics {
                rows.push((
                    "n / SEC / SEP (%)".into(),
                    format!("{} / {:.3} / {:.3}", s.n, s.sec, s.sep),
                ));
                rows.push((
                    "bias / slope / R^2 / RPD".into(),
                    format!(
                        "{:+.3} / {:.4} / {:.4} / {:.2}",
                        s.bias, s.slope, s.r2, s.rpd
                    ),
                ));
                rows.push(("cross-validation".into(), s.cross_validation.clone()));
            }
            if let Ok(cal) =
                serde_json::from_value::<fringe_protocol::ProductCal>(body.calibration.clone())
            {
                rows.push(("model".into(), format!("{:?}", cal.model)));
                rows.push((
                    "valid moisture (%)".into(),
                    format!("{:.2} .. {:.2}", cal.moisture_pct.min, cal.moisture_pct.max),
                ));
                rows.push((
                    "valid temperature (C)".into(),
                    format!(
                        "{:.1} .. {:.1}",
                        cal.temperature_c.min, cal.temperature_c.max
                    ),
                ));
            }
            if let Some(v) = &body.verification {
                rows.push(("verification".into(), v.clone()));
            }
            let head = match kind {
                CalKind::Cell => "Cell calibration".to_string(),
                CalKind::Product => {
                    format!("Product calibration {}", name.clone().unwrap_or_default())
                }
                CalKind::Settings => {
                    format!("Device settings {}", name.clone().unwrap_or_default())
                }
            };
            calibrations.push((head, rows));
        } else if let Some(id) = in_force {
            let head = match kind {
                CalKind::Cell => "Cell calibration",
                _ => "Product calibration",
            };
            calibrations.push((
                head.to_string(),
                vec![
                    ("calibration id".to_string(), id),
                    (
                        "record".to_string(),
                        "none in this database: the readings carry it (written by another tool or database)".to_string(),
                    ),
                ],
            ));
        }
    }
    let (p, h) = store.chain_head()?;
    Ok(ReportInput {
        title: title.map_or_else(
            || format!("Fringe line report: {}", data.serial),
            str::to_string,
        ),
        database: store.path().display().to_string(),
        span_ms: {
            let times = data
                .rows
                .iter()
                .filter(|r| r.clock_known)
                .map(|r| r.time_ms);
            times.clone().min().zip(times.max())
        },
        readings: data.rows.len() as u64,
        trend,
        lab,
        flag_counts,
        traces: data.traces(),
        calibrations,
        chain_head: Some((p, chain::hex(&h))),
    })
}

/// What fringe puts in every plot file it writes (after the root element,
/// where XML allows a comment), so that it knows its own files again.
pub const SVG_MARK: &str = "\n<!-- written by fringe -->\n";

/// The report page's mark (a `<meta>` in its head).
const HTML_MARK: &str = "<meta name=\"generator\" content=\"fringe\">";

/// Refuses to replace a file fringe did not write: a plant engineer's own
/// page or drawing of the same name is not overwritten (a report or a plot
/// of fringe's is, so a folder can be regenerated every shift). A path
/// that is not a plain file is refused too.
///
/// # Errors
/// [`ViewError::BadValue`] naming the file and the flag.
pub fn may_replace(path: &Path, flag: &str) -> Result<(), ViewError> {
    let meta = match std::fs::symlink_metadata(path) {
        Err(_) => return Ok(()),
        Ok(m) => m,
    };
    let ours = meta.is_file()
        && std::fs::read(path)
            .map(|b| {
                let text = String::from_utf8_lossy(&b);
                text.contains(SVG_MARK.trim()) || text.contains(HTML_MARK)
            })
            .unwrap_or(false);
    if ours {
        Ok(())
    } else {
        Err(ViewError::BadValue(format!(
            "{flag} {}: exists and was not written by fringe; nothing written (choose another name, or move that file)",
            path.display()
        )))
    }
}

/// Writes the report of `store` into `out` (replacing a report of
/// fringe's there, never another file).
///
/// # Errors
/// Store failure, a file there that fringe did not write, or a failed
/// write.
pub fn write_report(
    store: &(impl RecordRead + ?Sized),
    serial: Option<&str>,
    title: Option<&str>,
    out: &Path,
) -> Result<PathBuf, ViewError> {
    // Everything is drawn before anything is written.
    let input = report_input(store, serial, title)?;
    let html = report::render(&input).map_err(|reason| ViewError::Draw {
        what: "the report page",
        reason,
    })?;
    let trend = if input.trend.is_empty() {
        None
    } else {
        Some(
            plots::trend_svg("inline moisture", &input.trend, &input.lab).map_err(|reason| {
                ViewError::Draw {
                    what: "the trend",
                    reason,
                }
            })?,
        )
    };
    let drift = drift_svg(&input.traces)?;
    for name in ["index.html", "trend.svg", "drift.svg"] {
        may_replace(&out.join(name), "--out")?;
    }
    let write = |path: PathBuf, body: String| {
        crate::files::replace(&path, body.as_bytes())
            .map_err(|source| ViewError::Write { path, source })
    };
    std::fs::create_dir_all(out).map_err(|source| ViewError::Write {
        path: out.to_path_buf(),
        source,
    })?;
    let page = out.join("index.html");
    write(page.clone(), html)?;
    if let Some(svg) = trend {
        write(out.join("trend.svg"), svg + SVG_MARK)?;
    }
    write(out.join("drift.svg"), drift + SVG_MARK)?;
    Ok(page)
}

/// One calibration change of the history: the device, the record and its body.
pub type HistoryEntry = (String, fringe_store::StoredCalibration, CalRecordBody);

/// Every calibration change recorded for `serial` (every device when `None`).
///
/// # Errors
/// A store failure.
pub fn history(
    store: &(impl RecordRead + ?Sized),
    serial: Option<&str>,
) -> Result<Vec<HistoryEntry>, ViewError> {
    let serials: Vec<String> = match serial {
        Some(s) => vec![s.to_string()],
        None => store
            .devices()?
            .into_iter()
            .map(|d| d.record.serial)
            .collect(),
    };
    let mut all = Vec::new();
    for s in &serials {
        for c in store.calibrations(s)? {
            let body: CalRecordBody =
                serde_json::from_value(c.cal.body.clone()).unwrap_or_default();
            all.push((s.clone(), c, body));
        }
    }
    Ok(all)
}

/// The history as `fringe cal history --json` prints it: one object,
/// `records` the changes in chain order.
pub fn history_json(all: &[HistoryEntry]) -> serde_json::Value {
    let records = serde_json::Value::Array(
        all.iter()
            .map(|(s, c, b)| {
                json!({
                    "serial": s, "position": c.position, "time_utc": fmt_time(c.created_unix_ms), "kind": c.cal.kind,
                    "slot": c.cal.slot, "name": c.cal.name, "action": b.action, "old_id": b.old_id, "new_id": b.new_id,
                    "operator": b.operator, "reason": b.reason, "statistics": b.statistics, "verification": b.verification,
                })
            })
            .collect(),
    );
    json!({ "records": records })
}

/// What a change was, in words: `cell calibration`, `settings change`,
/// `product push`, `product select` (the kind alone is not said twice).
fn history_what(kind: &str, action: &str) -> String {
    match (kind, action) {
        ("cell", "cell") => "cell calibration".into(),
        ("settings", "settings") => "settings change".into(),
        (k, a) if k == a => k.into(),
        (k, a) => format!("{k} {a}"),
    }
}

/// Writes the history for a person, one line per change.
///
/// # Errors
/// A failed write.
pub fn write_history(all: &[HistoryEntry], db: &Path, w: &mut dyn Write) -> std::io::Result<()> {
    if all.is_empty() {
        writeln!(w, "no calibration change recorded in {}", db.display())?;
    }
    for (s, c, b) in all {
        writeln!(
            w,
            "{} {s} #{:<3} {:<17} {} -> {}{}{} by {}: {}",
            fmt_person(c.created_unix_ms),
            c.seq,
            history_what(c.cal.kind.as_str(), &b.action),
            b.old_id,
            b.new_id,
            c.cal.slot.map_or(String::new(), |x| format!(" slot {x}")),
            c.cal
                .name
                .as_deref()
                .filter(|n| !n.is_empty())
                .map_or(String::new(), |n| format!(" \"{n}\"")),
            b.operator,
            b.reason
        )?;
    }
    Ok(())
}

/// Writes an export summary for a person.
///
/// # Errors
/// A failed write.
pub fn write_export(s: &audit::ExportSummary, w: &mut dyn Write) -> std::io::Result<()> {
    let m = &s.manifest;
    writeln!(w, "wrote audit bundle {}", s.out.display())?;
    writeln!(
        w,
        "  range {}{} .. {}",
        fmt_person(m.from_ms),
        if s.from_first_record {
            " (the first record: no --from given)"
        } else {
            ""
        },
        fmt_person(m.to_ms)
    )?;
    writeln!(
        w,
        "  chain positions {}..={}, last hash {}",
        m.first_position, m.last_position, m.last_hash
    )?;
    for (t, n) in &m.records {
        writeln!(w, "  {t}: {n} records")?;
    }
    writeln!(
        w,
        "  calibrations in force: {} record(s), positions {:?}",
        s.calibrations_in_force.len(),
        s.calibrations_in_force
    )?;
    if let Some(ids) = m
        .calibrations_without_record
        .as_ref()
        .filter(|l| !l.is_empty())
    {
        writeln!(
            w,
            "  caution: the readings carry calibration(s) {} of which this database has no record (written to the device from another database or tool): the bundle cannot show their content; the manifest names them",
            ids.join(", ")
        )?;
    }
    for (t, n) in m.untimed_left_out.iter().flatten().filter(|(_, n)| **n > 0) {
        writeln!(
            w,
            "  {n} {t} without a wall-clock time (device clock never set in that boot, no clock event stored) left out: they lie in no range (`fringe export` without --from/--to writes them); the manifest counts them"
        )?;
    }
    writeln!(
        w,
        "  database chain head at export: position {}, {}",
        m.db_head_position, m.db_head_hash
    )?;
    Ok(())
}

/// Writes a verification report for a person.
///
/// # Errors
/// A failed write.
pub fn write_verify(
    r: &audit::VerifyReport,
    dir: Option<&Path>,
    db: Option<&Path>,
    w: &mut dyn Write,
) -> std::io::Result<()> {
    let what = match (dir, db) {
        (Some(d), Some(b)) => format!("bundle {} against {}", d.display(), b.display()),
        (Some(d), None) => format!("bundle {}", d.display()),
        (None, Some(b)) => format!("database {}", b.display()),
        (None, None) => "nothing".into(),
    };
    if r.ok() {
        writeln!(
            w,
            "verified {what}: {} records, no change, removal or reordering found",
            r.records_checked
        )?;
        if let Some((p, h)) = &r.bundle_last {
            writeln!(w, "  bundle ends at position {p}, hash {h}")?;
        }
    } else {
        writeln!(
            w,
            "{what}: {} problem(s) in {} records checked:",
            r.problems.len(),
            r.records_checked
        )?;
        for p in &r.problems {
            writeln!(w, "  {p}")?;
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    /// Readings of a boot whose clock was never set (no clock event
    /// stored) are left off the trend and out of the report's span; the
    /// flag table counts them. Boot 1: three readings 5 s apart from boot;
    /// boot 2: three on the wall clock (made-up readings).
    #[test]
    fn untimed_readings_are_left_off_the_report_span_and_trend() {
        use fringe_protocol::{Flags, Reading, Seq};
        use fringe_store::{DeviceInfo, Source};
        let t0 = 1_796_104_800_000u64;
        let mut rs: Vec<Reading> = (0..3)
            .map(|i| Reading {
                seq: Seq {
                    boot: 1,
                    counter: i,
                },
                time_ms: 5_000 * u64::from(i + 1),
                moisture_pct: Some(14.0),
                flags: Flags::CLOCK_UNSET,
                ..Reading::default()
            })
            .collect();
        rs.extend((0..3).map(|i| Reading {
            seq: Seq {
                boot: 2,
                counter: i,
            },
            time_ms: t0 + 60_000 * u64::from(i),
            moisture_pct: Some(14.0),
            ..Reading::default()
        }));
        let dir = tempfile::tempdir().unwrap();
        let mut store = fringe_sqlite::Store::open(dir.path().join("r.db")).unwrap();
        store
            .ensure_device(&DeviceInfo {
                serial: "L2".into(),
                ..Default::default()
            })
            .unwrap();
        store.insert_readings("L2", &rs, Source::Log).unwrap();
        let input = super::report_input(&store, None, None).unwrap();
        assert_eq!(input.span_ms, Some((t0 as i64, t0 as i64 + 120_000)));
        assert_eq!(input.trend.len(), 3);
        assert!(input.trend.iter().all(|p| p.time_ms >= t0 as i64));
        assert_eq!(input.readings, 6);
    }

    /// Grab samples are paired only with readings whose moisture nothing
    /// questions, and never across an empty spell; the time of the reading
    /// matched is said. A minute apart: valid 0..=4, empty 5..=9, one
    /// flagged density_missing at 15, valid 22..=26 (made-up readings;
    /// found by review: the nearest reading with any moisture was taken).
    #[test]
    fn a_grab_sample_is_paired_only_with_a_reading_nothing_questions() {
        use super::GrabSample;
        use fringe_protocol::{Flags, Reading, Seq};
        use fringe_store::{DeviceInfo, Source};
        let t0 = 1_796_104_800_000i64;
        let reading = |i: u32, flags: Flags| Reading {
            seq: Seq {
                boot: 1,
                counter: i,
            },
            time_ms: (t0 + i64::from(i) * 60_000) as u64,
            moisture_pct: (!flags.contains(Flags::NO_PRODUCT)).then_some(14.0),
            flags,
            ..Reading::default()
        };
        let mut rs: Vec<Reading> = (0..=4).map(|i| reading(i, Flags::empty())).collect();
        rs.extend((5..=9).map(|i| reading(i, Flags::NO_PRODUCT)));
        rs.push(reading(15, Flags::DENSITY_MISSING));
        rs.extend((22..=26).map(|i| reading(i, Flags::empty())));
        let dir = tempfile::tempdir().unwrap();
        let mut store = fringe_sqlite::Store::open(dir.path().join("l.db")).unwrap();
        store
            .ensure_device(&DeviceInfo {
                serial: "L2".into(),
                ..Default::default()
            })
            .unwrap();
        store.insert_readings("L2", &rs, Source::Stream).unwrap();
        let grab = |minute: i64, id: &str| GrabSample {
            time_ms: t0 + minute * 60_000 + 20_000,
            moisture_pct: 14.1,
            basis: "wet".into(),
            method: "oven".into(),
            operator: "test".into(),
            sample_id: Some(id.into()),
            match_within_s: 300,
            supersedes: None,
        };
        // In the empty spell (4 min 20 s from the last valid reading).
        let g = grab(7, "G-empty").record(&mut store, None).unwrap();
        assert!(g.matched.is_none());
        let why = g.unmatched.unwrap();
        assert!(why.contains("the line was empty at that time"), "{why}");
        // At the flagged reading, the valid ones 5 min or more away.
        let g = grab(15, "G-flag").record(&mut store, None).unwrap();
        assert!(g.matched.is_none());
        let why = g.unmatched.unwrap();
        assert!(why.contains("is flagged density_missing"), "{why}");
        // Beside valid readings: the nearest, 20 s away.
        let g = grab(23, "G-ok").record(&mut store, None).unwrap();
        let (r, t, _) = g.matched.expect("matched");
        assert_eq!(r.seq.counter, 23);
        assert_eq!(t - (t0 + 23 * 60_000 + 20_000), -20_000);
        assert!(g.unmatched.is_none());
    }

    #[test]
    fn history_says_the_kind_once_regression_cell_cell() {
        assert_eq!(super::history_what("cell", "cell"), "cell calibration");
        assert_eq!(
            super::history_what("settings", "settings"),
            "settings change"
        );
        assert_eq!(super::history_what("product", "push"), "product push");
    }
}
