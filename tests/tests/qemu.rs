//! The firmware under QEMU (mps2-an386, Cortex-M4F), through the host tool's
//! own connection code (`fringe_host::link`) and store (`fringe_host::store`)
//! over the board's UART on a pseudo-terminal: handshake, 500 streamed
//! readings stored gapless, an authenticated product calibration written and
//! read back, a write refused for a wrong key (and logged on the device), a
//! reboot request and a QEMU system reset after which the boot counter has
//! risen and the host resumes without duplicates; and the size, stack and
//! cost figures.
//!
//! Needs `qemu-system-arm` and the board ELF (`cargo xtask firmware`), so it
//! is ignored in a plain `cargo test`; `cargo xtask test` builds the board
//! and runs it with `--ignored` (or says loudly why it could not).

use std::path::{Path, PathBuf};
use std::sync::atomic::AtomicBool;
use std::time::{Duration, Instant};

use fringe_calibration::product::{ProductModel, SingleFrequencyModel};
use fringe_host::link::{Link, LinkError, LinkOptions};
use fringe_host::store::{Source, Store};
use fringe_protocol::*;
use fringe_tests::qemu::*;

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .expect("tests/ has a parent")
        .to_path_buf()
}

/// Patient options: QEMU notices a new pty client only about once a second.
fn options() -> LinkOptions {
    LinkOptions {
        timeout: Duration::from_millis(700),
        tries: 20,
        ..LinkOptions::default()
    }
}

fn status(link: &mut Link) -> Status {
    match link.request(Request::Status) {
        Ok(Response::Status(s)) => s,
        other => panic!("Status answered {other:?}"),
    }
}

fn device_events(link: &mut Link) -> Vec<Event> {
    let mut out = Vec::new();
    let mut from = 0;
    loop {
        match link.request(Request::ReadEvents {
            from,
            max: EVENT_CHUNK as u8,
        }) {
            Ok(Response::Events { events, next, end }) => {
                out.extend(events);
                if end {
                    return out;
                }
                from = next;
            }
            other => panic!("ReadEvents answered {other:?}"),
        }
    }
}

/// A single-frequency calibration of an invented product ("Harrowgate Mill
/// line 2 wheat"), in the parameter layout of `fringe-calibration`.
fn wheat() -> ProductCal {
    let model = ProductModel::SingleFrequency(SingleFrequencyModel {
        freq_index: 1,
        t_ref_c: 20.0f32,
        coeffs: [2.0, 0.9, 0.0, 0.0],
        c_t: -0.05,
    });
    let (params, n) = model.to_params();
    ProductCal {
        name: short_string("L2 wheat"),
        model: ModelKind::SingleFrequency,
        basis: Basis::Wet,
        params: params[..n].iter().copied().collect(),
        moisture_pct: Range {
            min: 8.0,
            max: 25.0,
        },
        temperature_c: Range {
            min: 0.0,
            max: 50.0,
        },
        inputs: [Range {
            min: 1.0,
            max: 40.0,
        }]
        .into_iter()
        .collect(),
        sec_pct: 0.3,
        made_s: 1_796_000_000,
    }
}

/// Streams until `n` readings have been stored, then stops streaming and
/// stores what was still on the way. Returns how many were stored.
fn stream_into(link: &mut Link, store: &mut Store, n: u64) -> u64 {
    let serial = link.serial_number().to_string();
    assert_eq!(
        link.request(Request::StartStream { period_ms: 100 }),
        Ok(Response::Ack)
    );
    let deadline = Instant::now() + Duration::from_secs(300);
    let mut stored = 0;
    let take = |f: Option<DeviceFrame>, store: &mut Store| {
        if let Some(DeviceFrame::Reading(r)) = f {
            let s = store
                .insert_readings(&serial, &[r], Source::Stream)
                .expect("insert");
            assert_eq!(
                (s.duplicates, s.conflicts),
                (0, 0),
                "reading {} stored twice",
                r.seq
            );
            s.inserted
        } else {
            0
        }
    };
    while stored < n {
        assert!(Instant::now() < deadline, "only {stored} readings");
        let f = link
            .next_frame(Duration::from_millis(200))
            .expect("link up");
        stored += take(f, store);
    }
    assert_eq!(link.request(Request::StopStream), Ok(Response::Ack));
    while let Ok(Some(f)) = link.next_frame(Duration::from_millis(300)) {
        stored += take(Some(f), store);
    }
    stored
}

