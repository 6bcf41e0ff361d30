//! Shared helpers for the end-to-end tests in `tests/tests/` (one helper
//! module for all of them, as ripgrep keeps its `tests/util.rs`).
//!
//! - [`fringe`]: a `Command` for the `fringe` binary (built once, on demand);
//! - [`run`]: runs a command with a time limit and captures its output;
//! - [`ScenarioSpec`] and [`Sim`]: a `fringe sim` child on a pseudo-terminal
//!   with a stable symlink path, and what it recorded;
//! - [`stored_readings`], [`assert_gapless`]: what a database holds;
//! - [`seed`]: the seed of a random test (`FRINGE_SEED` overrides);
//! - [`qemu`]: the firmware under QEMU on a pseudo-terminal (also used by
//!   `cargo xtask size`).
#![forbid(unsafe_code)]
#![warn(missing_docs)]

pub mod bench;
pub mod qemu;
pub mod servers;
pub mod soak;

use std::collections::BTreeMap;
use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::OnceLock;
use std::time::{Duration, Instant};

use fringe_protocol::{DeviceFrame, FrameDecoder, Reading, Seq};

/// The device key of every simulated test device (64 hex digits). Tests
/// and the demo read it from here or from the scenario file; the simulator
/// never prints it.
pub const TEST_KEY_HEX: &str = "5e1f0c2a9b7d4e6f8a1b2c3d4e5f60718293a4b5c6d7e8f90a1b2c3d4e5f6071";

/// The workspace root.
pub fn workspace_root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .map_or_else(|| PathBuf::from("."), Path::to_path_buf)
}

/// Path of the `fringe` binary, built (debug profile) the first time it is
/// asked for; `FRINGE_BIN` names another one.
///
/// # Panics
/// If the build fails (the test cannot run without the binary).
pub fn fringe_bin() -> PathBuf {
    static BIN: OnceLock<PathBuf> = OnceLock::new();
    BIN.get_or_init(|| {
        // A binary built elsewhere (the soak runs a release build).
        if let Some(bin) = std::env::var_os("FRINGE_BIN") {
            let bin = PathBuf::from(bin);
            assert!(bin.exists(), "FRINGE_BIN={} does not exist", bin.display());
            return bin;
        }
        let cargo = std::env::var("CARGO").unwrap_or_else(|_| "cargo".into());
        let status = Command::new(cargo)
            .current_dir(workspace_root())
            .args(["build", "-q", "-p", "fringe-host", "--bin", "fringe"])
            .status()
            .expect("cannot run cargo to build fringe");
        assert!(status.success(), "building fringe failed");
        // Tests run from target/<profile>/deps/; the binary sits in target/<profile>/.
        let exe = std::env::current_exe().expect("test executable path");
        let profile_dir = exe
            .parent()
            .and_then(Path::parent)
            .expect("target/<profile> folder");
        let bin = profile_dir.join("fringe");
        let bin = if bin.exists() {
            bin
        } else {
            workspace_root().join("target/debug/fringe")
        };
        assert!(bin.exists(), "no fringe binary at {}", bin.display());
        bin
    })
    .clone()
}

/// A `Command` for `fringe` with `args`, colour off, no inherited config.
pub fn fringe(args: &[&str]) -> Command {
    let mut c = Command::new(fringe_bin());
    c.args(args).env("NO_COLOR", "1").stdin(Stdio::null());
    c
}

/// Exit status and output of a finished command.
#[derive(Debug, Clone)]
pub struct Outcome {
    /// Exit code (`-1` if killed by a signal).
    pub code: i32,
    /// Standard output.
    pub stdout: String,
    /// Standard error.
    pub stderr: String,
}

