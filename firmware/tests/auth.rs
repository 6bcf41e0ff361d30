//! Authenticated writes: every way a write can be wrong is refused, logged,
//! and leaves the stored calibration as it was.

mod common;

use common::*;
use fringe_firmware::device::{write_hold_ms, FREE_WRITE_FAILURES, MAX_WRITE_HOLD_MS};
use fringe_firmware::protocol::auth::sign;
use fringe_firmware::protocol::frame::encode_with_version;
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

    // The fourth failure in a row starts a hold; wait it out so the next
    // ones are checked (the hold itself is tested below).
    b.tick(MAX_WRITE_HOLD_MS);
    // One bit flipped in the payload (after signing).
    let a = sign(&KEY, SERIAL, 503, &evil).unwrap();
    let mut flipped = cell(9.9);
    flipped.points[1].cell_pf = f32::from_bits(flipped.points[1].cell_pf.to_bits() ^ 1);
    let f = b.ask_with(Request::WriteCellCal(flipped), Some(a));
    assert_eq!(Bench::error_code(&f), Some(ErrorCode::AuthFailed));

    b.tick(MAX_WRITE_HOLD_MS);
    // Missing tag.
    let f = b.ask_with(evil.clone(), None);
    assert_eq!(Bench::error_code(&f), Some(ErrorCode::AuthFailed));

    b.tick(MAX_WRITE_HOLD_MS);
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
    b.tick(MAX_WRITE_HOLD_MS);
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

/// Announces this protocol version (a host below 1.3 is sent a hold's
/// event as `BadTag`, tested below).
fn identify(b: &mut Bench) {
    assert!(matches!(
        b.ok(Request::Identify {
            host: PROTOCOL_VERSION
        }),
        Response::Identity(_)
    ));
}

fn refusal(f: &DeviceFrame) -> (ErrorCode, String) {
    match f {
        DeviceFrame::Error { code, reason, .. } => (*code, reason.as_str().to_string()),
        other => panic!("expected a refusal, got {other:?}"),
    }
}

/// A correctly signed write of `request` with the bench's next counter.
fn signed(b: &mut Bench, request: &Request) -> Auth {
    b.counter += 1;
    sign(&KEY, SERIAL, b.counter, request).unwrap()
}

/// The hold after failed writes (firmware/src/device.rs, `write_hold_ms`;
/// a design value, so this is a consistency test of the device against
/// its documented schedule): three failures in a row are free, the fourth
/// holds writes off for 1 s, then 2, 4, ... up to 64 s. During a hold even
/// a correctly signed write is refused unchecked, logged once per hold;
/// reads go on; after the hold the next write is checked again, and an
/// accepted write ends the count.
#[test]
fn repeated_failures_hold_writes_off_and_the_hold_doubles() {
    let mut b = Bench::new(13, Scenario::default());
    identify(&mut b);
    assert_eq!(b.ok(Request::WriteCellCal(cell(2.1))), Response::Ack);
    let evil = Request::WriteCellCal(cell(9.9));
    let wrong = |c: u32| sign(&[0x43; 32], SERIAL, c, &evil).unwrap();

    // The schedule as documented (README and WIRE.md), seconds.
    let expected_s = [0, 0, 0, 1, 2, 4, 8, 16, 32, 64, 64, 64];
    for (i, s) in expected_s.iter().enumerate() {
        assert_eq!(write_hold_ms(i as u32 + 1), s * 1000, "failure {}", i + 1);
    }
    assert_eq!(FREE_WRITE_FAILURES, 3);

    for (i, hold_s) in expected_s.iter().enumerate() {
        let n = i as u32 + 1;
        let f = b.ask_with(evil.clone(), Some(wrong(1000 + n)));
        let (code, why) = refusal(&f);
        assert_eq!(code, ErrorCode::AuthFailed, "failure {n}");
        assert!(why.contains("does not verify"), "failure {n}: {why}");
        if *hold_s == 0 {
            continue;
        }
        // Just inside the hold: a good write is refused unchecked, twice.
        b.tick(hold_s * 1000 - 50);
        for _ in 0..2 {
            let good = Request::WriteCellCal(cell(3.0));
            let a = signed(&mut b, &good);
            let (code, why) = refusal(&b.ask_with(good, Some(a)));
            assert_eq!(code, ErrorCode::AuthFailed);
            assert_eq!(why, "writes held off for 1 s more", "failure {n}");
        }
        // Reads are not held off.
        assert!(matches!(b.ok(Request::Status), Response::Status(_)));
        b.tick(100);
    }
    assert_eq!(stored_cell(&mut b), Some(cell(2.1)));

    // Logged: every checked failure, and one Throttled per hold (9 holds).
    let fails = auth_failures(&mut b);
    let bad = fails
        .iter()
        .filter(|(r, _)| *r == AuthFailure::BadTag)
        .count();
    let held = fails
        .iter()
        .filter(|(r, _)| *r == AuthFailure::Throttled)
        .count();
    assert_eq!((bad, held), (expected_s.len(), 9), "{fails:?}");

    // After the hold a good write is accepted, and the count starts over:
    // three more failures are free again.
    b.tick(MAX_WRITE_HOLD_MS);
    assert_eq!(b.ok(Request::WriteCellCal(cell(2.2))), Response::Ack);
    for n in 0..FREE_WRITE_FAILURES {
        let f = b.ask_with(evil.clone(), Some(wrong(2000 + n)));
        assert!(refusal(&f).1.contains("does not verify"));
    }
    assert_eq!(b.ok(Request::WriteCellCal(cell(2.3))), Response::Ack);
    assert_eq!(stored_cell(&mut b), Some(cell(2.3)));
}

