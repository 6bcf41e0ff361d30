//! End to end in-process: bench cell calibration through the simulated front
//! end, a product calibration of the synthetic product, then many seeded
//! readings of known moisture.
//!
//! A consistency test of the device's noise propagation, not an outside
//! check: the product calibration is the simulator's own exact one (SEC 0),
//! so the 95 % intervals must cover the truth in 90-99 % of readings from
//! the measurement noise alone. Coverage with a calibration fitted to noisy
//! lab samples is `relaxation_prediction_interval_coverage` in
//! `calibration/tests/product_fit.rs`.

mod common;

use common::*;
use fringe_calibration::synth::SynthProduct;
use fringe_firmware::protocol::*;
use fringe_firmware::sim::{exact_calibration, Material};
use fringe_firmware::Scenario;
use rand::{RngExt, SeedableRng};

/// The synthetic grain's exact calibration (moisture = mixing-model moisture).
pub fn grain_calibration() -> ProductCal {
    exact_calibration(&SynthProduct::grain(), "Harrowgate wheat")
}

/// A device with its cell calibrated on the bench and the grain selected.
fn calibrated(seed: u64) -> Bench {
    let mut b = Bench::new(seed, Scenario::default());
    bench_calibrate(&mut b, 64);
    let cal = grain_calibration();
    assert_eq!(
        b.ok(Request::WriteProductCal { slot: 0, cal }),
        Response::Ack
    );
    assert_eq!(b.ok(Request::SelectProduct { slot: 0 }), Response::Ack);
    b
}

fn product_scenario(m: f32, t: f32, salt: f32) -> Scenario {
    Scenario {
        material: Material::Product {
            product: SynthProduct::grain(),
            moisture_pct: m,
            water_sigma25_s_m: salt,
        },
        temperature_c: t,
        ..Scenario::default()
    }
}

#[test]
fn intervals_cover_the_truth_at_the_stated_rate_with_an_exact_calibration() {
    big_stack(|| {
        let seed = fringe_testkit::seed(0xE2E_2026);
        let mut b = calibrated(seed);
        let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
        let runs = 400;
        let (mut covered, mut sum_u) = (0, 0.0f64);
        for i in 0..runs {
            let m = rng.random_range(10.0f32..20.0);
            let t = rng.random_range(10.0f32..35.0);
            let salt = rng.random_range(0.05f32..0.8);
            b.dev
                .frontend_mut()
                .set_scenario(product_scenario(m, t, salt));
            let r = b.measure();
            let est = r.moisture_pct.unwrap_or_else(|| {
                panic!("seed {seed:#x} run {i}: no moisture, flags {:?}", r.flags)
            });
            assert!(
                !r.flags.intersects(
                    Flags::NOT_CALIBRATED | Flags::FIT_NOT_CONVERGED | Flags::NO_PRODUCT
                ),
                "seed {seed:#x} run {i}: {:?}",
                r.flags
            );
            if (est - m).abs() <= 1.96 * r.uncertainty_pct {
                covered += 1;
            }
            sum_u += f64::from(r.uncertainty_pct);
        }
        let rate = f64::from(covered) / f64::from(runs);
        let mean_u = sum_u / f64::from(runs);
        println!("seed {seed:#x}: 95 % coverage {rate:.3} over {runs} runs, mean u {mean_u:.4} %");
        assert!(
            (0.90..=0.99).contains(&rate),
            "seed {seed:#x}: coverage {rate:.3} over {runs} runs (mean u {mean_u:.3} %)"
        );
        // The uncertainty is a useful size, not a blanket.
        assert!(mean_u < 1.0, "seed {seed:#x}: mean u {mean_u} %");
    });
}

