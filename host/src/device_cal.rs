//! Calibration work with a connected device: `fringe cal cell`, `cal
//! capture`, `cal push`, `cal list`, `cal select`.
//!
//! Every change is written with the device key (HMAC write tag), read back
//! and checked by id, and recorded in the store's calibration table with
//! who, when, why, the old and the new id ([`CalRecordBody`]).

use std::io::{BufRead, Write as _};
use std::path::{Path, PathBuf};

use anyhow::{bail, Context as _};
use clap::Args;
use fringe_calibration::cell::{
    admittance_to_permittivity, two_point_calibration, verify as verify_cell, CellConstants,
};
use fringe_calibration::water::ReferenceLiquid;
use fringe_calibration::Cx;
use fringe_protocol::auth::Key;
use fringe_protocol::{CalId, CellCal, CellPoint, ProductCal, Reading, Request, Response, N_FREQ};
use serde_json::json;

use crate::analysis::CalRecordBody;
use crate::cli::PortArgs;
use crate::link::Link;
use crate::product_file::ProductFile;
use crate::samples::{write_samples, RefSample};
use crate::store::{CalKind, DeviceInfo, NewCalibration, Store};

/// The caution shown before any change to a device on a line.
pub const LINE_CAUTION: &str = "CAUTION: a new calibration changes the moisture value and the 4-20 mA output at once. \
If the sensor is on a running line, tell the control room first and put dependent loops (dryer control, \
diversion) in manual; do any work at the sensor itself only with the line stopped, isolated and locked out \
under your site's procedure. Local codes and site rules come first.";

/// Where the device key comes from.
#[derive(Debug, Clone, Args)]
pub struct KeyArgs {
    /// File holding the device's write key as 64 hex digits (keep it like a password).
    #[arg(long, value_name = "FILE")]
    pub key_file: PathBuf,
}

/// Reads a key file.
///
/// # Errors
/// Unreadable file or not 64 hex digits.
pub fn load_key(path: &Path) -> anyhow::Result<Key> {
    let text = std::fs::read_to_string(path)
        .with_context(|| format!("reading key file {}", path.display()))?;
    let hex: String = text.split_whitespace().collect();
    if hex.len() != 64 {
        bail!(
            "{}: a device key is 64 hex digits, found {} characters",
            path.display(),
            hex.len()
        );
    }
    let mut key = [0u8; 32];
    for (i, k) in key.iter_mut().enumerate() {
        *k = u8::from_str_radix(&hex[2 * i..2 * i + 2], 16)
            .map_err(|_| anyhow::anyhow!("{}: not hex at digit {}", path.display(), 2 * i + 1))?;
    }
    Ok(key)
}

/// `fringe cal cell`.
#[derive(Debug, Clone, Args)]
#[command(
    after_help = "Example:\n  fringe cal cell --port /dev/ttyUSB0 --key-file hgm-l2-0007.key --db line2.db \\\n      --liquid methanol --verify-liquid ethanol --temperature-c 21.4 --operator \"R. Okafor\""
)]
pub struct CellArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// The key.
    #[command(flatten)]
    pub key: KeyArgs,
    /// Database that records the calibration.
    #[arg(long, value_name = "FILE")]
    pub db: PathBuf,
    /// Reference liquid for the second point (from the calibration crate's table).
    #[arg(long, default_value = "methanol")]
    pub liquid: String,
    /// A further liquid to verify with.
    #[arg(long, default_value = "ethanol")]
    pub verify_liquid: String,
    /// Liquid temperature, C, measured with a thermometer [default: the device's temperature reading].
    #[arg(long)]
    pub temperature_c: Option<f64>,
    /// Readings averaged per step.
    #[arg(long, default_value_t = 8, value_parser = clap::value_parser!(u32).range(1..=200))]
    pub readings: u32,
    /// Who does the calibration.
    #[arg(long)]
    pub operator: String,
    /// Do not ask before writing.
    #[arg(long)]
    pub yes: bool,
}

