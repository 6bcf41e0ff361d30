//! Every bad file a person can hand the tool (issue 17, item 3): for each
//! kind of input file, a table of malformed classes (empty, cut short at
//! random points, binary garbage, a wrong encoding, a byte-order mark,
//! very long lines, huge numbers, NaN and infinity, repeated keys or ids,
//! wrong units, a folder where a file belongs, no read permission), each
//! handed to the real `fringe` command that reads that kind. Every case
//! checks three things: the documented exit status (README, "Exit codes";
//! `host/src/exit.rs`), a message naming the file and the line, column or
//! field where one applies (for a whole-file problem, the file and the
//! reason), and that nothing was written or changed (the case's folder is
//! compared byte for byte before and after, and the outputs asked for must
//! not appear). The cases are counted per kind and in total.
//!
//! The random cut points come from the seed (`FRINGE_SEED`; printed).
//!
//! "No read permission" cannot be shown to a process running as root
//! (root reads a file of mode 000): such cases are detected by reading the
//! file after `chmod 000`, reported as "skipped: running as root" and
//! counted apart, never counted as passed.

use std::collections::BTreeMap;
use std::os::unix::fs::PermissionsExt as _;
use std::path::{Path, PathBuf};
use std::sync::OnceLock;
use std::time::{Duration, Instant};

use fringe_tests::*;
use rand::rngs::StdRng;
use rand::{RngExt, SeedableRng};

const LIMIT: Duration = Duration::from_secs(60);

/// Exit status of a bad input file (README: 3).
const BAD_FILE: i32 = 3;
/// Exit status of `audit verify` when it finds a bundle changed (README: 4).
const PROBLEMS: i32 = 4;
/// Exit status of an error the table lists under no other code (README: 1).
const OTHER: i32 = 1;

/// The good files every kind starts from: the outputs of `fringe demo
/// --short` (invented plant and samples), made once.
struct Fixtures {
    _dir: tempfile::TempDir,
    samples: Vec<u8>,
    product: Vec<u8>,
    pairs: Vec<u8>,
    key: Vec<u8>,
    bundle: PathBuf,
}

fn fixtures() -> &'static Fixtures {
    static F: OnceLock<Fixtures> = OnceLock::new();
    F.get_or_init(|| {
        let dir = tempfile::tempdir().expect("tmp");
        let out = dir.path().join("demo");
        let o = run(
            &mut fringe(&["demo", "--short", "--out", out.to_str().expect("utf-8")]),
            Duration::from_secs(300),
        );
        assert_eq!(o.code, 0, "fringe demo: {}", o.stderr);
        let read = |n: &str| std::fs::read(out.join(n)).expect(n);
        let bundle = std::fs::read_dir(&out)
            .expect("demo folder")
            .map(|e| e.expect("entry").path())
            .find(|p| {
                p.file_name()
                    .and_then(|n| n.to_str())
                    .is_some_and(|n| n.starts_with("audit-"))
            })
            .expect("the demo's audit bundle");
        // The lab pairs as `cal predict` writes them.
        let pairs = out.join("pairs.csv");
        let o = run(
            &mut fringe(&[
                "cal",
                "predict",
                "--cal",
                out.join("hm-wheat-l2.toml").to_str().expect("utf-8"),
                "--input",
                out.join("reference-samples.csv").to_str().expect("utf-8"),
                "--out",
                pairs.to_str().expect("utf-8"),
            ]),
            LIMIT,
        );
        assert_eq!(o.code, 0, "cal predict: {}", o.stderr);
        Fixtures {
            samples: read("reference-samples.csv"),
            product: read("hm-wheat-l2.toml"),
            pairs: read("pairs.csv"),
            key: read("HGM-L2-0007.key"),
            bundle,
            _dir: dir,
        }
    })
}

/// What a case puts where the kind's input file goes.
enum Setup {
    /// These bytes.
    Bytes(Vec<u8>),
    /// A folder of that name.
    Dir,
    /// The good file, with mode 000.
    NoRead,
}

/// One malformed file.
struct Case {
    /// The class, in words.
    class: String,
    setup: Setup,
    /// The bundle member it replaces (audit bundle only).
    member: Option<&'static str>,
    /// Expected exit status.
    code: i32,
    /// Every one of these is in the message.
    needles: Vec<String>,
}

fn case(class: impl Into<String>, setup: Setup, code: i32, needles: &[&str]) -> Case {
    Case {
        class: class.into(),
        setup,
        member: None,
        code,
        needles: needles.iter().map(|s| (*s).to_string()).collect(),
    }
}

/// A command line, given the case's folder.
type Argv = Box<dyn Fn(&Path) -> Vec<String>>;

/// One kind of input file and the command that reads it.
struct Kind {
    name: &'static str,
    /// Its name in the case's folder.
    file: &'static str,
    /// The good file (or, for the bundle, `None`: the bundle is copied).
    good: Option<Vec<u8>>,
    /// Writes the other files the command needs into the folder.
    prepare: Box<dyn Fn(&Path)>,
    /// The command line, given the folder.
    args: Argv,
    /// Outputs the command was asked for (relative to the folder).
    outputs: Vec<&'static str>,
    /// The command reports what it found on stdout (`audit verify`: the
    /// problems are its report; stderr says how many), not on stderr.
    report_on_stdout: bool,
    cases: Vec<Case>,
}

fn p(d: &Path, name: &str) -> String {
    d.join(name).display().to_string()
}

/// Every file under `dir` with its bytes (folders as entries of their own;
/// a file this process cannot read by its mode bits, as its length).
fn snapshot(dir: &Path) -> BTreeMap<String, Vec<u8>> {
    let mut out = BTreeMap::new();
    let mut stack = vec![dir.to_path_buf()];
    while let Some(d) = stack.pop() {
        for e in std::fs::read_dir(&d).expect("list") {
            let path = e.expect("entry").path();
            let rel = path
                .strip_prefix(dir)
                .expect("inside")
                .display()
                .to_string();
            let meta = std::fs::symlink_metadata(&path).expect("metadata");
            if meta.is_dir() {
                out.insert(rel + "/", Vec::new());
                stack.push(path);
            } else {
                let bytes = std::fs::read(&path)
                    .unwrap_or_else(|_| format!("unreadable, {} bytes", meta.len()).into_bytes());
                out.insert(rel, bytes);
            }
        }
    }
    out
}

/// Copies a folder (flat: a bundle has no subfolders).
fn copy_dir(from: &Path, to: &Path) {
    std::fs::create_dir_all(to).expect("mkdir");
    for e in std::fs::read_dir(from).expect("list") {
        let e = e.expect("entry");
        std::fs::copy(e.path(), to.join(e.file_name())).expect("copy");
    }
}

/// Counts of one kind.
#[derive(Default, Debug)]
struct Count {
    checked: usize,
    skipped_root: usize,
}