/// Runs `cmd` to completion within `limit`, capturing its output.
///
/// # Panics
/// If it cannot start, or it runs past `limit` (it is killed first).
pub fn run(cmd: &mut Command, limit: Duration) -> Outcome {
    let out_path = tempfile::NamedTempFile::new().expect("temp file");
    let err_path = tempfile::NamedTempFile::new().expect("temp file");
    let mut child = cmd
        .stdout(out_path.reopen().expect("reopen"))
        .stderr(err_path.reopen().expect("reopen"))
        .spawn()
        .expect("cannot start fringe");
    let Some(status) = wait_within(&mut child, limit) else {
        panic!(
            "{cmd:?} ran longer than {limit:?}; stderr so far:\n{}",
            std::fs::read_to_string(err_path.path()).unwrap_or_default()
        );
    };
    Outcome {
        code: status.code().unwrap_or(-1),
        stdout: std::fs::read_to_string(out_path.path()).unwrap_or_default(),
        stderr: std::fs::read_to_string(err_path.path()).unwrap_or_default(),
    }
}

/// Waits for `child` to end within `limit`; kills it and gives `None` if it
/// does not.
fn wait_within(child: &mut Child, limit: Duration) -> Option<std::process::ExitStatus> {
    let t0 = Instant::now();
    loop {
        if let Some(s) = child.try_wait().expect("wait") {
            return Some(s);
        }
        if t0.elapsed() > limit {
            let _ = child.kill();
            let _ = child.wait();
            return None;
        }
        std::thread::sleep(Duration::from_millis(10));
    }
}

/// Asserts `o` exited with `code` and its stderr contains every one of `needles`.
///
/// # Panics
/// When it did not.
pub fn assert_fails(o: &Outcome, code: i32, needles: &[&str]) {
    assert_eq!(o.code, code, "exit code; stderr:\n{}", o.stderr);
    for n in needles {
        assert!(o.stderr.contains(n), "stderr lacks {n:?}:\n{}", o.stderr);
    }
    assert!(
        !o.stderr.contains("panicked") && !o.stderr.contains("RUST_BACKTRACE"),
        "a panic trace reached the user:\n{}",
        o.stderr
    );
}

/// How long a test waits for a condition before it fails: generous, since
/// a test must not fail because the machine is busy (the condition is
/// polled, so a quick machine does not wait for it).
pub const DEADLINE: Duration = Duration::from_secs(60);

/// Polls `cond` every 20 ms until it holds.
///
/// # Panics
/// With `what()` if it does not hold within `limit`.
pub fn poll_until(limit: Duration, what: impl Fn() -> String, mut cond: impl FnMut() -> bool) {
    let t0 = Instant::now();
    while !cond() {
        assert!(t0.elapsed() < limit, "after {limit:?}: {}", what());
        std::thread::sleep(Duration::from_millis(20));
    }
}

/// The seed of a random test: `FRINGE_SEED` if set, else `default`
/// (`fringe_testkit::seed`, the one seed variable of every crate).
/// Print it in every assertion message.
pub fn seed(default: u64) -> u64 {
    fringe_testkit::seed(default)
}

/// A simulated plant scenario for tests (Harrowgate Mill, line 2).
#[derive(Debug, Clone)]
pub struct ScenarioSpec {
    /// Device serial.
    pub serial: String,
    /// Seed of noise and faults.
    pub seed: u64,
    /// Device seconds per wall second.
    pub time_scale: f64,
    /// Device baud rate.
    pub baud: u32,
    /// The device's measurement interval, device ms.
    pub interval_ms: u32,
    /// The device clock starts unset (counts from boot until a host sets it).
    pub clock_unset: bool,
    /// The device takes the plant's bulk density (protocol 1.4); `false`
    /// simulates firmware before it.
    pub density_input: bool,
    /// The device takes a relaxation calibration with the static terms;
    /// `false` simulates firmware before them.
    pub static_terms: bool,
    /// The device takes a relaxation calibration with the conductivity
    /// hold; `false` simulates firmware before it.
    pub sigma_hold: bool,
    /// The device takes a relaxation calibration with the density input;
    /// `false` simulates firmware before it.
    pub relaxation_density: bool,
    /// The device takes a 4-20 mA span above 100 %; `false` simulates
    /// firmware before it.
    pub wide_span: bool,
    /// Probability a byte is lost.
    pub drop_per_byte: f64,
    /// Probability a bit of a byte flips.
    pub flip_per_byte: f64,
    /// Probability garbage precedes a write.
    pub garbage_per_frame: f64,
    /// Disconnects as (at device s, for wall s).
    pub disconnects: Vec<(f64, f64)>,
    /// More scenario text (top-level keys, then `[[empty]]` tables),
    /// placed before the `[device]` table.
    pub extra: String,
    /// Tables placed at the end (`[calibration]`, say).
    pub tail: String,
}

