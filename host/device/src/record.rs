//! The audit record of a change to a device.

use fringe_protocol::CalId;
use fringe_quality::analysis::CalRecordBody;
use fringe_store::{CalKind, DeviceInfo, NewCalibration, RecordStore, StoreError};

/// Records a calibration change of device `serial` (with who, why, the old
/// and the new id in `body`); returns its chain position.
///
/// # Errors
/// [`StoreError`].
pub fn record(
    store: &mut (impl RecordStore + ?Sized),
    serial: &str,
    kind: CalKind,
    id: CalId,
    slot: Option<u8>,
    name: Option<String>,
    body: &CalRecordBody,
) -> Result<u64, StoreError> {
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
            body: serde_json::to_value(body).unwrap_or(serde_json::Value::Null),
            note,
            supersedes: None,
        },
    )?;
    Ok(r.position)
}
