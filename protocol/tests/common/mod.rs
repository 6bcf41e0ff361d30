//! Shared helpers for the protocol's integration tests: proptest strategies
//! for every message type, seeds, and bitwise comparison.
#![allow(dead_code)]

use fringe_protocol::*;
use heapless::{String, Vec};
use proptest::prelude::*;
use proptest::strategy::ValueTree;
use proptest::test_runner::{Config, RngAlgorithm, RngSeed, TestRng, TestRunner};

/// Seed for a random test: `FRINGE_SEED` if set, else a fixed default so CI
/// runs are reproducible (`fringe_testkit::seed`). Every test prints it when
/// it fails.
pub fn seed() -> u64 {
    fringe_testkit::seed(0x5EED_F1A6)
}

/// A seeded generator for hand-written random tests.
pub fn rng(seed: u64) -> TestRng {
    let mut s = [0u8; 32];
    s[..8].copy_from_slice(&seed.to_le_bytes());
    TestRng::from_seed(RngAlgorithm::ChaCha, &s)
}

/// Runs a property over `strategy` with the seed of [`seed`], printing it on failure.
pub fn check<S: Strategy>(
    name: &str,
    strategy: S,
    test: impl Fn(S::Value) -> Result<(), TestCaseError>,
) where
    S::Value: std::fmt::Debug,
{
    let config = fringe_testkit::proptest_config(256, 0x5EED_F1A6);
    let seed = match config.rng_seed {
        RngSeed::Fixed(s) => s,
        RngSeed::Random => unreachable!("proptest_config always fixes the seed"),
    };
    let mut runner = TestRunner::new(config);
    let result = runner.run(&strategy, test);
    if let Err(e) = result {
        panic!("{name}: {e}\n(seed {seed}; rerun with FRINGE_SEED={seed})");
    }
}

/// Draws `n` values of `strategy` (for variant-coverage checks).
pub fn sample<S: Strategy>(strategy: &S, n: usize) -> std::vec::Vec<S::Value> {
    let mut runner = TestRunner::new_with_rng(Config::default(), rng(seed()));
    (0..n)
        .map(|_| strategy.new_tree(&mut runner).unwrap().current())
        .collect()
}

/// Bitwise comparison: the same Debug text (so the same values, `-0.0`
/// apart from `0.0`) and the same postcard bytes (so the same bits, NaN
/// payloads included, since postcard writes an `f32` as its bits).
pub fn same<T: serde::Serialize + std::fmt::Debug>(a: &T, b: &T) -> bool {
    format!("{a:?}") == format!("{b:?}") && bytes(a) == bytes(b)
}

/// postcard bytes of `v` (postcard's `to_allocvec` needs its `alloc` feature).
pub fn bytes<T: serde::Serialize>(v: &T) -> std::vec::Vec<u8> {
    let mut buf = [0u8; 2048];
    postcard::to_slice(v, &mut buf)
        .map(|b| b.to_vec())
        .expect("every message fits 2 KiB")
}

// ---- strategies ----

/// Any `f32` bit pattern: NaNs, infinities, subnormals, signed zeros.
pub fn any_f32() -> impl Strategy<Value = f32> {
    prop_oneof![
        4 => any::<u32>().prop_map(f32::from_bits),
        4 => -1.0e3f32..1.0e3,
        1 => Just(f32::NAN),
        1 => Just(-0.0f32),
    ]
}

pub fn string<const N: usize>() -> impl Strategy<Value = String<N>> {
    "\\PC{0,20}".prop_map(|s: std::string::String| short_string::<N>(&s))
}

pub fn hvec<T: std::fmt::Debug, const N: usize>(
    item: impl Strategy<Value = T>,
) -> impl Strategy<Value = Vec<T, N>> {
    proptest::collection::vec(item, 0..=N).prop_map(|v| v.into_iter().collect())
}

pub fn seq() -> impl Strategy<Value = Seq> {
    (any::<u32>(), any::<u32>()).prop_map(|(boot, counter)| Seq { boot, counter })
}

pub fn cal_id() -> impl Strategy<Value = CalId> {
    any::<[u8; 4]>().prop_map(CalId)
}

pub fn flags() -> impl Strategy<Value = Flags> {
    any::<u16>().prop_map(Flags::from_bits_retain)
}

