//! `cargo xtask`: the project's runner.
//!
//! - `cargo xtask test`: every test. On a fresh machine it first installs
//!   what the tests need (see [`setup`]): Debian packages when run as root,
//!   the Cortex-M target, a nightly toolchain and cargo-fuzz, and a Python
//!   virtual environment with the pinned reference libraries of
//!   `tests/python/requirements.txt`. Then: fmt, clippy, the architecture
//!   check of `docs/ARCHITECTURE.md` ([`arch`]), workspace tests,
//!   `no_std` cross-builds, the outside checks against those libraries, the
//!   fuzz crates' build and smoke run ([`fuzz`]), the board build and the QEMU
//!   end-to-end tests (the protocol, and Modbus RTU read by pymodbus).
//!
//! Nothing is skipped in silence. A part that cannot run (a tool missing and
//! not installable here) fails the run, and the closing line names it. To
//! leave parts out on purpose, name them: `cargo xtask test --skip qemu,fuzz`
//! or `FRINGE_SKIP=qemu,fuzz`; the closing line then says
//! `passed, N parts skipped: ...` and the exit status is 0.
#![forbid(unsafe_code)]

use anyhow::{bail, Context, Result};
use std::path::{Path, PathBuf};
use std::process::Command;

// Shared with the end-to-end tests (`fringe_tests::qemu`); included by path
// so that `cargo xtask` does not build the host tool and its SQLite first.
#[allow(dead_code)]
#[path = "../../tests/src/qemu.rs"]
mod qemu;

mod arch;
mod bench_gateway;
mod fuzz;

const TARGET: &str = "thumbv7em-none-eabihf";

/// The workspace root: the parent of xtask's folder, as `cargo run` names
/// it when it starts the tool (so a checkout moved or copied with its
/// `target/` works on its own files), else as it was at build time (the
/// binary started directly, perhaps under another package's cargo, whose
/// CARGO_MANIFEST_DIR is not xtask's).
fn root() -> PathBuf {
    let manifest = std::env::var_os("CARGO_MANIFEST_DIR")
        .map(PathBuf::from)
        .filter(|m| m.ends_with("xtask") && m.join("src/main.rs").is_file())
        .unwrap_or_else(|| PathBuf::from(env!("CARGO_MANIFEST_DIR")));
    manifest
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
        bail!("{cmd:?} failed with {status}{}", free_space_note());
    }
    Ok(())
}

/// The free space where the builds go, for a failed step's message: a
/// linker killed by a bus error (SIGBUS) has often run out of disk while
/// writing its output (CI saw one once, on a fuzz target's link; how much
/// space was left was not known).
fn free_space_note() -> String {
    let target = root().join("target");
    let out = Command::new("df")
        .args(["-Pk"])
        .arg(if target.is_dir() {
            &target
        } else {
            Path::new("/")
        })
        .output();
    match out {
        Ok(o) if o.status.success() => String::from_utf8_lossy(&o.stdout)
            .lines()
            .nth(1)
            .and_then(|l| l.split_whitespace().nth(3)?.parse::<u64>().ok())
            .map_or(String::new(), |kb| {
                format!(
                    " (free disk space where the builds go, {}: {:.1} GB)",
                    target.display(),
                    kb as f64 / 1e6
                )
            }),
        _ => String::new(),
    }
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

/// Parts of `cargo xtask test` that need more than the Rust toolchain, and
/// so can be left out by name (`--skip` or `FRINGE_SKIP`).
const OPTIONAL_PARTS: [(&str, &str); 3] = [
    (
        "python",
        "outside checks against Python reference libraries, and plant clients against real servers (tests/tests/outside.rs, plant.rs, postgres.rs, gateway.rs, fleet.rs; mosquitto, PostgreSQL, headless Chromium)",
    ),
    ("fuzz", "fuzz crates' build and smoke run (protocol/fuzz, firmware/fuzz, host/fuzz)"),
    (
        "qemu",
        "QEMU end-to-end tests of the firmware (tests/tests/qemu.rs; modbus_rtu.rs with pymodbus from the Python venv)",
    ),
];

/// What the run did with each optional part.
#[derive(Default)]
struct Ledger {
    /// Left out because the user named them.
    opted_out: Vec<String>,
    /// Could not run: (part, why).
    missing: Vec<(String, String)>,
}

/// The parts named by `--skip a,b` and `FRINGE_SKIP=a,b`.
fn skip_list(args: &[String]) -> Result<Vec<String>> {
    let mut names: Vec<String> = Vec::new();
    let mut add = |text: &str, from: &str| -> Result<()> {
        for n in text.split(',').map(str::trim).filter(|n| !n.is_empty()) {
            if !OPTIONAL_PARTS.iter().any(|(p, _)| *p == n) {
                let known: Vec<&str> = OPTIONAL_PARTS.iter().map(|(p, _)| *p).collect();
                bail!(
                    "{from}: `{n}` is not a part that can be skipped (known: {})",
                    known.join(", ")
                );
            }
            names.push(n.to_string());
        }
        Ok(())
    };
    if let Ok(v) = std::env::var("FRINGE_SKIP") {
        add(&v, "FRINGE_SKIP")?;
    }
    let mut it = args.iter();
    while let Some(a) = it.next() {
        if let Some(v) = a.strip_prefix("--skip=") {
            add(v, "--skip")?;
        } else if a == "--skip" {
            let v = it
                .next()
                .context("--skip needs a list of parts, e.g. --skip qemu,fuzz")?;
            add(v, "--skip")?;
        } else {
            bail!("cargo xtask test: unknown argument `{a}` (only --skip PARTS)");
        }
    }
    Ok(names)
}

fn is_root() -> bool {
    Command::new("id")
        .arg("-u")
        .output()
        .map(|o| String::from_utf8_lossy(&o.stdout).trim() == "0")
        .unwrap_or(false)
}

fn on_path(tool: &str) -> bool {
    Command::new("sh")
        .args(["-c", &format!("command -v {tool}")])
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::null())
        .status()
        .map(|s| s.success())
        .unwrap_or(false)
}

