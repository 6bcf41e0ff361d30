//! `fringe cal fit` and `fringe cal predict` on bad reference-sample files:
//! each is refused with a non-zero exit status (3, bad file), a message that
//! names the file, line, column and field, and nothing written.

use std::path::Path;
use std::process::Command;

const HEADER: &str =
    "sample_id,moisture_pct,temperature_c,freq1_hz,eps1_re,eps1_im,freq2_hz,eps2_re,eps2_im";

fn good_rows(n: usize) -> Vec<String> {
    (0..n)
        .map(|i| {
            let m = 10.0 + i as f64 * 0.5;
            format!(
                "S{i},{m},{},1000000,{},{},20000000,{},{}",
                15.0 + i as f64,
                4.0 + 0.2 * m,
                3.0 + 0.1 * i as f64,
                3.5 + 0.15 * m,
                0.4
            )
        })
        .collect()
}

fn run(dir: &Path, csv: &str, extra: &[&str]) -> (i32, String) {
    let p = dir.join("lab.csv");
    std::fs::write(&p, csv).expect("write csv");
    let out = dir.join("p.toml");
    let o = Command::new(env!("CARGO_BIN_EXE_fringe"))
        .args(["cal", "fit", "--samples"])
        .arg(&p)
        .arg("--out")
        .arg(&out)
        .args(extra)
        .output()
        .expect("run fringe");
    assert!(
        !out.exists(),
        "nothing may be written on bad input: {}",
        String::from_utf8_lossy(&o.stderr)
    );
    (
        o.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&o.stderr).into_owned(),
    )
}

/// `fringe cal predict --cal CAL --input INPUT --out OUT`, run to the end.
fn predict_cmd(cal: &Path, input: &Path, out: &Path) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_fringe"))
        .args(["cal", "predict", "--cal"])
        .arg(cal)
        .arg("--input")
        .arg(input)
        .arg("--out")
        .arg(out)
        .output()
        .expect("run fringe")
}

fn table(rows: &[String]) -> String {
    format!("{HEADER}\n{}\n", rows.join("\n"))
}

#[test]
fn bad_reference_sample_files_are_refused_with_their_place() {
    let dir = tempfile::tempdir().expect("dir");
    let mut rows = good_rows(12);
    let cases: Vec<(&str, String, &str)> = vec![
        ("empty file", String::new(), "no samples"),
        ("header only", format!("{HEADER}\n"), "no samples"),
        (
            "missing column",
            table(&rows)
                .replace(",eps2_im\n", "\n")
                .replace(",0.4\n", "\n"),
            "line 1: missing column `eps2_im`",
        ),
        (
            "bad number",
            table(&rows).replacen(",15,", ",fifteen,", 1),
            "line 2, column 3 (temperature_c): `fifteen` is not a number",
        ),
        (
            "NaN loss",
            {
                rows[3] = rows[3].replace(",0.4", ",NaN");
                let t = table(&rows);
                rows = good_rows(12);
                t
            },
            "line 5, column 9 (eps2_im): `NaN` is not a finite number",
        ),
        (
            "negative loss",
            {
                rows[4] = rows[4].replace(",0.4", ",-0.4");
                let t = table(&rows);
                rows = good_rows(12);
                t
            },
            "line 6, column 9 (eps2_im): `-0.4` is not a loss factor",
        ),
        (
            "mixed frequencies",
            {
                rows[5] = rows[5].replace(",20000000,", ",25000000,");
                let t = table(&rows);
                rows = good_rows(12);
                t
            },
            "line 7, column 7 (freq2_hz): 25000000 Hz differs from 20000000 Hz on line 2",
        ),
        (
            "duplicate id",
            {
                rows[6] = rows[6].replacen("S6,", "S2,", 1);
                let t = table(&rows);
                rows = good_rows(12);
                t
            },
            "line 8, column sample_id: sample id `S2` already used on line 4",
        ),
        (
            "too few samples",
            table(&rows[..5]),
            "5 samples, but the single-frequency model needs at least 7",
        ),
    ];
    for (what, csv, expect) in cases {
        let (code, err) = run(dir.path(), &csv, &["--model", "single"]);
        assert_eq!(code, 3, "{what}: exit status 3 (bad file); stderr: {err}");
        assert!(err.contains("lab.csv"), "{what}: names the file: {err}");
        assert!(
            err.contains(expect),
            "{what}: expected `{expect}` in: {err}"
        );
    }
}

