//! Golden frames: complete encoded frames kept as bytes, so that any change
//! of the wire format (field order, a variant's position, the header, the CRC,
//! COBS, the quantisation of a reading, the auth tag input) fails here first.
//! The same bytes are shown in `protocol/WIRE.md`; if a change is intended,
//! raise the protocol version and update both.
//!
//! The frames of protocol 1.0 and 1.1 are kept as a 1.1 peer writes them
//! (header `0x11`): a 1.2 peer encodes them byte for byte the same under
//! that header and decodes them. The frames new in 1.2 carry `0x12`.

use fringe_protocol::frame::encode_with_version;
use fringe_protocol::*;

/// `HostFrame { id: 1, auth: None, request: Identify { host: 1.1 } }`.
pub const IDENTIFY: &[u8] = &[
    0x03, 0x11, 0x01, 0x01, 0x07, 0x01, 0x01, 0xfa, 0x58, 0x34, 0x2a, 0x00,
];
/// `DeviceFrame::Reading(streamed_reading())`.
pub const READING: &[u8] = &[
    0x22, 0x11, 0x02, 0x03, 0xd2, 0x09, 0x80, 0xe0, 0x9a, 0xf7, 0xa2, 0x34, 0xac, 0xc5, 0x27, 0x36,
    0x7f, 0x87, 0xa2, 0x39, 0x20, 0x4b, 0x80, 0x41, 0x6a, 0xf7, 0x2b, 0x38, 0xa6, 0x9b, 0xc4, 0x3b,
    0xc0, 0x49, 0x09, 0x3b, 0xf1, 0x0e, 0x01, 0xb6, 0x05, 0x9a, 0x01, 0x0d, 0x1c, 0xa7, 0x40, 0x0e,
    0x9b, 0x03, 0x5d, 0x21, 0xc4, 0x9a, 0x70, 0x9e, 0x00,
];
/// `DeviceFrame::Error { id: 42, NoSuchSlot, "product slot 5 is empty" }`.
pub const ERROR: &[u8] = &[
    0x21, 0x11, 0x01, 0x2a, 0x04, 0x17, 0x70, 0x72, 0x6f, 0x64, 0x75, 0x63, 0x74, 0x20, 0x73, 0x6c,
    0x6f, 0x74, 0x20, 0x35, 0x20, 0x69, 0x73, 0x20, 0x65, 0x6d, 0x70, 0x74, 0x79, 0x5b, 0x83, 0x06,
    0xc6, 0x00,
];
/// A signed `WriteProductCal` of slot 2 (see the test).
pub const WRITE_PRODUCT_CAL: &[u8] = &[
    0x35, 0x11, 0x09, 0x01, 0x11, 0x9e, 0x76, 0xed, 0x54, 0x59, 0x34, 0xdc, 0x5d, 0x37, 0x70, 0x49,
    0xcb, 0x13, 0x8f, 0x2b, 0x92, 0xb7, 0x9a, 0x75, 0x79, 0xd4, 0x65, 0x2f, 0xe9, 0x9a, 0x3f, 0xd6,
    0x0c, 0xcd, 0x8f, 0x13, 0x6e, 0x08, 0x02, 0x0d, 0x57, 0x68, 0x65, 0x61, 0x74, 0x2c, 0x20, 0x6c,
    0x69, 0x6e, 0x65, 0x20, 0x32, 0x01, 0x02, 0x03, 0x01, 0x03, 0xa0, 0x3f, 0x01, 0x01, 0x02, 0x3f,
    0x01, 0x03, 0x80, 0xbd, 0x01, 0x03, 0x10, 0x41, 0x01, 0x03, 0xb0, 0x41, 0x01, 0x03, 0xa0, 0x40,
    0x01, 0x04, 0x34, 0x42, 0x01, 0x01, 0x03, 0x40, 0x40, 0x01, 0x03, 0xf0, 0x41, 0x01, 0x0c, 0x80,
    0x3e, 0x80, 0x92, 0xb3, 0xd8, 0x06, 0xc7, 0x02, 0x0f, 0xef, 0x00,
];
/// `HostFrame { id: 3, auth: None, request: ReadSettings }` (protocol 1.1).
pub const READ_SETTINGS: &[u8] = &[0x03, 0x11, 0x03, 0x06, 0x12, 0xf7, 0x20, 0x1e, 0x38, 0x00];
/// A signed `WriteSettings` (see the test; protocol 1.1).
pub const WRITE_SETTINGS: &[u8] = &[
    0x38, 0x11, 0x0a, 0x01, 0x12, 0x2e, 0x4e, 0x51, 0x61, 0x8e, 0xd2, 0x80, 0xf9, 0x5f, 0x7b, 0x6b,
    0xe2, 0x12, 0x9b, 0xd0, 0x8f, 0x37, 0xf8, 0x88, 0x52, 0xd1, 0x72, 0x38, 0xf5, 0xee, 0x81, 0x5e,
    0xe9, 0x54, 0xd4, 0x02, 0x6b, 0x13, 0x0f, 0x4c, 0x32, 0x2d, 0x44, 0x52, 0x59, 0x45, 0x52, 0x2d,
    0x4d, 0x54, 0x2d, 0x32, 0x30, 0x31, 0xe8, 0x07, 0x01, 0x01, 0x01, 0x01, 0x01, 0x03, 0xf0, 0x41,
    0x07, 0x90, 0x4e, 0xf1, 0x30, 0x6c, 0x84, 0x00,
];
/// `DeviceFrame::Response { id: 3, response: Settings(line2_settings()) }`.
pub const SETTINGS: &[u8] = &[
    0x02, 0x11, 0x15, 0x03, 0x0b, 0x0f, 0x4c, 0x32, 0x2d, 0x44, 0x52, 0x59, 0x45, 0x52, 0x2d, 0x4d,
    0x54, 0x2d, 0x32, 0x30, 0x31, 0xe8, 0x07, 0x01, 0x01, 0x01, 0x01, 0x01, 0x03, 0xf0, 0x41, 0x07,
    0x90, 0x4e, 0xa7, 0x16, 0xf7, 0x9f, 0x00,
];
/// `HostFrame { id: 4, auth: None, request: ReadModbus }` (protocol 1.2).
pub const READ_MODBUS: &[u8] = &[0x03, 0x12, 0x04, 0x06, 0x14, 0xa9, 0x3c, 0x87, 0xc6, 0x00];
/// A signed `WriteModbus` (see the test; protocol 1.2).
pub const WRITE_MODBUS: &[u8] = &[
    0x2f, 0x12, 0x0b, 0x01, 0x13, 0x40, 0x0d, 0x6f, 0x5f, 0xf4, 0xf5, 0xec, 0xf9, 0xf5, 0x8f, 0x51,
    0x48, 0x13, 0xa5, 0xd1, 0x43, 0x4d, 0x0f, 0x6f, 0x3a, 0x29, 0x65, 0x1e, 0xff, 0x6a, 0x9f, 0xd9,
    0xec, 0xae, 0x26, 0x7a, 0x4d, 0x15, 0x0c, 0x80, 0xac, 0x02, 0x02, 0xde, 0x55, 0xb1, 0xcc, 0x00,
];
/// `DeviceFrame::Response { id: 4, response: Modbus(line2_modbus()) }` (protocol 1.2).
pub const MODBUS: &[u8] = &[
    0x02, 0x12, 0x0c, 0x04, 0x0c, 0x0c, 0x80, 0xac, 0x02, 0x02, 0xa1, 0x66, 0x41, 0xc3, 0x00,
];
/// `DeviceFrame::Event` of a `ModbusChanged` (see the test; protocol 1.2).
pub const MODBUS_CHANGED: &[u8] = &[
    0x10, 0x12, 0x03, 0x3b, 0x03, 0xc0, 0x89, 0xa2, 0xf7, 0xa2, 0x34, 0x0a, 0x01, 0x80, 0x96, 0x01,
    0x0a, 0x0c, 0x80, 0xac, 0x02, 0x02, 0x10, 0xfb, 0x57, 0x54, 0x00,
];
/// A signed `SetDensity` (see the test; protocol 1.4).
pub const SET_DENSITY: &[u8] = &[
    0x27, 0x14, 0x0c, 0x01, 0x14, 0x09, 0x05, 0xa8, 0x47, 0xc3, 0xdb, 0x0c, 0xff, 0x85, 0x40, 0xca,
    0x1b, 0xbd, 0xc4, 0x6b, 0xc5, 0x6b, 0x46, 0xb5, 0x2e, 0x69, 0x9d, 0x80, 0xa7, 0xf6, 0x46, 0x31,
    0x40, 0x07, 0x19, 0xcf, 0xac, 0x16, 0x03, 0x0b, 0x40, 0xce, 0x44, 0xe0, 0xd4, 0x03, 0x3e, 0x4a,
    0xf7, 0x76, 0x00,
];
/// `DeviceFrame::Event` of a `SettingsChanged` (see the test).
pub const SETTINGS_CHANGED: &[u8] = &[
    0x18, 0x11, 0x03, 0x39, 0x03, 0xe0, 0xb4, 0x9e, 0xf7, 0xa2, 0x34, 0x09, 0x5b, 0xf8, 0xf2, 0xc0,
    0xad, 0xd3, 0xed, 0x1d, 0xba, 0xda, 0xac, 0x54, 0x00,
];
/// `DeviceFrame::Event` of a `Fault { code: StaleOutput }` (see the test).
pub const STALE_OUTPUT: &[u8] = &[
    0x11, 0x11, 0x03, 0x3a, 0x03, 0xf8, 0xa9, 0x9f, 0xf7, 0xa2, 0x34, 0x06, 0x05, 0x9b, 0x51, 0x7f,
    0x39, 0x00,
];