pub fn channel() -> impl Strategy<Value = ChannelValue> {
    (any_f32(), any_f32(), any_f32(), any_f32()).prop_map(|(g_s, b_s, eps_re, eps_im)| {
        ChannelValue {
            g_s,
            b_s,
            eps_re,
            eps_im,
        }
    })
}

pub fn reading() -> impl Strategy<Value = Reading> {
    (
        seq(),
        any::<u64>(),
        [channel(), channel()],
        any_f32(),
        proptest::option::of(any_f32()),
        any_f32(),
        flags(),
        cal_id(),
        cal_id(),
    )
        .prop_map(
            |(
                seq,
                time_ms,
                channels,
                temperature_c,
                moisture_pct,
                uncertainty_pct,
                flags,
                c,
                p,
            )| {
                Reading {
                    seq,
                    time_ms,
                    channels,
                    temperature_c,
                    moisture_pct,
                    uncertainty_pct,
                    flags,
                    cell_cal: c,
                    product_cal: p,
                }
            },
        )
}

pub fn version() -> impl Strategy<Value = Version> {
    (any::<u8>(), any::<u8>()).prop_map(|(major, minor)| Version { major, minor })
}

pub fn range() -> impl Strategy<Value = Range> {
    (any_f32(), any_f32()).prop_map(|(min, max)| Range { min, max })
}

pub fn model_kind() -> impl Strategy<Value = ModelKind> {
    prop_oneof![
        Just(ModelKind::SingleFrequency),
        Just(ModelKind::Relaxation)
    ]
}

pub fn basis() -> impl Strategy<Value = Basis> {
    prop_oneof![Just(Basis::Wet), Just(Basis::Dry)]
}

pub fn cell_point() -> impl Strategy<Value = CellPoint> {
    (any_f32(), any_f32(), any_f32(), any_f32()).prop_map(
        |(freq_hz, stray_pf, cell_pf, g_offset_s)| CellPoint {
            freq_hz,
            stray_pf,
            cell_pf,
            g_offset_s,
        },
    )
}

pub fn cell_cal() -> impl Strategy<Value = CellCal> {
    ([cell_point(), cell_point()], any_f32(), any::<u64>()).prop_map(
        |(points, reference_ratio, made_s)| CellCal {
            points,
            reference_ratio,
            made_s,
        },
    )
}

pub fn product_cal() -> impl Strategy<Value = ProductCal> {
    (
        string::<NAME_LEN>(),
        model_kind(),
        basis(),
        hvec::<f32, MAX_CAL_PARAMS>(any_f32()),
        range(),
        range(),
        hvec::<Range, MAX_CAL_INPUTS>(range()),
        any_f32(),
        any::<u64>(),
    )
        .prop_map(
            |(name, model, basis, params, moisture_pct, temperature_c, inputs, sec_pct, made_s)| {
                ProductCal {
                    name,
                    model,
                    basis,
                    params,
                    moisture_pct,
                    temperature_c,
                    inputs,
                    sec_pct,
                    made_s,
                }
            },
        )
}

pub fn identity() -> impl Strategy<Value = Identity> {
    (
        string::<SERIAL_LEN>(),
        any::<[u8; 3]>(),
        version(),
        any::<u32>().prop_map(Capabilities::from_bits_retain),
        any::<u32>(),
        [any_f32(), any_f32()],
    )
        .prop_map(
            |(serial, firmware, protocol, capabilities, boot, freqs_hz)| Identity {
                serial,
                firmware,
                protocol,
                capabilities,
                boot,
                freqs_hz,
            },
        )
}

pub fn status() -> impl Strategy<Value = Status> {
    (
        (
            any::<u64>(),
            any::<u64>(),
            any::<u32>(),
            seq(),
            seq(),
            any::<u32>(),
            any::<u32>(),
            proptest::option::of(any::<u32>()),
            proptest::option::of(any::<u8>()),
        ),
        (
            cal_id(),
            cal_id(),
            flags(),
            any::<u32>(),
            any::<u32>(),
            any_f32(),
            any_f32(),
            proptest::option::of(any::<u32>()),
            proptest::option::of(any::<u32>()),
        ),
    )
        .prop_map(|(a, b)| Status {
            time_ms: a.0,
            uptime_ms: a.1,
            boot: a.2,
            next_seq: a.3,
            log_first: a.4,
            log_len: a.5,
            next_event: a.6,
            stream_period_ms: a.7,
            active_slot: a.8,
            cell_cal: b.0,
            product_cal: b.1,
            last_flags: b.2,
            write_counter: b.3,
            link_errors: b.4,
            reference_ratio: b.5,
            output_ma: b.6,
            stack_free_bytes: b.7,
            reading_cost: b.8,
        })
}

