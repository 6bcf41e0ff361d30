//! The soak of the line (issue 17): simulated devices on an accelerated
//! clock, each behind a faulty serial line, streamed into a database by
//! `fringe monitor`, which is killed with SIGKILL at random moments and
//! started again; at the end a `fringe pull` and the checks: every reading
//! the device logged, from its first to the last one before the pull, is
//! in the store exactly once and equal to what the device sent, and the
//! hash chain verifies.
//!
//! Run long outside CI with `cargo xtask soak` (see DEVELOPERS.md); a short
//! version runs in `tests/tests/soak.rs`.

use std::path::Path;
use std::process::Child;
use std::time::{Duration, Instant};

use rand::{RngExt, SeedableRng};

use crate::{
    assert_gapless, fringe, poll_until, run, stored_readings, ScenarioSpec, Sim, DEADLINE,
};

/// What to soak.
#[derive(Debug, Clone)]
pub struct SoakOptions {
    /// Readings each device must have stored before the run ends.
    pub readings: u64,
    /// SIGKILLs of each device's monitor, spread over the run.
    pub kills: u32,
    /// Devices, each with its own simulator, line and monitor, run at once.
    pub devices: u32,
    /// Byte error rate of the line, both directions: half as lost bytes,
    /// half as flipped bits; garbage bursts at the same rate per frame.
    pub byte_error_rate: f64,
    /// Device seconds per wall second.
    pub time_scale: f64,
    /// A 1 s disconnect of the port every this many device seconds (0: none).
    pub disconnect_every_s: f64,
    /// Seed of the faults, the noise and the kill moments.
    pub seed: u64,
    /// All devices through one `fringe gateway` (killed instead of the
    /// monitors) rather than a monitor per device.
    pub gateway: bool,
}

/// What one device's soak did.
#[derive(Debug, Clone)]
pub struct DeviceSoak {
    /// Serial.
    pub serial: String,
    /// Readings in the store at the end (each checked against what the
    /// device sent, none missing, none twice).
    pub readings: u64,
    /// Of those, the readings the monitor (the gateway) had stored, with no
    /// gap from the device's first, before the closing `fringe pull` took
    /// the rest (those the device logged after the last run was killed).
    pub stored_by_host: u64,
    /// Whether the readings came through one gateway for all devices.
    pub through_gateway: bool,
    /// SIGKILLs of the monitor (of the gateway, shared by its devices).
    pub kills: u32,
    /// Of those, kills before the monitor had committed anything in its run
    /// (the gateway: anything of any device).
    pub early_kills: u32,
    /// Monitor runs (gateway runs).
    pub monitor_runs: u32,
    /// Of those, runs that ended by themselves because the port did not
    /// exist when they started (a disconnect of the line: `fringe monitor`
    /// exits 10 then, and a service manager starts it again, as here).
    /// Not counted through the gateway (which waits for the port): null
    /// in the JSON.
    pub port_missing_exits: u32,
    /// The simulator's closing line (bytes, faults, disconnects).
    pub line: String,
    /// Wall time, s.
    pub seconds: f64,
}

/// Runs the soak; panics (naming the device and the seed) on the first
/// reading lost, duplicated or changed, or a chain that does not verify.
pub fn soak(opts: &SoakOptions) -> Vec<DeviceSoak> {
    assert!(opts.devices >= 1, "the soak needs at least one device");
    if opts.gateway {
        return soak_gateway(opts);
    }
    let handles: Vec<_> = (0..opts.devices)
        .map(|i| {
            let o = opts.clone();
            std::thread::spawn(move || soak_device(&o, i))
        })
        .collect();
    handles
        .into_iter()
        .map(|h| h.join().unwrap_or_else(|e| std::panic::resume_unwind(e)))
        .collect()
}

