//! Several gateways on one PostgreSQL database (issue 14's plant test):
//! the real `fringe gateway` binary against a throwaway server from
//! Debian's PostgreSQL (`fringe_tests::servers::Postgres`).
//!
//! Ignored in a plain `cargo test` (they need PostgreSQL): the `python`
//! part of `cargo xtask test` runs them with `--ignored`.

use std::cell::RefCell;
use std::path::{Path, PathBuf};
use std::process::{Child, Command};
use std::time::{Duration, Instant};

use fringe_postgres::Store as PgStore;
use fringe_protocol::{Reading, Seq};
use fringe_store::StoreError;
use fringe_tests::servers::Postgres;
use fringe_tests::{assert_gapless, fringe, poll_until, run, ScenarioSpec, Sim};
use serde_json::Value;

const LIMIT: Duration = Duration::from_secs(180);

/// A reading every 200 ms of wall time per simulated device: 5 a second,
/// five times the plant's one a second, so each step of the test waits
/// seconds, not minutes, with every device of the plant (3 x 20).
const INTERVAL_MS: u32 = 200;

/// Readers of the database as the test sees it; reconnects after the
/// server restarted.
struct Db {
    url: String,
    store: RefCell<Option<PgStore>>,
}

impl Db {
    fn new(url: &str) -> Self {
        Self {
            url: url.into(),
            store: RefCell::new(None),
        }
    }

    fn with<R>(&self, f: impl FnOnce(&PgStore) -> Result<R, StoreError>) -> Result<R, StoreError> {
        let mut s = self.store.borrow_mut();
        if s.as_ref().is_none_or(PgStore::is_closed) {
            *s = Some(PgStore::connect_read_only(&self.url)?);
        }
        let r = f(s.as_ref().expect("connected"));
        if r.is_err() {
            *s = None;
        }
        r
    }

    /// Readings of `serial` stored now (0 while the database is away or
    /// has no store yet: for polling).
    fn count(&self, serial: &str) -> u64 {
        self.with(|s| s.reading_count(serial)).unwrap_or(0)
    }

    fn readings(&self, serial: &str) -> Vec<Reading> {
        let mut out = Vec::new();
        self.with(|s| {
            out.clear();
            s.for_each_reading(
                serial,
                Seq {
                    boot: 0,
                    counter: 0,
                },
                Seq {
                    boot: u32::MAX,
                    counter: u32::MAX,
                },
                &mut |r| {
                    out.push(r.reading);
                    Ok(())
                },
            )
        })
        .expect("read readings");
        out
    }
}

/// A running `fringe gateway --json` with its output in files.
struct Gw {
    child: Child,
    out: PathBuf,
    err: PathBuf,
}

impl Gw {
    fn start(site: &Path, name: &str) -> Self {
        let dir = site.parent().expect("site folder");
        let n = std::fs::read_dir(dir).map_or(0, Iterator::count);
        let out = dir.join(format!("{name}.{n}.out"));
        let err = dir.join(format!("{name}.{n}.err"));
        let child = fringe(&["gateway", "--config", site.to_str().unwrap(), "--json"])
            .stdout(std::fs::File::create(&out).expect("out"))
            .stderr(std::fs::File::create(&err).expect("err"))
            .spawn()
            .expect("start fringe gateway");
        Self { child, out, err }
    }

    fn stderr(&self) -> String {
        std::fs::read_to_string(&self.err).unwrap_or_default()
    }

    fn signal(&self, sig: &str) {
        let ok = Command::new("kill")
            .args([sig, &self.child.id().to_string()])
            .status()
            .expect("kill");
        assert!(ok.success());
    }

    /// Waits for the exit; its status code (-1: killed by a signal).
    fn wait(&mut self) -> i32 {
        let mut code = None;
        let err = self.err.clone();
        poll_until(
            LIMIT,
            || {
                format!(
                    "the gateway did not stop:\n{}",
                    std::fs::read_to_string(&err).unwrap_or_default()
                )
            },
            || {
                code = self
                    .child
                    .try_wait()
                    .expect("wait")
                    .map(|s| s.code().unwrap_or(-1));
                code.is_some()
            },
        );
        code.unwrap_or(-1)
    }

    /// The closing JSON summary.
    fn summary(&self) -> Value {
        let out = std::fs::read_to_string(&self.out).expect("out");
        out.lines()
            .filter_map(|l| serde_json::from_str::<Value>(l).ok())
            .find(|v| v["type"] == "summary")
            .unwrap_or_else(|| panic!("no summary line:\n{out}\n{}", self.stderr()))
    }
}