impl ScenarioSpec {
    /// A clean line: no faults, device time 10x wall time, a reading
    /// every 100 ms of device time (100 a second of wall time).
    pub fn clean(serial: &str, seed: u64) -> Self {
        Self {
            serial: serial.into(),
            seed,
            time_scale: 10.0,
            baud: 115_200,
            interval_ms: 100,
            clock_unset: false,
            density_input: true,
            static_terms: true,
            sigma_hold: true,
            relaxation_density: true,
            wide_span: true,
            drop_per_byte: 0.0,
            flip_per_byte: 0.0,
            garbage_per_frame: 0.0,
            disconnects: Vec::new(),
            extra: String::new(),
            tail: String::new(),
        }
    }

    /// The scenario file text.
    pub fn toml(&self) -> String {
        let mut s = format!(
            "name = \"Harrowgate Mill, line 2 dryer outlet (test)\"\n\
             moisture_pct = [[0, 14.0], [120, 16.0], [240, 13.5]]\n\
             temperature_c = [[0, 30.0], [240, 34.0]]\n\
             water_conductivity_s_m = [[0, 0.1]]\n{}\n\
             [device]\nserial = \"{}\"\nkey = \"{TEST_KEY_HEX}\"\nseed = {}\ntime_scale = {}\nbaud = {}\ninterval_ms = {}\nclock = \"{}\"\ndensity_input = {}\nstatic_terms = {}\nsigma_hold = {}\nrelaxation_density = {}\nwide_span = {}\n\n\
             [product]\nname = \"wheat\"\n\n\
             [link]\ndrop_per_byte = {}\nflip_per_byte = {}\ngarbage_per_frame = {}\n",
            self.extra,
            self.serial,
            self.seed,
            self.time_scale,
            self.baud,
            self.interval_ms,
            if self.clock_unset { "unset" } else { "set" },
            self.density_input,
            self.static_terms,
            self.sigma_hold,
            self.relaxation_density,
            self.wide_span,
            self.drop_per_byte,
            self.flip_per_byte,
            self.garbage_per_frame
        );
        for (at, len) in &self.disconnects {
            s.push_str(&format!(
                "[[link.disconnect]]\nat_s = {at}\nfor_s = {len}\n"
            ));
        }
        s.push_str(&self.tail);
        s
    }
}

/// A running `fringe sim` (killed on drop).
pub struct Sim {
    child: Child,
    /// Folder holding the scenario, the port symlink, the record and databases.
    pub dir: tempfile::TempDir,
    /// Symlink to the simulator's current pty.
    pub port: PathBuf,
    /// JSON-lines record of every reading the device sent.
    pub record: PathBuf,
    /// Scenario file.
    pub scenario: PathBuf,
}

