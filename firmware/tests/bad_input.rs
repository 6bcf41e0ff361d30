//! Bad input: every request with out-of-range or non-finite values is
//! answered with an error code (never a panic), and nothing bad is stored.

mod common;

use common::*;
use fringe_calibration::synth::SynthProduct;
use fringe_firmware::protocol::*;
use fringe_firmware::sim::exact_calibration;
use fringe_firmware::Scenario;
use proptest::prelude::*;

/// f32 values a careless or hostile host might send.
fn nasty() -> impl Strategy<Value = f32> {
    prop_oneof![
        Just(f32::NAN),
        Just(f32::INFINITY),
        Just(f32::NEG_INFINITY),
        Just(0.0f32),
        Just(-0.0f32),
        Just(f32::MAX),
        Just(f32::MIN_POSITIVE),
        -1.0e6f32..1.0e6,
        -10.0f32..10.0,
        any::<u32>().prop_map(f32::from_bits),
    ]
}

fn point() -> impl Strategy<Value = CellPoint> {
    (
        prop_oneof![Just(1.0e6f32), Just(20.0e6f32), nasty()],
        nasty(),
        nasty(),
        nasty(),
    )
        .prop_map(|(freq_hz, stray_pf, cell_pf, g_offset_s)| CellPoint {
            freq_hz,
            stray_pf,
            cell_pf,
            g_offset_s,
        })
}

/// A cell point of a real sensor at `freq_hz` (values a bench calibration finds).
fn good_point(freq_hz: f32) -> impl Strategy<Value = CellPoint> {
    (-5.0f32..10.0, 0.5f32..5.0, -1e-6f32..1e-6).prop_map(move |(stray_pf, cell_pf, g_offset_s)| {
        CellPoint {
            freq_hz,
            stray_pf,
            cell_pf,
            g_offset_s,
        }
    })
}

fn cell_strategy() -> impl Strategy<Value = CellCal> {
    prop_oneof![
        (point(), point(), nasty()).prop_map(|(a, b, reference_ratio)| CellCal {
            points: [a, b],
            reference_ratio,
            made_s: 1,
        }),
        (good_point(1.0e6), good_point(20.0e6), 0.5f32..2.0).prop_map(|(a, b, reference_ratio)| {
            CellCal {
                points: [a, b],
                reference_ratio,
                made_s: 1,
            }
        }),
    ]
}

fn product_strategy() -> impl Strategy<Value = ProductCal> {
    (
        proptest::collection::vec(nasty(), 0..24),
        nasty(),
        nasty(),
        nasty(),
        prop_oneof![
            Just(ModelKind::Relaxation),
            Just(ModelKind::SingleFrequency)
        ],
    )
        .prop_map(|(params, a, b2, sec, model)| ProductCal {
            name: short_string("fuzz"),
            model,
            basis: Basis::Wet,
            params: heapless::Vec::from_slice(&params).expect("<= 24"),
            moisture_pct: Range { min: a, max: b2 },
            temperature_c: Range {
                min: 0.0,
                max: 50.0,
            },
            inputs: heapless::Vec::new(),
            sec_pct: sec,
            made_s: 1,
        })
}

/// A product calibration the device must accept: the exact calibration of
/// the synthetic grain.
fn good_product() -> ProductCal {
    exact_calibration(&SynthProduct::grain(), "grain")
}

fn request_strategy() -> impl Strategy<Value = Request> {
    prop_oneof![
        cell_strategy().prop_map(Request::WriteCellCal),
        (0u8..12, product_strategy())
            .prop_map(|(slot, cal)| Request::WriteProductCal { slot, cal }),
        (0u8..12).prop_map(|slot| Request::WriteProductCal {
            slot,
            cal: good_product()
        }),
        (0u8..12).prop_map(|slot| Request::SelectProduct { slot }),
        (0u8..12).prop_map(|slot| Request::ReadProductCal { slot }),
        prop_oneof![any::<u32>(), 100u32..=86_400_000]
            .prop_map(|period_ms| Request::StartStream { period_ms }),
        prop_oneof![any::<u64>(), 946_684_800_000u64..=7_258_118_400_000]
            .prop_map(|unix_ms| Request::SetClock { unix_ms }),
        (
            // Within 100 %, up to the dry-basis limit and past it.
            prop_oneof![nasty(), 0.0f32..100.0, 0.0f32..1100.0],
            prop_oneof![nasty(), 0.0f32..100.0, 0.0f32..1100.0],
            any::<bool>()
        )
            .prop_map(|(l, h, fail_high)| Request::SetOutput(OutputConfig {
                span_low_pct: l,
                span_high_pct: h,
                fail_high
            })),
        (any::<u64>(), any::<u8>()).prop_map(|(f, max)| Request::ReadLog {
            from: Seq::from_u64(f),
            max
        }),
        (any::<u32>(), any::<u8>()).prop_map(|(from, max)| Request::ReadEvents { from, max }),
    ]
}

