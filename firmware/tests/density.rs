//! The plant's bulk density (protocol 1.4): a calibration with a density
//! input uses the density the host sends while it holds, flags its
//! readings `DENSITY_MISSING` without one, and the device refuses a bad
//! density, a density for another boot and an unsigned one, changing
//! nothing. The calibration is made up for the test (moisture = 10 % +
//! 20 % x (rho / 1000 kg/m^3 - 1), nothing else), so that the density's
//! effect on a reading is known exactly.

mod common;

use common::*;
use fringe_calibration::product::{MultivariateModel, ProductModel, MV_FEATURES};
use fringe_firmware::protocol::auth::sign;
use fringe_firmware::protocol::*;
use fringe_firmware::Scenario;

const RHO_REF: f32 = 1000.0;

/// The made-up calibration: only the intercept and the density deviation.
fn density_calibration() -> ProductCal {
    let mut coeffs = [0.0f32; MV_FEATURES];
    coeffs[23] = 20.0; // dr = rho / rho_ref - 1
    let model = ProductModel::Multivariate(MultivariateModel {
        t_ref_c: 25.0,
        a_f: 0.5,
        intercept: 10.0,
        coeffs,
        rho_ref_kg_m3: RHO_REF,
    });
    assert!(matches!(model, ProductModel::Multivariate(m) if m.uses_density()));
    let (params, n) = model.to_params();
    let r = |min, max| Range { min, max };
    ProductCal {
        name: short_string("Quarry sand L1"),
        model: ModelKind::Multivariate,
        basis: Basis::Wet,
        params: params.iter().take(n).copied().collect(),
        moisture_pct: r(0.0, 30.0),
        temperature_c: r(-20.0, 80.0),
        inputs: [
            r(1.0, 100.0),
            r(0.0, 1000.0),
            r(1.0, 100.0),
            r(0.0, 1000.0),
            r(500.0, 2500.0),
        ]
        .into_iter()
        .collect(),
        sec_pct: 0.3,
        made_s: 0,
    }
}

/// A calibrated device with the density calibration active.
fn device(seed: u64) -> Bench {
    let mut b = Bench::new(seed, Scenario::default());
    bench_calibrate(&mut b, 32);
    assert_eq!(
        b.ok(Request::WriteProductCal {
            slot: 0,
            cal: density_calibration(),
        }),
        Response::Ack
    );
    assert_eq!(b.ok(Request::SelectProduct { slot: 0 }), Response::Ack);
    b
}

fn boot_of(b: &mut Bench) -> u32 {
    match b.ok(Request::Identify {
        host: PROTOCOL_VERSION,
    }) {
        Response::Identity(id) => {
            assert!(
                id.capabilities.contains(Capabilities::DENSITY_INPUT),
                "{:?}",
                id.capabilities
            );
            id.boot
        }
        other => panic!("{other:?}"),
    }
}

fn write_counter(b: &mut Bench) -> u32 {
    match b.ok(Request::Status) {
        Response::Status(s) => s.write_counter,
        other => panic!("{other:?}"),
    }
}

fn density(boot: u32, kg_m3: f32, hold_ms: u32) -> Request {
    Request::SetDensity {
        boot,
        kg_m3,
        hold_ms,
    }
}

fn reason(f: &DeviceFrame) -> String {
    match f {
        DeviceFrame::Error { reason, .. } => reason.to_string(),
        other => panic!("not refused: {other:?}"),
    }
}

#[test]
fn a_density_holds_for_its_time_and_then_readings_are_flagged() {
    big_stack(|| {
        let mut b = device(41);
        let boot = boot_of(&mut b);
        // No density yet: the reference density, flagged.
        let r = b.measure();
        assert!(r.flags.contains(Flags::DENSITY_MISSING), "{:?}", r.flags);
        let m0 = r.moisture_pct.expect("a moisture without a density");
        assert!((m0 - 10.0).abs() < 0.01, "{m0}");
        let u0 = r.uncertainty_pct;

        // 1,100 kg/m^3 for 5 s: 10 + 20 x 0.1 = 12 %, no flag, and the
        // uncertainty without the density term is smaller.
        assert_eq!(b.ok(density(boot, 1100.0, 5_000)), Response::Ack);
        let r = b.measure();
        assert!(!r.flags.contains(Flags::DENSITY_MISSING), "{:?}", r.flags);
        let m = r.moisture_pct.unwrap();
        assert!((m - 12.0).abs() < 0.01, "{m}");
        assert!(r.uncertainty_pct < u0, "{} vs {u0}", r.uncertainty_pct);

        // A new value replaces it.
        assert_eq!(b.ok(density(boot, 950.0, 5_000)), Response::Ack);
        let m = b.measure().moisture_pct.unwrap();
        assert!((m - 9.0).abs() < 0.01, "{m}");

        // The hold runs out: flagged again, at the reference density.
        b.tick(5_000);
        let r = b.measure();
        assert!(r.flags.contains(Flags::DENSITY_MISSING), "{:?}", r.flags);
        assert!((r.moisture_pct.unwrap() - 10.0).abs() < 0.01);

        // The schedule's own readings (logged) use it too.
        assert_eq!(b.ok(density(boot, 1200.0, 60_000)), Response::Ack);
        b.tick(3_000);
        let all = b.read_log_from(Seq { boot, counter: 0 });
        let last = all.last().expect("logged readings");
        assert!(!last.flags.contains(Flags::DENSITY_MISSING), "{last:?}");
        assert!((last.moisture_pct.unwrap() - 14.0).abs() < 0.01, "{last:?}");

        // Not stored: a reboot forgets it.
        let mut b = b.reboot(42);
        let r = b.measure();
        assert!(r.flags.contains(Flags::DENSITY_MISSING), "{:?}", r.flags);
    });
}