pub fn slot_info() -> impl Strategy<Value = SlotInfo> {
    (any::<u8>(), string::<NAME_LEN>(), cal_id(), model_kind()).prop_map(
        |(slot, name, id, model)| SlotInfo {
            slot,
            name,
            id,
            model,
        },
    )
}

pub fn ref_check() -> impl Strategy<Value = RefCheck> {
    ([any_f32(), any_f32()], any_f32(), any::<bool>()).prop_map(|(ratio, baseline, ok)| RefCheck {
        ratio,
        baseline,
        ok,
    })
}

pub fn self_test() -> impl Strategy<Value = SelfTest> {
    (any::<[bool; 4]>(), flags()).prop_map(|(b, flags)| SelfTest {
        storage_ok: b[0],
        frontend_ok: b[1],
        temperature_ok: b[2],
        reference_ok: b[3],
        flags,
    })
}

pub fn auth_failure() -> impl Strategy<Value = AuthFailure> {
    prop_oneof![
        Just(AuthFailure::Missing),
        Just(AuthFailure::BadTag),
        Just(AuthFailure::Replay),
        Just(AuthFailure::Throttled)
    ]
}

pub fn reset_cause() -> impl Strategy<Value = ResetCause> {
    prop_oneof![
        Just(ResetCause::PowerOn),
        Just(ResetCause::Requested),
        Just(ResetCause::Watchdog),
        Just(ResetCause::Panic)
    ]
}

pub fn fault_code() -> impl Strategy<Value = FaultCode> {
    prop_oneof![
        Just(FaultCode::Electrode),
        Just(FaultCode::Saturation),
        Just(FaultCode::TemperatureSensor),
        Just(FaultCode::Storage),
        Just(FaultCode::CurrentLoop),
        Just(FaultCode::StaleOutput)
    ]
}

pub fn event_kind() -> impl Strategy<Value = EventKind> {
    prop_oneof![
        reset_cause().prop_map(|reset_cause| EventKind::Boot { reset_cause }),
        (cal_id(), cal_id()).prop_map(|(old, new)| EventKind::CellCalChanged { old, new }),
        (any::<u8>(), cal_id(), cal_id())
            .prop_map(|(slot, old, new)| EventKind::ProductCalChanged { slot, old, new }),
        (proptest::option::of(any::<u8>()), any::<u8>(), cal_id()).prop_map(
            |(old_slot, new_slot, id)| EventKind::ProductSelected {
                old_slot,
                new_slot,
                id
            }
        ),
        (auth_failure(), any::<u32>())
            .prop_map(|(reason, counter)| EventKind::AuthFailed { reason, counter }),
        (any::<u64>(), any::<u64>())
            .prop_map(|(old_ms, new_ms)| EventKind::ClockSet { old_ms, new_ms }),
        fault_code().prop_map(|code| EventKind::Fault { code }),
        (any_f32(), any_f32())
            .prop_map(|(ratio, baseline)| EventKind::ReferenceDrift { ratio, baseline }),
        Just(EventKind::StorageRepaired),
        (cal_id(), cal_id()).prop_map(|(old, new)| EventKind::SettingsChanged { old, new }),
        (modbus_settings(), modbus_settings())
            .prop_map(|(old, new)| EventKind::ModbusChanged { old, new }),
    ]
}

/// Position of an event kind (exhaustive: a new variant must be added here and above).
pub fn event_kind_index(k: &EventKind) -> usize {
    match k {
        EventKind::Boot { .. } => 0,
        EventKind::CellCalChanged { .. } => 1,
        EventKind::ProductCalChanged { .. } => 2,
        EventKind::ProductSelected { .. } => 3,
        EventKind::AuthFailed { .. } => 4,
        EventKind::ClockSet { .. } => 5,
        EventKind::Fault { .. } => 6,
        EventKind::ReferenceDrift { .. } => 7,
        EventKind::StorageRepaired => 8,
        EventKind::SettingsChanged { .. } => 9,
        EventKind::ModbusChanged { .. } => 10,
    }
}