fn all_finite_cell(c: &CellCal) -> bool {
    c.reference_ratio.is_finite()
        && c.points.iter().all(|p| {
            p.freq_hz.is_finite()
                && p.stray_pf.is_finite()
                && p.cell_pf.is_finite()
                && p.cell_pf > 0.0
                && p.g_offset_s.is_finite()
        })
}

/// What the device's documented contract (the request docs in
/// `fringe-protocol` and the refusal list of `fringe_firmware::device`)
/// requires of an answer to `req`, written out here independently of the
/// device's own checks.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Expect {
    /// Must be refused with one of these codes.
    Refuse(&'static [ErrorCode]),
    /// Must be accepted.
    Accept,
    /// The contract allows either (finite values whose sense only the
    /// calibration crate can judge, an empty slot).
    Either,
}

const RANGE: &[ErrorCode] = &[ErrorCode::OutOfRange];
/// A request with several bad fields may be refused for any of them (the
/// device checks in an order the contract leaves open).
const NOT_FINITE: &[ErrorCode] = &[ErrorCode::NotFinite, ErrorCode::OutOfRange];
const SLOT: &[ErrorCode] = &[ErrorCode::NoSuchSlot];
const BAD_CAL: &[ErrorCode] = &[
    ErrorCode::NotFinite,
    ErrorCode::OutOfRange,
    ErrorCode::BadCalibration,
];

fn expect_cell(c: &CellCal) -> Expect {
    let values = c
        .points
        .iter()
        .flat_map(|p| [p.freq_hz, p.stray_pf, p.cell_pf, p.g_offset_s])
        .chain([c.reference_ratio]);
    if values.clone().any(|v| !v.is_finite()) {
        return Expect::Refuse(NOT_FINITE);
    }
    let ok = c.points.iter().zip([1.0e6f32, 20.0e6]).all(|(p, f)| {
        (p.freq_hz / f - 1.0).abs() <= 0.005
            && (-100.0..=1000.0).contains(&p.stray_pf)
            && p.cell_pf > 0.0
            && p.cell_pf <= 1000.0
            && p.g_offset_s.abs() <= 1.0
    }) && (0.0..=10.0).contains(&c.reference_ratio);
    if ok {
        Expect::Accept
    } else {
        Expect::Refuse(RANGE)
    }
}

fn expect(req: &Request) -> Expect {
    match req {
        Request::WriteCellCal(c) => expect_cell(c),
        Request::WriteProductCal { slot, .. }
        | Request::SelectProduct { slot }
        | Request::ReadProductCal { slot }
            if *slot >= 8 =>
        {
            Expect::Refuse(SLOT)
        }
        Request::WriteProductCal { cal, .. } => {
            let finite = cal.params.iter().all(|p| p.is_finite())
                && cal.sec_pct.is_finite()
                && cal.moisture_pct.min.is_finite()
                && cal.moisture_pct.max.is_finite();
            if !finite {
                Expect::Refuse(BAD_CAL)
            } else if *cal == good_product() {
                Expect::Accept
            } else {
                Expect::Either
            }
        }
        Request::SelectProduct { .. } => Expect::Either,
        Request::ReadProductCal { .. } => Expect::Accept,
        Request::StartStream { period_ms } => {
            if (100..=86_400_000).contains(period_ms) {
                Expect::Accept
            } else {
                Expect::Refuse(RANGE)
            }
        }
        Request::SetClock { unix_ms } => {
            // 2000-01-01 .. 2200-01-01.
            if (946_684_800_000..=7_258_118_400_000).contains(unix_ms) {
                Expect::Accept
            } else {
                Expect::Refuse(RANGE)
            }
        }
        Request::SetOutput(o) => {
            if !o.span_low_pct.is_finite() || !o.span_high_pct.is_finite() {
                Expect::Refuse(NOT_FINITE)
            } else if 0.0 <= o.span_low_pct
                && o.span_low_pct < o.span_high_pct
                && o.span_high_pct <= fringe_protocol::quant::MOISTURE_MAX_PCT
            {
                Expect::Accept
            } else {
                Expect::Refuse(RANGE)
            }
        }
        Request::ReadLog { max, .. } => {
            if (1..=4).contains(max) {
                Expect::Accept
            } else {
                Expect::Refuse(RANGE)
            }
        }
        Request::ReadEvents { max, .. } => {
            if (1..=6).contains(max) {
                Expect::Accept
            } else {
                Expect::Refuse(RANGE)
            }
        }
        _ => Expect::Either,
    }
}