/// Runs every case of `kind`; panics with the seed and the class on the
/// first that does not hold.
fn check_kind(kind: &Kind, seed: u64) -> Count {
    let mut count = Count::default();
    for c in &kind.cases {
        let t = tempfile::tempdir().expect("tmp");
        let d = t.path();
        (kind.prepare)(d);
        let rel = c
            .member
            .map_or(kind.file.to_string(), |m| format!("{}/{m}", kind.file));
        let target = d.join(&rel);
        if let Some(good) = &kind.good {
            std::fs::write(&target, good).expect("write good file");
        }
        match &c.setup {
            Setup::Bytes(b) => std::fs::write(&target, b).expect("write case"),
            Setup::Dir => {
                let _ = std::fs::remove_file(&target);
                std::fs::create_dir(&target).expect("mkdir");
                std::fs::write(target.join("notes.txt"), "a file in the folder\n").expect("w");
            }
            Setup::NoRead => {
                std::fs::set_permissions(&target, std::fs::Permissions::from_mode(0o000))
                    .expect("chmod 000");
                if std::fs::read(&target).is_ok() {
                    // Root (or a capability) reads a file of mode 000: the
                    // case cannot be shown here. Said, counted apart.
                    println!(
                        "{}: {}: skipped: running as root (a file of mode 000 is still readable)",
                        kind.name, c.class
                    );
                    count.skipped_root += 1;
                    continue;
                }
            }
        }
        let args = (kind.args)(d);
        let argv: Vec<&str> = args.iter().map(String::as_str).collect();
        let before = snapshot(d);
        let o = run(&mut fringe(&argv), LIMIT);
        let after = snapshot(d);
        let ctx = format!(
            "{} / {} (seed {seed}; rerun with FRINGE_SEED={seed}): fringe {}",
            kind.name,
            c.class,
            args.join(" ")
        );
        assert_eq!(
            o.code, c.code,
            "{ctx}: exit status {} (want {}); stderr:\n{}",
            o.code, c.code, o.stderr
        );
        let message = if kind.report_on_stdout {
            format!("{}{}", o.stderr, o.stdout)
        } else {
            o.stderr.clone()
        };
        // A message a person can read: a 1 MiB value is not echoed whole.
        assert!(
            o.stderr.len() < 4096,
            "{ctx}: a message of {} bytes:\n{}",
            o.stderr.len(),
            o.stderr.chars().take(2000).collect::<String>()
        );
        for n in &c.needles {
            assert!(
                message.contains(n.as_str()),
                "{ctx}: the message lacks {n:?}:\n{message}"
            );
        }
        // Each cause is said once: no "caused by" line repeats words an
        // earlier line of the message already holds.
        let lines: Vec<&str> = o.stderr.lines().collect();
        for (i, l) in lines.iter().enumerate() {
            if let Some(cause) = l.strip_prefix("  caused by: ") {
                assert!(
                    !lines[..i].iter().any(|p| p.contains(cause)),
                    "{ctx}: the cause {cause:?} is said twice:\n{}",
                    o.stderr
                );
            }
        }
        assert!(
            !o.stderr.contains("panicked") && !o.stderr.contains("RUST_BACKTRACE"),
            "{ctx}: a panic reached the user:\n{}",
            o.stderr
        );
        for out in &kind.outputs {
            assert!(
                !d.join(out).exists(),
                "{ctx}: {out} was written; stderr:\n{}",
                o.stderr
            );
        }
        assert_eq!(
            before.keys().collect::<Vec<_>>(),
            after.keys().collect::<Vec<_>>(),
            "{ctx}: files appeared or vanished; stderr:\n{}",
            o.stderr
        );
        assert!(before == after, "{ctx}: a file's bytes changed");
        let _ = std::fs::set_permissions(&target, std::fs::Permissions::from_mode(0o600));
        count.checked += 1;
    }
    count
}

/// Replaces field `col` (0-based) of line `line` (1-based) of a CSV text.
fn set_field(text: &[u8], line: usize, col: usize, value: &str) -> Vec<u8> {
    let text = String::from_utf8(text.to_vec()).expect("utf-8 fixture");
    let mut lines: Vec<String> = text.lines().map(str::to_string).collect();
    let mut fields: Vec<&str> = lines[line - 1].split(',').collect();
    fields[col] = value;
    lines[line - 1] = fields.join(",");
    (lines.join("\n") + "\n").into_bytes()
}

/// Replaces the first line starting with `key` in a TOML text by `with`.
fn set_line(text: &[u8], key: &str, with: &str) -> Vec<u8> {
    let text = String::from_utf8(text.to_vec()).expect("utf-8 fixture");
    let mut done = false;
    let out: Vec<String> = text
        .lines()
        .map(|l| {
            if !done && l.starts_with(key) {
                done = true;
                with.to_string()
            } else {
                l.to_string()
            }
        })
        .collect();
    assert!(done, "no line starting with {key:?}");
    (out.join("\n") + "\n").into_bytes()
}

/// 1-based number of the line holding `needle` first.
fn line_of(text: &[u8], needle: &str) -> usize {
    let text = std::str::from_utf8(text).expect("utf-8");
    text.lines()
        .position(|l| l.contains(needle))
        .map(|i| i + 1)
        .unwrap_or_else(|| panic!("{needle:?} not in the fixture"))
}

/// UTF-16LE with its byte-order mark, as a Windows editor saves "Unicode".
fn utf16(text: &[u8]) -> Vec<u8> {
    let s = std::str::from_utf8(text).expect("utf-8");
    let mut out = vec![0xFF, 0xFE];
    for u in s.encode_utf16() {
        out.extend_from_slice(&u.to_le_bytes());
    }
    out
}

fn bom(text: &[u8]) -> Vec<u8> {
    [&[0xEF, 0xBB, 0xBF][..], text].concat()
}

/// Random bytes that are not UTF-8 (the first can never start a character).
fn garbage(rng: &mut StdRng, n: usize) -> Vec<u8> {
    let mut b: Vec<u8> = (0..n).map(|_| rng.random_range(0..=255u8)).collect();
    b[0] = 0xC0;
    b
}

/// A cut of a CSV at a random point inside a random data row, before its
/// last comma (so the row lacks a field): the text and the row's line.
fn cut_csv(text: &[u8], rng: &mut StdRng) -> (Vec<u8>, usize) {
    let starts: Vec<usize> = std::iter::once(0)
        .chain(
            text.iter()
                .enumerate()
                .filter(|(_, b)| **b == b'\n')
                .map(|(i, _)| i + 1),
        )
        .filter(|&i| i < text.len())
        .collect();
    let row = rng.random_range(1..starts.len());
    let start = starts[row];
    let end = start
        + text[start..]
            .iter()
            .position(|b| *b == b'\n')
            .unwrap_or(text.len() - start);
    let last_comma = start
        + text[start..end]
            .iter()
            .rposition(|b| *b == b',')
            .expect("comma");
    let at = rng.random_range(start + 1..=last_comma);
    (text[..at].to_vec(), row + 1)
}