/// The hold's refusal text counts down in whole seconds.
#[test]
fn the_hold_refusal_says_how_long_is_left() {
    let mut b = Bench::new(14, Scenario::default());
    let evil = Request::SelectProduct { slot: 0 };
    for n in 0..10u32 {
        let a = sign(&[0x43; 32], SERIAL, 10 + n, &evil).unwrap();
        b.ask_with(evil.clone(), Some(a));
        b.tick(write_hold_ms(n + 1));
    }
    // Ten failures: the tenth's hold is 64 s; the tick above waited it
    // out. One more failure starts another 64 s hold.
    let a = sign(&[0x43; 32], SERIAL, 99, &evil).unwrap();
    b.ask_with(evil.clone(), Some(a));
    let a = signed(&mut b, &evil);
    let (_, why) = refusal(&b.ask_with(evil.clone(), Some(a)));
    assert_eq!(why, "writes held off for 64 s more");
    b.tick(30_000);
    let a = signed(&mut b, &evil);
    let (_, why) = refusal(&b.ask_with(evil, Some(a)));
    assert_eq!(why, "writes held off for 34 s more");
}

/// A frame whose payload bytes are given whole (to cut a tag short).
struct Raw<'a>(&'a [u8]);

impl serde::Serialize for Raw<'_> {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        use serde::ser::SerializeTuple;
        let mut t = s.serialize_tuple(self.0.len())?;
        for b in self.0 {
            t.serialize_element(b)?;
        }
        t.end()
    }
}

