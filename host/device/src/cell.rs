//! The guided bench cell calibration (`fringe cal cell`): air, a reference
//! liquid, a verification with a further liquid; written to the device
//! only when everything checked out, read back by id, and recorded.

use fringe_calibration::cell::{two_point_calibration, verify as verify_cell};
use fringe_calibration::water::ReferenceLiquid;
use fringe_link::{Link, LinkError};
use fringe_protocol::auth::Key;
use fringe_protocol::{CalId, CellCal, CellPoint, Request, Response, N_FREQ};
use fringe_quality::analysis::CalRecordBody;
use fringe_quality::numbers::signed;
use fringe_quality::product_file::hz_label;
use fringe_store::{CalKind, RecordStore, StoreError};

use crate::guide::{Cancelled, Guide};
use crate::landed::{write_checked, Checked, NotTaken, Unconfirmed, WriteFailed};
use crate::measure::averaged_reading;
use crate::record::record;
use crate::LINE_CAUTION;

/// How the cell calibration is made.
#[derive(Debug, Clone, PartialEq)]
pub struct CellOptions {
    /// Reference liquid for the second point (from the reference-liquid table).
    pub liquid: String,
    /// A further liquid to verify with.
    pub verify_liquid: String,
    /// Liquid temperature from a thermometer, C (else the device's reading).
    pub temperature_c: Option<f64>,
    /// The verification liquid's temperature from a thermometer, C (else
    /// `temperature_c`, else the device's reading).
    pub verify_temperature_c: Option<f64>,
    /// Readings averaged per step.
    pub readings: u32,
    /// Who does the calibration.
    pub operator: String,
    /// Write without asking.
    pub yes: bool,
    /// When it is made, s since the Unix epoch (kept on the device).
    pub made_s: u64,
}

