//! Modbus RTU end to end on QEMU: the board's UART1 on its own
//! pseudo-terminal, read by pymodbus's serial client
//! (`tests/python/modbus_rtu.py`, pymodbus 3.16.1 and pyserial 3.5 from
//! `tests/python/requirements.txt`), while the same device streams its
//! readings over its own protocol on UART0. Every register pymodbus reads
//! is the `fringe-registers` map of a reading the device sent; the floats
//! pymodbus decodes are that reading's values; another unit id gets no
//! answer, a read past the map exception 02, a holding-register read
//! exception 01, a request with a bad CRC no answer (and the next good one
//! is answered).
//!
//! Timing: QEMU's UART models no baud rate, so the bytes of a request reach
//! the board back to back and the 3.5-character frame end is all that
//! delimits frames here; the 1.5- and 3.5-character rules themselves are
//! tested on the core (`firmware/src/modbus.rs`), where time is an
//! argument.
//!
//! A second test sets the device's Modbus settings over its own protocol
//! (unit 12, 38400 baud, odd parity) and reads through unit 12 while unit
//! 1, the old one, gets no answer. QEMU's UART ignores baud rate and
//! parity (the board only changes its baud divisor, and the pty carries
//! bytes, not characters), so here only the unit id and the frame gap
//! change; the parity and stop bits are applied on the STM32 board alone.
//!
//! Needs `qemu-system-arm`, the board ELF and the Python venv, so it is
//! ignored in a plain `cargo test`; `cargo xtask test` runs it with
//! `--ignored` and `FRINGE_PYTHON` set.

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::Duration;

use fringe_calibration::product::{ProductModel, SingleFrequencyModel};
use fringe_protocol::*;
use fringe_registers::{map, Snapshot, MAP_LEN, STATUS_NO_VALUE};
use fringe_tests::qemu::*;

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .expect("tests/ has a parent")
        .to_path_buf()
}

fn python() -> PathBuf {
    PathBuf::from(std::env::var_os("FRINGE_PYTHON").unwrap_or_else(|| {
        panic!("FRINGE_PYTHON is not set: run `cargo xtask test`, which makes the venv")
    }))
}

/// A cell calibration for the board's 1 and 20 MHz (invented values; no
/// reference baseline, so no drift flag).
fn cell() -> CellCal {
    let p = |f: f32| CellPoint {
        freq_hz: f,
        stray_pf: 2.1,
        cell_pf: 1.5,
        g_offset_s: 2e-8,
    };
    CellCal {
        points: [p(1.0e6), p(20.0e6)],
        reference_ratio: 0.0,
        made_s: 1_796_000_000,
    }
}

/// The invented "Harrowgate Mill line 2 wheat" of `tests/tests/qemu.rs`.
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
            min: 0.0,
            max: 60.0,
        },
        temperature_c: Range {
            min: 0.0,
            max: 50.0,
        },
        inputs: [Range {
            min: 1.0,
            max: 60.0,
        }]
        .into_iter()
        .collect(),
        sec_pct: 0.3,
        made_s: 1_796_000_000,
    }
}

fn ack(link: &mut Link, request: Request, counter: u32) {
    let answer = link
        .request(
            request.clone(),
            Some((&BOARD_KEY, BOARD_SERIAL, counter)),
            Duration::from_secs(10),
        )
        .expect("answered");
    assert_eq!(answer, Ok(Response::Ack), "{request:?}");
}

fn f32_of(v: &serde_json::Value) -> Option<f32> {
    v.as_f64().map(|x| x as f32)
}