pub fn event() -> impl Strategy<Value = Event> {
    (any::<u32>(), any::<u32>(), any::<u64>(), event_kind()).prop_map(
        |(number, boot, time_ms, kind)| Event {
            number,
            boot,
            time_ms,
            kind,
        },
    )
}

pub fn output_config() -> impl Strategy<Value = OutputConfig> {
    (any_f32(), any_f32(), any::<bool>()).prop_map(|(span_low_pct, span_high_pct, fail_high)| {
        OutputConfig {
            span_low_pct,
            span_high_pct,
            fail_high,
        }
    })
}

pub fn settings() -> impl Strategy<Value = Settings> {
    (
        string::<TAG_LEN>(),
        any::<u32>(),
        output_config(),
        any::<u32>(),
    )
        .prop_map(|(tag, interval_ms, output, stale_timeout_ms)| Settings {
            tag,
            interval_ms,
            output,
            stale_timeout_ms,
        })
}

pub fn modbus_settings() -> impl Strategy<Value = ModbusSettings> {
    (
        any::<u8>(),
        any::<u32>(),
        prop_oneof![
            Just(ModbusParity::Even),
            Just(ModbusParity::Odd),
            Just(ModbusParity::None)
        ],
    )
        .prop_map(|(unit_id, baud, parity)| ModbusSettings {
            unit_id,
            baud,
            parity,
        })
}

pub fn request() -> impl Strategy<Value = Request> {
    prop_oneof![
        version().prop_map(|host| Request::Identify { host }),
        Just(Request::Status),
        Just(Request::Measure),
        any::<u32>().prop_map(|period_ms| Request::StartStream { period_ms }),
        Just(Request::StopStream),
        Just(Request::ReadCellCal),
        cell_cal().prop_map(Request::WriteCellCal),
        any::<u8>().prop_map(|slot| Request::ReadProductCal { slot }),
        (any::<u8>(), product_cal()).prop_map(|(slot, cal)| Request::WriteProductCal { slot, cal }),
        any::<u8>().prop_map(|slot| Request::SelectProduct { slot }),
        Just(Request::ListProducts),
        Just(Request::ReferenceCheck),
        (seq(), any::<u8>()).prop_map(|(from, max)| Request::ReadLog { from, max }),
        (any::<u32>(), any::<u8>()).prop_map(|(from, max)| Request::ReadEvents { from, max }),
        any::<u64>().prop_map(|unix_ms| Request::SetClock { unix_ms }),
        Just(Request::SelfTest),
        Just(Request::Reboot),
        output_config().prop_map(Request::SetOutput),
        Just(Request::ReadSettings),
        settings().prop_map(Request::WriteSettings),
        Just(Request::ReadModbus),
        modbus_settings().prop_map(Request::WriteModbus),
        (any::<u32>(), any_f32(), any::<u32>()).prop_map(|(boot, kg_m3, hold_ms)| {
            Request::SetDensity {
                boot,
                kg_m3,
                hold_ms,
            }
        }),
    ]
}

/// Position of a request (exhaustive).
pub fn request_index(r: &Request) -> usize {
    match r {
        Request::Identify { .. } => 0,
        Request::Status => 1,
        Request::Measure => 2,
        Request::StartStream { .. } => 3,
        Request::StopStream => 4,
        Request::ReadCellCal => 5,
        Request::WriteCellCal(_) => 6,
        Request::ReadProductCal { .. } => 7,
        Request::WriteProductCal { .. } => 8,
        Request::SelectProduct { .. } => 9,
        Request::ListProducts => 10,
        Request::ReferenceCheck => 11,
        Request::ReadLog { .. } => 12,
        Request::ReadEvents { .. } => 13,
        Request::SetClock { .. } => 14,
        Request::SelfTest => 15,
        Request::Reboot => 16,
        Request::SetOutput(_) => 17,
        Request::ReadSettings => 18,
        Request::WriteSettings(_) => 19,
        Request::ReadModbus => 20,
        Request::WriteModbus(_) => 21,
        Request::SetDensity { .. } => 22,
    }
}

pub fn auth() -> impl Strategy<Value = Auth> {
    (any::<u32>(), any::<[u8; 32]>()).prop_map(|(counter, tag)| Auth { counter, tag })
}

