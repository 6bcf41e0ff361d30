//! What a plant engineer reads (issue 16): clean numbers in every file the
//! demo and `cal predict` write; messages and lines, each fixed one with a
//! regression test named after what broke.

use std::path::{Path, PathBuf};
use std::sync::OnceLock;
use std::time::Duration;

use fringe_quality::numbers::{rule_for, Rule};
use fringe_tests::*;

const LIMIT: Duration = Duration::from_secs(120);
const PROMPT: Duration = Duration::from_secs(30);

/// One short demo run shared by the tests of this file (its folder lives
/// as long as the test process), and what it printed.
fn demo_run() -> &'static (tempfile::TempDir, PathBuf, Outcome) {
    static DIR: OnceLock<(tempfile::TempDir, PathBuf, Outcome)> = OnceLock::new();
    DIR.get_or_init(|| {
        let dir = tempfile::tempdir().expect("temp dir");
        let out = dir.path().join("demo");
        let o = run(
            &mut fringe(&["demo", "--short", "--out", out.to_str().expect("utf-8")]),
            LIMIT,
        );
        assert_eq!(o.code, 0, "demo: {}", o.stderr);
        (dir, out, o)
    })
}

fn demo() -> &'static Path {
    &demo_run().1
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
            // In a reference-sample table and a `cal predict` file the lab
            // value is the `moisture_pct` column.
            let lab_table = header
                .iter()
                .any(|h| h == "freq1_hz" || h == "predicted_moisture_pct");
            let rule_col = if lab_table && col == "moisture_pct" {
                "lab_moisture_pct"
            } else {
                col.as_str()
            };
            match rule_for(rule_col) {
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
    // Noise is a run of zeros or nines within a decimal number's
    // significant digits (14.270000001, 0.0999999); the leading zeros of a
    // small one (0.000001024 S) are not. (A search of the whole text for
    // "000001" failed on that conductance, and could on a hex column.)
    let mut r = csv::Reader::from_path(readings).expect("csv opens");
    let header = r.headers().expect("header").clone();
    for (i, row) in r.records().enumerate() {
        let row = row.expect("row");
        for (col, cell) in header.iter().zip(row.iter()) {
            if !cell.contains('.')
                || cell.parse::<f64>().is_err()
                || col == "hash"
                || col.ends_with("_ms")
            {
                continue;
            }
            let mantissa = cell.split(['e', 'E']).next().unwrap_or("");
            let digits: String = mantissa.chars().filter(char::is_ascii_digit).collect();
            let significant = digits.trim_start_matches('0');
            assert!(
                !significant.contains("00000") && !significant.contains("99999"),
                "noise left in {} line {} column {col}: `{cell}`",
                readings.display(),
                i + 2
            );
        }
    }
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

// ------------------------------------------------------------ messages

fn key_file(sim: &Sim, hex: &str) -> PathBuf {
    let p = sim.path(&format!("{}.key", &hex[..8]));
    std::fs::write(&p, format!("{hex}\n")).expect("key file");
    p
}

#[test]
fn plain_monitor_line_labels_every_field_regression_seq_read_as_a_decimal() {
    let sim = Sim::start(&ScenarioSpec::clean("HGM-L2-0701", seed(71)));
    let db = sim.path("line.db");
    // stdout is a file here, not a terminal: the plain lines.
    let o = run(&mut sim.monitor(&db, &["--count", "12"]), LIMIT);
    assert_eq!(o.code, 0, "{}", o.stderr);
    let lines: Vec<&str> = o.stdout.lines().collect();
    assert!(lines.len() >= 12, "{}", o.stdout);
    for l in &lines {
        let fields: Vec<(&str, &str)> = l
            .split(' ')
            .map(|kv| {
                kv.split_once('=')
                    .unwrap_or_else(|| panic!("unlabelled `{kv}` in `{l}`"))
            })
            .collect();
        let keys: Vec<&str> = fields.iter().map(|f| f.0).collect();
        assert_eq!(
            &keys[..7],
            ["boot", "n", "t", "moisture", "u", "temperature", "flags"],
            "{l}"
        );
        let value = |k: &str| fields.iter().find(|f| f.0 == k).expect("field").1;
        value("boot").parse::<u32>().expect("boot is a number");
        value("n").parse::<u32>().expect("n is a number");
        let t = value("t");
        assert!(t.starts_with("20") || t.starts_with("boot+"), "{l}");
        let m = value("moisture");
        assert!(
            m == "none" || (m.ends_with('%') && m.trim_end_matches('%').parse::<f64>().is_ok()),
            "{l}"
        );
        assert!(value("temperature").ends_with('C'), "{l}");
    }
}

#[test]
fn wrong_key_file_is_named_regression_auth_tag_does_not_verify() {
    let sim = Sim::start(&ScenarioSpec::clean("HGM-L2-0702", seed(72)));
    let wrong = key_file(&sim, &"ab".repeat(32));
    let o = run(
        &mut fringe(&[
            "device",
            "clock",
            "--port",
            sim.port_str(),
            "--key-file",
            wrong.to_str().unwrap(),
            "--set",
        ]),
        LIMIT,
    );
    assert_fails(&o, 16, &["auth tag does not verify", "wrong key file?"]);
}

#[test]
fn degenerate_cell_calibration_is_said_in_words_regression_degenerate_calibration() {
    let sim = Sim::start(&ScenarioSpec::clean("HGM-L2-0703", seed(73)));
    let key = key_file(&sim, TEST_KEY_HEX);
    let db = sim.path("bench.db");
    // Methanol where the air should be, and air where the methanol should
    // be: the liquid point reads no higher than the air point.
    sim.set_bench("methanol");
    let mut c = Interactive::spawn(&mut fringe(&[
        "cal",
        "cell",
        "--port",
        sim.port_str(),
        "--key-file",
        key.to_str().unwrap(),
        "--db",
        db.to_str().unwrap(),
        "--operator",
        "T. Words (test)",
        "--readings",
        "3",
        "--yes",
    ]));
    c.expect("press Enter when done", 1, PROMPT);
    c.send("");
    c.expect("press Enter when done", 2, PROMPT);
    sim.set_bench("air");
    c.send("");
    let o = c.finish(LIMIT);
    assert_fails(
        &o,
        1,
        &[
            "cell calibration at 1 MHz failed",
            "too close to the air reading",
            "filled with methanol",
            "nothing was written",
        ],
    );
    assert!(!o.stderr.contains("DegenerateCalibration"), "{}", o.stderr);
}

#[test]
fn negative_lab_moisture_is_a_range_error_regression_unexpected_argument_minus_1() {
    let db = demo().join("line2.db");
    let work = tempfile::tempdir().expect("temp dir");
    let copy = work.path().join("line2.db");
    std::fs::copy(&db, &copy).expect("copy db");
    let o = run(
        &mut fringe(&[
            "lab",
            "add",
            "--db",
            copy.to_str().unwrap(),
            "--time",
            "2026-12-01T06:30Z",
            "--moisture",
            "-1",
            "--method",
            "oven",
            "--operator",
            "T. Range (test)",
        ]),
        LIMIT,
    );
    assert_fails(&o, 2, &["--moisture -1", "0 <= m < 100"]);
    assert!(!o.stderr.contains("unexpected argument"), "{}", o.stderr);
}

#[test]
fn semicolon_separated_table_says_so_regression_missing_column_sample_id() {
    let work = tempfile::tempdir().expect("temp dir");
    let text = std::fs::read_to_string(demo().join("reference-samples.csv")).expect("samples");
    // As a spreadsheet in a decimal-comma locale exports it.
    let semi: String = text.replace(',', ";").replace('.', ",");
    let p = work.path().join("lab-semicolon.csv");
    std::fs::write(&p, semi).expect("write");
    let o = run(
        &mut fringe(&[
            "cal",
            "fit",
            "--samples",
            p.to_str().unwrap(),
            "--out",
            work.path().join("x.toml").to_str().unwrap(),
        ]),
        LIMIT,
    );
    assert_fails(&o, 3, &["lab-semicolon.csv", "line 1", "separated by `;`"]);
}

/// Whether `s` holds a negative zero such as `-0.000` (a `-0.` followed
/// by zeros only).
fn has_negative_zero(s: &str) -> bool {
    s.match_indices("-0.").any(|(i, _)| {
        let digits: String = s[i + 3..]
            .chars()
            .take_while(char::is_ascii_digit)
            .collect();
        !digits.is_empty() && digits.chars().all(|c| c == '0')
    })
}

#[test]
fn negative_zero_is_found() {
    assert!(has_negative_zero("error -0.000 (-0.00 %)"));
    assert!(!has_negative_zero("error -0.001 (0.00 %)"));
}

#[test]
fn demo_says_things_once_and_in_words_regression_caution_twice_a_8_h_minus_zero() {
    let o = &demo_run().2;
    let all = format!("{}{}", o.stdout, o.stderr);
    assert_eq!(
        all.matches("CAUTION: a new calibration").count(),
        1,
        "{all}"
    );
    assert!(
        !all.contains("a 8 h") && all.contains("a shift of 2 h"),
        "{all}"
    );
    assert!(!has_negative_zero(&all), "{all}");
    assert!(!all.contains("Cusum") && !all.contains("Ewma"), "{all}");
    let page = std::fs::read_to_string(demo().join("report/index.html")).expect("report");
    assert!(
        !page.contains("Cusum") && !page.contains("Ewma"),
        "chart names in words"
    );
    assert!(!has_negative_zero(&page));
}

#[test]
fn drift_alarm_says_the_direction_once_regression_drifted_down_by_minus() {
    let o = run(
        &mut fringe(&["drift", "--db", demo().join("line2.db").to_str().unwrap()]),
        LIMIT,
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert!(
        o.stdout.contains("drifted down by 0.") || o.stdout.contains("drifted up by 0."),
        "{}",
        o.stdout
    );
    assert!(
        !o.stdout.contains("by -") && !o.stdout.contains("by +"),
        "{}",
        o.stdout
    );
}

#[test]
fn sim_help_points_at_what_a_user_has_regression_source_file_in_help() {
    let o = run(&mut fringe(&["sim", "--help"]), LIMIT);
    assert_eq!(o.code, 0);
    assert!(!o.stdout.contains(".rs"), "{}", o.stdout);
    assert!(
        o.stdout
            .contains("host/scenarios/harrowgate-line2-wheat.toml"),
        "{}",
        o.stdout
    );
}

// ------------------------------------------------------------ plots

/// Renders `svg` (resvg, without text: shapes and lines only) and gives
/// the share of pixels that are not white and the number of distinct
/// colours.
fn render(svg: &str, what: &str) -> (f64, usize) {
    let tree = resvg::usvg::Tree::from_str(svg, &resvg::usvg::Options::default())
        .unwrap_or_else(|e| panic!("{what}: not an SVG resvg reads: {e}"));
    let size = tree.size().to_int_size();
    assert!(
        size.width() >= 300 && size.height() >= 200,
        "{what}: {size:?}"
    );
    let mut pixmap = resvg::tiny_skia::Pixmap::new(size.width(), size.height()).expect("pixmap");
    pixmap.fill(resvg::tiny_skia::Color::WHITE);
    resvg::render(
        &tree,
        resvg::tiny_skia::Transform::default(),
        &mut pixmap.as_mut(),
    );
    let px = pixmap.pixels();
    let inked = px
        .iter()
        .filter(|p| (p.red(), p.green(), p.blue()) != (255, 255, 255))
        .count();
    let colours: std::collections::BTreeSet<(u8, u8, u8)> =
        px.iter().map(|p| (p.red(), p.green(), p.blue())).collect();
    (inked as f64 / px.len() as f64, colours.len())
}

#[test]
fn every_demo_plot_renders_to_a_non_blank_image() {
    let d = demo();
    let plots = [
        d.join("fit.svg"),
        d.join("drift.svg"),
        d.join("report/trend.svg"),
        d.join("report/drift.svg"),
    ];
    for p in &plots {
        let svg = std::fs::read_to_string(p).unwrap_or_else(|e| panic!("{}: {e}", p.display()));
        let (inked, colours) = render(&svg, &p.display().to_string());
        assert!(
            inked > 0.01 && colours >= 4,
            "{}: blank or nearly ({:.3} % inked, {colours} colours)",
            p.display(),
            100.0 * inked
        );
    }
    // The blank check itself: an empty white page fails it.
    let (inked, _) = render(
        "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"400\" height=\"300\"><rect width=\"400\" height=\"300\" fill=\"white\"/></svg>",
        "white page",
    );
    assert!(inked <= 0.01);
}

#[test]
fn demo_plots_read_at_a_glance() {
    let d = demo();
    let trend = std::fs::read_to_string(d.join("report/trend.svg")).expect("trend");
    for want in [
        "local time",
        "2026-12-01",
        "inline moisture",
        "expanded uncertainty",
        "lab grab sample",
        "line empty",
        "product temperature, C",
    ] {
        assert!(trend.contains(want), "trend.svg lacks `{want}`");
    }
    assert!(!trend.contains("time, h"), "no hours-from-start axis");
    let drift = std::fs::read_to_string(d.join("drift.svg")).expect("drift");
    for want in [
        "C+ (upward shift)",
        "-C- (downward shift)",
        "decision limits",
        "alarm",
        "local time",
    ] {
        assert!(drift.contains(want), "drift.svg lacks `{want}`");
    }
    assert!(
        !drift.contains("observation<") && !drift.contains(">observation"),
        "drift charts against time"
    );
    let fit = std::fs::read_to_string(d.join("fit.svg")).expect("fit");
    assert!(
        fit.contains("eps&apos; at 1 MHz") || fit.contains("eps' at 1 MHz"),
        "frequencies named in the fit plots"
    );
    assert!(!fit.contains("freq1") && !fit.contains("freq2"));
}
