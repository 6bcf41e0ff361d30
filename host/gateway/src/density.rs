//! The plant's bulk density, from the plant's MQTT broker or a PLC over
//! Modbus TCP to the devices whose site entry has `[device.density]`
//! (protocol 1.4's signed `SetDensity`).
//!
//! The MQTT worker takes each value from the broker (a Sparkplug DCMD
//! metric [`BULK_DENSITY`], or a JSON message on
//! `{json_prefix}/{serial}/density`), the Modbus server from a write of a
//! unit's holding registers (`crate::modbus`); each checks it and posts it
//! here with the time it arrived, and a device takes values only from the
//! source its site entry names. The device's line session sends it between readings,
//! to hold for the site file's `hold_s` counted from its arrival. A device
//! that has lost it (a reboot, a reconnect, another product selected: its
//! readings flag `density_missing` again) gets it again for what is left
//! of the hold. A value that is refused is said, with what came and where
//! from, and nothing is sent.
//!
//! A density changes the moisture a device reports, which a control loop
//! may use: only the plant's own density measurement should write here
//! (a broker ACL; over Modbus, which has no authentication, the PLC's
//! address alone and a firewall: see `docs/GATEWAY.md`).

use std::collections::HashMap;
use std::sync::{Arc, Mutex};
use std::time::Instant;

use fringe_line::check_density;

use crate::site::DensitySource;
use crate::sparkplug::{Payload, Value};

/// The Sparkplug DCMD metric (and JSON key) of a bulk density, kg/m3.
pub use crate::sparkplug::metric::BULK_DENSITY;

/// Told what went wrong: the unit of the device (0: none in particular),
/// its serial when known, and the text.
pub type Tell = Arc<dyn Fn(u8, Option<String>, String) + Send + Sync>;

/// A density the plant sent for one device.
#[derive(Debug, Clone, PartialEq)]
pub struct Order {
    /// Its number among all orders of this run (rises).
    pub seq: u64,
    /// Bulk density, kg/m3.
    pub kg_m3: f32,
    /// When it arrived.
    pub received: Instant,
    /// Where it came from (the topic, or the Modbus unit and the PLC's
    /// address).
    pub source: String,
}

#[derive(Default)]
struct State {
    next: u64,
    /// Serial -> unit and source of the devices fed from here (known once
    /// they answer).
    fed: HashMap<String, (u8, DensitySource)>,
    orders: HashMap<String, Order>,
}

/// The densities waiting for the devices, shared by the MQTT worker and the
/// Modbus server (which post) and the line sessions (which send).
pub struct DensityInbox {
    state: Mutex<State>,
    tell: Tell,
}

impl std::fmt::Debug for DensityInbox {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        let s = self.lock();
        f.debug_struct("DensityInbox")
            .field("fed", &s.fed)
            .field("orders", &s.orders)
            .finish_non_exhaustive()
    }
}

impl DensityInbox {
    /// An empty inbox; refusals are told to `tell`.
    pub fn new(tell: Tell) -> Self {
        Self {
            state: Mutex::new(State::default()),
            tell,
        }
    }

