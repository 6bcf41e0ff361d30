//! Sparkplug B payloads (Eclipse Sparkplug 3.0.0) for Fringe's readings.
//!
//! The message types are the part of the Eclipse Tahu protobuf schema
//! (`sparkplug_b.proto`, package `org.eclipse.tahu.protobuf`) that Fringe
//! sends: `Payload` and `Payload.Metric` with its scalar values, declared
//! here with their schema field numbers for prost to encode. The test
//! `tests/tests/plant.rs` decodes what the gateway publishes with the Tahu
//! schema in Python (package `tahu`), a decoder that shares nothing with
//! this one.
//!
//! Topics: `spBv1.0/{group}/{NBIRTH|NDEATH|DBIRTH|DDEATH|DDATA}/{edge node}[/{device}]`.
//! Sequence numbers run 0-255 per edge-node session: NBIRTH carries 0, every
//! later message of the session the next number. The NDEATH is the MQTT
//! will and carries the session's `bdSeq`, as does its NBIRTH.
//!
//! Metric names are ours (see [`metric`]); each DDATA carries every metric,
//! so a consumer needs no alias table.

use fringe_protocol::Reading;
use fringe_registers::{status_word, Snapshot};

/// Sparkplug B topic namespace.
pub const NAMESPACE: &str = "spBv1.0";

/// Tahu `DataType` values used here (sparkplug_b.proto, `enum DataType`).
pub mod datatype {
    /// UInt32.
    pub const UINT32: u32 = 7;
    /// UInt64.
    pub const UINT64: u32 = 8;
    /// Float.
    pub const FLOAT: u32 = 9;
    /// Boolean.
    pub const BOOLEAN: u32 = 11;
    /// String.
    pub const STRING: u32 = 12;
    /// DateTime (ms since the Unix epoch, as UInt64).
    pub const DATETIME: u32 = 13;
}

/// Fringe's metric names.
pub mod metric {
    /// Node: the birth/death sequence number.
    pub const BD_SEQ: &str = "bdSeq";
    /// Node: Sparkplug's rebirth request metric (declared in NBIRTH).
    pub const REBIRTH: &str = "Node Control/Rebirth";
    /// Moisture, % on the calibration's basis (null when no valid value).
    pub const MOISTURE: &str = "moisture_pct";
    /// Its standard uncertainty, % moisture.
    pub const UNCERTAINTY: &str = "uncertainty_pct";
    /// The basis of the moisture, `wet` or `dry` (that of the product
    /// calibration the reading was computed with; null when not known).
    pub const MOISTURE_BASIS: &str = "moisture_basis";
    /// Product temperature, C.
    pub const TEMPERATURE: &str = "temperature_c";
    /// The status word of the Modbus map (NE 107 bits; docs/MODBUS.md).
    pub const STATUS: &str = "status";
    /// The device's quality flag bits.
    pub const FLAGS: &str = "flags";
    /// Boot counter of the reading.
    pub const BOOT: &str = "boot";
    /// Counter of the reading within its boot.
    pub const COUNTER: &str = "counter";
    /// The device's time of the reading.
    pub const DEVICE_TIME: &str = "device_time";
    /// A drift alarm: what drifted, since when, by how much, what to do.
    pub const ALARM: &str = "drift_alarm";
    /// The plant's bulk density, kg/m3: taken by DCMD (`crate::density`).
    pub const BULK_DENSITY: &str = "bulk_density_kg_m3";
}

/// `Payload.Metric` (sparkplug_b.proto), the scalar part.
#[derive(Clone, PartialEq, prost::Message)]
pub struct Metric {
    /// Metric name (field 1).
    #[prost(string, optional, tag = "1")]
    pub name: Option<String>,
    /// Alias (field 2; not used by Fringe).
    #[prost(uint64, optional, tag = "2")]
    pub alias: Option<u64>,
    /// Acquisition time, ms since the Unix epoch (field 3).
    #[prost(uint64, optional, tag = "3")]
    pub timestamp: Option<u64>,
    /// Tahu `DataType` (field 4).
    #[prost(uint32, optional, tag = "4")]
    pub datatype: Option<u32>,
    /// Historical data (field 5): sent later from the store-and-forward buffer.
    #[prost(bool, optional, tag = "5")]
    pub is_historical: Option<bool>,
    /// Transient (field 6).
    #[prost(bool, optional, tag = "6")]
    pub is_transient: Option<bool>,
    /// Explicitly null (field 7).
    #[prost(bool, optional, tag = "7")]
    pub is_null: Option<bool>,
    /// The value (fields 10-16).
    #[prost(oneof = "Value", tags = "10, 11, 12, 13, 14, 15, 16")]
    pub value: Option<Value>,
}