/// A cut of a TOML text at a random point inside a random quoted string
/// value (so the string is never closed): the text and the cut's line.
fn cut_toml(text: &[u8], rng: &mut StdRng) -> (Vec<u8>, usize) {
    let s = std::str::from_utf8(text).expect("utf-8");
    let mut spots = Vec::new();
    let mut off = 0;
    for (i, l) in s.split_inclusive('\n').enumerate() {
        if !l.trim_start().starts_with('#') {
            if let (Some(a), Some(b)) = (l.find(" = \""), l.rfind('"')) {
                if b > a + 4 {
                    spots.push((off + a + 4, off + b, i + 1));
                }
            }
        }
        off += l.len();
    }
    let (a, b, line) = spots[rng.random_range(0..spots.len())];
    (text[..rng.random_range(a..=b)].to_vec(), line)
}

/// The reference-sample table's cases, for a command reading it at `path`.
fn csv_cases(good: &[u8], path: &str, rng: &mut StdRng, dup_id: bool) -> Vec<Case> {
    let mut cases = vec![
        case(
            "empty",
            Setup::Bytes(Vec::new()),
            BAD_FILE,
            &[path, "no samples"],
        ),
        case(
            "header only",
            Setup::Bytes(good[..=good.iter().position(|b| *b == b'\n').expect("nl")].to_vec()),
            BAD_FILE,
            &[path, "no samples"],
        ),
    ];
    for k in 0..3 {
        let (t, line) = cut_csv(good, rng);
        cases.push(case(
            format!("cut short inside line {line} (random cut {})", k + 1),
            Setup::Bytes(t),
            BAD_FILE,
            &[path, &format!("line {line}")],
        ));
    }
    let long_id = "W".repeat(1 << 20);
    let mut cases2 = vec![
        case(
            "binary garbage",
            Setup::Bytes(garbage(rng, 4096)),
            BAD_FILE,
            &[path, "line 1"],
        ),
        case(
            "UTF-16 (a spreadsheet's \"Unicode text\")",
            Setup::Bytes(utf16(good)),
            BAD_FILE,
            &[path, "line 1: column 1", "save as CSV UTF-8"],
        ),
        case(
            "Latin-1 sample id on line 4",
            Setup::Bytes(set_field(good, 4, 0, "M\u{fc}ller-4")).latin1(),
            BAD_FILE,
            &[path, "line 4: column 2", "save as CSV UTF-8"],
        ),
        // (The demo's table says each row's basis in its tenth column,
        // `moisture_basis`: `cal capture` writes it.)
        case(
            "a lab value given on a dry basis (moisture_basis) under a wet-basis command",
            Setup::Bytes(set_field(good, 3, 9, "dry")),
            BAD_FILE,
            &[path, "line 3, column 10 (moisture_basis)", "--basis dry"],
        ),
        case(
            "byte-order mark, then NaN on line 3",
            Setup::Bytes(bom(&set_field(good, 3, 4, "NaN"))),
            BAD_FILE,
            &[path, "line 3, column 5 (eps1_re)"],
        ),
        case(
            "a 1 MiB line (an extra field)",
            Setup::Bytes(set_field(good, 4, 8, &format!("1.0,{long_id}"))),
            BAD_FILE,
            &[path, "line 4"],
        ),
        case(
            "a 1 MiB number",
            Setup::Bytes(set_field(good, 4, 4, &"9".repeat(1 << 20))),
            BAD_FILE,
            &[path, "line 4, column 5 (eps1_re)"],
        ),
        case(
            "huge number 1e400",
            Setup::Bytes(set_field(good, 3, 4, "1e400")),
            BAD_FILE,
            &[path, "line 3, column 5 (eps1_re)"],
        ),
        case(
            "NaN",
            Setup::Bytes(set_field(good, 3, 7, "nan")),
            BAD_FILE,
            &[path, "line 3, column 8 (eps2_re)"],
        ),
        case(
            "inf",
            Setup::Bytes(set_field(good, 5, 5, "inf")),
            BAD_FILE,
            &[path, "line 5, column 6 (eps1_im)"],
        ),
        case(
            "-inf temperature",
            Setup::Bytes(set_field(good, 2, 2, "-inf")),
            BAD_FILE,
            &[path, "line 2, column 3 (temperature_c)"],
        ),
        case(
            "a column twice",
            Setup::Bytes(set_field(good, 1, 5, "eps1_re")),
            BAD_FILE,
            &[path, "line 1", "eps1_re"],
        ),
        case(
            "temperature in kelvin",
            Setup::Bytes(set_field(good, 3, 2, "291.02")),
            BAD_FILE,
            &[path, "line 3, column 3 (temperature_c)"],
        ),
        case(
            "frequency with its unit",
            Setup::Bytes(set_field(good, 3, 3, "1 MHz")),
            BAD_FILE,
            &[path, "line 3, column 4 (freq1_hz)"],
        ),
        case(
            "second frequency in MHz",
            Setup::Bytes(set_field(good, 2, 6, "20")),
            BAD_FILE,
            &[path, "line 2"],
        ),
        case(
            "decimal commas (semicolon separated)",
            Setup::Bytes(
                String::from_utf8(good.to_vec())
                    .expect("utf-8")
                    .replace(',', ";")
                    .replace('.', ",")
                    .into_bytes(),
            ),
            BAD_FILE,
            &[path, "line 1", "`;`"],
        ),
        case(
            "bulk density in g/cm3 (0.76)",
            Setup::Bytes(
                String::from_utf8(good.to_vec())
                    .expect("utf-8")
                    .lines()
                    .enumerate()
                    .map(|(i, l)| {
                        if i == 0 {
                            format!("{l},bulk_density_kg_m3\n")
                        } else {
                            format!("{l},0.76\n")
                        }
                    })
                    .collect::<String>()
                    .into_bytes(),
            ),
            BAD_FILE,
            // (The eleventh column: after the demo table's moisture_basis.)
            &[path, "line 2, column 11 (bulk_density_kg_m3)", "kg/m^3"],
        ),
        case("a folder", Setup::Dir, BAD_FILE, &[path, "directory"]),
        case(
            "no read permission",
            Setup::NoRead,
            BAD_FILE,
            &[path, "ermission denied"],
        ),
    ];
    if dup_id {
        cases2.push(case(
            "a sample id twice",
            Setup::Bytes(set_field(good, 5, 0, "HGM-002")),
            BAD_FILE,
            &[path, "line 5", "HGM-002", "line 3"],
        ));
    }
    cases.extend(cases2);
    cases
}

/// Turns every `ü` of a case's UTF-8 bytes into its Latin-1 byte.
trait Latin1 {
    fn latin1(self) -> Self;
}

