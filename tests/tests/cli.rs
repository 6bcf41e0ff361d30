//! The command line: help for every command, and bad input of every kind
//! gives its documented message and exit code (README "Exit codes").

use std::time::Duration;

use clap::CommandFactory;
use fringe_tests::*;

const LIMIT: Duration = Duration::from_secs(60);

#[test]
fn every_command_has_help() {
    let cmd = fringe_host::cli::Cli::command();
    let names: Vec<String> = cmd
        .get_subcommands()
        .map(|c| c.get_name().to_string())
        .collect();
    assert!(names.len() >= 5, "{names:?}");
    for name in names {
        let o = run(&mut fringe(&[&name, "--help"]), LIMIT);
        assert_eq!(o.code, 0, "{name} --help: {}", o.stderr);
        assert!(
            o.stdout.contains(&format!("Usage: fringe {name}")),
            "{name} --help:\n{}",
            o.stdout
        );
    }
    let o = run(&mut fringe(&["--help"]), LIMIT);
    assert!(
        o.code == 0 && o.stdout.contains("Exit codes"),
        "{}",
        o.stdout
    );
}

#[test]
fn bad_arguments_are_usage_errors() {
    let o = run(&mut fringe(&["monitor", "--baud", "12"]), LIMIT);
    assert_fails(&o, 2, &["--baud", "12"]);
    let o = run(&mut fringe(&["frobnicate"]), LIMIT);
    assert_fails(&o, 2, &["frobnicate"]);
    // No port anywhere: a file/config problem, named with the flag and key.
    let o = run(&mut fringe(&["identify"]), LIMIT);
    assert_fails(&o, 3, &["--port", "`port`"]);
}

#[test]
fn bad_files_name_file_line_and_field() {
    let dir = tempfile::tempdir().unwrap();
    let line = dir.path().join("line2.toml");
    std::fs::write(
        &line,
        "port = \"/dev/ttyUSB0\"\nbaud = 115200\nalarm_high = 15\n",
    )
    .unwrap();
    let o = run(
        &mut fringe(&["--config", line.to_str().unwrap(), "status"]),
        LIMIT,
    );
    assert_fails(&o, 3, &["line2.toml:3:1", "alarm_high"]);
    let o = run(
        &mut fringe(&["--config", "/nonexistent/line.toml", "status"]),
        LIMIT,
    );
    assert_fails(&o, 3, &["cannot read", "/nonexistent/line.toml"]);

    let mut spec = ScenarioSpec::clean("HGM-L2-0201", 1);
    spec.drop_per_byte = 1.5;
    let sc = dir.path().join("bad.toml");
    std::fs::write(&sc, spec.toml()).unwrap();
    let o = run(
        &mut fringe(&["sim", "--scenario", sc.to_str().unwrap()]),
        LIMIT,
    );
    assert_fails(
        &o,
        3,
        &["bad.toml", "link.drop_per_byte", "1.5", "probability"],
    );
}

#[test]
fn missing_port_is_code_10() {
    let o = run(
        &mut fringe(&["identify", "--port", "/dev/fringe-nowhere"]),
        LIMIT,
    );
    assert_fails(&o, 10, &["/dev/fringe-nowhere", "does not exist"]);
}

/// A device key file that other users can read draws a warning naming it,
/// its mode and the fix (the command goes on: here to the missing port);
/// one readable by its owner alone draws none.
#[cfg(unix)]
#[test]
fn a_key_file_others_can_read_is_warned_about() {
    use std::os::unix::fs::PermissionsExt as _;
    let t = tempfile::tempdir().expect("dir");
    let key = t.path().join("line2.key");
    std::fs::write(&key, "0a".repeat(32)).expect("key");
    let db = t.path().join("line2.db");
    let pull = |mode: u32| {
        std::fs::set_permissions(&key, std::fs::Permissions::from_mode(mode)).expect("chmod");
        run(
            &mut fringe(&[
                "pull",
                "--port",
                "/dev/fringe-nowhere",
                "--db",
                db.to_str().expect("utf-8"),
                "--key-file",
                key.to_str().expect("utf-8"),
            ]),
            LIMIT,
        )
    };
    let o = pull(0o644);
    assert_fails(&o, 10, &["warning", "line2.key", "mode 0644", "chmod 600"]);
    let o = pull(0o600);
    assert_fails(&o, 10, &["/dev/fringe-nowhere"]);
    assert!(!o.stderr.contains("warning"), "{}", o.stderr);
}

