//! Round trips of every message type through postcard and through complete
//! frames, with proptest over field values (any `f32` bit pattern included).
//! Floats are compared bitwise (see `common::same`): a NaN must come back as
//! the same NaN, `-0.0` as `-0.0`.

mod common;

use common::*;
use fringe_protocol::frame::{encode, encode_vec};
use fringe_protocol::*;
use proptest::prelude::*;
use serde::{de::DeserializeOwned, Serialize};
use std::fmt::Debug;

/// postcard alone: decode(encode(v)) is `expected`, bit for bit, and encoding
/// that again gives the same bytes.
fn postcard_rt<T>(v: &T, expected: &T) -> Result<(), TestCaseError>
where
    T: Serialize + DeserializeOwned + Debug,
{
    let b = bytes(v);
    let back: T =
        postcard::from_bytes(&b).map_err(|e| TestCaseError::fail(format!("decode {v:?}: {e}")))?;
    prop_assert!(same(&back, expected), "{back:?} != {expected:?}");
    prop_assert_eq!(bytes(&back), bytes(expected));
    Ok(())
}

macro_rules! rt_exact {
    ($name:ident, $strategy:expr) => {
        #[test]
        fn $name() {
            check(stringify!($name), $strategy, |v| postcard_rt(&v, &v));
        }
    };
}

rt_exact!(seq_round_trip, seq());
rt_exact!(cal_id_round_trip, cal_id());
rt_exact!(flags_round_trip, flags());
rt_exact!(version_round_trip, version());
rt_exact!(cell_cal_round_trip, cell_cal());
rt_exact!(product_cal_round_trip, product_cal());
rt_exact!(identity_round_trip, identity());
rt_exact!(status_round_trip, status());
rt_exact!(slot_info_round_trip, slot_info());
rt_exact!(ref_check_round_trip, ref_check());
rt_exact!(self_test_round_trip, self_test());
rt_exact!(event_round_trip, event());
rt_exact!(output_config_round_trip, output_config());
rt_exact!(auth_round_trip, auth());
rt_exact!(request_round_trip, request());
rt_exact!(host_frame_round_trip, host_frame());
rt_exact!(error_code_round_trip, error_code());

#[test]
fn channel_round_trip_rounds_permittivity_to_binary16() {
    check("channel", channel(), |c| {
        postcard_rt(&c, &c.on_wire())?;
        // The admittances are the measurement: exact.
        prop_assert_eq!(c.on_wire().g_s.to_bits(), c.g_s.to_bits());
        prop_assert_eq!(c.on_wire().b_s.to_bits(), c.b_s.to_bits());
        Ok(())
    });
}

#[test]
fn reading_round_trip_matches_on_wire() {
    check("reading", reading(), |r| {
        postcard_rt(&r, &r.on_wire())?;
        // Rounding is idempotent: what crossed the wire crosses again unchanged.
        postcard_rt(&r.on_wire(), &r.on_wire())
    });
}

#[test]
fn reading_rounding_stays_within_its_step() {
    let strategy = (
        -300.0f32..300.0,
        -300.0f32..300.0,
        0.0f32..60.0,
        1.0f32..60000.0,
    );
    check("reading steps", strategy, |(t, m, u, eps)| {
        let r = Reading {
            temperature_c: t,
            moisture_pct: Some(m),
            uncertainty_pct: u,
            channels: [ChannelValue {
                eps_re: eps,
                eps_im: eps / 7.0,
                ..ChannelValue::default()
            }; 2],
            ..Reading::default()
        };
        let w = r.on_wire();
        // Half a step plus the f32 rounding of the scaled value.
        prop_assert!(
            (w.temperature_c - t).abs() <= 0.005 + 1e-4,
            "{t} -> {}",
            w.temperature_c
        );
        prop_assert!((w.moisture_pct.unwrap() - m).abs() <= 0.005 + 1e-4);
        prop_assert!((w.uncertainty_pct - u).abs() <= 0.0005 + 1e-5);
        // binary16: 11 significant bits, half an ulp is 2^-11 relative.
        let rel = (w.channels[0].eps_re - eps).abs() / eps;
        prop_assert!(
            rel <= 1.0 / 2048.0,
            "{eps} -> {} ({rel})",
            w.channels[0].eps_re
        );
        Ok(())
    });
}

#[test]
fn response_round_trip() {
    check("response", response(), |r| {
        postcard_rt(&r, &response_on_wire(r.clone()))
    });
}