/// Every forged write of issue 17's list, each on its own: refused, the
/// reason logged as a device event (where the device can tell the frame
/// was a write), the stored calibration and the write counter unchanged.
/// The hold after failures is waited out between attempts so that each is
/// checked.
#[test]
fn every_forged_write_is_refused_and_logged_with_its_reason() {
    let mut b = Bench::new(15, Scenario::default());
    let good = Request::WriteCellCal(cell(2.1));
    let captured = HostFrame {
        id: 77,
        auth: Some(signed(&mut b, &good)),
        request: good.clone(),
    };
    b.send_frame(&captured);
    b.tick(50);
    assert!(
        b.seen.drain(..).any(|f| matches!(
            f,
            DeviceFrame::Response {
                id: 77,
                response: Response::Ack
            }
        )),
        "the captured write was accepted"
    );
    assert_eq!(stored_cell(&mut b), Some(cell(2.1)));
    let counter = match b.ok(Request::Status) {
        Response::Status(s) => s.write_counter,
        other => panic!("{other:?}"),
    };
    let before = auth_failures(&mut b).len();
    let evil = Request::WriteCellCal(cell(9.9));
    let mut tried = 0usize;
    let mut expect = Vec::new();
    let mut check = |b: &mut Bench, what: &str, f: DeviceFrame, reason: AuthFailure, c: u32| {
        let (code, why) = refusal(&f);
        assert_eq!(code, ErrorCode::AuthFailed, "{what}: {why}");
        assert!(!why.contains("held off"), "{what}: {why}");
        expect.push((reason, c));
        b.tick(MAX_WRITE_HOLD_MS);
        tried += 1;
    };

    // The captured write, replayed byte for byte.
    let f = b.ask_with(good.clone(), captured.auth);
    check(&mut b, "replay", f, AuthFailure::Replay, counter);
    // A counter rolled back below the stored one, correctly signed.
    let a = sign(&KEY, SERIAL, counter - 1, &evil).unwrap();
    let f = b.ask_with(evil.clone(), Some(a));
    check(&mut b, "rolled back", f, AuthFailure::Replay, counter - 1);
    // The same counter as stored, correctly signed.
    let a = sign(&KEY, SERIAL, counter, &evil).unwrap();
    let f = b.ask_with(evil.clone(), Some(a));
    check(&mut b, "same counter", f, AuthFailure::Replay, counter);
    // A wrong key.
    let a = sign(&[0x41; 32], SERIAL, counter + 1, &evil).unwrap();
    let f = b.ask_with(evil.clone(), Some(a));
    check(&mut b, "wrong key", f, AuthFailure::BadTag, counter + 1);
    // Signed for another device's serial with this device's key (and with
    // the key the other device would have, here a different one).
    for (key, other) in [(KEY, "HGM-L2-0008"), ([0x44; 32], "HGM-L2-0008")] {
        let a = sign(&key, other, counter + 2, &evil).unwrap();
        let f = b.ask_with(evil.clone(), Some(a));
        check(&mut b, "other serial", f, AuthFailure::BadTag, counter + 2);
    }
    // Each of the tag's 32 bytes altered (three different changes each).
    for i in 0..32 {
        for x in [0x01u8, 0x80, 0xff] {
            let mut a = sign(&KEY, SERIAL, counter + 3, &evil).unwrap();
            a.tag[i] ^= x;
            let f = b.ask_with(evil.clone(), Some(a));
            check(
                &mut b,
                &format!("tag byte {i} ^ {x:#04x}"),
                f,
                AuthFailure::BadTag,
                counter + 3,
            );
        }
    }
    // The counter altered after signing.
    let mut a = sign(&KEY, SERIAL, counter + 4, &evil).unwrap();
    a.counter += 1;
    let f = b.ask_with(evil.clone(), Some(a));
    check(
        &mut b,
        "counter altered",
        f,
        AuthFailure::BadTag,
        counter + 5,
    );
    // An all-zero tag.
    let mut a = sign(&KEY, SERIAL, counter + 6, &evil).unwrap();
    a.tag = [0; 32];
    let f = b.ask_with(evil.clone(), Some(a));
    check(&mut b, "zero tag", f, AuthFailure::BadTag, counter + 6);
    // No tag.
    let f = b.ask_with(evil.clone(), None);
    check(&mut b, "no tag", f, AuthFailure::Missing, 0);
    assert_eq!(
        auth_failures(&mut b).get(before..),
        Some(expect.as_slice()),
        "one AuthFailed event per forged write, with its reason and counter"
    );

    // A tag cut short by 1-32 bytes (the frame's CRC made good again): the
    // bytes that follow shift into the tag, so the frame no longer decodes
    // as that write. Refused either as undecodable (no event: the device
    // cannot tell it was a write) or, if the shifted bytes happen to
    // decode, by the tag check (an event).
    let full = postcard::to_allocvec(&HostFrame {
        id: 90,
        auth: Some(sign(&KEY, SERIAL, counter + 7, &evil).unwrap()),
        request: evil.clone(),
    })
    .unwrap();
    let tag = sign(&KEY, SERIAL, counter + 7, &evil).unwrap().tag;
    let at = full
        .windows(32)
        .position(|w| w == tag)
        .expect("the tag is in the payload");
    let mut undecodable = 0;
    for cut in 1..=32 {
        let mut payload = full.clone();
        payload.drain(at + 32 - cut..at + 32);
        let mut out = [0u8; MAX_FRAME_LEN];
        let n = encode_with_version(&Raw(&payload), PROTOCOL_VERSION, &mut out).unwrap();
        let events = auth_failures(&mut b).len();
        b.poll_bytes(&out[..n]);
        b.tick(20);
        let (code, why) = b
            .seen
            .drain(..)
            .find_map(|f| match f {
                DeviceFrame::Error { code, reason, .. } => Some((code, reason)),
                _ => None,
            })
            .unwrap_or_else(|| panic!("tag cut by {cut}: no refusal"));
        match code {
            ErrorCode::UnknownRequest => {
                undecodable += 1;
                assert_eq!(auth_failures(&mut b).len(), events, "cut {cut}");
            }
            ErrorCode::AuthFailed => assert_eq!(auth_failures(&mut b).len(), events + 1),
            other => panic!("tag cut by {cut}: {other:?} {why}"),
        }
        b.tick(MAX_WRITE_HOLD_MS);
        tried += 1;
    }
    println!("forged writes tried: {tried}; tag cut short: {undecodable} of 32 undecodable");

    assert_eq!(stored_cell(&mut b), Some(cell(2.1)));
    match b.ok(Request::Status) {
        Response::Status(s) => assert_eq!(s.write_counter, counter),
        other => panic!("{other:?}"),
    }
}

