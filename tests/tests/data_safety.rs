//! The user's files are sacred: a command that fails (a missing port, a
//! busy port, a bad file, a bad argument) leaves the disk as it was. Each
//! case runs the real `fringe` binary in a folder holding a user's files and
//! compares the folder, byte for byte, before and after.

use std::collections::BTreeMap;
use std::path::Path;
use std::time::Duration;

use fringe_tests::*;

const LIMIT: Duration = Duration::from_secs(60);

/// Every file under `dir` with its bytes (folders as empty entries).
fn snapshot(dir: &Path) -> BTreeMap<String, Vec<u8>> {
    let mut out = BTreeMap::new();
    let mut stack = vec![dir.to_path_buf()];
    while let Some(d) = stack.pop() {
        for e in std::fs::read_dir(&d).expect("list") {
            let p = e.expect("entry").path();
            let rel = p.strip_prefix(dir).expect("inside").display().to_string();
            if p.is_dir() {
                out.insert(rel + "/", Vec::new());
                stack.push(p);
            } else {
                out.insert(rel, std::fs::read(&p).expect("read"));
            }
        }
    }
    out
}

/// A folder as a user leaves it: notes, a key file, a good-looking but
/// malformed reference table, a broken calibration file.
fn users_folder() -> tempfile::TempDir {
    let t = tempfile::tempdir().expect("tmp");
    let d = t.path();
    std::fs::write(d.join("notes.txt"), "shift notes: dryer trimmed at 06:40\n").unwrap();
    std::fs::write(d.join("dev.key"), format!("{TEST_KEY_HEX}\n")).unwrap();
    // Semicolon-separated, as a spreadsheet in some locales writes it.
    std::fs::write(
        d.join("samples.csv"),
        "sample_id;moisture_pct;temperature_c\nS1;12,5;20,1\n",
    )
    .unwrap();
    std::fs::write(d.join("product.toml"), "name = \"HM oats\"\nmodel = \n").unwrap();
    t
}

/// Runs `args` (with `{d}` for the folder) and checks the exit code and that
/// nothing in the folder changed.
fn leaves_the_disk_alone(name: &str, args: &[&str], code: i32, port: &str) {
    let t = users_folder();
    let d = t.path().display().to_string();
    let args: Vec<String> = args
        .iter()
        .map(|a| a.replace("{d}", &d).replace("{port}", port))
        .collect();
    let argv: Vec<&str> = args.iter().map(String::as_str).collect();
    let before = snapshot(t.path());
    let o = run(&mut fringe(&argv), LIMIT);
    let after = snapshot(t.path());
    assert_eq!(
        o.code, code,
        "{name}: exit {} (want {code}); stderr:\n{}",
        o.code, o.stderr
    );
    assert_eq!(
        before.keys().collect::<Vec<_>>(),
        after.keys().collect::<Vec<_>>(),
        "{name}: the folder's files changed; stderr:\n{}",
        o.stderr
    );
    assert!(before == after, "{name}: a file's bytes changed");
}

/// Regression: `monitor` and `pull` created a database file when the port
/// was missing; so did a failed `cal cell`. Every command that talks to a
/// device, with a missing port, writes nothing.
#[test]
fn a_missing_port_writes_nothing() {
    let cases: &[(&str, &[&str])] = &[
        (
            "monitor",
            &["monitor", "--port", "{port}", "--db", "{d}/line.db"],
        ),
        ("pull", &["pull", "--port", "{port}", "--db", "{d}/line.db"]),
        (
            "cal cell",
            &[
                "cal",
                "cell",
                "--port",
                "{port}",
                "--db",
                "{d}/line.db",
                "--key-file",
                "{d}/dev.key",
                "--operator",
                "A. Tester",
                "--yes",
            ],
        ),
        (
            "cal capture",
            &["cal", "capture", "--port", "{port}", "--out", "{d}/new.csv"],
        ),
        (
            "cal select",
            &[
                "cal",
                "select",
                "1",
                "--port",
                "{port}",
                "--db",
                "{d}/line.db",
                "--key-file",
                "{d}/dev.key",
                "--operator",
                "A",
                "--reason",
                "test",
                "--yes",
            ],
        ),
        (
            "device config set",
            &[
                "device",
                "config",
                "set",
                "--port",
                "{port}",
                "--db",
                "{d}/line.db",
                "--key-file",
                "{d}/dev.key",
                "--tag",
                "L2",
                "--operator",
                "A",
                "--reason",
                "test",
                "--yes",
            ],
        ),
        (
            "device clock --set",
            &[
                "device",
                "clock",
                "--set",
                "--port",
                "{port}",
                "--key-file",
                "{d}/dev.key",
            ],
        ),
    ];
    for (name, args) in cases {
        leaves_the_disk_alone(name, args, 10, "/dev/fringe-nowhere");
    }
}