#[test]
fn predict_refuses_a_bad_table_and_writes_nothing() {
    let dir = tempfile::tempdir().expect("dir");
    let cal = dir.path().join("missing.toml");
    let input = dir.path().join("in.csv");
    std::fs::write(&input, format!("{HEADER}\nS1,,20,1e6,5,1,2e7,4,0.3\n")).expect("write");
    let out = dir.path().join("pred.csv");
    let o = predict_cmd(&cal, &input, &out);
    assert_eq!(
        o.status.code(),
        Some(3),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(String::from_utf8_lossy(&o.stderr).contains("missing.toml"));
    assert!(!out.exists());
}

/// A calibration holds only at its reference samples' frequencies: predict
/// refuses a table measured at others, names the sample, writes nothing;
/// at the right frequencies it predicts every row.
#[test]
fn predict_refuses_samples_at_other_frequencies() {
    let dir = tempfile::tempdir().expect("dir");
    let lab = dir.path().join("lab.csv");
    // Moisture and temperature varied independently (made-up values).
    // 24 samples: five per parameter of the single-frequency model (the
    // quality gate of `cal fit`).
    let rows: Vec<String> = (0..24)
        .map(|i| {
            let m = 10.0 + 0.6 * f64::from(i);
            format!(
                "S{i},{m},{},1000000,{},{},20000000,{},0.3",
                18.0 + f64::from(i % 5),
                2.0 + 0.25 * m + 0.01 * f64::from(i % 3),
                0.5 + 0.02 * f64::from(i),
                1.8 + 0.2 * m
            )
        })
        .collect();
    std::fs::write(&lab, table(&rows)).expect("write csv");
    let cal = dir.path().join("p.toml");
    let o = Command::new(env!("CARGO_BIN_EXE_fringe"))
        .args(["cal", "fit", "--model", "single", "--samples"])
        .arg(&lab)
        .arg("--out")
        .arg(&cal)
        .output()
        .expect("run fringe");
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let text = std::fs::read_to_string(&cal).expect("p.toml written");
    assert!(text.contains("freqs_hz"), "{text}");
    let predict = |rows: &[String]| {
        let input = dir.path().join("in.csv");
        std::fs::write(&input, table(rows)).expect("write");
        let out = dir.path().join("pred.csv");
        let _ = std::fs::remove_file(&out);
        let o = predict_cmd(&cal, &input, &out);
        (
            o.status.code(),
            String::from_utf8_lossy(&o.stderr).into_owned(),
            std::fs::read_to_string(&out).ok(),
        )
    };
    let (code, err, out) = predict(&rows[..3]);
    assert_eq!(code, Some(0), "{err}");
    assert_eq!(out.expect("predictions").lines().count(), 4);
    let shifted: Vec<String> = rows[..3]
        .iter()
        .map(|r| r.replace(",20000000,", ",10000000,"))
        .collect();
    let (code, err, out) = predict(&shifted);
    assert_ne!(code, Some(0), "{err}");
    assert!(
        err.contains("sample S0") && err.contains("1 MHz and 10 MHz"),
        "{err}"
    );
    assert!(out.is_none(), "nothing may be written");
    // --out on a file that predict did not write (the lab's own table
    // under another name): refused, the file as it was. On predictions
    // it wrote before: replaced.
    let input = dir.path().join("in.csv");
    std::fs::write(&input, table(&rows[..3])).expect("write");
    let theirs = dir.path().join("lab-copy.csv");
    std::fs::copy(&lab, &theirs).expect("copy");
    let o = predict_cmd(&cal, &input, &theirs);
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "{err}");
    assert!(
        err.contains("exists and is not a table of predictions"),
        "{err}"
    );
    assert_eq!(
        std::fs::read(&theirs).unwrap(),
        std::fs::read(&lab).unwrap()
    );
    let ours = dir.path().join("pred.csv");
    assert!(predict_cmd(&cal, &input, &ours).status.success());
    let o = predict_cmd(&cal, &input, &ours);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
}