/// `fringe cal capture`.
#[derive(Debug, Clone, Args)]
#[command(after_help = "Example:\n  fringe cal capture --port /dev/ttyUSB0 --out lab-2026-11.csv")]
pub struct CaptureArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// Reference-sample table to write (appended to if it exists).
    #[arg(long, value_name = "FILE.csv")]
    pub out: PathBuf,
    /// Readings averaged per sample.
    #[arg(long, default_value_t = 5, value_parser = clap::value_parser!(u32).range(1..=200))]
    pub readings: u32,
}

/// `fringe cal push`.
#[derive(Debug, Clone, Args)]
#[command(
    after_help = "Example:\n  fringe cal push --port /dev/ttyUSB0 --key-file hgm-l2-0007.key --db line2.db \\\n      --cal wheat-l2.toml --operator \"R. Okafor\" --reason \"new wheat crop, 40 samples\""
)]
pub struct PushArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// The key.
    #[command(flatten)]
    pub key: KeyArgs,
    /// Product calibration (TOML from `fringe cal fit`).
    #[arg(long, value_name = "PRODUCT.toml")]
    pub cal: PathBuf,
    /// Database that records the change.
    #[arg(long, value_name = "FILE")]
    pub db: PathBuf,
    /// Product slot [default: the slot holding this product name, else the first free one].
    #[arg(long, value_parser = clap::value_parser!(u8).range(0..8))]
    pub slot: Option<u8>,
    /// Who makes the change.
    #[arg(long)]
    pub operator: String,
    /// Why.
    #[arg(long)]
    pub reason: String,
    /// Make it the active product too.
    #[arg(long, default_value_t = true, action = clap::ArgAction::Set)]
    pub activate: bool,
    /// Do not ask for confirmation.
    #[arg(long)]
    pub yes: bool,
    /// Push even if the calibration fails the quality gate (RPD < 2, R^2 < 0.8,
    /// fewer than 5 samples per parameter); the override is kept in the audit record.
    #[arg(long)]
    pub force: bool,
}

/// `cal push`'s quality gate on a calibration file: the refusals to record
/// when `force` overrides them.
///
/// # Errors
/// [`fringe_quality::cal::GateRefused`] when the file fails the gate and `force` is off.
pub fn push_gate(path: &Path, file: &ProductFile, force: bool) -> anyhow::Result<Vec<String>> {
    let refusals = fringe_quality::cal::gate_of_file(&file.statistics);
    if !refusals.is_empty() && !force {
        return Err(fringe_quality::cal::GateRefused {
            what: path.display().to_string(),
            refusals,
        }
        .into());
    }
    Ok(refusals
        .into_iter()
        .map(|r| format!("at push (--force): {r}"))
        .collect())
}

/// `fringe cal list`.
#[derive(Debug, Clone, Args)]
pub struct ListArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// Print JSON.
    #[arg(long)]
    pub json: bool,
}

/// `fringe cal select`.
#[derive(Debug, Clone, Args)]
#[command(
    after_help = "Example:\n  fringe cal select --port /dev/ttyUSB0 --key-file k.key --db line2.db \"HM barley L2\" --operator \"R. Okafor\" --reason \"product change\""
)]
pub struct SelectArgs {
    /// The device.
    #[command(flatten)]
    pub port: PortArgs,
    /// The key.
    #[command(flatten)]
    pub key: KeyArgs,
    /// Database that records the change.
    #[arg(long, value_name = "FILE")]
    pub db: PathBuf,
    /// Product name or slot number.
    pub product: String,
    /// Who makes the change.
    #[arg(long)]
    pub operator: String,
    /// Why.
    #[arg(long)]
    pub reason: String,
    /// Do not ask for confirmation.
    #[arg(long)]
    pub yes: bool,
}