impl Drop for Gw {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

fn spec(serial: &str, seed: u64) -> ScenarioSpec {
    ScenarioSpec {
        time_scale: 1.0,
        interval_ms: INTERVAL_MS,
        ..ScenarioSpec::clean(serial, seed)
    }
}

/// A site file of gateway `name` into `url` with `devices` (port text
/// each), in `dir`.
fn site(dir: &Path, name: &str, url: &str, lease_s: f64, ports: &[String]) -> PathBuf {
    let mut text = format!(
        "name = \"Harrowgate Mill ({name})\"\nstore = \"{url}\"\ngateway = \"{name}\"\nlease_s = {lease_s}\nstatus_every_s = 5\ndrift_every_s = 0\n\n"
    );
    for (i, p) in ports.iter().enumerate() {
        text.push_str(&format!("[[device]]\nunit = {}\nport = \"{p}\"\n\n", i + 1));
    }
    let path = dir.join(format!("{name}.toml"));
    std::fs::write(&path, text).expect("site");
    path
}

/// Gapless, strictly increasing, and starting at the first reading the
/// device took (counter 1 of its first boot); returns the count.
fn assert_complete_from_start(stored: &[Reading], ctx: &str) -> usize {
    assert!(!stored.is_empty(), "{ctx}: nothing stored");
    assert!(
        stored[0].seq.counter <= 1,
        "{ctx}: starts at {}, not at the device's first reading",
        stored[0].seq
    );
    for w in stored.windows(2) {
        let (a, b) = (w[0].seq, w[1].seq);
        assert!(a < b, "{ctx}: duplicate or out of order at {a} then {b}");
        if a.boot == b.boot {
            assert_eq!(b.counter, a.counter + 1, "{ctx}: gap between {a} and {b}");
        }
    }
    stored.len()
}

/// Issue 14: 3 gateway processes, 20 simulated devices each, one
/// database. Gateway A's devices are `fringe sim` processes on
/// pseudo-terminals (they outlive A when it is killed, so A's restart can
/// read back from their logs); B's and C's are simulated in process.
/// A is killed with SIGKILL and restarted; then the PostgreSQL server is
/// restarted under all three. Every reading is in the database exactly
/// once and gapless, A's readings are those its devices sent, and the
/// hash chain verifies.
///
/// Cost: 60 devices at 5 readings a second (the interval shortened from
/// the plant's 1 s, not the number of devices); measured 91 s of wall
/// time on the 2-core machine while other builds ran, most of it waiting
/// for readings to accrue and for the gateways' 5 s retry after the
/// server restart.
#[test]
#[ignore = "needs PostgreSQL: cargo xtask test runs it"]
fn three_gateways_sixty_devices_one_database_survive_a_kill_and_a_server_restart() {
    let seed = fringe_tests::seed(14);
    let t0 = Instant::now();
    let mut pg = Postgres::start();
    let url = pg.url();
    let db = Db::new(&url);
    let dir = tempfile::tempdir().expect("dir");
    // A: 20 `fringe sim` children on pseudo-terminals.
    let a_serials: Vec<String> = (1..=20).map(|i| format!("HGM-A-{i:04}")).collect();
    let sims: Vec<Sim> = a_serials
        .iter()
        .enumerate()
        .map(|(i, s)| Sim::start(&spec(s, seed + i as u64)))
        .collect();
    let a_ports: Vec<String> = sims.iter().map(|s| s.port_str().to_string()).collect();
    let a_site = site(dir.path(), "gw-a", &url, 6.0, &a_ports);
    // B and C: 20 in-process devices each.
    let mut inproc = Vec::new();
    let mut sites = Vec::new();
    for g in ["b", "c"] {
        let mut ports = Vec::new();
        for i in 1..=20u64 {
            let serial = format!("HGM-{}-{i:04}", g.to_uppercase());
            let file = dir.path().join(format!("{serial}.toml"));
            std::fs::write(&file, spec(&serial, seed + 100 + i).toml()).expect("scenario");
            ports.push(format!("sim:{}", file.display()));
            inproc.push(serial);
        }
        sites.push(site(dir.path(), &format!("gw-{g}"), &url, 6.0, &ports));
    }
    let all: Vec<String> = a_serials.iter().chain(&inproc).cloned().collect();
    let mut a = Gw::start(&a_site, "gw-a");
    let mut b = Gw::start(&sites[0], "gw-b");
    let mut c = Gw::start(&sites[1], "gw-c");
    let everyone = |a: &Gw, b: &Gw, c: &Gw| {
        format!(
            "seed {seed}\nA:\n{}\nB:\n{}\nC:\n{}",
            a.stderr(),
            b.stderr(),
            c.stderr()
        )
    };
    poll_until(
        LIMIT,
        || {
            format!(
                "not every device stored 10 readings: {}",
                everyone(&a, &b, &c)
            )
        },
        || all.iter().all(|s| db.count(s) >= 10),
    );
    // Every device is owned by the gateway that runs it.
    let leases = PgStore::connect_read_only(&url)
        .expect("connect")
        .leases()
        .expect("leases");
    assert_eq!(leases.len(), 60, "seed {seed}: {leases:?}");
    for l in &leases {
        let want = format!("gw-{}", l.serial[4..5].to_lowercase());
        assert!(l.live && l.owner == want, "seed {seed}: {l:?}");
    }

    // SIGKILL A: no commit. Its devices go on logging; the restart (same
    // gateway name: it takes its live leases back at once) reads back
    // what the kill lost and what came meanwhile.
    a.signal("-KILL");
    assert_eq!(a.wait(), -1, "killed by the signal");
    let before: Vec<u64> = a_serials.iter().map(|s| db.count(s)).collect();
    let mut a = Gw::start(&a_site, "gw-a");
    poll_until(
        LIMIT,
        || format!("A's restart did not catch up: {}", everyone(&a, &b, &c)),
        || {
            a_serials
                .iter()
                .zip(&before)
                .all(|(s, n)| db.count(s) >= n + 20)
        },
    );
    assert!(
        a.stderr().contains("readings from the device log stored"),
        "seed {seed}: {}",
        a.stderr()
    );

    // Restart the server under all three gateways: their writes fail, they
    // reconnect and read back from the device logs what they missed.
    let before: Vec<u64> = all.iter().map(|s| db.count(s)).collect();
    pg.restart();
    poll_until(
        LIMIT,
        || {
            format!(
                "not every device came back after the server restart: {}",
                everyone(&a, &b, &c)
            )
        },
        || all.iter().zip(&before).all(|(s, n)| db.count(s) >= n + 20),
    );

    // A's devices stop sending (SIGSTOP); once the store holds all they
    // sent, the gateways are stopped cleanly.
    for s in &sims {
        s.signal("-STOP");
    }
    poll_until(
        LIMIT,
        || {
            format!(
                "A did not commit all its devices sent: {}",
                everyone(&a, &b, &c)
            )
        },
        || {
            a_serials
                .iter()
                .zip(&sims)
                .all(|(s, sim)| db.count(s) == sim.recorded().len() as u64)
        },
    );
    for g in [&a, &b, &c] {
        g.signal("-TERM");
    }
    for g in [&mut a, &mut b, &mut c] {
        let code = g.wait();
        assert_eq!(code, 0, "seed {seed}: {}", g.stderr());
    }
    // Every lease was released on the clean stop.
    let leases = PgStore::connect_read_only(&url)
        .expect("connect")
        .leases()
        .expect("leases");
    assert!(leases.iter().all(|l| !l.live), "seed {seed}: {leases:?}");

    // A: exactly what each device sent, once, gapless, from its first
    // reading on.
    for (s, sim) in a_serials.iter().zip(&sims) {
        let stored = db.readings(s);
        let ctx = format!("seed {seed}, {s}");
        let n = assert_gapless(&stored, &sim.recorded(), &ctx);
        assert_eq!(n, sim.recorded().len(), "{ctx}: sent and stored differ");
        assert_complete_from_start(&stored, &ctx);
    }
    // B and C: once, gapless from each device's first reading to the last
    // one its gateway saw, none lost.
    for (g, serials) in [(&b, &inproc[..20]), (&c, &inproc[20..])] {
        let summary = g.summary();
        for (i, s) in serials.iter().enumerate() {
            let d = &summary["devices"][i];
            let ctx = format!("seed {seed}, {s}: {d}");
            assert_eq!(d["serial"], s.as_str(), "{ctx}");
            assert_eq!(d["lost"], 0, "{ctx}");
            let stored = db.readings(s);
            let n = assert_complete_from_start(&stored, &ctx);
            // 10 before the kill, 20 more after the server restart.
            assert!(n >= 30, "{ctx}: {n}");
            assert_eq!(
                (d["boot"].as_u64(), d["counter"].as_u64()),
                (
                    Some(u64::from(stored[n - 1].seq.boot)),
                    Some(u64::from(stored[n - 1].seq.counter))
                ),
                "{ctx}: the last reading seen is the last stored"
            );
        }
    }
    let o = run(
        &mut fringe(&["audit", "verify", "--db", &url, "--json"]),
        LIMIT,
    );
    assert_eq!(
        o.code, 0,
        "seed {seed}: audit verify: {}{}",
        o.stdout, o.stderr
    );
    eprintln!("plant test: {:.0} s", t0.elapsed().as_secs_f64());
}

/// A device whose lease another gateway holds is reported and left alone
/// (nothing of it is written), and taken over once that lease expires;
/// a clean stop releases it. The password of the URL is in no message.
#[test]
#[ignore = "needs PostgreSQL: cargo xtask test runs it"]
fn a_device_leased_elsewhere_is_skipped_then_taken_over_after_expiry() {
    let pg = Postgres::start();
    let admin_url = pg.url();
    // A password the server ignores (trust authentication) but the
    // gateway is given: it must never show it.
    let secret = "pa55-w0rd-never-shown";
    let url = admin_url.replace("fringe@", &format!("fringe:{secret}@"));
    let db = Db::new(&admin_url);
    let dir = tempfile::tempdir().expect("dir");
    let serial = "HGM-L-0001";
    let file = dir.path().join("dev.toml");
    std::fs::write(&file, spec(serial, 3).toml()).expect("scenario");
    // Another live gateway holds the device: it renews its lease (4 s)
    // until the gateway under test has reported the device as its.
    const OTHER_TTL: Duration = Duration::from_secs(4);
    let mut other = PgStore::connect(&admin_url).expect("connect");
    let mut lease = other.acquire(serial, "gw-other", OTHER_TTL).expect("lease");
    let site1 = site(
        dir.path(),
        "gw-1",
        &url,
        3.0,
        &[format!("sim:{}", file.display())],
    );
    let mut g = Gw::start(&site1, "gw-1");
    let mut renewed = Instant::now();
    poll_until(
        LIMIT,
        || format!("not reported as leased elsewhere:\n{}", g.stderr()),
        || {
            lease = other.renew(&lease).expect("the other gateway renews");
            renewed = Instant::now();
            g.stderr().contains("owned by gateway \"gw-other\"")
        },
    );
    assert_eq!(db.count(serial), 0, "written while leased elsewhere");
    // The other gateway stops renewing: taken over once its lease runs
    // out (on the server's clock).
    poll_until(
        LIMIT,
        || format!("never taken over:\n{}", g.stderr()),
        || db.count(serial) >= 5,
    );
    assert!(
        renewed.elapsed() >= OTHER_TTL,
        "taken over {:?} after the last renewal, before the other lease expired",
        renewed.elapsed()
    );
    let l = PgStore::connect_read_only(&admin_url)
        .expect("connect")
        .leases()
        .expect("leases");
    assert!(l[0].live && l[0].owner == "gw-1", "{l:?}");
    // The former holder's renewal now fails: it lost the device.
    assert!(other.renew(&lease).is_err());
    // Renewed while running: live, and renewed more than one time to
    // live (3 s) after it was taken.
    poll_until(
        LIMIT,
        || format!("not renewed: {:?}", db.with(|s| s.leases())),
        || {
            let l = db.with(|s| s.leases()).unwrap_or_default();
            l.first().is_some_and(|l| {
                l.live && l.owner == "gw-1" && l.renewed_unix_ms - l.acquired_unix_ms > 3000
            })
        },
    );
    g.signal("-TERM");
    assert_eq!(g.wait(), 0, "{}", g.stderr());
    let l = PgStore::connect_read_only(&admin_url)
        .expect("connect")
        .leases()
        .expect("leases");
    assert!(!l[0].live, "not released on a clean stop: {l:?}");
    let out = std::fs::read_to_string(&g.out).unwrap_or_default();
    let err = g.stderr();
    assert!(
        !out.contains(secret) && !err.contains(secret),
        "{out}\n{err}"
    );
    assert!(err.contains("postgres://fringe@127.0.0.1:"), "{err}");
    // A server that is away: the message names it, without the password.
    let bad = url.replace(&format!(":{}/", pg.port), ":1/");
    let site2 = site(
        dir.path(),
        "gw-2",
        &bad,
        3.0,
        &[format!("sim:{}", file.display())],
    );
    let o = run(
        &mut fringe(&["gateway", "--config", site2.to_str().unwrap()]),
        LIMIT,
    );
    assert_ne!(o.code, 0);
    assert!(
        !o.stdout.contains(secret) && !o.stderr.contains(secret),
        "{}",
        o.stderr
    );
    assert!(
        o.stderr.contains("postgres://fringe@127.0.0.1:1/fringe"),
        "{}",
        o.stderr
    );
}