/// `DeviceFrame::Event` number 59: a write refused during a hold
/// (`AuthFailed { Throttled, counter 1042 }`), protocol 1.3. Computed
/// outside Rust first (Python: LEB128 varints, `zlib.crc32`, a ten-line
/// COBS encoder; the same script reproduces `STALE_OUTPUT` byte for byte).
pub const WRITES_HELD: &[u8] = &[
    0x13, 0x13, 0x03, 0x3b, 0x03, 0x90, 0x9f, 0xa0, 0xf7, 0xa2, 0x34, 0x04, 0x03, 0x92, 0x08, 0x6f,
    0xf9, 0x15, 0x95, 0x00,
];

fn hex(b: &[u8]) -> String {
    b.iter()
        .map(|x| format!("{x:02x}"))
        .collect::<Vec<_>>()
        .join(" ")
}

/// A 1.1 peer's header.
const V1_1: Version = Version { major: 1, minor: 1 };

/// A frame of protocol 1.0 or 1.1, as a 1.1 peer writes it.
fn check_golden<T>(what: &str, msg: &T, golden: &[u8])
where
    T: serde::Serialize + serde::de::DeserializeOwned + PartialEq + Clone + std::fmt::Debug,
{
    check_golden_as(V1_1, what, msg, golden);
}