/// A host below protocol 1.3 cannot decode `Throttled`: it is sent the
/// hold's event as `BadTag` (the refusal's text says what happened); a 1.3
/// host reads the same stored event as `Throttled`.
#[test]
fn a_host_below_1_3_reads_a_hold_as_a_bad_tag() {
    let mut b = Bench::new(16, Scenario::default());
    let evil = Request::SelectProduct { slot: 0 };
    for n in 0..=FREE_WRITE_FAILURES {
        let a = sign(&[0x43; 32], SERIAL, 10 + n, &evil).unwrap();
        b.ask_with(evil.clone(), Some(a));
    }
    let a = signed(&mut b, &evil);
    let (_, why) = refusal(&b.ask_with(evil, Some(a)));
    assert!(why.starts_with("writes held off"), "{why}");
    let reasons = |b: &mut Bench| -> Vec<AuthFailure> {
        auth_failures(b).into_iter().map(|(r, _)| r).collect()
    };
    let v1_2 = Version { major: 1, minor: 2 };
    assert!(matches!(
        b.ok(Request::Identify { host: v1_2 }),
        Response::Identity(_)
    ));
    assert_eq!(reasons(&mut b), vec![AuthFailure::BadTag; 5]);
    identify(&mut b);
    let mut want = vec![AuthFailure::BadTag; 4];
    want.push(AuthFailure::Throttled);
    assert_eq!(reasons(&mut b), want);
}

/// A settings map damaged beyond repair is erased at boot, and the write
/// and boot counters it held with it. The device then moves its write
/// counter far past any it can have accepted (`REPAIR_COUNTER_JUMP`) and
/// its boot number past the newest logged reading's: a write captured
/// before the damage is still refused as a replay, and no reading's
/// sequence repeats. Before, both restarted from 0, so every captured
/// write was accepted again. (The damage: every page of the map marked
/// closed, which sequential-storage reports as corrupted; a consistency
/// test of the device's own rule.)
#[test]
fn a_write_captured_before_a_damaged_settings_map_stays_a_replay() {
    use fringe_firmware::device::{repair_counter, REPAIR_COUNTER_JUMP};
    // Every page of the map marked closed, then a boot on that flash.
    fn damage_and_boot(b: Bench, seed: u64) -> Bench {
        let mut b = Bench::on_flash(seed, Scenario::default(), damaged_settings_map(b));
        b.settle();
        b
    }
    let acked = |f: &DeviceFrame| {
        matches!(
            f,
            DeviceFrame::Response {
                response: Response::Ack,
                ..
            }
        )
    };
    let mut b = Bench::new(31, Scenario::default());
    b.settle();
    let good = Request::WriteCellCal(cell(2.1));
    let captured = signed(&mut b, &good);
    let f = b.ask_with(good.clone(), Some(captured));
    assert!(acked(&f), "{f:?}");
    let last = b.measure().seq;
    let mut b = damage_and_boot(b, 32);
    assert!(
        b.events()
            .iter()
            .any(|e| matches!(e.kind, EventKind::StorageRepaired)),
        "the repair is logged"
    );
    let status = match b.ok(Request::Status) {
        Response::Status(s) => s,
        other => panic!("{other:?}"),
    };
    let now = b.measure().seq;
    assert!(
        now.boot > last.boot,
        "boot {} after {}",
        now.boot,
        last.boot
    );
    assert_eq!(status.write_counter, repair_counter(now.boot));
    assert!(status.write_counter > REPAIR_COUNTER_JUMP);
    // The captured write, replayed: refused as a replay, nothing stored.
    let f = b.ask_with(good, Some(captured));
    let (code, why) = refusal(&f);
    assert_eq!(code, ErrorCode::AuthFailed, "{why}");
    assert!(
        auth_failures(&mut b)
            .iter()
            .any(|(r, c)| *r == AuthFailure::Replay && *c == 101),
        "logged as a replay"
    );
    assert_eq!(stored_cell(&mut b), None, "the erased map stays without it");
    // A host that asks for the counter signs the next one and is taken.
    b.counter = status.write_counter;
    let next = Request::WriteCellCal(cell(2.2));
    let second = signed(&mut b, &next);
    let f = b.ask_with(next.clone(), Some(second));
    assert!(acked(&f), "{f:?}");
    // A second repair: the write taken after the first stays a replay.
    let mut b = damage_and_boot(b, 35);
    let f = b.ask_with(next, Some(second));
    assert_eq!(refusal(&f).0, ErrorCode::AuthFailed);
    assert_eq!(stored_cell(&mut b), None);
}