/// Why a cell calibration stopped; nothing was written to the device
/// unless the error says so.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum CellError {
    /// The link failed.
    #[error("{0}")]
    Link(#[from] LinkError),
    /// Who is missing.
    #[error(
        "--operator must not be empty (the audit record needs who); nothing measured or written"
    )]
    NoOperator,
    /// The record could not be stored (the device holds the new calibration).
    #[error("the device holds the new cell calibration, but its record could not be stored: {0}")]
    Store(#[from] StoreError),
    /// Not known whether the device took the write (it answered neither
    /// the write nor the question after it); nothing recorded.
    #[error(transparent)]
    Unconfirmed(#[from] Unconfirmed),
    /// No answer came, and the device did not take the write.
    #[error(transparent)]
    NotTaken(#[from] NotTaken),
    /// The person stopped.
    #[error("{0}")]
    Cancelled(#[from] Cancelled),
    /// No such liquid in the table.
    #[error("no reference liquid `{name}`; known: {known}")]
    UnknownLiquid {
        /// The name given.
        name: String,
        /// The table's names.
        known: String,
    },
    /// A liquid outside the temperatures where its table value holds.
    #[error("{liquid} at {t_c:.1} C ({measured_by}) is outside {lo:.0}..{hi:.0} C, where its table value holds; bring it to room temperature and repeat (nothing was written)")]
    Temperature {
        /// The liquid.
        liquid: &'static str,
        /// Its temperature, C.
        t_c: f64,
        /// Where the temperature came from.
        measured_by: &'static str,
        /// Lowest valid temperature, C.
        lo: f64,
        /// Highest valid temperature, C.
        hi: f64,
    },
    /// The two-point calibration failed at a frequency.
    #[error("cell calibration at {freq} failed: {reason} (nothing was written)")]
    Calibration {
        /// Frequency, for people (`1 MHz`).
        freq: String,
        /// Why.
        reason: String,
    },
    /// The verification could not be computed, or is out of tolerance.
    #[error("verification with {liquid} {what}; nothing written: check the liquids' purity and temperature and repeat")]
    Verification {
        /// The verification liquid.
        liquid: &'static str,
        /// What went wrong.
        what: String,
    },
    /// The person did not confirm.
    #[error("not written (not confirmed)")]
    NotConfirmed,
    /// The device does not hold what was written.
    #[error("read-back id {read} differs from the written {written}: the device did not store it")]
    ReadBack {
        /// What it holds.
        read: CalId,
        /// What was written.
        written: CalId,
    },
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
    /// Chain position of the audit record.
    pub position: u64,
}

/// A liquid of the reference-liquid table by name.
///
/// # Errors
/// [`CellError::UnknownLiquid`] naming the known ones.
pub fn liquid(name: &str) -> Result<&'static ReferenceLiquid, CellError> {
    ReferenceLiquid::by_name(name).ok_or_else(|| CellError::UnknownLiquid {
        name: name.into(),
        known: fringe_calibration::water::REFERENCE_LIQUIDS
            .iter()
            .map(|l| l.name)
            .collect::<Vec<_>>()
            .join(", "),
    })
}

/// Refuses a liquid outside the temperatures where its table value holds.
fn check_temperature(
    l: &'static ReferenceLiquid,
    t_c: f64,
    measured_by: &'static str,
) -> Result<(), CellError> {
    if l.valid_at(t_c) {
        return Ok(());
    }
    Err(CellError::Temperature {
        liquid: l.name,
        t_c,
        measured_by,
        lo: l.valid_c.0,
        hi: l.valid_c.1,
    })
}

fn unexpected(request: &'static str, got: &Response) -> CellError {
    CellError::Link(LinkError::Unexpected {
        request,
        got: format!("{got:?}"),
    })
}

/// The guided cell calibration (air, a reference liquid, a verification
/// liquid). Each step's result is shown through the guide.
///
/// # Errors
/// [`CellError`].
pub fn cell_calibration(
    link: &mut Link,
    key: &Key,
    store: &mut (impl RecordStore + ?Sized),
    guide: &mut dyn Guide,
    a: &CellOptions,
) -> Result<CellOutcome, CellError> {
    // Who, before anything is measured or written (found by review: an
    // empty operator was recorded).
    if a.operator.trim().is_empty() {
        return Err(CellError::NoOperator);
    }
    let liq = liquid(&a.liquid)?;
    let ver = liquid(&a.verify_liquid)?;
    let id = link.identity().cloned().ok_or(LinkError::Unexpected {
        request: "Identify",
        got: "no identity".into(),
    })?;
    guide.step(
        "Step 1/3: clean and dry the sensor window and leave it facing air (nothing within 10 cm).",
    )?;
    let (y_air, _, t_air, _) = averaged_reading(link, a.readings)?;
    guide.show(&format!(
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
    guide.show(&format!(
        "{}: eps' {:.3} at {:.1} C ({})",
        liq.name, eps_liq, t_liq, liq.source
    ));
    let mut points = [CellPoint::default(); N_FREQ];
    let mut consts = Vec::new();
    for k in 0..N_FREQ {
        let f = f64::from(id.freqs_hz[k]);
        let c = two_point_calibration(f, y_air[k], air.permittivity(t_air), y_liq[k], eps_liq)
            .map_err(|e| CellError::Calibration {
                freq: hz_label(f),
                reason: match e {
                    fringe_calibration::cell::CellError::DegenerateCalibration => format!(
                        "the {} reading is too close to the air reading to tell the cell's constant ({e}); \
                         was the cell filled with {} at step 2, window covered, no air bubbles? Repeat the procedure",
                        liq.name, liq.name
                    ),
                    other => other.to_string(),
                },
            })?;
        points[k] = CellPoint {
            freq_hz: f as f32,
            stray_pf: c.stray_pf as f32,
            cell_pf: c.cell_pf as f32,
            g_offset_s: c.g_offset_s as f32,
        };
        consts.push(c);
        guide.show(&format!(
            "{:>8}: stray {:.4} pF, cell {:.4} pF, G0 {:.3e} S",
            hz_label(f),
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
    let (t_ver, by) = match (a.verify_temperature_c, a.temperature_c) {
        (Some(t), _) => (t, "--verify-temperature-c"),
        (None, Some(t)) => (t, "--temperature-c"),
        (None, None) => (t_ver_dev, "the device's temperature reading"),
    };
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
        .map_err(|e| CellError::Verification {
            liquid: ver.name,
            what: format!("at {} failed ({e})", hz_label(f)),
        })?;
        verification.push((
            f,
            v.measured.re,
            v.expected_re,
            v.error_re,
            v.within_tolerance,
        ));
        guide.show(&format!(
            "verify {} at {}: measured eps' {:.3}, expected {:.3}, error {} ({} %): {}",
            ver.name,
            hz_label(f),
            v.measured.re,
            v.expected_re,
            signed(v.error_re, 3),
            signed(v.relative_error * 100.0, 2),
            if v.within_tolerance {
                "within tolerance"
            } else {
                "OUT OF TOLERANCE"
            }
        ));
    }
    if verification.iter().any(|v| !v.4) {
        return Err(CellError::Verification {
            liquid: ver.name,
            what: format!("is out of its tolerance ({})", ver.tolerance),
        });
    }
    guide.step(
        "Empty, clean and dry the cell; leave the window facing air for the reference check.",
    )?;
    let reference_ratio = match link.request(Request::ReferenceCheck)? {
        Response::RefCheck(r) => (r.ratio[0] + r.ratio[1]) / 2.0,
        other => return Err(unexpected("ReferenceCheck", &other)),
    };
    let cal = CellCal {
        points,
        reference_ratio,
        made_s: a.made_s,
    };
    let old = match link.request(Request::ReadCellCal)? {
        Response::CellCal(c) => c.map_or(CalId::NONE, |c| c.content_id()),
        _ => CalId::NONE,
    };
    guide.caution(LINE_CAUTION);
    if !a.yes
        && !guide.confirm(&format!(
            "write cell calibration {} (replacing {old}) to {}?",
            cal.content_id(),
            id.serial
        ))?
    {
        return Err(CellError::NotConfirmed);
    }
    let written = write_checked(
        link,
        key,
        Request::WriteCellCal(cal),
        Checked {
            what: "cell calibration write",
            then: "see its cell calibration id with `fringe status`: if it is the new one, the next `fringe monitor` or `fringe pull` records it as observed (without who and why: note them in the bench log); if not, calibrate again",
        },
    )
    .map_err(|e| match e {
        WriteFailed::Link(e) => CellError::Link(e),
        WriteFailed::NotTaken(n) => CellError::NotTaken(n),
        WriteFailed::Unconfirmed(u) => CellError::Unconfirmed(u),
    })?;
    let back = match link.request(Request::ReadCellCal)? {
        Response::CellCal(Some(c)) => c,
        other => return Err(unexpected("ReadCellCal", &other)),
    };
    if back.content_id() != cal.content_id() {
        return Err(CellError::ReadBack {
            read: back.content_id(),
            written: cal.content_id(),
        });
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
    let position = record(
        store,
        &id.serial,
        CalKind::Cell,
        cal.content_id(),
        None,
        None,
        &CalRecordBody {
            calibration: serde_json::to_value(cal).unwrap_or(serde_json::Value::Null),
            operator: a.operator.clone(),
            reason: format!(
                "bench cell calibration: air + {} at {:.1} C",
                liq.name, t_liq
            ),
            old_id: old.to_string(),
            new_id: cal.content_id().to_string(),
            action: "cell".into(),
            statistics: None,
            verification: Some(format!(
                "{words}{}{}",
                // Where the verification liquid had a temperature of its own.
                if a.verify_temperature_c.is_some() {
                    format!(" ({} at {t_ver:.1} C, --verify-temperature-c)", ver.name)
                } else {
                    String::new()
                },
                written.words()
            )),
            parent_id: None,
            derivation: None,
        },
    )?;
    Ok(CellOutcome {
        cal,
        verification,
        old,
        position,
    })
}