/// Installs the Debian packages whose commands are missing (as root), or
/// says which are missing and how to install them.
fn apt_install(packages: &[(&str, &str)]) -> Result<()> {
    let missing: Vec<&str> = packages
        .iter()
        .filter(|(cmd, _)| !on_path(cmd) && !Path::new("/usr/sbin").join(cmd).exists())
        .map(|(_, pkg)| *pkg)
        .collect();
    apt_get(&missing)
}

/// `apt-get install` of `packages` as root; otherwise an error naming them.
fn apt_get(packages: &[&str]) -> Result<()> {
    if packages.is_empty() {
        return Ok(());
    }
    if !is_root() {
        bail!(
            "missing Debian packages {} and not root: run `sudo apt-get install -y {}`",
            packages.join(", "),
            packages.join(" ")
        );
    }
    run(Command::new("apt-get")
        .args(["update", "-qq"])
        .env("DEBIAN_FRONTEND", "noninteractive"))?;
    run(Command::new("apt-get")
        .args(["install", "-y", "-qq", "--no-install-recommends"])
        .args(packages)
        .env("DEBIAN_FRONTEND", "noninteractive"))
}

/// The Python virtual environment of the outside checks.
fn venv_dir() -> PathBuf {
    root().join("target/fringe-venv")
}

/// Its interpreter (what `FRINGE_PYTHON` points the tests at).
fn venv_python() -> PathBuf {
    venv_dir().join("bin/python")
}

/// Creates (or refreshes, when `tests/python/requirements.txt` changed) the
/// virtual environment with the pinned reference libraries.
fn ensure_venv() -> Result<()> {
    let req = root().join("tests/python/requirements.txt");
    let wanted =
        std::fs::read_to_string(&req).with_context(|| format!("cannot read {}", req.display()))?;
    let stamp = venv_dir().join("fringe-requirements.txt");
    if venv_python().exists() && std::fs::read_to_string(&stamp).ok().as_deref() == Some(&wanted) {
        return Ok(());
    }
    if !on_path("python3") {
        apt_install(&[("python3", "python3")])?;
    }
    if !succeeds(Command::new("python3").args(["-c", "import venv, ensurepip"])) {
        apt_get(&["python3-venv"])?;
    }
    run(Command::new("python3")
        .arg("-m")
        .arg("venv")
        .arg(venv_dir()))?;
    run(Command::new(venv_python())
        .args([
            "-m",
            "pip",
            "install",
            "--quiet",
            "--disable-pip-version-check",
            "-r",
        ])
        .arg(&req))?;
    std::fs::write(&stamp, wanted).with_context(|| format!("cannot write {}", stamp.display()))?;
    Ok(())
}