#[test]
fn busy_port_is_code_11_and_wrong_baud_is_code_14() {
    let sim = Sim::start(&ScenarioSpec::clean("HGM-L2-0202", 2));
    let db = sim.path("l.db");
    let mut holder = spawn_silent(&mut sim.monitor(&db, &["--quiet"]));
    // Wait until it streams (readings in the database).
    poll_until(
        DEADLINE,
        || "monitor never stored".to_string(),
        || committed_readings(&db, "HGM-L2-0202") > 0,
    );
    let o = run(&mut fringe(&["identify", "--port", sim.port_str()]), LIMIT);
    assert_fails(&o, 11, &["busy"]);
    // Killed, the monitor leaves the device streaming: at the wrong baud
    // rate only garbage arrives.
    holder.kill().unwrap();
    let _ = holder.wait();
    let o = run(
        &mut fringe(&["identify", "--port", sim.port_str(), "--baud", "9600"]),
        LIMIT,
    );
    assert_fails(&o, 14, &["garbled", "9600 baud", "baud rate"]);
}

#[test]
fn database_problems_have_their_codes() {
    let sim = Sim::start(&ScenarioSpec::clean("HGM-L2-0203", 3));
    let text = sim.path("notes.txt");
    std::fs::write(
        &text,
        "shift notes, line 2: dryer trimmed at 06:40, nothing else",
    )
    .unwrap();
    let o = run(&mut sim.pull(&text, &[]), LIMIT);
    assert_fails(&o, 23, &["notes.txt", "not a fringe database"]);

    let db = sim.path("line2.db");
    drop(fringe_host::store::Store::open(&db).unwrap());
    let other = rusqlite::Connection::open(&db).unwrap();
    other.execute_batch("BEGIN IMMEDIATE").unwrap();
    let o = run(&mut sim.pull(&db, &[]), LIMIT);
    assert_fails(&o, 20, &["line2.db", "locked"]);
    other.execute_batch("ROLLBACK").unwrap();
    let o = run(&mut sim.pull(&db, &[]), LIMIT);
    assert_eq!(o.code, 0, "{}", o.stderr);
}

#[test]
fn a_closed_pipe_is_not_an_error() {
    let sim = Sim::start(&ScenarioSpec::clean("HGM-L2-0204", 4));
    let mut child = fringe(&["status", "--port", sim.port_str()])
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    drop(child.stdout.take());
    let out = child.wait_with_output().unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(0), "{err}");
    assert!(!err.contains("panicked"), "{err}");
}

/// A bad value of a flag of the bench commands is a usage error (2), named;
/// a product file that cannot be written is not a bad input file (3) but
/// another error (1), with the path (README "Exit codes").
#[test]
fn bench_flag_values_are_usage_errors_and_a_failed_output_is_not_a_bad_file() {
    let o = run(
        &mut fringe(&[
            "cal",
            "cell",
            "--liquid",
            "unobtainium",
            "--operator",
            "R. Okafor",
            "--port",
            "/nonexistent/tty",
        ]),
        LIMIT,
    );
    assert_fails(&o, 2, &["--liquid unobtainium", "methanol"]);
    let dir = tempfile::tempdir().unwrap();
    let table = dir.path().join("chips.csv");
    fringe_tests::bench::write_density_table(&table);
    let table = table.to_str().unwrap();
    let fit = |extra: &[&str]| {
        let mut args = vec!["cal", "fit", "--samples", table, "--force"];
        args.extend_from_slice(extra);
        run(&mut fringe(&args), LIMIT)
    };
    let never = dir.path().join("never-written.toml");
    let never = never.to_str().unwrap();
    let o = fit(&["--model", "relaxation", "--out", never]);
    assert_fails(&o, 2, &["--bulk-density-kg-m3"]);
    let long = "x".repeat(200);
    let o = fit(&["--model", "multivariate", "--name", &long, "--out", never]);
    assert_fails(&o, 2, &["product name", "--name"]);
    assert!(!std::path::Path::new(never).exists());
    let out = dir.path().join("no-such-folder").join("chips.toml");
    let o = fit(&[
        "--model",
        "multivariate",
        "--name",
        "HM chips L2",
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_fails(&o, 1, &["no-such-folder"]);
}
