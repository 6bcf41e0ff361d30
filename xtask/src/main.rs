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

// Shared with the end-to-end tests (`fringe_tests::qemu`); included by path
// so that `cargo xtask` does not build the host tool and its SQLite first.
#[allow(dead_code)]
#[path = "../../tests/src/qemu.rs"]
mod qemu;

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
    board_and_qemu()?;
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

/// The board crate (fmt, clippy, release build) and, with QEMU installed,
/// the end-to-end test against the firmware under QEMU.
fn board_and_qemu() -> Result<()> {
    let board_cargo = || {
        let mut c = Command::new(std::env::var("CARGO").unwrap_or_else(|_| "cargo".into()));
        c.current_dir(board_dir());
        c
    };
    run(board_cargo().args(["fmt", "--check"]))?;
    run(board_cargo().args(["clippy", "--release", "--", "-D", "warnings"]))?;
    firmware()?;
    if !qemu::qemu_available() {
        skipped(
            "the QEMU end-to-end test (tests/tests/qemu.rs)",
            "qemu-system-arm is not installed",
            "apt-get install -y qemu-system-arm (as .ci/run does)",
        );
        return Ok(());
    }
    run(cargo().args([
        "test",
        "-p",
        "fringe-tests",
        "--test",
        "qemu",
        "--",
        "--ignored",
        "--nocapture",
    ]))
}

/// Folder of the QEMU board crate.
fn board_dir() -> PathBuf {
    root().join("firmware/boards/qemu-mps2")
}

/// `cargo xtask firmware`: release build of the QEMU board binary (run from
/// its own folder, where its `.cargo/config.toml` applies).
fn firmware() -> Result<PathBuf> {
    ensure_target()?;
    let mut c = Command::new(std::env::var("CARGO").unwrap_or_else(|_| "cargo".into()));
    c.current_dir(board_dir()).args(["build", "--release"]);
    run(&mut c)?;
    let elf = qemu::board_elf(&root());
    eprintln!("xtask: firmware at {}", elf.display());
    Ok(elf)
}

/// `cargo xtask qemu`: boots the firmware with UART0 on a pty and waits
/// until QEMU ends (Ctrl-C).
fn qemu_run() -> Result<()> {
    let elf = firmware()?;
    let mut q = qemu::Qemu::boot(&elf).map_err(anyhow::Error::msg)?;
    println!("{}", q.pty.display());
    eprintln!(
        "xtask: firmware running under QEMU (mps2-an386, -icount shift=0); UART0 is {}\n\
         xtask: talk to it with:  fringe monitor --port {}\n\
         xtask: Ctrl-C stops QEMU. The emulated flash lives in RAM: it keeps its\n\
         xtask: contents across a reset of the board, not across quitting QEMU.",
        q.pty.display(),
        q.pty.display()
    );
    while q.running() {
        std::thread::sleep(std::time::Duration::from_millis(200));
    }
    Ok(())
}

/// What the running firmware reports about itself.
struct Report {
    stack_high_water: u32,
    /// The last reading (no reference check).
    reading_cost: Option<u32>,
    /// The first reading, which includes the reference check.
    reference_cost: Option<u32>,
}

fn report(elf: &Path) -> Result<Report> {
    use fringe_protocol::{Request, Response};
    use std::time::Duration;
    let q = qemu::Qemu::boot(elf).map_err(anyhow::Error::msg)?;
    let (mut link, _id) =
        qemu::Link::connect(&q.pty, Duration::from_secs(20)).map_err(anyhow::Error::msg)?;
    // Full readings (both frequencies; the first includes the reference
    // check), the cost of each asked for right after it.
    let mut costs = Vec::new();
    let mut free = None;
    for _ in 0..3 {
        match link
            .request(Request::Measure, None, Duration::from_secs(30))
            .map_err(anyhow::Error::msg)?
        {
            Ok(Response::Reading(_)) => {}
            other => bail!("Measure answered {other:?}"),
        }
        match link
            .request(Request::Status, None, Duration::from_secs(10))
            .map_err(anyhow::Error::msg)?
        {
            Ok(Response::Status(s)) => {
                free = Some(
                    s.stack_free_bytes
                        .context("the firmware reports no stack_free_bytes")?,
                );
                costs.push(s.reading_cost);
            }
            other => bail!("Status answered {other:?}"),
        }
    }
    let free = free.context("no status")?;
    Ok(Report {
        stack_high_water: qemu::BOARD_STACK_BYTES.saturating_sub(free),
        reading_cost: costs.last().copied().flatten(),
        reference_cost: costs.first().copied().flatten(),
    })
}

/// `cargo xtask size`: flash and RAM from the ELF, stack high-water mark and
/// cost per reading from the running firmware.
fn size() -> Result<()> {
    let elf = firmware()?;
    let f = qemu::footprint(&elf).map_err(anyhow::Error::msg)?;
    println!("fringe-qemu-mps2 (thumbv7em-none-eabihf, release)");
    println!(
        "  flash  {:>7} bytes ({:.1} KiB)  vector table + text + rodata + data image",
        f.flash,
        f.flash as f64 / 1024.0
    );
    println!(
        "  RAM    {:>7} bytes ({:.1} KiB)  data + bss (static; the stack is below)",
        f.ram,
        f.ram as f64 / 1024.0
    );
    if !qemu::qemu_available() {
        skipped(
            "the stack and cost report",
            "qemu-system-arm is not installed",
            "apt-get install -y qemu-system-arm",
        );
        return Ok(());
    }
    let r = report(&elf)?;
    println!(
        "  stack  {:>7} bytes ({:.1} KiB)  high-water mark after 3 full readings (painted {} KiB)",
        r.stack_high_water,
        r.stack_high_water as f64 / 1024.0,
        qemu::BOARD_STACK_BYTES / 1024
    );
    match r.reading_cost {
        Some(c) => println!(
            "  cost   {c:>7} instructions per reading (QEMU -icount shift=0, front end excluded)"
        ),
        None => println!("  cost   not reported"),
    }
    if let Some(c) = r.reference_cost {
        println!(
            "  cost   {c:>7} instructions for the first reading, which includes the reference check"
        );
    }
    Ok(())
}

fn main() -> Result<()> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    match args.first().map(String::as_str) {
        Some("test") => test(),
        Some("firmware") => firmware().map(|_| ()),
        Some("qemu") => qemu_run(),
        Some("size") => size(),
        _ => {
            eprintln!("usage: cargo xtask <test | firmware | qemu | size>");
            eprintln!("  test      everything this machine can test");
            eprintln!("  firmware  build the QEMU board binary (firmware/boards/qemu-mps2)");
            eprintln!("  qemu      boot it under QEMU with UART0 on a pty and print the path");
            eprintln!("  size      flash/RAM of the ELF, stack high-water and cost per reading");
            bail!("unknown or missing xtask command")
        }
    }
}