/// `Payload.Metric.value` (the scalar members of the oneof).
#[derive(Clone, PartialEq, prost::Oneof)]
pub enum Value {
    /// uint32 int_value = 10.
    #[prost(uint32, tag = "10")]
    IntValue(u32),
    /// uint64 long_value = 11.
    #[prost(uint64, tag = "11")]
    LongValue(u64),
    /// float float_value = 12.
    #[prost(float, tag = "12")]
    FloatValue(f32),
    /// double double_value = 13.
    #[prost(double, tag = "13")]
    DoubleValue(f64),
    /// bool boolean_value = 14.
    #[prost(bool, tag = "14")]
    BooleanValue(bool),
    /// string string_value = 15.
    #[prost(string, tag = "15")]
    StringValue(String),
    /// bytes bytes_value = 16.
    #[prost(bytes, tag = "16")]
    BytesValue(Vec<u8>),
}

/// `Payload` (sparkplug_b.proto).
#[derive(Clone, PartialEq, prost::Message)]
pub struct Payload {
    /// Time of sending, ms since the Unix epoch (field 1).
    #[prost(uint64, optional, tag = "1")]
    pub timestamp: Option<u64>,
    /// Metrics (field 2).
    #[prost(message, repeated, tag = "2")]
    pub metrics: Vec<Metric>,
    /// Sequence number 0-255 (field 3); absent in NDEATH.
    #[prost(uint64, optional, tag = "3")]
    pub seq: Option<u64>,
}

impl Payload {
    /// The protobuf bytes.
    pub fn to_bytes(&self) -> Vec<u8> {
        prost::Message::encode_to_vec(self)
    }
}

fn m(name: &str, datatype: u32, timestamp: u64, value: Option<Value>) -> Metric {
    Metric {
        name: Some(name.to_string()),
        timestamp: Some(timestamp),
        datatype: Some(datatype),
        is_null: value.is_none().then_some(true),
        value,
        ..Metric::default()
    }
}

/// The Sparkplug topic of a message.
pub fn topic(group: &str, kind: &str, node: &str, device: Option<&str>) -> String {
    match device {
        Some(d) => format!("{NAMESPACE}/{group}/{kind}/{node}/{d}"),
        None => format!("{NAMESPACE}/{group}/{kind}/{node}"),
    }
}

/// NBIRTH: `bdSeq` and the rebirth control, sequence 0.
pub fn node_birth(bd_seq: u64, now_ms: u64) -> Payload {
    Payload {
        timestamp: Some(now_ms),
        metrics: vec![
            m(
                metric::BD_SEQ,
                datatype::UINT64,
                now_ms,
                Some(Value::LongValue(bd_seq)),
            ),
            m(
                metric::REBIRTH,
                datatype::BOOLEAN,
                now_ms,
                Some(Value::BooleanValue(false)),
            ),
        ],
        seq: Some(0),
    }
}

/// NDEATH (the MQTT will): `bdSeq` only, no sequence number.
pub fn node_death(bd_seq: u64, now_ms: u64) -> Payload {
    Payload {
        timestamp: Some(now_ms),
        metrics: vec![m(
            metric::BD_SEQ,
            datatype::UINT64,
            now_ms,
            Some(Value::LongValue(bd_seq)),
        )],
        seq: None,
    }
}

/// The metrics of one reading (the DBIRTH and every DDATA carry them all),
/// its moisture on `basis` (`wet`, `dry`; `None`: not known). `time_ms`
/// stamps them; `historical` marks data sent late from the buffer.
pub fn reading_metrics(
    r: &Reading,
    basis: Option<&str>,
    time_ms: u64,
    historical: bool,
) -> Vec<Metric> {
    let status = status_word(&Snapshot {
        reading: Some(*r),
        age_s: 0,
        stale: false,
        connected: true,
        basis: None,
    });
    let valid = status & fringe_registers::STATUS_NO_VALUE == 0;
    let moisture = r.moisture_pct.filter(|_| valid).map(Value::FloatValue);
    let uncertainty = moisture
        .as_ref()
        .map(|_| Value::FloatValue(r.uncertainty_pct));
    let mut out = vec![
        m(metric::MOISTURE, datatype::FLOAT, time_ms, moisture),
        m(metric::UNCERTAINTY, datatype::FLOAT, time_ms, uncertainty),
        m(
            metric::MOISTURE_BASIS,
            datatype::STRING,
            time_ms,
            basis.map(|b| Value::StringValue(b.to_string())),
        ),
        m(
            metric::TEMPERATURE,
            datatype::FLOAT,
            time_ms,
            Some(Value::FloatValue(r.temperature_c)),
        ),
        m(
            metric::STATUS,
            datatype::UINT32,
            time_ms,
            Some(Value::IntValue(u32::from(status))),
        ),
        m(
            metric::FLAGS,
            datatype::UINT32,
            time_ms,
            Some(Value::IntValue(u32::from(r.flags.bits()))),
        ),
        m(
            metric::BOOT,
            datatype::UINT32,
            time_ms,
            Some(Value::IntValue(r.seq.boot)),
        ),
        m(
            metric::COUNTER,
            datatype::UINT64,
            time_ms,
            Some(Value::LongValue(u64::from(r.seq.counter))),
        ),
        m(
            metric::DEVICE_TIME,
            datatype::DATETIME,
            time_ms,
            Some(Value::LongValue(r.time_ms)),
        ),
    ];
    if historical {
        for x in &mut out {
            x.is_historical = Some(true);
        }
    }
    out
}