impl Latin1 for Setup {
    fn latin1(self) -> Self {
        match self {
            Setup::Bytes(b) => {
                let s = String::from_utf8(b).expect("utf-8");
                Setup::Bytes(
                    s.chars()
                        .map(|c| u8::try_from(u32::from(c)).expect("Latin-1"))
                        .collect(),
                )
            }
            s => s,
        }
    }
}

fn kinds(rng: &mut StdRng) -> Vec<Kind> {
    let f = fixtures();
    let mut out = Vec::new();

    // 1. The reference-sample table, read by `cal fit`.
    out.push(Kind {
        name: "reference samples (cal fit --samples)",
        file: "samples.csv",
        good: Some(f.samples.clone()),
        prepare: Box::new(|_| {}),
        args: Box::new(|d| {
            vec![
                "cal".into(),
                "fit".into(),
                "--samples".into(),
                p(d, "samples.csv"),
                "--out".into(),
                p(d, "out.toml"),
                "--plot".into(),
                p(d, "fit.svg"),
            ]
        }),
        outputs: vec!["out.toml", "fit.svg"],
        report_on_stdout: false,
        cases: Vec::new(),
    });
    // 2. The same table as the input of `cal predict` (moisture optional).
    out.push(Kind {
        name: "sample table (cal predict --input)",
        file: "input.csv",
        good: Some(f.samples.clone()),
        prepare: Box::new(|d| std::fs::write(d.join("cal.toml"), &fixtures().product).expect("w")),
        args: Box::new(|d| {
            vec![
                "cal".into(),
                "predict".into(),
                "--cal".into(),
                p(d, "cal.toml"),
                "--input".into(),
                p(d, "input.csv"),
                "--out".into(),
                p(d, "pred.csv"),
            ]
        }),
        outputs: vec!["pred.csv"],
        report_on_stdout: false,
        cases: Vec::new(),
    });
    for k in &mut out {
        // The path in the message is the one given on the command line:
        // each case's folder differs, so the needle is the file name (with
        // the separator before it).
        let needle = format!("/{}", k.file);
        k.cases = csv_cases(&f.samples, &needle, rng, true);
    }
    out.extend(other_kinds(rng));
    out
}