#[test]
fn bad_densities_are_refused_and_change_nothing() {
    big_stack(|| {
        let mut b = device(43);
        let boot = boot_of(&mut b);
        assert_eq!(b.ok(density(boot, 1500.0, 60_000)), Response::Ack);
        for (req, code, why) in [
            (
                density(boot, f32::NAN, 60_000),
                ErrorCode::NotFinite,
                "kg_m3 not finite",
            ),
            (
                density(boot, f32::INFINITY, 60_000),
                ErrorCode::NotFinite,
                "kg_m3 not finite",
            ),
            // g/cm^3 by mistake.
            (
                density(boot, 1.5, 60_000),
                ErrorCode::OutOfRange,
                "kg_m3 not 10..5000",
            ),
            (
                density(boot, 5001.0, 60_000),
                ErrorCode::OutOfRange,
                "kg_m3 not 10..5000",
            ),
            (
                density(boot, 1200.0, 999),
                ErrorCode::OutOfRange,
                "hold_ms not 1000..3600000",
            ),
            (
                density(boot, 1200.0, 3_600_001),
                ErrorCode::OutOfRange,
                "hold_ms not 1000..3600000",
            ),
        ] {
            let f = b.ask(req.clone());
            assert_eq!(Bench::error_code(&f), Some(code), "{req:?}: {f:?}");
            assert_eq!(reason(&f), why, "{req:?}");
        }
        // Still the accepted one: 10 + 20 x 0.5 = 20 %.
        let m = b.measure().moisture_pct.unwrap();
        assert!((m - 20.0).abs() < 0.01, "{m}");
    });
}

#[test]
fn forged_replayed_and_other_boot_densities_are_refused_and_logged() {
    big_stack(|| {
        let mut b = device(44);
        let boot = boot_of(&mut b);
        let stored_before = write_counter(&mut b);
        let good = density(boot, 1100.0, 60_000);
        b.counter += 1;
        let captured = sign(&KEY, SERIAL, b.counter, &good).unwrap();
        match b.ask_with(good.clone(), Some(captured)) {
            DeviceFrame::Response { response, .. } => assert_eq!(response, Response::Ack),
            other => panic!("{other:?}"),
        }
        // A sequence of its own, in RAM: the stored counter, which the
        // other writes must exceed, is not raised.
        assert_eq!(write_counter(&mut b), stored_before);

        // The same signed density again (its answer lost on the line): it
        // is answered, not applied again (a replay cannot extend its hold)
        // and not counted as a failed write.
        let events_before = b.events().len();
        match b.ask_with(good.clone(), Some(captured)) {
            DeviceFrame::Response { response, .. } => assert_eq!(response, Response::Ack),
            other => panic!("{other:?}"),
        }
        assert_eq!(b.events().len(), events_before, "nothing logged");

        let evil = density(boot, 2000.0, 60_000);
        // Unsigned.
        let f = b.ask_with(evil.clone(), None);
        assert_eq!(reason(&f), AuthFailure::Missing.reason());
        // Wrong key.
        let a = sign(&[0x43; 32], SERIAL, b.counter + 1, &evil).unwrap();
        assert_eq!(
            reason(&b.ask_with(evil.clone(), Some(a))),
            AuthFailure::BadTag.reason()
        );
        // A newer density, then the captured one replayed.
        assert_eq!(b.ok(density(boot, 1100.0, 60_000)), Response::Ack);
        assert_eq!(
            reason(&b.ask_with(good.clone(), Some(captured))),
            AuthFailure::Replay.reason()
        );
        // Still 1,100 kg/m^3: 12 %.
        let m = b.measure().moisture_pct.unwrap();
        assert!((m - 12.0).abs() < 0.01, "{m}");

        // After a restart the RAM counter is gone, but the boot is not the
        // same: the captured request is refused as a replay.
        b.tick(fringe_firmware::device::MAX_WRITE_HOLD_MS);
        let mut b = b.reboot(45);
        let new_boot = boot_of(&mut b);
        assert_ne!(new_boot, boot);
        assert_eq!(
            reason(&b.ask_with(good, Some(captured))),
            AuthFailure::Replay.reason()
        );
        let r = b.measure();
        assert!(r.flags.contains(Flags::DENSITY_MISSING), "{:?}", r.flags);
        let fails: Vec<_> = b
            .events()
            .into_iter()
            .filter_map(|e| match e.kind {
                EventKind::AuthFailed { reason, counter } => Some((reason, counter)),
                _ => None,
            })
            .collect();
        assert_eq!(
            fails.last(),
            Some(&(AuthFailure::Replay, captured.counter)),
            "{fails:?}"
        );
        // A density for this boot with a fresh counter is taken.
        assert_eq!(b.ok(density(new_boot, 1100.0, 60_000)), Response::Ack);
        let r = b.measure();
        assert!(!r.flags.contains(Flags::DENSITY_MISSING), "{:?}", r.flags);
    });
}

