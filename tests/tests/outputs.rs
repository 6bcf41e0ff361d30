//! What a plant engineer reads (issue 16): clean numbers in every file the
//! demo and `cal predict` write.

use std::path::{Path, PathBuf};
use std::sync::OnceLock;
use std::time::Duration;

use fringe_quality::numbers::{rule_for, Rule};
use fringe_tests::*;

const LIMIT: Duration = Duration::from_secs(120);

/// One short demo run shared by the tests of this file (its folder lives
/// as long as the test process).
fn demo() -> &'static Path {
    static DIR: OnceLock<(tempfile::TempDir, PathBuf)> = OnceLock::new();
    &DIR.get_or_init(|| {
        let dir = tempfile::tempdir().expect("temp dir");
        let out = dir.path().join("demo");
        let o = run(
            &mut fringe(&["demo", "--short", "--out", out.to_str().expect("utf-8")]),
            LIMIT,
        );
        assert_eq!(o.code, 0, "demo: {}", o.stderr);
        (dir, out)
    })
    .1
}

/// Every CSV file under `dir`.
fn csv_files(dir: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    for e in std::fs::read_dir(dir).expect("read dir").flatten() {
        let p = e.path();
        if p.is_dir() {
            out.extend(csv_files(&p));
        } else if p.extension().is_some_and(|x| x == "csv") {
            out.push(p);
        }
    }
    out
}

/// Digits after the decimal point of a plain decimal number, `None` when
/// `s` is not one.
fn decimals(s: &str) -> Option<usize> {
    let t = s.strip_prefix('-').unwrap_or(s);
    let (int, frac) = t.split_once('.').unwrap_or((t, ""));
    (!int.is_empty()
        && int.bytes().all(|b| b.is_ascii_digit())
        && frac.bytes().all(|b| b.is_ascii_digit()))
    .then_some(frac.len())
}

/// Checks every cell of a CSV file read back with the `csv` crate: no
/// `NaN`/`inf`, no negative zero, and each number of a column with a
/// precision rule written to exactly that precision; in other columns no
/// run of 9 or more decimals (the noise of an `f32` widened to `f64`).
/// Gives the number of numeric cells checked.
fn check_csv(path: &Path) -> usize {
    let mut r = csv::Reader::from_path(path).expect("csv opens");
    let header: Vec<String> = r
        .headers()
        .expect("header")
        .iter()
        .map(str::to_string)
        .collect();
    let mut checked = 0;
    for (i, row) in r.records().enumerate() {
        let row = row.unwrap_or_else(|e| panic!("{}: row {}: {e}", path.display(), i + 2));
        assert_eq!(row.len(), header.len(), "{}: row {}", path.display(), i + 2);
        for (col, cell) in header.iter().zip(row.iter()) {
            let at = || format!("{} line {} column {col}: `{cell}`", path.display(), i + 2);
            let lower = cell.to_ascii_lowercase();
            assert!(
                !matches!(lower.as_str(), "nan" | "inf" | "-inf" | "infinity"),
                "{}",
                at()
            );
            if cell.parse::<f64>().is_err() || col == "hash" || col.ends_with("_ms") {
                continue;
            }
            checked += 1;
            let x: f64 = cell.parse().expect("number");
            assert!(
                !(x == 0.0 && cell.starts_with('-')),
                "negative zero: {}",
                at()
            );
            match rule_for(col) {
                Rule::Decimals(d) => assert_eq!(decimals(cell), Some(usize::from(d)), "{}", at()),
                Rule::Significant(n) => {
                    let digits: String = cell
                        .split(['e', 'E'])
                        .next()
                        .unwrap_or("")
                        .chars()
                        .filter(char::is_ascii_digit)
                        .collect();
                    let significant = digits.trim_start_matches('0').len();
                    assert!(
                        significant <= usize::from(n)
                            || digits.trim_start_matches('0').ends_with('0'),
                        "more than {n} significant digits: {}",
                        at()
                    );
                }
                Rule::Shortest => {
                    assert!(
                        decimals(cell).is_none_or(|d| d < 9),
                        "float noise: {}",
                        at()
                    );
                }
            }
        }
    }
    checked
}

#[test]
fn demo_files_carry_clean_numbers() {
    let files = csv_files(demo());
    let names: Vec<String> = files
        .iter()
        .filter_map(|p| p.file_name().map(|n| n.to_string_lossy().into_owned()))
        .collect();
    for want in ["reference-samples.csv", "readings.csv", "lab_samples.csv"] {
        assert!(names.iter().any(|n| n == want), "{want} in {names:?}");
    }
    let mut total = 0;
    for f in &files {
        total += check_csv(f);
    }
    assert!(total > 1000, "only {total} numeric cells checked");
    // The readings of the audit bundle were the ones with the noise.
    let readings = files
        .iter()
        .find(|p| p.ends_with("readings.csv"))
        .expect("readings.csv");
    let text = std::fs::read_to_string(readings).expect("read");
    assert!(
        !text.contains("000001") && !text.contains("99999"),
        "noise left in {}",
        readings.display()
    );
}

#[test]
fn cal_predict_csv_carries_clean_numbers() {
    let d = demo();
    let dir = tempfile::tempdir().expect("temp dir");
    let out = dir.path().join("predicted.csv");
    // A sample table with an empty lab value and a NaN-free but
    // out-of-range row, besides the demo's own samples.
    let samples = std::fs::read_to_string(d.join("reference-samples.csv")).expect("samples");
    let mut lines: Vec<String> = samples.lines().map(str::to_string).collect();
    let first = lines[1].clone();
    let mut cells: Vec<&str> = first.split(',').collect();
    cells[0] = "NO-LAB";
    cells[1] = "";
    lines.push(cells.join(","));
    let input = dir.path().join("input.csv");
    std::fs::write(&input, lines.join("\n") + "\n").expect("write");
    let o = run(
        &mut fringe(&[
            "cal",
            "predict",
            "--cal",
            d.join("hm-wheat-l2.toml").to_str().expect("utf-8"),
            "--input",
            input.to_str().expect("utf-8"),
            "--out",
            out.to_str().expect("utf-8"),
        ]),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert!(check_csv(&out) > 20);
    let text = std::fs::read_to_string(&out).expect("read");
    let no_lab = text
        .lines()
        .find(|l| l.starts_with("NO-LAB,"))
        .expect("row");
    assert!(no_lab.starts_with("NO-LAB,,"), "empty lab cell: {no_lab}");
}