impl Sim {
    /// Starts `fringe sim` on `spec` and waits until its port exists.
    ///
    /// # Panics
    /// If it does not come up within 20 s.
    pub fn start(spec: &ScenarioSpec) -> Sim {
        let dir = tempfile::tempdir().expect("temp dir");
        let scenario = dir.path().join("scenario.toml");
        std::fs::write(&scenario, spec.toml()).expect("write scenario");
        let port = dir.path().join("port");
        let record = dir.path().join("record.jsonl");
        let log = std::fs::File::create(dir.path().join("sim.log")).expect("sim log");
        let child = fringe(&[
            "sim",
            "--scenario",
            scenario.to_str().unwrap_or_default(),
            "--link",
            port.to_str().unwrap_or_default(),
            "--record",
            record.to_str().unwrap_or_default(),
            "--bench",
            dir.path().join("bench").to_str().unwrap_or_default(),
        ])
        .stdout(log.try_clone().expect("log"))
        .stderr(log)
        .spawn()
        .expect("start fringe sim");
        let sim = Sim {
            child,
            dir,
            port,
            record,
            scenario,
        };
        poll_until(
            DEADLINE,
            || format!("fringe sim did not come up; its log:\n{}", sim.log()),
            || sim.port.exists(),
        );
        sim
    }

    /// The port path as text.
    pub fn port_str(&self) -> &str {
        self.port.to_str().unwrap_or_default()
    }

    /// A path in the sim's folder.
    pub fn path(&self, name: &str) -> PathBuf {
        self.dir.path().join(name)
    }

    /// Puts `what` (`air`, a table liquid, or `line`) in front of the
    /// simulated window through the bench fixture file, and waits until the
    /// simulator has read it (it looks every 100 ms).
    pub fn set_bench(&self, what: &str) {
        let word = what.split_whitespace().next().unwrap_or("line");
        // The simulator says `fringe sim: bench fixture: WORD` each time it
        // takes a new fixture; wait for that line rather than for a time.
        let applied = || {
            self.log()
                .lines()
                .rev()
                .find_map(|l| l.strip_prefix("fringe sim: bench fixture: "))
                .map(str::to_string)
        };
        if applied().as_deref() == Some(word) {
            return;
        }
        std::fs::write(self.path("bench"), what).expect("write bench file");
        poll_until(
            DEADLINE,
            || {
                format!(
                    "the simulator did not take bench fixture `{word}`; its log:\n{}",
                    self.log()
                )
            },
            || applied().as_deref() == Some(word),
        );
    }

    /// Sends signal `sig` (`-STOP`, `-CONT`, ...) to the simulator.
    ///
    /// # Panics
    /// If `kill` fails.
    pub fn signal(&self, sig: &str) {
        let ok = Command::new("kill")
            .args([sig, &self.child.id().to_string()])
            .status()
            .expect("kill");
        assert!(ok.success(), "kill {sig} failed");
    }

    /// What the simulator printed.
    pub fn log(&self) -> String {
        std::fs::read_to_string(self.dir.path().join("sim.log")).unwrap_or_default()
    }

    /// Every reading the device sent so far, by sequence.
    pub fn recorded(&self) -> BTreeMap<Seq, Reading> {
        let f = std::fs::File::open(&self.record).expect("record file");
        let mut out = BTreeMap::new();
        for line in BufReader::new(f).lines() {
            let line = line.expect("record line");
            let Some(hex) = line
                .split("\"frame\":\"")
                .nth(1)
                .and_then(|r| r.split('"').next())
            else {
                continue;
            };
            let bytes: Vec<u8> = (0..hex.len() / 2)
                .filter_map(|i| u8::from_str_radix(&hex[2 * i..2 * i + 2], 16).ok())
                .collect();
            let mut dec = FrameDecoder::<DeviceFrame>::new();
            for f in dec.push(&bytes) {
                if let Ok(DeviceFrame::Reading(r)) = f {
                    out.insert(r.seq, r);
                }
            }
        }
        out
    }
}

impl Drop for Sim {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

impl Sim {
    /// `fringe monitor` on this simulator into `db` (period 100 ms), plus `extra` flags.
    pub fn monitor(&self, db: &Path, extra: &[&str]) -> Command {
        let mut args = vec![
            "monitor",
            "--port",
            self.port_str(),
            "--db",
            db.to_str().unwrap_or_default(),
            "--period-ms",
            "100",
        ];
        args.extend_from_slice(extra);
        fringe(&args)
    }