/// Device `index`'s serial, seed and simulated line.
fn device_spec(opts: &SoakOptions, index: u32) -> (String, u64, ScenarioSpec) {
    let serial = format!("HGM-SOAK-{:04}", index + 1);
    let seed = opts.seed.wrapping_add(u64::from(index) * 7919);
    let mut spec = ScenarioSpec::clean(&serial, seed);
    spec.time_scale = opts.time_scale;
    spec.drop_per_byte = opts.byte_error_rate / 2.0;
    spec.flip_per_byte = opts.byte_error_rate / 2.0;
    spec.garbage_per_frame = opts.byte_error_rate;
    if opts.disconnect_every_s > 0.0 {
        // Device time the run can take, with room to spare: the device logs
        // ahead of the host (its own pace, while the host restarts and
        // catches up), so twice the time of the readings asked for fell
        // short and the disconnects stopped partway through a run.
        let run_s = opts.readings as f64 * f64::from(spec.interval_ms) / 1000.0 * 20.0 + 3600.0;
        let mut at = opts.disconnect_every_s;
        while at < run_s {
            spec.disconnects.push((at, 1.0));
            at += opts.disconnect_every_s;
        }
    }
    (serial, seed, spec)
}

fn soak_device(opts: &SoakOptions, index: u32) -> DeviceSoak {
    let start = Instant::now();
    let (serial, seed, spec) = device_spec(opts, index);
    let ctx = format!("soak {serial}, FRINGE_SEED={}", opts.seed);
    let sim = Sim::start(&spec);
    let db = sim.path("soak.db");
    let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
    let per_kill = opts.readings / u64::from(opts.kills.max(1) + 1);
    let (mut kills, mut early_kills, mut runs, mut missing) = (0u32, 0u32, 0u32, 0u32);
    let count = |db: &Path| reading_count(db, &serial);
    while kills < opts.kills || count(&db) < opts.readings {
        let before = count(&db);
        let log = std::fs::OpenOptions::new()
            .create(true)
            .append(true)
            .open(sim.path("monitor.log"))
            .expect("monitor log");
        let mut child = sim
            .monitor(&db, &[])
            .stdout(std::process::Stdio::null())
            .stderr(log)
            .spawn()
            .expect("start fringe monitor");
        runs += 1;
        if kills < opts.kills && rng.random_bool(0.25) {
            // Early: anywhere in its start (identify, clock, backfill).
            std::thread::sleep(Duration::from_millis(rng.random_range(0..400)));
            if exited(&mut child, &ctx, &sim) {
                missing += 1;
                continue;
            }
            kill(&mut child);
            kills += 1;
            if count(&db) == before {
                early_kills += 1;
            }
            continue;
        }
        // Late: after it has stored its share, at a random moment.
        let share = if kills < opts.kills {
            (per_kill as f64 * rng.random_range(0.5..1.5)) as u64
        } else {
            opts.readings.saturating_sub(before)
        };
        let target = before + share.max(1);
        let limit = Duration::from_secs(60) + Duration::from_secs_f64(share as f64 / 20.0);
        let mut ended = false;
        poll_until(
            limit,
            || {
                format!(
                    "{ctx}: the monitor did not reach {target} readings (has {}); sim log:\n{}\nmonitor log (end):\n{}",
                    count(&db),
                    sim.log(),
                    tail(&sim.path("monitor.log"), 40)
                )
            },
            || {
                std::thread::sleep(Duration::from_millis(50));
                ended = exited(&mut child, &ctx, &sim);
                // The last run: until the monitor has filled every gap too.
                ended || (count(&db) >= target && (kills < opts.kills || gapless(&db, &serial)))
            },
        );
        if ended {
            missing += 1;
            continue;
        }
        if kills < opts.kills {
            std::thread::sleep(Duration::from_millis(rng.random_range(0..300)));
            kill(&mut child);
            kills += 1;
        } else {
            kill(&mut child);
        }
    }
    let (n, by_host, line) = check_device(&sim, &serial, &db, &ctx);
    assert_chain(&db, &ctx);
    DeviceSoak {
        serial,
        readings: n,
        stored_by_host: by_host,
        through_gateway: false,
        kills,
        early_kills,
        monitor_runs: runs,
        port_missing_exits: missing,
        line,
        seconds: start.elapsed().as_secs_f64(),
    }
}