#[test]
#[ignore = "needs qemu-system-arm, the board ELF and FRINGE_PYTHON: `cargo xtask test` runs it"]
fn pymodbus_reads_the_device_over_modbus_rtu_on_qemu() {
    let elf = board_elf(&root());
    assert!(
        elf.exists(),
        "{} missing: run `cargo xtask firmware`",
        elf.display()
    );
    let qemu = Qemu::boot(&elf).expect("QEMU boots");
    let (mut link, id) = Link::connect(&qemu.pty, Duration::from_secs(30)).expect("handshake");
    assert_eq!(id.serial.as_str(), BOARD_SERIAL);

    // Calibrated, so the registers carry a moisture value.
    let counter = 1_000 + id.boot * 10;
    ack(&mut link, Request::WriteCellCal(cell()), counter + 1);
    ack(
        &mut link,
        Request::WriteProductCal {
            slot: 0,
            cal: wheat(),
        },
        counter + 2,
    );
    ack(&mut link, Request::SelectProduct { slot: 0 }, counter + 3);
    match link.request(
        Request::StartStream { period_ms: 1000 },
        None,
        Duration::from_secs(10),
    ) {
        Ok(Ok(Response::Ack)) => {}
        other => panic!("StartStream answered {other:?}"),
    }
    // From the first reading streamed on, every reading the map shows has
    // been sent over the protocol as well.
    let deadline = std::time::Instant::now() + Duration::from_secs(60);
    while link.readings.is_empty() {
        assert!(
            std::time::Instant::now() < deadline,
            "no reading streamed in 60 s"
        );
        link.receive(Duration::from_millis(200)).expect("stream");
    }
    let first = link.readings[0];
    assert!(
        first.moisture_pct.is_some(),
        "calibrated device gives no moisture: {:?}",
        first.flags
    );

    let v = pymodbus(&qemu, &mut link, 1, 4, 2);
    link.receive(Duration::from_millis(500)).expect("stream");
    eprintln!(
        "pymodbus: {} whole-map reads ({} read again after every try was split), slowest round trip {:.3} s; {} readings streamed",
        v["reads"].as_array().map_or(0, Vec::len),
        v["failed_reads"],
        v["round_trip_s"].as_f64().unwrap_or(f64::NAN),
        link.readings.len()
    );

    let reads = v["reads"].as_array().expect("reads");
    let mut distinct = std::collections::BTreeSet::new();
    for read in reads {
        let regs: Vec<u16> = read["registers"]
            .as_array()
            .expect("registers")
            .iter()
            .map(|w| w.as_u64().expect("word") as u16)
            .collect();
        assert_eq!(regs.len(), MAP_LEN);
        let counter = read["counter"].as_u64().expect("counter") as u32;
        let boot = read["boot"].as_u64().expect("boot") as u16;
        let r = *link
            .readings
            .iter()
            .find(|r| r.seq.counter == counter && r.seq.boot as u16 == boot)
            .unwrap_or_else(|| panic!("register reading {boot}.{counter} was never streamed"));
        distinct.insert(counter);
        let age_s = u32::from(regs[9]);
        assert!(age_s <= 2, "age {age_s} s with a reading every second");
        // Every register: the map of the streamed reading at that age.
        let want = map(&Snapshot {
            reading: Some(r),
            age_s,
            stale: false,
            connected: true,
            // The simulator's exact calibration: a wet basis.
            basis: Some(fringe_protocol::Basis::Wet),
        });
        assert_eq!(regs, want, "registers of reading {}", r.seq);
        assert_eq!(regs[6] & STATUS_NO_VALUE, 0, "a valid value");
        // And what pymodbus decodes from them.
        let m = r.moisture_pct.expect("moisture");
        assert_eq!(f32_of(&read["moisture_pct"]), Some(m));
        assert_eq!(f32_of(&read["uncertainty_pct"]), Some(r.uncertainty_pct));
        assert_eq!(f32_of(&read["temperature_c"]), Some(r.temperature_c));
        assert_eq!(f32_of(&read["known_value"]), Some(1234.5));
        assert_eq!(read["version"], 2);
        assert_eq!(read["basis"], 1, "wet");
        assert_eq!(read["flags"].as_u64(), Some(u64::from(r.flags.bits())));
        assert_eq!(
            read["scaled_moisture"].as_i64(),
            Some((m * 100.0).round() as i64)
        );
        assert_eq!(
            read["scaled_temperature"].as_i64(),
            Some((r.temperature_c * 10.0).round() as i64)
        );
    }
    assert!(distinct.len() >= 4, "readings read: {distinct:?}");

    assert_eq!(v["wrong_unit"], serde_json::Value::Null, "unit 2 answered");
    assert_eq!(v["past_end_exception"], 2);
    assert_eq!(v["holding_exception"], 1);
    assert_eq!(v["bad_crc_answer"], "", "answer to a bad CRC");
    assert_eq!(v["after_bad_crc_ok"], true);

    // The board's own counts: the request for unit 2 and the one with the
    // bad CRC reached the slave and were recognised as such (not lost on
    // the way), and the two exceptions were sent. Requests split by QEMU's
    // pty delivery (see tests/python/modbus_rtu.py) show as extra bad-CRC
    // or damaged frames, repeated by pymodbus; how many is reported.
    let f = qemu.modbus_figures(&elf).expect("board's Modbus figures");
    eprintln!("board: {f:?}");
    assert!(f.other_unit >= 1, "the unit-2 request was not seen: {f:?}");
    assert!(f.bad_crc >= 1, "the bad-CRC request was not seen: {f:?}");
    assert!(f.exceptions >= 2, "{f:?}");
    assert!(f.answered as usize >= reads.len() + 2, "{f:?}");
    assert_eq!(f.broadcast, 0);
    // A master that waits for its answers (pymodbus, 1 s) loses none to
    // the rule that drops an answer not sent before the next frame came.
    assert_eq!(f.late, 0, "answers dropped as late: {f:?}");
    eprintln!(
        "requests split by QEMU's pty timing: {} frames dropped beyond the one bad CRC sent on purpose",
        f.bad_crc - 1 + f.damaged
    );
}