/// A bad input file or argument is refused before anything is written.
#[test]
fn a_bad_file_or_argument_writes_nothing() {
    let cases: &[(&str, &[&str], i32)] = &[
        (
            "cal fit, semicolon table",
            &[
                "cal",
                "fit",
                "--samples",
                "{d}/samples.csv",
                "--out",
                "{d}/out.toml",
            ],
            3,
        ),
        (
            "cal predict, broken calibration",
            &[
                "cal",
                "predict",
                "--cal",
                "{d}/product.toml",
                "--input",
                "{d}/samples.csv",
                "--out",
                "{d}/pred.csv",
            ],
            3,
        ),
        (
            "cal adjust, broken calibration",
            &[
                "cal",
                "adjust",
                "--cal",
                "{d}/product.toml",
                "--pairs",
                "{d}/samples.csv",
                "--out",
                "{d}/adj.toml",
            ],
            3,
        ),
        (
            "cal push, broken calibration",
            &[
                "cal",
                "push",
                "--cal",
                "{d}/product.toml",
                "--port",
                "/dev/fringe-nowhere",
                "--db",
                "{d}/line.db",
                "--key-file",
                "{d}/dev.key",
                "--operator",
                "A",
                "--reason",
                "test",
                "--yes",
            ],
            3,
        ),
        (
            "lab add, bad time",
            &[
                "lab",
                "add",
                "--db",
                "{d}/line.db",
                "--time",
                "yesterday",
                "--moisture",
                "12.5",
                "--method",
                "oven",
                "--operator",
                "A",
                "--sample-id",
                "G1",
                "--serial",
                "X",
            ],
            2,
        ),
        (
            "lab add, no database",
            &[
                "lab",
                "add",
                "--db",
                "{d}/line.db",
                "--time",
                "2026-12-01T09:40:00Z",
                "--moisture",
                "12.5",
                "--method",
                "oven",
                "--operator",
                "A",
                "--sample-id",
                "G1",
                "--serial",
                "X",
            ],
            23,
        ),
        (
            "audit export, no database",
            &[
                "audit",
                "export",
                "--db",
                "{d}/line.db",
                "--out",
                "{d}/bundle",
            ],
            23,
        ),
        (
            "audit export, swapped range",
            &[
                "audit",
                "export",
                "--db",
                "{d}/line.db",
                "--from",
                "2026-12-02T00:00Z",
                "--to",
                "2026-12-01T00:00Z",
                "--out",
                "{d}/bundle",
            ],
            2,
        ),
        (
            "export, no database",
            &["export", "--db", "{d}/line.db", "--out", "{d}/readings.csv"],
            23,
        ),
        (
            "export over an existing file",
            &["export", "--db", "{d}/line.db", "--out", "{d}/notes.txt"],
            2,
        ),
        (
            "export, --json without --out",
            &["export", "--db", "{d}/line.db", "--json"],
            2,
        ),
        (
            "audit verify, no database",
            &["audit", "verify", "--db", "{d}/line.db"],
            23,
        ),
        (
            "report, no database",
            &["report", "--db", "{d}/line.db", "--out", "{d}/report"],
            23,
        ),
        ("drift, no database", &["drift", "--db", "{d}/line.db"], 23),
        (
            "drift, a text file as database",
            &["drift", "--db", "{d}/notes.txt"],
            23,
        ),
        (
            "demo into a user's folder",
            &["demo", "--short", "--out", "{d}"],
            2,
        ),
    ];
    for (name, args, code) in cases {
        leaves_the_disk_alone(name, args, *code, "");
    }
}