/// The same where the map is found erased, not damaged (a power cut
/// between the repair's erase and the counter's store): a device whose
/// logs show it has lived takes the jump too. A new device starts at 0.
#[test]
fn an_erased_settings_map_on_a_device_that_has_lived_moves_the_counter_on() {
    use embedded_storage::nor_flash::NorFlash;
    use fringe_firmware::device::repair_counter;
    let mut b = Bench::new(33, Scenario::default());
    b.settle();
    let counter = |b: &mut Bench| match b.ok(Request::Status) {
        Response::Status(s) => s.write_counter,
        other => panic!("{other:?}"),
    };
    assert_eq!(counter(&mut b), 0, "a new device");
    assert_eq!(b.ok(Request::WriteCellCal(cell(2.1))), Response::Ack);
    let map = b.dev.storage_mut().layout().map.clone();
    let (_, mut flash, _) = b.dev.into_parts();
    flash.erase(map.start, map.end).expect("erase the map");
    let mut b = Bench::on_flash(34, Scenario::default(), flash);
    b.settle();
    let boot = b.measure().seq.boot;
    assert_eq!(counter(&mut b), repair_counter(boot));
}

/// A power cut at any step of the repair of a damaged settings map (the
/// repair's event, the erase, the stores after it), and in the erase after
/// each of the map's pages (a chip erases page by page; the test flash
/// erases a range in one step, and a cut there erases its first half), and
/// inside each page (its first half erased): at
/// the next boot the write counter is past the repair jump and so past the
/// newest accepted write's, which is refused as a replay. The map's ring
/// has come round, its newest page in the half a cut erase takes: a map
/// erased in part then reads with an older counter from the pages the
/// erase did not reach (before the repair's event was logged first, the
/// newest write was taken again: counter 352 where it was 353). A
/// consistency test of the device's own rule, like the one above.
#[test]
fn a_power_cut_in_the_repair_of_a_damaged_map_leaves_no_replay() {
    big_stack(power_cut_in_repair_body);
}