/// How a guided procedure talks to the person (or to the simulated world).
pub trait Guide {
    /// Shows an instruction and waits until the person has done it.
    ///
    /// # Errors
    /// The person cancelled.
    fn step(&mut self, instruction: &str) -> anyhow::Result<()>;
    /// Asks a question; `None` for an empty answer.
    ///
    /// # Errors
    /// The person cancelled.
    fn ask(&mut self, question: &str) -> anyhow::Result<Option<String>>;
    /// Asks for a yes/no confirmation.
    ///
    /// # Errors
    /// The person cancelled.
    fn confirm(&mut self, question: &str) -> anyhow::Result<bool>;
}

/// A person at a terminal.
#[derive(Debug, Default)]
pub struct Terminal;

impl Guide for Terminal {
    fn step(&mut self, instruction: &str) -> anyhow::Result<()> {
        eprint!("{instruction}\n  press Enter when done (Ctrl-C to stop) ");
        let mut s = String::new();
        if std::io::stdin().lock().read_line(&mut s)? == 0 {
            bail!("stopped: no more input");
        }
        Ok(())
    }
    fn ask(&mut self, question: &str) -> anyhow::Result<Option<String>> {
        eprint!("{question} ");
        std::io::stderr().flush()?;
        let mut s = String::new();
        if std::io::stdin().lock().read_line(&mut s)? == 0 {
            bail!("stopped: no more input");
        }
        let t = s.trim();
        Ok((!t.is_empty()).then(|| t.to_string()))
    }
    fn confirm(&mut self, question: &str) -> anyhow::Result<bool> {
        Ok(matches!(
            self.ask(&format!("{question} [y/N]"))?.as_deref(),
            Some("y" | "Y" | "yes")
        ))
    }
}

/// Mean admittances (S) and permittivities per frequency, mean temperature
/// (C), and the last reading.
pub type Averaged = ([Cx<f64>; N_FREQ], [Cx<f64>; N_FREQ], f64, Reading);

/// Averages `n` readings (Measure requests) into admittances per frequency
/// and the mean temperature.
///
/// # Errors
/// Link errors, or no reading with finite values.
pub fn averaged_reading(link: &mut Link, n: u32) -> anyhow::Result<Averaged> {
    let mut y = [Cx::new(0.0, 0.0); N_FREQ];
    let mut eps = [Cx::new(0.0, 0.0); N_FREQ];
    let mut t = 0.0;
    let mut last = None;
    for _ in 0..n {
        let r = match link.request(Request::Measure)? {
            Response::Reading(r) => r,
            other => bail!("device answered Measure with {other:?}"),
        };
        for k in 0..N_FREQ {
            y[k] += Cx::new(f64::from(r.channels[k].g_s), f64::from(r.channels[k].b_s));
            eps[k] += Cx::new(
                f64::from(r.channels[k].eps_re),
                f64::from(r.channels[k].eps_im),
            );
        }
        t += f64::from(r.temperature_c);
        last = Some(r);
    }
    let n = f64::from(n);
    let last = last.ok_or_else(|| anyhow::anyhow!("no reading"))?;
    Ok((y.map(|v| v / n), eps.map(|v| v / n), t / n, last))
}

/// Refuses a liquid outside the temperatures where its table value holds.
fn check_temperature(l: &ReferenceLiquid, t_c: f64, measured_by: &str) -> anyhow::Result<()> {
    if l.valid_at(t_c) {
        return Ok(());
    }
    bail!(
        "{} at {t_c:.1} C ({measured_by}) is outside {:.0}..{:.0} C, where its table value holds; \
         bring it to room temperature and repeat (nothing was written)",
        l.name,
        l.valid_c.0,
        l.valid_c.1
    )
}

fn liquid(name: &str) -> anyhow::Result<&'static ReferenceLiquid> {
    ReferenceLiquid::by_name(name).ok_or_else(|| {
        anyhow::anyhow!(
            "no reference liquid `{name}`; known: {}",
            fringe_calibration::water::REFERENCE_LIQUIDS
                .iter()
                .map(|l| l.name)
                .collect::<Vec<_>>()
                .join(", ")
        )
    })
}

