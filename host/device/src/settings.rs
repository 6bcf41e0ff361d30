//! Device settings (tag, interval, 4-20 mA span, failure level, stale
//! timeout; since protocol 1.2 the Modbus RTU unit id, baud rate and
//! parity): a change checked as the device checks it, written with the
//! device key, read back, and recorded with who and why.

use fringe_link::{Link, LinkError};
use fringe_protocol::auth::Key;
use fringe_protocol::{Capabilities, ModbusParity, ModbusSettings, Request, Settings};
use fringe_quality::analysis::CalRecordBody;
use fringe_store::{CalKind, NewCalibration, RecordStore, StoreError};

use crate::landed::{write_checked, Checked, Landed, NotTaken, Unconfirmed, WriteFailed};

/// Why a settings change stopped.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum SettingsError {
    /// A value is refused (the flag named), before anything is written.
    #[error("{0}")]
    Refused(String),
    /// The link failed (a wrong key: the device refused).
    #[error("{0}")]
    Link(#[from] LinkError),
    /// Not known whether the device took the write (it answered neither
    /// the write nor the question after it); nothing recorded.
    #[error(transparent)]
    Unconfirmed(#[from] Unconfirmed),
    /// No answer came, and the device did not take the write.
    #[error(transparent)]
    NotTaken(#[from] NotTaken),
    /// The record could not be stored (the device holds the new settings).
    #[error("the device holds the new settings, but their record could not be stored: {0}")]
    Store(#[from] StoreError),
    /// The device holds other settings than were written.
    #[error("the device holds other settings than were written (read back {read}, wrote {written}): nothing recorded")]
    ReadBack {
        /// Id of what it holds.
        read: String,
        /// Id of what was written.
        written: String,
    },
}

/// A settings change: the values to set (the others keep theirs).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct SettingsChange {
    /// Measuring-point tag ("" clears it).
    pub tag: Option<String>,
    /// Measurement interval, ms.
    pub interval_ms: Option<u32>,
    /// Moisture at 4 mA, %.
    pub span_low_pct: Option<f32>,
    /// Moisture at 20 mA, %.
    pub span_high_pct: Option<f32>,
    /// Failure level high (NAMUR NE 43 >= 21 mA) rather than low.
    pub fail_high: Option<bool>,
    /// Stale-output timeout, ms.
    pub stale_timeout_ms: Option<u32>,
}

impl SettingsChange {
    /// `old` with this change, checked as the device will check it.
    ///
    /// # Errors
    /// [`SettingsError::Refused`] naming the flag of a refused value.
    pub fn apply(&self, old: &Settings) -> Result<Settings, SettingsError> {
        use fringe_firmware::settings::{self as fw, validate, SettingsError as E};
        let refused = |m: String| Err(SettingsError::Refused(m));
        let mut s = old.clone();
        if let Some(t) = &self.tag {
            if t.len() > fringe_protocol::TAG_LEN {
                return refused(format!(
                    "--tag {t:?}: {} bytes, at most {} fit",
                    t.len(),
                    fringe_protocol::TAG_LEN
                ));
            }
            s.tag = fringe_protocol::short_string(t);
        }
        if let Some(v) = self.interval_ms {
            s.interval_ms = v;
        }
        if let Some(v) = self.span_low_pct {
            s.output.span_low_pct = v;
        }
        if let Some(v) = self.span_high_pct {
            s.output.span_high_pct = v;
        }
        if let Some(f) = self.fail_high {
            s.output.fail_high = f;
        }
        if let Some(v) = self.stale_timeout_ms {
            s.stale_timeout_ms = v;
        }
        match validate(&s) {
            Ok(()) => Ok(s),
            Err(E::Tag) => refused(format!(
                "--tag {:?}: no control characters allowed",
                s.tag.as_str()
            )),
            Err(E::Interval) => refused(format!(
                "--interval-ms {}: must be {}..={} ms",
                s.interval_ms,
                fw::MIN_INTERVAL_MS,
                fw::MAX_INTERVAL_MS
            )),
            Err(E::StaleTimeout) => refused(format!(
                "--stale-timeout-ms {}: must be at least twice the interval ({} ms) and at most {} ms",
                s.stale_timeout_ms,
                s.interval_ms.saturating_mul(2),
                fw::MAX_STALE_TIMEOUT_MS
            )),
            Err(E::Span(_)) => refused(format!(
                "--span-low-pct {} / --span-high-pct {}: need 0 <= low < high <= {} % (above 100 % for a dry-basis calibration only)",
                s.output.span_low_pct,
                s.output.span_high_pct,
                fringe_firmware::output::MAX_SPAN_PCT
            )),
            Err(e) => refused(e.to_string()),
        }
    }
}

/// Whether a device announcing `caps` takes `new`: a span above 100 % needs
/// [`Capabilities::WIDE_SPAN`] (firmware without it ends the span at 100 %
/// and would refuse it with a bare `OutOfRange`).
///
/// # Errors
/// [`SettingsError::Refused`] naming the flag, the device and what to do.
pub fn check_capabilities(
    new: &Settings,
    caps: Capabilities,
    serial: &str,
) -> Result<(), SettingsError> {
    if new.output.span_high_pct > 100.0 && !caps.contains(Capabilities::WIDE_SPAN) {
        return Err(SettingsError::Refused(format!(
            "--span-high-pct {}: {serial}'s firmware ends the span at 100 % (it lacks the wide_span capability); update the firmware for a dry-basis span above 100 %",
            new.output.span_high_pct
        )));
    }
    Ok(())
}

/// Writes `new` (authenticated), reads it back and records the change in
/// `store` with who and why (a `settings` record in the calibrations
/// table, with the settings before); returns the record's chain position.
///
/// # Errors
/// [`SettingsError`]: link errors (a wrong key: refused), a read-back that
/// differs, store errors.
pub fn write_settings(
    link: &mut Link,
    key: &Key,
    store: &mut (impl RecordStore + ?Sized),
    old: &Settings,
    new: &Settings,
    operator: &str,
    reason: &str,
) -> Result<u64, SettingsError> {
    let landed = write_checked(
        link,
        key,
        Request::WriteSettings(new.clone()),
        SETTINGS_WRITE,
    )?;
    let back = link.settings()?;
    if &back != new {
        return Err(SettingsError::ReadBack {
            read: back.content_id().to_string(),
            written: new.content_id().to_string(),
        });
    }
    let serial = link.serial_number().to_string();
    let body = CalRecordBody {
        calibration: serde_json::to_value(&back).unwrap_or(serde_json::Value::Null),
        operator: operator.into(),
        reason: reason.into(),
        old_id: old.content_id().to_string(),
        new_id: back.content_id().to_string(),
        action: "settings".into(),
        statistics: None,
        verification: (landed != Landed::Answered).then(|| format!("read back{}", landed.words())),
        parent_id: None,
        derivation: None,
    };
    let mut body = serde_json::to_value(body).unwrap_or(serde_json::Value::Null);
    body["previous"] = serde_json::to_value(old).unwrap_or(serde_json::Value::Null);
    let rec = store.insert_calibration(
        &serial,
        &NewCalibration {
            kind: CalKind::Settings,
            cal_id: back.content_id(),
            slot: None,
            name: Some(back.tag.to_string()),
            body,
            note: None,
            supersedes: None,
        },
    )?;
    Ok(rec.position)
}

/// The words of a settings write whose outcome is not known.
const SETTINGS_WRITE: Checked = Checked {
    what: "settings write",
    then: "see its settings with `fringe device config`: if they are the new ones, the device's event log (stored by `fringe monitor` and `fringe pull`) holds the change without who and why, so note them in the shift log; if not, run the command again",
};

impl From<WriteFailed> for SettingsError {
    fn from(e: WriteFailed) -> Self {
        match e {
            WriteFailed::Link(e) => SettingsError::Link(e),
            WriteFailed::NotTaken(n) => SettingsError::NotTaken(n),
            WriteFailed::Unconfirmed(u) => SettingsError::Unconfirmed(u),
        }
    }
}

/// A change of the Modbus RTU settings: the values to set (the others keep
/// theirs).
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct ModbusChange {
    /// Unit id, 1..=247.
    pub unit_id: Option<u8>,
    /// Baud rate.
    pub baud: Option<u32>,
    /// Parity (none means two stop bits).
    pub parity: Option<ModbusParity>,
}

impl ModbusChange {
    /// Whether nothing is to change.
    pub fn is_empty(&self) -> bool {
        *self == Self::default()
    }

    /// `old` with this change, checked as the device will check it.
    ///
    /// # Errors
    /// [`SettingsError::Refused`] naming the flag of a refused value.
    pub fn apply(&self, old: &ModbusSettings) -> Result<ModbusSettings, SettingsError> {
        use fringe_firmware::modbus::{SerialLine, SerialLineError, BAUD_RATES};
        let new = ModbusSettings {
            unit_id: self.unit_id.unwrap_or(old.unit_id),
            baud: self.baud.unwrap_or(old.baud),
            parity: self.parity.unwrap_or(old.parity),
        };
        match SerialLine::from(new).validate() {
            Ok(()) => Ok(new),
            Err(SerialLineError::UnitId(u)) => Err(SettingsError::Refused(format!(
                "--modbus-unit {u}: must be 1..=247"
            ))),
            Err(SerialLineError::Baud(b)) => Err(SettingsError::Refused(format!(
                "--modbus-baud {b}: must be one of {}",
                BAUD_RATES.map(|r| r.to_string()).join(", ")
            ))),
            Err(e) => Err(SettingsError::Refused(e.to_string())),
        }
    }
}

/// Writes the Modbus settings `new` (authenticated), reads them back and
/// records the change in `store` with who and why (a `settings` record
/// with action `modbus`, the settings before under `previous`); returns
/// the record's chain position.
///
/// # Errors
/// As [`write_settings`]; a device without Modbus settings (before
/// protocol 1.2) is refused by the link before anything is written.
pub fn write_modbus(
    link: &mut Link,
    key: &Key,
    store: &mut (impl RecordStore + ?Sized),
    old: &ModbusSettings,
    new: &ModbusSettings,
    operator: &str,
    reason: &str,
) -> Result<u64, SettingsError> {
    // Refuses a device before 1.2 with a message naming its version.
    link.modbus()?;
    let landed = write_checked(
        link,
        key,
        Request::WriteModbus(*new),
        Checked {
            what: "Modbus settings write",
            ..SETTINGS_WRITE
        },
    )?;
    let back = link.modbus()?;
    if &back != new {
        return Err(SettingsError::ReadBack {
            read: back.content_id().to_string(),
            written: new.content_id().to_string(),
        });
    }
    let serial = link.serial_number().to_string();
    let body = CalRecordBody {
        calibration: serde_json::to_value(back).unwrap_or(serde_json::Value::Null),
        operator: operator.into(),
        reason: reason.into(),
        old_id: old.content_id().to_string(),
        new_id: back.content_id().to_string(),
        action: "modbus".into(),
        statistics: None,
        verification: (landed != Landed::Answered).then(|| format!("read back{}", landed.words())),
        parent_id: None,
        derivation: None,
    };
    let mut body = serde_json::to_value(body).unwrap_or(serde_json::Value::Null);
    body["previous"] = serde_json::to_value(old).unwrap_or(serde_json::Value::Null);
    let rec = store.insert_calibration(
        &serial,
        &NewCalibration {
            kind: CalKind::Settings,
            cal_id: back.content_id(),
            slot: None,
            name: Some(format!("modbus unit {}", back.unit_id)),
            body,
            note: None,
            supersedes: None,
        },
    )?;
    Ok(rec.position)
}

#[cfg(test)]
mod tests {
    use super::*;

    use crate::landed::lossy::{lossy_sim, store_in, Loses};

    /// A write the device takes whose every answer is lost is read back
    /// and recorded, its record saying so; where the device answers
    /// nothing after the write, the outcome is not known, the error says
    /// so, and nothing is recorded (before, both returned the link's error
    /// and recorded nothing, though the device ran the new settings). The
    /// simulated device runs the firmware core.
    #[test]
    fn a_write_whose_answers_are_lost_is_read_back_before_it_is_given_up() {
        let key: Key = [7; 32];
        let (mut link, loses) = lossy_sim(key);
        let dir = tempfile::tempdir().unwrap();
        let mut store = store_in(dir.path());
        let records = |store: &fringe_sqlite::Store| store.calibrations("HGM-L2-0099").unwrap();
        let old = link.settings().unwrap();
        let mut new = old.clone();
        new.interval_ms = old.interval_ms + 1000;
        *loses.lock().unwrap() = Loses::Writes;
        write_settings(
            &mut link,
            &key,
            &mut store,
            &old,
            &new,
            "R. Okafor",
            "slower line",
        )
        .expect("read back and recorded");
        *loses.lock().unwrap() = Loses::Nothing;
        assert_eq!(link.settings().unwrap(), new);
        let recs = records(&store);
        assert_eq!(recs.len(), 1);
        let verification = recs[0].cal.body["verification"]
            .as_str()
            .unwrap_or_default();
        assert!(
            verification.contains("answer to the write was lost"),
            "{verification}"
        );
        assert_eq!(recs[0].cal.body["operator"], "R. Okafor");
        // The device answers nothing after the write.
        let mut newer = new.clone();
        newer.interval_ms += 1000;
        *loses.lock().unwrap() = Loses::AfterAWrite;
        match write_settings(
            &mut link,
            &key,
            &mut store,
            &new,
            &newer,
            "R. Okafor",
            "slower",
        ) {
            Err(SettingsError::Unconfirmed(u)) => {
                let text = u.to_string();
                assert!(
                    text.contains("not known") && text.contains("fringe device config"),
                    "{text}"
                );
            }
            other => panic!("{other:?}"),
        }
        assert_eq!(records(&store).len(), 1, "nothing recorded");
    }

    const D: ModbusSettings = ModbusSettings {
        unit_id: 1,
        baud: 19_200,
        parity: ModbusParity::Even,
    };

    /// A span above 100 % goes only to firmware that announces it takes
    /// one; a span within 100 % goes to any.
    #[test]
    fn a_span_above_100_pct_needs_the_wide_span_capability() {
        let mut s = fringe_firmware::settings::default_settings();
        s.output.span_high_pct = 180.0;
        let old = Capabilities::SETTINGS | Capabilities::MODBUS_RTU;
        match check_capabilities(&s, old, "HGM-L2-0007") {
            Err(SettingsError::Refused(m)) => assert!(
                m.contains("--span-high-pct 180")
                    && m.contains("HGM-L2-0007")
                    && m.contains("wide_span"),
                "{m}"
            ),
            other => panic!("{other:?}"),
        }
        assert!(check_capabilities(&s, old | Capabilities::WIDE_SPAN, "x").is_ok());
        s.output.span_high_pct = 100.0;
        assert!(check_capabilities(&s, old, "x").is_ok());
    }

    #[test]
    fn a_modbus_change_keeps_what_it_does_not_name_and_refuses_by_flag() {
        let c = ModbusChange {
            unit_id: Some(12),
            ..Default::default()
        };
        assert_eq!(c.apply(&D).unwrap(), ModbusSettings { unit_id: 12, ..D });
        assert!(ModbusChange::default().is_empty());
        let refused = |c: ModbusChange| match c.apply(&D) {
            Err(SettingsError::Refused(m)) => m,
            other => panic!("{other:?}"),
        };
        let m = refused(ModbusChange {
            unit_id: Some(0),
            ..Default::default()
        });
        assert!(
            m.contains("--modbus-unit 0") && m.contains("1..=247"),
            "{m}"
        );
        let m = refused(ModbusChange {
            baud: Some(14_400),
            ..Default::default()
        });
        assert!(
            m.contains("--modbus-baud 14400") && m.contains("115200"),
            "{m}"
        );
    }
}