    /// `fringe pull` from this simulator into `db`, plus `extra` flags.
    pub fn pull(&self, db: &Path, extra: &[&str]) -> Command {
        let mut args = vec![
            "pull",
            "--port",
            self.port_str(),
            "--db",
            db.to_str().unwrap_or_default(),
        ];
        args.extend_from_slice(extra);
        fringe(&args)
    }
}

/// Starts `cmd` in the background with its output discarded.
///
/// # Panics
/// If it cannot start.
pub fn spawn_silent(cmd: &mut Command) -> Child {
    cmd.stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .expect("cannot start fringe")
}

/// Every reading stored for `serial` in the database at `db`, in sequence order.
///
/// # Panics
/// If the database cannot be read.
pub fn stored_readings(db: &Path, serial: &str) -> Vec<Reading> {
    let store = fringe_host::store::Store::open_read_only(db).expect("open database");
    store
        .readings(serial)
        .expect("read readings")
        .into_iter()
        .map(|r| r.reading)
        .collect()
}

/// How many readings of `serial` the database at `db` holds committed now;
/// 0 while the file or its schema does not exist yet (for polling while a
/// monitor runs).
pub fn committed_readings(db: &Path, serial: &str) -> usize {
    fringe_host::store::Store::open_read_only(db)
        .and_then(|s| s.readings(serial))
        .map(|r| r.len())
        .unwrap_or(0)
}

/// Bitwise comparison of two readings (NaN-safe).
pub fn same_reading(a: &Reading, b: &Reading) -> bool {
    let f = |x: f32| x.to_bits();
    a.seq == b.seq
        && a.time_ms == b.time_ms
        && a.channels.iter().zip(&b.channels).all(|(x, y)| {
            f(x.g_s) == f(y.g_s)
                && f(x.b_s) == f(y.b_s)
                && f(x.eps_re) == f(y.eps_re)
                && f(x.eps_im) == f(y.eps_im)
        })
        && (a.temperature_c.is_nan() && b.temperature_c.is_nan()
            || a.temperature_c == b.temperature_c)
        && a.moisture_pct.map(f) == b.moisture_pct.map(f)
        && (a.uncertainty_pct.is_nan() && b.uncertainty_pct.is_nan()
            || a.uncertainty_pct == b.uncertainty_pct)
        && a.flags == b.flags
        && a.cell_cal == b.cell_cal
        && a.product_cal == b.product_cal
}

/// Asserts `stored` is strictly increasing, has no gap within a boot, and
/// equals what the device recorded for every sequence it spans; returns
/// the number of readings. `ctx` goes into every message (put the seed there).
///
/// # Panics
/// On the first difference.
pub fn assert_gapless(stored: &[Reading], recorded: &BTreeMap<Seq, Reading>, ctx: &str) -> usize {
    assert!(!stored.is_empty(), "{ctx}: nothing stored");
    for w in stored.windows(2) {
        let (a, b) = (w[0].seq, w[1].seq);
        assert!(a < b, "{ctx}: not increasing or duplicate at {a} then {b}");
        if a.boot == b.boot {
            assert_eq!(b.counter, a.counter + 1, "{ctx}: gap between {a} and {b}");
        }
    }
    for r in stored {
        let rec = recorded
            .get(&r.seq)
            .unwrap_or_else(|| panic!("{ctx}: stored {} was never sent by the device", r.seq));
        assert!(
            same_reading(r, rec),
            "{ctx}: stored {} differs from what the device sent:\n{r:?}\n{rec:?}",
            r.seq
        );
    }
    let (first, last) = (stored[0].seq, stored[stored.len() - 1].seq);
    let spanned = recorded.range(first..=last).count();
    assert_eq!(
        spanned,
        stored.len(),
        "{ctx}: the device sent {spanned} readings in {first}..={last}, the database holds {}",
        stored.len()
    );
    stored.len()
}

/// A `fringe` command driven through its prompts: its stdin is a pipe, its
/// stdout and stderr are collected as they come.
pub struct Interactive {
    child: Child,
    stdin: Option<std::process::ChildStdin>,
    out: std::sync::Arc<std::sync::Mutex<String>>,
    err: std::sync::Arc<std::sync::Mutex<String>>,
    readers: Vec<std::thread::JoinHandle<()>>,
}

impl Interactive {
    /// Starts `cmd` with piped stdin, stdout and stderr.
    ///
    /// # Panics
    /// If it cannot start.
    pub fn spawn(cmd: &mut Command) -> Self {
        let mut child = cmd
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .expect("cannot start fringe");
        let out = std::sync::Arc::new(std::sync::Mutex::new(String::new()));
        let err = std::sync::Arc::new(std::sync::Mutex::new(String::new()));
        let mut readers = Vec::new();
        for (pipe, buf) in [
            (
                Box::new(child.stdout.take().expect("stdout")) as Box<dyn std::io::Read + Send>,
                out.clone(),
            ),
            (
                Box::new(child.stderr.take().expect("stderr")) as Box<dyn std::io::Read + Send>,
                err.clone(),
            ),
        ] {
            readers.push(std::thread::spawn(move || {
                let mut pipe = pipe;
                let mut chunk = [0u8; 1024];
                while let Ok(n) = pipe.read(&mut chunk) {
                    if n == 0 {
                        break;
                    }
                    buf.lock()
                        .expect("buffer")
                        .push_str(&String::from_utf8_lossy(&chunk[..n]));
                }
            }));
        }
        Self {
            stdin: child.stdin.take(),
            child,
            out,
            err,
            readers,
        }
    }