/// Result of a cell calibration.
#[derive(Debug, Clone)]
pub struct CellOutcome {
    /// What was written.
    pub cal: CellCal,
    /// Verification: (frequency, measured eps', expected eps', error, within tolerance).
    pub verification: Vec<(f64, f64, f64, f64, bool)>,
    /// Old id.
    pub old: CalId,
}

/// The guided cell calibration (air, a reference liquid, a verification liquid).
///
/// # Errors
/// Link, calibration or store failures; a refused confirmation.
#[allow(clippy::too_many_arguments)]
pub fn cell_calibration(
    link: &mut Link,
    key: &Key,
    store: &mut Store,
    guide: &mut dyn Guide,
    a: &CellArgs,
    now_s: u64,
    progress: &mut dyn FnMut(&str),
) -> anyhow::Result<CellOutcome> {
    let liq = liquid(&a.liquid)?;
    let ver = liquid(&a.verify_liquid)?;
    let id = link
        .identity()
        .cloned()
        .ok_or_else(|| anyhow::anyhow!("no identity"))?;
    guide.step(
        "Step 1/3: clean and dry the sensor window and leave it facing air (nothing within 10 cm).",
    )?;
    let (y_air, _, t_air, _) = averaged_reading(link, a.readings)?;
    progress(&format!(
        "air: averaged {} readings at {:.1} C",
        a.readings, t_air
    ));
    let air = liquid("air")?;
    check_temperature(air, t_air, "the device's temperature reading")?;
    guide.step(&format!(
        "Step 2/3: fill the bench cell with {} (fresh, dry; fume cupboard, no ignition sources, gloves and goggles per its safety data sheet).",
        liq.name
    ))?;
    let (y_liq, _, t_dev, _) = averaged_reading(link, a.readings)?;
    let t_liq = a.temperature_c.unwrap_or(t_dev);
    let by = if a.temperature_c.is_some() {
        "--temperature-c"
    } else {
        "the device's temperature reading"
    };
    check_temperature(liq, t_liq, by)?;
    let eps_liq = liq.permittivity(t_liq);
    progress(&format!(
        "{}: eps' {:.3} at {:.1} C ({})",
        liq.name, eps_liq, t_liq, liq.source
    ));
    let mut points = [CellPoint::default(); N_FREQ];
    let mut consts = Vec::new();
    for k in 0..N_FREQ {
        let f = f64::from(id.freqs_hz[k]);
        let c = two_point_calibration(f, y_air[k], air.permittivity(t_air), y_liq[k], eps_liq)
            .map_err(|e| anyhow::anyhow!("cell calibration at {f} Hz failed: {e:?}"))?;
        points[k] = CellPoint {
            freq_hz: f as f32,
            stray_pf: c.stray_pf as f32,
            cell_pf: c.cell_pf as f32,
            g_offset_s: c.g_offset_s as f32,
        };
        consts.push(c);
        progress(&format!(
            "{:>6.1} MHz: stray {:.4} pF, cell {:.4} pF, G0 {:.3e} S",
            f / 1e6,
            c.stray_pf,
            c.cell_pf,
            c.g_offset_s
        ));
    }
    guide.step(&format!(
        "Step 3/3 (verification): empty and dry the cell, fill it with {}.",
        ver.name
    ))?;
    let (y_ver, _, t_ver_dev, _) = averaged_reading(link, a.readings)?;
    let t_ver = a.temperature_c.unwrap_or(t_ver_dev);
    check_temperature(ver, t_ver, by)?;
    let mut verification = Vec::new();
    for k in 0..N_FREQ {
        let f = f64::from(id.freqs_hz[k]);
        let v = verify_cell(
            f,
            y_ver[k],
            &consts[k],
            ver.permittivity(t_ver),
            ver.tolerance,
        )
        .map_err(|e| anyhow::anyhow!("verification at {f} Hz failed: {e:?}"))?;
        verification.push((
            f,
            v.measured.re,
            v.expected_re,
            v.error_re,
            v.within_tolerance,
        ));
        progress(&format!(
            "verify {} at {:.1} MHz: measured eps' {:.3}, expected {:.3}, error {:+.3} ({:+.2} %): {}",
            ver.name,
            f / 1e6,
            v.measured.re,
            v.expected_re,
            v.error_re,
            v.relative_error * 100.0,
            if v.within_tolerance { "within tolerance" } else { "OUT OF TOLERANCE" }
        ));
    }
    if verification.iter().any(|v| !v.4) {
        bail!("verification with {} is out of its tolerance ({}); nothing written: check the liquids' purity and temperature and repeat", ver.name, ver.tolerance);
    }
    guide.step(
        "Empty, clean and dry the cell; leave the window facing air for the reference check.",
    )?;
    let reference_ratio = match link.request(Request::ReferenceCheck)? {
        Response::RefCheck(r) => (r.ratio[0] + r.ratio[1]) / 2.0,
        other => bail!("device answered ReferenceCheck with {other:?}"),
    };
    let cal = CellCal {
        points,
        reference_ratio,
        made_s: now_s,
    };
    let old = match link.request(Request::ReadCellCal)? {
        Response::CellCal(c) => c.map_or(CalId::NONE, |c| c.content_id()),
        _ => CalId::NONE,
    };
    eprintln!("{LINE_CAUTION}");
    if !a.yes
        && !guide.confirm(&format!(
            "write cell calibration {} (replacing {old}) to {}?",
            cal.content_id(),
            id.serial
        ))?
    {
        bail!("not written (not confirmed)");
    }
    link.request_signed(Request::WriteCellCal(cal), key)?;
    let back = match link.request(Request::ReadCellCal)? {
        Response::CellCal(Some(c)) => c,
        other => bail!("read-back after writing gave {other:?}"),
    };
    if back.content_id() != cal.content_id() {
        bail!(
            "read-back id {} differs from the written {}: the device did not store it",
            back.content_id(),
            cal.content_id()
        );
    }
    let words = verification
        .iter()
        .map(|v| {
            format!(
                "{} at {:.1} MHz: eps' {:.3} vs {:.3} ({:+.3})",
                ver.name,
                v.0 / 1e6,
                v.1,
                v.2,
                v.3
            )
        })
        .collect::<Vec<_>>()
        .join("; ");
    record(
        store,
        &id.serial,
        CalKind::Cell,
        cal.content_id(),
        None,
        None,
        CalRecordBody {
            calibration: serde_json::to_value(cal)?,
            operator: a.operator.clone(),
            reason: format!(
                "bench cell calibration: air + {} at {:.1} C",
                liq.name, t_liq
            ),
            old_id: old.to_string(),
            new_id: cal.content_id().to_string(),
            action: "cell".into(),
            statistics: None,
            verification: Some(words),
            parent_id: None,
            derivation: None,
        },
    )?;
    Ok(CellOutcome {
        cal,
        verification,
        old,
    })
}