#[test]
fn device_frame_round_trip() {
    check("device frame", device_frame(), |f| {
        postcard_rt(&f, &device_frame_on_wire(&f))
    });
}

/// Complete frames (header, CRC, COBS, delimiter) through the streaming decoder.
fn frame_rt<T>(v: &T, expected: &T) -> Result<(), TestCaseError>
where
    T: Serialize + DeserializeOwned + Debug,
{
    let wire = encode_vec(v).map_err(|e| TestCaseError::fail(format!("{v:?}: {e}")))?;
    prop_assert!(wire.len() <= MAX_FRAME_LEN);
    prop_assert_eq!(wire.iter().filter(|&&b| b == 0).count(), 1);
    prop_assert_eq!(*wire.last().unwrap(), 0);
    let mut dec = FrameDecoder::<T>::new();
    let out: Vec<_> = dec.push(&wire).collect();
    prop_assert_eq!(out.len(), 1);
    match &out[0] {
        Ok(back) => prop_assert!(same(back, expected), "{back:?} != {expected:?}"),
        Err(e) => return Err(TestCaseError::fail(format!("{e}"))),
    }
    prop_assert_eq!(dec.pending(), 0);
    Ok(())
}

#[test]
fn host_frames_through_decoder() {
    check("host frame (framed)", host_frame(), |f| frame_rt(&f, &f));
}

#[test]
fn device_frames_through_decoder() {
    check("device frame (framed)", device_frame(), |f| {
        frame_rt(&f, &device_frame_on_wire(&f))
    });
}

/// The largest instance of the largest messages fits in one frame.
#[test]
fn largest_messages_fit_a_frame() {
    let worst_reading = Reading {
        seq: Seq {
            boot: u32::MAX,
            counter: u32::MAX,
        },
        time_ms: u64::MAX,
        moisture_pct: Some(1.0),
        flags: Flags::all(),
        ..Reading::default()
    };
    let full_name = short_string::<NAME_LEN>("Harrowgate Mill!");
    let cal = ProductCal {
        name: full_name.clone(),
        model: ModelKind::Relaxation,
        basis: Basis::Dry,
        params: core::iter::repeat_n(1.0f32, MAX_CAL_PARAMS).collect(),
        moisture_pct: Range::default(),
        temperature_c: Range::default(),
        inputs: core::iter::repeat_n(Range::default(), MAX_CAL_INPUTS).collect(),
        sec_pct: 0.3,
        made_s: u64::MAX,
    };
    let event = Event {
        number: u32::MAX,
        boot: u32::MAX,
        time_ms: u64::MAX,
        kind: EventKind::ProductCalChanged {
            slot: u8::MAX,
            old: CalId::NONE,
            new: CalId::NONE,
        },
    };
    let slot = SlotInfo {
        slot: u8::MAX,
        name: full_name,
        id: CalId::NONE,
        model: ModelKind::Relaxation,
    };
    let mut buf = [0u8; MAX_FRAME_LEN];
    let host = HostFrame {
        id: u16::MAX,
        auth: Some(Auth {
            counter: u32::MAX,
            tag: [0xFF; 32],
        }),
        request: Request::WriteProductCal {
            slot: u8::MAX,
            cal: cal.clone(),
        },
    };
    let n = encode(&host, &mut buf).expect("largest request fits");
    eprintln!("largest HostFrame: {n} bytes");
    let settings = Settings {
        tag: short_string::<TAG_LEN>(&"\u{10FFFF}".repeat(TAG_LEN)),
        interval_ms: u32::MAX,
        output: OutputConfig {
            span_low_pct: f32::MAX,
            span_high_pct: f32::MAX,
            fail_high: true,
        },
        stale_timeout_ms: u32::MAX,
    };
    let write_settings = HostFrame {
        request: Request::WriteSettings(settings.clone()),
        ..host.clone()
    };
    let n = encode(&write_settings, &mut buf).expect("settings write fits");
    eprintln!("largest WriteSettings: {n} bytes");
    let frames = [
        DeviceFrame::Response {
            id: u16::MAX,
            response: Response::Log {
                readings: core::iter::repeat_n(worst_reading, LOG_CHUNK).collect(),
                next: worst_reading.seq,
                end: true,
            },
        },
        DeviceFrame::Response {
            id: u16::MAX,
            response: Response::Events {
                events: core::iter::repeat_n(event, EVENT_CHUNK).collect(),
                next: u32::MAX,
                end: true,
            },
        },
        DeviceFrame::Response {
            id: u16::MAX,
            response: Response::ProductCal {
                slot: u8::MAX,
                cal: Some(cal),
            },
        },
        DeviceFrame::Response {
            id: u16::MAX,
            response: Response::Products {
                slots: core::iter::repeat_n(slot, N_PRODUCT_SLOTS).collect(),
                active: Some(u8::MAX),
            },
        },
        DeviceFrame::Response {
            id: u16::MAX,
            response: Response::Settings(settings),
        },
        DeviceFrame::Error {
            id: u16::MAX,
            code: ErrorCode::Busy,
            reason: short_string("x".repeat(REASON_LEN).as_str()),
        },
    ];
    for f in &frames {
        let n = encode(f, &mut buf).unwrap_or_else(|e| panic!("{f:?}: {e}"));
        eprintln!("{}: {n} bytes", device_frame_index(f));
    }
}