    fn lock(&self) -> std::sync::MutexGuard<'_, State> {
        self.state.lock().unwrap_or_else(|e| e.into_inner())
    }

    /// Says `text` as an error of the density feed (no device in particular).
    pub fn say(&self, text: &str) {
        (self.tell)(0, None, text.to_string());
    }

    /// Says `text` as an error of the density feed of the device of `unit`.
    pub fn say_for(&self, unit: u8, text: &str) {
        (self.tell)(unit, None, text.to_string());
    }

    /// The device of `unit` answered as `serial` and takes densities from
    /// here, from `from` only.
    pub fn feed(&self, serial: &str, unit: u8, from: DensitySource) {
        let mut s = self.lock();
        // A density belongs to a place on the line (a unit and its
        // source): one for a device that now answers elsewhere, or fed
        // from elsewhere, is dropped, not carried along.
        if s.fed.get(serial).is_some_and(|f| *f != (unit, from)) {
            s.orders.remove(serial);
        }
        // One serial per unit: a device replaced on the same port answers
        // with its own serial, and the old one no longer takes values.
        let gone: Vec<String> = s
            .fed
            .iter()
            .filter(|(k, (u, _))| *u == unit && k.as_str() != serial)
            .map(|(k, _)| k.clone())
            .collect();
        for k in gone {
            s.fed.remove(&k);
            s.orders.remove(&k);
        }
        s.fed.insert(serial.to_string(), (unit, from));
    }

    /// The serial of the device of `unit` that takes densities from `from`
    /// (`None`: none has answered yet, or it takes them from elsewhere).
    pub fn serial_of(&self, unit: u8, from: DensitySource) -> Option<String> {
        self.lock()
            .fed
            .iter()
            .find(|(_, (u, f))| *u == unit && *f == from)
            .map(|(s, _)| s.clone())
    }

    /// Whether the device `serial` takes densities from here.
    pub fn is_fed(&self, serial: &str) -> bool {
        self.lock().fed.contains_key(serial)
    }

    /// Whether the device `serial` takes densities from `from`.
    pub fn is_fed_from(&self, serial: &str, from: DensitySource) -> bool {
        self.lock().fed.get(serial).is_some_and(|f| f.1 == from)
    }

    /// The latest density for `serial`.
    pub fn latest(&self, serial: &str) -> Option<Order> {
        self.lock().orders.get(serial).cloned()
    }

    /// A value that arrived at `received` by `from` (in words: `source`)
    /// for `serial`: kept for the device when it is a bulk density it can
    /// take from there; said and dropped otherwise.
    ///
    /// # Errors
    /// What is wrong with it, in words (also told).
    pub fn post(
        &self,
        serial: &str,
        value: Result<f64, String>,
        from: DensitySource,
        source: &str,
        received: Instant,
    ) -> Result<u64, String> {
        let mut s = self.lock();
        let fed = s.fed.get(serial).copied();
        let unit = fed.map(|f| f.0);
        let checked = value.and_then(|v| match fed {
            None => Err(format!(
                "no device {serial} of this gateway takes a density (it has no \
                 [device.density] in the site file, or has not answered yet)"
            )),
            Some((_, takes)) if takes != from => Err(format!(
                "device {serial} takes its density from {} (its [device.density] from), not from {}",
                takes.name(),
                from.name()
            )),
            Some(_) => check_density(v),
        });
        match checked {
            Ok(kg_m3) => {
                s.next += 1;
                let seq = s.next;
                s.orders.insert(
                    serial.to_string(),
                    Order {
                        seq,
                        kg_m3,
                        received,
                        source: source.to_string(),
                    },
                );
                Ok(seq)
            }
            Err(why) => {
                drop(s);
                (self.tell)(
                    unit.unwrap_or(0),
                    Some(serial.to_string()),
                    format!("density from {source} refused, nothing sent: {why}"),
                );
                Err(why)
            }
        }
    }
}

/// The density of a Sparkplug DCMD payload: its [`BULK_DENSITY`] metric
/// (float, double or integer). `None`: the payload has no such metric.
pub fn from_sparkplug(payload: &[u8]) -> Option<Result<f64, String>> {
    let p = match <Payload as prost::Message>::decode(payload) {
        Ok(p) => p,
        Err(e) => return Some(Err(format!("not a Sparkplug B payload ({e})"))),
    };
    let m = p
        .metrics
        .iter()
        .find(|m| m.name.as_deref() == Some(BULK_DENSITY))?;
    Some(match &m.value {
        // Its shortest decimal form (1.65, not 1.649999976...).
        Some(Value::FloatValue(v)) => Ok(v.to_string().parse().unwrap_or(f64::from(*v))),
        Some(Value::DoubleValue(v)) => Ok(*v),
        Some(Value::IntValue(v)) => Ok(f64::from(*v)),
        Some(Value::LongValue(v)) => Ok(*v as f64),
        None => Err(format!("metric {BULK_DENSITY} has no value")),
        Some(other) => Err(format!(
            "metric {BULK_DENSITY} is {other:?}, not a number (Float or Double)"
        )),
    })
}

