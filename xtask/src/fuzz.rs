//! The fuzz crates: the smoke run of `cargo xtask test` and the long
//! campaigns of `cargo xtask fuzz`.
//!
//! Each fuzz crate is a cargo-fuzz crate in its own workspace at
//! `<dir>/fuzz` (it needs nightly and libFuzzer), run from `<dir>`. The
//! three build into one target folder, `target/fuzz`, so what they share
//! (libFuzzer, the protocol crate, serde, ...) is built once, with 16
//! codegen units rather than cargo-fuzz's default of one (a faster build on
//! two cores for somewhat slower runs, as cargo-fuzz's help says). Its
//! committed seed corpus is `<dir>/fuzz/seeds/<target>/`; what a campaign
//! learns goes to the ignored `<dir>/fuzz/corpus/<target>/`, and a crash
//! leaves its input in `<dir>/fuzz/artifacts/<target>/`.

use anyhow::{bail, Context, Result};
use std::io::{BufRead, BufReader, Write};
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::Instant;

use crate::{nightly_cargo, root, run};

/// A fuzz crate: the folder it is run from (it lives in `fuzz/` there) and
/// its targets with their smoke-run length, seconds.
pub struct FuzzCrate {
    /// Folder holding `fuzz/`, relative to the repository.
    pub dir: &'static str,
    /// Targets and smoke-run seconds.
    pub targets: &'static [(&'static str, u32)],
}

/// Every fuzz target and its smoke-run length (the build and run times
/// measured are in DEVELOPERS.md).
pub const FUZZ_CRATES: [FuzzCrate; 3] = [
    FuzzCrate {
        dir: "protocol",
        targets: &[("decoder", 20), ("payload", 10)],
    },
    FuzzCrate {
        dir: "firmware",
        targets: &[("modbus_rtu", 5)],
    },
    FuzzCrate {
        dir: "host",
        targets: &[
            ("samples", 5),
            ("product_file", 5),
            ("scenario", 5),
            ("site", 5),
            ("line_config", 5),
            ("key", 5),
            ("audit_bundle", 5),
        ],
    },
];

/// `cargo +nightly fuzz <sub>` for the crate in `dir`, building into the
/// shared target folder with 16 codegen units.
fn cargo_fuzz(dir: &Path, sub: &str) -> Command {
    let mut c = nightly_cargo();
    c.current_dir(dir)
        .args(["fuzz", sub, "--codegen-units", "16", "--target-dir"])
        .arg(root().join("target/fuzz"));
    c
}

/// The crate folder of `target`.
fn crate_of(target: &str) -> Option<&'static FuzzCrate> {
    FUZZ_CRATES
        .iter()
        .find(|c| c.targets.iter().any(|(t, _)| *t == target))
}

fn all_targets() -> Vec<&'static str> {
    FUZZ_CRATES
        .iter()
        .flat_map(|c| c.targets.iter().map(|(t, _)| *t))
        .collect()
}

/// Builds every fuzz target (`cargo +nightly fuzz build` per crate), then
/// short libFuzzer runs of each from the committed seed corpus; new inputs
/// go to a scratch folder, not into the tree.
pub fn smoke() -> Result<()> {
    let started = Instant::now();
    for c in &FUZZ_CRATES {
        let dir = root().join(c.dir);
        run(&mut cargo_fuzz(&dir, "build"))?;
        for (target, secs) in c.targets {
            let scratch =
                std::env::temp_dir().join(format!("fringe-fuzz-{target}-{}", std::process::id()));
            std::fs::create_dir_all(&scratch)
                .with_context(|| format!("could not create {}", scratch.display()))?;
            let seeds = dir.join("fuzz/seeds").join(target);
            let result = run(cargo_fuzz(&dir, "run")
                .arg(target)
                .arg(&scratch)
                .arg(&seeds)
                .args(["--", &format!("-max_total_time={secs}"), "-timeout=10"]));
            let _ = std::fs::remove_dir_all(&scratch);
            result.with_context(|| {
                format!(
                    "fuzz target {target} failed: the crashing input is in {}/fuzz/artifacts/{target}/",
                    c.dir
                )
            })?;
        }
    }
    eprintln!(
        "xtask: fuzz builds and smoke runs took {:.0} s",
        started.elapsed().as_secs_f64()
    );
    Ok(())
}

