//! `fringe export`: the bulk export of readings, events and lab samples as
//! CSV and JSON Lines, on a database built here with readings whose values
//! are known (two devices; a boot whose first readings were taken before
//! its clock was set and then re-based by its clock event; a boot whose
//! clock was never set; a reading without a moisture value; a temperature
//! the device could not measure).
//!
//! The CSV is read back with the `csv` crate (RFC 4180, the format the
//! file claims) and the JSON Lines with `serde_json`; every value is
//! compared with what was stored, at the precision of its column
//! (`host/quality/src/numbers.rs`), and no file holds `NaN` or `inf`.

use std::collections::BTreeMap;
use std::path::Path;

use fringe_host::store::{CalKind, NewCalibration, NewLabSample, Source, Store};
use fringe_protocol::{CalId, ChannelValue, Event, EventKind, Flags, Reading, ResetCause, Seq};
use fringe_tests::*;
use serde_json::Value;

const LIMIT: std::time::Duration = std::time::Duration::from_secs(60);

/// 2026-11-30T06:00:00Z, ms.
const T0: i64 = 1_796_018_400_000;

fn reading(boot: u32, counter: u32, time_ms: u64, clock_unset: bool) -> Reading {
    let ch = |k: f32| ChannelValue {
        g_s: 1.25e-6 * k,
        b_s: 2.5e-4 * k,
        eps_re: 6.5 + 0.125 * k,
        eps_im: 0.8125,
    };
    let mut flags = Flags::empty();
    if clock_unset {
        flags |= Flags::CLOCK_UNSET;
    }
    Reading {
        seq: Seq { boot, counter },
        time_ms,
        channels: [ch(1.0), ch(2.0)],
        temperature_c: 21.37,
        // Steps of 0.01 %, as the wire carries them.
        moisture_pct: Some(14.0 + counter as f32 * 0.01),
        uncertainty_pct: 0.312,
        flags,
        cell_cal: CalId([0x0a, 0x0b, 0x0c, 0x0d]),
        product_cal: CalId([0x51, 0x52, 0x53, 0x54]),
    }
}

