//! What every back end must do, as functions a back end's tests call with
//! a fresh, empty store of its own (feature `conformance`). Each panics
//! with what differs.
//!
//! [`golden_chain`] pins the chain head of a fixed set of records: a back
//! end that stores the same values yields the same hashes (a consistency
//! check of the chain definition against this implementation, not an
//! outside check).

use fringe_protocol::{CalId, ChannelValue, Event, EventKind, Flags, Reading, RefCheck, Seq};

use crate::chain::{self, ChainProblem};
use crate::record::{CalKind, DeviceInfo, Gap, NewCalibration, NewLabSample, Source};
use crate::{verify_chain, Batcher, RecordStore, StoreError, BATCH_MAX_AGE};

/// The serial the checks use.
pub const SERIAL: &str = "HGM-L2-0001";

/// A reading of boot `boot` with varying values.
pub fn reading(boot: u32, counter: u32) -> Reading {
    let x = counter as f32;
    Reading {
        seq: Seq { boot, counter },
        time_ms: 1_700_000_000_000 + u64::from(counter) * 100,
        channels: [
            ChannelValue {
                g_s: 1e-6 * x,
                b_s: 2e-5,
                eps_re: 4.0 + x * 1e-3,
                eps_im: 0.3,
            },
            ChannelValue {
                g_s: 3e-6,
                b_s: 4e-4,
                eps_re: 3.5,
                eps_im: 0.1,
            },
        ],
        temperature_c: 21.5,
        moisture_pct: Some(14.2 + x * 1e-3),
        uncertainty_pct: 0.4,
        flags: Flags::CLOCK_UNSET,
        cell_cal: CalId([0xde, 0xad, 0xbe, 0xef]),
        product_cal: CalId([1, 2, 3, 4]),
    }
}

/// Readings round-trip exactly, an overlapping batch stores only what is
/// new, and a reading under a stored sequence with other values is kept out.
pub fn readings_round_trip_exactly_and_never_twice(s: &mut dyn RecordStore) {
    let batch: Vec<Reading> = (0..50).map(|c| reading(1, c)).collect();
    let st = s.insert_readings(SERIAL, &batch, Source::Stream).unwrap();
    assert_eq!(st.inserted, 50);
    let again: Vec<Reading> = (40..60).map(|c| reading(1, c)).collect();
    let st = s.insert_readings(SERIAL, &again, Source::Log).unwrap();
    assert_eq!((st.inserted, st.duplicates, st.conflicts), (10, 10, 0));
    let back = s.readings(SERIAL).unwrap();
    assert_eq!(back.len(), 60);
    for (i, r) in back.iter().enumerate() {
        assert_eq!(r.reading, reading(1, i as u32));
        assert_eq!(r.source, if i < 50 { Source::Stream } else { Source::Log });
    }
    assert_eq!(
        s.last_seq(SERIAL).unwrap(),
        Some(Seq {
            boot: 1,
            counter: 59
        })
    );
    assert_eq!(s.reading_count(SERIAL).unwrap(), 60);
    let mut odd = reading(1, 5);
    odd.temperature_c = 99.0;
    let st = s.insert_readings(SERIAL, &[odd], Source::Log).unwrap();
    assert_eq!(st.conflicts, 1);
    assert_eq!(s.readings(SERIAL).unwrap()[5].reading, reading(1, 5));
    assert!(verify_chain(s).unwrap().ok());
}

/// NaN and -0.0 round-trip as documented and keep the chain valid.
pub fn nan_and_negative_zero_keep_the_chain_valid(s: &mut dyn RecordStore) {
    let mut r = reading(2, 0);
    r.temperature_c = f32::NAN;
    r.uncertainty_pct = -0.0;
    r.moisture_pct = None;
    r.channels[0].eps_re = f32::NAN;
    s.insert_readings(SERIAL, &[r], Source::Stream).unwrap();
    let back = s.readings(SERIAL).unwrap()[0].reading;
    assert!(back.temperature_c.is_nan());
    assert_eq!(back.uncertainty_pct.to_bits(), 0.0f32.to_bits());
    assert_eq!(back.moisture_pct, None);
    assert_eq!(back.channels[0].eps_re.to_bits(), f32::NAN.to_bits());
    let report = verify_chain(s).unwrap();
    assert!(report.ok(), "{report:?}");
}

