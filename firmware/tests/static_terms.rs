//! The relaxation model's static terms (parameter layout 2): a device
//! announces that it takes them (`STATIC_TERMS`) and does; one configured as
//! firmware before them refuses such a calibration as a bad one, changing
//! nothing, and still takes layout 1. The calibration is the simulator's
//! exact one for the synthetic grain with two static-term coefficients
//! added (values made up for the test).

mod common;

use common::*;
use fringe_calibration::product::{LAYOUT_VERSION_STATIC, RELAXATION_LEN, RELAXATION_STATIC_LEN};
use fringe_calibration::synth::SynthProduct;
use fringe_firmware::protocol::*;
use fringe_firmware::sim::exact_calibration;
use fringe_firmware::Scenario;

/// Layout 1 (the simulator's exact calibration) and the same as layout 2.
fn calibrations() -> (ProductCal, ProductCal) {
    let plain = exact_calibration(&SynthProduct::grain(), "Harrowgate wheat");
    assert_eq!(plain.params.len(), RELAXATION_LEN);
    let mut with = plain.clone();
    with.params[0] = LAYOUT_VERSION_STATIC;
    // q1, q2 (% per %, % per %^2) and the hold of h, %.
    for v in [0.05, -0.001, 5.0, 30.0] {
        with.params.push(v).expect("room for layout 2");
    }
    assert_eq!(with.params.len(), RELAXATION_STATIC_LEN);
    (plain, with)
}

fn identity(b: &mut Bench) -> Identity {
    match b.ok(Request::Identify {
        host: PROTOCOL_VERSION,
    }) {
        Response::Identity(id) => id,
        other => panic!("{other:?}"),
    }
}

#[test]
fn a_device_takes_the_static_terms_and_says_so() {
    big_stack(|| {
        let mut b = Bench::new(51, Scenario::default());
        assert!(identity(&mut b)
            .capabilities
            .contains(Capabilities::STATIC_TERMS));
        let (_, with) = calibrations();
        assert_eq!(
            b.ok(Request::WriteProductCal {
                slot: 0,
                cal: with.clone()
            }),
            Response::Ack
        );
        match b.ok(Request::ReadProductCal { slot: 0 }) {
            Response::ProductCal { cal, .. } => assert_eq!(cal, Some(with)),
            other => panic!("{other:?}"),
        }
    });
}

#[test]
fn a_device_without_them_refuses_layout_2_as_older_firmware() {
    big_stack(|| {
        let mut cfg = config();
        cfg.static_terms = false;
        let mut b = Bench::with_config(52, Scenario::default(), Flash::new(), cfg);
        assert!(!identity(&mut b)
            .capabilities
            .contains(Capabilities::STATIC_TERMS));
        let (plain, with) = calibrations();
        let f = b.ask(Request::WriteProductCal { slot: 0, cal: with });
        assert_eq!(Bench::error_code(&f), Some(ErrorCode::BadCalibration));
        match b.ok(Request::ReadProductCal { slot: 0 }) {
            Response::ProductCal { cal, .. } => assert_eq!(cal, None, "nothing written"),
            other => panic!("{other:?}"),
        }
        assert_eq!(
            b.ok(Request::WriteProductCal {
                slot: 0,
                cal: plain
            }),
            Response::Ack
        );
    });
}