/// Runs `tests/python/modbus_rtu.py` against the board's Modbus pty for
/// `unit` (`wrong` is the unit that must stay silent) while the link
/// keeps taking the streamed readings; its JSON.
fn pymodbus(qemu: &Qemu, link: &mut Link, unit: u8, readings: u32, wrong: u8) -> serde_json::Value {
    let script = root().join("tests/python/modbus_rtu.py");
    let mut child = Command::new(python())
        .arg(&script)
        .arg(&qemu.modbus_pty)
        .args([unit.to_string(), readings.to_string(), wrong.to_string()])
        .stdout(Stdio::piped())
        .stderr(Stdio::inherit())
        .spawn()
        .expect("python starts");
    // Its JSON is read while it runs: a run of fast reads prints more than
    // a pipe holds, and a script blocked on a full pipe never exits.
    let mut stdout = child.stdout.take().expect("stdout");
    let reader = std::thread::spawn(move || {
        let mut out = String::new();
        std::io::Read::read_to_string(&mut stdout, &mut out).map(|_| out)
    });
    // The script bounds its own waits (and dumps its stacks after 150 s);
    // this bound is the last resort, so that a stuck run fails, not hangs.
    let deadline = std::time::Instant::now() + Duration::from_secs(180);
    let status = loop {
        link.receive(Duration::from_millis(200)).expect("stream");
        if let Some(s) = child.try_wait().expect("python") {
            break s;
        }
        if std::time::Instant::now() > deadline {
            let _ = child.kill();
            let _ = child.wait();
            panic!(
                "modbus_rtu.py still running after 180 s on {} (unit {unit}); killed",
                qemu.modbus_pty.display()
            );
        }
    };
    let out = reader
        .join()
        .expect("reader thread")
        .expect("python output");
    assert!(status.success(), "modbus_rtu.py failed: {out}");
    serde_json::from_str(&out).expect("JSON from modbus_rtu.py")
}

#[test]
#[ignore = "needs qemu-system-arm, the board ELF and FRINGE_PYTHON: `cargo xtask test` runs it"]
fn after_a_settings_change_the_device_answers_its_new_unit_id_only() {
    let elf = board_elf(&root());
    assert!(
        elf.exists(),
        "{} missing: run `cargo xtask firmware`",
        elf.display()
    );
    let qemu = Qemu::boot(&elf).expect("QEMU boots");
    let (mut link, id) = Link::connect(&qemu.pty, Duration::from_secs(30)).expect("handshake");
    assert!(
        id.capabilities.contains(Capabilities::MODBUS_RTU),
        "{:?}",
        id.capabilities
    );
    let read_modbus =
        |link: &mut Link| match link.request(Request::ReadModbus, None, Duration::from_secs(10)) {
            Ok(Ok(Response::Modbus(m))) => m,
            other => panic!("ReadModbus answered {other:?}"),
        };
    assert_eq!(
        read_modbus(&mut link),
        ModbusSettings {
            unit_id: 1,
            baud: 19_200,
            parity: ModbusParity::Even
        },
        "the defaults"
    );
    // Unit 1 answers before the change (and unit 12 does not).
    match link.request(
        Request::StartStream { period_ms: 1000 },
        None,
        Duration::from_secs(10),
    ) {
        Ok(Ok(Response::Ack)) => {}
        other => panic!("StartStream answered {other:?}"),
    }
    let before = pymodbus(&qemu, &mut link, 1, 1, 12);
    assert_eq!(
        before["wrong_unit"],
        serde_json::Value::Null,
        "unit 12 answered"
    );
    let f0 = qemu.modbus_figures(&elf).expect("board's Modbus figures");

    let new = ModbusSettings {
        unit_id: 12,
        baud: 38_400,
        parity: ModbusParity::Odd,
    };
    ack(
        &mut link,
        Request::WriteModbus(new),
        2_000 + id.boot * 10 + 1,
    );
    assert_eq!(read_modbus(&mut link), new, "read back");

    // Unit 12 answers now, with the map of readings the device streamed;
    // unit 1 is silent.
    let after = pymodbus(&qemu, &mut link, 12, 2, 1);
    assert_eq!(
        after["wrong_unit"],
        serde_json::Value::Null,
        "unit 1 answered"
    );
    let reads = after["reads"].as_array().expect("reads");
    assert!(reads.len() >= 2, "{after}");
    for read in reads {
        let counter = read["counter"].as_u64().expect("counter") as u32;
        assert!(
            link.readings.iter().any(|r| r.seq.counter == counter),
            "register reading {counter} was never streamed"
        );
        assert_eq!(f32_of(&read["known_value"]), Some(1234.5));
    }
    assert_eq!(after["past_end_exception"], 2);
    assert_eq!(after["after_bad_crc_ok"], true);
    let f1 = qemu.modbus_figures(&elf).expect("board's Modbus figures");
    eprintln!("board before the change: {f0:?}\nafter: {f1:?}");
    assert!(
        f1.other_unit > f0.other_unit,
        "the unit-1 request after the change was not seen as another unit's: {f0:?} -> {f1:?}"
    );
    assert!(f1.answered > f0.answered, "{f0:?} -> {f1:?}");
}
