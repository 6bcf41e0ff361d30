//! One JSON habit (issue 16): every reporting command run with `--json`
//! on the simulator and on the demo's files, each line of its output
//! validated against the schema docs/JSON.md gives for it (the schemas are
//! read from the document itself, so the two cannot part).

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};
use std::time::Duration;

use fringe_tests::*;
use serde_json::Value;

const LIMIT: Duration = Duration::from_secs(120);
const PROMPT: Duration = Duration::from_secs(30);
const ENTER: &str = "press Enter when done";

/// The schemas of docs/JSON.md: every fenced block opened with
/// ```` ```json schema=NAME ````, by NAME.
fn schemas() -> BTreeMap<String, Value> {
    let doc = std::fs::read_to_string(workspace_root().join("docs/JSON.md")).expect("docs/JSON.md");
    let mut out = BTreeMap::new();
    let mut lines = doc.lines();
    while let Some(l) = lines.next() {
        let Some(name) = l.trim().strip_prefix("```json schema=") else {
            continue;
        };
        let body: Vec<&str> = lines.by_ref().take_while(|l| l.trim() != "```").collect();
        let v: Value = serde_json::from_str(&body.join("\n"))
            .unwrap_or_else(|e| panic!("docs/JSON.md schema {name}: {e}"));
        jsonschema::validator_for(&v).unwrap_or_else(|e| panic!("schema {name}: {e}"));
        assert!(
            out.insert(name.to_string(), v).is_none(),
            "schema {name} twice"
        );
    }
    assert!(out.len() >= 20, "{:?}", out.keys());
    out
}

struct Checker {
    schemas: BTreeMap<String, Value>,
    used: BTreeSet<String>,
}

impl Checker {
    /// Validates every line of `o`'s stdout (the command `cmd` ran with
    /// `--json` and succeeded): one JSON object per line, checked against
    /// the schema `cmd`, or `cmd TYPE` for lines with a `type` field.
    fn check(&mut self, cmd: &str, o: &Outcome) -> Vec<Value> {
        assert_eq!(o.code, 0, "{cmd}: {}", o.stderr);
        let mut out = Vec::new();
        for (i, line) in o.stdout.lines().enumerate() {
            let v: Value = serde_json::from_str(line).unwrap_or_else(|e| {
                panic!("{cmd} line {}: not one JSON value ({e}): {line}", i + 1)
            });
            assert!(v.is_object(), "{cmd} line {}: not an object: {line}", i + 1);
            let name = match v.get("type").and_then(Value::as_str) {
                Some(t) => format!("{cmd} {t}"),
                None => cmd.to_string(),
            };
            let schema = self
                .schemas
                .get(&name)
                .unwrap_or_else(|| panic!("docs/JSON.md has no schema {name}; the line: {line}"));
            let validator = jsonschema::validator_for(schema).expect("schema");
            let errors: Vec<String> = validator
                .iter_errors(&v)
                .map(|e| format!("{} at {}", e, e.instance_path()))
                .collect();
            assert!(errors.is_empty(), "{name}: {errors:#?}\nline: {line}");
            self.used.insert(name);
            out.push(v);
        }
        assert!(!out.is_empty(), "{cmd} printed no JSON");
        out
    }
}

fn s(p: &Path) -> &str {
    p.to_str().expect("utf-8 path")
}