/// Records a calibration change.
///
/// # Errors
/// Store failure.
pub fn record(
    store: &mut Store,
    serial: &str,
    kind: CalKind,
    id: CalId,
    slot: Option<u8>,
    name: Option<String>,
    body: CalRecordBody,
) -> anyhow::Result<u64> {
    store.ensure_device(&DeviceInfo {
        serial: serial.to_string(),
        ..Default::default()
    })?;
    let note = Some(format!(
        "{} by {}: {}",
        body.action, body.operator, body.reason
    ));
    let r = store.insert_calibration(
        serial,
        &NewCalibration {
            kind,
            cal_id: id,
            slot,
            name,
            body: serde_json::to_value(&body)?,
            note,
            supersedes: None,
        },
    )?;
    Ok(r.position)
}

/// One captured sample from the device: averaged permittivities and temperature.
///
/// # Errors
/// Link errors or an uncalibrated cell (NaN permittivity).
pub fn capture_sample(
    link: &mut Link,
    id: &str,
    moisture_pct: Option<f64>,
    n: u32,
) -> anyhow::Result<RefSample> {
    let ident = link
        .identity()
        .cloned()
        .ok_or_else(|| anyhow::anyhow!("no identity"))?;
    let (_, eps, t, _) = averaged_reading(link, n)?;
    if eps.iter().any(|e| !e.re.is_finite() || !e.im.is_finite()) {
        bail!("the device reports no permittivity: calibrate the cell first (fringe cal cell)");
    }
    Ok(RefSample {
        sample_id: id.to_string(),
        moisture_pct,
        temperature_c: t,
        freqs_hz: [f64::from(ident.freqs_hz[0]), f64::from(ident.freqs_hz[1])],
        eps_re: [eps[0].re, eps[1].re],
        eps_im: [eps[0].im.max(0.0), eps[1].im.max(0.0)],
        line: 0,
    })
}

