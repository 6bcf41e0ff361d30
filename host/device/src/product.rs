//! Product calibrations on the device: list the slots, push a calibration
//! file (`fringe cal push`), switch the active product (`fringe cal
//! select`). Each change is shown through the guide with the caution,
//! confirmed, written with the device key, read back, and recorded.

use fringe_quality::product_file::freq_pair_label;
use std::path::Path;

use fringe_link::{Link, LinkError};
use fringe_protocol::auth::Key;
use fringe_protocol::{Basis, CalId, Capabilities, ProductCal, Request, Response, SlotInfo};
use fringe_quality::analysis::CalRecordBody;
use fringe_quality::cal::{gate_of_file, GateRefused};
use fringe_quality::product_file::{same_freqs, ProductFile};
use fringe_store::{CalKind, RecordStore, StoreError};

use crate::guide::{Cancelled, Guide};
use crate::landed::{write_checked, Checked, Landed, NotTaken, Unconfirmed, WriteFailed};
use crate::record::record;
use crate::LINE_CAUTION;

/// Why a push or select stopped.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ProductError {
    /// The link failed (a wrong key: the device refused).
    #[error("{0}")]
    Link(#[from] LinkError),
    /// The record could not be stored (the device holds the change).
    #[error("the device holds the change, but its record could not be stored: {0}")]
    Store(#[from] StoreError),
    /// Not known whether the device took the write (it answered neither
    /// the write nor the question after it); nothing recorded.
    #[error(transparent)]
    Unconfirmed(#[from] Unconfirmed),
    /// No answer came, and the device did not take the write.
    #[error(transparent)]
    NotTaken(#[from] NotTaken),
    /// The push is recorded, but the switch to it failed.
    #[error("the calibration is in slot {slot} and its push recorded (chain position {position}), but the line was not switched to it: {cause}")]
    SwitchAfterPush {
        /// Slot written.
        slot: u8,
        /// Chain position of the push record.
        position: u64,
        /// Why the switch failed.
        #[source]
        cause: Box<ProductError>,
    },
    /// The person stopped.
    #[error("{0}")]
    Cancelled(#[from] Cancelled),
    /// The quality gate refused the calibration file.
    #[error("{0}")]
    Gate(#[from] GateRefused),
    /// Who or why is missing.
    #[error("--operator and --reason must not be empty (the audit record needs who and why)")]
    NoAuditFields,
    /// The file holds only at other frequencies than the device's.
    #[error("{name} holds only at {} (its reference samples' frequencies), but {serial} measures at {}: capture reference samples on this sensor and fit again; nothing written", freq_pair_label(*.want_hz), freq_pair_label(*.device_hz))]
    OtherFrequencies {
        /// Product name.
        name: String,
        /// The file's frequencies.
        want_hz: [f64; 2],
        /// The device serial.
        serial: String,
        /// The device's frequencies.
        device_hz: [f64; 2],
    },
    /// The calibration takes the plant's bulk density, which the device
    /// cannot receive.
    #[error("{name} takes the plant's bulk density with every reading (fitted with --density-input), but {serial} has no density input: on it every reading would be flagged density_missing and assume the calibration's mean density. Fit without --density-input for this device; nothing written")]
    NoDensityInput {
        /// Product name.
        name: String,
        /// The device serial.
        serial: String,
    },
    /// The calibration is a relaxation model with the static terms or the
    /// conductivity hold, which the device's firmware predates.
    #[error("{name} is a relaxation calibration with the static terms or the conductivity hold (parameter layout 2 or 3), but {serial}'s firmware does not announce them (no static_terms capability) and would refuse it. Update the device's firmware, or fit this device's calibration with --model multivariate or single; nothing written")]
    NoStaticTerms {
        /// Product name.
        name: String,
        /// The device serial.
        serial: String,
    },
    /// The calibration is a relaxation model with the conductivity hold,
    /// which the device's firmware predates.
    #[error("{name} is a relaxation calibration whose conductivity term holds sigma at the calibration samples' lowest (parameter layout 3), but {serial}'s firmware does not announce it (no sigma_hold capability) and would refuse it. Update the device's firmware, or fit this device's calibration with --model multivariate or single; nothing written")]
    NoSigmaHold {
        /// Product name.
        name: String,
        /// The device serial.
        serial: String,
    },
    /// The calibration is a relaxation model whose mixing model takes the
    /// plant's bulk density, which the device's firmware predates.
    #[error("{name} is a relaxation calibration whose mixing model takes the plant's bulk density with every reading (parameter layout 4, fitted with --density-input), but {serial}'s firmware does not announce it (no relaxation_density capability) and would refuse it. Update the device's firmware, or fit this device's calibration with --model multivariate, or without --density-input; nothing written")]
    NoRelaxationDensity {
        /// Product name.
        name: String,
        /// The device serial.
        serial: String,
    },
    /// No free slot and none named.
    #[error("all {n} product slots are in use; choose one with --slot")]
    SlotsFull {
        /// Slots on the device.
        n: usize,
    },
    /// No such product on the device.
    #[error("no product `{product}` on {serial}; `fringe cal list` shows the slots")]
    UnknownProduct {
        /// Name or slot given.
        product: String,
        /// The device serial.
        serial: String,
    },
    /// The person did not confirm.
    #[error("not {what} (not confirmed)")]
    NotConfirmed {
        /// What was not done.
        what: &'static str,
    },
    /// The device does not hold what was written.
    #[error("read-back of slot {slot} gives {read}, not the written {written}: the device did not store it")]
    ReadBack {
        /// Slot.
        slot: u8,
        /// What it holds.
        read: String,
        /// What was written.
        written: CalId,
    },
    /// The device did not switch.
    #[error("the device still reports slot {active:?} active")]
    NotSwitched {
        /// The active slot it reports.
        active: Option<u8>,
    },
}

impl From<WriteFailed> for ProductError {
    fn from(e: WriteFailed) -> Self {
        match e {
            WriteFailed::Link(e) => ProductError::Link(e),
            WriteFailed::NotTaken(n) => ProductError::NotTaken(n),
            WriteFailed::Unconfirmed(u) => ProductError::Unconfirmed(u),
        }
    }
}

/// The words of a product calibration write whose outcome is not known.
const PRODUCT_WRITE: Checked = Checked {
    what: "product calibration write",
    then: "see what it holds with `fringe cal list` and run the push again either way: a push of what a slot already holds writes it again and is recorded with who and why",
};

/// The words of a product switch whose outcome is not known.
const SELECT_WRITE: Checked = Checked {
    what: "switch of the active product",
    then: "see which product is active with `fringe cal list` and run `fringe cal select` for the one the line should run either way: a switch to the active product is recorded with who and why",
};

/// `cal push`'s quality gate on a calibration file: the refusals to record
/// when `force` overrides them.
///
/// # Errors
/// [`GateRefused`] when the file fails the gate and `force` is off.
pub fn push_gate(path: &Path, file: &ProductFile, force: bool) -> Result<Vec<String>, GateRefused> {
    let refusals = gate_of_file(&file.statistics);
    if !refusals.is_empty() && !force {
        return Err(GateRefused {
            what: path.display().to_string(),
            refusals,
            at_push: true,
        });
    }
    Ok(refusals
        .into_iter()
        .map(|r| format!("at push (--force): {r}"))
        .collect())
}

/// Whether a calibration (as the device holds it) takes the plant's bulk
/// density with its readings (fitted with `--density-input`).
pub fn takes_density(wire: &ProductCal) -> bool {
    fringe_firmware::device::parse_product(wire).is_ok_and(|c| {
        use fringe_calibration::product::ProductModel;
        match c.model {
            ProductModel::Multivariate(m) => m.uses_density(),
            ProductModel::Relaxation(m) => m.density_input,
            ProductModel::SingleFrequency(_) => false,
        }
    })
}

/// Whether a calibration is a relaxation model whose mixing model takes
/// each reading's bulk density (parameter layout 4), which a device takes
/// only if it announces [`Capabilities::RELAXATION_DENSITY`].
pub fn takes_relaxation_density(wire: &ProductCal) -> bool {
    wire.model == fringe_protocol::ModelKind::Relaxation
        && wire.params.first() == Some(&fringe_calibration::product::LAYOUT_VERSION_DENSITY_INPUT)
}

/// Whether a calibration is a relaxation model in a parameter layout after
/// the first (layout 2, the static terms, or layout 3), which a device
/// takes only if it announces [`Capabilities::STATIC_TERMS`].
pub fn takes_static_terms(wire: &ProductCal) -> bool {
    use fringe_calibration::product::{RELAXATION_SIGMA_HOLD_LEN, RELAXATION_STATIC_LEN};
    wire.model == fringe_protocol::ModelKind::Relaxation
        && [RELAXATION_STATIC_LEN, RELAXATION_SIGMA_HOLD_LEN].contains(&wire.params.len())
}

/// Whether a calibration is a relaxation model whose conductivity term
/// holds sigma to a range (parameter layout 3), which a device takes only
/// if it announces [`Capabilities::SIGMA_HOLD`].
pub fn takes_sigma_hold(wire: &ProductCal) -> bool {
    wire.model == fringe_protocol::ModelKind::Relaxation
        && wire.params.len() == fringe_calibration::product::RELAXATION_SIGMA_HOLD_LEN
}

/// "wet basis" or "dry basis".
pub fn basis_words(b: Basis) -> &'static str {
    match b {
        Basis::Wet => "wet basis",
        Basis::Dry => "dry basis",
    }
}

/// The caution shown when a push changes the basis the line reports on:
/// the same product then reads another number (at 20 % wet basis, 25 %
/// dry), so the 4-20 mA span and every receiver's scaling were set for the
/// other one (the monitor's and the gateway's alarm bands are converted).
pub fn basis_caution(old: Basis, new: Basis) -> String {
    format!(
        "CAUTION: the line now reports on a {} where it reported on a {}: the same product reads another number \
(M_db = 100 M_wb / (100 - M_wb): 20 % wet basis is 25 % dry). The 4-20 mA span (fringe device config show) \
and the scaling in the PLC or SCADA were set for the {}: change them with the calibration, loops in manual. \
fringe monitor and fringe gateway convert each reading to its alarm band's basis.",
        basis_words(new),
        basis_words(old),
        basis_words(old)
    )
}

/// The product slots of the device and the active one.
///
/// # Errors
/// [`LinkError`].
pub fn list_slots(link: &mut Link) -> Result<(Vec<SlotInfo>, Option<u8>), LinkError> {
    match link.request(Request::ListProducts)? {
        Response::Products { slots, active } => Ok((slots.to_vec(), active)),
        other => Err(LinkError::Unexpected {
            request: "ListProducts",
            got: format!("{other:?}"),
        }),
    }
}

/// A push: which calibration, where, by whom, why.
#[derive(Debug, Clone, Copy)]
pub struct Push<'a> {
    /// The calibration file.
    pub file: &'a ProductFile,
    /// Its wire form.
    pub wire: &'a ProductCal,
    /// Product slot (default: the slot holding this product name, else the first free one).
    pub slot: Option<u8>,
    /// Make it the active product too.
    pub activate: bool,
    /// Who makes the change.
    pub operator: &'a str,
    /// Why.
    pub reason: &'a str,
    /// Write without asking.
    pub yes: bool,
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

/// Writes a product calibration to the device (see the module doc).
///
/// # Errors
/// [`ProductError`].
pub fn push(
    link: &mut Link,
    key: &Key,
    store: &mut (impl RecordStore + ?Sized),
    guide: &mut dyn Guide,
    p: &Push<'_>,
) -> Result<PushOutcome, ProductError> {
    let (file, wire) = (p.file, p.wire);
    if p.operator.trim().is_empty() || p.reason.trim().is_empty() {
        return Err(ProductError::NoAuditFields);
    }
    let serial = link.serial_number().to_string();
    if let (Some(want), Some(id)) = (file.source.freqs_hz, link.identity()) {
        let dev = id.freqs_hz.map(f64::from);
        if !same_freqs(dev, want) {
            return Err(ProductError::OtherFrequencies {
                name: file.name.clone(),
                want_hz: want,
                serial,
                device_hz: dev,
            });
        }
    }
    // What the device's firmware announces; a calibration that needs more
    // is refused here, before anything is sent.
    let lacks = |c: Capabilities| {
        !link
            .identity()
            .is_some_and(|id| id.capabilities.contains(c))
    };
    // (Layout 4 first: it also has layout 3's length and the density, and
    // its own message says what the device lacks.)
    if takes_relaxation_density(wire) && lacks(Capabilities::RELAXATION_DENSITY) {
        return Err(ProductError::NoRelaxationDensity {
            name: file.name.clone(),
            serial,
        });
    }
    if takes_density(wire) && lacks(Capabilities::DENSITY_INPUT) {
        return Err(ProductError::NoDensityInput {
            name: file.name.clone(),
            serial,
        });
    }
    if takes_static_terms(wire) && lacks(Capabilities::STATIC_TERMS) {
        return Err(ProductError::NoStaticTerms {
            name: file.name.clone(),
            serial,
        });
    }
    if takes_sigma_hold(wire) && lacks(Capabilities::SIGMA_HOLD) {
        return Err(ProductError::NoSigmaHold {
            name: file.name.clone(),
            serial,
        });
    }
    let (slots, active) = list_slots(link)?;
    let slot = p
        .slot
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
        .ok_or(ProductError::SlotsFull {
            n: fringe_protocol::N_PRODUCT_SLOTS,
        })?;
    let old_cal = match link.request(Request::ReadProductCal { slot })? {
        Response::ProductCal { cal, .. } => cal,
        _ => None,
    };
    let old = old_cal.as_ref().map_or(CalId::NONE, ProductCal::content_id);
    let new = wire.content_id();
    let mut shown = format!(
        "device {serial}, slot {slot}{}:\n",
        if active == Some(slot) {
            " (active)"
        } else {
            ""
        }
    );
    match &old_cal {
        Some(o) => {
            shown += &format!(
                "  old: {} {:?} id {old}, moisture {:.2}..{:.2} % {}, temperature {:.1}..{:.1} C\n",
                o.name,
                o.model,
                o.moisture_pct.min,
                o.moisture_pct.max,
                basis_words(o.basis),
                o.temperature_c.min,
                o.temperature_c.max
            )
        }
        None => shown += "  old: (empty)\n",
    }
    shown += &format!(
        "  new: {} {:?} id {new}, moisture {:.2}..{:.2} % {}, temperature {:.1}..{:.1} C, SEC {:.3} %, SEP {:.3} % (n {})",
        wire.name, wire.model, wire.moisture_pct.min, wire.moisture_pct.max, basis_words(wire.basis),
        wire.temperature_c.min, wire.temperature_c.max,
        wire.sec_pct, file.statistics.sep, file.statistics.n
    );
    // Written to a slot that is not the active one and activated: the line
    // switches from what it runs on now, which is shown (found by review:
    // only the slot's old content was, and nothing said the line would
    // switch).
    // The calibration the line runs on now, where this push switches it.
    let running = match active {
        Some(a) if p.activate && a != slot => {
            match link.request(Request::ReadProductCal { slot: a })? {
                Response::ProductCal { cal, .. } => cal.map(|c| (a, c)),
                _ => None,
            }
        }
        _ => None,
    };
    if p.activate && active != Some(slot) {
        shown += &match &running {
            Some((a, c)) => format!(
                "\n  and make it the active product: the line switches from {} id {} (slot {a}, moisture {:.2}..{:.2} % {}) to it",
                c.name,
                c.content_id(),
                c.moisture_pct.min,
                c.moisture_pct.max,
                basis_words(c.basis)
            ),
            None => "\n  and make it the active product (none is active now)".to_string(),
        };
    }
    guide.show(&shown);
    guide.caution(LINE_CAUTION);
    let carried = fringe_protocol::quant::MOISTURE_MAX_PCT;
    if wire.moisture_pct.max > carried {
        guide.caution(&format!(
            "this calibration's valid range reaches {:.2} %, above the {carried} % a reading carries (it was fitted before its range was held there): the device flags readings above {carried} % as out of range; refit it to have its range say so",
            wire.moisture_pct.max
        ));
    }
    // The calibration the line runs on after this push: the old one in the
    // slot if it is the active one, else the active slot's if this one is
    // not activated.
    let replaced = if active == Some(slot) {
        old_cal.clone()
    } else {
        running.as_ref().map(|(_, c)| c.clone())
    };
    if let Some(r) = replaced.filter(|r| r.basis != wire.basis) {
        guide.caution(&basis_caution(r.basis, wire.basis));
    }
    if !p.yes && !guide.confirm("write this calibration?")? {
        return Err(ProductError::NotConfirmed { what: "written" });
    }
    let written = write_checked(
        link,
        key,
        Request::WriteProductCal {
            slot,
            cal: wire.clone(),
        },
        PRODUCT_WRITE,
    )?;
    let back = match link.request(Request::ReadProductCal { slot })? {
        Response::ProductCal { cal: Some(c), .. } => c,
        other => {
            return Err(ProductError::ReadBack {
                slot,
                read: format!("{other:?}"),
                written: new,
            })
        }
    };
    if back.content_id() != new {
        return Err(ProductError::ReadBack {
            slot,
            read: back.content_id().to_string(),
            written: new,
        });
    }
    // The slot's new content is recorded before the line is switched to
    // it: a switch that fails leaves the push on record.
    let body = CalRecordBody {
        calibration: serde_json::to_value(wire).unwrap_or(serde_json::Value::Null),
        operator: p.operator.into(),
        reason: p.reason.into(),
        old_id: old.to_string(),
        new_id: new.to_string(),
        action: "push".into(),
        statistics: Some(file.statistics.clone()),
        verification: Some(format!(
            "read back from slot {slot}: id {new}{}",
            written.words()
        )),
        parent_id: file.source.parent_id.clone(),
        derivation: file.source.derivation.clone(),
    };
    let name = Some(wire.name.to_string());
    let position = record(
        store,
        &serial,
        CalKind::Product,
        new,
        Some(slot),
        name.clone(),
        &body,
    )?;
    let switched = if p.activate && active != Some(slot) {
        write_checked(link, key, Request::SelectProduct { slot }, SELECT_WRITE).map_err(|e| {
            ProductError::SwitchAfterPush {
                slot,
                position,
                cause: Box::new(e.into()),
            }
        })?
    } else {
        Landed::Answered
    };
    // The switch of the line, recorded as a select: from the calibration
    // it ran on to this one (the push record names the slot's old
    // content). Only where another calibration ran: from none, the push's
    // own record says as much.
    let position = match &running {
        Some((_, from)) => {
            let select = CalRecordBody {
                reason: format!("activated by cal push: {}", p.reason),
                old_id: from.content_id().to_string(),
                action: "select".into(),
                verification: Some(format!(
                    "slot {slot} selected after the push{}",
                    switched.words()
                )),
                parent_id: None,
                derivation: None,
                ..body
            };
            record(
                store,
                &serial,
                CalKind::Product,
                new,
                Some(slot),
                name,
                &select,
            )?
        }
        None => position,
    };
    Ok(PushOutcome {
        slot,
        old,
        new,
        position,
    })
}

/// Makes `product` (a name or a slot number) the active product.
///
/// # Errors
/// [`ProductError`].
#[allow(clippy::too_many_arguments)]
pub fn select(
    link: &mut Link,
    key: &Key,
    store: &mut (impl RecordStore + ?Sized),
    guide: &mut dyn Guide,
    product: &str,
    operator: &str,
    reason: &str,
    yes: bool,
) -> Result<(u8, CalId), ProductError> {
    // Who and why, before anything is asked of the device (found by
    // review: a select with empty ones switched the product and recorded
    // "select by : ").
    if operator.trim().is_empty() || reason.trim().is_empty() {
        return Err(ProductError::NoAuditFields);
    }
    let serial = link.serial_number().to_string();
    let (slots, active) = list_slots(link)?;
    let s = slots
        .iter()
        .find(|s| s.name.as_str() == product || product.parse::<u8>().ok() == Some(s.slot))
        .ok_or_else(|| ProductError::UnknownProduct {
            product: product.into(),
            serial: serial.clone(),
        })?
        .clone();
    let old = active
        .and_then(|a| slots.iter().find(|x| x.slot == a))
        .map_or(CalId::NONE, |x| x.id);
    // The basis of each (read before the switch, so that a change of basis
    // is said before it is confirmed).
    let basis_of = |link: &mut Link, slot: Option<u8>| -> Result<Option<Basis>, LinkError> {
        let Some(slot) = slot else { return Ok(None) };
        Ok(match link.request(Request::ReadProductCal { slot })? {
            Response::ProductCal { cal: Some(c), .. } => Some(c.basis),
            _ => None,
        })
    };
    let old_basis = basis_of(link, active)?;
    let new_basis = basis_of(link, Some(s.slot))?;
    guide.show(&format!(
        "switch {serial} from {old} to {} ({} in slot {}{})",
        s.id,
        s.name,
        s.slot,
        new_basis.map_or(String::new(), |b| format!(", {}", basis_words(b)))
    ));
    guide.caution(LINE_CAUTION);
    if let (Some(o), Some(n)) = (old_basis, new_basis) {
        if o != n {
            guide.caution(&basis_caution(o, n));
        }
    }
    if !yes && !guide.confirm("switch the active product?")? {
        return Err(ProductError::NotConfirmed { what: "switched" });
    }
    let switched = write_checked(
        link,
        key,
        Request::SelectProduct { slot: s.slot },
        SELECT_WRITE,
    )?;
    let (_, now_active) = list_slots(link)?;
    if now_active != Some(s.slot) {
        return Err(ProductError::NotSwitched { active: now_active });
    }
    let calibration = match link.request(Request::ReadProductCal { slot: s.slot })? {
        Response::ProductCal { cal: Some(c), .. } => {
            serde_json::to_value(c).unwrap_or(serde_json::Value::Null)
        }
        _ => serde_json::Value::Null,
    };
    record(
        store,
        &serial,
        CalKind::Product,
        s.id,
        Some(s.slot),
        Some(s.name.to_string()),
        &CalRecordBody {
            calibration,
            operator: operator.into(),
            reason: reason.into(),
            old_id: old.to_string(),
            new_id: s.id.to_string(),
            action: "select".into(),
            statistics: None,
            verification: Some(format!(
                "device reports slot {} active{}",
                s.slot,
                switched.words()
            )),
            parent_id: None,
            derivation: None,
        },
    )?;
    Ok((s.slot, s.id))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::landed::lossy::{lossy_sim, store_in, Loses};
    use fringe_calibration::synth::SynthProduct;

    /// A guide that answers yes and keeps what it is shown.
    #[derive(Default)]
    struct Yes(Vec<String>);

    impl Guide for Yes {
        fn step(&mut self, _: &str) -> Result<(), Cancelled> {
            Ok(())
        }
        fn ask(&mut self, _: &str) -> Result<Option<String>, Cancelled> {
            Ok(None)
        }
        fn confirm(&mut self, _: &str) -> Result<bool, Cancelled> {
            Ok(true)
        }
        fn show(&mut self, text: &str) {
            self.0.push(text.into());
        }
        fn caution(&mut self, text: &str) {
            self.0.push(text.into());
        }
    }

    /// A switch of the active product whose every answer is lost is read
    /// back and recorded, its record saying so; where the device answers
    /// nothing after it, the outcome is not known, the error says how to
    /// find it, and nothing is recorded. (Simulated device, exact
    /// calibrations of the synthetic grain.)
    #[test]
    fn a_switch_whose_answers_are_lost_is_read_back_before_it_is_given_up() {
        let key: Key = [9; 32];
        let (mut link, loses) = lossy_sim(key);
        let grain = SynthProduct::<f32>::grain();
        for (slot, name) in [(0u8, "HM wheat L2"), (1, "HM barley L2")] {
            let cal = fringe_firmware::sim::exact_calibration(&grain, name);
            link.request_signed(Request::WriteProductCal { slot, cal }, &key)
                .expect("write");
        }
        link.request_signed(Request::SelectProduct { slot: 0 }, &key)
            .expect("select");
        let dir = tempfile::tempdir().unwrap();
        let mut store = store_in(dir.path());
        *loses.lock().unwrap() = Loses::Writes;
        let (slot, _) = select(
            &mut link,
            &key,
            &mut store,
            &mut Yes::default(),
            "1",
            "R. Okafor",
            "barley run",
            true,
        )
        .expect("read back and recorded");
        assert_eq!(slot, 1);
        *loses.lock().unwrap() = Loses::Nothing;
        assert_eq!(list_slots(&mut link).unwrap().1, Some(1));
        let recs = store.calibrations("HGM-L2-0099").unwrap();
        assert_eq!(recs.len(), 1);
        let verification = recs[0].cal.body["verification"]
            .as_str()
            .unwrap_or_default();
        assert!(
            verification.contains("slot 1 active")
                && verification.contains("answer to the write was lost"),
            "{verification}"
        );
        *loses.lock().unwrap() = Loses::AfterAWrite;
        match select(
            &mut link,
            &key,
            &mut store,
            &mut Yes::default(),
            "0",
            "R. Okafor",
            "wheat again",
            true,
        ) {
            Err(ProductError::Unconfirmed(u)) => {
                let text = u.to_string();
                assert!(
                    text.contains("fringe cal list") && text.contains("fringe cal select"),
                    "{text}"
                );
            }
            other => panic!("{other:?}"),
        }
        assert_eq!(store.calibrations("HGM-L2-0099").unwrap().len(), 1);
        // A switch to the product already active that never reaches the
        // device: what the device holds reads the same as if it had run,
        // but its write counter did not move, so nothing is recorded.
        *loses.lock().unwrap() = Loses::Nothing;
        let active = list_slots(&mut link).unwrap().1.expect("a product active");
        *loses.lock().unwrap() = Loses::WriteFrames;
        match select(
            &mut link,
            &key,
            &mut store,
            &mut Yes::default(),
            &active.to_string(),
            "R. Okafor",
            "the same again",
            true,
        ) {
            Err(ProductError::NotTaken(n)) => {
                let text = n.to_string();
                assert!(
                    text.contains("did not take it") && text.contains("nothing was recorded"),
                    "{text}"
                );
            }
            other => panic!("{other:?}"),
        }
        assert_eq!(store.calibrations("HGM-L2-0099").unwrap().len(), 1);
    }
}
