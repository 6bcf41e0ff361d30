//! `fringe gateway` end to end: the real binary with a site file in a temp
//! folder. Simulated devices in the gateway's process (`sim:`) for the
//! Modbus and SIGTERM tests; `fringe sim` children on pseudo-terminals
//! (serial ports to the gateway) for the SIGKILL test, since a device must
//! outlive the gateway that is killed to be read back from its log.
//!
//! The pymodbus test needs `FRINGE_PYTHON` (the venv `cargo xtask test`
//! makes, its `python` part) and fails loudly without it; it is ignored in
//! a plain `cargo test`.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::Duration;

use fringe_protocol::Reading;
use fringe_tests::{
    assert_fails, assert_gapless, committed_readings, fringe, poll_until, run, stored_readings,
    workspace_root, ScenarioSpec, Sim, DEADLINE, TEST_KEY_HEX,
};
use serde_json::Value;

const LIMIT: Duration = Duration::from_secs(120);

const SERIALS: [&str; 3] = ["GWT-A-0001", "GWT-B-0002", "GWT-C-0003"];

/// A calibrated scenario for a `sim:` device (one reading every 100 ms of
/// wall time, so the tests do not wait long).
fn sim_scenario(serial: &str, seed: u64, moisture: f64) -> String {
    format!(
        "name = \"Brackenridge Feed Mill (test)\"\n\
         moisture_pct = [[0, {moisture}]]\ntemperature_c = [[0, 22.0]]\n\
         [device]\nserial = \"{serial}\"\nkey = \"{TEST_KEY_HEX}\"\nseed = {seed}\ninterval_ms = 100\n\
         [product]\nname = \"wheat\"\n\
         [calibration]\ncell = \"simulator\"\nproduct = \"exact\"\n"
    )
}

/// The file at `path` rewritten by `f`.
fn edit(path: &Path, f: impl FnOnce(&str) -> String) {
    let text = std::fs::read_to_string(path).expect("read");
    std::fs::write(path, f(&text)).expect("write");
}

/// A site folder with three `sim:` devices (units 1, 2, 3), Modbus TCP on
/// a free port of 127.0.0.1 (port 0: the gateway says which).
fn sim_site() -> (tempfile::TempDir, PathBuf, PathBuf) {
    let dir = tempfile::tempdir().expect("dir");
    let mut devices = String::new();
    for (i, s) in SERIALS.iter().enumerate() {
        let file = format!("dev{i}.toml");
        std::fs::write(
            dir.path().join(&file),
            sim_scenario(s, 11 + i as u64, 11.0 + 1.5 * i as f64),
        )
        .expect("scenario");
        devices.push_str(&format!(
            "[[device]]\nunit = {}\nport = \"sim:{file}\"\ntag = \"test {i}\"\n\n",
            i + 1
        ));
    }
    let site = dir.path().join("site.toml");
    std::fs::write(
        &site,
        format!(
            "name = \"test site\"\nstore = \"site.db\"\nstatus_every_s = 0.5\n\n[modbus]\nlisten = \"127.0.0.1:0\"\n\n{devices}"
        ),
    )
    .expect("site");
    let db = dir.path().join("site.db");
    (dir, site, db)
}

/// A running gateway with its stderr in a file.
struct Running {
    child: Child,
    err: PathBuf,
}

impl Running {
    fn start(site: &Path, dir: &Path, name: &str) -> Self {
        let err = dir.join(format!("{name}.err"));
        let child = fringe(&["gateway", "--config", site.to_str().unwrap(), "--json"])
            .stdout(std::fs::File::create(dir.join(format!("{name}.out"))).expect("out"))
            .stderr(std::fs::File::create(&err).expect("err"))
            .spawn()
            .expect("start fringe gateway");
        Self { child, err }
    }

    fn stderr(&self) -> String {
        std::fs::read_to_string(&self.err).unwrap_or_default()
    }