#[test]
fn every_command_prints_json_lines_that_match_docs_json_md() {
    let mut c = Checker {
        schemas: schemas(),
        used: BTreeSet::new(),
    };
    let tmp = tempfile::tempdir().expect("temp dir");
    let t = |name: &str| -> PathBuf { tmp.path().join(name) };

    // Files: the demo's.
    let demo = t("demo");
    let o = run(&mut fringe(&["demo", "--short", "--out", s(&demo)]), LIMIT);
    assert_eq!(o.code, 0, "demo: {}", o.stderr);
    let db = demo.join("line2.db");
    let cal = demo.join("hm-wheat-l2.toml");
    let samples = demo.join("reference-samples.csv");
    c.check(
        "cal fit",
        &run(
            &mut fringe(&[
                "cal",
                "fit",
                "--samples",
                s(&samples),
                "--model",
                "single",
                "--out",
                s(&t("fit.toml")),
                "--force",
                "--json",
            ]),
            LIMIT,
        ),
    );
    c.check(
        "cal fit",
        &run(
            &mut fringe(&[
                "cal",
                "fit",
                "--samples",
                s(&samples),
                "--model",
                "compare",
                "--bulk-density-kg-m3",
                "760",
                "--particle-density-kg-m3",
                "1400",
                "--out",
                s(&t("compare.toml")),
                "--json",
            ]),
            LIMIT,
        ),
    );
    c.check(
        "cal predict",
        &run(
            &mut fringe(&[
                "cal",
                "predict",
                "--cal",
                s(&cal),
                "--input",
                s(&samples),
                "--json",
            ]),
            LIMIT,
        ),
    );
    c.check(
        "cal adjust",
        &run(
            &mut fringe(&[
                "cal",
                "adjust",
                "--cal",
                s(&cal),
                "--db",
                s(&db),
                "--out",
                s(&t("adj.toml")),
                "--json",
            ]),
            LIMIT,
        ),
    );
    c.check(
        "cal history",
        &run(
            &mut fringe(&["cal", "history", "--db", s(&db), "--json"]),
            LIMIT,
        ),
    );
    c.check(
        "drift",
        &run(&mut fringe(&["drift", "--db", s(&db), "--json"]), LIMIT),
    );
    c.check(
        "report",
        &run(
            &mut fringe(&["report", "--db", s(&db), "--out", s(&t("report")), "--json"]),
            LIMIT,
        ),
    );
    let bundle = t("bundle");
    c.check(
        "audit export",
        &run(
            &mut fringe(&[
                "audit",
                "export",
                "--db",
                s(&db),
                "--out",
                s(&bundle),
                "--json",
            ]),
            LIMIT,
        ),
    );
    c.check(
        "audit verify",
        &run(
            &mut fringe(&["audit", "verify", s(&bundle), "--db", s(&db), "--json"]),
            LIMIT,
        ),
    );
    // `lab add` of a result at 06:30 on the demo line, with `extra` flags.
    let lab_add = |moisture: &str, extra: &[&str]| {
        let mut a = vec![
            "lab",
            "add",
            "--db",
            s(&db),
            "--time",
            "2026-12-01T06:30Z",
            "--moisture",
            moisture,
            "--method",
            "oven 130 C 2 h",
            "--operator",
            "T. Json (test)",
            "--json",
        ];
        a.extend_from_slice(extra);
        run(&mut fringe(&a), LIMIT)
    };
    let lab = c.check("lab add", &lab_add("14.6", &[]));
    assert!(lab[0]["matched_reading"]["counter"].is_u64(), "{}", lab[0]);
    // No float noise from a device value widened to f64 (issue 16).
    for k in ["inline_moisture_pct", "residual_pct"] {
        let text = lab[0][k].to_string();
        let decimals = text.split_once('.').map_or(0, |(_, d)| d.len());
        assert!(decimals <= 4, "{k}: {text}");
    }
    // The same lab result entered on a dry basis (14.6 % wet basis is
    // 17.096 % dry: 14.6 / 85.4): it is compared on the wet basis of the
    // reading's calibration, so lab - inline is the same.
    let dry = c.check(
        "lab add",
        &lab_add("17.096", &["--basis", "dry", "--sample-id", "LAB-DRY-0630"]),
    );
    let on_wet = dry[0]["lab_moisture_pct_on_reading_basis"]
        .as_f64()
        .unwrap_or(f64::NAN);
    let (r_wet, r_dry) = (
        lab[0]["residual_pct"].as_f64().unwrap_or(f64::NAN),
        dry[0]["residual_pct"].as_f64().unwrap_or(f64::NAN),
    );
    assert!(
        (on_wet - 14.6).abs() < 0.001 && (r_dry - r_wet).abs() < 0.002,
        "{} / {}",
        lab[0],
        dry[0]
    );

    // The simulator itself, for a second.
    let spec = ScenarioSpec::clean("HGM-L2-0601", seed(61));
    let scenario = t("scenario.toml");
    std::fs::write(&scenario, spec.toml()).expect("scenario");
    let lines = c.check(
        "sim",
        &run(
            &mut fringe(&[
                "sim",
                "--scenario",
                s(&scenario),
                "--duration-s",
                "1",
                "--json",
            ]),
            LIMIT,
        ),
    );
    assert_eq!(lines.first().and_then(|v| v["type"].as_str()), Some("port"));
    assert_eq!(
        lines.last().and_then(|v| v["type"].as_str()),
        Some("stopped")
    );

    // A device: a simulated one.
    let sim = Sim::start(&ScenarioSpec::clean("HGM-L2-0602", seed(62)));
    let key = sim.path("device.key");
    std::fs::write(&key, format!("{TEST_KEY_HEX}\n")).expect("key file");
    let dev_db = sim.path("line.db");
    let port = sim.port_str().to_string();
    let dev = |args: &[&str]| {
        let mut a = args.to_vec();
        a.extend(["--port", &port, "--json"]);
        run(&mut fringe(&a), LIMIT)
    };
    c.check("identify", &dev(&["identify"]));
    let st = c.check("status", &dev(&["status"]));
    assert!(
        st[0]["next_seq"]["boot"].is_u64() && st[0]["next_seq"]["counter"].is_u64(),
        "{}",
        st[0]
    );
    c.check("device clock", &dev(&["device", "clock"]));
    c.check(
        "device clock",
        &dev(&["device", "clock", "--set", "--key-file", s(&key)]),
    );
    c.check(
        "device density",
        &dev(&["device", "density", "--key-file", s(&key), "--kg-m3", "730"]),
    );
    // No calibration there yet: the density is held and said to be unused.
    let o = dev(&["device", "density", "--key-file", s(&key), "--kg-m3", "731"]);
    let v = c.check("device density", &o);
    assert_eq!(v[0]["used_by_active_calibration"], false, "{}", v[0]);
    assert!(
        o.stderr.contains("no product calibration is active"),
        "{}",
        o.stderr
    );
    c.check("device config show", &dev(&["device", "config", "show"]));
    let st = c.check("device self-test", &dev(&["device", "self-test"]));
    assert_eq!(st[0]["ok"], true, "{}", st[0]);
    let set = |tag: &str| {
        dev(&[
            "device",
            "config",
            "set",
            "--key-file",
            s(&key),
            "--db",
            s(&dev_db),
            "--tag",
            tag,
            "--operator",
            "T. Json (test)",
            "--reason",
            "schema test",
            "--yes",
        ])
    };
    let o = set("L2-JSON");
    let v = c.check("device config set", &o);
    assert_eq!(v[0]["changed"], true, "{}", v[0]);
    // What changes and the caution on stderr with --json too (found by
    // review: they were printed only without it).
    assert!(
        o.stderr.contains("-> ") && o.stderr.contains("L2-JSON") && o.stderr.contains("CAUTION"),
        "{}",
        o.stderr
    );
    // Nothing to change: still JSON on stdout.
    let v = c.check("device config set", &set("L2-JSON"));
    assert_eq!(v[0]["changed"], false, "{}", v[0]);
    assert_eq!(v[0]["position"], 0, "{}", v[0]);

    // Bench work, through its prompts (on stderr; stdout is JSON only).
    sim.set_bench("air");
    let mut cell = Interactive::spawn(&mut fringe(&[
        "cal",
        "cell",
        "--port",
        &port,
        "--key-file",
        s(&key),
        "--db",
        s(&dev_db),
        "--operator",
        "T. Json (test)",
        "--readings",
        "4",
        "--yes",
        "--json",
    ]));
    for (i, m) in ["air", "methanol", "ethanol", "air"].iter().enumerate() {
        cell.expect(ENTER, i + 1, PROMPT);
        sim.set_bench(m);
        cell.send("");
    }
    c.check("cal cell", &cell.finish(LIMIT));
    sim.set_bench("line");
    let lab_csv = sim.path("lab.csv");
    let mut cap = Interactive::spawn(&mut fringe(&[
        "cal",
        "capture",
        "--port",
        &port,
        "--out",
        s(&lab_csv),
        "--readings",
        "2",
        "--json",
    ]));
    cap.expect("sample id", 1, PROMPT);
    cap.send("HGM-J01");
    cap.expect("lab moisture", 1, PROMPT);
    cap.send("14.25");
    cap.expect(ENTER, 1, PROMPT);
    cap.send("");
    cap.expect("sample id", 2, PROMPT);
    cap.send("");
    let v = c.check("cal capture", &cap.finish(LIMIT));
    assert_eq!(v[0]["samples"], 1);

    c.check(
        "cal push",
        &dev(&[
            "cal",
            "push",
            "--key-file",
            s(&key),
            "--db",
            s(&dev_db),
            "--cal",
            s(&cal),
            "--operator",
            "T. Json (test)",
            "--reason",
            "schema test",
            "--yes",
        ]),
    );
    c.check("cal list", &dev(&["cal", "list"]));
    c.check(
        "cal select",
        &dev(&[
            "cal",
            "select",
            "0",
            "--key-file",
            s(&key),
            "--db",
            s(&dev_db),
            "--operator",
            "T. Json (test)",
            "--reason",
            "schema test",
            "--yes",
        ]),
    );

    let lines = c.check(
        "monitor",
        &run(
            &mut sim.monitor(&dev_db, &["--count", "20", "--json"]),
            LIMIT,
        ),
    );
    let readings = lines.iter().filter(|v| v["type"] == "reading").count();
    assert!(readings >= 20, "{readings} reading lines");
    assert_eq!(
        lines.last().map(|v| &v["type"]),
        Some(&Value::from("summary"))
    );
    let lines = c.check("pull", &run(&mut sim.pull(&dev_db, &["--json"]), LIMIT));
    assert_eq!(
        lines.last().map(|v| &v["type"]),
        Some(&Value::from("summary"))
    );

    // The bulk export of the demo's database: the summary, and the rows of
    // each kind as JSON Lines (each row against its schema).
    let o = run(
        &mut fringe(&[
            "export",
            "--db",
            s(&db),
            "--out",
            s(&t("readings.csv")),
            "--json",
        ]),
        LIMIT,
    );
    let summary = c.check("export", &o);
    assert!(
        summary[0]["rows"].as_u64().unwrap_or(0) >= 20,
        "{}",
        o.stdout
    );
    // The demo's database holds no device events; the monitored
    // simulator's (above) does.
    for (what, db) in [("readings", &db), ("events", &dev_db), ("lab", &db)] {
        let rows = c.check(
            &format!("export jsonl {what}"),
            &run(
                &mut fringe(&["export", "--db", s(db), "--what", what, "--format", "jsonl"]),
                LIMIT,
            ),
        );
        assert!(!rows.is_empty(), "{what}");
    }

    // The gateway on a copy of the demo site (its own ports, its own
    // store), for a few seconds with a status line every half second.
    let site_dir = t("site");
    std::fs::create_dir_all(site_dir.join("scenarios")).expect("site dir");
    let root = workspace_root().join("host");
    for e in std::fs::read_dir(root.join("sites/scenarios")).expect("scenarios") {
        let p = e.expect("entry").path();
        std::fs::copy(
            &p,
            site_dir
                .join("scenarios")
                .join(p.file_name().expect("name")),
        )
        .expect("copy scenario");
    }
    let site = std::fs::read_to_string(root.join("sites/demo-site.toml"))
        .expect("demo site")
        .replace(
            "127.0.0.1:1502",
            &format!("127.0.0.1:{}", fringe_tests::servers::free_port()),
        )
        .replace(
            "127.0.0.1:8150",
            &format!("127.0.0.1:{}", fringe_tests::servers::free_port()),
        )
        .replace("status_every_s = 10", "status_every_s = 0.5");
    std::fs::write(site_dir.join("site.toml"), site).expect("site file");
    let lines = c.check(
        "gateway",
        &run(
            &mut fringe(&[
                "gateway",
                "--config",
                s(&site_dir.join("site.toml")),
                "--json",
                "--duration-s",
                "4",
            ]),
            LIMIT,
        ),
    );
    assert!(
        lines.iter().filter(|v| v["type"] == "status").count() >= 3,
        "status lines"
    );
    let last = lines.last().expect("a summary");
    assert_eq!(last["type"], "summary");
    assert!(last["devices"][0]["counter"].is_u64(), "{last}");

    // Every schema of the document was met by some output (those of
    // alarms and progress lines only appear when there is one to report:
    // listed here).
    let optional = ["monitor drift_alarm", "pull progress"];
    let unused: Vec<&String> = c
        .schemas
        .keys()
        .filter(|k| !c.used.contains(*k) && !optional.contains(&k.as_str()))
        .collect();
    assert!(
        unused.is_empty(),
        "schemas in docs/JSON.md no output was checked against: {unused:?}"
    );
}