/// Events are keyed by number: stored once.
pub fn events_are_idempotent(s: &mut dyn RecordStore) {
    let ev: Vec<Event> = (0..3)
        .map(|n| Event {
            number: n,
            boot: 1,
            time_ms: u64::from(n) * 10,
            kind: EventKind::ReferenceDrift {
                ratio: 1.01,
                baseline: 1.0,
            },
        })
        .collect();
    assert_eq!(s.insert_events(SERIAL, &ev).unwrap().inserted, 3);
    assert_eq!(s.insert_events(SERIAL, &ev).unwrap().duplicates, 3);
    let back: Vec<Event> = s
        .events(SERIAL)
        .unwrap()
        .into_iter()
        .map(|e| e.record)
        .collect();
    assert_eq!(back, ev);
    assert_eq!(s.last_event(SERIAL).unwrap(), Some(2));
}

/// Calibrations and lab samples append; an identical record is a
/// duplicate; a changed lab value needs `supersedes`.
pub fn calibrations_and_lab_samples_append_with_corrections(s: &mut dyn RecordStore) {
    let cal = NewCalibration {
        kind: CalKind::Product,
        cal_id: CalId([9, 9, 9, 9]),
        slot: Some(0),
        name: Some("wheat".into()),
        body: serde_json::json!({"params": [1.0, 2.0]}),
        note: None,
        supersedes: None,
    };
    let a = s.insert_calibration(SERIAL, &cal).unwrap();
    let b = s.insert_calibration(SERIAL, &cal).unwrap();
    assert!(!a.duplicate && b.duplicate && a.position == b.position && a.seq == 1);
    let sample = NewLabSample {
        sample_id: "HGM-2026-0117".into(),
        taken_unix_ms: 1_700_000_000_000,
        product: Some("wheat".into()),
        lab_moisture_pct: 14.6,
        basis: "wet".into(),
        method: Some("oven-dry 130 C 2 h".into()),
        reading: Some(Seq {
            boot: 1,
            counter: 4,
        }),
        note: None,
        supersedes: None,
    };
    let first = s.insert_lab_sample(SERIAL, &sample).unwrap();
    assert!(s.insert_lab_sample(SERIAL, &sample).unwrap().duplicate);
    let mut fixed = sample.clone();
    fixed.lab_moisture_pct = 14.8;
    match s.insert_lab_sample(SERIAL, &fixed) {
        Err(StoreError::SampleConflict { position, .. }) => assert_eq!(position, first.position),
        other => panic!("{other:?}"),
    }
    fixed.supersedes = Some(first.position);
    let second = s.insert_lab_sample(SERIAL, &fixed).unwrap();
    assert_eq!(second.seq, 2);
    fixed.supersedes = Some(9999);
    fixed.sample_id = "other".into();
    assert!(matches!(
        s.insert_lab_sample(SERIAL, &fixed),
        Err(StoreError::BadSupersedes { position: 9999, .. })
    ));
    let labs = s.lab_samples(SERIAL).unwrap();
    assert_eq!(labs.len(), 2);
    assert_eq!(labs[0].sample, sample);
    assert_eq!(s.calibrations(SERIAL).unwrap()[0].cal, cal);
    assert!(verify_chain(s).unwrap().ok());
}

/// Gaps are found within each boot.
pub fn gaps_are_found_per_boot(s: &mut dyn RecordStore) {
    let mut b: Vec<Reading> = [0, 1, 2, 5, 6, 9].iter().map(|&c| reading(1, c)).collect();
    b.extend([3, 4].iter().map(|&c| reading(2, c)));
    s.insert_readings(SERIAL, &b, Source::Stream).unwrap();
    assert_eq!(
        s.gaps(SERIAL).unwrap(),
        vec![
            Gap {
                boot: 1,
                first: 3,
                last: 4
            },
            Gap {
                boot: 1,
                first: 7,
                last: 8
            },
            Gap {
                boot: 2,
                first: 0,
                last: 2
            },
        ]
    );
    let runs = s.runs(SERIAL).unwrap();
    assert_eq!(runs.len(), 4, "{runs:?}");
    assert_eq!(
        s.count_between(
            SERIAL,
            Seq {
                boot: 1,
                counter: 2
            },
            Seq {
                boot: 2,
                counter: 4
            }
        )
        .unwrap(),
        5
    );
}