/// `fringe cal capture`: asks for each sample's id and lab moisture.
///
/// # Errors
/// Link or file failures.
pub fn capture(link: &mut Link, a: &CaptureArgs, guide: &mut dyn Guide) -> anyhow::Result<usize> {
    let mut rows: Vec<RefSample> = Vec::new();
    loop {
        let Some(id) = guide.ask("sample id (empty to finish):")? else {
            break;
        };
        if rows.iter().any(|r| r.sample_id == id) {
            eprintln!("sample id {id} already captured; use another");
            continue;
        }
        let m = guide.ask("lab moisture, % wet basis (empty to fill in later):")?;
        let m = match m.map(|s| s.parse::<f64>()) {
            Some(Ok(v)) if (0.0..100.0).contains(&v) => Some(v),
            Some(_) => {
                eprintln!("not a moisture in % (0-100); left empty, fill it in the CSV later");
                None
            }
            None => None,
        };
        guide.step(&format!("place sample {id} in front of the window (fill the sample cup level, same packing as on the line)"))?;
        let s = capture_sample(link, &id, m, a.readings)?;
        eprintln!(
            "  {id}: {:.1} C, eps1 {:.3} - j{:.3}, eps2 {:.3} - j{:.3}",
            s.temperature_c, s.eps_re[0], s.eps_im[0], s.eps_re[1], s.eps_im[1]
        );
        rows.push(s);
        save_rows(&a.out, &rows)?;
    }
    Ok(rows.len())
}

/// Writes the captured rows after those already in `path` (rewritten whole
/// through a temporary file so an interruption loses nothing).
///
/// # Errors
/// File failures, or an existing file that is not a sample table.
pub fn save_rows(path: &Path, rows: &[RefSample]) -> anyhow::Result<()> {
    let mut all = Vec::new();
    if path.exists() {
        all = crate::samples::read_samples(path, crate::samples::MoistureColumn::Optional)?.samples;
        all.retain(|s| !rows.iter().any(|r| r.sample_id == s.sample_id));
    }
    all.extend(rows.iter().cloned());
    let tmp = path.with_extension("csv.part");
    let f = std::fs::File::create(&tmp).with_context(|| format!("creating {}", tmp.display()))?;
    write_samples(f, &all)?;
    std::fs::rename(&tmp, path).with_context(|| format!("writing {}", path.display()))?;
    Ok(())
}

/// Slot list as (slot, name, id, model) and the active slot.
///
/// # Errors
/// Link failure.
pub fn list_slots(link: &mut Link) -> anyhow::Result<(Vec<fringe_protocol::SlotInfo>, Option<u8>)> {
    match link.request(Request::ListProducts)? {
        Response::Products { slots, active } => Ok((slots.to_vec(), active)),
        other => bail!("device answered ListProducts with {other:?}"),
    }
}

/// Result of a push.
#[derive(Debug, Clone)]
pub struct PushOutcome {
    /// Slot written.
    pub slot: u8,
    /// Id before (in that slot).
    pub old: CalId,
    /// Id written and read back.
    pub new: CalId,
    /// Chain position of the audit record.
    pub position: u64,
}