#[test]
fn a_calibrated_device_flags_an_empty_line_and_reports_no_moisture() {
    big_stack(|| {
        let mut b = calibrated(7);
        b.dev.frontend_mut().set_scenario(Scenario {
            product_present: false,
            ..product_scenario(15.0, 20.0, 0.2)
        });
        let r = b.measure();
        assert!(r.flags.contains(Flags::NO_PRODUCT), "{:?}", r.flags);
        assert_eq!(r.moisture_pct, None);
        assert_eq!(r.product_cal, grain_calibration().content_id());
        // Output signals the fault (NE 43 low).
        assert!(b.dev.output_ma() <= 3.6);
        b.dev
            .frontend_mut()
            .set_scenario(product_scenario(15.0, 20.0, 0.2));
        let r = b.measure();
        let m = r.moisture_pct.expect("moisture");
        assert!(
            (m - 15.0).abs() < 4.0 * r.uncertainty_pct.max(0.05),
            "{m} +/- {}",
            r.uncertainty_pct
        );
        let ma = b.dev.output_ma();
        // The loop carries the full-precision moisture; the wire rounds it to
        // 0.01 % (protocol quant), worth 0.0027 mA on this 0-30 % span.
        assert!(
            (ma - (4.0 + 16.0 * m / 30.0)).abs() < 3e-3,
            "{ma} mA for {m} %"
        );
    });
}

/// The registers the Modbus RTU slave serves are `fringe_registers::map` of
/// the reading the device sent over its own protocol, with its age on the
/// device clock, and stale once that age passes the stale-output timeout.
/// A consistency test (docs/REFERENCES.md App. C): both sides use the map
/// of `fringe-registers`; what it checks is the device's snapshot (which
/// reading, rounded as the wire carries it, its age, the staleness) and the
/// slave's framing of the words.
#[test]
fn modbus_registers_are_the_map_of_the_reading_sent() {
    use fringe_firmware::modbus::{RtuSlave, SerialLine};
    use fringe_registers::{map, Snapshot, STATUS, STATUS_NO_VALUE, STATUS_STALE};
    big_stack(|| {
        let mut b = calibrated(11);
        b.dev
            .frontend_mut()
            .set_scenario(product_scenario(14.0, 22.0, 0.2));
        let r = b.measure();
        assert!(r.moisture_pct.is_some(), "{:?}", r.flags);
        let crc = crc::Crc::<u16>::new(&crc::CRC_16_MODBUS);
        let body = [0x01, 0x04, 0x00, 0x00, 0x00, 25];
        let mut request = body.to_vec();
        request.extend_from_slice(&crc.checksum(&body).to_le_bytes());
        // Reads the whole map at `at_ms` through the slave.
        let read = |b: &Bench, at_ms: u64| -> Vec<u16> {
            let mut s = RtuSlave::new(&SerialLine::DEFAULT).unwrap();
            let t0 = at_ms * 1000;
            for (i, &byte) in request.iter().enumerate() {
                s.receive(t0 + 573 * (i as u64 + 1), byte);
            }
            let answer = s
                .poll(t0 + 573 * 8 + 2006, || b.dev.modbus_registers(at_ms))
                .expect("answered")
                .to_vec();
            assert_eq!(&answer[..3], &[0x01, 0x04, 50]);
            answer[3..53]
                .chunks(2)
                .map(|w| u16::from_be_bytes([w[0], w[1]]))
                .collect()
        };
        // No clock set: time_ms counts from boot, which was at 0.
        assert!(r.flags.contains(Flags::CLOCK_UNSET));
        let taken = r.time_ms;
        let now = b.now;
        let want = map(&Snapshot {
            reading: Some(r),
            age_s: ((now - taken) / 1000) as u32,
            stale: false,
            connected: true,
            basis: Some(fringe_protocol::Basis::Wet),
        });
        let words = read(&b, now);
        assert_eq!(words, want);
        // The simulator's exact calibration reports on a wet basis: 1.
        assert_eq!(words[15], 1);
        assert_eq!(words[STATUS as usize] & STATUS_NO_VALUE, 0, "a valid value");
        // Past the stale-output timeout the same reading shows stale, with
        // no valid value, and its age in seconds.
        let late = taken + u64::from(b.dev.settings().stale_timeout_ms) + 1;
        let words = read(&b, late);
        let want = map(&Snapshot {
            reading: Some(r),
            age_s: ((late - taken) / 1000) as u32,
            stale: true,
            connected: true,
            basis: Some(fringe_protocol::Basis::Wet),
        });
        assert_eq!(words, want);
        assert_eq!(
            words[STATUS as usize] & (STATUS_STALE | STATUS_NO_VALUE),
            STATUS_STALE | STATUS_NO_VALUE
        );
        assert_eq!(words[9], 10, "age 10 s");
        // A calibration on a dry basis selected: register 15 keeps the
        // basis of the reading it shows (1) until a reading is computed
        // with the new one, then says 2; 14 % wet is 16.28 % dry (the
        // simulator's dry calibration, its cubic, 16.23 %).
        let dry = fringe_firmware::sim::exact_calibration_on(
            &SynthProduct::grain(),
            "Harrowgate wheat, dry basis",
            fringe_protocol::Basis::Dry,
        );
        assert_eq!(
            b.ok(Request::WriteProductCal { slot: 1, cal: dry }),
            Response::Ack
        );
        assert_eq!(b.ok(Request::SelectProduct { slot: 1 }), Response::Ack);
        assert_eq!(read(&b, late)[15], 1, "the shown reading's basis");
        let r = b.measure();
        let m = r.moisture_pct.expect("a moisture on the dry calibration");
        assert!((m - 16.23).abs() < 0.4, "{m}");
        assert_eq!(read(&b, b.now)[15], 2);
    });
}

