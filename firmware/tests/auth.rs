//! Authenticated writes: every way a write can be wrong is refused, logged,
//! and leaves the stored calibration as it was.

mod common;

use common::*;
use fringe_firmware::protocol::auth::sign;
use fringe_firmware::protocol::*;
use fringe_firmware::Scenario;

fn cell(stray: f32) -> CellCal {
    cell_cal(stray, 1.0)
}

fn auth_failures(b: &mut Bench) -> Vec<(AuthFailure, u32)> {
    b.events()
        .into_iter()
        .filter_map(|e| match e.kind {
            EventKind::AuthFailed { reason, counter } => Some((reason, counter)),
            _ => None,
        })
        .collect()
}

#[test]
fn every_bad_write_is_refused_logged_and_changes_nothing() {
    let mut b = Bench::new(10, Scenario::default());
    let good = Request::WriteCellCal(cell(2.1));
    assert_eq!(b.ok(good.clone()), Response::Ack);
    assert_eq!(stored_cell(&mut b), Some(cell(2.1)));
    let evil = Request::WriteCellCal(cell(9.9));

    // Wrong key.
    let a = sign(&[0x43; 32], SERIAL, 500, &evil).unwrap();
    let f = b.ask_with(evil.clone(), Some(a));
    assert_eq!(Bench::error_code(&f), Some(ErrorCode::AuthFailed));

    // Tag over the good payload, sent with the evil one (a flipped payload).
    let a = sign(&KEY, SERIAL, 501, &Request::WriteCellCal(cell(2.1))).unwrap();
    let f = b.ask_with(evil.clone(), Some(a));
    assert_eq!(Bench::error_code(&f), Some(ErrorCode::AuthFailed));

    // One bit flipped in the tag.
    let mut a = sign(&KEY, SERIAL, 502, &evil).unwrap();
    a.tag[17] ^= 0x04;
    let f = b.ask_with(evil.clone(), Some(a));
    assert_eq!(Bench::error_code(&f), Some(ErrorCode::AuthFailed));

    // One bit flipped in the payload (after signing).
    let a = sign(&KEY, SERIAL, 503, &evil).unwrap();
    let mut flipped = cell(9.9);
    flipped.points[1].cell_pf = f32::from_bits(flipped.points[1].cell_pf.to_bits() ^ 1);
    let f = b.ask_with(Request::WriteCellCal(flipped), Some(a));
    assert_eq!(Bench::error_code(&f), Some(ErrorCode::AuthFailed));

    // Missing tag.
    let f = b.ask_with(evil.clone(), None);
    assert_eq!(Bench::error_code(&f), Some(ErrorCode::AuthFailed));

    // Replay of the counter the good write used (101), correctly signed.
    let a = sign(&KEY, SERIAL, 101, &evil).unwrap();
    let f = b.ask_with(evil.clone(), Some(a));
    assert_eq!(Bench::error_code(&f), Some(ErrorCode::AuthFailed));

    assert_eq!(stored_cell(&mut b), Some(cell(2.1)));
    let fails = auth_failures(&mut b);
    assert_eq!(
        fails,
        vec![
            (AuthFailure::BadTag, 500),
            (AuthFailure::BadTag, 501),
            (AuthFailure::BadTag, 502),
            (AuthFailure::BadTag, 503),
            (AuthFailure::Missing, 0),
            (AuthFailure::Replay, 101),
        ]
    );
    // Survives a reboot: still the good calibration, and the replay stays refused.
    let mut b = b.reboot(11);
    assert_eq!(stored_cell(&mut b), Some(cell(2.1)));
    let a = sign(&KEY, SERIAL, 101, &evil).unwrap();
    let f = b.ask_with(evil, Some(a));
    assert_eq!(Bench::error_code(&f), Some(ErrorCode::AuthFailed));
    match b.ok(Request::Status) {
        Response::Status(s) => assert_eq!(s.write_counter, 101),
        other => panic!("{other:?}"),
    }
}

#[test]
fn a_valid_write_with_a_higher_counter_is_accepted_and_logged() {
    let mut b = Bench::new(12, Scenario::default());
    assert_eq!(b.ok(Request::WriteCellCal(cell(2.1))), Response::Ack);
    assert_eq!(b.ok(Request::WriteCellCal(cell(2.2))), Response::Ack);
    let changes: Vec<_> = b
        .events()
        .into_iter()
        .filter_map(|e| match e.kind {
            EventKind::CellCalChanged { old, new } => Some((old, new)),
            _ => None,
        })
        .collect();
    assert_eq!(
        changes,
        vec![
            (CalId::NONE, cell(2.1).content_id()),
            (cell(2.1).content_id(), cell(2.2).content_id())
        ]
    );
}