/// What one libFuzzer run reported.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct RunStats {
    /// Inputs executed (`stat::number_of_executed_units`, else the last
    /// `#N` status line).
    pub executions: u64,
    /// Slowest input, seconds (`stat::slowest_unit_time_sec`).
    pub slowest_s: Option<u64>,
    /// Inputs added to the corpus (`stat::new_units_added`).
    pub new_units: Option<u64>,
    /// The crash or timeout libFuzzer stopped at: its kind and the file it
    /// wrote the input to.
    pub crash: Option<(String, String)>,
}

/// Reads libFuzzer's output (`-print_final_stats=1`).
pub fn parse_stats(log: &str) -> RunStats {
    let mut s = RunStats::default();
    let mut last_status: Option<u64> = None;
    let mut kind: Option<String> = None;
    for line in log.lines() {
        let line = line.trim();
        let stat = |name: &str| {
            line.strip_prefix(name)
                .and_then(|r| r.trim_start_matches(':').trim().parse::<u64>().ok())
        };
        if let Some(v) = stat("stat::number_of_executed_units") {
            s.executions = v;
        } else if let Some(v) = stat("stat::slowest_unit_time_sec") {
            s.slowest_s = Some(v);
        } else if let Some(v) = stat("stat::new_units_added") {
            s.new_units = Some(v);
        } else if let Some(n) = line
            .strip_prefix('#')
            .and_then(|r| r.split_whitespace().next())
            .and_then(|n| n.parse::<u64>().ok())
        {
            // `#N\tNEW ...`, `#N\tpulse ...`, `#N\tDONE ...`
            last_status = Some(n);
        } else if let Some(rest) = line.split("ERROR: libFuzzer: ").nth(1) {
            kind = Some(
                rest.split_whitespace()
                    .next()
                    .unwrap_or("error")
                    .to_string(),
            );
        } else if line.contains("panicked at") && kind.is_none() {
            kind = Some("panic".into());
        } else if let Some(rest) = line.split("Test unit written to ").nth(1) {
            s.crash = Some((
                kind.clone().unwrap_or_else(|| "crash".into()),
                rest.trim().to_string(),
            ));
        }
    }
    if s.executions == 0 {
        s.executions = last_status.unwrap_or(0);
    }
    s
}

/// Options of `cargo xtask fuzz`.
#[derive(Debug, PartialEq)]
struct Options {
    seconds: u64,
    merge: bool,
    targets: Vec<String>,
}

fn options(args: &[String]) -> Result<Options> {
    let mut minutes: Option<f64> = None;
    let mut merge = false;
    let mut targets = Vec::new();
    let mut it = args.iter();
    while let Some(a) = it.next() {
        let value = if let Some(v) = a.strip_prefix("--minutes=") {
            Some(v.to_string())
        } else if a == "--minutes" {
            Some(it.next().context("--minutes needs a number")?.clone())
        } else {
            None
        };
        if let Some(v) = value {
            let m: f64 = v
                .parse()
                .ok()
                .filter(|m: &f64| m.is_finite() && *m > 0.0)
                .with_context(|| format!("--minutes {v}: not a positive number of minutes"))?;
            minutes = Some(m);
        } else if a == "--merge" {
            merge = true;
        } else if a.starts_with('-') {
            bail!("cargo xtask fuzz: unknown option `{a}` (--minutes N, --merge)");
        } else if crate_of(a).is_none() {
            bail!(
                "cargo xtask fuzz: `{a}` is not a fuzz target (known: {})",
                all_targets().join(", ")
            );
        } else {
            targets.push(a.clone());
        }
    }
    let minutes = minutes.context("cargo xtask fuzz needs --minutes N (per target)")?;
    if targets.is_empty() {
        targets = all_targets().into_iter().map(String::from).collect();
    }
    Ok(Options {
        seconds: ((minutes * 60.0).round() as u64).max(1),
        merge,
        targets,
    })
}