#[test]
#[ignore = "needs qemu-system-arm and the board ELF: `cargo xtask test` runs it"]
fn firmware_under_qemu_end_to_end() {
    let elf = board_elf(&root());
    assert!(
        elf.exists(),
        "{} missing: run `cargo xtask firmware`",
        elf.display()
    );

    // Budgets from the ELF (issue 5: flash <= 128 KiB, static RAM <= 32 KiB).
    let f = footprint(&elf).expect("section sizes");
    eprintln!("flash {} bytes, static RAM {} bytes", f.flash, f.ram);
    assert!(
        f.flash <= 128 * 1024,
        "flash {} bytes over 128 KiB",
        f.flash
    );
    assert!(f.ram <= 32 * 1024, "static RAM {} bytes over 32 KiB", f.ram);

    let qemu = Qemu::boot(&elf).expect("QEMU boots");
    let pty = qemu.pty.to_str().expect("UTF-8 pty path").to_string();
    let mut link = Link::serial(&pty, 115_200, options()).expect("handshake");
    let id = link.identity().expect("identity").clone();
    assert_eq!(id.serial.as_str(), BOARD_SERIAL);
    assert_eq!(id.protocol.major, PROTOCOL_VERSION.major);
    assert!(id
        .capabilities
        .contains(Capabilities::SIMULATED | Capabilities::DIAGNOSTICS));
    let boot0 = id.boot;
    let mut store = Store::open_in_memory().expect("store");

    // 500 streamed readings, stored without a gap.
    let n0 = stream_into(&mut link, &mut store, 500);
    assert!(n0 >= 500);
    assert_eq!(store.reading_count(BOARD_SERIAL).unwrap(), n0);
    assert_eq!(
        store.gaps(BOARD_SERIAL).unwrap(),
        vec![],
        "gaps in the stored readings"
    );

    // Cost of a reading, from the device's own count.
    let cost = status(&mut link)
        .reading_cost
        .expect("cost per reading reported");
    assert!(
        cost > 10_000,
        "a reading cannot cost only {cost} instructions"
    );

    // A product calibration pushed with the device key, and read back.
    let cal = wheat();
    let push = Request::WriteProductCal {
        slot: 1,
        cal: cal.clone(),
    };
    assert_eq!(
        link.request_signed(push.clone(), &BOARD_KEY),
        Ok(Response::Ack)
    );
    match link.request(Request::ReadProductCal { slot: 1 }) {
        Ok(Response::ProductCal {
            slot: 1,
            cal: Some(back),
        }) => assert_eq!(back, cal),
        other => panic!("ReadProductCal answered {other:?}"),
    }

    // The same push with a wrong key is refused, and the device logs it.
    match link.request_signed(push, &[0x55u8; 32]) {
        Err(LinkError::Refused { code, .. }) => assert_eq!(code, ErrorCode::AuthFailed.code()),
        other => panic!("wrong key answered {other:?}"),
    }
    let log = device_events(&mut link);
    assert!(
        log.iter().any(|e| matches!(
            e.kind,
            EventKind::AuthFailed {
                reason: AuthFailure::BadTag,
                ..
            }
        )),
        "no AuthFailed event in {log:?}"
    );

    // Stack high-water (issue 5 budget: at most 8 KiB), after boot, 500
    // readings, a signed push, a read-back and a refused push: the deepest
    // paths the test reaches.
    let free = status(&mut link)
        .stack_free_bytes
        .expect("stack painting reported");
    let high_water = BOARD_STACK_BYTES - free;
    eprintln!("stack high-water {high_water} bytes, {cost} instructions per reading");
    assert!(
        high_water <= 8 * 1024,
        "stack high-water {high_water} bytes over 8 KiB"
    );

    // A signed reboot request: the board resets, the host reconnects, the
    // boot counter has risen and the calibration is still there.
    assert_eq!(
        link.request_signed(Request::Reboot, &BOARD_KEY),
        Ok(Response::Ack)
    );
    let stop = AtomicBool::new(false);
    let id = link.reconnect(&stop).expect("reconnect after reboot");
    assert_eq!(id.boot, boot0 + 1, "boot counter after a reboot request");
    let log = device_events(&mut link);
    assert!(
        log.iter().any(|e| e.boot == boot0 + 1
            && e.kind
                == EventKind::Boot {
                    reset_cause: ResetCause::Requested
                }),
        "no Boot(Requested) event in {log:?}"
    );
    match link.request(Request::ReadProductCal { slot: 1 }) {
        Ok(Response::ProductCal {
            cal: Some(back), ..
        }) => assert_eq!(back, cal),
        other => panic!("calibration lost across the reboot: {other:?}"),
    }
    let n1 = stream_into(&mut link, &mut store, 20);

    // A reset from outside (QEMU's monitor), as a power glitch would.
    qemu.monitor("system_reset").expect("monitor");
    let id = link.reconnect(&stop).expect("reconnect after system_reset");
    assert_eq!(id.boot, boot0 + 2, "boot counter after system_reset");
    let n2 = stream_into(&mut link, &mut store, 20);

    // Every reading stored once, each boot without gaps.
    assert_eq!(store.reading_count(BOARD_SERIAL).unwrap(), n0 + n1 + n2);
    assert_eq!(
        store.gaps(BOARD_SERIAL).unwrap(),
        vec![],
        "gaps in the stored readings"
    );
    let boots: std::collections::BTreeSet<u32> = store
        .readings(BOARD_SERIAL)
        .unwrap()
        .iter()
        .map(|r| r.reading.seq.boot)
        .collect();
    assert_eq!(
        boots.into_iter().collect::<Vec<_>>(),
        vec![boot0, boot0 + 1, boot0 + 2]
    );
    let chain = store.verify_chain().expect("hash chain readable");
    assert!(
        chain.problems.is_empty(),
        "hash chain problems: {:?}",
        chain.problems
    );
}

/// The footprint refuses an image that is not a board firmware (here the
/// test's own host executable, which has no `.vector_table`), so a broken
/// build can never pass the flash budget with a size of 0.
#[test]
fn footprint_refuses_an_image_without_a_vector_table() {
    let me = std::env::current_exe().expect("test executable");
    let err = footprint(&me).expect_err("a host executable is not a board image");
    assert!(err.contains(".vector_table"), "{err}");
}
