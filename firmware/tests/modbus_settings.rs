//! The Modbus RTU settings (unit id, baud rate, parity; protocol 1.2):
//! defaults on a blank flash and on flash written before 1.2, each write
//! authenticated, read back, logged, kept across a reboot and old-or-new
//! after a power cut at any step; bad values refused by name with nothing
//! changed; the event in the form the host announced it can decode; and
//! the slave following the settings the device holds.

mod common;

use common::*;
use fringe_firmware::modbus::{Parity, RtuSlave, SerialLine};
use fringe_firmware::protocol::auth::sign;
use fringe_firmware::protocol::*;
use fringe_firmware::settings::default_settings;
use fringe_firmware::storage::key;
use fringe_firmware::Scenario;

const DEFAULTS: ModbusSettings = ModbusSettings {
    unit_id: 1,
    baud: 19_200,
    parity: ModbusParity::Even,
};

/// Line 2's device moved onto a shared segment (invented).
const SHARED: ModbusSettings = ModbusSettings {
    unit_id: 12,
    baud: 38_400,
    parity: ModbusParity::None,
};

fn read(b: &mut Bench) -> ModbusSettings {
    match b.ok(Request::ReadModbus) {
        Response::Modbus(m) => m,
        other => panic!("ReadModbus answered {other:?}"),
    }
}

fn identify(b: &mut Bench, minor: u8) -> Identity {
    match b.ok(Request::Identify {
        host: Version { major: 1, minor },
    }) {
        Response::Identity(id) => id,
        other => panic!("{other:?}"),
    }
}

#[test]
fn defaults_on_a_blank_flash_and_the_capability() {
    let mut b = Bench::new(1, Scenario::default());
    assert_eq!(read(&mut b), DEFAULTS);
    assert_eq!(b.dev.modbus_line(), SerialLine::DEFAULT);
    let id = identify(&mut b, 2);
    assert!(id.capabilities.contains(Capabilities::MODBUS_RTU));
    // The Modbus settings came with 1.2; the device speaks this crate's version.
    assert_eq!(id.protocol, PROTOCOL_VERSION);
    assert!(id.protocol >= Version { major: 1, minor: 2 });
}

#[test]
fn flash_written_before_1_2_reads_as_the_defaults_and_keeps_the_other_settings() {
    // A 1.1 device's flash: settings under key 7, nothing under key 8.
    let mut b = Bench::new(2, Scenario::default());
    let tagged = Settings {
        tag: short_string("L2-DRYER-MT-201"),
        interval_ms: 2000,
        ..default_settings()
    };
    b.dev.storage_mut().put(key::SETTINGS, &tagged).unwrap();
    assert_eq!(
        b.dev
            .storage_mut()
            .get::<ModbusSettings>(key::MODBUS)
            .unwrap(),
        None
    );
    let mut b = b.reboot(3);
    assert_eq!(read(&mut b), DEFAULTS);
    assert_eq!(b.dev.settings(), &tagged);
    // A stored value that no longer passes the check reads as the
    // defaults too (written by other firmware).
    let bad = ModbusSettings {
        unit_id: 0,
        ..SHARED
    };
    b.dev.storage_mut().put(key::MODBUS, &bad).unwrap();
    let mut b = b.reboot(4);
    assert_eq!(read(&mut b), DEFAULTS);
}

#[test]
fn each_value_is_written_read_back_logged_and_kept_across_a_reboot() {
    let cases = [
        ModbusSettings {
            unit_id: 247,
            ..DEFAULTS
        },
        ModbusSettings {
            baud: 9600,
            ..DEFAULTS
        },
        ModbusSettings {
            parity: ModbusParity::Odd,
            ..DEFAULTS
        },
        SHARED,
    ];
    for (i, m) in cases.into_iter().enumerate() {
        let mut b = Bench::new(10 + i as u64, Scenario::default());
        identify(&mut b, 2);
        assert_eq!(b.ok(Request::WriteModbus(m)), Response::Ack, "{m:?}");
        assert_eq!(read(&mut b), m, "read back");
        assert_eq!(b.dev.modbus_line(), SerialLine::from(m), "in force");
        let changed: Vec<_> = b
            .events()
            .into_iter()
            .filter_map(|e| match e.kind {
                EventKind::ModbusChanged { old, new } => Some((old, new)),
                _ => None,
            })
            .collect();
        assert_eq!(changed, vec![(DEFAULTS, m)], "{m:?}: the event");
        let mut b = b.reboot(20 + i as u64);
        assert_eq!(read(&mut b), m, "{m:?}: after a reboot");
        assert_eq!(b.dev.modbus_line(), SerialLine::from(m));
    }
}