/// `fringe cal push` core.
///
/// # Errors
/// Link, file or store failures; not confirmed; read-back mismatch.
#[allow(clippy::too_many_arguments)]
pub fn push(
    link: &mut Link,
    key: &Key,
    store: &mut Store,
    guide: &mut dyn Guide,
    file: &ProductFile,
    wire: &ProductCal,
    slot: Option<u8>,
    activate: bool,
    operator: &str,
    reason: &str,
    yes: bool,
) -> anyhow::Result<PushOutcome> {
    if operator.trim().is_empty() || reason.trim().is_empty() {
        bail!("--operator and --reason must not be empty (the audit record needs who and why)");
    }
    let serial = link.serial_number().to_string();
    if let (Some(want), Some(id)) = (file.source.freqs_hz, link.identity()) {
        let dev = id.freqs_hz.map(f64::from);
        if !crate::product_file::same_freqs(dev, want) {
            bail!(
                "{} holds only at {} and {} Hz (its reference samples' frequencies), but {serial} measures at {} and {} Hz: \
                 capture reference samples on this sensor and fit again; nothing written",
                file.name,
                want[0],
                want[1],
                dev[0],
                dev[1]
            );
        }
    }
    let (slots, active) = list_slots(link)?;
    let slot = slot
        .or_else(|| {
            slots
                .iter()
                .find(|s| s.name.as_str() == wire.name.as_str())
                .map(|s| s.slot)
        })
        .or_else(|| {
            (0..fringe_protocol::N_PRODUCT_SLOTS as u8)
                .find(|i| !slots.iter().any(|s| s.slot == *i))
        })
        .ok_or_else(|| {
            anyhow::anyhow!(
                "all {} product slots are in use; choose one with --slot",
                fringe_protocol::N_PRODUCT_SLOTS
            )
        })?;
    let old_cal = match link.request(Request::ReadProductCal { slot })? {
        Response::ProductCal { cal, .. } => cal,
        _ => None,
    };
    let old = old_cal.as_ref().map_or(CalId::NONE, ProductCal::content_id);
    let new = wire.content_id();
    eprintln!(
        "device {serial}, slot {slot}{}:",
        if active == Some(slot) {
            " (active)"
        } else {
            ""
        }
    );
    match &old_cal {
        Some(o) => eprintln!(
            "  old: {} {:?} id {old}, moisture {:.2}..{:.2} %, temperature {:.1}..{:.1} C",
            o.name,
            o.model,
            o.moisture_pct.min,
            o.moisture_pct.max,
            o.temperature_c.min,
            o.temperature_c.max
        ),
        None => eprintln!("  old: (empty)"),
    }
    eprintln!(
        "  new: {} {:?} id {new}, moisture {:.2}..{:.2} %, temperature {:.1}..{:.1} C, SEC {:.3} %, SEP {:.3} % (n {})",
        wire.name, wire.model, wire.moisture_pct.min, wire.moisture_pct.max, wire.temperature_c.min, wire.temperature_c.max,
        wire.sec_pct, file.statistics.sep, file.statistics.n
    );
    eprintln!("{LINE_CAUTION}");
    if !yes && !guide.confirm("write this calibration?")? {
        bail!("not written (not confirmed)");
    }
    link.request_signed(
        Request::WriteProductCal {
            slot,
            cal: wire.clone(),
        },
        key,
    )?;
    let back = match link.request(Request::ReadProductCal { slot })? {
        Response::ProductCal { cal: Some(c), .. } => c,
        other => bail!("read-back of slot {slot} gave {other:?}"),
    };
    if back.content_id() != new {
        bail!(
            "read-back id {} differs from the written {new}: the device did not store it",
            back.content_id()
        );
    }
    if activate && active != Some(slot) {
        link.request_signed(Request::SelectProduct { slot }, key)?;
    }
    let position = record(
        store,
        &serial,
        CalKind::Product,
        new,
        Some(slot),
        Some(wire.name.to_string()),
        CalRecordBody {
            calibration: serde_json::to_value(wire)?,
            operator: operator.into(),
            reason: reason.into(),
            old_id: old.to_string(),
            new_id: new.to_string(),
            action: "push".into(),
            statistics: Some(file.statistics.clone()),
            verification: Some(format!("read back from slot {slot}: id {new}")),
            parent_id: file.source.parent_id.clone(),
            derivation: file.source.derivation.clone(),
        },
    )?;
    Ok(PushOutcome {
        slot,
        old,
        new,
        position,
    })
}