fn power_cut_in_repair_body() {
    use embedded_storage::nor_flash::NorFlash;
    use fringe_firmware::device::REPAIR_COUNTER_JUMP;
    let mut b = Bench::new(41, Scenario::default());
    b.settle();
    // Accepted writes until the map's ring has come round, with its newest
    // page in the first half of the map (where a cut erase of the whole
    // map takes it and leaves older ones), so that older copies of the
    // counter lie on pages a partial erase can leave.
    let map = b.dev.storage_mut().layout().map.clone();
    let page = Flash::ERASE_SIZE as u32;
    let used = |b: &mut Bench| {
        let bytes = *b.dev.flash_mut().bytes();
        (map.start..map.end)
            .step_by(page as usize)
            .filter(|p| {
                bytes[*p as usize..(*p + page) as usize]
                    .iter()
                    .any(|x| *x != 0xFF)
            })
            .count()
    };
    let pages = (map.end - map.start) / page;
    let mut newest = None;
    let (mut current, mut wrapped) = (0, false);
    for k in 0..2000 {
        if wrapped && current < pages / 2 && used(&mut b) >= 3 {
            break;
        }
        let req = Request::WriteCellCal(cell(2.0 + 0.01 * k as f32));
        let tag = signed(&mut b, &req);
        let f = b.ask_with(req.clone(), Some(tag));
        assert!(
            matches!(
                f,
                DeviceFrame::Response {
                    response: Response::Ack,
                    ..
                }
            ),
            "write {k}: {f:?}"
        );
        newest = Some((req, tag, b.counter));
        // The page being written: the one whose start marker is written
        // and end marker not (sequential-storage's partly open page).
        let bytes = *b.dev.flash_mut().bytes();
        let word = Flash::WRITE_SIZE;
        let open = (0..pages).find(|i| {
            let s = (map.start + i * page) as usize;
            let e = s + page as usize;
            bytes[s..s + word].iter().any(|x| *x != 0xFF)
                && bytes[e - word..e].iter().all(|x| *x == 0xFF)
        });
        if let Some(c) = open {
            wrapped |= c < current;
            current = c;
        }
    }
    assert!(
        wrapped && current < pages / 2 && used(&mut b) >= 3,
        "the map's ring did not come round"
    );
    let (req, tag, last) = newest.expect("writes taken");
    println!("writes taken: {}; the newest's counter {last}", last - 100);
    // After a boot on `fl`: the counter is past the newest write's, and
    // that write is refused as a replay.
    let check = |fl: Flash, what: &str| {
        let mut b = Bench::on_flash(42, Scenario::default(), fl);
        b.settle();
        let status = match b.ok(Request::Status) {
            Response::Status(s) => s,
            other => panic!("{what}: {other:?}"),
        };
        assert!(
            status.write_counter >= last,
            "{what}: counter {} below {last}",
            status.write_counter
        );
        assert!(status.write_counter >= REPAIR_COUNTER_JUMP, "{what}");
        let f = b.ask_with(req.clone(), Some(tag));
        assert_eq!(refusal(&f).0, ErrorCode::AuthFailed, "{what}");
        assert!(
            auth_failures(&mut b).contains(&(AuthFailure::Replay, last)),
            "{what}: not refused as a replay"
        );
    };
    let flash = damaged_settings_map(b);
    let mut cuts = 0;
    // The repairing boot's flash as the cut in the map's erase left it.
    let mut in_erase = None;
    for k in 0.. {
        let mut fl = flash.clone();
        fl.cut_power_after(k);
        let booted =
            fringe_firmware::device::Booted::mount(&mut fl, config(), ResetCause::PowerOn).is_ok();
        if !fl.power_cut_happened() {
            assert!(booted, "step {k}: boot failed without a cut");
            break;
        }
        cuts += 1;
        fl.restart();
        let first = map.start as usize..(map.start + page) as usize;
        if in_erase.is_none() && fl.bytes()[first.clone()] != flash.bytes()[first] {
            in_erase = Some(fl.clone());
        }
        check(fl, &format!("a cut at step {k} of the repairing boot"));
    }
    println!("power cuts tried in the repair: {cuts}");
    assert!(cuts > 0);
    // A chip erases page by page: the cut in the erase after each page,
    // everything before it (the repair's marker) done.
    let in_erase = in_erase.expect("a cut in the map's erase");
    for j in 1..pages {
        let mut fl = in_erase.clone();
        let rest = map.start + j * page..map.end;
        fl.erase(rest.start, rest.end).expect("erase");
        fl.write(
            rest.start,
            &flash.bytes()[rest.start as usize..rest.end as usize],
        )
        .expect("the pages the erase did not reach");
        fl.erase(map.start, rest.start).expect("erase");
        check(fl, &format!("the repair's erase cut after {j} page(s)"));
    }
    // And a cut inside page j: the pages before it erased, its first half
    // erased (as the test flash leaves a page struck by a cut), the rest
    // as it was.
    for j in 0..pages {
        let mut fl = in_erase.clone();
        let half = map.start + j * page + page / 2;
        fl.erase(map.start, map.end).expect("erase");
        fl.write(half, &flash.bytes()[half as usize..map.end as usize])
            .expect("the pages the erase did not reach");
        check(fl, &format!("the repair's erase cut inside page {j}"));
    }
}