/// Runs `cmd`, copying its standard error to ours and to `log`; returns
/// whether it succeeded and what it wrote.
fn run_logged(cmd: &mut Command, log: &Path) -> Result<(bool, String)> {
    eprintln!("xtask: running {cmd:?} (output in {})", log.display());
    let mut child = cmd
        .stderr(Stdio::piped())
        .spawn()
        .with_context(|| format!("could not start {cmd:?}"))?;
    let mut file =
        std::fs::File::create(log).with_context(|| format!("cannot write {}", log.display()))?;
    let mut text = String::new();
    if let Some(err) = child.stderr.take() {
        for line in BufReader::new(err).lines() {
            let line = line.unwrap_or_default();
            // libFuzzer's status lines come every few seconds; keep the
            // terminal to the ones that say something changed.
            if !line.contains("\tpulse ") {
                eprintln!("{line}");
            }
            writeln!(file, "{line}").with_context(|| format!("cannot write {}", log.display()))?;
            text.push_str(&line);
            text.push('\n');
        }
    }
    let status = child.wait()?;
    Ok((status.success(), text))
}

/// `cargo xtask fuzz --smoke`: the smoke run of `cargo xtask test` alone.
///
/// `cargo xtask fuzz --minutes N [--merge] [TARGET...]`: a campaign of N
/// minutes per target from its seeds and its kept corpus, then a table of
/// executions and crashes per target; with `--merge`, the inputs of the
/// corpus that add coverage are merged into the seeds (`-merge=1`).
pub fn campaign(args: &[String]) -> Result<()> {
    if args.iter().any(|a| a == "--smoke") {
        if args.len() > 1 {
            bail!("cargo xtask fuzz --smoke takes nothing else");
        }
        return smoke();
    }
    let o = options(args)?;
    let mut rows: Vec<(String, RunStats, f64)> = Vec::new();
    for target in &o.targets {
        let c = crate_of(target).context("known target")?;
        let dir = root().join(c.dir);
        let fuzz = dir.join("fuzz");
        let corpus = fuzz.join("corpus").join(target);
        let seeds = fuzz.join("seeds").join(target);
        let logs = fuzz.join("logs");
        for d in [&corpus, &logs] {
            std::fs::create_dir_all(d).with_context(|| format!("cannot create {}", d.display()))?;
        }
        let log = logs.join(format!("{target}.log"));
        let started = Instant::now();
        let (_ok, text) = run_logged(
            cargo_fuzz(&dir, "run")
                .arg(target)
                .arg(&corpus)
                .arg(&seeds)
                .args([
                    "--",
                    &format!("-max_total_time={}", o.seconds),
                    "-timeout=1",
                    "-print_final_stats=1",
                ]),
            &log,
        )?;
        let secs = started.elapsed().as_secs_f64();
        let stats = parse_stats(&text);
        if o.merge && stats.crash.is_none() {
            merge(&dir, target, &seeds, &corpus)?;
        }
        rows.push((target.clone(), stats, secs));
    }
    println!(
        "{:<14} {:>14} {:>9} {:>10} {:>9}  crash",
        "target", "executions", "seconds", "exec/s", "slowest"
    );
    let mut crashed = 0;
    for (t, s, secs) in &rows {
        println!(
            "{:<14} {:>14} {:>9.0} {:>10.0} {:>8}s  {}",
            t,
            s.executions,
            secs,
            s.executions as f64 / secs.max(1.0),
            s.slowest_s.map_or("?".into(), |v| v.to_string()),
            s.crash
                .as_ref()
                .map_or("none".to_string(), |(k, f)| format!("{k}: {f}")),
        );
        crashed += usize::from(s.crash.is_some());
    }
    if crashed > 0 {
        bail!("{crashed} target(s) crashed or timed out: see the inputs named above");
    }
    Ok(())
}