/// The batcher commits when due, through any back end.
pub fn batcher_commits_when_due(s: &mut dyn RecordStore) {
    let mut b = Batcher::new(SERIAL);
    let t0 = std::time::Instant::now();
    b.push(reading(1, 0), Source::Stream, t0);
    b.push(reading(1, 1), Source::Log, t0);
    assert!(!b.due(t0 + std::time::Duration::from_millis(10)));
    assert!(b.due(t0 + BATCH_MAX_AGE));
    assert_eq!(b.deadline(), Some(t0 + BATCH_MAX_AGE));
    assert_eq!(b.flush(s).unwrap().inserted, 2);
    assert_eq!(b.pending(), 0);
    assert_eq!(b.deadline(), None);
    assert_eq!(s.reading_count(SERIAL).unwrap(), 2);
}

/// The chain head after a fixed set of records (every table, the record
/// clock fixed): the same hash in every back end.
pub const GOLDEN_HEAD: (u64, &str) = (
    8,
    "520eb10a7449a33241397eca1121d0bc6ee5accda38a86bfeb57596a1575583b",
);

/// Stores the fixed records of [`GOLDEN_HEAD`] and checks the head.
pub fn golden_chain(s: &mut dyn RecordStore) {
    s.set_record_clock(Some(1_796_025_600_000));
    s.ensure_device(&DeviceInfo {
        serial: SERIAL.into(),
        firmware: Some("0.1.0".into()),
        protocol: Some("1.1".into()),
        freqs_hz: Some([1e6, 20e6]),
    })
    .unwrap();
    let rs: Vec<Reading> = (0..3).map(|c| reading(1, c)).collect();
    s.insert_readings(SERIAL, &rs, Source::Stream).unwrap();
    s.insert_events(
        SERIAL,
        &[Event {
            number: 0,
            boot: 1,
            time_ms: 12,
            kind: EventKind::StorageRepaired,
        }],
    )
    .unwrap();
    s.insert_calibration(
        SERIAL,
        &NewCalibration {
            kind: CalKind::Cell,
            cal_id: CalId([1, 2, 3, 4]),
            slot: None,
            name: None,
            body: serde_json::json!({"operator": "R. Okafor"}),
            note: Some("bench".into()),
            supersedes: None,
        },
    )
    .unwrap();
    s.insert_lab_sample(
        SERIAL,
        &NewLabSample {
            sample_id: "G-0001".into(),
            taken_unix_ms: 1_700_000_000_100,
            product: None,
            lab_moisture_pct: 14.25,
            basis: "wet".into(),
            method: None,
            reading: Some(Seq {
                boot: 1,
                counter: 1,
            }),
            note: None,
            supersedes: None,
        },
    )
    .unwrap();
    s.insert_reference_check(
        SERIAL,
        1_700_000_000_200,
        &RefCheck {
            ratio: [1.001, 0.999],
            baseline: 1.0,
            ok: true,
        },
    )
    .unwrap();
    let (p, h) = s.chain_head().unwrap();
    assert_eq!((p, chain::hex(&h).as_str()), GOLDEN_HEAD);
    let report = verify_chain(s).unwrap();
    assert!(report.ok() && report.records == GOLDEN_HEAD.0, "{report:?}");
    assert!(!report
        .problems
        .iter()
        .any(|p| matches!(p, ChainProblem::HeadMismatch { .. })));
}

/// Every check above, each on a fresh store from `fresh`.
pub fn run_all(fresh: &mut dyn FnMut() -> Box<dyn RecordStore>) {
    readings_round_trip_exactly_and_never_twice(&mut *fresh());
    nan_and_negative_zero_keep_the_chain_valid(&mut *fresh());
    events_are_idempotent(&mut *fresh());
    calibrations_and_lab_samples_append_with_corrections(&mut *fresh());
    gaps_are_found_per_boot(&mut *fresh());
    batcher_commits_when_due(&mut *fresh());
    golden_chain(&mut *fresh());
}