/// A settled device (seed `seed`) that took a signed write of the cell
/// calibration of stray capacitance `stray`, and that calibration.
fn with_signed_cell(seed: u64, stray: f32) -> (Bench, CellCal) {
    let mut b = Bench::new(seed, Scenario::default());
    b.settle();
    let cal = cell(stray);
    let req = Request::WriteCellCal(cal);
    let tag = signed(&mut b, &req);
    let f = b.ask_with(req, Some(tag));
    assert!(
        matches!(
            f,
            DeviceFrame::Response {
                response: Response::Ack,
                ..
            }
        ),
        "{f:?}"
    );
    (b, cal)
}

/// A power cut at any step of a boot that repairs the event ring alone
/// (its repair event logged after the map holds the boot's number) does not
/// cost the settings map: at the next boot the calibration written before
/// is still there, so the repair event, newest in the ring, is not taken
/// for a map repair's unfinished marker. A consistency test of the
/// device's own rule.
#[test]
fn a_power_cut_in_an_event_ring_repair_keeps_the_map() {
    big_stack(|| {
        let (b, cal) = with_signed_cell(45, 2.3);
        let flash = damaged_event_ring(b);
        let mut cuts = 0;
        for k in 0.. {
            let mut fl = flash.clone();
            fl.cut_power_after(k);
            let booted =
                fringe_firmware::device::Booted::mount(&mut fl, config(), ResetCause::PowerOn)
                    .is_ok();
            if !fl.power_cut_happened() {
                assert!(booted, "step {k}: boot failed without a cut");
                break;
            }
            cuts += 1;
            fl.restart();
            let mut b = Bench::on_flash(46, Scenario::default(), fl);
            b.settle();
            assert_eq!(stored_cell(&mut b), Some(cal), "a cut at step {k}");
        }
        println!("power cuts tried in the event ring's repair: {cuts}");
        assert!(cuts > 0);
    });
}

/// The newest `count` events of `fl` (read from a copy).
fn newest_events(fl: &Flash, count: u32) -> Vec<Event> {
    let mut copy = fl.clone();
    let (mut s, _) = fringe_firmware::storage::Storage::mount(&mut copy).expect("mount a copy");
    let Some(last) = s.last_event() else {
        return Vec::new();
    };
    (last.saturating_sub(count - 1)..=last)
        .filter_map(|n| s.read_events(n, 1).ok()?.0.first().cloned())
        .filter(|e| e.number >= last.saturating_sub(count - 1))
        .collect()
}

/// A boot that stored its number in the settings map and lost power
/// before its boot event leaves the map a boot number one past the newest
/// logged. When the map is then found damaged, the repair's marker must be
/// newer than that number: a cut in the repair's erase can leave the page
/// holding it, and the next boot erases the map again only where the
/// marker is newer than the map's number (else an older write counter
/// from the pages left would reopen a replay). A consistency test of the
/// device's own rule.
#[test]
fn a_map_repair_marker_is_newer_than_a_boot_number_whose_event_was_lost() {
    big_stack(|| {
        use fringe_firmware::device::Booted;
        use fringe_firmware::storage::{key, Storage};
        let mut b = Bench::new(47, Scenario::default());
        b.settle();
        let (_, flash, _) = b.dev.into_parts();
        // The next boot, cut after it stored its number and before its
        // boot event.
        let mut cut = None;
        for k in 0.. {
            let mut fl = flash.clone();
            fl.cut_power_after(k);
            let booted = Booted::mount(&mut fl, config(), ResetCause::PowerOn).is_ok();
            if !fl.power_cut_happened() {
                assert!(booted, "step {k}: boot failed without a cut");
                break;
            }
            fl.restart();
            let mut copy = fl.clone();
            let (mut s, _) = Storage::mount(&mut copy).expect("mount a copy");
            let map_boot = s.get::<u32>(key::BOOT).expect("read").unwrap_or(0);
            let newest = newest_events(&fl, 1).first().map_or(0, |e| e.boot);
            let logged = s.log_last().map_or(0, |q| q.boot).max(newest);
            if map_boot > logged {
                cut = Some((fl, map_boot, logged));
                break;
            }
        }
        let (mut fl, map_boot, logged) =
            cut.expect("a cut between the boot number's store and the boot event");
        assert_eq!(map_boot, logged + 1);
        damage_settings_map(&mut fl);
        let boot = Booted::mount(&mut fl, config(), ResetCause::PowerOn)
            .expect("the repairing boot")
            .boot_count();
        let events = newest_events(&fl, 4);
        let marker = events
            .iter()
            .find(|e| matches!(e.kind, EventKind::StorageRepaired))
            .unwrap_or_else(|| panic!("no repair event: {events:?}"));
        assert!(
            marker.boot > map_boot,
            "the marker's boot {} is not past the map's {map_boot}",
            marker.boot
        );
        assert_eq!(boot, marker.boot, "the boot takes the marker's number");
    });
}