pub fn host_frame() -> impl Strategy<Value = HostFrame> {
    (any::<u16>(), proptest::option::of(auth()), request())
        .prop_map(|(id, auth, request)| HostFrame { id, auth, request })
}

pub fn response() -> impl Strategy<Value = Response> {
    prop_oneof![
        identity().prop_map(Response::Identity),
        status().prop_map(Response::Status),
        reading().prop_map(Response::Reading),
        Just(Response::Ack),
        proptest::option::of(cell_cal()).prop_map(Response::CellCal),
        (any::<u8>(), proptest::option::of(product_cal()))
            .prop_map(|(slot, cal)| Response::ProductCal { slot, cal }),
        (
            hvec::<SlotInfo, N_PRODUCT_SLOTS>(slot_info()),
            proptest::option::of(any::<u8>())
        )
            .prop_map(|(slots, active)| Response::Products { slots, active }),
        ref_check().prop_map(Response::RefCheck),
        (hvec::<Reading, LOG_CHUNK>(reading()), seq(), any::<bool>()).prop_map(
            |(readings, next, end)| Response::Log {
                readings,
                next,
                end
            }
        ),
        (
            hvec::<Event, EVENT_CHUNK>(event()),
            any::<u32>(),
            any::<bool>()
        )
            .prop_map(|(events, next, end)| Response::Events { events, next, end }),
        self_test().prop_map(Response::SelfTest),
        settings().prop_map(Response::Settings),
        modbus_settings().prop_map(Response::Modbus),
    ]
}

/// Position of a response (exhaustive).
pub fn response_index(r: &Response) -> usize {
    match r {
        Response::Identity(_) => 0,
        Response::Status(_) => 1,
        Response::Reading(_) => 2,
        Response::Ack => 3,
        Response::CellCal(_) => 4,
        Response::ProductCal { .. } => 5,
        Response::Products { .. } => 6,
        Response::RefCheck(_) => 7,
        Response::Log { .. } => 8,
        Response::Events { .. } => 9,
        Response::SelfTest(_) => 10,
        Response::Settings(_) => 11,
        Response::Modbus(_) => 12,
    }
}

pub fn error_code() -> impl Strategy<Value = ErrorCode> {
    prop_oneof![
        Just(ErrorCode::UnknownRequest),
        Just(ErrorCode::OutOfRange),
        Just(ErrorCode::NotFinite),
        Just(ErrorCode::AuthFailed),
        Just(ErrorCode::NoSuchSlot),
        Just(ErrorCode::UnsupportedVersion),
        Just(ErrorCode::Storage),
        Just(ErrorCode::BadCalibration),
        Just(ErrorCode::Busy),
    ]
}

pub fn device_frame() -> impl Strategy<Value = DeviceFrame> {
    prop_oneof![
        (any::<u16>(), response())
            .prop_map(|(id, response)| DeviceFrame::Response { id, response }),
        (any::<u16>(), error_code(), string::<REASON_LEN>())
            .prop_map(|(id, code, reason)| DeviceFrame::Error { id, code, reason }),
        reading().prop_map(DeviceFrame::Reading),
        event().prop_map(DeviceFrame::Event),
    ]
}

/// Position of a device frame (exhaustive).
pub fn device_frame_index(f: &DeviceFrame) -> usize {
    match f {
        DeviceFrame::Response { .. } => 0,
        DeviceFrame::Error { .. } => 1,
        DeviceFrame::Reading(_) => 2,
        DeviceFrame::Event(_) => 3,
    }
}

/// What the peer decodes from `f`: readings inside rounded per [`Reading::on_wire`].
pub fn device_frame_on_wire(f: &DeviceFrame) -> DeviceFrame {
    match f.clone() {
        DeviceFrame::Reading(r) => DeviceFrame::Reading(r.on_wire()),
        DeviceFrame::Response { id, response } => DeviceFrame::Response {
            id,
            response: response_on_wire(response),
        },
        other => other,
    }
}

/// As [`device_frame_on_wire`] for a response.
pub fn response_on_wire(r: Response) -> Response {
    match r {
        Response::Reading(r) => Response::Reading(r.on_wire()),
        Response::Log {
            readings,
            next,
            end,
        } => Response::Log {
            readings: readings.into_iter().map(Reading::on_wire).collect(),
            next,
            end,
        },
        other => other,
    }
}