/// The database of the module comment; the readings stored, by device.
fn build(db: &Path) -> BTreeMap<String, Vec<Reading>> {
    let mut s = Store::open(db).expect("database");
    let mut all = BTreeMap::new();

    // PX-A, boot 1: 5 readings at 1 s since boot (clock not set), then the
    // clock set at 5.5 s since boot to T0 + 5.5 s, then 20 readings on the
    // wall clock. One without moisture (not calibrated), one whose
    // temperature sensor failed (NaN, stored as NULL).
    let mut a: Vec<Reading> = (0..5)
        .map(|c| reading(1, c, 1_000 * (u64::from(c) + 1), true))
        .collect();
    for c in 5..25 {
        let mut r = reading(1, c, (T0 + 1_000 * (i64::from(c) + 1)) as u64, false);
        if c == 7 {
            r.moisture_pct = None;
            r.flags |= Flags::NOT_CALIBRATED;
        }
        if c == 8 {
            r.temperature_c = f32::NAN;
            r.flags |= Flags::TEMP_SENSOR_FAULT;
        }
        a.push(r);
    }
    // Boot 2: 3 readings whose clock was never set (no clock event).
    for c in 0..3 {
        a.push(reading(2, c, 1_000 * (u64::from(c) + 1), true));
    }
    s.insert_readings("PX-A", &a, Source::Stream)
        .expect("readings A");
    let events = [
        Event {
            number: 1,
            boot: 1,
            time_ms: 10,
            kind: EventKind::Boot {
                reset_cause: ResetCause::PowerOn,
            },
        },
        Event {
            number: 2,
            boot: 1,
            // Logged after the clock was set, as the firmware does.
            time_ms: (T0 + 5_500) as u64,
            kind: EventKind::ClockSet {
                old_ms: 5_500,
                new_ms: (T0 + 5_500) as u64,
            },
        },
        Event {
            number: 3,
            boot: 2,
            time_ms: 10,
            kind: EventKind::Boot {
                reset_cause: ResetCause::Watchdog,
            },
        },
    ];
    s.insert_events("PX-A", &events).expect("events A");
    s.insert_lab_sample(
        "PX-A",
        &NewLabSample {
            sample_id: "G-0412".into(),
            taken_unix_ms: T0 + 12_000,
            product: Some("feed pellets, line 3".into()),
            lab_moisture_pct: 14.2,
            basis: "wet".into(),
            // Text a spreadsheet would take for a formula (made up).
            method: Some("=HYPERLINK(\"http://example.invalid\",\"oven\")".into()),
            reading: Some(Seq {
                boot: 1,
                counter: 11,
            }),
            note: None,
            supersedes: None,
        },
    )
    .expect("lab sample");
    all.insert("PX-A".to_string(), a);

    // PX-B: 10 readings on the wall clock, a log read-back.
    let b: Vec<Reading> = (0..10)
        .map(|c| reading(4, c, (T0 + 500 + 2_000 * i64::from(c)) as u64, false))
        .collect();
    s.insert_readings("PX-B", &b, Source::Log)
        .expect("readings B");
    // PX-B's product calibration (the readings' 51525354) on a dry basis,
    // as `cal push` records it; PX-A has no record of its own.
    s.insert_calibration(
        "PX-B",
        &NewCalibration {
            kind: CalKind::Product,
            cal_id: CalId(*b"QRST"),
            slot: Some(0),
            name: Some("spruce chips".into()),
            body: serde_json::json!({
                "calibration": {"basis": "Dry"},
                "action": "push",
                "old_id": "00000000",
                "new_id": "51525354",
            }),
            note: None,
            supersedes: None,
        },
    )
    .expect("calibration B");
    all.insert("PX-B".to_string(), b);
    all
}

fn s(p: &Path) -> &str {
    p.to_str().expect("utf-8 path")
}

/// The wall-clock time the export must give a stored reading.
fn wall(r: &Reading) -> Option<i64> {
    if !r.flags.contains(Flags::CLOCK_UNSET) {
        Some(r.time_ms as i64)
    } else if r.seq.boot == 1 {
        // Boot 1's origin: T0 + 5.5 s - 5.5 s.
        Some(T0 + r.time_ms as i64)
    } else {
        None
    }
}

fn csv_rows(path: &Path) -> (Vec<String>, Vec<BTreeMap<String, String>>) {
    let text = std::fs::read_to_string(path).expect("export file");
    for bad in ["NaN", "nan", "inf"] {
        assert!(!text.contains(bad), "{bad} in {}:\n{text}", path.display());
    }
    let mut r = csv::Reader::from_reader(text.as_bytes());
    let header: Vec<String> = r
        .headers()
        .expect("header")
        .iter()
        .map(String::from)
        .collect();
    let rows = r
        .records()
        .map(|rec| {
            let rec = rec.expect("CSV record");
            header
                .iter()
                .cloned()
                .zip(rec.iter().map(String::from))
                .collect()
        })
        .collect();
    (header, rows)
}