/// A busy port (another `fringe` holds it) writes nothing either.
#[test]
fn a_busy_port_writes_nothing() {
    let sim = Sim::start(&ScenarioSpec::clean("HGM-L2-0301", seed(31)));
    let db = sim.path("held.db");
    let mut holder = spawn_silent(&mut sim.monitor(&db, &["--quiet"]));
    poll_until(
        DEADLINE,
        || "the first monitor never stored a reading".to_string(),
        || committed_readings(&db, "HGM-L2-0301") > 0,
    );
    let cases: &[(&str, &[&str])] = &[
        (
            "monitor",
            &["monitor", "--port", "{port}", "--db", "{d}/line.db"],
        ),
        ("pull", &["pull", "--port", "{port}", "--db", "{d}/line.db"]),
        (
            "cal capture",
            &["cal", "capture", "--port", "{port}", "--out", "{d}/new.csv"],
        ),
    ];
    for (name, args) in cases {
        leaves_the_disk_alone(name, args, 11, sim.port_str());
    }
    holder.kill().ok();
    let _ = holder.wait();
}

/// One configuration: the line file's `db` serves the commands that read a
/// database (`drift`, `report`, `audit`, `lab`, `cal history`), from
/// `--config` or `FRINGE_CONFIG`, and the help names the file in use.
#[test]
fn one_line_file_serves_every_command_and_the_help_names_it() {
    let t = users_folder();
    let line = t.path().join("line2.toml");
    std::fs::write(&line, "db = \"missing.db\"\n").unwrap();
    let line_s = line.display().to_string();
    let want_db = t.path().join("missing.db").display().to_string();
    for cmd in [
        &["drift"][..],
        &["report", "--out", "r"],
        &["audit", "verify"],
        &["cal", "history"],
    ] {
        let mut args = vec!["--config", line_s.as_str()];
        args.extend_from_slice(cmd);
        let o = run(&mut fringe(&args), LIMIT);
        assert_fails(&o, 23, &[&want_db]);
        let mut c = fringe(cmd);
        c.env("FRINGE_CONFIG", &line);
        let o = run(&mut c, LIMIT);
        assert_fails(&o, 23, &[&want_db]);
    }
    let mut c = fringe(&["drift", "--help"]);
    c.env("FRINGE_CONFIG", &line);
    let o = run(&mut c, LIMIT);
    assert!(o.stdout.contains(&line_s), "{}", o.stdout);
    assert!(!t.path().join("missing.db").exists());
}

/// Regression: `audit verify --db` reported "no change" and exit 0 on a
/// database with a damaged index page, where `drift` and `report` rightly
/// exited 23. Every command that reads the database now stops with 23 and
/// the same advice, and writes nothing.
/// A database at `db` with `n` plain readings of `serial`, one a second.
fn store_with_readings(db: &Path, serial: &str, n: u32) -> fringe_host::store::Store {
    use fringe_host::store::{Source, Store};
    use fringe_protocol::{CalId, ChannelValue, Flags, Reading, Seq};
    let mut s = Store::open(db).unwrap();
    let ch = ChannelValue {
        g_s: 1e-6,
        b_s: 2e-4,
        eps_re: 6.5,
        eps_im: 0.8,
    };
    let batch: Vec<Reading> = (0..n)
        .map(|c| Reading {
            seq: Seq {
                boot: 1,
                counter: c,
            },
            time_ms: 1_780_000_000_000 + u64::from(c) * 1000,
            channels: [ch, ch],
            temperature_c: 21.0,
            moisture_pct: Some(14.0),
            uncertainty_pct: 0.3,
            flags: Flags::empty(),
            cell_cal: CalId([1, 2, 3, 4]),
            product_cal: CalId([5, 6, 7, 8]),
        })
        .collect();
    s.insert_readings(serial, &batch, Source::Stream).unwrap();
    s
}

