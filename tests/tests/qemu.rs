//! The firmware under QEMU (mps2-an386, Cortex-M4F), over its UART on a
//! pseudo-terminal: handshake, streaming without gaps, an authenticated
//! product calibration written and read back, a write refused for a wrong
//! key (and logged), a reboot request and a QEMU system reset after which the
//! boot counter has risen and the readings continue without duplicates, and
//! the size, stack and cost figures.
//!
//! Needs `qemu-system-arm` and the board ELF (`cargo xtask firmware`), so it
//! is ignored in a plain `cargo test`; `cargo xtask test` builds the board
//! and runs it with `--ignored` (or says loudly why it could not).
//!
//! This drives the device through `fringe_tests::qemu::Link`, a small client
//! of the protocol crate. The host tool's own connection code is not on main
//! yet; when it lands, this test should use it instead.

use std::collections::BTreeSet;
use std::path::{Path, PathBuf};
use std::time::Duration;

use fringe_calibration::product::{ProductModel, SingleFrequencyModel};
use fringe_protocol::*;
use fringe_tests::qemu::*;

const T: Duration = Duration::from_secs(20);

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .expect("tests/ has a parent")
        .to_path_buf()
}

fn ok(link: &mut Link, request: Request) -> Response {
    match link.request(request.clone(), None, T) {
        Ok(Ok(r)) => r,
        other => panic!("{request:?} answered {other:?}"),
    }
}

fn status(link: &mut Link) -> Status {
    match ok(link, Request::Status) {
        Response::Status(s) => s,
        other => panic!("Status answered {other:?}"),
    }
}

fn events(link: &mut Link) -> Vec<Event> {
    let mut out = Vec::new();
    let mut from = 0;
    loop {
        match ok(
            link,
            Request::ReadEvents {
                from,
                max: EVENT_CHUNK as u8,
            },
        ) {
            Response::Events { events, next, end } => {
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

/// Streams until `n` more readings have arrived, then stops streaming.
fn stream(link: &mut Link, n: usize) {
    let before = link.readings.len();
    assert_eq!(
        ok(link, Request::StartStream { period_ms: 100 }),
        Response::Ack
    );
    let deadline = std::time::Instant::now() + Duration::from_secs(300);
    while link.readings.len() < before + n {
        assert!(
            std::time::Instant::now() < deadline,
            "only {} readings",
            link.readings.len() - before
        );
        link.receive(Duration::from_millis(200))
            .expect("port readable");
    }
    assert_eq!(ok(link, Request::StopStream), Response::Ack);
    // Readings already on the way still arrive; take them too.
    let _ = link.receive(Duration::from_millis(500));
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
    let (mut link, id) = Link::connect(&qemu.pty, T).expect("handshake");
    assert_eq!(id.serial.as_str(), BOARD_SERIAL);
    assert_eq!(id.protocol.major, PROTOCOL_VERSION.major);
    assert!(id
        .capabilities
        .contains(Capabilities::SIMULATED | Capabilities::DIAGNOSTICS));
    let boot0 = id.boot;

    // Streaming: 500 readings, gapless and in order.
    stream(&mut link, 500);
    let seqs: Vec<Seq> = link.readings.iter().map(|r| r.seq).collect();
    assert!(
        seqs.iter().all(|s| s.boot == boot0),
        "readings of boot {boot0}"
    );
    for w in seqs.windows(2) {
        assert_eq!(
            w[1].counter,
            w[0].counter + 1,
            "gap or repeat between {} and {}",
            w[0],
            w[1]
        );
    }

    // Diagnostics (issue 5: stack high-water <= 8 KiB is the budget; see below).
    let s = status(&mut link);
    let free = s.stack_free_bytes.expect("stack painting reported");
    let high_water = BOARD_STACK_BYTES - free;
    let cost = s.reading_cost.expect("cost per reading reported");
    eprintln!("stack high-water {high_water} bytes, {cost} instructions per reading");
    // Regression guard at the measured boot peak (10.4 KiB) plus margin: the
    // 8 KiB budget is NOT met yet (the boot path holds the device twice,
    // see BENCHMARKS.md). Tighten to 8 KiB when the core builds in place.
    assert!(
        high_water <= 12 * 1024,
        "stack high-water {high_water} bytes"
    );
    assert!(
        cost > 10_000,
        "a reading cannot cost only {cost} instructions"
    );

    // A product calibration pushed with the device key, and read back.
    let mut counter = s.write_counter;
    let cal = wheat();
    counter += 1;
    let push = Request::WriteProductCal {
        slot: 1,
        cal: cal.clone(),
    };
    let answer = link.request(push.clone(), Some((&BOARD_KEY, BOARD_SERIAL, counter)), T);
    assert_eq!(answer, Ok(Ok(Response::Ack)));
    match ok(&mut link, Request::ReadProductCal { slot: 1 }) {
        Response::ProductCal {
            slot: 1,
            cal: Some(back),
        } => assert_eq!(back, cal),
        other => panic!("ReadProductCal answered {other:?}"),
    }

    // The same push with a wrong key is refused, and the refusal is logged.
    counter += 1;
    let wrong = [0x55u8; 32];
    match link.request(push, Some((&wrong, BOARD_SERIAL, counter)), T) {
        Ok(Err((ErrorCode::AuthFailed, _))) => {}
        other => panic!("wrong key answered {other:?}"),
    }
    let log = events(&mut link);
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

    // A signed reboot request: the board resets, the boot counter rises.
    counter += 1;
    let answer = link.request(
        Request::Reboot,
        Some((&BOARD_KEY, BOARD_SERIAL, counter)),
        T,
    );
    assert_eq!(answer, Ok(Ok(Response::Ack)));
    drop(link);
    let (mut link, id) = Link::connect(&qemu.pty, T).expect("handshake after reboot");
    assert_eq!(id.boot, boot0 + 1, "boot counter after a reboot request");
    let log = events(&mut link);
    assert!(
        log.iter().any(|e| e.boot == boot0 + 1
            && e.kind
                == EventKind::Boot {
                    reset_cause: ResetCause::Requested
                }),
        "no Boot(Requested) event in {log:?}"
    );
    // The calibration survived (emulated flash kept across the reset).
    match ok(&mut link, Request::ReadProductCal { slot: 1 }) {
        Response::ProductCal {
            cal: Some(back), ..
        } => assert_eq!(back, cal),
        other => panic!("calibration lost across reboot: {other:?}"),
    }

    // A reset from outside (QEMU's monitor), as a power glitch would.
    qemu.monitor("system_reset").expect("monitor");
    drop(link);
    let (mut link, id) = Link::connect(&qemu.pty, T).expect("handshake after system_reset");
    assert_eq!(id.boot, boot0 + 2, "boot counter after system_reset");

    // Readings resume under the new boot: no sequence number repeats.
    stream(&mut link, 20);
    let mut all: Vec<Seq> = seqs;
    all.extend(link.readings.iter().map(|r| r.seq));
    let unique: BTreeSet<Seq> = all.iter().copied().collect();
    assert_eq!(
        unique.len(),
        all.len(),
        "a sequence number repeated across resets"
    );
    assert!(link.readings.iter().all(|r| r.seq.boot == boot0 + 2));
}
