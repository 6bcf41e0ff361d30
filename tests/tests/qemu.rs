//! The firmware under QEMU (mps2-an386, Cortex-M4F), through the host tool's
//! own connection code (`fringe_host::link`) and store (`fringe_host::store`)
//! over the board's UART on a pseudo-terminal: the device measures and logs
//! from boot on, before any host speaks; the host sets its clock, writes
//! its settings with the device key (read back; a wrong key refused and
//! logged, nothing changed), stores 500 streamed readings, writes and reads
//! back a product calibration; after a reboot request and a QEMU system
//! reset the boot counter has risen and the settings and calibration are
//! still there; the whole device log, pulled at the end, fills the store
//! with every reading once; and the size, stack and cost figures.
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

fn read_settings(link: &mut Link) -> Settings {
    match link.request(Request::ReadSettings) {
        Ok(Response::Settings(s)) => s,
        other => panic!("ReadSettings answered {other:?}"),
    }
}

/// Every reading the device log holds, oldest first.
fn device_log(link: &mut Link) -> Vec<Reading> {
    let mut out = Vec::new();
    let mut from = Seq::default();
    loop {
        match link.request(Request::ReadLog {
            from,
            max: LOG_CHUNK as u8,
        }) {
            Ok(Response::Log {
                readings,
                next,
                end,
            }) => {
                out.extend(readings);
                if end {
                    return out;
                }
                from = next;
            }
            other => panic!("ReadLog answered {other:?}"),
        }
    }
}