/// `fringe cal select` core: makes `product` (name or slot) active.
///
/// # Errors
/// Link or store failure; unknown product; not confirmed.
#[allow(clippy::too_many_arguments)]
pub fn select(
    link: &mut Link,
    key: &Key,
    store: &mut Store,
    guide: &mut dyn Guide,
    product: &str,
    operator: &str,
    reason: &str,
    yes: bool,
) -> anyhow::Result<(u8, CalId)> {
    let serial = link.serial_number().to_string();
    let (slots, active) = list_slots(link)?;
    let s = slots
        .iter()
        .find(|s| s.name.as_str() == product || product.parse::<u8>().ok() == Some(s.slot))
        .ok_or_else(|| {
            anyhow::anyhow!("no product `{product}` on {serial}; `fringe cal list` shows the slots")
        })?
        .clone();
    let old = active
        .and_then(|a| slots.iter().find(|x| x.slot == a))
        .map_or(CalId::NONE, |x| x.id);
    eprintln!(
        "switch {serial} from {old} to {} ({} in slot {})",
        s.id, s.name, s.slot
    );
    eprintln!("{LINE_CAUTION}");
    if !yes && !guide.confirm("switch the active product?")? {
        bail!("not switched (not confirmed)");
    }
    link.request_signed(Request::SelectProduct { slot: s.slot }, key)?;
    let (_, now_active) = list_slots(link)?;
    if now_active != Some(s.slot) {
        bail!("the device still reports slot {now_active:?} active");
    }
    record(
        store,
        &serial,
        CalKind::Product,
        s.id,
        Some(s.slot),
        Some(s.name.to_string()),
        CalRecordBody {
            calibration: match link.request(Request::ReadProductCal { slot: s.slot })? {
                Response::ProductCal { cal: Some(c), .. } => serde_json::to_value(c)?,
                _ => serde_json::Value::Null,
            },
            operator: operator.into(),
            reason: reason.into(),
            old_id: old.to_string(),
            new_id: s.id.to_string(),
            action: "select".into(),
            statistics: None,
            verification: Some(format!("device reports slot {} active", s.slot)),
            parent_id: None,
            derivation: None,
        },
    )?;
    Ok((s.slot, s.id))
}

/// Prints the slot list.
pub fn print_slots(
    slots: &[fringe_protocol::SlotInfo],
    active: Option<u8>,
    as_json: bool,
) -> anyhow::Result<()> {
    if as_json {
        let v: Vec<_> = slots
            .iter()
            .map(|s| json!({"slot": s.slot, "name": s.name.as_str(), "id": s.id.to_string(), "model": format!("{:?}", s.model), "active": active == Some(s.slot)}))
            .collect();
        crate::outln!("{}", json!({ "slots": v, "active": active }));
        return Ok(());
    }
    if slots.is_empty() {
        crate::outln!("no product calibration on the device");
    }
    for s in slots {
        crate::outln!(
            "{} slot {} {:<16} {} {:?}",
            if active == Some(s.slot) { "*" } else { " " },
            s.slot,
            s.name.as_str(),
            s.id,
            s.model
        );
    }
    Ok(())
}

/// Permittivity of an admittance with a cell, for the demo's checks.
pub fn eps_of(freq_hz: f64, y: Cx<f64>, c: &CellConstants<f64>) -> Option<Cx<f64>> {
    admittance_to_permittivity(freq_hz, y, c).ok()
}