/// A dry-basis calibration written before its valid range was held to the
/// 327.67 % a reading carries (range up to 1000 %): a moisture above that
/// is still flagged out of range, sent as 327.67, and one below it is not.
/// (The grain's exact calibration scaled by 25 and 20: about 375 and 300 %
/// at 15 % of the simulator's product; made-up calibrations.)
#[test]
fn a_moisture_beyond_what_a_reading_carries_is_flagged() {
    use fringe_calibration::product::{
        no_sigma_hold, no_static_hold, ProductModel, RelaxationModel,
    };
    big_stack(|| {
        for (scale, flagged) in [(25.0f32, true), (20.0, false)] {
            let grain = SynthProduct::grain();
            let model = ProductModel::Relaxation(RelaxationModel {
                law: grain.law(),
                mixture: grain.mixture,
                t_ref_c: 25.0,
                coeffs: [0.0, scale, 0.0, 0.0],
                c_t: 0.0,
                c_sigma: 0.0,
                c_static: [0.0; 2],
                static_hold: no_static_hold(),
                sigma_hold: no_sigma_hold(),
                density_input: false,
            });
            let (params, n) = model.to_params();
            let mut cal = grain_calibration();
            cal.basis = Basis::Dry;
            cal.moisture_pct = Range {
                min: 0.0,
                max: 1000.0,
            };
            cal.params.clear();
            for x in params.iter().take(n) {
                cal.params.push(*x).unwrap();
            }
            let mut b = Bench::new(11, Scenario::default());
            bench_calibrate(&mut b, 64);
            assert_eq!(
                b.ok(Request::WriteProductCal { slot: 0, cal }),
                Response::Ack
            );
            assert_eq!(b.ok(Request::SelectProduct { slot: 0 }), Response::Ack);
            b.dev
                .frontend_mut()
                .set_scenario(product_scenario(15.0, 20.0, 0.2));
            let r = b.measure();
            let m = r.moisture_pct.expect("moisture");
            assert_eq!(
                r.flags.contains(Flags::OUT_OF_RANGE),
                flagged,
                "x{scale}: {m} % {:?}",
                r.flags
            );
            if flagged {
                assert_eq!(m, 327.67, "{:?}", r.flags);
            } else {
                assert!((250.0..327.0).contains(&m), "{m}");
            }
        }
    });
}
