//! Calibrations found on a device with no record in the store.
//!
//! `fringe cal push` and `cal select` (and `device cell`) record each
//! calibration they write, with who and why. A device can also hold one
//! written by another tool or from another database: its readings then
//! carry an id the store knows nothing of, so the basis of their moisture
//! is unknown to the drift monitors and an audit bundle cannot show the
//! calibration that made them. When a line session starts (and after each
//! reconnect, and when a streamed reading carries an unknown id) and when
//! a log is pulled, the device's cell calibration and its active product
//! calibration are read, and each whose id the store has no record of is
//! recorded as found: action `observed`, the calibration as read, `old_id`
//! `unknown` (what it replaced is not known), operator `fringe` and a
//! reason saying where it was found. A calibration the store has a record
//! of is left alone, so a session records each one once. Slots not
//! selected are not recorded: no reading carries them, and the newest
//! record of a kind is the one the report and the drift charts take as in
//! force.

use fringe_link::{Link, LinkError};
use fringe_protocol::{CalId, Request, Response};
use fringe_store::{CalKind, NewCalibration, RecordStore};

use crate::error::LineError;

/// A calibration recorded as found on the device.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Observed {
    /// The device.
    pub serial: String,
    /// Cell or product calibration.
    pub kind: CalKind,
    /// Its content id.
    pub id: CalId,
    /// The product slot it was found in (product calibrations).
    pub slot: Option<u8>,
    /// Its chain position in the store.
    pub position: u64,
}

impl std::fmt::Display for Observed {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "{}: {} calibration {}{} found on the device with no record in this database: recorded as found (chain position {})",
            self.serial,
            self.kind.as_str(),
            self.id,
            self.slot.map_or(String::new(), |s| format!(" in slot {s}")),
            self.position
        )
    }
}

/// The calibration record's body, in the fields `fringe cal push` writes
/// (`fringe_quality::analysis::CalRecordBody`).
fn body(calibration: serde_json::Value, id: CalId, where_found: &str) -> serde_json::Value {
    serde_json::json!({
        "calibration": calibration,
        "operator": "fringe",
        "reason": format!(
            "found {where_found} with no record in this database (written or selected by another tool or database); recorded as found"
        ),
        "old_id": "unknown",
        "new_id": id.to_string(),
        "action": "observed",
        "statistics": null,
        "verification": format!("read from the device: id {id}"),
    })
}

/// A calibration read from the device.
struct Found {
    kind: CalKind,
    id: CalId,
    slot: Option<u8>,
    name: Option<String>,
    calibration: serde_json::Value,
    where_found: String,
}

fn unexpected(request: &'static str, got: &Response) -> LinkError {
    LinkError::Unexpected {
        request,
        got: format!("{got:?}"),
    }
}

/// Reads the device's cell calibration and active product calibration and
/// records each the store has no record of (see the module doc). Returns
/// those recorded (cell first).
///
/// # Errors
/// [`LineError`]: a failed link (also a device that refuses a read,
/// [`LinkError::Refused`]) or store; what was recorded before stays.
pub fn record_unrecorded(
    link: &mut Link,
    store: &mut (impl RecordStore + ?Sized),
    serial: &str,
) -> Result<Vec<Observed>, LineError> {
    let known: Vec<(CalKind, CalId)> = store
        .calibrations(serial)?
        .into_iter()
        .map(|c| (c.cal.kind, c.cal.cal_id))
        .collect();
    let mut found: Vec<Found> = Vec::new();
    match link.request(Request::ReadCellCal)? {
        Response::CellCal(Some(c)) => found.push(Found {
            kind: CalKind::Cell,
            id: c.content_id(),
            slot: None,
            name: None,
            calibration: serde_json::to_value(c).unwrap_or(serde_json::Value::Null),
            where_found: "as the device's cell calibration".into(),
        }),
        Response::CellCal(None) => {}
        other => return Err(unexpected("ReadCellCal", &other).into()),
    }
    let (slots, active) = match link.request(Request::ListProducts)? {
        Response::Products { slots, active } => (slots, active),
        other => return Err(unexpected("ListProducts", &other).into()),
    };
    for s in slots.iter().filter(|s| active == Some(s.slot)) {
        if known.contains(&(CalKind::Product, s.id)) {
            continue;
        }
        let cal = match link.request(Request::ReadProductCal { slot: s.slot })? {
            Response::ProductCal { cal: Some(c), .. } => c,
            Response::ProductCal { cal: None, .. } => continue,
            other => return Err(unexpected("ReadProductCal", &other).into()),
        };
        found.push(Found {
            kind: CalKind::Product,
            id: cal.content_id(),
            slot: Some(s.slot),
            name: Some(cal.name.to_string()),
            calibration: serde_json::to_value(&cal).unwrap_or(serde_json::Value::Null),
            where_found: format!("active in product slot {} of the device", s.slot),
        });
    }
    let mut recorded: Vec<Observed> = Vec::new();
    for f in found {
        if known.contains(&(f.kind, f.id)) || recorded.iter().any(|o| o.id == f.id) {
            continue;
        }
        let r = store.insert_calibration(
            serial,
            &NewCalibration {
                kind: f.kind,
                cal_id: f.id,
                slot: f.slot,
                name: f.name,
                body: body(f.calibration, f.id, &f.where_found),
                note: Some(format!("observed by fringe: {}", f.where_found)),
                supersedes: None,
            },
        )?;
        recorded.push(Observed {
            serial: serial.to_string(),
            kind: f.kind,
            id: f.id,
            slot: f.slot,
            position: r.position,
        });
    }
    Ok(recorded)
}
