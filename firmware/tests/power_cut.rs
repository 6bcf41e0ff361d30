//! Power cut at every flash write step of a calibration update and of a log
//! append (exhaustive over each step): after restart the calibration is the
//! old one or the new one, never a mix, and the logs are intact up to the cut.
//!
//! The device measures on its own schedule; these tests slow it to one
//! reading an hour ([`quiet_config`]) and let the reading it takes at boot
//! finish before they count flash operations, so that every run from the
//! same flash does the same operations in the same order.

mod common;

use common::*;
use fringe_firmware::protocol::*;
use fringe_firmware::Scenario;

fn cell(stray: f32) -> CellCal {
    cell_cal(stray, 0.0)
}

fn read_log(b: &mut Bench) -> Vec<Reading> {
    b.read_log_from(Seq::default())
}

/// Readings as their stored bytes (a reading may hold NaN, which `==` never matches).
fn bytes(rs: &[Reading]) -> Vec<Vec<u8>> {
    rs.iter()
        .map(|r| postcard::to_allocvec(r).expect("encode"))
        .collect()
}

fn ops(b: &mut Bench) -> u32 {
    let (w, e) = b.dev.flash_mut().op_counts();
    w + e
}

/// A device with a stored calibration, some readings and events, after
/// `extra` earlier calibration writes (to move the map towards a page change).
fn prepared(extra: u32) -> (Flash, u32) {
    let mut b = Bench::with_config(20, Scenario::default(), Flash::new(), quiet_config());
    for i in 0..extra {
        assert_eq!(
            b.ok(Request::WriteCellCal(cell(1.0 + i as f32 * 0.01))),
            Response::Ack
        );
    }
    assert_eq!(b.ok(Request::WriteCellCal(cell(2.1))), Response::Ack);
    for _ in 0..5 {
        b.measure();
    }
    let counter = b.counter;
    let (_, flash, _) = b.dev.into_parts();
    (flash, counter)
}

/// Boots on `flash` and lets the boot reading finish.
fn bench_on(flash: Flash, counter: u32) -> Bench {
    let mut b = Bench::with_config(21, Scenario::default(), flash, quiet_config());
    b.settle();
    b.counter = counter;
    b
}

#[test]
fn calibration_update_is_old_or_new_after_a_cut_at_any_step() {
    big_stack(calibration_update_body);
}

fn calibration_update_body() {
    let (old, new) = (cell(2.1), cell(2.3));
    let mut steps_total = 0;
    for extra in [0u32, 17, 40] {
        let (flash, counter) = prepared(extra);
        // Reference run: how many flash operations the update takes after boot.
        let mut b = bench_on(flash.clone(), counter);
        let log_before = read_log(&mut b);
        let events_before = b.events();
        let before = ops(&mut b);
        assert_eq!(b.ok(Request::WriteCellCal(new)), Response::Ack);
        let steps = ops(&mut b) - before;
        assert!(steps >= 3, "update took {steps} flash operations");
        steps_total += steps;
        for k in 0..steps {
            let mut b = bench_on(flash.clone(), counter);
            let _ = read_log(&mut b);
            let _ = b.events();
            b.dev.flash_mut().cut_power_after(k);
            let _ = b.ask(Request::WriteCellCal(new));
            assert!(
                b.dev.flash_mut().power_cut_happened(),
                "extra {extra} step {k}: no cut"
            );
            let (fe, mut fl, _) = b.dev.into_parts();
            fl.restart();
            let mut b = Bench::with_config(22, *fe.scenario(), fl, quiet_config());
            b.settle();
            b.counter = counter + 1;
            let now = stored_cell(&mut b);
            assert!(
                now == Some(old) || now == Some(new),
                "extra {extra} step {k}: calibration after cut is {now:?}"
            );
            // Logs intact up to the cut: everything stored before is still
            // there, in order, followed by the reading of the new boot.
            let log = read_log(&mut b);
            assert_eq!(
                log.len(),
                log_before.len() + 1,
                "extra {extra} step {k}: reading log length"
            );
            assert_eq!(
                bytes(&log[..log_before.len()]),
                bytes(&log_before),
                "extra {extra} step {k}: reading log changed"
            );
            let ev = b.events();
            assert!(
                ev.len() >= events_before.len() && ev[..events_before.len()] == events_before[..],
                "extra {extra} step {k}: event log lost entries"
            );
            // And the device goes on working: a later update lands.
            b.counter += 10;
            assert_eq!(
                b.ok(Request::WriteCellCal(cell(2.5))),
                Response::Ack,
                "extra {extra} step {k}"
            );
            assert_eq!(stored_cell(&mut b), Some(cell(2.5)));
        }
    }
    assert!(steps_total >= 9);
    println!("power cuts tried (calibration update): {steps_total}");
}