/// A frame written with `version` in its header.
fn check_golden_as<T>(version: Version, what: &str, msg: &T, golden: &[u8])
where
    T: serde::Serialize + serde::de::DeserializeOwned + PartialEq + Clone + std::fmt::Debug,
{
    let mut buf = [0u8; frame::MAX_FRAME_LEN];
    let n = encode_with_version(msg, version, &mut buf).unwrap();
    let wire = &buf[..n];
    assert_eq!(
        wire,
        golden,
        "{what}: wire format changed.\n  now:    {}\n  golden: {}",
        hex(wire),
        hex(golden)
    );
    let mut dec = FrameDecoder::<T>::new();
    let out: Vec<_> = dec.push(golden).collect();
    assert_eq!(out, vec![Ok(msg.clone())], "{what}: golden bytes decode");
}

/// Harrowgate Mill, line 2 dryer outlet: the demo device of these examples.
const SERIAL: &str = "HM-L2-0007";
const KEY: auth::Key = *b"harrowgate-mill-line-2-demo-key!";

/// A reading whose values binary16 and the fixed-point steps carry exactly,
/// so that decoding gives it back equal.
fn streamed_reading() -> Reading {
    Reading {
        seq: Seq {
            boot: 3,
            counter: 1234,
        },
        time_ms: 1_796_083_200_000, // 2026-12-01T00:00:00Z
        channels: [
            ChannelValue {
                g_s: 2.5e-6,
                b_s: 3.1e-4,
                eps_re: 14.25,
                eps_im: 2.75,
            },
            ChannelValue {
                g_s: 4.1e-5,
                b_s: 6.0e-3,
                eps_re: 11.5,
                eps_im: 0.875,
            },
        ],
        temperature_c: 38.25,
        moisture_pct: Some(14.62),
        uncertainty_pct: 0.41,
        flags: Flags::empty(),
        cell_cal: CalId([0x1c, 0xa7, 0x40, 0x0e]),
        product_cal: CalId([0x9b, 0x03, 0x5d, 0x21]),
    }
}