/// With nothing else reading the device: the host's own work checked
/// (what it stored has no gap from the device's first reading: a reading
/// it lost would otherwise be filled by the pull), then a `fringe pull` of
/// everything the device logged up to now into `db`, the simulator
/// stopped, and the checks (panics on the first failure). The readings
/// stored in all, those the host had stored before the pull, and the
/// simulator's closing line.
fn check_device(sim: &Sim, serial: &str, db: &Path, ctx: &str) -> (u64, u64, String) {
    assert!(
        gapless(db, serial),
        "{ctx}: what the host stored has gaps before the closing pull: {:?}",
        fringe_host::store::Store::open_read_only(db).and_then(|s| s.gaps(serial))
    );
    let by_host = reading_count(db, serial);
    // What the device holds now, then everything it logged up to then.
    // The line keeps its disconnects meanwhile: a status or pull that loses
    // its port is run again, as a person would (a pull commits what it has
    // read and stores only what is missing), while it makes progress: it
    // gives up after five tries in a row that store nothing *and* span more
    // than ten times a disconnect (1 s of wall time). Five tries alone fit
    // into one disconnect when each fails fast: a CI run failed so, every
    // try finding the port gone.
    let retried = |what: &str, cmd: &dyn Fn() -> std::process::Command, limit: Duration| {
        let (mut last, mut idle, mut since) = (String::new(), 0, Instant::now());
        while idle < 5 || since.elapsed() < Duration::from_secs(10) {
            let before = reading_count(db, serial);
            let o = run(&mut cmd(), limit);
            if o.code == 0 {
                return o;
            }
            last = o.stderr;
            if reading_count(db, serial) > before {
                (idle, since) = (0, Instant::now());
            } else {
                idle += 1;
            }
            std::thread::sleep(Duration::from_millis(200));
        }
        panic!(
            "{ctx}: {what} failed {idle} times in a row over {:.1} s with no progress; the last: {last}",
            since.elapsed().as_secs_f64()
        )
    };
    let o = retried(
        "status",
        &|| fringe(&["status", "--port", sim.port_str(), "--json"]),
        DEADLINE,
    );
    let status: serde_json::Value = serde_json::from_str(&o.stdout).expect("status --json");
    let last_logged = status["next_seq"]["counter"]
        .as_u64()
        .and_then(|c| c.checked_sub(1))
        .unwrap_or_else(|| panic!("{ctx}: the device has logged nothing: {status}"));
    retried("pull", &|| sim.pull(db, &[]), Duration::from_secs(600));
    sim.signal("-TERM");
    poll_until(
        DEADLINE,
        || format!("{ctx}: the simulator did not stop; its log:\n{}", sim.log()),
        || sim.log().contains("fringe sim: stopped"),
    );
    let line = sim
        .log()
        .lines()
        .find(|l| l.starts_with("fringe sim: stopped"))
        .unwrap_or_default()
        .to_string();

    let stored = stored_readings(db, serial);
    let n = assert_gapless(&stored, &sim.recorded(), ctx) as u64;
    let (first, last) = (stored[0].seq, stored[stored.len() - 1].seq);
    assert!(
        stored.iter().all(|r| r.seq.boot == first.boot),
        "{ctx}: the device restarted"
    );
    assert_eq!(
        first.counter, 0,
        "{ctx}: the first logged reading is missing"
    );
    assert!(
        u64::from(last.counter) >= last_logged,
        "{ctx}: the device had logged up to {last_logged}, the store ends at {last}"
    );
    (n, by_host, line)
}

/// The hash chain of the whole store verifies (once nothing writes to it).
fn assert_chain(db: &Path, ctx: &str) {
    let store = fringe_host::store::Store::open_read_only(db).expect("open the store");
    let v = store.verify_chain().expect("verify");
    assert!(v.ok(), "{ctx}: the chain does not verify: {v:?}");
}