/// Where the repair's marker cannot be written (the event ring refuses
/// writes until the map is erased), the boot logs the repair itself, with
/// its own number: a host still learns that the settings were lost. (It
/// took the marker's number and logged nothing.) A consistency test of the
/// device's own rule.
#[test]
fn a_map_repair_whose_marker_was_not_written_is_logged_by_the_boot() {
    big_stack(|| {
        use fringe_firmware::device::Booted;
        use fringe_firmware::storage::Layout;
        use std::cell::Cell;
        let mut b = Bench::new(48, Scenario::default());
        b.settle();
        let mut flash = damaged_settings_map(b);
        let layout = Layout::new(FLASH, fringe_firmware::flash::RAM_ERASE_SIZE).expect("layout");
        let failed = Cell::new(false);
        let boot = Booted::mount(
            Faulty::writes(&mut flash, layout.events, layout.map, &failed),
            config(),
            ResetCause::PowerOn,
        )
        .expect("the repairing boot")
        .boot_count();
        assert!(failed.get(), "the marker's write was not refused");
        let events = newest_events(&flash, 4);
        assert!(
            events
                .iter()
                .any(|e| matches!(e.kind, EventKind::StorageRepaired) && e.boot == boot),
            "no repair event of boot {boot}: {events:?}"
        );
    });
}

/// A read error of the settings map's boot number at mount fails the boot;
/// it must not pass for a map without one. Here the newest event is an
/// event ring repair's (a boot cut after logging it), of the boot the map
/// holds: read as "no boot number", it was taken for an unfinished map
/// repair and the map erased, the calibration with it. Reads of the map
/// fail from each of its reads on in turn; the calibration is there after
/// every one. A consistency test of the device's own rule.
#[test]
fn a_read_error_of_the_maps_boot_number_fails_the_boot_and_keeps_the_map() {
    big_stack(|| {
        use fringe_firmware::device::Booted;
        use fringe_firmware::storage::{Layout, Storage};
        use std::cell::Cell;
        let (b, cal) = with_signed_cell(49, 2.4);
        let flash = damaged_event_ring(b);
        // The event ring's repairing boot, cut after its repair event.
        let mut found = None;
        for k in 0.. {
            let mut fl = flash.clone();
            fl.cut_power_after(k);
            let _ = Booted::mount(&mut fl, config(), ResetCause::PowerOn);
            assert!(fl.power_cut_happened(), "no cut after the repair event");
            fl.restart();
            if newest_events(&fl, 1)
                .first()
                .is_some_and(|e| matches!(e.kind, EventKind::StorageRepaired))
            {
                found = Some(fl);
                break;
            }
        }
        let found = found.expect("a cut after the repair event");
        let layout = Layout::new(FLASH, fringe_firmware::flash::RAM_ERASE_SIZE).expect("layout");
        let mut refused = 0;
        for n in 0.. {
            let mut fl = found.clone();
            let failed = Cell::new(false);
            let booted = Booted::mount(
                Faulty::reads(&mut fl, layout.map.clone(), n, &failed),
                config(),
                ResetCause::PowerOn,
            )
            .map(|b| b.boot_count());
            if !failed.get() {
                booted.expect("a boot without a failed read");
                break;
            }
            refused += usize::from(booted.is_err());
            let mut copy = fl.clone();
            let (mut s, _) = Storage::mount(&mut copy).expect("mount a copy");
            assert_eq!(
                s.cell_cal().expect("read"),
                Some(cal),
                "reads of the map failing from the {n}-th on"
            );
        }
        println!("boots failed by a read error: {refused}");
        assert!(refused > 0);
    });
}