    /// What it wrote to stderr so far.
    pub fn stderr(&self) -> String {
        self.err.lock().expect("buffer").clone()
    }

    /// Waits until stderr holds `needle` at least `nth` times.
    ///
    /// # Panics
    /// After `limit`, or if the program ends first, with what it printed.
    pub fn expect(&mut self, needle: &str, nth: usize, limit: Duration) {
        let t0 = Instant::now();
        loop {
            let e = self.stderr();
            if e.matches(needle).count() >= nth {
                return;
            }
            let ended = self.child.try_wait().expect("wait").is_some();
            assert!(
                !ended && t0.elapsed() < limit,
                "waiting for {needle:?} (#{nth}){}; stderr:\n{e}",
                if ended {
                    ": the program ended"
                } else {
                    ": timed out"
                }
            );
            std::thread::sleep(Duration::from_millis(20));
        }
    }

    /// Types `line` and Enter.
    ///
    /// # Panics
    /// If stdin is closed.
    pub fn send(&mut self, line: &str) {
        use std::io::Write as _;
        let stdin = self.stdin.as_mut().expect("stdin open");
        writeln!(stdin, "{line}").expect("write to stdin");
        stdin.flush().expect("flush stdin");
    }

    /// Closes stdin and waits for the end.
    ///
    /// # Panics
    /// After `limit` (killed first).
    pub fn finish(mut self, limit: Duration) -> Outcome {
        drop(self.stdin.take());
        let Some(status) = wait_within(&mut self.child, limit) else {
            panic!("ran longer than {limit:?}; stderr:\n{}", self.stderr());
        };
        for r in self.readers.drain(..) {
            let _ = r.join();
        }
        Outcome {
            code: status.code().unwrap_or(-1),
            stdout: self.out.lock().expect("buffer").clone(),
            stderr: self.stderr(),
        }
    }
}

impl Drop for Interactive {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// The `summary` line that ends the JSON Lines of `fringe monitor --json`
/// or `fringe pull --json` (docs/JSON.md).
///
/// # Panics
/// When the last line is not a JSON object with `"type": "summary"`.
pub fn summary_line(stdout: &str) -> serde_json::Value {
    let last = stdout.lines().last().unwrap_or_default();
    let v: serde_json::Value = serde_json::from_str(last)
        .unwrap_or_else(|e| panic!("last line is not JSON ({e}): {last}"));
    assert_eq!(v["type"], "summary", "{last}");
    v
}
