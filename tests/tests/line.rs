//! A sensor that runs a line by itself, against `fringe sim` over a
//! pseudo-terminal: the device measures and logs with no host attached;
//! `pull` stores all it holds (before, between and after what a database
//! has, never twice); a monitor sets an unset clock, and the readings taken
//! before are re-based onto wall-clock time and found by a report, the
//! drift data and an audit export over a wall-clock range; the device clock
//! and settings commands; times typed with and without an offset; a
//! calibration selected while the monitor runs.

use std::path::Path;
use std::time::{Duration, Instant};

use fringe_host::store::{CalKind, Source, Store};
use fringe_protocol::{AuthFailure, EventKind, Flags};
use fringe_tests::*;

const LIMIT: Duration = Duration::from_secs(120);

fn status_json(sim: &Sim) -> serde_json::Value {
    let o = run(
        &mut fringe(&["status", "--port", sim.port_str(), "--json"]),
        LIMIT,
    );
    assert_eq!(o.code, 0, "status: {}", o.stderr);
    serde_json::from_str(&o.stdout).expect("status --json")
}

/// Polls the device's status until its log holds at least `n` readings.
fn wait_for_log(sim: &Sim, n: u64) -> serde_json::Value {
    let deadline = Instant::now() + Duration::from_secs(90);
    loop {
        let s = status_json(sim);
        if s["log_len"].as_u64().unwrap_or(0) >= n {
            return s;
        }
        assert!(
            Instant::now() < deadline,
            "the device logged only {} readings in 90 s; sim log:\n{}",
            s["log_len"],
            sim.log()
        );
        std::thread::sleep(Duration::from_millis(100));
    }
}

fn key_file(sim: &Sim) -> String {
    let p = sim.path("device.key");
    std::fs::write(&p, format!("{TEST_KEY_HEX}\n")).expect("key file");
    p.to_str().expect("utf-8 path").to_string()
}

fn pull_json(sim: &Sim, db: &Path, extra: &[&str]) -> serde_json::Value {
    let mut args = vec!["--json"];
    args.extend_from_slice(extra);
    let o = run(&mut sim.pull(db, &args), LIMIT);
    assert_eq!(o.code, 0, "pull: {}", o.stderr);
    summary_line(&o.stdout)
}

#[test]
fn left_alone_the_device_logs_every_interval_and_pull_gets_the_whole_log() {
    let sim = Sim::start(&ScenarioSpec::clean("HGM-L2-0301", 41));
    // Nobody speaks to it but for its status: 100 ms intervals at 10x.
    let s = wait_for_log(&sim, 300);
    assert!(s["stream_period_ms"].is_null(), "nobody subscribed: {s}");
    assert!(
        sim.recorded().is_empty(),
        "nothing was sent: the readings are only in the device log"
    );
    let db = sim.path("empty.db");
    let p = pull_json(&sim, &db, &[]);
    assert_eq!(p["duplicates"], 0, "{p}");
    let stored = stored_readings(&db, "HGM-L2-0301");
    let n = assert_gapless(&stored, &sim.recorded(), "pull into an empty database");
    assert!(n as u64 >= 300, "{n}");
    assert_eq!(
        (stored[0].seq.boot, stored[0].seq.counter),
        (1, 0),
        "the whole log, from the first reading of the boot"
    );
    // A reading every 100 ms of device time, started on the interval and
    // timed when done. Every tenth reading carries the reference check,
    // whose acquisition (about 160 ms on the simulated board) outlasts a
    // 100 ms interval: the next reading starts late, when it is done (about
    // 53 ms of acquisition), and a slot overrun by a whole interval is
    // skipped, not caught up. (The
    // simulator runs on this machine's wall clock at 10x, so a busy machine
    // stretches single gaps; the exact schedule is `firmware/tests/schedule.rs`.)
    for w in stored.windows(2) {
        let dt = w[1].time_ms as i64 - w[0].time_ms as i64;
        assert!(
            // In order, never two stamped at once; the upper bound only
            // catches a stopped schedule (a loaded machine stretched one gap
            // to 1,095 ms). Two readings in one slot are the count check's
            // below: a gap alone cannot tell them, as each takes its own
            // acquisition (about 53 ms) either way, and on the wall clock a
            // busy machine shortened the gap after a reference check to
            // 29 ms once, where the schedule gives about 53.
            (1..=10_000).contains(&dt),
            "{} -> {}: {dt} ms",
            w[0].seq,
            w[1].seq
        );
    }
    // Never more readings than slots; at least half of them, as the
    // machine's load decides how many slots the simulator's wall clock
    // stretches (0.79 measured with a load average of 6.5 on 2 cores; the
    // exact count is `firmware/tests/schedule.rs`'s, on a virtual clock).
    // A reading is stamped when done: the first (with the reference check)
    // up to about an interval later in its slot than the last, so the span
    // counts up to one slot short; two readings in one slot would show as
    // about twice as many readings as slots. (Measured: 0.90-1.13 more
    // readings than the span's intervals in three runs beside two fuzzers;
    // a full test run there saw 310 over 308.5-309.)
    let slots = (stored[n - 1].time_ms - stored[0].time_ms) as f64 / 100.0 + 1.0;
    assert!(
        n as f64 >= 0.5 * slots && n as f64 <= slots + 2.0,
        "{n} readings in {slots:.1} intervals"
    );
}