/// The density of a JSON message: `{"bulk_density_kg_m3": 1650}`.
///
/// # Errors
/// Another shape, in words.
pub fn from_json(payload: &[u8]) -> Result<f64, String> {
    let shape = format!("expected {{\"{BULK_DENSITY}\": NUMBER}}");
    let v: serde_json::Value = serde_json::from_slice(payload).map_err(|e| {
        format!(
            "not JSON ({e}): {}; {shape}",
            String::from_utf8_lossy(&payload[..payload.len().min(60)])
        )
    })?;
    v.get(BULK_DENSITY)
        .and_then(serde_json::Value::as_f64)
        .ok_or_else(|| {
            let s = v.to_string();
            // Cut at a character, not a byte: the text may be any UTF-8.
            let s: String = s.chars().take(60).collect();
            format!("{s}: {shape}")
        })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::sparkplug::Metric;

    struct Told {
        unit: u8,
        text: String,
    }

    fn inbox() -> (DensityInbox, Arc<Mutex<Vec<Told>>>) {
        let told = Arc::new(Mutex::new(Vec::new()));
        let t = Arc::clone(&told);
        (
            DensityInbox::new(Arc::new(move |unit, _, text| {
                t.lock().unwrap().push(Told { unit, text });
            })),
            told,
        )
    }

    #[test]
    fn a_density_for_a_fed_device_is_kept_and_the_latest_wins() {
        let (inbox, told) = inbox();
        inbox.feed("HGM-1", 3, DensitySource::Mqtt);
        let t = Instant::now();
        let a = inbox
            .post("HGM-1", Ok(730.0), DensitySource::Mqtt, "topic/a", t)
            .unwrap();
        let b = inbox
            .post("HGM-1", Ok(745.5), DensitySource::Mqtt, "topic/b", t)
            .unwrap();
        assert!(b > a);
        let o = inbox.latest("HGM-1").unwrap();
        assert_eq!((o.seq, o.kg_m3, o.source.as_str()), (b, 745.5, "topic/b"));
        assert!(told.lock().unwrap().is_empty());
    }

    #[test]
    fn refusals_name_the_value_and_the_source_and_keep_the_last_good_one() {
        let (inbox, told) = inbox();
        inbox.feed("HGM-1", 3, DensitySource::Mqtt);
        let t = Instant::now();
        inbox
            .post("HGM-1", Ok(730.0), DensitySource::Mqtt, "good", t)
            .unwrap();
        for (v, needle) in [
            (1.65, "looks like g/cm3"),
            (0.0, "outside 10..=5000"),
            (-700.0, "outside"),
            (6000.0, "outside"),
            (f64::NAN, "not a number"),
            (f64::INFINITY, "not a number"),
        ] {
            let e = inbox.post(
                "HGM-1",
                Ok(v),
                DensitySource::Mqtt,
                "spBv1.0/g/DCMD/n/HGM-1",
                t,
            );
            assert!(e.as_ref().is_err_and(|e| e.contains(needle)), "{v}: {e:?}");
        }
        let e = inbox.post(
            "OTHER-2",
            Ok(730.0),
            DensitySource::Mqtt,
            "x/OTHER-2/density",
            t,
        );
        assert!(e.is_err_and(|e| e.contains("no device OTHER-2")));
        assert_eq!(inbox.latest("HGM-1").unwrap().kg_m3, 730.0);
        assert!(inbox.latest("OTHER-2").is_none());
        let told = told.lock().unwrap();
        assert_eq!(told.len(), 7);
        assert_eq!(told[0].unit, 3);
        assert_eq!(told[6].unit, 0);
        assert!(told[0].text.contains("spBv1.0/g/DCMD/n/HGM-1") && told[0].text.contains("1.65"));
        assert!(told.iter().all(|n| n.text.contains("nothing sent")));
    }

    #[test]
    fn a_device_takes_its_density_only_from_the_source_its_site_entry_names() {
        let (inbox, told) = inbox();
        inbox.feed("HGM-1", 3, DensitySource::Modbus);
        inbox.feed("HGM-2", 4, DensitySource::Mqtt);
        let t = Instant::now();
        let e = inbox.post(
            "HGM-1",
            Ok(730.0),
            DensitySource::Mqtt,
            "spBv1.0/g/DCMD/n/HGM-1",
            t,
        );
        assert!(
            e.as_ref()
                .is_err_and(|e| e.contains("takes its density from modbus")),
            "{e:?}"
        );
        assert!(inbox.latest("HGM-1").is_none());
        assert_eq!(
            inbox.serial_of(3, DensitySource::Modbus).as_deref(),
            Some("HGM-1")
        );
        assert_eq!(inbox.serial_of(4, DensitySource::Modbus), None);
        assert_eq!(
            inbox.serial_of(4, DensitySource::Mqtt).as_deref(),
            Some("HGM-2")
        );
        inbox
            .post(
                "HGM-1",
                Ok(1650.0),
                DensitySource::Modbus,
                "Modbus TCP unit 3 from 10.20.0.5",
                t,
            )
            .unwrap();
        assert_eq!(inbox.latest("HGM-1").unwrap().kg_m3, 1650.0);
        // Another device answering on unit 3 replaces the first, and does
        // not get its density.
        inbox.feed("HGM-9", 3, DensitySource::Modbus);
        assert_eq!(
            inbox.serial_of(3, DensitySource::Modbus).as_deref(),
            Some("HGM-9")
        );
        assert!(!inbox.is_fed("HGM-1"));
        assert!(inbox.latest("HGM-1").is_none() && inbox.latest("HGM-9").is_none());
        // A device that moves to another unit (or source) leaves its
        // density behind; one that answers again where it was keeps it.
        inbox
            .post("HGM-2", Ok(720.0), DensitySource::Mqtt, "topic", t)
            .unwrap();
        inbox.feed("HGM-2", 4, DensitySource::Mqtt);
        assert_eq!(inbox.latest("HGM-2").unwrap().kg_m3, 720.0);
        inbox.feed("HGM-2", 5, DensitySource::Mqtt);
        assert!(inbox.latest("HGM-2").is_none());
        assert_eq!(told.lock().unwrap().len(), 1);
    }

    fn dcmd(name: &str, value: Option<Value>) -> Vec<u8> {
        Payload {
            timestamp: Some(1),
            metrics: vec![Metric {
                name: Some(name.into()),
                value,
                ..Metric::default()
            }],
            seq: Some(0),
        }
        .to_bytes()
    }

    #[test]
    fn a_dcmd_gives_its_density_metric_in_any_numeric_type() {
        for v in [
            Value::FloatValue(730.0),
            Value::DoubleValue(730.0),
            Value::IntValue(730),
            Value::LongValue(730),
        ] {
            assert_eq!(
                from_sparkplug(&dcmd(BULK_DENSITY, Some(v))),
                Some(Ok(730.0))
            );
        }
        // A Float is taken at its shortest decimal form.
        assert_eq!(
            from_sparkplug(&dcmd(BULK_DENSITY, Some(Value::FloatValue(1.65)))),
            Some(Ok(1.65))
        );
        assert!(from_sparkplug(&dcmd(
            "Node Control/Rebirth",
            Some(Value::BooleanValue(true))
        ))
        .is_none());
        let text = dcmd(BULK_DENSITY, Some(Value::StringValue("730".into())));
        assert!(from_sparkplug(&text).is_some_and(|r| r.is_err_and(|e| e.contains("not a number"))));
        assert!(from_sparkplug(&dcmd(BULK_DENSITY, None)).is_some_and(|r| r.is_err()));
        assert!(from_sparkplug(&[0xff, 0xff, 0xff]).is_some_and(|r| r.is_err()));
    }

    #[test]
    fn a_json_message_gives_its_density_or_says_the_shape_expected() {
        assert_eq!(from_json(br#"{"bulk_density_kg_m3": 1650}"#), Ok(1650.0));
        assert_eq!(
            from_json(br#"{"bulk_density_kg_m3": 742.5, "by": "belt 3"}"#),
            Ok(742.5)
        );
        for bad in [
            &b"1650"[..],
            br#"{"kg_m3": 1650}"#,
            b"dense",
            br#"{"bulk_density_kg_m3": "1650"}"#,
        ] {
            let e = from_json(bad).unwrap_err();
            assert!(
                e.contains("expected {\"bulk_density_kg_m3\": NUMBER}"),
                "{e}"
            );
        }
    }
}