#[test]
fn golden_identify() {
    let msg = HostFrame {
        id: 1,
        auth: None,
        request: Request::Identify { host: V1_1 },
    };
    check_golden("HostFrame Identify", &msg, IDENTIFY);
}

#[test]
fn golden_streamed_reading() {
    let r = streamed_reading();
    assert_eq!(
        r.on_wire(),
        r,
        "golden reading must be exactly representable"
    );
    let msg = DeviceFrame::Reading(r);
    let golden = READING;
    check_golden("DeviceFrame Reading", &msg, golden);
    assert!(
        golden.len() <= 64,
        "a streamed reading is {} bytes",
        golden.len()
    );
}

#[test]
fn golden_error() {
    let msg = DeviceFrame::Error {
        id: 42,
        code: ErrorCode::NoSuchSlot,
        reason: short_string("product slot 5 is empty"),
    };
    check_golden("DeviceFrame Error", &msg, ERROR);
}

#[test]
fn golden_signed_write_product_cal() {
    let cal = ProductCal {
        name: short_string("Wheat, line 2"),
        model: ModelKind::SingleFrequency,
        basis: Basis::Wet,
        params: [1.25f32, 0.5, -0.0625].into_iter().collect(),
        moisture_pct: Range {
            min: 9.0,
            max: 22.0,
        },
        temperature_c: Range {
            min: 5.0,
            max: 45.0,
        },
        inputs: [Range {
            min: 3.0,
            max: 30.0,
        }]
        .into_iter()
        .collect(),
        sec_pct: 0.25,
        made_s: 1_796_000_000,
    };
    let request = Request::WriteProductCal { slot: 2, cal };
    let auth = auth::sign(&KEY, SERIAL, 17, &request).unwrap();
    assert_eq!(auth::verify(&KEY, SERIAL, Some(&auth), &request), Ok(17));
    let msg = HostFrame {
        id: 9,
        auth: Some(auth),
        request,
    };
    check_golden(
        "HostFrame WriteProductCal (signed)",
        &msg,
        WRITE_PRODUCT_CAL,
    );
}