#[test]
fn a_damaged_index_page_stops_every_reading_command_with_23() {
    let t = users_folder();
    let db = t.path().join("line2.db");
    let s = store_with_readings(&db, "HGM-L2-0302", 2000);
    let (root, page): (i64, i64) = s
        .connection()
        .query_row(
            "SELECT (SELECT rootpage FROM sqlite_master WHERE name = 'readings_key'), \
             (SELECT page_size FROM pragma_page_size)",
            [],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .unwrap();
    drop(s); // the last connection checkpoints the WAL into the file
    let mut bytes = std::fs::read(&db).unwrap();
    let at = ((root - 1) * page) as usize;
    // Keep the page's type byte; garble its cell pointers and cells.
    for b in &mut bytes[at + 8..at + page as usize] {
        *b = 0x5a;
    }
    std::fs::write(&db, &bytes).unwrap();
    let d = t.path().display().to_string();
    let dbs = db.display().to_string();
    let cases: &[(&str, Vec<String>)] = &[
        (
            "audit verify",
            vec!["audit".into(), "verify".into(), "--db".into(), dbs.clone()],
        ),
        (
            "audit export",
            vec![
                "audit".into(),
                "export".into(),
                "--db".into(),
                dbs.clone(),
                "--out".into(),
                format!("{d}/bundle"),
            ],
        ),
        ("drift", vec!["drift".into(), "--db".into(), dbs.clone()]),
        (
            "report",
            vec![
                "report".into(),
                "--db".into(),
                dbs.clone(),
                "--out".into(),
                format!("{d}/report"),
            ],
        ),
        (
            "cal history",
            vec!["cal".into(), "history".into(), "--db".into(), dbs.clone()],
        ),
        (
            "export",
            vec![
                "export".into(),
                "--db".into(),
                dbs.clone(),
                "--out".into(),
                format!("{d}/readings.csv"),
            ],
        ),
    ];
    for (name, args) in cases {
        let before = snapshot(t.path());
        let argv: Vec<&str> = args.iter().map(String::as_str).collect();
        let o = run(&mut fringe(&argv), LIMIT);
        assert_eq!(o.code, 23, "{name}: exit {}; stderr:\n{}", o.code, o.stderr);
        assert!(
            o.stderr.contains(".recover"),
            "{name}: advice missing:\n{}",
            o.stderr
        );
        let after = snapshot(t.path());
        let changed: Vec<&String> = after
            .iter()
            .filter(|(k, v)| before.get(*k) != Some(*v))
            .map(|(k, _)| k)
            .chain(before.keys().filter(|k| !after.contains_key(*k)))
            // SQLite's own housekeeping beside a WAL database it opened
            // read-only: the shared-memory index, and an empty log.
            .filter(|k| !(k.ends_with("-shm") || (k.ends_with("-wal") && after[*k].is_empty())))
            .collect();
        assert!(changed.is_empty(), "{name}: changed {changed:?}");
    }
}

/// A page or drawing of the user's own with the name a report or a plot
/// would take is not overwritten (exit 2, the folder as it was); a report
/// or plot fringe wrote is replaced, so a folder can be regenerated.
#[test]
fn a_report_or_plot_never_replaces_a_users_own_file() {
    let t = users_folder();
    let db = t.path().join("line2.db");
    drop(store_with_readings(&db, "HGM-L2-0303", 60));
    let d = t.path();
    std::fs::create_dir(d.join("shift")).unwrap();
    std::fs::write(d.join("shift/index.html"), "<html>our shift page</html>\n").unwrap();
    std::fs::write(d.join("chart.svg"), "<svg/>\n").unwrap();
    let dbs = db.to_str().unwrap();
    // `fringe CMD --db DB FLAG d/NAME`.
    let to = |cmd: &str, flag: &str, name: &str| {
        run(
            &mut fringe(&[cmd, "--db", dbs, flag, d.join(name).to_str().unwrap()]),
            LIMIT,
        )
    };
    let o = to("report", "--out", "shift");
    assert_fails(&o, 2, &["index.html", "not written by fringe"]);
    let o = to("drift", "--plot", "chart.svg");
    assert_fails(&o, 2, &["chart.svg", "not written by fringe"]);
    assert_eq!(
        std::fs::read_to_string(d.join("shift/index.html")).unwrap(),
        "<html>our shift page</html>\n"
    );
    assert_eq!(
        std::fs::read_to_string(d.join("chart.svg")).unwrap(),
        "<svg/>\n"
    );
    assert_eq!(
        std::fs::read_dir(d.join("shift")).unwrap().count(),
        1,
        "no plot written beside the page"
    );
    // Its own report and plot are replaced when run again.
    for _ in 0..2 {
        let o = to("report", "--out", "rep");
        assert_eq!(o.code, 0, "{}", o.stderr);
        let o = to("drift", "--plot", "d.svg");
        assert_eq!(o.code, 0, "{}", o.stderr);
    }
}