#[test]
fn a_1_1_host_gets_the_change_as_settings_changed_with_content_ids() {
    let mut b = Bench::new(30, Scenario::default());
    identify(&mut b, 1);
    assert_eq!(b.ok(Request::WriteModbus(SHARED)), Response::Ack);
    let want = EventKind::SettingsChanged {
        old: DEFAULTS.content_id(),
        new: SHARED.content_id(),
    };
    // The unsolicited event and the event log alike.
    assert!(
        b.seen
            .iter()
            .any(|f| matches!(f, DeviceFrame::Event(e) if e.kind == want)),
        "unsolicited: {:?}",
        b.seen
    );
    let evs = b.events();
    assert!(evs.iter().any(|e| e.kind == want), "{evs:?}");
    assert!(!evs
        .iter()
        .any(|e| matches!(e.kind, EventKind::ModbusChanged { .. })));
    // The same log, read by a 1.2 host, holds the change itself.
    identify(&mut b, 2);
    assert!(b.events().iter().any(|e| e.kind
        == EventKind::ModbusChanged {
            old: DEFAULTS,
            new: SHARED
        }));
}

#[test]
fn bad_values_and_a_wrong_key_are_refused_and_change_nothing() {
    let mut b = Bench::new(40, Scenario::default());
    identify(&mut b, 2);
    for (m, word) in [
        (
            ModbusSettings {
                unit_id: 0,
                ..DEFAULTS
            },
            "unit id",
        ),
        (
            ModbusSettings {
                unit_id: 248,
                ..DEFAULTS
            },
            "unit id",
        ),
        (
            ModbusSettings {
                baud: 14_400,
                ..DEFAULTS
            },
            "baud",
        ),
        (
            ModbusSettings {
                baud: 0,
                ..DEFAULTS
            },
            "baud",
        ),
    ] {
        match b.ask(Request::WriteModbus(m)) {
            DeviceFrame::Error { code, reason, .. } => {
                assert_eq!(code, ErrorCode::OutOfRange, "{reason}");
                assert!(reason.contains(word), "{reason:?} names {word}");
            }
            other => panic!("{m:?}: {other:?}"),
        }
        assert_eq!(read(&mut b), DEFAULTS);
    }
    let request = Request::WriteModbus(SHARED);
    b.counter += 1;
    let auth = sign(&[0x55; 32], SERIAL, b.counter, &request);
    let f = b.ask_with(request, auth);
    assert_eq!(Bench::error_code(&f), Some(ErrorCode::AuthFailed));
    let f = b.ask_with(Request::WriteModbus(SHARED), None);
    assert_eq!(Bench::error_code(&f), Some(ErrorCode::AuthFailed));
    assert_eq!(read(&mut b), DEFAULTS);
    assert!(!b
        .events()
        .iter()
        .any(|e| matches!(e.kind, EventKind::ModbusChanged { .. })));
}

#[test]
fn a_modbus_write_is_old_or_new_after_a_cut_at_any_step() {
    big_stack(|| {
        let boot = |flash: Flash, seed: u64| {
            let mut b = Bench::with_config(seed, Scenario::default(), flash, quiet_config());
            b.settle();
            b
        };
        let first = boot(Flash::new(), 50);
        let counter = first.counter;
        let (_, flash, _) = first.dev.into_parts();
        let mut b = boot(flash.clone(), 50);
        let (w0, e0) = b.dev.flash_mut().op_counts();
        assert_eq!(b.ok(Request::WriteModbus(SHARED)), Response::Ack);
        let (w1, e1) = b.dev.flash_mut().op_counts();
        let steps = (w1 + e1) - (w0 + e0);
        assert!(steps >= 2, "{steps} flash operations");
        println!("power cuts tried (Modbus settings write): {steps}");
        for k in 0..steps {
            let mut b = boot(flash.clone(), 50);
            b.counter = counter;
            b.dev.flash_mut().cut_power_after(k);
            let _ = b.ask(Request::WriteModbus(SHARED));
            assert!(b.dev.flash_mut().power_cut_happened(), "step {k}: no cut");
            let (_, mut fl, _) = b.dev.into_parts();
            fl.restart();
            let mut b = boot(fl, 51);
            b.counter = counter + 1;
            let now = read(&mut b);
            assert!(
                now == DEFAULTS || now == SHARED,
                "step {k}: Modbus settings after the cut are {now:?}"
            );
            assert_eq!(b.dev.modbus_line(), SerialLine::from(now));
        }
    });
}

/// What a board does with the settings: hands them to the slave, which
/// then answers the new unit id only, with the new frame gap.
#[test]
fn the_slave_follows_the_device_settings() {
    let mut b = Bench::new(60, Scenario::default());
    let mut slave = RtuSlave::new(&b.dev.modbus_line()).unwrap();
    assert_eq!(slave.unit_id(), 1);
    assert_eq!(b.ok(Request::WriteModbus(SHARED)), Response::Ack);
    let line = b.dev.modbus_line();
    assert_eq!(line.parity, Parity::None);
    assert_eq!(line.stop_bits(), 2);
    slave.reconfigure(&line).unwrap();
    assert_eq!(slave.unit_id(), 12);
    assert_eq!(slave.timing().t35_us, 1750);
}

/// A reboot on the same flash with the settings map damaged
/// ([`damaged_settings_map`]: the map is erased at boot).
fn damage_map_and_boot(b: Bench, seed: u64) -> Bench {
    Bench::on_flash(seed, Scenario::default(), damaged_settings_map(b))
}