#[test]
fn every_reading_comes_out_once_with_the_values_stored() {
    let t = tempfile::tempdir().expect("temp dir");
    let db = t.path().join("line3.db");
    let stored = build(&db);
    let out = t.path().join("all.csv");
    let o = run(
        &mut fringe(&["--utc", "export", "--db", s(&db), "--out", s(&out)]),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert!(o.stdout.contains("exported 38 readings"), "{}", o.stdout);
    let (header, rows) = csv_rows(&out);
    assert_eq!(header[..4], ["serial", "boot", "counter", "time"]);
    assert_eq!(rows.len(), 38);
    let mut seen = std::collections::BTreeSet::new();
    for row in &rows {
        let serial = &row["serial"];
        let (boot, counter): (u32, u32) = (
            row["boot"].parse().expect("boot"),
            row["counter"].parse().expect("counter"),
        );
        assert!(
            seen.insert((serial.clone(), boot, counter)),
            "twice: {row:?}"
        );
        let r = stored[serial]
            .iter()
            .find(|r| r.seq.boot == boot && r.seq.counter == counter)
            .unwrap_or_else(|| panic!("not stored: {row:?}"));
        let w = wall(r);
        assert_eq!(
            row["time_unix_ms"],
            w.map(|t| t.to_string()).unwrap_or_default(),
            "{row:?}"
        );
        // --utc: the person's time is UTC, to the second.
        let want_time = w.map(|t| {
            jiff::Timestamp::from_millisecond(t - t.rem_euclid(1000))
                .expect("time")
                .strftime("%Y-%m-%dT%H:%M:%SZ")
                .to_string()
        });
        assert_eq!(row["time"], want_time.unwrap_or_default(), "{row:?}");
        assert_eq!(
            row["rebased"],
            (r.flags.contains(Flags::CLOCK_UNSET) && w.is_some()).to_string()
        );
        // Moisture and uncertainty to 0.01 %, empty without a value.
        assert_eq!(
            row["moisture_pct"],
            r.moisture_pct
                .map(|m| format!("{m:.2}"))
                .unwrap_or_default()
        );
        assert_eq!(
            row["uncertainty_pct"],
            if r.moisture_pct.is_some() { "0.31" } else { "" }
        );
        assert_eq!(
            row["temperature_c"],
            if r.temperature_c.is_nan() {
                ""
            } else {
                "21.37"
            }
        );
        // Permittivities to 4 significant digits (6.625 and 6.75 are exact).
        assert_eq!(row["eps1_re"], "6.625");
        assert_eq!(row["eps2_re"], "6.750");
        assert_eq!(row["eps1_im"], "0.8125");
        assert_eq!(
            row["flags"],
            r.flags.names().collect::<Vec<_>>().join("|"),
            "{row:?}"
        );
        assert_eq!(row["product_cal_id"], "51525354");
        // The basis from the record of the reading's calibration, where
        // the database has one.
        assert_eq!(
            row["moisture_basis"],
            if serial == "PX-B" { "dry" } else { "" },
            "{row:?}"
        );
        assert_eq!(row["cell_cal_id"], "0a0b0c0d");
        assert_eq!(
            row["source"],
            if serial == "PX-A" { "stream" } else { "log" }
        );
    }
}

#[test]
fn a_range_and_a_device_select_by_wall_clock_time() {
    let t = tempfile::tempdir().expect("temp dir");
    let db = t.path().join("line3.db");
    let stored = build(&db);
    // From T0 + 3 s to T0 + 10 s: PX-A's re-based readings 2..=4 (at
    // T0 + 3, 4, 5 s) and wall-clock ones 5..=9 (T0 + 6 .. 10 s); its
    // boot-2 readings have no time and are counted as left out.
    let from = "2026-11-30T06:00:03Z";
    let to = "2026-11-30T07:00:10+01:00";
    let out = t.path().join("a.jsonl");
    let o = run(
        &mut fringe(&[
            "export",
            "--db",
            s(&db),
            "--device",
            "PX-A",
            "--from",
            from,
            "--to",
            to,
            "--out",
            s(&out),
            "--json",
        ]),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    let sum: Value = serde_json::from_str(o.stdout.trim()).expect("summary");
    assert_eq!(sum["rows"], 8, "{sum}");
    assert_eq!(sum["format"], "jsonl", "from the extension");
    assert_eq!(sum["untimed_left_out"], 3);
    assert_eq!(sum["per_device"], serde_json::json!({"PX-A": 8}));
    assert_eq!(sum["first_utc"], "2026-11-30T06:00:03Z");
    assert_eq!(sum["last_utc"], "2026-11-30T06:00:10Z");
    let text = std::fs::read_to_string(&out).expect("export");
    let lines: Vec<Value> = text
        .lines()
        .map(|l| serde_json::from_str(l).expect("one JSON object per line"))
        .collect();
    let counters: Vec<u64> = lines
        .iter()
        .map(|v| v["counter"].as_u64().expect("counter"))
        .collect();
    assert_eq!(counters, [2, 3, 4, 5, 6, 7, 8, 9]);
    for v in &lines {
        let r = stored["PX-A"]
            .iter()
            .find(|r| {
                r.seq.boot == 1 && u64::from(r.seq.counter) == v["counter"].as_u64().unwrap_or(99)
            })
            .expect("stored");
        // The same digits as the CSV, as JSON numbers or null.
        match r.moisture_pct {
            Some(m) => assert_eq!(v["moisture_pct"].as_f64(), format!("{m:.2}").parse().ok()),
            None => assert_eq!(v["moisture_pct"], Value::Null),
        }
        if r.temperature_c.is_nan() {
            assert_eq!(v["temperature_c"], Value::Null);
        } else {
            assert_eq!(v["temperature_c"].as_f64(), Some(21.37));
        }
        assert_eq!(v["time_unix_ms"].as_i64(), wall(r));
    }
    assert!(!out.with_file_name("a.jsonl.partial").exists());

    // The same range of both devices to stdout, as CSV: PX-B's readings at
    // T0 + 0.5, 2.5, ... s within it are those at 4.5, 6.5, 8.5 and 10.5
    // s: a --to given to the second includes that second, shown as
    // 06:00:10 in the export (before, the reading at 10.5 s was left out).
    let o = run(
        &mut fringe(&["export", "--db", s(&db), "--from", from, "--to", to]),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert_eq!(o.stdout.lines().count(), 1 + 8 + 4, "{}", o.stdout);
    assert!(o.stderr.contains("exported 12 readings"), "{}", o.stderr);
    assert!(
        o.stdout.contains("PX-B,4,5,2026-11-30T06:00:10+00:00"),
        "{}",
        o.stdout
    );
    assert!(
        o.stderr.contains("3 readings without a wall-clock time"),
        "{}",
        o.stderr
    );
}

#[test]
fn events_and_lab_samples_with_their_times() {
    let t = tempfile::tempdir().expect("temp dir");
    let db = t.path().join("line3.db");
    build(&db);
    let o = run(
        &mut fringe(&[
            "export",
            "--db",
            s(&db),
            "--what",
            "events",
            "--format",
            "jsonl",
        ]),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    let ev: Vec<Value> = o
        .stdout
        .lines()
        .map(|l| serde_json::from_str(l).expect("JSON"))
        .collect();
    assert_eq!(ev.len(), 3);
    // The boot event before the clock was set: re-based to T0 + 10 ms.
    assert_eq!(ev[0]["kind"], "boot");
    assert_eq!(ev[0]["time_unix_ms"].as_i64(), Some(T0 + 10));
    assert_eq!(ev[0]["rebased"], true);
    assert_eq!(ev[1]["kind"], "clock_set");
    assert_eq!(ev[1]["time_unix_ms"].as_i64(), Some(T0 + 5_500));
    assert_eq!(ev[1]["rebased"], false);
    // Boot 2 never had its clock set.
    assert_eq!(ev[2]["time_unix_ms"], Value::Null);
    assert!(
        ev[2]["detail"].as_str().unwrap_or("").contains("Watchdog"),
        "{}",
        ev[2]
    );

    let out = t.path().join("lab.csv");
    let o = run(
        &mut fringe(&["export", "--db", s(&db), "--what", "lab", "--out", s(&out)]),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    let (_, rows) = csv_rows(&out);
    assert_eq!(rows.len(), 1);
    let r = &rows[0];
    assert_eq!(r["sample_id"], "G-0412");
    // As entered (`numbers`: a lab value keeps the digits the lab gave).
    assert_eq!(r["lab_moisture_pct"], "14.2");
    assert_eq!(r["time_unix_ms"], (T0 + 12_000).to_string());
    assert_eq!(r["matched_counter"], "11");
    assert_eq!(r["note"], "");
    assert_eq!(r["product"], "feed pellets, line 3");
    // Text a spreadsheet would evaluate is written as text in the CSV, and
    // as stored in JSON Lines.
    assert_eq!(
        r["method"],
        "'=HYPERLINK(\"http://example.invalid\",\"oven\")"
    );
    let o = run(
        &mut fringe(&[
            "export",
            "--db",
            s(&db),
            "--what",
            "lab",
            "--format",
            "jsonl",
        ]),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    let lab: Value = serde_json::from_str(o.stdout.trim()).expect("JSON");
    assert_eq!(
        lab["method"],
        "=HYPERLINK(\"http://example.invalid\",\"oven\")"
    );
}

#[test]
fn refusals_name_the_value_and_leave_nothing_behind() {
    let t = tempfile::tempdir().expect("temp dir");
    let db = t.path().join("line3.db");
    build(&db);
    let out = t.path().join("x.csv");
    // A device the database does not hold: named, with those it holds.
    let o = run(
        &mut fringe(&[
            "export",
            "--db",
            s(&db),
            "--device",
            "PX-Z",
            "--out",
            s(&out),
        ]),
        LIMIT,
    );
    assert_ne!(o.code, 0);
    for needle in ["PX-Z", "PX-A, PX-B"] {
        assert!(o.stderr.contains(needle), "{needle}: {}", o.stderr);
    }
    // A swapped range.
    let o = run(
        &mut fringe(&[
            "export",
            "--db",
            s(&db),
            "--from",
            "2026-12-02",
            "--to",
            "2026-12-01",
            "--out",
            s(&out),
        ]),
        LIMIT,
    );
    assert_fails(&o, 2, &["--from", "--to"]);
    // An existing file is left as it was.
    std::fs::write(&out, "the shift's own notes\n").expect("write");
    let o = run(
        &mut fringe(&["export", "--db", s(&db), "--out", s(&out)]),
        LIMIT,
    );
    assert_fails(&o, 2, &[s(&out), "never overwritten"]);
    assert_eq!(
        std::fs::read_to_string(&out).expect("read"),
        "the shift's own notes\n"
    );
    // Nothing else was left in the folder (no partial file).
    let mut names: Vec<String> = std::fs::read_dir(t.path())
        .expect("dir")
        .map(|e| e.expect("entry").file_name().to_string_lossy().into_owned())
        .filter(|n| !n.starts_with("line3.db"))
        .collect();
    names.sort();
    assert_eq!(names, ["x.csv"]);
}

/// A device named twice among others (`--device A --device B --device A`)
/// is exported once: dedup removed only neighbouring names, and A's rows
/// were written and counted twice (found by review).
#[test]
fn a_device_named_twice_is_exported_once() {
    let t = tempfile::tempdir().expect("temp dir");
    let db = t.path().join("line3.db");
    build(&db);
    let export = |name: &str, devices: &[&str]| {
        let out = t.path().join(name);
        let mut args = vec!["export", "--db", s(&db), "--out", s(&out), "--json"];
        for d in devices {
            args.extend(["--device", d]);
        }
        let o = run(&mut fringe(&args), LIMIT);
        assert_eq!(o.code, 0, "{}", o.stderr);
        let sum: Value = serde_json::from_str(o.stdout.trim()).expect("summary");
        (sum, std::fs::read_to_string(&out).expect("export"))
    };
    let (once, rows_once) = export("once.jsonl", &["PX-A", "PX-B"]);
    let (twice, rows_twice) = export("twice.jsonl", &["PX-A", "PX-B", "PX-A"]);
    assert_eq!(twice["rows"], once["rows"], "{twice}");
    assert_eq!(twice["per_device"], once["per_device"], "{twice}");
    assert_eq!(rows_twice, rows_once);
}