fn now_unix_ms() -> u64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .expect("clock after 1970")
        .as_millis() as u64
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
    let mut last: Option<Seq> = None;
    let mut take = |f: Option<DeviceFrame>, store: &mut Store| {
        if let Some(DeviceFrame::Reading(r)) = f {
            // The subscription sends every reading of the schedule.
            if let Some(l) = last {
                assert_eq!(
                    (r.seq.boot, r.seq.counter),
                    (l.boot, l.counter + 1),
                    "streamed reading after {l}"
                );
            }
            last = Some(r.seq);
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

    // The device measures from boot on, on its own: with the host asking
    // nothing but its status (no subscription, no Measure, no write), the
    // log fills. (QEMU lets the handshake through some 15 ms after boot,
    // while the first reading is still being acquired, so the test waits
    // for the log here, polling.)
    let deadline = Instant::now() + Duration::from_secs(60);
    let logged = loop {
        let s = status(&mut link);
        assert_eq!(s.stream_period_ms, None, "nobody subscribed");
        if s.log_len >= 5 {
            break s.log_len;
        }
        assert!(
            Instant::now() < deadline,
            "only {} readings logged in 60 s",
            s.log_len
        );
    };
    eprintln!("{logged} readings logged with no host subscribed");

    // The host's first write sets the clock. The readings taken before
    // are timed from boot, and the ClockSet event says at what time since
    // boot the clock was set.
    assert_eq!(
        link.request_signed(
            Request::SetClock {
                unix_ms: now_unix_ms()
            },
            &BOARD_KEY
        ),
        Ok(Response::Ack)
    );
    let set_at_ms = device_events(&mut link)
        .iter()
        .find_map(|e| match e.kind {
            EventKind::ClockSet { old_ms, .. } if e.boot == boot0 => Some(old_ms),
            _ => None,
        })
        .expect("ClockSet event of this boot");
    let before_host: Vec<Reading> = device_log(&mut link)
        .into_iter()
        .filter(|r| r.seq.boot == boot0 && r.flags.contains(Flags::CLOCK_UNSET))
        .collect();
    // A reading stamped in the very millisecond the clock was set was
    // taken before it (it carries clock_unset): hence <=.
    assert!(
        !before_host.is_empty() && before_host.iter().all(|r| r.time_ms <= set_at_ms),
        "no reading logged before the host set the clock at {set_at_ms} ms after boot: {before_host:?}"
    );
    assert!(before_host.len() >= 5, "{before_host:?}");
    assert_eq!(before_host[0].seq.counter, 0, "measured from boot on");
    eprintln!(
        "{} readings logged before the host's first write ({set_at_ms} ms after boot)",
        before_host.len()
    );

    // Settings: written with the device key, read back; a wrong key is
    // refused and changes nothing.
    let defaults = read_settings(&mut link);
    assert_eq!(defaults.interval_ms, 1000, "default interval");
    let settings = Settings {
        tag: short_string("QEMU-L2-MT-1"),
        interval_ms: 100,
        output: OutputConfig {
            span_low_pct: 5.0,
            span_high_pct: 25.0,
            fail_high: true,
        },
        stale_timeout_ms: 2000,
    };
    match link.request_signed(Request::WriteSettings(settings.clone()), &[0x55u8; 32]) {
        Err(LinkError::Refused { code, .. }) => assert_eq!(code, ErrorCode::AuthFailed.code()),
        other => panic!("settings with a wrong key answered {other:?}"),
    }
    assert_eq!(read_settings(&mut link), defaults, "nothing changed");
    assert_eq!(
        link.request_signed(Request::WriteSettings(settings.clone()), &BOARD_KEY),
        Ok(Response::Ack)
    );
    assert_eq!(read_settings(&mut link), settings, "settings read back");

    // 500 streamed readings, stored without a gap.
    let n0 = stream_into(&mut link, &mut store, 500);
    assert!(n0 >= 500);
    assert_eq!(store.reading_count(BOARD_SERIAL).unwrap(), n0);

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
    assert_eq!(
        read_settings(&mut link),
        settings,
        "settings after a reboot"
    );
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
    assert_eq!(
        read_settings(&mut link),
        settings,
        "settings after system_reset"
    );
    let n2 = stream_into(&mut link, &mut store, 20);
    assert_eq!(store.reading_count(BOARD_SERIAL).unwrap(), n0 + n1 + n2);

    // The device measured between and around the streams: its log, pulled
    // whole, fills the store, every reading once, each boot from its first
    // reading on without gaps.
    let log = device_log(&mut link);
    let pulled = store
        .insert_readings(BOARD_SERIAL, &log, Source::Log)
        .expect("insert");
    assert_eq!(pulled.conflicts, 0);
    assert_eq!(
        pulled.duplicates,
        n0 + n1 + n2,
        "streamed readings seen again"
    );
    assert_eq!(
        store.reading_count(BOARD_SERIAL).unwrap(),
        log.len() as u64,
        "the store holds the device log"
    );
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

/// The board's toolchain keeps every value of a loop of `min` and `max`
/// over a mapped range (`firmware/boards/qemu-mps2/src/bin/codegen_check.rs`:
/// the shape rustc 1.95.0 miscompiles at opt-level 2 on x86-64), built with
/// the firmware's release profile and run on the emulated Cortex-M4F.
#[test]
#[ignore = "needs qemu-system-arm and the board ELF: `cargo xtask test` runs it"]
fn the_board_toolchain_keeps_every_value_of_a_min_max_loop() {
    let elf = board_elf(&root()).with_file_name("codegen_check");
    assert!(
        elf.exists(),
        "{} missing: run `cargo xtask firmware`",
        elf.display()
    );
    let mut child = qemu_command(&elf)
        .stdin(std::process::Stdio::null())
        .stdout(std::process::Stdio::piped())
        .spawn()
        .expect("qemu-system-arm starts");
    let deadline = Instant::now() + Duration::from_secs(60);
    let status = loop {
        if let Some(s) = child.try_wait().expect("QEMU's status") {
            break s;
        }
        if Instant::now() > deadline {
            let _ = child.kill();
            let _ = child.wait();
            panic!("{} did not exit within 60 s", elf.display());
        }
        std::thread::sleep(Duration::from_millis(50));
    };
    let mut out = String::new();
    std::io::Read::read_to_string(&mut child.stdout.take().expect("stdout"), &mut out)
        .expect("QEMU's output");
    eprintln!("{out}");
    assert!(status.success(), "{status}: {out}");
    // Every case ran and printed its verdict (4 + 2 x 11 cases).
    assert_eq!(
        out.lines().filter(|l| l.starts_with("ok ")).count(),
        26,
        "{out}"
    );
    assert!(!out.contains("FAIL"), "{out}");
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