/// Adds to `seeds` the inputs of `corpus` that add coverage to it.
fn merge(dir: &Path, target: &str, seeds: &PathBuf, corpus: &PathBuf) -> Result<()> {
    let before = count_files(seeds);
    run(cargo_fuzz(dir, "run")
        .arg(target)
        .arg(seeds)
        .arg(corpus)
        .args(["--", "-merge=1", "-timeout=10"]))?;
    eprintln!(
        "xtask: {target}: seeds {before} -> {} files ({})",
        count_files(seeds),
        seeds.display()
    );
    Ok(())
}

fn count_files(d: &Path) -> usize {
    std::fs::read_dir(d).map_or(0, |r| r.filter_map(Result::ok).count())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn final_stats_give_executions_and_no_crash() {
        let log = "INFO: Seed: 1\n#2\tINITED cov: 10 ft: 10 corp: 1/1b exec/s: 0 rss: 30Mb\n\
                   #1048576\tpulse  cov: 50 ft: 80 corp: 9/99b lim: 4 exec/s: 349525 rss: 40Mb\n\
                   #1234567\tDONE   cov: 50 ft: 80 corp: 9/99b lim: 4 exec/s: 41152 rss: 40Mb\n\
                   Done 1234567 runs in 30 second(s)\n\
                   stat::number_of_executed_units: 1234568\n\
                   stat::average_exec_per_sec:     41152\n\
                   stat::new_units_added:          8\n\
                   stat::slowest_unit_time_sec:    0\n\
                   stat::peak_rss_mb:              40\n";
        let s = parse_stats(log);
        assert_eq!(s.executions, 1_234_568);
        assert_eq!(s.slowest_s, Some(0));
        assert_eq!(s.new_units, Some(8));
        assert_eq!(s.crash, None);
    }

    #[test]
    fn a_crash_is_named_with_its_input() {
        let log = "#4096\tpulse  cov: 50 ft: 80 corp: 9/99b\n\
                   thread '<unnamed>' panicked at fuzz_targets/key.rs:20:13:\n\
                   ==1234== ERROR: libFuzzer: deadly signal\n\
                   stat::number_of_executed_units: 5000\n\
                   Test unit written to fuzz/artifacts/key/crash-0123abcd\n";
        let s = parse_stats(log);
        assert_eq!(s.executions, 5000);
        assert_eq!(
            s.crash,
            Some((
                "deadly".to_string(),
                "fuzz/artifacts/key/crash-0123abcd".to_string()
            ))
        );
        let t = parse_stats(
            "#77\tNEW cov: 1\n==9== ERROR: libFuzzer: timeout after 1 seconds\n\
             Test unit written to fuzz/artifacts/x/timeout-ff\n",
        );
        assert_eq!(
            t.executions, 77,
            "without final stats: the last status line"
        );
        assert_eq!(t.crash.unwrap().0, "timeout");
    }

    #[test]
    fn campaign_options_are_checked() {
        let args = |v: &[&str]| v.iter().map(|s| s.to_string()).collect::<Vec<_>>();
        let o = options(&args(&["--minutes", "0.5", "key", "--merge"])).unwrap();
        assert_eq!(
            o,
            Options {
                seconds: 30,
                merge: true,
                targets: vec!["key".into()]
            }
        );
        assert_eq!(
            options(&args(&["--minutes=2"])).unwrap().targets.len(),
            all_targets().len()
        );
        assert!(options(&args(&["key"])).is_err(), "minutes are required");
        let e = options(&args(&["--minutes", "1", "nope"]))
            .unwrap_err()
            .to_string();
        assert!(e.contains("`nope` is not a fuzz target"), "{e}");
        assert!(options(&args(&["--minutes", "-1"])).is_err());
    }

    #[test]
    fn every_target_has_committed_seeds_and_a_source_file() {
        for c in &FUZZ_CRATES {
            for (t, _) in c.targets {
                let fuzz = root().join(c.dir).join("fuzz");
                assert!(
                    fuzz.join("fuzz_targets").join(format!("{t}.rs")).is_file(),
                    "{t}"
                );
                assert!(count_files(&fuzz.join("seeds").join(t)) > 0, "seeds of {t}");
            }
        }
    }
}