/// Nightly and cargo-fuzz, installed if missing.
fn ensure_fuzz_tools() -> Result<()> {
    if !succeeds(nightly_cargo().arg("--version")) {
        run(Command::new("rustup").args([
            "toolchain",
            "install",
            "nightly",
            "--profile",
            "minimal",
        ]))?;
    }
    if !succeeds(nightly_cargo().args(["fuzz", "--version"])) {
        run(
            Command::new(std::env::var("CARGO").unwrap_or_else(|_| "cargo".into())).args([
                "install",
                "cargo-fuzz",
                "--locked",
            ]),
        )?;
    }
    Ok(())
}

/// Runs optional part `name` unless it was left out by name; its set-up
/// failing counts as "could not run", its test failing fails the run.
fn optional(
    ledger: &mut Ledger,
    skip: &[String],
    name: &str,
    setup: impl FnOnce() -> Result<()>,
    test: impl FnOnce() -> Result<()>,
) -> Result<()> {
    if skip.iter().any(|s| s == name) {
        eprintln!("xtask: part `{name}` left out (--skip / FRINGE_SKIP)");
        ledger.opted_out.push(name.to_string());
        return Ok(());
    }
    if let Err(e) = setup() {
        eprintln!();
        eprintln!("xtask: ################################################################");
        eprintln!("xtask: part `{name}` CANNOT RUN: {e:#}");
        eprintln!("xtask: (to leave it out on purpose: --skip {name} or FRINGE_SKIP={name})");
        eprintln!("xtask: ################################################################");
        eprintln!();
        ledger.missing.push((name.to_string(), format!("{e:#}")));
        return Ok(());
    }
    test()
}