/// A DBIRTH before any reading: every metric declared, null.
pub fn empty_device_birth(seq: u8, now_ms: u64) -> Payload {
    let null = |name, dt| m(name, dt, now_ms, None);
    Payload {
        timestamp: Some(now_ms),
        metrics: vec![
            null(metric::MOISTURE, datatype::FLOAT),
            null(metric::UNCERTAINTY, datatype::FLOAT),
            null(metric::MOISTURE_BASIS, datatype::STRING),
            null(metric::TEMPERATURE, datatype::FLOAT),
            null(metric::STATUS, datatype::UINT32),
            null(metric::FLAGS, datatype::UINT32),
            null(metric::BOOT, datatype::UINT32),
            null(metric::COUNTER, datatype::UINT64),
            null(metric::DEVICE_TIME, datatype::DATETIME),
            null(metric::ALARM, datatype::STRING),
        ],
        seq: Some(u64::from(seq)),
    }
}

/// The bulk density a fed device takes by DCMD, declared (null) in its
/// DBIRTH ([`metric::BULK_DENSITY`]).
pub fn density_metric(now_ms: u64) -> Metric {
    m(metric::BULK_DENSITY, datatype::FLOAT, now_ms, None)
}

/// A DDATA of one reading, its moisture on `basis` ([`reading_metrics`]).
pub fn device_data(
    r: &Reading,
    basis: Option<&str>,
    time_ms: u64,
    historical: bool,
    seq: u8,
    now_ms: u64,
) -> Payload {
    Payload {
        timestamp: Some(now_ms),
        metrics: reading_metrics(r, basis, time_ms, historical),
        seq: Some(u64::from(seq)),
    }
}

/// A DDATA of one drift alarm (its text in [`metric::ALARM`]).
pub fn alarm_data(text: &str, time_ms: u64, historical: bool, seq: u8, now_ms: u64) -> Payload {
    let mut a = m(
        metric::ALARM,
        datatype::STRING,
        time_ms,
        Some(Value::StringValue(text.to_string())),
    );
    if historical {
        a.is_historical = Some(true);
    }
    Payload {
        timestamp: Some(now_ms),
        metrics: vec![a],
        seq: Some(u64::from(seq)),
    }
}

/// A DDEATH (sequence number only).
pub fn device_death(seq: u8, now_ms: u64) -> Payload {
    Payload {
        timestamp: Some(now_ms),
        metrics: Vec::new(),
        seq: Some(u64::from(seq)),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use prost::Message;

    #[test]
    fn a_float_metric_encodes_as_the_schema_says() {
        // Field 2 (metrics) holding name (1) "x", datatype (4) 9 and
        // float_value (12) 1.5: the bytes the Tahu schema's Python
        // classes (PyPI `tahu` 0.1.2 on protobuf 3.19.1) wrote for the same
        // message, 120a0a01782009650000c03f (computed once, 2026-12-02).
        let p = Payload {
            timestamp: None,
            metrics: vec![Metric {
                name: Some("x".into()),
                datatype: Some(9),
                value: Some(Value::FloatValue(1.5)),
                ..Metric::default()
            }],
            seq: None,
        };
        assert_eq!(
            p.to_bytes(),
            [0x12, 0x0a, 0x0a, 0x01, b'x', 0x20, 0x09, 0x65, 0x00, 0x00, 0xc0, 0x3f]
        );
        assert_eq!(Payload::decode(p.to_bytes().as_slice()).unwrap(), p);
    }

    #[test]
    fn topics_follow_the_namespace() {
        assert_eq!(
            topic("plant", "NBIRTH", "gw1", None),
            "spBv1.0/plant/NBIRTH/gw1"
        );
        assert_eq!(
            topic("plant", "DDATA", "gw1", Some("HGM-L2-0001")),
            "spBv1.0/plant/DDATA/gw1/HGM-L2-0001"
        );
    }
}