fn other_kinds(rng: &mut StdRng) -> Vec<Kind> {
    let f = fixtures();
    let mut out = Vec::new();

    // 3. The product calibration, read by `cal predict --cal`.
    {
        let good = &f.product;
        let path = "/cal.toml";
        let mut cases = vec![case(
            "empty",
            Setup::Bytes(Vec::new()),
            BAD_FILE,
            &[&format!("{path}:1:1"), "missing field"],
        )];
        for k in 0..3 {
            let (t, line) = cut_toml(good, rng);
            cases.push(case(
                format!("cut short inside line {line} (random cut {})", k + 1),
                Setup::Bytes(t),
                BAD_FILE,
                &[&format!("{path}:{line}:")],
            ));
        }
        let sec = line_of(good, "sec_pct = ");
        let name = line_of(good, "name = ");
        cases.extend([
            case(
                "binary garbage",
                Setup::Bytes(garbage(rng, 4096)),
                BAD_FILE,
                &[&format!("{path}:1:1"), "not UTF-8"],
            ),
            case(
                "UTF-16",
                Setup::Bytes(utf16(good)),
                BAD_FILE,
                &[&format!("{path}:1:1"), "not UTF-8"],
            ),
            case(
                "Latin-1 product name",
                Setup::Bytes(set_line(good, "name = ", "name = \"Weizen gr\u{fc}n\"")).latin1(),
                BAD_FILE,
                &[&format!("{path}:{name}:18"), "0xFC", "not UTF-8"],
            ),
            case(
                "byte-order mark, then an unknown basis",
                Setup::Bytes(bom(&set_line(good, "basis = ", "basis = \"percent\""))),
                BAD_FILE,
                &[path, "`basis`", "percent"],
            ),
            case(
                "a 1 MiB product name",
                Setup::Bytes(set_line(
                    good,
                    "name = ",
                    &format!("name = \"{}\"", "W".repeat(1 << 20)),
                )),
                BAD_FILE,
                &[path, "`name`"],
            ),
            case(
                "huge number 1e400",
                Setup::Bytes(set_line(good, "sec_pct = ", "sec_pct = 1e400")),
                BAD_FILE,
                &[&format!("{path}:{sec}:")],
            ),
            case(
                "a number beyond f32 (1e39)",
                Setup::Bytes(set_line(good, "sec_pct = ", "sec_pct = 1e39")),
                BAD_FILE,
                &[path, "`sec_pct`"],
            ),
            case(
                "NaN",
                Setup::Bytes(set_line(good, "sec_pct = ", "sec_pct = nan")),
                BAD_FILE,
                &[path, "`sec_pct`"],
            ),
            case(
                "inf in the parameters",
                Setup::Bytes(set_line(good, "params = [", "params = [inf, 1.0]")),
                BAD_FILE,
                &[path, "`params`"],
            ),
            case(
                "a key twice",
                Setup::Bytes(set_line(good, "name = ", "name = \"a\"\nname = \"b\"")),
                BAD_FILE,
                &[&format!("{path}:{}:", name + 1), "duplicate key"],
            ),
            case(
                "temperature range in kelvin",
                Setup::Bytes(set_line(
                    good,
                    "temperature_c = ",
                    "temperature_c = [282.33, 308.37]",
                )),
                BAD_FILE,
                &[path, "`temperature_c`", "kelvin"],
            ),
            case(
                "frequencies in MHz",
                Setup::Bytes(set_line(good, "freqs_hz = ", "freqs_hz = [1.0, 20.0]")),
                BAD_FILE,
                &[path, "`source.freqs_hz`", "MHz"],
            ),
            case(
                "a number as text",
                Setup::Bytes(set_line(good, "sec_pct = ", "sec_pct = \"0.1 %\"")),
                BAD_FILE,
                &[&format!("{path}:{sec}:")],
            ),
            case("a folder", Setup::Dir, BAD_FILE, &[path, "directory"]),
            case(
                "no read permission",
                Setup::NoRead,
                BAD_FILE,
                &[path, "ermission denied"],
            ),
        ]);
        out.push(Kind {
            name: "product calibration (cal predict --cal)",
            file: "cal.toml",
            good: Some(good.clone()),
            prepare: Box::new(|d| {
                std::fs::write(d.join("in.csv"), &fixtures().samples).expect("w")
            }),
            args: Box::new(|d| {
                vec![
                    "cal".into(),
                    "predict".into(),
                    "--cal".into(),
                    p(d, "cal.toml"),
                    "--input".into(),
                    p(d, "in.csv"),
                    "--out".into(),
                    p(d, "pred.csv"),
                ]
            }),
            outputs: vec!["pred.csv"],
            report_on_stdout: false,
            cases,
        });
    }

    // 4. A scenario file, read by `fringe sim`.
    {
        let spec = ScenarioSpec::clean("HGM-L2-0901", 9);
        let good = spec.toml().into_bytes();
        let path = "/scenario.toml";
        let mut cases = vec![case(
            "empty",
            Setup::Bytes(Vec::new()),
            BAD_FILE,
            &[&format!("{path}:1:1"), "missing field"],
        )];
        for k in 0..3 {
            let (t, line) = cut_toml(&good, rng);
            cases.push(case(
                format!("cut short inside line {line} (random cut {})", k + 1),
                Setup::Bytes(t),
                BAD_FILE,
                &[&format!("{path}:{line}:")],
            ));
        }
        let seed_l = line_of(&good, "seed = ");
        let baud_l = line_of(&good, "baud = ");
        let ts_l = line_of(&good, "time_scale = ");
        cases.extend([
            case(
                "binary garbage",
                Setup::Bytes(garbage(rng, 4096)),
                BAD_FILE,
                &[&format!("{path}:1:1"), "not UTF-8"],
            ),
            case(
                "UTF-16",
                Setup::Bytes(utf16(&good)),
                BAD_FILE,
                &[&format!("{path}:1:1"), "not UTF-8"],
            ),
            case(
                "Latin-1 scenario name",
                Setup::Bytes(set_line(&good, "name = ", "name = \"M\u{fc}hle\"")).latin1(),
                BAD_FILE,
                &[&format!("{path}:1:10"), "0xFC", "not UTF-8"],
            ),
            case(
                "byte-order mark, then a negative seed",
                Setup::Bytes(bom(&set_line(&good, "seed = ", "seed = -1"))),
                BAD_FILE,
                &[&format!("{path}:{seed_l}:")],
            ),
            case(
                "a 1 MiB serial",
                Setup::Bytes(set_line(
                    &good,
                    "serial = ",
                    &format!("serial = \"{}\"", "W".repeat(1 << 20)),
                )),
                BAD_FILE,
                &[path, "device.serial"],
            ),
            case(
                "huge number 1e400",
                Setup::Bytes(set_line(&good, "time_scale = ", "time_scale = 1e400")),
                BAD_FILE,
                &[&format!("{path}:{ts_l}:")],
            ),
            case(
                "huge integer seed",
                Setup::Bytes(set_line(&good, "seed = ", "seed = 99999999999999999999999")),
                BAD_FILE,
                &[&format!("{path}:{seed_l}:")],
            ),
            case(
                "NaN time scale",
                Setup::Bytes(set_line(&good, "time_scale = ", "time_scale = nan")),
                BAD_FILE,
                &[path, "device.time_scale"],
            ),
            case(
                "inf time scale",
                Setup::Bytes(set_line(&good, "time_scale = ", "time_scale = inf")),
                BAD_FILE,
                &[path, "device.time_scale"],
            ),
            case(
                "NaN in a curve",
                Setup::Bytes(set_line(
                    &good,
                    "moisture_pct = ",
                    "moisture_pct = [[0, nan]]",
                )),
                BAD_FILE,
                &[path, "moisture_pct[0]"],
            ),
            case(
                "a key twice",
                Setup::Bytes(set_line(
                    &good,
                    "serial = ",
                    "serial = \"A\"\nserial = \"B\"",
                )),
                BAD_FILE,
                &[
                    &format!("{path}:{}:", line_of(&good, "serial = ") + 1),
                    "duplicate key",
                ],
            ),
            case(
                "temperature in kelvin",
                Setup::Bytes(set_line(
                    &good,
                    "temperature_c = ",
                    "temperature_c = [[0, 303.15]]",
                )),
                BAD_FILE,
                &[path, "temperature_c[0]"],
            ),
            case(
                "baud rate in kbaud",
                Setup::Bytes(set_line(&good, "baud = ", "baud = 115.2")),
                BAD_FILE,
                &[&format!("{path}:{baud_l}:")],
            ),
            case("a folder", Setup::Dir, BAD_FILE, &[path, "directory"]),
            case(
                "no read permission",
                Setup::NoRead,
                BAD_FILE,
                &[path, "ermission denied"],
            ),
        ]);
        out.push(Kind {
            name: "scenario (sim --scenario)",
            file: "scenario.toml",
            good: Some(good),
            prepare: Box::new(|_| {}),
            args: Box::new(|d| {
                vec![
                    "sim".into(),
                    "--scenario".into(),
                    p(d, "scenario.toml"),
                    "--link".into(),
                    p(d, "port"),
                    "--record".into(),
                    p(d, "record.jsonl"),
                ]
            }),
            outputs: vec!["port", "record.jsonl"],
            report_on_stdout: false,
            cases,
        });
    }

    // 5. A line file, read by every command (`--config`); `pull` with it.
    {
        let good = b"port = \"/dev/fringe-nowhere\"\nbaud = 115200\ndb = \"line2.db\"\nkey_file = \"dev.key\"\n\n[alarm]\nmoisture_low_pct = 12.0\nmoisture_high_pct = 15.5\nuncertainty_max_pct = 1.0\n".to_vec();
        let path = "/line2.toml";
        let mut cases = Vec::new();
        for k in 0..3 {
            let (t, line) = cut_toml(&good, rng);
            cases.push(case(
                format!("cut short inside line {line} (random cut {})", k + 1),
                Setup::Bytes(t),
                BAD_FILE,
                &[&format!("{path}:{line}:")],
            ));
        }
        cases.extend([
            case(
                "binary garbage",
                Setup::Bytes(garbage(rng, 4096)),
                BAD_FILE,
                &[&format!("{path}:1:1"), "not UTF-8"],
            ),
            case(
                "UTF-16",
                Setup::Bytes(utf16(&good)),
                BAD_FILE,
                &[&format!("{path}:1:1"), "not UTF-8"],
            ),
            case(
                "Latin-1 database name",
                Setup::Bytes(set_line(&good, "db = ", "db = \"l\u{e4}ngs.db\"")).latin1(),
                BAD_FILE,
                &[&format!("{path}:3:8"), "0xE4", "not UTF-8"],
            ),
            case(
                "byte-order mark, then a baud rate of 12",
                Setup::Bytes(bom(&set_line(&good, "baud = ", "baud = 12"))),
                BAD_FILE,
                &[path, "baud = 12"],
            ),
            case(
                "a 1 MiB unknown key",
                Setup::Bytes(set_line(
                    &good,
                    "baud = ",
                    &format!("baud = 115200\n{} = 1", "w".repeat(1 << 20)),
                )),
                BAD_FILE,
                &[&format!("{path}:3:1")],
            ),
            case(
                "huge number 1e400",
                Setup::Bytes(set_line(
                    &good,
                    "moisture_low_pct = ",
                    "moisture_low_pct = 1e400",
                )),
                BAD_FILE,
                &[&format!("{path}:7:")],
            ),
            case(
                "baud beyond u32",
                Setup::Bytes(set_line(&good, "baud = ", "baud = 99999999999")),
                BAD_FILE,
                &[&format!("{path}:2:")],
            ),
            case(
                "NaN alarm limit",
                Setup::Bytes(set_line(
                    &good,
                    "moisture_low_pct = ",
                    "moisture_low_pct = nan",
                )),
                BAD_FILE,
                &[path, "alarm.moisture_low_pct"],
            ),
            case(
                "inf alarm limit",
                Setup::Bytes(set_line(
                    &good,
                    "uncertainty_max_pct = ",
                    "uncertainty_max_pct = inf",
                )),
                BAD_FILE,
                &[path, "alarm.uncertainty_max_pct"],
            ),
            case(
                "a key twice",
                Setup::Bytes(set_line(&good, "db = ", "db = \"a.db\"\ndb = \"b.db\"")),
                BAD_FILE,
                &[&format!("{path}:4:"), "duplicate key"],
            ),
            case(
                "alarm limit in per mille",
                Setup::Bytes(set_line(
                    &good,
                    "moisture_high_pct = ",
                    "moisture_high_pct = 155",
                )),
                BAD_FILE,
                &[path, "alarm.moisture_high_pct"],
            ),
            case("a folder", Setup::Dir, BAD_FILE, &[path, "directory"]),
            case(
                "no read permission",
                Setup::NoRead,
                BAD_FILE,
                &[path, "ermission denied"],
            ),
        ]);
        out.push(Kind {
            name: "line file (--config, pull)",
            file: "line2.toml",
            good: Some(good),
            prepare: Box::new(|d| {
                std::fs::write(d.join("dev.key"), &fixtures().key).expect("w");
                std::fs::set_permissions(d.join("dev.key"), std::fs::Permissions::from_mode(0o600))
                    .expect("chmod");
            }),
            args: Box::new(|d| {
                vec![
                    "--config".into(),
                    p(d, "line2.toml"),
                    "pull".into(),
                    "--port".into(),
                    "/dev/fringe-nowhere".into(),
                ]
            }),
            outputs: vec!["line2.db"],
            report_on_stdout: false,
            cases,
        });
    }

    // 6. A site file, read by `fringe gateway`.
    {
        let good = b"name = \"Test mill (invented)\"\nstore = \"site.db\"\nstale_after_s = 10\n\n[[device]]\nunit = 1\nport = \"sim:sc.toml\"\ntag = \"intake\"\n".to_vec();
        let path = "/site.toml";
        let mut cases = vec![case(
            "empty",
            Setup::Bytes(Vec::new()),
            BAD_FILE,
            &[&format!("{path}:1:1"), "missing field"],
        )];
        for k in 0..3 {
            let (t, line) = cut_toml(&good, rng);
            cases.push(case(
                format!("cut short inside line {line} (random cut {})", k + 1),
                Setup::Bytes(t),
                BAD_FILE,
                &[&format!("{path}:{line}:")],
            ));
        }
        let dup_unit = [
            &good[..],
            b"\n[[device]]\nunit = 1\nport = \"sim:sc.toml\"\n",
        ]
        .concat();
        cases.extend([
            case(
                "binary garbage",
                Setup::Bytes(garbage(rng, 4096)),
                BAD_FILE,
                &[&format!("{path}:1:1"), "not UTF-8"],
            ),
            case(
                "UTF-16",
                Setup::Bytes(utf16(&good)),
                BAD_FILE,
                &[&format!("{path}:1:1"), "not UTF-8"],
            ),
            case(
                "Latin-1 tag",
                Setup::Bytes(set_line(&good, "tag = ", "tag = \"F\u{fc}llstand\"")).latin1(),
                BAD_FILE,
                &[&format!("{path}:8:9"), "0xFC", "not UTF-8"],
            ),
            case(
                "byte-order mark, then unit 0",
                Setup::Bytes(bom(&set_line(&good, "unit = ", "unit = 0"))),
                BAD_FILE,
                &[&format!("{path}:6"), "unit"],
            ),
            case(
                "a 1 MiB unknown key",
                Setup::Bytes(set_line(
                    &good,
                    "stale_after_s = ",
                    &format!("stale_after_s = 10\n{} = 1", "w".repeat(1 << 20)),
                )),
                BAD_FILE,
                &[&format!("{path}:4:1")],
            ),
            case(
                "huge number 1e400",
                Setup::Bytes(set_line(&good, "stale_after_s = ", "stale_after_s = 1e400")),
                BAD_FILE,
                &[&format!("{path}:3:")],
            ),
            case(
                "huge unit id",
                Setup::Bytes(set_line(&good, "unit = ", "unit = 99999999999999")),
                BAD_FILE,
                &[&format!("{path}:6"), "unit"],
            ),
            case(
                "NaN",
                Setup::Bytes(set_line(&good, "stale_after_s = ", "stale_after_s = nan")),
                BAD_FILE,
                &[&format!("{path}:3"), "stale_after_s"],
            ),
            case(
                "inf",
                Setup::Bytes(set_line(&good, "stale_after_s = ", "stale_after_s = inf")),
                BAD_FILE,
                &[&format!("{path}:3"), "stale_after_s"],
            ),
            case(
                "a key twice",
                Setup::Bytes(set_line(
                    &good,
                    "store = ",
                    "store = \"a.db\"\nstore = \"b.db\"",
                )),
                BAD_FILE,
                &[&format!("{path}:3:"), "duplicate key"],
            ),
            case(
                "a unit id twice",
                Setup::Bytes(dup_unit),
                BAD_FILE,
                &[&format!("{path}:11"), "already the unit"],
            ),
            case(
                "stale time in ms",
                Setup::Bytes(set_line(
                    &good,
                    "stale_after_s = ",
                    "stale_after_s = 100000",
                )),
                BAD_FILE,
                &[&format!("{path}:3"), "stale_after_s"],
            ),
            case(
                "a density writer with its port",
                Setup::Bytes(set_line(
                    &good,
                    "stale_after_s = ",
                    "stale_after_s = 10\n[modbus]\nlisten = \"127.0.0.1:0\"\ndensity_writers = [\"10.20.0.5:502\"]",
                )),
                BAD_FILE,
                &[&format!("{path}:6"), "modbus.density_writers[0]", "10.20.0.5:502"],
            ),
            case(
                "a wildcard address as a density writer",
                Setup::Bytes(set_line(
                    &good,
                    "stale_after_s = ",
                    "stale_after_s = 10\n[modbus]\nlisten = \"127.0.0.1:0\"\ndensity_writers = [\"0.0.0.0\"]",
                )),
                BAD_FILE,
                &[&format!("{path}:6"), "there is no wildcard"],
            ),
            case(
                "a density from Modbus with no PLC named",
                Setup::Bytes(
                    [&good[..], b"[device.density]\nfrom = \"modbus\"\n"].concat(),
                ),
                BAD_FILE,
                &[&format!("{path}:10"), "device[0].density.from", "density_writers"],
            ),
            case("a folder", Setup::Dir, BAD_FILE, &[path, "directory"]),
            case(
                "no read permission",
                Setup::NoRead,
                BAD_FILE,
                &[path, "ermission denied"],
            ),
        ]);
        let sc = ScenarioSpec::clean("BFM-T-0001", 3).toml();
        out.push(Kind {
            name: "site file (gateway --config)",
            file: "site.toml",
            good: Some(good),
            prepare: Box::new(move |d| std::fs::write(d.join("sc.toml"), &sc).expect("w")),
            args: Box::new(|d| {
                vec![
                    "gateway".into(),
                    "--config".into(),
                    p(d, "site.toml"),
                    "--duration-s".into(),
                    "5".into(),
                ]
            }),
            outputs: vec!["site.db", "a.db", "b.db"],
            report_on_stdout: false,
            cases,
        });
    }

    // 7. A key file, loaded by `pull` before it opens the port.
    {
        let good = f.key.clone();
        let path = "/dev.key";
        let hex = String::from_utf8(good.clone()).expect("utf-8");
        let hex = hex.trim();
        let mut cases = vec![case(
            "empty",
            Setup::Bytes(Vec::new()),
            BAD_FILE,
            &[path, "64 hex digits", "found 0"],
        )];
        for k in 0..3 {
            let at = rng.random_range(1..64);
            cases.push(case(
                format!("cut short after {at} digits (random cut {})", k + 1),
                Setup::Bytes(hex.as_bytes()[..at].to_vec()),
                BAD_FILE,
                &[path, &format!("found {at} characters")],
            ));
        }
        cases.extend([
            case(
                "binary garbage",
                Setup::Bytes(garbage(rng, 64)),
                BAD_FILE,
                &[path],
            ),
            case("UTF-16", Setup::Bytes(utf16(&good)), BAD_FILE, &[path]),
            case(
                "byte-order mark, then 63 digits",
                Setup::Bytes(bom(&hex.as_bytes()[..63])),
                BAD_FILE,
                &[path, "found 63 characters"],
            ),
            case(
                "a 1 MiB line",
                Setup::Bytes(format!("{hex}{}", "0".repeat(1 << 20)).into_bytes()),
                BAD_FILE,
                &[path, "64 hex digits"],
            ),
            case(
                "two keys",
                Setup::Bytes(format!("{hex}\n{hex}\n").into_bytes()),
                BAD_FILE,
                &[path, "found 128 characters"],
            ),
            case(
                "not hex (the key as text)",
                Setup::Bytes(format!("{}zz", &hex[..62]).into_bytes()),
                BAD_FILE,
                &[path, "digit 63"],
            ),
            case("a folder", Setup::Dir, BAD_FILE, &[path, "directory"]),
            case(
                "no read permission",
                Setup::NoRead,
                BAD_FILE,
                &[path, "ermission denied"],
            ),
        ]);
        out.push(Kind {
            name: "key file (pull --key-file)",
            file: "dev.key",
            good: Some(good),
            prepare: Box::new(|_| {}),
            args: Box::new(|d| {
                vec![
                    "pull".into(),
                    "--port".into(),
                    "/dev/fringe-nowhere".into(),
                    "--db".into(),
                    p(d, "line2.db"),
                    "--key-file".into(),
                    p(d, "dev.key"),
                ]
            }),
            outputs: vec!["line2.db"],
            report_on_stdout: false,
            cases,
        });
    }

    // 8. Lab pairs (lab against predicted moisture), read by `cal adjust`.
    {
        let good = f.pairs.clone();
        let path = "/pairs.csv";
        let mut cases = vec![case(
            "empty",
            Setup::Bytes(Vec::new()),
            BAD_FILE,
            &[path, "no samples"],
        )];
        for k in 0..3 {
            let (t, line) = cut_csv(&good, rng);
            cases.push(case(
                format!("cut short inside line {line} (random cut {})", k + 1),
                Setup::Bytes(t),
                BAD_FILE,
                &[path, &format!("line {line}")],
            ));
        }
        cases.extend([
            case(
                "binary garbage",
                Setup::Bytes(garbage(rng, 4096)),
                BAD_FILE,
                &[path, "line 1"],
            ),
            case(
                "UTF-16",
                Setup::Bytes(utf16(&good)),
                BAD_FILE,
                &[path, "line 1"],
            ),
            case(
                "Latin-1 sample id on line 4",
                Setup::Bytes(set_field(&good, 4, 0, "M\u{fc}ller-4")).latin1(),
                BAD_FILE,
                &[path, "line 4"],
            ),
            case(
                "byte-order mark, then NaN on line 3",
                Setup::Bytes(bom(&set_field(&good, 3, 1, "NaN"))),
                BAD_FILE,
                &[path, "line 3, column 2 (moisture_pct)"],
            ),
            case(
                "a 1 MiB number",
                Setup::Bytes(set_field(&good, 4, 2, &format!("1{}", "x".repeat(1 << 20)))),
                BAD_FILE,
                &[path, "line 4, column 3 (predicted_moisture_pct)"],
            ),
            case(
                "huge number 1e400",
                Setup::Bytes(set_field(&good, 3, 2, "1e400")),
                BAD_FILE,
                &[path, "line 3, column 3 (predicted_moisture_pct)"],
            ),
            case(
                "inf",
                Setup::Bytes(set_field(&good, 6, 1, "inf")),
                BAD_FILE,
                &[path, "line 6, column 2 (moisture_pct)"],
            ),
            case(
                "a sample twice",
                Setup::Bytes(set_field(&good, 7, 0, "HGM-003")),
                BAD_FILE,
                &[path, "line 7", "HGM-003", "line 4"],
            ),
            case(
                "moisture with a % sign",
                Setup::Bytes(set_field(&good, 5, 2, "14.1 %")),
                BAD_FILE,
                &[path, "line 5, column 3 (predicted_moisture_pct)"],
            ),
            case("a folder", Setup::Dir, BAD_FILE, &[path, "directory"]),
            case(
                "no read permission",
                Setup::NoRead,
                BAD_FILE,
                &[path, "ermission denied"],
            ),
        ]);
        out.push(Kind {
            name: "lab pairs (cal adjust --pairs)",
            file: "pairs.csv",
            good: Some(good),
            prepare: Box::new(|d| {
                std::fs::write(d.join("cal.toml"), &fixtures().product).expect("w")
            }),
            args: Box::new(|d| {
                vec![
                    "cal".into(),
                    "adjust".into(),
                    "--cal".into(),
                    p(d, "cal.toml"),
                    "--pairs".into(),
                    p(d, "pairs.csv"),
                    "--correct".into(),
                    "bias".into(),
                    "--out".into(),
                    p(d, "adj.toml"),
                ]
            }),
            outputs: vec!["adj.toml"],
            report_on_stdout: false,
            cases,
        });
    }

    // 9. An audit bundle, read by `audit verify`: a damaged member is a
    // problem found (exit 4) named with its file and line.
    {
        let records = std::fs::read(f.bundle.join("records.jsonl")).expect("records");
        let readings = std::fs::read(f.bundle.join("readings.csv")).expect("readings");
        let n_records = records.iter().filter(|b| **b == b'\n').count();
        let member = |mut c: Case, m: &'static str| {
            c.member = Some(m);
            c
        };
        let mut cases = vec![
            member(
                case(
                    "empty records",
                    Setup::Bytes(Vec::new()),
                    PROBLEMS,
                    &["records.jsonl", "records removed"],
                ),
                "records.jsonl",
            ),
            // The manifest emptied or overwritten is a finding too.
            member(
                case(
                    "empty manifest",
                    Setup::Bytes(Vec::new()),
                    PROBLEMS,
                    &["manifest.json", "empty"],
                ),
                "manifest.json",
            ),
            member(
                case(
                    "binary garbage for the manifest",
                    Setup::Bytes((0..=255u8).rev().cycle().take(700).collect()),
                    PROBLEMS,
                    &["manifest.json", "line 1"],
                ),
                "manifest.json",
            ),
        ];
        for k in 0..3 {
            // A cut inside a line (never just before its newline, where the
            // line would still be whole).
            let starts: Vec<usize> = std::iter::once(0)
                .chain(
                    records
                        .iter()
                        .enumerate()
                        .filter(|(_, b)| **b == b'\n')
                        .map(|(i, _)| i + 1),
                )
                .filter(|&i| i < records.len())
                .collect();
            let line = rng.random_range(0..starts.len());
            let end = starts.get(line + 1).map_or(records.len(), |e| *e) - 1;
            let at = rng.random_range(starts[line] + 1..end - 1);
            cases.push(member(
                case(
                    format!(
                        "records cut short inside line {} (random cut {})",
                        line + 1,
                        k + 1
                    ),
                    Setup::Bytes(records[..at].to_vec()),
                    PROBLEMS,
                    &[&format!("records.jsonl: line {}", line + 1)],
                ),
                "records.jsonl",
            ));
        }
        let mut dup = records.clone();
        let second = records.iter().position(|b| *b == b'\n').expect("nl") + 1;
        let third = second
            + records[second..]
                .iter()
                .position(|b| *b == b'\n')
                .expect("nl")
            + 1;
        dup.splice(third..third, records[second..third].iter().copied());
        let long = [&records[..], "x".repeat(1 << 20).as_bytes(), b"\n"].concat();
        cases.extend([
            member(
                case(
                    "binary garbage readings",
                    Setup::Bytes(garbage(rng, 4096)),
                    PROBLEMS,
                    &["readings.csv: line 1"],
                ),
                "readings.csv",
            ),
            member(
                case(
                    "UTF-16 readings",
                    Setup::Bytes(utf16(&readings)),
                    PROBLEMS,
                    &["readings.csv: line 1"],
                ),
                "readings.csv",
            ),
            member(
                case(
                    "byte-order mark on the readings",
                    Setup::Bytes(bom(&readings)),
                    PROBLEMS,
                    &["readings.csv", "SHA-256"],
                ),
                "readings.csv",
            ),
            member(
                case(
                    "a 1 MiB line after the records",
                    Setup::Bytes(long),
                    PROBLEMS,
                    &[&format!("records.jsonl: line {}", n_records + 1)],
                ),
                "records.jsonl",
            ),
            member(
                case(
                    "huge moisture 1e400",
                    Setup::Bytes(set_field(&readings, 3, 8, "1e400")),
                    PROBLEMS,
                    &["readings.csv: line 3"],
                ),
                "readings.csv",
            ),
            member(
                case(
                    "NaN moisture",
                    Setup::Bytes(set_field(&readings, 4, 8, "NaN")),
                    PROBLEMS,
                    &["readings.csv: line 4"],
                ),
                "readings.csv",
            ),
            member(
                case(
                    "a record twice",
                    Setup::Bytes(dup),
                    PROBLEMS,
                    &["records.jsonl: line 3"],
                ),
                "records.jsonl",
            ),
            member(
                case(
                    "temperature in kelvin",
                    Setup::Bytes(set_field(&readings, 2, 7, "297.15")),
                    PROBLEMS,
                    &["readings.csv: line 2"],
                ),
                "readings.csv",
            ),
            // A member that cannot be read at all is no finding about the
            // records but a failure to read them: README's status 1
            // ("another error"), the file and the reason named.
            member(
                case(
                    "records a folder",
                    Setup::Dir,
                    OTHER,
                    &["records.jsonl", "directory"],
                ),
                "records.jsonl",
            ),
            member(
                case(
                    "records without read permission",
                    Setup::NoRead,
                    OTHER,
                    &["records.jsonl", "ermission denied"],
                ),
                "records.jsonl",
            ),
        ]);
        let bundle = f.bundle.clone();
        out.push(Kind {
            name: "audit bundle (audit verify)",
            file: "bundle",
            good: None,
            prepare: Box::new(move |d| copy_dir(&bundle, &d.join("bundle"))),
            args: Box::new(|d| vec!["audit".into(), "verify".into(), p(d, "bundle")]),
            outputs: vec![],
            report_on_stdout: true,
            cases,
        });
    }
    out
}