/// The settings of the examples: Harrowgate Mill, line 2 dryer outlet,
/// tag `L2-DRYER-MT-201` (invented), the defaults otherwise.
fn line2_settings() -> Settings {
    Settings {
        tag: short_string("L2-DRYER-MT-201"),
        interval_ms: 1000,
        output: OutputConfig {
            span_low_pct: 0.0,
            span_high_pct: 30.0,
            fail_high: false,
        },
        stale_timeout_ms: 10_000,
    }
}

#[test]
fn golden_read_settings() {
    let msg = HostFrame {
        id: 3,
        auth: None,
        request: Request::ReadSettings,
    };
    check_golden("HostFrame ReadSettings", &msg, READ_SETTINGS);
}

#[test]
fn golden_signed_write_settings() {
    let request = Request::WriteSettings(line2_settings());
    let auth = auth::sign(&KEY, SERIAL, 18, &request).unwrap();
    assert_eq!(auth::verify(&KEY, SERIAL, Some(&auth), &request), Ok(18));
    let msg = HostFrame {
        id: 10,
        auth: Some(auth),
        request,
    };
    check_golden("HostFrame WriteSettings (signed)", &msg, WRITE_SETTINGS);
}

#[test]
fn golden_settings_response() {
    let msg = DeviceFrame::Response {
        id: 3,
        response: Response::Settings(line2_settings()),
    };
    check_golden("DeviceFrame Settings", &msg, SETTINGS);
}

#[test]
fn golden_settings_changed_event() {
    // The ids are the settings' content ids: the defaults with an empty
    // tag before, the line 2 tag after (SHA-256 computed outside Rust too).
    let before = Settings {
        tag: short_string(""),
        ..line2_settings()
    };
    assert_eq!(before.content_id(), CalId([0x5b, 0xf8, 0xf2, 0xc0]));
    assert_eq!(
        line2_settings().content_id(),
        CalId([0xad, 0xd3, 0xed, 0x1d])
    );
    let msg = DeviceFrame::Event(Event {
        number: 57,
        boot: 3,
        time_ms: 1_796_083_260_000, // 2026-12-01T00:01:00Z
        kind: EventKind::SettingsChanged {
            old: before.content_id(),
            new: line2_settings().content_id(),
        },
    });
    check_golden("DeviceFrame Event SettingsChanged", &msg, SETTINGS_CHANGED);
}

#[test]
fn golden_stale_output_event() {
    let msg = DeviceFrame::Event(Event {
        number: 58,
        boot: 3,
        time_ms: 1_796_083_275_000, // 15 s later
        kind: EventKind::Fault {
            code: FaultCode::StaleOutput,
        },
    });
    check_golden("DeviceFrame Event Fault StaleOutput", &msg, STALE_OUTPUT);
}

/// The Modbus settings of the examples: line 2's device moved to unit 12
/// at 38400 baud without parity (8N2) on a shared RS-485 segment
/// (invented).
fn line2_modbus() -> ModbusSettings {
    ModbusSettings {
        unit_id: 12,
        baud: 38_400,
        parity: ModbusParity::None,
    }
}

/// The defaults: unit 1, 19200 baud, even parity.
const DEFAULT_MODBUS: ModbusSettings = ModbusSettings {
    unit_id: 1,
    baud: 19_200,
    parity: ModbusParity::Even,
};

const V1_2: Version = Version { major: 1, minor: 2 };
const V1_3: Version = Version { major: 1, minor: 3 };
const V1_4: Version = Version { major: 1, minor: 4 };