/// The soak through one gateway: every device on its own faulty line,
/// all of them read by one `fringe gateway` into one SQLite store; the
/// gateway is killed with SIGKILL at random moments (a quarter of them
/// anywhere in its start, the rest after the devices have stored a share
/// together) and started again, as a service manager would; then each
/// device is pulled and checked as in the monitor's soak.
fn soak_gateway(opts: &SoakOptions) -> Vec<DeviceSoak> {
    let start = Instant::now();
    let devices: Vec<(String, Sim)> = (0..opts.devices)
        .map(|i| {
            let (serial, _, spec) = device_spec(opts, i);
            (serial, Sim::start(&spec))
        })
        .collect();
    let ctx = format!(
        "gateway soak of {} devices, FRINGE_SEED={}",
        opts.devices, opts.seed
    );
    let dir = tempfile::tempdir().expect("a folder for the gateway");
    let db = dir.path().join("soak.db");
    let glog = dir.path().join("gateway.log");
    let mut site = String::from("store = \"soak.db\"\ndrift_every_s = 0\n\n");
    for (i, (_, sim)) in devices.iter().enumerate() {
        site.push_str(&format!(
            "[[device]]\nunit = {}\nport = \"{}\"\n\n",
            i + 1,
            sim.port_str()
        ));
    }
    let site_path = dir.path().join("site.toml");
    std::fs::write(&site_path, site).expect("write the site file");
    let mut rng = rand::rngs::StdRng::seed_from_u64(opts.seed);
    let all = opts.readings * u64::from(opts.devices);
    let per_kill = all / u64::from(opts.kills.max(1) + 1);
    let (mut kills, mut early_kills, mut runs) = (0u32, 0u32, 0u32);
    let counts = |db: &Path| -> Vec<u64> {
        devices
            .iter()
            .map(|(serial, _)| reading_count(db, serial))
            .collect()
    };
    let total = |db: &Path| counts(db).iter().sum::<u64>();
    let ended = |child: &mut Child| -> bool {
        match child.try_wait().expect("wait for the gateway") {
            None => false,
            Some(st) => panic!(
                "{ctx}: the gateway ended by itself ({st}); its log (end):\n{}",
                tail(&glog, 40)
            ),
        }
    };
    loop {
        let before = total(&db);
        let log = std::fs::OpenOptions::new()
            .create(true)
            .append(true)
            .open(&glog)
            .expect("gateway log");
        let mut child = crate::fringe(&["gateway", "--config", site_path.to_str().unwrap()])
            .stdout(std::process::Stdio::null())
            .stderr(log)
            .spawn()
            .expect("start fringe gateway");
        runs += 1;
        if kills < opts.kills && rng.random_bool(0.25) {
            std::thread::sleep(Duration::from_millis(rng.random_range(0..400)));
            ended(&mut child);
            kill(&mut child);
            kills += 1;
            if total(&db) == before {
                early_kills += 1;
            }
            continue;
        }
        let last = kills >= opts.kills;
        let share = if last {
            // The last run: until every device has its readings.
            opts.readings * u64::from(opts.devices)
        } else {
            (per_kill as f64 * rng.random_range(0.5..1.5)) as u64
        };
        let target = before + share.max(1);
        let limit = Duration::from_secs(60) + Duration::from_secs_f64(share as f64 / 20.0);
        poll_until(
            limit,
            || {
                format!(
                    "{ctx}: the gateway did not reach {} (has {:?}); gateway log (end):\n{}",
                    if last {
                        format!("{} readings of each device, with no gap", opts.readings)
                    } else {
                        format!("{target} readings in all")
                    },
                    counts(&db),
                    tail(&glog, 40)
                )
            },
            || {
                std::thread::sleep(Duration::from_millis(50));
                ended(&mut child);
                if last {
                    // Every device's readings, and every gap filled.
                    counts(&db).iter().all(|n| *n >= opts.readings)
                        && devices.iter().all(|(serial, _)| gapless(&db, serial))
                } else {
                    total(&db) >= target
                }
            },
        );
        if last {
            kill(&mut child);
            break;
        }
        std::thread::sleep(Duration::from_millis(rng.random_range(0..300)));
        kill(&mut child);
        kills += 1;
    }
    let per_device_s = start.elapsed().as_secs_f64();
    // Each device checked on its own thread at once: the devices keep
    // logging, and one after another the last would have the longest
    // backlog to pull.
    let checks: Vec<_> = std::thread::scope(|scope| {
        let handles: Vec<_> = devices
            .iter()
            .map(|(serial, sim)| {
                let ctx = format!("{ctx}, {serial}");
                let db = &db;
                scope.spawn(move || check_device(sim, serial, db, &ctx))
            })
            .collect();
        handles
            .into_iter()
            .map(|h| h.join().unwrap_or_else(|e| std::panic::resume_unwind(e)))
            .collect()
    });
    assert_chain(&db, &ctx);
    devices
        .iter()
        .zip(checks)
        .map(|((serial, _), (n, by_host, line))| DeviceSoak {
            serial: serial.clone(),
            readings: n,
            stored_by_host: by_host,
            through_gateway: true,
            kills,
            early_kills,
            monitor_runs: runs,
            port_missing_exits: 0,
            line,
            seconds: per_device_s,
        })
        .collect()
}

