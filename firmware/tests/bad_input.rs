//! Bad input: every request with out-of-range or non-finite values is
//! answered with an error code (never a panic), and nothing bad is stored.

mod common;

use common::*;
use fringe_firmware::protocol::*;
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

fn cell_strategy() -> impl Strategy<Value = CellCal> {
    (point(), point(), nasty()).prop_map(|(a, b, reference_ratio)| CellCal {
        points: [a, b],
        reference_ratio,
        made_s: 1,
    })
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

fn request_strategy() -> impl Strategy<Value = Request> {
    prop_oneof![
        cell_strategy().prop_map(Request::WriteCellCal),
        (0u8..12, product_strategy())
            .prop_map(|(slot, cal)| Request::WriteProductCal { slot, cal }),
        (0u8..12).prop_map(|slot| Request::SelectProduct { slot }),
        (0u8..12).prop_map(|slot| Request::ReadProductCal { slot }),
        any::<u32>().prop_map(|period_ms| Request::StartStream { period_ms }),
        any::<u64>().prop_map(|unix_ms| Request::SetClock { unix_ms }),
        (nasty(), nasty(), any::<bool>()).prop_map(|(l, h, fail_high)| Request::SetOutput(
            OutputConfig {
                span_low_pct: l,
                span_high_pct: h,
                fail_high
            }
        )),
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

proptest! {
    #![proptest_config(ProptestConfig { cases: 256, failure_persistence: None, ..ProptestConfig::default() })]

    #[test]
    fn bad_values_are_refused_with_a_code_and_never_stored(reqs in proptest::collection::vec(request_strategy(), 1..6)) {
        let mut b = Bench::new(40, Scenario::default());
        for req in reqs {
            let answer = b.ask(req.clone());
            match &answer {
                DeviceFrame::Response { .. } => {}
                DeviceFrame::Error { code, .. } => prop_assert!(matches!(
                    code,
                    ErrorCode::OutOfRange | ErrorCode::NotFinite | ErrorCode::NoSuchSlot | ErrorCode::BadCalibration
                ), "{req:?} -> {answer:?}"),
                other => prop_assert!(false, "{req:?} -> {other:?}"),
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