/// A signed `SetDensity` of 1,650 kg/m^3 held 60 s for boot 3 (protocol 1.4): wet sand
/// from the weigh belt ahead of the sensor (values invented for the example).
#[test]
fn golden_signed_set_density() {
    let request = Request::SetDensity {
        boot: 3,
        kg_m3: 1650.0,
        hold_ms: 60_000,
    };
    assert!(request.needs_auth());
    let auth = auth::sign(&KEY, SERIAL, 20, &request).unwrap();
    assert_eq!(auth::verify(&KEY, SERIAL, Some(&auth), &request), Ok(20));
    // The tag covers the value: another density does not verify.
    for other in [
        Request::SetDensity {
            boot: 3,
            kg_m3: 1651.0,
            hold_ms: 60_000,
        },
        Request::SetDensity {
            boot: 4,
            kg_m3: 1650.0,
            hold_ms: 60_000,
        },
    ] {
        assert_eq!(
            auth::verify(&KEY, SERIAL, Some(&auth), &other),
            Err(AuthFailure::BadTag),
            "{other:?}"
        );
    }
    let msg = HostFrame {
        id: 12,
        auth: Some(auth),
        request,
    };
    check_golden_as(V1_4, "HostFrame SetDensity (signed)", &msg, SET_DENSITY);
}

#[test]
fn golden_read_modbus() {
    let msg = HostFrame {
        id: 4,
        auth: None,
        request: Request::ReadModbus,
    };
    check_golden_as(V1_2, "HostFrame ReadModbus", &msg, READ_MODBUS);
}

#[test]
fn golden_signed_write_modbus() {
    let request = Request::WriteModbus(line2_modbus());
    assert!(request.needs_auth());
    let auth = auth::sign(&KEY, SERIAL, 19, &request).unwrap();
    assert_eq!(auth::verify(&KEY, SERIAL, Some(&auth), &request), Ok(19));
    let msg = HostFrame {
        id: 11,
        auth: Some(auth),
        request,
    };
    check_golden_as(V1_2, "HostFrame WriteModbus (signed)", &msg, WRITE_MODBUS);
}

#[test]
fn golden_modbus_response() {
    let msg = DeviceFrame::Response {
        id: 4,
        response: Response::Modbus(line2_modbus()),
    };
    check_golden_as(V1_2, "DeviceFrame Modbus", &msg, MODBUS);
}

#[test]
fn golden_modbus_changed_event() {
    // The content ids a 1.1 host is sent instead (SettingsChanged; SHA-256
    // computed outside Rust too).
    assert_eq!(DEFAULT_MODBUS.content_id(), CalId([0x09, 0xc5, 0x30, 0x0a]));
    assert_eq!(line2_modbus().content_id(), CalId([0xae, 0xf5, 0x37, 0x80]));
    let msg = DeviceFrame::Event(Event {
        number: 59,
        boot: 3,
        time_ms: 1_796_083_320_000, // 2026-12-01T00:02:00Z
        kind: EventKind::ModbusChanged {
            old: DEFAULT_MODBUS,
            new: line2_modbus(),
        },
    });
    check_golden_as(
        V1_2,
        "DeviceFrame Event ModbusChanged",
        &msg,
        MODBUS_CHANGED,
    );
}

/// `ModbusParity` tags: the variant's position, appended only.
#[test]
fn golden_modbus_parity_tags() {
    for (p, tag) in [
        (ModbusParity::Even, 0x00u8),
        (ModbusParity::Odd, 0x01),
        (ModbusParity::None, 0x02),
    ] {
        let mut buf = [0u8; 4];
        assert_eq!(postcard::to_slice(&p, &mut buf).unwrap(), &[tag], "{p:?}");
    }
    assert!(postcard::from_bytes::<ModbusParity>(&[0x03]).is_err());
}

/// The library's own encoder now writes 1.4; a 1.2 frame (header `0x12`)
/// still decodes (equal majors).
#[test]
fn version_1_4_header() {
    assert_eq!(PROTOCOL_VERSION, V1_4);
    let msg = HostFrame {
        id: 4,
        auth: None,
        request: Request::ReadModbus,
    };
    let wire = frame::encode_vec(&msg).unwrap();
    assert_eq!(wire[1], 0x14);
    // The payload is the same; the header and so the CRC-32 differ.
    assert_eq!(wire.get(2..5), READ_MODBUS.get(2..5), "payload");
    assert_ne!(wire.get(5..), READ_MODBUS.get(5..), "CRC over the header");
    let mut dec = FrameDecoder::<HostFrame>::new();
    assert_eq!(dec.push(READ_MODBUS).collect::<Vec<_>>(), vec![Ok(msg)]);
}