#[test]
fn pull_into_a_database_with_the_middle_gets_both_ends_and_never_a_duplicate() {
    let sim = Sim::start(&ScenarioSpec::clean("HGM-L2-0302", 42));
    wait_for_log(&sim, 300);
    let full = sim.path("full.db");
    pull_json(&sim, &full, &[]);
    let all = stored_readings(&full, "HGM-L2-0302");
    assert!(all.len() >= 300);
    // A database that holds only the middle third, and a hole in it.
    let middle = sim.path("middle.db");
    {
        let mut st = Store::open(&middle).expect("db");
        let third = all.len() / 3;
        let mut part: Vec<_> = all[third..2 * third].to_vec();
        part.drain(10..20);
        st.insert_readings("HGM-L2-0302", &part, Source::Log)
            .expect("insert");
    }
    let before = stored_readings(&middle, "HGM-L2-0302").len();
    let p = pull_json(&sim, &middle, &[]);
    assert_eq!(
        p["duplicates"], 0,
        "the pull asked only for what was missing: {p}"
    );
    let after = stored_readings(&middle, "HGM-L2-0302");
    assert_eq!(
        after.len() - before,
        p["stored"].as_u64().unwrap() as usize,
        "{p}"
    );
    let n = assert_gapless(&after, &sim.recorded(), "pull into the middle");
    assert!(
        after[0].seq == all[0].seq && n >= all.len(),
        "both ends: first {} (log starts at {}), {n} readings against {}",
        after[0].seq,
        all[0].seq,
        all.len()
    );
    // Again: only what came since, still never a duplicate.
    let p = pull_json(&sim, &middle, &[]);
    assert_eq!(p["duplicates"], 0, "{p}");
    let store = Store::open_read_only(&middle).unwrap();
    assert!(store.verify_chain().unwrap().ok());
    assert_eq!(store.gaps("HGM-L2-0302").unwrap(), vec![]);
}