impl DeviceSoak {
    /// As JSON, for the soak's report.
    pub fn to_json(&self) -> serde_json::Value {
        serde_json::json!({
            "serial": self.serial,
            "readings": self.readings,
            "stored_by_host": self.stored_by_host,
            "through": if self.through_gateway { "gateway" } else { "monitor" },
            "kills": self.kills,
            "early_kills": self.early_kills,
            "monitor_runs": self.monitor_runs,
            "port_missing_exits": (!self.through_gateway).then_some(self.port_missing_exits),
            "line": self.line,
            "seconds": self.seconds,
        })
    }
}

fn tail(path: &Path, n: usize) -> String {
    let text = std::fs::read_to_string(path).unwrap_or_default();
    let lines: Vec<&str> = text.lines().collect();
    lines[lines.len().saturating_sub(n)..].join("\n")
}

/// Whether the monitor has ended by itself because its port did not exist
/// (exit 10: it was started during a disconnect of the line); panics on
/// any other end, which the soak does not expect.
fn exited(child: &mut Child, ctx: &str, sim: &Sim) -> bool {
    match child.try_wait().expect("wait for the monitor") {
        None => false,
        Some(st) if st.code() == Some(10) => true,
        Some(st) => panic!(
            "{ctx}: the monitor ended by itself ({st}); its log (end):\n{}",
            tail(&sim.path("monitor.log"), 40)
        ),
    }
}

fn kill(child: &mut Child) {
    // SIGKILL: no chance to commit or clean up.
    let _ = child.kill();
    let _ = child.wait();
}

/// Whether `db` holds `serial`'s readings with no gap from its first
/// (counter 0 of its boot); false before the file exists.
fn gapless(db: &Path, serial: &str) -> bool {
    fringe_host::store::Store::open_read_only(db)
        .and_then(|s| Ok(s.gaps(serial)?.is_empty() && s.reading_count(serial)? > 0))
        .unwrap_or(false)
}

/// The number of disconnects in the simulator's closing line.
pub fn disconnects(line: &str) -> Option<u32> {
    let head = &line[..line.find(" disconnect")?];
    head.rsplit(|c: char| !c.is_ascii_digit())
        .next()?
        .parse()
        .ok()
}

/// Readings of `serial` committed in `db` (0 before the file exists).
fn reading_count(db: &Path, serial: &str) -> u64 {
    fringe_host::store::Store::open_read_only(db)
        .and_then(|s| s.reading_count(serial))
        .unwrap_or(0)
}

#[cfg(test)]
mod tests {
    /// The count is read from the simulator's closing line as `fringe sim`
    /// prints it (`host/src/cmd/sim.rs`).
    #[test]
    fn disconnects_are_read_from_the_closing_line() {
        let line = "fringe sim: stopped; 8207 bytes in, 200117 bytes out, 28529 lost while no host read, 5 disconnects; line faults: 110 bytes dropped, 139 with a bit flipped, 18 garbage bytes inserted";
        assert_eq!(super::disconnects(line), Some(5));
        assert_eq!(super::disconnects("fringe sim: stopped"), None);
    }
}