    /// The Modbus TCP address it says it listens on.
    fn modbus_addr(&self) -> String {
        let mut addr = None;
        poll_until(
            DEADLINE,
            || {
                format!(
                    "the gateway never said its Modbus address:\n{}",
                    self.stderr()
                )
            },
            || {
                addr = self
                    .stderr()
                    .split("Modbus TCP on ")
                    .nth(1)
                    .and_then(|r| r.split_whitespace().next().map(str::to_string));
                addr.is_some()
            },
        );
        addr.unwrap_or_default()
    }

    fn signal(&self, sig: &str) {
        let ok = Command::new("kill")
            .args([sig, &self.child.id().to_string()])
            .status()
            .expect("kill");
        assert!(ok.success());
    }

    fn wait(mut self) -> (i32, String) {
        let mut code = None;
        let err = self.err.clone();
        poll_until(
            LIMIT,
            || {
                format!(
                    "the gateway did not stop:\n{}",
                    std::fs::read_to_string(&err).unwrap_or_default()
                )
            },
            || {
                code = self
                    .child
                    .try_wait()
                    .expect("wait")
                    .map(|s| s.code().unwrap_or(-1));
                code.is_some()
            },
        );
        (code.unwrap_or(-1), self.stderr())
    }
}

impl Drop for Running {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

#[test]
fn a_bad_site_file_names_file_line_and_field_and_writes_nothing() {
    let (dir, site, db) = sim_site();
    let text = std::fs::read_to_string(&site).expect("site");
    for (bad, needles) in [
        (
            text.replace("unit = 3", "unit = 2"),
            vec![
                "site.toml:",
                "device[2].unit = 2",
                "already the unit of device[1]",
            ],
        ),
        (
            text.replace("unit = 3", "unit = 300"),
            vec!["site.toml:", "device[2].unit = 300", "1..=247"],
        ),
        (
            text.replace("listen = \"127.0.0.1:0\"", "listen = \"everywhere\""),
            vec!["site.toml:6: modbus.listen"],
        ),
        (
            text.replace("tag = \"test 0\"", "colour = \"red\""),
            vec!["site.toml:11:", "colour"],
        ),
        (
            text.replace(
                "tag = \"test 1\"\n",
                "tag = \"test 1\"\n[device.alarm]\nmoisture_low_pct = 14.0\nmoisture_high_pct = 12.0\n",
            ),
            vec![
                "site.toml:",
                "device[1].alarm.moisture_low_pct = 14",
                "must be below device[1].alarm.moisture_high_pct",
            ],
        ),
    ] {
        std::fs::write(&site, &bad).expect("write");
        let o = run(
            &mut fringe(&["gateway", "--config", site.to_str().unwrap()]),
            LIMIT,
        );
        assert_fails(&o, 3, &needles);
        assert!(!db.exists(), "a store was created for a bad site file");
        assert!(
            std::fs::read_dir(dir.path()).expect("dir").all(|e| !e
                .expect("entry")
                .file_name()
                .to_string_lossy()
                .contains(".db")),
            "nothing written"
        );
    }
    // A scenario file that cannot be used is named with the site line.
    std::fs::write(&site, text.replace("sim:dev1.toml", "sim:missing.toml")).expect("write");
    let o = run(
        &mut fringe(&["gateway", "--config", site.to_str().unwrap()]),
        LIMIT,
    );
    assert_fails(&o, 3, &["site.toml:", "missing.toml"]);
    assert!(!db.exists());
}

#[test]
fn sigterm_commits_every_device_and_exits_0() {
    let (dir, site, db) = sim_site();
    let gw = Running::start(&site, dir.path(), "gw");
    poll_until(
        DEADLINE,
        || format!("no readings arrived:\n{}", gw.stderr()),
        || SERIALS.iter().all(|s| committed_readings(&db, s) >= 10),
    );
    gw.signal("-TERM");
    let (code, err) = gw.wait();
    assert_eq!(code, 0, "{err}");
    let out = std::fs::read_to_string(dir.path().join("gw.out")).expect("out");
    let summary: Value = out
        .lines()
        .filter_map(|l| serde_json::from_str::<Value>(l).ok())
        .find(|v| v["type"] == "summary")
        .unwrap_or_else(|| panic!("no summary line:\n{out}"));
    let mut total = 0;
    for (i, s) in SERIALS.iter().enumerate() {
        let stored = stored_readings(&db, s);
        let d = &summary["devices"][i];
        assert_eq!(d["serial"], *s, "{summary}");
        // Everything streamed was committed before the exit: the store
        // holds as many readings as the session stored, gapless, each with
        // a moisture value (the devices are calibrated).
        assert_eq!(d["stored"].as_u64(), Some(stored.len() as u64), "{summary}");
        for w in stored.windows(2) {
            assert_eq!(w[1].seq.counter, w[0].seq.counter + 1, "{s}: gap");
        }
        assert!(stored.iter().all(|r| r.moisture_pct.is_some()), "{s}");
        total += stored.len() as u64;
    }
    assert_eq!(summary["committed"].as_u64(), Some(total));
    assert!(
        err.contains(&format!("stopped; {total} readings committed")),
        "{err}"
    );
    // Status lines were JSON objects, one per line.
    assert!(
        out.lines()
            .filter_map(|l| serde_json::from_str::<Value>(l).ok())
            .any(|v| v["type"] == "status" && v["state"] == "streaming"),
        "{out}"
    );
}

/// Three `fringe sim` devices on pseudo-terminals; the gateway is killed
/// (SIGKILL: no commit) while they stream, the devices go on logging, a
/// new gateway starts: every reading the devices sent or logged is in the
/// store exactly once and the hash chain verifies.
#[test]
fn after_sigkill_a_restart_backfills_every_reading_exactly_once() {
    let seed = fringe_tests::seed(7);
    let sims: Vec<Sim> = SERIALS
        .iter()
        .enumerate()
        .map(|(i, s)| Sim::start(&ScenarioSpec::clean(s, seed + i as u64)))
        .collect();
    let dir = tempfile::tempdir().expect("dir");
    let db = dir.path().join("site.db");
    let mut devices = String::new();
    for (i, s) in sims.iter().enumerate() {
        devices.push_str(&format!(
            "[[device]]\nunit = {}\nport = \"{}\"\n\n",
            i + 1,
            s.port_str()
        ));
    }
    let site = dir.path().join("site.toml");
    std::fs::write(&site, format!("store = \"site.db\"\n\n{devices}")).expect("site");
    let gw = Running::start(&site, dir.path(), "first");
    poll_until(
        DEADLINE,
        || format!("seed {seed}: no readings:\n{}", gw.stderr()),
        || SERIALS.iter().all(|s| committed_readings(&db, s) >= 30),
    );
    gw.signal("-KILL");
    let (code, _) = gw.wait();
    assert_eq!(code, -1, "killed by the signal");
    let before: Vec<usize> = SERIALS.iter().map(|s| committed_readings(&db, s)).collect();
    // The devices keep measuring with no host (100 readings a second of
    // wall time): what they take until the restart has answered is only in
    // their logs, as is the batch the kill lost.
    let gw = Running::start(&site, dir.path(), "second");
    // The restart reads back what the first lost and what came meanwhile.
    poll_until(
        DEADLINE,
        || {
            format!(
                "seed {seed}: the restart did not catch up:\n{}",
                gw.stderr()
            )
        },
        || {
            SERIALS
                .iter()
                .zip(&before)
                .all(|(s, n)| committed_readings(&db, s) >= n + 50)
        },
    );
    gw.signal("-TERM");
    let (code, err) = gw.wait();
    assert_eq!(code, 0, "seed {seed}: {err}");
    assert!(err.contains("readings from the device log stored"), "{err}");
    for (s, sim) in SERIALS.iter().zip(&sims) {
        let stored: Vec<Reading> = stored_readings(&db, s);
        let n = assert_gapless(&stored, &sim.recorded(), &format!("seed {seed}, {s}"));
        assert!(n >= 80, "seed {seed}, {s}: {n}");
    }
    let o = run(
        &mut fringe(&["audit", "verify", "--db", db.to_str().unwrap(), "--json"]),
        LIMIT,
    );
    assert_eq!(
        o.code, 0,
        "seed {seed}: audit verify: {}{}",
        o.stdout, o.stderr
    );
}

fn python() -> PathBuf {
    PathBuf::from(std::env::var_os("FRINGE_PYTHON").unwrap_or_else(|| {
        panic!("FRINGE_PYTHON is not set: run `cargo xtask test`, which makes the venv")
    }))
}

/// pymodbus (a client no one here wrote) reads every unit of a running
/// gateway; each unit's registers are the reading of its counter in the
/// store.
#[test]
#[ignore = "needs FRINGE_PYTHON (the venv): `cargo xtask test` runs it"]
fn pymodbus_reads_every_unit_of_a_running_gateway_as_stored() {
    let py = python();
    let (dir, site, db) = sim_site();
    let gw = Running::start(&site, dir.path(), "gw");
    let addr = gw.modbus_addr();
    let (host, port) = addr.rsplit_once(':').expect("host:port");
    poll_until(
        DEADLINE,
        || format!("no readings arrived:\n{}", gw.stderr()),
        || SERIALS.iter().all(|s| committed_readings(&db, s) >= 3),
    );
    let out = Command::new(&py)
        .arg(workspace_root().join("tests/python/modbus_read.py"))
        .args([host, port, "1", "2", "3"])
        .stderr(Stdio::inherit())
        .output()
        .expect("run modbus_read.py");
    assert!(out.status.success(), "modbus_read.py failed");
    let v: Value = serde_json::from_slice(&out.stdout).expect("json");
    for (i, s) in SERIALS.iter().enumerate() {
        let u = &v["units"][(i + 1).to_string()];
        assert!(u.get("error").is_none(), "unit {}: {u}", i + 1);
        let counter = u["counter"].as_u64().expect("counter") as u32;
        let boot = u["boot"].as_u64().expect("boot") as u32;
        // The reading the registers show is committed within a batch.
        let mut found = None;
        poll_until(
            DEADLINE,
            || format!("{s}: reading {boot}.{counter} never committed"),
            || {
                found = stored_readings(&db, s)
                    .into_iter()
                    .find(|r| r.seq.counter == counter && r.seq.boot == boot);
                found.is_some()
            },
        );
        let r = found.expect("found");
        let m = r.moisture_pct.expect("calibrated");
        assert_eq!(u["moisture_pct"].as_f64(), Some(f64::from(m)), "{s}: {u}");
        assert_eq!(
            u["uncertainty_pct"].as_f64(),
            Some(f64::from(r.uncertainty_pct)),
            "{s}"
        );
        assert_eq!(
            u["temperature_c"].as_f64(),
            Some(f64::from(r.temperature_c)),
            "{s}"
        );
        assert_eq!(
            u["scaled_moisture"].as_i64(),
            Some((f64::from(m) * 100.0).round() as i64),
            "{s}: {u}"
        );
        assert_eq!(
            u["known_value"].as_f64().map(|x| x as f32),
            Some(fringe_registers::KNOWN),
            "{s}: word order"
        );
    }
    assert_eq!(v["past_end_exception"], 2, "{v}");
    assert_eq!(v["unknown_unit_exception"], 11, "{v}");
    gw.signal("-TERM");
    let (code, err) = gw.wait();
    assert_eq!(code, 0, "{err}");
}

/// Alarm limits of the site file: the site's `[alarm]` for every device,
/// a device's own `[device.alarm]` instead; a limit newly broken is said
/// (stderr), the status lines carry the limits each device's latest reading
/// breaks. The three devices read 11.0, 12.5 and 14.0 % (their scenarios).
#[test]
fn alarm_limits_of_the_site_file_mark_each_device() {
    let (dir, site, _db) = sim_site();
    let text = std::fs::read_to_string(&site).expect("site");
    let text = text
        .replacen(
            "[[device]]",
            "[alarm]\nmoisture_high_pct = 13.0\n\n[[device]]",
            1,
        )
        .replace(
            "tag = \"test 0\"\n",
            "tag = \"test 0\"\n[device.alarm]\nmoisture_low_pct = 11.5\n",
        );
    std::fs::write(&site, text).expect("site");
    let (units, err) = run_until_each_device_reads(&site, dir.path());
    let alarms: Vec<Value> = units.iter().map(|v| v["alarms"].clone()).collect();
    assert_eq!(
        alarms,
        [
            serde_json::json!(["LOW"]),
            serde_json::json!([]),
            serde_json::json!(["HIGH"])
        ],
        "{err}"
    );
    assert!(err.contains("LOW ALARM: moisture "), "{err}");
    assert!(err.contains("% below the low limit 11.50 %"), "{err}");
    assert!(err.contains("% above the high limit 13.00 %"), "{err}");
    // Each said once, when first broken (the readings stay outside).
    assert_eq!(err.matches("HIGH ALARM").count(), 1, "{err}");
}

/// A device whose calibration reports on a dry basis, under a site band
/// written on a wet one: its readings are converted to the band's basis
/// before they are checked (M_wb = 100 M_db / (100 + M_db)), the gateway
/// says how it takes the band, and its status lines, like the others',
/// carry the basis of their moisture. The devices read 11.0, 12.5 and 14.0
/// % wet; the first reports 12.34 % dry (the simulator's dry-basis
/// calibration: 11 + 11^2/100 + 11^3/10^4, within 0.02 % of 100 x 11 / 89
/// = 12.36), which is 10.99 % wet: inside a high limit of 11.8 % wet that
/// 12.34 taken as written would break. The second device's own band is
/// on a dry basis (high 14 %): its 12.5 % wet is 14.29 % dry (100 x 12.5 /
/// 87.5), HIGH, said on the band's basis with the reading as it came.
#[test]
fn a_dry_basis_device_is_checked_against_a_wet_band_on_the_bands_basis() {
    let (dir, site, _db) = sim_site();
    edit(&dir.path().join("dev0.toml"), |s| {
        s.replace(
            "product = \"exact\"\n",
            "product = \"exact\"\nbasis = \"dry\"\n",
        )
    });
    edit(&site, |s| {
        s.replacen(
            "[[device]]",
            "[alarm]\nmoisture_high_pct = 11.8\n\n[[device]]",
            1,
        )
        .replace(
            "tag = \"test 1\"\n",
            "tag = \"test 1\"\n[device.alarm]\nbasis = \"dry\"\nmoisture_high_pct = 14.0\n",
        )
    });
    let (units, err) = run_until_each_device_reads(&site, dir.path());
    let bases: Vec<&Value> = units.iter().map(|v| &v["moisture_basis"]).collect();
    assert_eq!(bases, ["dry", "wet", "wet"], "{err}");
    let m0 = units[0]["moisture_pct"].as_f64().unwrap_or(f64::NAN);
    assert!((m0 - 12.34).abs() < 0.3, "{m0}: {err}");
    let alarms: Vec<Value> = units.iter().map(|v| v["alarms"].clone()).collect();
    assert_eq!(
        alarms,
        [
            serde_json::json!([]),
            serde_json::json!(["HIGH"]),
            serde_json::json!(["HIGH"])
        ],
        "{err}"
    );
    // 11.8 % wet is 100 x 11.8 / 88.2 = 13.38 % dry.
    assert!(
        err.contains(
            "alarm limits written on a wet basis, the device reports on a dry one: moisture band --..11.80 % taken as --..13.38 %"
        ),
        "{err}"
    );
    // 14 % dry is 100 x 14 / 114 = 12.28 % wet.
    assert!(
        err.contains(
            "alarm limits written on a dry basis, the device reports on a wet one: moisture band --..14.00 % taken as --..12.28 %"
        ),
        "{err}"
    );
    assert!(
        err.contains("HIGH ALARM: moisture 14.")
            && err.contains("% dry basis above the high limit 14.00 % dry basis (the reading: 12.")
            && err.contains("% wet basis)"),
        "{err}"
    );
}

/// A product calibration selected on a device while the gateway runs,
/// one the store has no record of (written by a tool on another link: the
/// simulator's `[calibration.switch]`), on a dry basis: its first readings
/// are held from the alarm check while the gateway asks the device for the
/// calibration, then checked on the site band's basis. The first device
/// reads 11.0 % wet, 12.34 % dry on the simulator's dry calibration (see
/// the test above): above the band's high limit of 11.8 % taken as
/// written, inside it taken on the band's basis (13.38 % dry). Status
/// lines say wet before the change and dry after it.
#[test]
fn a_calibration_selected_while_the_gateway_runs_is_asked_for_its_basis() {
    let (dir, site, _db) = sim_site();
    edit(&dir.path().join("dev0.toml"), |s| {
        format!("{s}[calibration.switch]\nat_s = 15.0\nbasis = \"dry\"\n")
    });
    edit(&site, |s| {
        s.replacen(
            "[[device]]",
            "[alarm]\nmoisture_high_pct = 11.8\n\n[[device]]",
            1,
        )
    });
    let gw = Running::start(&site, dir.path(), "gw");
    let out = dir.path().join("gw.out");
    // Unit 1's status lines with a reading: (basis, moisture, alarms).
    let unit1 = || -> Vec<(Value, f64, Value)> {
        std::fs::read_to_string(&out)
            .unwrap_or_default()
            .lines()
            .filter_map(|l| serde_json::from_str::<Value>(l).ok())
            .filter(|v| v["type"] == "status" && v["unit"] == 1 && v["moisture_pct"].is_number())
            .map(|v| {
                (
                    v["moisture_basis"].clone(),
                    v["moisture_pct"].as_f64().unwrap_or(f64::NAN),
                    v["alarms"].clone(),
                )
            })
            .collect()
    };
    poll_until(
        DEADLINE,
        || format!("unit 1 never reported on a dry basis:\n{}", gw.stderr()),
        || unit1().iter().filter(|l| l.0 == "dry").count() >= 3,
    );
    gw.signal("-TERM");
    let (code, err) = gw.wait();
    assert_eq!(code, 0, "{err}");
    let lines = unit1();
    let first_dry = lines.iter().position(|l| l.0 == "dry").expect("dry");
    assert!(
        lines[..first_dry]
            .iter()
            .all(|l| l.0 == "wet" || l.0.is_null()),
        "{lines:?}"
    );
    assert_eq!(lines[0].0, "wet", "{lines:?}");
    for (basis, m, alarms) in &lines[first_dry..] {
        assert_eq!(basis, "dry", "{lines:?}");
        assert!((m - 12.34).abs() < 0.3, "{m}: {lines:?}");
        assert_eq!(alarms, &serde_json::json!([]), "{lines:?}\n{err}");
    }
    // Units 2 and 3 (12.5 and 14.0 % wet) are above the band; unit 1
    // never is.
    assert!(
        !err.lines()
            .any(|l| l.contains("unit 1 ") && l.contains("ALARM")),
        "{err}"
    );
    assert!(err.contains("unit 3 GWT-C-0003: HIGH ALARM"), "{err}");
    // Said when the basis was learned, as at connect for a device on the
    // other basis.
    assert!(
        err.contains(
            "alarm limits written on a wet basis, the device reports on a dry one: moisture band --..11.80 % taken as --..13.38 %"
        ),
        "{err}"
    );
}

/// Runs the gateway of `site` (`--json`, its output in `dir`) until a
/// status line with a reading has come for each of the three devices,
/// then stops it with SIGTERM (exit 0): each unit's latest such line, in
/// unit order, and its stderr.
fn run_until_each_device_reads(site: &Path, dir: &Path) -> (Vec<Value>, String) {
    let gw = Running::start(site, dir, "gw");
    let out = dir.join("gw.out");
    let latest = || -> Vec<Value> {
        let text = std::fs::read_to_string(&out).unwrap_or_default();
        let mut by_unit: BTreeMap<u64, Value> = BTreeMap::new();
        for v in text
            .lines()
            .filter_map(|l| serde_json::from_str::<Value>(l).ok())
            .filter(|v| v["type"] == "status" && v["moisture_pct"].is_number())
        {
            by_unit.insert(v["unit"].as_u64().unwrap_or(0), v);
        }
        by_unit.into_values().collect()
    };
    poll_until(
        DEADLINE,
        || {
            format!(
                "no status line with a reading for each device:\n{}",
                gw.stderr()
            )
        },
        || latest().len() == 3,
    );
    gw.signal("-TERM");
    let (code, err) = gw.wait();
    assert_eq!(code, 0, "{err}");
    (latest(), err)
}