fn test(args: &[String]) -> Result<()> {
    let skip = skip_list(args)?;
    // Each crate is built once per run: incremental compilation's caches
    // would only take disk (3.4 GB of the 15 GB a whole run left in
    // target/, measured on 2026-12-04; a CI run once ended with a linker
    // killed by a bus error, which is what a full disk looks like, and
    // one with "No space left on device"). With line tables only in the
    // dev profile (Cargo.toml) a whole run from an empty target/ left
    // 5.1 GB there and 1.3 GB in the boards' own (2026-12-05).
    std::env::set_var("CARGO_INCREMENTAL", "0");
    let mut ledger = Ledger::default();
    ensure_target()?;
    // rustfmt and clippy are part of every run (they are no extra part).
    run(Command::new("rustup").args(["component", "add", "rustfmt", "clippy"]))?;
    run(cargo().args(["fmt", "--all", "--check"]))?;
    run(cargo().args([
        "clippy",
        "--workspace",
        "--all-targets",
        "--",
        "-D",
        "warnings",
    ]))?;
    arch::check(&root())?;
    run(cargo().args(["test", "--workspace"]))?;
    for krate in [
        "fringe-protocol",
        "fringe-registers",
        "fringe-calibration",
        "fringe-firmware",
        "fringe-drivers",
    ] {
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
    let plant_servers = || -> Result<()> {
        ensure_venv()?;
        // Real servers the plant tests start on localhost.
        apt_install(&[
            ("mosquitto", "mosquitto"),
            // Certificates of the MQTT-over-TLS test's throwaway CA.
            ("openssl", "openssl"),
            ("chromium", "chromium"),
            ("chromedriver", "chromium-driver"),
        ])?;
        let has_postgres = std::fs::read_dir("/usr/lib/postgresql")
            .map(|d| {
                d.filter_map(Result::ok)
                    .any(|e| e.path().join("bin/initdb").exists())
            })
            .unwrap_or(false);
        if !has_postgres {
            apt_get(&["postgresql"])?;
        }
        Ok(())
    };
    optional(&mut ledger, &skip, "python", plant_servers, || {
        run(cargo()
            .args([
                "test",
                "-p",
                "fringe-tests",
                "--test",
                "outside",
                "--test",
                "plant",
                "--test",
                "postgres",
                "--test",
                "gateway",
                "--test",
                "fleet",
                "--",
                "--ignored",
            ])
            .env("FRINGE_PYTHON", venv_python()))
    })?;
    optional(&mut ledger, &skip, "fuzz", ensure_fuzz_tools, fuzz::smoke)?;
    // The board crate is built in every run; only its QEMU test is optional.
    board()?;
    optional(
        &mut ledger,
        &skip,
        "qemu",
        || {
            apt_install(&[("qemu-system-arm", "qemu-system-arm")])?;
            if !qemu::qemu_available() {
                bail!("qemu-system-arm does not run")
            }
            // pymodbus reads the board's Modbus RTU side.
            ensure_venv()
        },
        || {
            run(cargo()
                .args([
                    "test",
                    "-p",
                    "fringe-tests",
                    "--test",
                    "qemu",
                    "--test",
                    "modbus_rtu",
                    "--",
                    "--ignored",
                    "--nocapture",
                    "--test-threads",
                    "1",
                ])
                .env("FRINGE_PYTHON", venv_python()))
        },
    )?;
    let line = verdict(&ledger).map_err(anyhow::Error::msg)?;
    eprintln!("{line}");
    Ok(())
}

/// The closing line of a run: an error naming every part that could not
/// run (whatever else was left out by request), else the pass line, which
/// names the parts left out by request.
fn verdict(ledger: &Ledger) -> Result<String, String> {
    let parts = |v: &[String]| v.join(", ");
    if !ledger.missing.is_empty() {
        let names: Vec<String> = ledger
            .missing
            .iter()
            .map(|(n, why)| format!("{n} ({why})"))
            .collect();
        return Err(format!(
            "xtask: FAILED: {} part(s) could not run: {}{}",
            ledger.missing.len(),
            names.join("; "),
            if ledger.opted_out.is_empty() {
                String::new()
            } else {
                format!("; left out by request: {}", parts(&ledger.opted_out))
            }
        ));
    }
    if ledger.opted_out.is_empty() {
        Ok(format!(
            "xtask: all tests passed ({} of {} optional parts run)",
            OPTIONAL_PARTS.len(),
            OPTIONAL_PARTS.len()
        ))
    } else {
        Ok(format!(
            "xtask: passed, {} parts skipped: {} (left out by request)",
            ledger.opted_out.len(),
            parts(&ledger.opted_out)
        ))
    }
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

/// The board crates: fmt, clippy, release build of each (the QEMU board
/// and the STM32G474 board, which builds but cannot run here).
fn board() -> Result<()> {
    for dir in [board_dir(), stm32_dir()] {
        let board_cargo = || {
            let mut c = Command::new(std::env::var("CARGO").unwrap_or_else(|_| "cargo".into()));
            c.current_dir(&dir);
            c
        };
        run(board_cargo().args(["fmt", "--check"]))?;
        run(board_cargo().args(["clippy", "--release", "--", "-D", "warnings"]))?;
    }
    firmware()?;
    stm32_firmware()?;
    Ok(())
}

/// Folder of the STM32G474 board crate.
fn stm32_dir() -> PathBuf {
    root().join("firmware/boards/stm32g474")
}

/// Release build of the STM32G474 board (from its own folder); the ELF's path.
fn stm32_firmware() -> Result<PathBuf> {
    ensure_target()?;
    let mut c = Command::new(std::env::var("CARGO").unwrap_or_else(|_| "cargo".into()));
    // Its own target folder, where the ELF is looked for, also when the
    // caller has set CARGO_TARGET_DIR for the workspace.
    c.current_dir(stm32_dir())
        .env("CARGO_TARGET_DIR", stm32_dir().join("target"))
        .args(["build", "--release"]);
    run(&mut c)?;
    Ok(stm32_dir().join(format!("target/{TARGET}/release/fringe-stm32g474")))
}

/// Prints flash and static RAM of a board's ELF.
fn print_footprint(name: &str, elf: &Path) -> Result<()> {
    let f = qemu::footprint(elf).map_err(anyhow::Error::msg)?;
    println!("{name} ({TARGET}, release)");
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
    Ok(())
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
    // Its own target folder, where the tests look for the ELF, also when
    // the caller has set CARGO_TARGET_DIR for the workspace.
    c.current_dir(board_dir())
        .env("CARGO_TARGET_DIR", board_dir().join("target"))
        .args(["build", "--release"]);
    run(&mut c)?;
    let elf = qemu::board_elf(&root());
    eprintln!("xtask: firmware at {}", elf.display());
    Ok(elf)
}

/// `cargo xtask qemu`: boots the firmware with UART0 and UART1 on ptys and
/// waits until QEMU ends (Ctrl-C).
fn qemu_run() -> Result<()> {
    let elf = firmware()?;
    let mut q = qemu::Qemu::boot(&elf).map_err(anyhow::Error::msg)?;
    println!("{}", q.pty.display());
    println!("{}", q.modbus_pty.display());
    eprintln!(
        "xtask: firmware running under QEMU (mps2-an386, -icount shift=0); UART0 is {}\n\
         xtask: talk to it with:  fringe monitor --port {}\n\
         xtask: UART1 (Modbus RTU, unit 1 unless the device's settings say otherwise) is {}\n\
         xtask: Ctrl-C stops QEMU. The emulated flash lives in RAM: it keeps its\n\
         xtask: contents across a reset of the board, not across quitting QEMU.",
        q.pty.display(),
        q.pty.display(),
        q.modbus_pty.display()
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
    // The STM32G474 board first: it cannot run here, so flash and static
    // RAM from its ELF are all it reports.
    let stm32 = stm32_firmware()?;
    print_footprint("fringe-stm32g474", &stm32)?;
    println!("  (not run: no hardware here; stack and cost per reading are QEMU-board figures)");
    let elf = firmware()?;
    print_footprint("fringe-qemu-mps2", &elf)?;
    if !qemu::qemu_available() {
        bail!(
            "qemu-system-arm is not installed, so the stack and cost figures cannot be measured \
             (flash and RAM above are from the ELF): apt-get install -y qemu-system-arm"
        );
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
    let m = modbus_report(&elf)?;
    println!(
        "  modbus {:>7} instructions to answer a 25-register read (end of frame to the answer's CRC; {} reads)",
        m.cost, m.reads
    );
    println!(
        "  modbus frame gap to answer: {} / {} / {} instructions (min / median / max over the reads); \
         one character at 19200 baud is 573 us: {} instructions of QEMU's virtual time, \
         14 323 cycles of a 25 MHz core, 97 396 of a 170 MHz core",
        m.latency[0], m.latency[1], m.latency[2], 573_000
    );
    println!(
        "  modbus of that, the firmware's own work (the simulated front end's sample computation \
         left out; a bound): {} / {} / {} instructions",
        m.own[0], m.own[1], m.own[2]
    );
    Ok(())
}

/// What the board's Modbus side measured.
struct ModbusReport {
    reads: usize,
    /// Instructions the last answer cost.
    cost: u32,
    /// Frame gap to answer, instructions: min, median, max.
    latency: [u32; 3],
    /// Firmware work an answer waited for (front end excluded), bound:
    /// min, median, max.
    own: [u32; 3],
}

/// Sends 25-register reads to the board's UART1 and reads what each cost
/// from its `FRINGE_MODBUS` figures (QEMU's monitor).
fn modbus_report(elf: &Path) -> Result<ModbusReport> {
    use std::io::{Read, Write};
    use std::time::{Duration, Instant};
    let q = qemu::Qemu::boot(elf).map_err(anyhow::Error::msg)?;
    let path = q.modbus_pty.to_str().context("pty path not UTF-8")?;
    let mut port = serialport::new(path, 19_200)
        .timeout(Duration::from_millis(50))
        .open_native()
        .with_context(|| format!("open {path}"))?;
    let body = [0x01u8, 0x04, 0x00, 0x00, 0x00, 25];
    let crc = crc::Crc::<u16>::new(&crc::CRC_16_MODBUS).checksum(&body);
    let mut frame = body.to_vec();
    frame.extend_from_slice(&crc.to_le_bytes());
    let mut latencies = Vec::new();
    let mut own = Vec::new();
    let mut cost = 0;
    let mut answered = 0;
    let deadline = Instant::now() + Duration::from_secs(120);
    while answered < 15 {
        if Instant::now() > deadline {
            bail!("only {answered} Modbus answers from the board in 120 s");
        }
        let before = q.modbus_figures(elf).map_err(anyhow::Error::msg)?.sent;
        port.write_all(&frame)?;
        let mut got = Vec::new();
        let until = Instant::now() + Duration::from_secs(1);
        let mut buf = [0u8; 64];
        while got.len() < 55 && Instant::now() < until {
            match port.read(&mut buf) {
                Ok(n) => got.extend_from_slice(&buf[..n]),
                Err(e) if e.kind() == std::io::ErrorKind::TimedOut => {}
                Err(e) => return Err(e.into()),
            }
        }
        let f = q.modbus_figures(elf).map_err(anyhow::Error::msg)?;
        // An unanswered request (QEMU notices a new pty client only about
        // once a second, or split it) is sent again.
        if got.len() == 55 && f.sent == before + 1 {
            answered += 1;
            cost = f.cost;
            latencies.push(f.latency);
            own.push(f.own_wait);
        }
    }
    let spread = |mut v: Vec<u32>| {
        v.sort_unstable();
        [v[0], v[v.len() / 2], v[v.len() - 1]]
    };
    Ok(ModbusReport {
        reads: latencies.len(),
        cost,
        latency: spread(latencies),
        own: spread(own),
    })
}

fn main() -> Result<()> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    match args.first().map(String::as_str) {
        Some("test") => test(&args[1..]),
        Some("firmware") => firmware().map(|_| ()),
        Some("qemu") => qemu_run(),
        Some("size") => size(),
        Some("arch") => arch::check(&root()),
        Some("bench-gateway") => bench_gateway::run(&root(), &args[1..]),
        Some("fuzz") => ensure_fuzz_tools().and_then(|()| fuzz::campaign(&args[1..])),
        Some("soak") => soak(&args[1..]),
        _ => {
            eprintln!(
                "usage: cargo xtask <test | arch | firmware | qemu | size | bench-gateway | fuzz | soak>"
            );
            eprintln!("  test      every test (installs what it needs; --skip qemu,fuzz,python leaves parts out)");
            eprintln!("  arch      the architecture check of docs/ARCHITECTURE.md (crates, module cycles, quiet libraries)");
            eprintln!("  firmware  build the QEMU board binary (firmware/boards/qemu-mps2)");
            eprintln!("  qemu      boot it under QEMU with UART0 and UART1 (Modbus) on ptys and print both");
            eprintln!("  size      flash/RAM of both boards' ELFs; stack high-water and cost per reading (QEMU)");
            eprintln!("  fuzz --minutes N [--merge] [TARGET...]  fuzz campaigns of N minutes per target; executions and crashes per target; --merge adds new coverage to the seeds");
            eprintln!("  fuzz --smoke  the fuzz part of `test` alone (build every target, run each briefly from its seeds)");
            eprintln!("  bench-gateway [N ...] [--seconds S] [--pty]  fringe gateway's CPU and memory per simulated device (Linux)");
            eprintln!("  soak [--readings N] [--kills K] [--devices D] [--error-rate E] [--scale S]  the long soak of the line (release build)");
            bail!("unknown or missing xtask command")
        }
    }
}

/// The long soak (tests/examples/soak.rs) against a release `fringe`.
fn soak(args: &[String]) -> Result<()> {
    let cargo = || Command::new(std::env::var("CARGO").unwrap_or_else(|_| "cargo".into()));
    run(cargo().current_dir(root()).args([
        "build",
        "--release",
        "-p",
        "fringe-host",
        "--bin",
        "fringe",
    ]))?;
    run(cargo()
        .current_dir(root())
        .env(
            "FRINGE_BIN",
            std::env::var_os("CARGO_TARGET_DIR")
                .map_or_else(|| root().join("target"), PathBuf::from)
                .join("release/fringe"),
        )
        .args([
            "run",
            "--release",
            "-p",
            "fringe-tests",
            "--example",
            "soak",
            "--",
        ])
        .args(args))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_part_that_cannot_run_fails_the_run_even_beside_an_opt_out() {
        let ledger = Ledger {
            opted_out: vec!["fuzz".into()],
            missing: vec![("qemu".into(), "qemu-system-arm is not installed".into())],
        };
        let e = verdict(&ledger).unwrap_err();
        assert!(
            e.contains("FAILED") && e.contains("qemu (qemu-system-arm"),
            "{e}"
        );
        assert!(e.contains("left out by request: fuzz"), "{e}");
    }

    #[test]
    fn parts_left_out_by_request_pass_and_are_named() {
        let ledger = Ledger {
            opted_out: vec!["qemu".into(), "python".into()],
            missing: vec![],
        };
        assert_eq!(
            verdict(&ledger).unwrap(),
            "xtask: passed, 2 parts skipped: qemu, python (left out by request)"
        );
        assert!(verdict(&Ledger::default())
            .unwrap()
            .contains("all tests passed"));
    }

    #[test]
    fn only_known_parts_can_be_skipped() {
        std::env::remove_var("FRINGE_SKIP");
        let args = |v: &[&str]| v.iter().map(|s| s.to_string()).collect::<Vec<_>>();
        assert_eq!(
            skip_list(&args(&["--skip", "qemu,fuzz"])).unwrap(),
            vec!["qemu", "fuzz"]
        );
        assert_eq!(
            skip_list(&args(&["--skip=python"])).unwrap(),
            vec!["python"]
        );
        let e = skip_list(&args(&["--skip", "clippy"]))
            .unwrap_err()
            .to_string();
        assert!(e.contains("`clippy` is not a part"), "{e}");
        assert!(skip_list(&args(&["--fast"])).is_err());
    }
}