/// Every variant is reached by the strategies (the index functions are
/// exhaustive matches, so a new variant fails to compile until it is added).
#[test]
fn strategies_cover_every_variant() {
    let seen = |idx: Vec<usize>, n: usize, what: &str| {
        let mut s = idx;
        s.sort_unstable();
        s.dedup();
        assert_eq!(
            s,
            (0..n).collect::<Vec<_>>(),
            "{what} variants reached (seed {})",
            seed()
        );
    };
    seen(
        sample(&request(), 600).iter().map(request_index).collect(),
        23,
        "Request",
    );
    seen(
        sample(&response(), 600)
            .iter()
            .map(response_index)
            .collect(),
        13,
        "Response",
    );
    seen(
        sample(&device_frame(), 200)
            .iter()
            .map(device_frame_index)
            .collect(),
        4,
        "DeviceFrame",
    );
    seen(
        sample(&event_kind(), 300)
            .iter()
            .map(event_kind_index)
            .collect(),
        11,
        "EventKind",
    );
}

/// The streamed reading stays within the 64-byte goal of the wire format
/// (WIRE.md: at most 61 bytes with a boot counter below 16384, a counter
/// below 2^28 and a time before 2109).
#[test]
fn streamed_reading_frame_at_most_61_bytes() {
    check("reading frame size", reading(), |mut r| {
        r.seq.boot %= 16384;
        r.seq.counter %= 1 << 28;
        r.time_ms %= 1 << 42;
        r.moisture_pct = Some(r.moisture_pct.unwrap_or(14.0));
        r.flags = Flags::from_bits_truncate(r.flags.bits()); // the defined flags
        let n = encode_vec(&DeviceFrame::Reading(r)).unwrap().len();
        prop_assert!(n <= 61, "{n} bytes");
        Ok(())
    });
}

/// The largest product calibration (32 params, 6 input ranges, a full
/// name, the largest time) as the device stores it (`Option<ProductCal>`,
/// postcard) fits the firmware storage's 320-byte item buffer
/// (`fringe_firmware::storage::ITEM_BUF`, mirrored here: the protocol crate
/// does not depend on the firmware).
#[test]
fn largest_product_cal_fits_the_storage_item() {
    let cal = ProductCal {
        name: short_string::<NAME_LEN>("Harrowgate Mill!"),
        model: ModelKind::Multivariate,
        basis: Basis::Dry,
        params: core::iter::repeat_n(1.0f32, MAX_CAL_PARAMS).collect(),
        moisture_pct: Range::default(),
        temperature_c: Range::default(),
        inputs: core::iter::repeat_n(Range::default(), MAX_CAL_INPUTS).collect(),
        sec_pct: 0.3,
        made_s: u64::MAX,
    };
    let mut buf = [0u8; 512];
    let n = postcard::to_slice(&Some(cal), &mut buf).unwrap().len();
    eprintln!("largest stored product calibration: {n} bytes");
    assert!(n <= 320, "{n} bytes");
}

/// Each authentication refusal's reason fits the error frame and is its
/// own, so a host can tell a replay from a wrong key by the text.
#[test]
fn auth_failure_reasons_fit_and_differ() {
    let all = [
        AuthFailure::Missing,
        AuthFailure::BadTag,
        AuthFailure::Replay,
        AuthFailure::Throttled,
    ];
    for (i, a) in all.iter().enumerate() {
        assert!(a.reason().len() <= REASON_LEN, "{a:?}");
        let s: heapless::String<REASON_LEN> = short_string(a.reason());
        assert_eq!(s.as_str(), a.reason(), "{a:?}");
        for b in &all[i + 1..] {
            assert_ne!(a.reason(), b.reason());
        }
    }
}