/// The settings map lost (erased as damaged, or erased and the power cut
/// before anything was stored again): the Modbus settings come back from
/// the newest change the event ring holds, are stored again and stay; on
/// a device whose ring holds none, the defaults.
#[test]
fn modbus_settings_lost_with_the_settings_map_come_back_from_the_event_ring() {
    let mut b = Bench::new(60, Scenario::default());
    b.settle();
    assert_eq!(b.ok(Request::WriteModbus(DEFAULTS)), Response::Ack);
    assert_eq!(b.ok(Request::WriteModbus(SHARED)), Response::Ack);
    let mut b = damage_map_and_boot(b, 61);
    assert!(
        b.events()
            .iter()
            .any(|e| matches!(e.kind, EventKind::StorageRepaired)),
        "the repair is logged"
    );
    assert_eq!(read(&mut b), SHARED, "the newest change, not the first");
    assert_eq!(b.dev.modbus_line(), SerialLine::from(SHARED));
    // Stored again: kept by the next boot from the map itself.
    assert_eq!(
        b.dev
            .storage_mut()
            .get::<ModbusSettings>(key::MODBUS)
            .unwrap(),
        Some(SHARED)
    );
    let mut b = b.reboot(62);
    assert_eq!(read(&mut b), SHARED);

    // A power cut after the repair's erase, before anything was stored
    // again, leaves an empty map that is not damaged: the same.
    let map = b.dev.storage_mut().layout().map.clone();
    let (_, mut flash, _) = b.dev.into_parts();
    embedded_storage::nor_flash::NorFlash::erase(&mut flash, map.start, map.end).unwrap();
    let mut b = Bench::on_flash(63, Scenario::default(), flash);
    assert_eq!(read(&mut b), SHARED);

    // A device that never had its Modbus settings written: the defaults.
    let mut b = Bench::new(64, Scenario::default());
    b.settle();
    let mut b = damage_map_and_boot(b, 65);
    assert_eq!(read(&mut b), DEFAULTS);
    assert_eq!(b.dev.modbus_line(), SerialLine::DEFAULT);
}

/// The newest `ModbusChanged` the event ring holds, with its number.
fn newest_copy(b: &mut Bench) -> Option<(u32, ModbusSettings)> {
    b.dev.storage_mut().newest_logged_modbus().unwrap()
}

/// Events that any client or the power can make (wrong-key writes, boots)
/// fill the ring many times over: the device renews its copy of settings
/// other than the defaults before it ages out (at half the ring), so a
/// settings map lost after them still gives the settings back.
#[test]
fn the_rings_copy_of_the_modbus_settings_is_renewed_before_it_ages_out() {
    let mut b = Bench::new(70, Scenario::default());
    b.settle();
    let cap = b.dev.storage_mut().event_capacity();
    assert_eq!(cap, 78, "two 4 KiB pages of events");
    assert_eq!(b.ok(Request::WriteModbus(SHARED)), Response::Ack);
    let (written, _) = newest_copy(&mut b).expect("the write's event");

    // Wrong-key writes, each checked (the hold waited out), each logged.
    let evil = Request::WriteCellCal(cell_cal(9.9, 1.0));
    for i in 0..3 * cap {
        let tag = sign(&[0x43; 32], SERIAL, 5_000 + i, &evil).unwrap();
        let f = b.ask_with(evil.clone(), Some(tag));
        assert_eq!(Bench::error_code(&f), Some(ErrorCode::AuthFailed));
        b.tick(fringe_firmware::device::MAX_WRITE_HOLD_MS + 1_000);
    }
    let last = b.dev.storage_mut().last_event().unwrap();
    assert!(last - written > 2 * cap, "{} events logged", last - written);
    let (n, copy) = newest_copy(&mut b).expect("a copy in the ring");
    assert_eq!(copy, SHARED);
    assert!(last - n < cap / 2 + 1, "copy {n}, newest event {last}");
    identify(&mut b, 2);
    let renewed = b
        .events()
        .into_iter()
        .filter(|e| {
            matches!(e.kind, EventKind::ModbusChanged { old, new } if old == SHARED && new == SHARED)
        })
        .count();
    assert!(renewed >= 4, "{renewed} renewals");

    // Boots alone (one event each) do the same.
    for i in 0..2 * cap {
        b = b.reboot(100 + u64::from(i));
    }
    let last = b.dev.storage_mut().last_event().unwrap();
    let (n, copy) = newest_copy(&mut b).expect("a copy in the ring");
    assert_eq!(copy, SHARED);
    assert!(last - n < cap / 2 + 1, "copy {n}, newest event {last}");

    let mut b = damage_map_and_boot(b, 200);
    assert_eq!(read(&mut b), SHARED);
    identify(&mut b, 2);
    // The recovery is logged: from the defaults the loss left.
    assert!(b.events().iter().any(|e| matches!(
        e.kind,
        EventKind::ModbusChanged { old, new } if old == DEFAULTS && new == SHARED
    )));
}