/// A device whose reading log ring is full (appends now erase the oldest page).
fn full_ring() -> Flash {
    let mut cfg = config();
    cfg.measure.records = 1;
    let mut b = Bench::with_config(30, Scenario::default(), Flash::new(), cfg);
    // Until the ring has dropped its oldest page once, then a page more.
    let mut wrapped_at = None;
    for i in 0..5000u32 {
        b.measure();
        if i % 16 == 0 {
            let first = match b.ok(Request::Status) {
                Response::Status(s) => s.log_first,
                other => panic!("{other:?}"),
            };
            if first.counter > 0 && wrapped_at.is_none() {
                wrapped_at = Some(i);
            }
        }
        if wrapped_at.is_some_and(|w| i > w + 40) {
            break;
        }
    }
    assert!(wrapped_at.is_some(), "log ring never wrapped");
    let (_, flash, _) = b.dev.into_parts();
    flash
}

/// Boots on `flash` with one record per frequency (the boot reading not
/// yet taken: call [`Bench::settle`]).
fn fast(flash: Flash, seed: u64) -> Bench {
    let mut cfg = quiet_config();
    cfg.measure.records = 1;
    Bench::with_config(seed, Scenario::default(), flash, cfg)
}

#[test]
fn log_append_survives_a_cut_at_any_step() {
    big_stack(log_append_body);
}

fn log_append_body() {
    let flash = full_ring();
    let mut b = fast(flash.clone(), 31);
    b.settle();
    let cap = b.dev.log_capacity() as usize;
    let log_before = read_log(&mut b);
    assert!(log_before.len() >= cap);
    let before = ops(&mut b);
    // Enough appends to fill the current log page, so one of them erases the oldest page.
    let n = 70;
    let mut erased = false;
    for _ in 0..n {
        let e0 = b.dev.flash_mut().op_counts().1;
        b.measure();
        erased |= b.dev.flash_mut().op_counts().1 > e0;
    }
    assert!(erased, "no page erase among the appends");
    let steps = ops(&mut b) - before;
    println!("power cuts tried (log appends over a full ring): {steps}");
    for k in 0..steps {
        let mut b = fast(flash.clone(), 31);
        b.settle();
        b.dev.flash_mut().cut_power_after(k);
        let mut taken = Vec::new();
        for _ in 0..n {
            taken.push(b.measure());
            if b.dev.flash_mut().power_cut_happened() {
                break;
            }
        }
        assert!(b.dev.flash_mut().power_cut_happened(), "step {k}");
        let (_, mut fl, _) = b.dev.into_parts();
        fl.restart();
        // Read before the new boot's own first reading is taken.
        let mut b = fast(fl, 32);
        let mut log = Vec::new();
        b.dev
            .storage_mut()
            .visit_log(|r| log.push(r.to_vec()))
            .expect("log readable");
        // The log must be one contiguous window of (old log, then the readings
        // taken), ending at the last reading taken or the one before (the
        // append the cut struck), and at least `cap` long: nothing but the
        // oldest page may go.
        let mut all = bytes(&log_before);
        all.extend(bytes(&taken));
        let end_ok = |end: usize| {
            end <= all.len() && end >= log.len() && all[end - log.len()..end] == log[..]
        };
        assert!(
            end_ok(all.len()) || end_ok(all.len() - 1),
            "step {k}: log is not a window ending at the cut"
        );
        assert!(
            log.len() >= cap,
            "step {k}: {} readings left, capacity {cap}",
            log.len()
        );
        // Appends go on after the restart.
        let r = b.measure();
        match b.ok(Request::ReadLog {
            from: r.seq,
            max: 1,
        }) {
            Response::Log { readings, .. } => assert_eq!(bytes(&readings), bytes(&[r]), "step {k}"),
            other => panic!("{other:?}"),
        }
    }
}