/// Whether `answer` keeps the contract `expect` for `req`.
fn check_answer(req: &Request, expect: Expect, answer: &DeviceFrame) -> Result<(), String> {
    match (expect, answer) {
        (Expect::Refuse(codes), DeviceFrame::Error { code, .. }) if codes.contains(code) => Ok(()),
        (Expect::Accept | Expect::Either, DeviceFrame::Response { .. }) => Ok(()),
        (
            Expect::Either,
            DeviceFrame::Error {
                code:
                    ErrorCode::OutOfRange
                    | ErrorCode::NotFinite
                    | ErrorCode::NoSuchSlot
                    | ErrorCode::BadCalibration,
                ..
            },
        ) => Ok(()),
        _ => Err(format!("{req:?}: expected {expect:?}, got {answer:?}")),
    }
}

/// The check is not vacuous: answers a device with a broken validation
/// would give are caught. Mutations it catches: a NaN cell calibration
/// accepted, a valid span refused, a slot of 9 answered with data, a
/// refusal with the wrong code.
#[test]
fn the_contract_check_catches_a_device_that_breaks_it() {
    let ack = DeviceFrame::Response {
        id: 1,
        response: Response::Ack,
    };
    let refused = |code| DeviceFrame::Error {
        id: 1,
        code,
        reason: short_string("x"),
    };
    let mut nan_cell = cell_cal(2.1, 1.0);
    nan_cell.points[0].stray_pf = f32::NAN;
    let nan = Request::WriteCellCal(nan_cell);
    assert!(check_answer(&nan, expect(&nan), &ack).is_err());
    assert!(check_answer(&nan, expect(&nan), &refused(ErrorCode::NotFinite)).is_ok());
    assert!(check_answer(&nan, expect(&nan), &refused(ErrorCode::Storage)).is_err());
    let span = Request::SetOutput(OutputConfig {
        span_low_pct: 0.0,
        span_high_pct: 30.0,
        fail_high: false,
    });
    assert!(check_answer(&span, expect(&span), &refused(ErrorCode::OutOfRange)).is_err());
    let slot = Request::ReadProductCal { slot: 9 };
    assert!(check_answer(&slot, expect(&slot), &ack).is_err());
    let good = Request::WriteCellCal(cell_cal(2.1, 1.0));
    assert_eq!(expect(&good), Expect::Accept);
}

proptest! {
    #![proptest_config(fringe_testkit::proptest_config(256, 0xBAD1))]

    #[test]
    fn bad_values_are_refused_with_a_code_and_never_stored(reqs in proptest::collection::vec(request_strategy(), 1..6)) {
        let mut b = Bench::new(40, Scenario::default());
        for req in reqs {
            let answer = b.ask(req.clone());
            if let Err(e) = check_answer(&req, expect(&req), &answer) {
                prop_assert!(false, "{}", e);
            }
            // What is stored afterwards is always finite and usable.
            if let DeviceFrame::Response { response: Response::CellCal(Some(c)), .. } = b.ask(Request::ReadCellCal) {
                prop_assert!(all_finite_cell(&c), "stored {c:?} after {req:?}");
            }
            for slot in 0..8u8 {
                if let DeviceFrame::Response { response: Response::ProductCal { cal: Some(c), .. }, .. } = b.ask(Request::ReadProductCal { slot }) {
                    prop_assert!(c.params.iter().all(|p| p.is_finite()) && c.sec_pct.is_finite(), "stored {c:?}");
                    prop_assert!(fringe_firmware::device::parse_product(&c).is_ok());
                }
            }
            if let DeviceFrame::Response { response: Response::Status(s), .. } = b.ask(Request::Status) {
                prop_assert!(s.output_ma.is_finite());
                if let Some(p) = s.stream_period_ms { prop_assert!((100..=86_400_000).contains(&p)); }
            }
        }
        // And the device still measures.
        let r = b.measure();
        prop_assert!(r.seq.boot == 1);
    }

    #[test]
    fn garbage_bytes_never_panic(bytes in proptest::collection::vec(any::<u8>(), 0..2048)) {
        let mut b = Bench::new(41, Scenario::default());
        b.poll_bytes(&bytes);
        // The link still works afterwards, once the host flushes with a
        // delimiter (as protocol/src/frame.rs allows a sender to do).
        b.poll_bytes(&[0]);
        let answer = b.ask(Request::Status);
        let ok = matches!(answer, DeviceFrame::Response { response: Response::Status(_), .. });
        prop_assert!(ok, "status after garbage: {:?}", answer);
    }
}