/// Every kind, every class: exit status, message, nothing written; counted.
#[test]
fn every_bad_file_is_refused_with_its_place_and_nothing_written() {
    let seed = seed(0xBAD_F11E);
    let mut rng = StdRng::seed_from_u64(seed);
    let t0 = Instant::now();
    let kinds = kinds(&mut rng);
    let rows: usize = kinds.iter().map(|k| k.cases.len()).sum();
    let (mut checked, mut skipped) = (0, 0);
    println!("bad files (seed {seed}):");
    for k in &kinds {
        // A table that lost its rows fails here, before anything runs.
        assert!(k.cases.len() >= 12, "{}: {} rows", k.name, k.cases.len());
        let c = check_kind(k, seed);
        println!(
            "  {:<42} {:>3} cases checked, {} skipped (running as root)",
            k.name, c.checked, c.skipped_root
        );
        checked += c.checked;
        skipped += c.skipped_root;
    }
    println!(
        "  total: {checked} cases checked, {skipped} skipped, of {rows} rows in {} kinds ({:.1} s)",
        kinds.len(),
        t0.elapsed().as_secs_f64()
    );
    // Every row was run: checked or, for want of a non-root user, skipped
    // and said.
    assert_eq!(checked + skipped, rows, "every row is run");
    assert!(
        skipped <= kinds.len(),
        "only the no-read-permission cases may be skipped ({skipped})"
    );
}