#[test]
fn monitor_sets_an_unset_clock_and_earlier_readings_are_rebased_and_found_by_wall_clock() {
    let t_start = fringe_host::store::now_unix_ms();
    let mut spec = ScenarioSpec::clean("HGM-L2-0303", 43);
    // Real time, so that device time since boot and wall-clock time agree.
    spec.time_scale = 1.0;
    spec.clock_unset = true;
    let sim = Sim::start(&spec);
    let s = wait_for_log(&sim, 20);
    assert_eq!(s["clock_set"], false, "{s}");
    let key = key_file(&sim);
    let db = sim.path("line2.db");
    let o = run(
        &mut sim.monitor(&db, &["--count", "20", "--json", "--key-file", &key]),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert!(
        o.stderr.contains("device clock was not set"),
        "{}",
        o.stderr
    );
    let t_end = fringe_host::store::now_unix_ms();
    let store = Store::open_read_only(&db).unwrap();
    // The correction is in the record: the device's ClockSet event.
    let sets: Vec<_> = store
        .events("HGM-L2-0303")
        .unwrap()
        .into_iter()
        .filter_map(|e| match e.kind {
            EventKind::ClockSet { old_ms, new_ms } => Some((old_ms, new_ms)),
            _ => None,
        })
        .collect();
    assert_eq!(sets.len(), 1, "{sets:?}");
    let (old_ms, new_ms) = sets[0];
    assert!(old_ms < 120_000, "set {old_ms} ms after boot");
    assert!((t_start..=t_end).contains(&(new_ms as i64)));
    let readings = store.readings("HGM-L2-0303").unwrap();
    let early: Vec<_> = readings
        .iter()
        .filter(|r| r.reading.flags.contains(Flags::CLOCK_UNSET))
        .collect();
    assert!(
        early.len() >= 20,
        "{} readings from before the clock was set",
        early.len()
    );
    for r in &early {
        assert!(r.rebased, "{} is marked re-based", r.reading.seq);
        let wall = r.wall_ms.expect("re-based time");
        // Taken between the simulator's start and the clock being set
        // (1 s of slack for the simulator's own start-up).
        assert!(
            wall >= t_start - 1000 && wall <= new_ms as i64,
            "{}: {wall} not in {t_start}..={new_ms}",
            r.reading.seq
        );
    }
    let late = readings
        .iter()
        .filter(|r| !r.reading.flags.contains(Flags::CLOCK_UNSET));
    for r in late {
        assert!(!r.rebased && r.wall_ms == Some(r.reading.time_ms as i64));
    }
    // The drift monitors' data places them by wall-clock time.
    let data = fringe_host::analysis::load(&store, Some("HGM-L2-0303")).unwrap();
    let placed = data
        .rows
        .iter()
        .filter(|r| r.rebased && r.clock_known && r.time_ms >= t_start - 1000)
        .count();
    assert_eq!(placed, early.len());
    // A report says how many were re-based.
    let out = sim.path("report");
    let o = run(
        &mut fringe(&[
            "report",
            "--db",
            db.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
        ]),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    let html = std::fs::read_to_string(out.join("index.html")).unwrap();
    assert!(html.contains("re-based onto wall-clock time"), "report");
    // An audit export over the wall-clock range of the early readings
    // holds them: typed as local times without an offset, in Berlin.
    let first = early[0].wall_ms.unwrap();
    let last = early[early.len() - 1].wall_ms.unwrap();
    let berlin = jiff::tz::TimeZone::get("Europe/Berlin").unwrap();
    let local = |ms: i64| {
        jiff::Timestamp::from_millisecond(ms)
            .unwrap()
            .to_zoned_datetime(berlin.clone())
            .strftime("%Y-%m-%d %H:%M:%S%.3f")
            .to_string()
    };
    let bundle = sim.path("audit");
    let o = run(
        fringe(&[
            "audit",
            "export",
            "--db",
            db.to_str().unwrap(),
            "--from",
            &local(first - 1),
            "--to",
            &local(last + 1),
            "--out",
            bundle.to_str().unwrap(),
            "--json",
        ])
        .env("TZ", "Europe/Berlin"),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    let m: serde_json::Value = serde_json::from_str(&o.stdout).expect("manifest json");
    let n = m["records"]["readings"].as_u64().unwrap_or(0);
    assert!(
        n >= early.len() as u64,
        "the export over {}..{} holds {n} readings, {} were taken then: {m}",
        local(first),
        local(last),
        early.len()
    );
    // Those readings keep their time since boot in the chain: the bundle
    // carries the boot's clock event and its CSV gives each the re-based
    // wall-clock time, never a date in 1970 (format 2).
    assert_eq!(m["format"], "fringe-audit-bundle/2");
    let csv = std::fs::read_to_string(bundle.join("readings.csv")).unwrap();
    assert!(!csv.contains(",1970-"), "{csv}");
    let mut rdr = csv::Reader::from_reader(csv.as_bytes());
    let h = rdr.headers().unwrap().clone();
    let col = |n: &str| h.iter().position(|c| c == n).unwrap();
    let dated = rdr
        .records()
        .map(Result::unwrap)
        .filter(|r| r[col("flag_words")].contains("clock_unset"))
        .filter(|r| r[col("time_utc")].starts_with("20"))
        .count();
    assert!(
        dated >= early.len(),
        "{dated} re-based readings dated: {csv}"
    );
    let clocks = std::fs::read_to_string(bundle.join("clocks_in_force.json")).unwrap();
    assert!(clocks.contains("clock_set"), "{clocks}");
    let o = run(
        &mut fringe(&[
            "audit",
            "verify",
            bundle.to_str().unwrap(),
            "--db",
            db.to_str().unwrap(),
        ]),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}{}", o.stdout, o.stderr);
}

/// `fringe device self-test` on the simulator, commissioned: every check
/// passes, twice (the second reads the flash record back), said per check;
/// on one without a cell calibration the reference is only checked to be
/// usable, and passes.
#[test]
fn device_self_test_says_each_check() {
    let bare = Sim::start(&ScenarioSpec::clean("HGM-L2-0306", 46));
    let o = run(
        &mut fringe(&["device", "self-test", "--port", bare.port_str()]),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}\n{}", o.stdout, o.stderr);
    assert!(
        o.stdout
            .lines()
            .any(|l| l.trim_start().starts_with("reference")
                && l.contains(" pass ")
                && l.contains("no reference value to compare")),
        "{}",
        o.stdout
    );
    let sim = Sim::start(&ScenarioSpec {
        tail: "[calibration]\ncell = \"simulator\"\nproduct = \"exact\"\n".into(),
        ..ScenarioSpec::clean("HGM-L2-0305", 45)
    });
    for _ in 0..2 {
        let o = run(
            &mut fringe(&["device", "self-test", "--port", sim.port_str()]),
            LIMIT,
        );
        assert_eq!(o.code, 0, "{}\n{}", o.stdout, o.stderr);
        for check in ["storage", "frontend", "temperature", "reference"] {
            assert!(
                o.stdout
                    .lines()
                    .any(|l| l.trim_start().starts_with(check) && l.contains(" pass ")),
                "{check}: {}",
                o.stdout
            );
        }
    }
}

#[test]
fn device_clock_shows_and_sets_the_clock() {
    let mut spec = ScenarioSpec::clean("HGM-L2-0304", 44);
    spec.time_scale = 1.0;
    spec.clock_unset = true;
    let sim = Sim::start(&spec);
    let o = run(
        &mut fringe(&["device", "clock", "--port", sim.port_str(), "--json"]),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    let v: serde_json::Value = serde_json::from_str(&o.stdout).unwrap();
    assert_eq!(v["clock_set"], false, "{v}");
    // Setting needs the key: a missing input, like a missing port (exit 3).
    let o = run(
        &mut fringe(&["device", "clock", "--port", sim.port_str(), "--set"]),
        LIMIT,
    );
    assert_fails(&o, 3, &["--key-file", "nothing sent"]);
    let key = key_file(&sim);
    let o = run(
        &mut fringe(&[
            "device",
            "clock",
            "--port",
            sim.port_str(),
            "--set",
            "--key-file",
            &key,
            "--json",
        ]),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    let v: serde_json::Value = serde_json::from_str(&o.stdout).unwrap();
    assert_eq!(v["clock_set"], true, "{v}");
    assert!(v["off_ms"].as_i64().unwrap().abs() < 1000, "{v}");
    // A given time, with an offset; shown in local time with its offset.
    let o = run(
        fringe(&[
            "device",
            "clock",
            "--port",
            sim.port_str(),
            "--key-file",
            &key,
            "--set-to",
            "2026-12-01T07:30:00+01:00",
        ])
        .env("TZ", "Europe/Berlin"),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert!(
        o.stdout.contains("set to     2026-12-01T07:30:00+01:00"),
        "{}",
        o.stdout
    );
    let o = run(
        &mut fringe(&["device", "clock", "--port", sim.port_str(), "--json"]),
        LIMIT,
    );
    let v: serde_json::Value = serde_json::from_str(&o.stdout).unwrap();
    let dev = v["device_unix_ms"].as_i64().unwrap();
    assert!(
        (1_796_106_600_000..1_796_106_660_000).contains(&dev),
        "the device runs on from 06:30Z: {v}"
    );
    // A bad time names the flag.
    let o = run(
        &mut fringe(&[
            "device",
            "clock",
            "--port",
            sim.port_str(),
            "--key-file",
            &key,
            "--set-to",
            "2026-13-01 07:30",
        ]),
        LIMIT,
    );
    assert_fails(&o, 2, &["--set-to", "2026-13-01 07:30", "RFC 3339"]);
}

fn config_show(sim: &Sim) -> serde_json::Value {
    let o = run(
        &mut fringe(&[
            "device",
            "config",
            "show",
            "--port",
            sim.port_str(),
            "--json",
        ]),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    serde_json::from_str(&o.stdout).unwrap()
}

/// `fringe device config set` on the simulator with key file `key`, the
/// operator R. Okafor, `reason` and `--yes`, then `extra`.
fn config_set(sim: &Sim, db: &Path, key: &str, reason: &str, extra: &[&str]) -> Outcome {
    let mut a = vec![
        "device",
        "config",
        "set",
        "--port",
        sim.port_str(),
        "--db",
        db.to_str().unwrap(),
        "--key-file",
        key,
        "--operator",
        "R. Okafor",
        "--reason",
        reason,
        "--yes",
    ];
    a.extend_from_slice(extra);
    run(&mut fringe(&a), LIMIT)
}

#[test]
fn each_device_setting_is_set_read_back_and_audited_and_a_wrong_key_changes_nothing() {
    let mut spec = ScenarioSpec::clean("HGM-L2-0305", 45);
    // Real time: the device clock (set at start) stays within a second of
    // this computer's, so no command needs to correct it (a correction
    // with the wrong key would be refused before the settings write).
    spec.time_scale = 1.0;
    let sim = Sim::start(&spec);
    let key = key_file(&sim);
    let db = sim.path("line2.db");
    let d = config_show(&sim);
    assert_eq!(d["interval_ms"], 100, "the scenario's interval: {d}");
    assert_eq!(
        (
            &d["span_low_pct"],
            &d["span_high_pct"],
            &d["fail"],
            &d["tag"]
        ),
        (
            &serde_json::json!(0.0),
            &serde_json::json!(30.0),
            &serde_json::json!("low"),
            &serde_json::json!("")
        ),
        "defaults: {d}"
    );
    let wrong = sim.path("wrong.key");
    std::fs::write(&wrong, "55".repeat(32)).unwrap();
    let cases: [(&[&str], &str, serde_json::Value); 7] = [
        (
            &["--tag", "L2-DRYER-MT-201"],
            "tag",
            serde_json::json!("L2-DRYER-MT-201"),
        ),
        (
            &["--interval-ms", "200"],
            "interval_ms",
            serde_json::json!(200),
        ),
        (
            &["--span-low-pct", "8"],
            "span_low_pct",
            serde_json::json!(8.0),
        ),
        (
            &["--span-high-pct", "22"],
            "span_high_pct",
            serde_json::json!(22.0),
        ),
        // A dry-basis span (green wood: water above the dry mass).
        (
            &["--span-high-pct", "180"],
            "span_high_pct",
            serde_json::json!(180.0),
        ),
        (&["--fail", "high"], "fail", serde_json::json!("high")),
        (
            &["--stale-timeout-ms", "60000"],
            "stale_timeout_ms",
            serde_json::json!(60000),
        ),
    ];
    for (i, (flags, field, want)) in cases.iter().enumerate() {
        let reason = format!("change {i}");
        let before = config_show(&sim);
        let o = config_set(&sim, &db, wrong.to_str().unwrap(), &reason, flags);
        assert_fails(&o, 16, &["auth"]);
        assert_eq!(
            config_show(&sim),
            before,
            "{field}: a wrong key changes nothing"
        );
        // The span above 100 % is pointed out (before the write is tried).
        assert_eq!(
            o.stderr.contains("the span reaches above 100 %"),
            flags.contains(&"180"),
            "{field}: {}",
            o.stderr
        );
        let o = config_set(&sim, &db, &key, &reason, &[flags, &["--json"][..]].concat());
        assert_eq!(o.code, 0, "{field}: {}", o.stderr);
        let now = config_show(&sim);
        assert_eq!(&now[*field], want, "{field} read back: {now}");
    }
    // The audit chain holds each change with who and why.
    let store = Store::open_read_only(&db).unwrap();
    let recs: Vec<_> = store
        .calibrations("HGM-L2-0305")
        .unwrap()
        .into_iter()
        .filter(|c| c.cal.kind == CalKind::Settings)
        .collect();
    assert_eq!(recs.len(), cases.len());
    for (i, r) in recs.iter().enumerate() {
        assert_eq!(r.cal.body["operator"], "R. Okafor");
        assert_eq!(r.cal.body["reason"], format!("change {i}"));
        assert_eq!(r.cal.body["action"], "settings");
        assert!(r.cal.body["previous"].is_object());
    }
    assert!(store.verify_chain().unwrap().ok());
    // The device logged each accepted write (and each refusal).
    pull_json(&sim, &db, &[]);
    let store = Store::open_read_only(&db).unwrap();
    let events = store.events("HGM-L2-0305").unwrap();
    let changed = events
        .iter()
        .filter(|e| matches!(e.kind, EventKind::SettingsChanged { .. }))
        .count();
    let refused = events
        .iter()
        .filter(|e| matches!(e.kind, EventKind::AuthFailed { .. }))
        .count();
    assert_eq!((changed, refused), (cases.len(), cases.len()));
    // A bad value is refused before anything is written, naming the flag.
    let bad = |flag: &str, value: &str| config_set(&sim, &db, &key, "test", &[flag, value]);
    let before = config_show(&sim);
    // A value out of its range is a usage error (exit 2, issue 16).
    let o = bad("--stale-timeout-ms", "300");
    assert_fails(&o, 2, &["--stale-timeout-ms 300", "twice the interval"]);
    let o = bad("--span-high-pct", "1200");
    assert_fails(&o, 2, &["--span-high-pct 1200", "<= 327.67 %"]);
    assert_eq!(config_show(&sim), before, "refused values change nothing");
}

/// A span above 100 % (a dry-basis calibration) goes only to firmware that
/// announces `WIDE_SPAN`: to firmware before it `config set` refuses by
/// name, as a usage error, before anything is written (the device, asked
/// directly, would answer a bare `OutOfRange`); a span within 100 % still
/// goes to it.
#[test]
fn a_span_above_100_pct_is_refused_by_name_to_firmware_without_it() {
    let sim = Sim::start(&ScenarioSpec {
        wide_span: false,
        time_scale: 1.0,
        ..ScenarioSpec::clean("HGM-L2-0309", 49)
    });
    let key = key_file(&sim);
    let db = sim.path("line2.db");
    let before = config_show(&sim);
    let o = config_set(&sim, &db, &key, "wet wood", &["--span-high-pct", "180"]);
    assert_fails(&o, 2, &["--span-high-pct 180", "HGM-L2-0309", "wide_span"]);
    assert_eq!(config_show(&sim), before, "nothing written");
    assert!(
        !db.exists() || {
            let store = Store::open_read_only(&db).unwrap();
            store
                .calibrations("HGM-L2-0309")
                .unwrap()
                .iter()
                .all(|c| c.cal.kind != CalKind::Settings)
        }
    );
    let o = config_set(
        &sim,
        &db,
        &key,
        "dryer rescaled",
        &["--span-high-pct", "60", "--json"],
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert_eq!(config_show(&sim)["span_high_pct"], serde_json::json!(60.0));
}

/// Guessing the key online is held off (protocol/WIRE.md, "Back-off after
/// failed writes"): wrong keys through `fringe device config set` until the
/// device holds writes off for at least 4 s; then even the right key is
/// refused, with the device's reason and what to do, and nothing changes;
/// once the hold is over the right key works. The stored events name each
/// failure and the hold.
#[test]
fn a_guessed_key_is_held_off_and_the_engineer_is_told_why() {
    let mut spec = ScenarioSpec::clean("HGM-L2-0307", 47);
    spec.time_scale = 1.0;
    let sim = Sim::start(&spec);
    let key = key_file(&sim);
    let db = sim.path("line2.db");
    let wrong = sim.path("wrong.key");
    std::fs::write(&wrong, "55".repeat(32)).unwrap();
    let set = |k: &str, tag: &str| config_set(&sim, &db, k, "test", &["--tag", tag]);
    let held_s = |stderr: &str| -> Option<u64> {
        let at = stderr.find("writes held off for ")? + "writes held off for ".len();
        stderr[at..].split(' ').next()?.parse().ok()
    };
    // Wrong keys as fast as the tool goes; during a hold, wait a little.
    let (mut checked, mut refused_held) = (0, 0);
    let deadline = Instant::now() + Duration::from_secs(120);
    loop {
        let o = set(wrong.to_str().unwrap(), "GUESS");
        assert_fails(&o, 16, &["the device refused"]);
        match held_s(&o.stderr) {
            Some(s) if checked >= 6 => {
                assert!((1..=4).contains(&s), "{}", o.stderr);
                assert!(o.stderr.contains("check the key file"), "{}", o.stderr);
                break;
            }
            Some(_) => {
                refused_held += 1;
                std::thread::sleep(Duration::from_millis(100));
            }
            None => {
                assert!(o.stderr.contains("does not verify"), "{}", o.stderr);
                checked += 1;
            }
        }
        assert!(checked <= 6, "a wrong key was checked during a hold");
        assert!(
            Instant::now() < deadline,
            "no 4 s hold after {checked} wrong keys"
        );
    }
    // Six checked failures: holds of 1, 2 and 4 s after the 4th, 5th and
    // 6th; a hold is seen after the 4th and 5th.
    assert!(
        refused_held >= 2,
        "refusals during the 1 s and 2 s holds: {refused_held}"
    );
    let o = set(&key, "L2-DRYER-MT-201");
    assert_fails(&o, 16, &["held off", "check the key file"]);
    assert_eq!(config_show(&sim)["tag"], "", "nothing changed");
    let deadline = Instant::now() + Duration::from_secs(120);
    loop {
        let o = set(&key, "L2-DRYER-MT-201");
        if o.code == 0 {
            break;
        }
        assert_fails(&o, 16, &["held off"]);
        assert!(Instant::now() < deadline, "still held off: {}", o.stderr);
        std::thread::sleep(Duration::from_millis(250));
    }
    assert_eq!(config_show(&sim)["tag"], "L2-DRYER-MT-201");
    pull_json(&sim, &db, &[]);
    let events = Store::open_read_only(&db)
        .unwrap()
        .events("HGM-L2-0307")
        .unwrap();
    let reasons: Vec<_> = events
        .iter()
        .filter_map(|e| match &e.kind {
            EventKind::AuthFailed { reason, .. } => Some(*reason),
            _ => None,
        })
        .collect();
    let bad = reasons
        .iter()
        .filter(|r| **r == AuthFailure::BadTag)
        .count();
    let held = reasons
        .iter()
        .filter(|r| **r == AuthFailure::Throttled)
        .count();
    assert!(bad >= 4 && held >= 1, "{reasons:?}");
    assert_eq!(bad + held, reasons.len(), "{reasons:?}");
}

#[test]
fn modbus_settings_are_set_on_the_simulator_read_back_and_audited() {
    let mut spec = ScenarioSpec::clean("HGM-L2-0306", 46);
    spec.time_scale = 1.0;
    let sim = Sim::start(&spec);
    let key = key_file(&sim);
    let db = sim.path("line2.db");
    let d = config_show(&sim);
    assert_eq!(
        (&d["modbus_unit"], &d["modbus_baud"], &d["modbus_parity"]),
        (
            &serde_json::json!(1),
            &serde_json::json!(19200),
            &serde_json::json!("even")
        ),
        "defaults: {d}"
    );
    let set = |k: &str, extra: &[&str], json: bool| {
        let json: &[&str] = if json { &["--json"] } else { &[] };
        config_set(
            &sim,
            &db,
            k,
            "second dryer on the segment",
            &[extra, json].concat(),
        )
    };
    let change = [
        "--modbus-unit",
        "12",
        "--modbus-baud",
        "38400",
        "--modbus-parity",
        "none",
    ];
    // A wrong key: refused by the device, nothing changed.
    let wrong = sim.path("wrong.key");
    std::fs::write(&wrong, "55".repeat(32)).unwrap();
    let o = set(wrong.to_str().unwrap(), &change, false);
    assert_fails(&o, 16, &["auth"]);
    assert_eq!(config_show(&sim), d, "a wrong key changes nothing");
    // Bad values: refused before anything is sent, naming flag and range.
    for (bad, needles) in [
        (
            &["--modbus-unit", "0"][..],
            &["--modbus-unit", "1..=247"][..],
        ),
        (&["--modbus-unit", "300"], &["--modbus-unit", "1..=247"]),
        (&["--modbus-baud", "14400"], &["--modbus-baud", "115200"]),
        (&["--modbus-parity", "mark"], &["--modbus-parity", "none"]),
    ] {
        let o = set(&key, bad, false);
        assert_fails(&o, 2, needles);
    }
    assert_eq!(config_show(&sim), d, "bad values change nothing");
    // The change, shown with the caution, then read back.
    let o = set(&key, &change, false);
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert!(o.stderr.contains("PLC"), "the caution: {}", o.stderr);
    assert!(
        o.stdout.contains("unit 12 at 38400 baud 8N2"),
        "{}",
        o.stdout
    );
    let now = config_show(&sim);
    assert_eq!(
        (
            &now["modbus_unit"],
            &now["modbus_baud"],
            &now["modbus_parity"]
        ),
        (
            &serde_json::json!(12),
            &serde_json::json!(38400),
            &serde_json::json!("none")
        ),
        "read back: {now}"
    );
    // The other settings kept theirs.
    assert_eq!(now["settings_id"], d["settings_id"]);
    // One field alone keeps the others.
    let o = set(&key, &["--modbus-parity", "odd"], true);
    assert_eq!(o.code, 0, "{}", o.stderr);
    let out: serde_json::Value = serde_json::from_str(&o.stdout).unwrap();
    assert_eq!(out["new"]["modbus_unit"], 12);
    assert_eq!(out["new"]["modbus_parity"], "odd");
    assert_eq!(out["old"]["modbus_parity"], "none");
    // The audit chain holds both changes with who, why and the before.
    let store = Store::open_read_only(&db).unwrap();
    let recs: Vec<_> = store
        .calibrations("HGM-L2-0306")
        .unwrap()
        .into_iter()
        .filter(|c| c.cal.kind == CalKind::Settings && c.cal.body["action"] == "modbus")
        .collect();
    assert_eq!(recs.len(), 2);
    assert_eq!(recs[0].cal.body["operator"], "R. Okafor");
    assert_eq!(recs[0].cal.body["reason"], "second dryer on the segment");
    assert_eq!(recs[0].cal.body["previous"]["unit_id"], 1);
    assert_eq!(recs[0].cal.body["calibration"]["unit_id"], 12);
    assert!(store.verify_chain().unwrap().ok());
    // The device logged each accepted write as ModbusChanged.
    pull_json(&sim, &db, &[]);
    let store = Store::open_read_only(&db).unwrap();
    let changed = store
        .events("HGM-L2-0306")
        .unwrap()
        .into_iter()
        .filter(|e| matches!(e.kind, EventKind::ModbusChanged { .. }))
        .count();
    assert_eq!(changed, 2);
}

#[test]
fn lab_times_with_offsets_and_local_times_and_bad_times_naming_the_field() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("lab.db");
    {
        let mut st = Store::open(&db).unwrap();
        st.ensure_device(&fringe_host::store::DeviceInfo {
            serial: "HGM-L2-0306".into(),
            ..Default::default()
        })
        .unwrap();
    }
    let add = |time: &str, id: &str| {
        let mut c = fringe(&[
            "lab",
            "add",
            "--db",
            db.to_str().unwrap(),
            "--time",
            time,
            "--moisture",
            "14.2",
            "--method",
            "oven 130 C 2 h",
            "--operator",
            "J. Lindqvist",
            "--sample-id",
            id,
            "--json",
        ]);
        c.env("TZ", "Europe/Berlin");
        run(&mut c, LIMIT)
    };
    for (time, id) in [
        ("2026-12-01 09:40", "G-1"),
        ("2026-12-01T09:40:00+01:00", "G-2"),
        ("2026-12-01T08:40Z", "G-3"),
        ("2026-12-01T03:40-05:00", "G-4"),
    ] {
        let o = add(time, id);
        assert_eq!(o.code, 0, "{time}: {}", o.stderr);
        let v: serde_json::Value = serde_json::from_str(&o.stdout).unwrap();
        assert_eq!(v["time_utc"], "2026-12-01T08:40:00Z", "{time}");
    }
    for bad in ["2026-12-01 25:40", "1 Dec 2026", "2026-12-01T09:40+1"] {
        let o = add(bad, "G-9");
        assert_fails(&o, 2, &["--time", bad, "RFC 3339", "local time"]);
    }
    // A lab add on this database with `args` after the common ones.
    let lab_add = |args: &[&str]| {
        let mut a = vec![
            "lab",
            "add",
            "--db",
            db.to_str().unwrap(),
            "--method",
            "oven 130 C 2 h",
            "--operator",
            "J. Lindqvist",
        ];
        a.extend_from_slice(args);
        run(&mut fringe(&a), LIMIT)
    };
    // The record position a refusal of a repeated sample id names.
    let named = |stderr: &str| -> String {
        stderr
            .split("--supersedes ")
            .nth(1)
            .unwrap_or_else(|| panic!("names the flag: {stderr}"))
            .chars()
            .take_while(char::is_ascii_digit)
            .collect()
    };
    // A mistyped serial is refused, not added to the chain as a device of
    // its own (after which every lab add without --serial was refused as
    // ambiguous).
    let o = lab_add(&[
        "--serial",
        "HGM-L2-0360",
        "--time",
        "2026-12-01T09:40Z",
        "--moisture",
        "14.2",
    ]);
    assert_fails(&o, 2, &["--serial HGM-L2-0360", "HGM-L2-0306"]);
    let o = add("2026-12-01T09:41Z", "G-10");
    assert_eq!(o.code, 0, "still one device: {}", o.stderr);
    // The same sample id again with another value: refused, naming the
    // record and the flag that corrects it; corrected with that flag.
    let g10 = |moisture: &str, extra: &[&str]| {
        let mut a = vec![
            "--time",
            "2026-12-01T09:41Z",
            "--sample-id",
            "G-10",
            "--moisture",
            moisture,
        ];
        a.extend_from_slice(extra);
        lab_add(&a)
    };
    let o = g10("14.9", &[]);
    assert_ne!(o.code, 0, "{}", o.stdout);
    let pos = named(&o.stderr);
    let o = g10("14.9", &["--supersedes", &pos]);
    assert_eq!(o.code, 0, "corrected: {}", o.stderr);
    // Entered a third time: the refusal names the correction, the newest
    // record of that id (before, the first, so a second correction of the
    // same first record left two in force).
    let o = g10("15.1", &[]);
    assert_ne!(o.code, 0);
    let newest = named(&o.stderr);
    assert!(
        newest.parse::<u64>().unwrap_or(0) > pos.parse::<u64>().unwrap_or(u64::MAX),
        "names {newest}, the first was {pos}: {}",
        o.stderr
    );
}

/// A product calibration selected on the device while `fringe monitor`
/// runs, one its database has no record of (written by a tool on another
/// link: the simulator's `[calibration.switch]`, at 60 s of device time,
/// 6 s of wall time), on a dry basis: the monitor asks the device for it,
/// says how it takes the line's alarm band (12 and 16.2 % wet are 13.64
/// and 19.33 % dry, M_db = 100 M_wb / (100 - M_wb)) and checks its
/// readings on the band's basis, the first of them too (held until the
/// basis is known: shown before, it was checked as written). The line
/// reads 14-16 % wet, 16.3-19.0 % dry on the simulator's dry calibration:
/// above the band's 16.2 % taken as written, inside it on its basis.
#[test]
fn a_calibration_selected_while_the_monitor_runs_is_asked_for_its_basis() {
    let sim = Sim::start(&ScenarioSpec {
        tail: "[calibration]\ncell = \"simulator\"\nproduct = \"exact\"\n\
               [calibration.switch]\nat_s = 60.0\nbasis = \"dry\"\n"
            .into(),
        ..ScenarioSpec::clean("HGM-L2-0230", seed(30))
    });
    let line = sim.path("line2.toml");
    std::fs::write(
        &line,
        "[alarm]\nmoisture_low_pct = 12.0\nmoisture_high_pct = 16.2\n",
    )
    .unwrap();
    let o = run(
        sim.monitor(&sim.path("line2.db"), &["--count", "1200", "--json"])
            .env("FRINGE_CONFIG", &line),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    let readings: Vec<serde_json::Value> = o
        .stdout
        .lines()
        .filter_map(|l| serde_json::from_str(l).ok())
        .filter(|v: &serde_json::Value| v["type"] == "reading" && v["moisture_pct"].is_number())
        .collect();
    let first_dry = readings
        .iter()
        .position(|v| v["moisture_basis"] == "dry")
        .unwrap_or_else(|| panic!("no reading on a dry basis:\n{}\n{}", o.stdout, o.stderr));
    // Wet up to the switch (so the monitor ran before it), dry after it,
    // every reading on a known basis.
    assert!(
        first_dry > 0,
        "the switch came before the monitor: {}",
        o.stderr
    );
    for v in &readings[..first_dry] {
        assert_eq!(v["moisture_basis"], "wet", "{v}");
    }
    for v in &readings[first_dry..] {
        assert_eq!(v["moisture_basis"], "dry", "{v}");
        let m = v["moisture_pct"].as_f64().unwrap_or(f64::NAN);
        assert!(m > 16.2 && m < 19.33, "{v}");
        assert_eq!(v["alarms"], serde_json::json!([]), "{v}\n{}", o.stderr);
    }
    assert!(
        o.stderr.contains(
            "alarm limits written on a wet basis, the device reports on a dry one: moisture band 12.00..16.20 % taken as 13.64..19.33 %"
        ),
        "{}",
        o.stderr
    );
    // The scenario commissioned the device and selected the second product
    // calibration, none of it through this database: the monitor recorded
    // each as found (the cell and the first at start, the second with the
    // first reading that carried it), so an audit bundle of its readings
    // shows them all and names none as without a record.
    let bundle = sim.path("bundle");
    let o = run(
        &mut fringe(&[
            "audit",
            "export",
            "--db",
            sim.path("line2.db").to_str().unwrap(),
            "--out",
            bundle.to_str().unwrap(),
            // The simulated clock runs ten times as fast as the wall's.
            "--to",
            "2099-01-01T00:00Z",
            "--json",
        ]),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    let m: serde_json::Value = serde_json::from_str(o.stdout.trim()).unwrap();
    let ids = m["calibrations_without_record"]
        .as_array()
        .cloned()
        .unwrap_or_default();
    assert_eq!(ids.len(), 0, "every calibration recorded as found: {m}");
    let o = run(
        &mut fringe(&[
            "cal",
            "history",
            "--db",
            sim.path("line2.db").to_str().unwrap(),
            "--json",
        ]),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    let h: serde_json::Value = serde_json::from_str(o.stdout.trim()).unwrap();
    let observed: Vec<(String, String)> = h["records"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|r| r["action"] == "observed")
        .map(|r| {
            (
                r["kind"].as_str().unwrap().into(),
                r["old_id"].as_str().unwrap().into(),
            )
        })
        .collect();
    assert_eq!(
        observed,
        [
            ("cell".to_string(), "unknown".to_string()),
            ("product".into(), "unknown".into()),
            ("product".into(), "unknown".into())
        ],
        "{h}"
    );
}