/// Densities with counters far above the stored write counter (a density
/// every tenth of a second for days) do not raise the counter the other
/// writes must exceed: a write signed with the stored counter plus one,
/// as the host signs it, is taken; one at or below it is a replay.
#[test]
fn densities_do_not_move_the_stored_writes_counter() {
    big_stack(|| {
        let mut b = device(47);
        let boot = boot_of(&mut b);
        let stored = write_counter(&mut b);
        for c in [5_000_000u32, 5_000_001] {
            let req = density(boot, 1200.0, 60_000);
            let a = sign(&KEY, SERIAL, c, &req).unwrap();
            match b.ask_with(req, Some(a)) {
                DeviceFrame::Response { response, .. } => assert_eq!(response, Response::Ack),
                other => panic!("{other:?}"),
            }
        }
        assert_eq!(write_counter(&mut b), stored);
        let select = Request::SelectProduct { slot: 0 };
        let a = sign(&KEY, SERIAL, stored, &select).unwrap();
        assert_eq!(
            reason(&b.ask_with(select.clone(), Some(a))),
            AuthFailure::Replay.reason()
        );
        b.counter = stored;
        assert_eq!(b.ok(select), Response::Ack);
        assert_eq!(write_counter(&mut b), stored + 1);
    });
}

/// Another product selected: the density sent for the last one is
/// dropped (its readings are flagged until one comes for the new one).
#[test]
fn selecting_another_product_drops_the_density() {
    big_stack(|| {
        let mut b = device(48);
        assert_eq!(
            b.ok(Request::WriteProductCal {
                slot: 1,
                cal: density_calibration(),
            }),
            Response::Ack
        );
        let boot = boot_of(&mut b);
        assert_eq!(b.ok(density(boot, 1100.0, 600_000)), Response::Ack);
        // The same product selected again keeps it.
        assert_eq!(b.ok(Request::SelectProduct { slot: 0 }), Response::Ack);
        assert!(!b.measure().flags.contains(Flags::DENSITY_MISSING));
        assert_eq!(b.ok(Request::SelectProduct { slot: 1 }), Response::Ack);
        let r = b.measure();
        assert!(r.flags.contains(Flags::DENSITY_MISSING), "{:?}", r.flags);
    });
}

#[test]
fn a_device_without_the_input_answers_as_older_firmware() {
    big_stack(|| {
        let mut cfg = config();
        cfg.density_input = false;
        let mut b = Bench::with_config(46, Scenario::default(), Flash::new(), cfg);
        let id = match b.ok(Request::Identify {
            host: PROTOCOL_VERSION,
        }) {
            Response::Identity(id) => id,
            other => panic!("{other:?}"),
        };
        assert!(!id.capabilities.contains(Capabilities::DENSITY_INPUT));
        let before = write_counter(&mut b);
        let f = b.ask(density(id.boot, 1100.0, 60_000));
        assert_eq!(Bench::error_code(&f), Some(ErrorCode::UnknownRequest));
        assert_eq!(write_counter(&mut b), before, "no write spent on it");
    });
}

/// The protocol's limits and the calibration table's are the same.
#[test]
fn the_limits_agree_with_the_calibration_tables() {
    let (lo, hi) = fringe_calibration::product::DENSITY_LIMITS_KG_M3;
    assert_eq!(DENSITY_RANGE_KG_M3, (lo as f32, hi as f32));
}