/// A write refused during a hold after failed writes (protocol 1.3).
#[test]
fn golden_writes_held_event() {
    let msg = DeviceFrame::Event(Event {
        number: 59,
        boot: 3,
        time_ms: 1_796_083_290_000, // 30 s after the settings change
        kind: EventKind::AuthFailed {
            reason: AuthFailure::Throttled,
            counter: 1042,
        },
    });
    check_golden_as(
        V1_3,
        "DeviceFrame Event AuthFailed Throttled",
        &msg,
        WRITES_HELD,
    );
}

/// `AuthFailure` tags: the variant's position, appended only (1.3 appended
/// `Throttled`, tag 3).
#[test]
fn golden_auth_failure_tags() {
    for (r, tag) in [
        (AuthFailure::Missing, 0x00u8),
        (AuthFailure::BadTag, 0x01),
        (AuthFailure::Replay, 0x02),
        (AuthFailure::Throttled, 0x03),
    ] {
        let mut buf = [0u8; 4];
        assert_eq!(postcard::to_slice(&r, &mut buf).unwrap(), &[tag], "{r:?}");
    }
    assert!(postcard::from_bytes::<AuthFailure>(&[0x04]).is_err());
}

/// `ModelKind` is a postcard enum: its tag is the variant's position, so
/// variants are only appended (issue 11 appended `Multivariate`, tag 2).
#[test]
fn golden_model_kind_tags() {
    for (kind, tag) in [
        (ModelKind::SingleFrequency, 0x00u8),
        (ModelKind::Relaxation, 0x01),
        (ModelKind::Multivariate, 0x02),
    ] {
        let mut buf = [0u8; 4];
        let out = postcard::to_slice(&kind, &mut buf).unwrap();
        assert_eq!(out, &[tag], "{kind:?}");
        assert_eq!(postcard::from_bytes::<ModelKind>(&[tag]).unwrap(), kind);
    }
    assert!(postcard::from_bytes::<ModelKind>(&[0x03]).is_err());
}

/// The fuzz seed corpus holds these same frames (after the chunk-size byte
/// the decoder target reads first; payload-only for the payload target), so
/// it cannot drift from the wire format.
#[test]
fn fuzz_seeds_are_the_golden_frames() {
    let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("fuzz/seeds");
    for (name, golden) in [
        ("identify", IDENTIFY),
        ("reading", READING),
        ("error", ERROR),
        ("write-product-cal", WRITE_PRODUCT_CAL),
        ("read-settings", READ_SETTINGS),
        ("write-settings", WRITE_SETTINGS),
        ("settings", SETTINGS),
        ("settings-changed", SETTINGS_CHANGED),
        ("stale-output", STALE_OUTPUT),
        ("read-modbus", READ_MODBUS),
        ("write-modbus", WRITE_MODBUS),
        ("modbus", MODBUS),
        ("modbus-changed", MODBUS_CHANGED),
        ("writes-held", WRITES_HELD),
    ] {
        let seed = std::fs::read(dir.join("decoder").join(name)).unwrap();
        assert_eq!(&seed[1..], golden, "fuzz/seeds/decoder/{name}");
        // The payload seed is the frame's raw bytes without header and CRC.
        let mut raw = [0u8; frame::MAX_RAW_LEN];
        let n = cobs::decode(&golden[..golden.len() - 1], &mut raw)
            .unwrap()
            .frame_size();
        let payload = std::fs::read(dir.join("payload").join(name)).unwrap();
        assert_eq!(payload, &raw[1..n - 4], "fuzz/seeds/payload/{name}");
    }
}
