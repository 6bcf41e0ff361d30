//! The relaxation model's static terms (parameter layout 2), conductivity
//! hold (layout 3) and density input (layout 4): a device announces that
//! it takes them (`STATIC_TERMS`, `SIGMA_HOLD`, `RELAXATION_DENSITY`) and
//! does; one configured as firmware
//! before them refuses such a calibration as a bad one, changing nothing,
//! and still takes the layouts it knew. The calibration is the simulator's
//! exact one for the synthetic grain with two static-term coefficients and
//! a hold added (values made up for the test).

mod common;

use common::*;
use fringe_calibration::product::{
    LAYOUT_VERSION_DENSITY_INPUT, LAYOUT_VERSION_SIGMA_HOLD, LAYOUT_VERSION_STATIC, RELAXATION_LEN,
    RELAXATION_SIGMA_HOLD_LEN, RELAXATION_STATIC_LEN,
};
use fringe_calibration::synth::SynthProduct;
use fringe_firmware::protocol::*;
use fringe_firmware::sim::exact_calibration;
use fringe_firmware::{DeviceConfig, Scenario};

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

/// The layout-2 calibration with a conductivity hold (layout 3).
fn held() -> ProductCal {
    let (_, mut c) = calibrations();
    c.params[0] = LAYOUT_VERSION_SIGMA_HOLD;
    // sigma_min, sigma_max, S/m.
    for v in [1e-5, 1e30] {
        c.params.push(v).expect("room for layout 3");
    }
    assert_eq!(c.params.len(), RELAXATION_SIGMA_HOLD_LEN);
    c
}

/// The layout-3 calibration with the density input (layout 4): the same
/// values, and the calibrated bulk densities as its fifth input range.
fn with_density() -> ProductCal {
    let mut c = held();
    c.params[0] = LAYOUT_VERSION_DENSITY_INPUT;
    c.inputs
        .push(Range {
            min: 700.0,
            max: 820.0,
        })
        .expect("room for the density range");
    c
}

/// Writes `cal` to slot 0 of a device configured by `setup`: whether it
/// was taken, and the device's capabilities.
fn write_to(
    seed: u64,
    setup: impl FnOnce(&mut DeviceConfig),
    cal: ProductCal,
) -> (bool, Capabilities) {
    let mut cfg = config();
    setup(&mut cfg);
    let mut b = Bench::with_config(seed, Scenario::default(), Flash::new(), cfg);
    let caps = identity(&mut b).capabilities;
    let f = b.ask(Request::WriteProductCal {
        slot: 0,
        cal: cal.clone(),
    });
    let taken = match Bench::error_code(&f) {
        None => true,
        Some(ErrorCode::BadCalibration) => false,
        other => panic!("{other:?}"),
    };
    match b.ok(Request::ReadProductCal { slot: 0 }) {
        Response::ProductCal { cal: got, .. } => {
            assert_eq!(got, taken.then_some(cal), "written only if taken")
        }
        other => panic!("{other:?}"),
    }
    (taken, caps)
}

#[test]
fn the_conductivity_hold_is_taken_only_by_firmware_that_announces_it() {
    big_stack(|| {
        let (plain, with) = calibrations();
        let (taken, caps) = write_to(53, |_| {}, held());
        assert!(taken && caps.contains(Capabilities::SIGMA_HOLD | Capabilities::STATIC_TERMS));
        // Firmware with the static terms but before the hold.
        let older = |c: &mut DeviceConfig| c.sigma_hold = false;
        let (taken, caps) = write_to(54, older, held());
        assert!(!taken && !caps.contains(Capabilities::SIGMA_HOLD));
        assert!(caps.contains(Capabilities::STATIC_TERMS));
        assert!(write_to(55, older, with).0);
        // Firmware before the static terms knows neither.
        let oldest = |c: &mut DeviceConfig| c.static_terms = false;
        let (taken, caps) = write_to(56, oldest, held());
        assert!(!taken && !caps.contains(Capabilities::SIGMA_HOLD));
        assert!(write_to(57, oldest, plain).0);
    });
}

#[test]
fn the_density_input_is_taken_only_by_firmware_that_announces_it() {
    big_stack(|| {
        let (taken, caps) = write_to(58, |_| {}, with_density());
        assert!(taken && caps.contains(Capabilities::RELAXATION_DENSITY));
        // Firmware before it, firmware without the density request and
        // firmware before the conductivity hold refuse it; firmware just
        // before it still takes layout 3.
        for (seed, older) in [
            (
                59,
                (|c: &mut DeviceConfig| c.relaxation_density = false) as fn(&mut DeviceConfig),
            ),
            (60, |c: &mut DeviceConfig| c.density_input = false),
            (61, |c: &mut DeviceConfig| c.sigma_hold = false),
        ] {
            let (taken, caps) = write_to(seed, older, with_density());
            assert!(!taken && !caps.contains(Capabilities::RELAXATION_DENSITY));
        }
        assert!(write_to(62, |c| c.relaxation_density = false, held()).0);
        // Layout 4 without the density range is a bad calibration anywhere.
        let mut short = with_density();
        short.inputs.pop();
        assert!(!write_to(63, |_| {}, short).0);
    });
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
