//! `cargo xtask`: the project's runner.
//!
//! - `cargo xtask test`: everything this machine can test (fmt, clippy,
//!   workspace tests, `no_std` cross-builds, firmware, QEMU, fuzz smoke run).
//!   Parts that need a tool this machine lacks (nightly and cargo-fuzz for
//!   the fuzz run) are skipped with a loud notice saying why.
#![forbid(unsafe_code)]

use anyhow::{bail, Context, Result};
use std::path::{Path, PathBuf};
use std::process::Command;

const TARGET: &str = "thumbv7em-none-eabihf";

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .map(Path::to_path_buf)
        .unwrap_or_else(|| PathBuf::from("."))
}

fn run(cmd: &mut Command) -> Result<()> {
    eprintln!("xtask: running {cmd:?}");
    let status = cmd
        .status()
        .with_context(|| format!("could not start {cmd:?}"))?;
    if !status.success() {
        bail!("{cmd:?} failed with {status}");
    }
    Ok(())
}

fn cargo() -> Command {
    let mut c = Command::new(std::env::var("CARGO").unwrap_or_else(|_| "cargo".into()));
    c.current_dir(root());
    c
}

fn ensure_target() -> Result<()> {
    let out = Command::new("rustup")
        .args(["target", "list", "--installed"])
        .output()
        .context("rustup not found: install the thumbv7em-none-eabihf target by hand")?;
    if !String::from_utf8_lossy(&out.stdout).contains(TARGET) {
        run(Command::new("rustup").args(["target", "add", TARGET]))?;
    }
    Ok(())
}

fn test() -> Result<()> {
    ensure_target()?;
    run(cargo().args(["fmt", "--all", "--check"]))?;
    run(cargo().args([
        "clippy",
        "--workspace",
        "--all-targets",
        "--",
        "-D",
        "warnings",
    ]))?;
    run(cargo().args(["test", "--workspace"]))?;
    for krate in ["fringe-protocol", "fringe-calibration", "fringe-firmware"] {
        run(cargo().args([
            "build",
            "-p",
            krate,
            "--target",
            TARGET,
            "--no-default-features",
        ]))?;
    }
    // The simulated front end must build for the target too (still no_std).
    run(cargo().args([
        "build",
        "-p",
        "fringe-firmware",
        "--target",
        TARGET,
        "--no-default-features",
        "--features",
        "sim",
    ]))?;
    fuzz_smoke()?;
    eprintln!("xtask: all tests passed");
    Ok(())
}

/// Fuzz targets of `protocol/fuzz` and their smoke-run length, seconds.
const FUZZ_SMOKE: [(&str, u32); 2] = [("decoder", 20), ("payload", 10)];

/// Says loudly that a part of the test run was skipped, and why.
fn skipped(what: &str, why: &str, fix: &str) {
    eprintln!();
    eprintln!("xtask: ################################################################");
    eprintln!("xtask: SKIPPED {what}: {why}");
    eprintln!("xtask: to run it: {fix}");
    eprintln!("xtask: ################################################################");
    eprintln!();
}

/// A command that runs outside the stable toolchain `cargo xtask` runs in.
fn nightly_cargo() -> Command {
    let mut c = Command::new("cargo");
    c.arg("+nightly");
    for var in [
        "RUSTUP_TOOLCHAIN",
        "CARGO",
        "RUSTC",
        "RUSTDOC",
        "RUSTC_WRAPPER",
    ] {
        c.env_remove(var);
    }
    c
}

fn succeeds(cmd: &mut Command) -> bool {
    cmd.stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::null())
        .status()
        .map(|s| s.success())
        .unwrap_or(false)
}

/// Short libFuzzer runs of every protocol fuzz target, from the committed
/// seed corpus; new inputs go to a scratch folder, not into the tree.
fn fuzz_smoke() -> Result<()> {
    if !succeeds(nightly_cargo().arg("--version")) {
        skipped(
            "the fuzz smoke run",
            "no nightly toolchain (cargo fuzz needs it)",
            "rustup toolchain install nightly",
        );
        return Ok(());
    }
    if !succeeds(nightly_cargo().args(["fuzz", "--version"])) {
        skipped(
            "the fuzz smoke run",
            "cargo-fuzz is not installed",
            "cargo install cargo-fuzz --locked",
        );
        return Ok(());
    }
    let dir = root().join("protocol");
    for (target, secs) in FUZZ_SMOKE {
        let scratch =
            std::env::temp_dir().join(format!("fringe-fuzz-{target}-{}", std::process::id()));
        std::fs::create_dir_all(&scratch)
            .with_context(|| format!("could not create {}", scratch.display()))?;
        let seeds = dir.join("fuzz/seeds").join(target);
        let result = run(nightly_cargo()
            .current_dir(&dir)
            .args(["fuzz", "run", target])
            .arg(&scratch)
            .arg(&seeds)
            .args(["--", &format!("-max_total_time={secs}")]));
        let _ = std::fs::remove_dir_all(&scratch);
        result.with_context(|| {
            format!("fuzz target {target} failed: the crashing input is in protocol/fuzz/artifacts/{target}/")
        })?;
    }
    Ok(())
}

fn main() -> Result<()> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    match args.first().map(String::as_str) {
        Some("test") => test(),
        _ => {
            eprintln!("usage: cargo xtask test");
            bail!("unknown or missing xtask command")
        }
    }
}
