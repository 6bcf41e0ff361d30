//! `cargo xtask bench-gateway [N ...] [--seconds S] [--pty]`: what
//! `fringe gateway` costs per device at one reading a second (a benchmark,
//! not a test; Linux, figures in BENCHMARKS.md).
//!
//! For each device count N (default 10, 100, 247; above 247 the devices are
//! split over several gateway processes, since a site serves at most 247,
//! one Modbus unit id each, and the figures are their sums): a site of N in-process simulated devices
//! (the demo's meal-bin scenario with numbered serials), a SQLite store,
//! Modbus TCP and the live page on free localhost ports, drift checks every
//! 60 s as in the demo; the release `fringe gateway` runs for a warm-up of
//! 20 s (handshakes, the first batches) and then S seconds (default 60)
//! over which its CPU time (user + system, /proc/PID/stat) and resident
//! memory (VmRSS, VmHWM) are read. Then the same N simulated devices alone
//! (`fringe-sim`'s `sims_alone` example, pumped every 10 ms as the
//! in-process port pumps them) give what the simulation itself costs, and
//! the difference is the gateway's.
//!
//! With `--pty` the devices are N `fringe sim` processes on
//! pseudo-terminals instead, as serial ports are on a plant: the gateway's
//! process then holds no simulation, and its CPU and memory are its own.

use anyhow::{bail, Context, Result};
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

const WARMUP: Duration = Duration::from_secs(20);

/// Devices one site file (one gateway process) serves at most.
const MAX_PER_SITE: usize = 247;

fn target_dir(root: &Path) -> PathBuf {
    std::env::var_os("CARGO_TARGET_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|| root.join("target"))
}

/// User + system CPU seconds of process `pid`.
fn cpu_s(pid: u32) -> Result<f64> {
    let stat = std::fs::read_to_string(format!("/proc/{pid}/stat"))?;
    let rest = &stat[stat.rfind(')').context("stat format")? + 2..];
    let f: Vec<&str> = rest.split_whitespace().collect();
    let ticks: f64 = f[11].parse::<f64>()? + f[12].parse::<f64>()?;
    Ok(ticks / 100.0) // USER_HZ
}

fn status_kb(pid: u32, field: &str) -> u64 {
    std::fs::read_to_string(format!("/proc/{pid}/status"))
        .unwrap_or_default()
        .lines()
        .find_map(|l| l.strip_prefix(field))
        .and_then(|v| v.trim().trim_end_matches("kB").trim().parse().ok())
        .unwrap_or(0)
}

fn free_port() -> Result<u16> {
    Ok(std::net::TcpListener::bind("127.0.0.1:0")?
        .local_addr()?
        .port())
}

struct Figures {
    n: usize,
    cpu_share: f64,
    rss_mb: f64,
    hwm_mb: f64,
    committed: u64,
    sims_share: f64,
    sims_rss_mb: f64,
    /// Open file descriptors of the gateway process that has most, and
    /// the least soft limit of the processes, at the end of the
    /// measurement.
    fds: usize,
    fd_limit: u64,
}

/// Open file descriptors of process `pid` (entries of `/proc/PID/fd`).
fn open_fds(pid: u32) -> usize {
    std::fs::read_dir(format!("/proc/{pid}/fd")).map_or(0, |d| d.count())
}

/// The soft limit on open files of process `pid` (`/proc/PID/limits`).
fn fd_limit(pid: u32) -> u64 {
    std::fs::read_to_string(format!("/proc/{pid}/limits"))
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("Max open files"))
                .and_then(|l| l.split_whitespace().nth(3))
                .and_then(|v| v.parse().ok())
        })
        .unwrap_or(0)
}

/// `fringe sim` processes, killed when dropped.
struct Sims(Vec<std::process::Child>);

impl Drop for Sims {
    fn drop(&mut self) {
        for c in &mut self.0 {
            let _ = c.kill();
            let _ = c.wait();
        }
    }
}

fn one(
    root: &Path,
    fringe: &Path,
    sims_alone: &Path,
    n: usize,
    seconds: u64,
    pty: bool,
) -> Result<Figures> {
    let dir = std::env::temp_dir().join(format!("fringe-bench-gateway-{}-{n}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(dir.join("scenarios"))?;
    let base = std::fs::read_to_string(root.join("host/sites/scenarios/bfm-meal-bin.toml"))?;
    // One site (one gateway process) per 247 devices: a site serves at
    // most 247, one Modbus unit id each.
    let gateways = n.div_ceil(MAX_PER_SITE);
    let mut sites = Vec::new();
    for g in 0..gateways {
        sites.push(format!(
            "name = \"gateway benchmark, {n} devices, gateway {g}\"\nstore = \"bench{g}.db\"\n\
             stale_after_s = 10\ndrift_every_s = 60\nstatus_every_s = 60\n\n[modbus]\n\
             listen = \"127.0.0.1:{}\"\n\n[web]\nlisten = \"127.0.0.1:{}\"\n",
            free_port()?,
            free_port()?
        ));
    }
    let mut sims = Sims(Vec::new());
    for i in 0..n {
        let sc = base
            .replace(
                "serial = \"BFM-MB-0103\"",
                &format!("serial = \"BENCH-{i:04}\""),
            )
            .replace("seed = 103", &format!("seed = {}", 1000 + i));
        let file = dir.join(format!("scenarios/d{i:04}.toml"));
        std::fs::write(&file, sc)?;
        let port = if pty {
            let link = dir.join(format!("d{i:04}.pty"));
            sims.0.push(
                Command::new(fringe)
                    .arg("sim")
                    .arg("--scenario")
                    .arg(&file)
                    .arg("--link")
                    .arg(&link)
                    .stdout(Stdio::null())
                    .stderr(Stdio::null())
                    .spawn()
                    .context("starting fringe sim")?,
            );
            link.display().to_string()
        } else {
            format!("sim:scenarios/d{i:04}.toml")
        };
        sites[i / MAX_PER_SITE].push_str(&format!(
            "\n[[device]]\nunit = {}\nport = \"{port}\"\ntag = \"bench {i}\"\n",
            i % MAX_PER_SITE + 1
        ));
    }
    if pty {
        let t = Instant::now();
        while (0..n).any(|i| !dir.join(format!("d{i:04}.pty")).exists()) {
            if t.elapsed() > Duration::from_secs(60) {
                bail!("the simulated devices did not all start within 60 s");
            }
            std::thread::sleep(Duration::from_millis(100));
        }
    }
    for (g, site) in sites.iter().enumerate() {
        std::fs::write(dir.join(format!("site{g}.toml")), site)?;
    }

    let total = WARMUP + Duration::from_secs(seconds) + Duration::from_secs(2);
    let mut children = Vec::new();
    for g in 0..gateways {
        let mut child = Command::new(fringe)
            .arg("gateway")
            .arg("--config")
            .arg(dir.join(format!("site{g}.toml")))
            .arg("--json")
            .arg("--duration-s")
            .arg(total.as_secs().to_string())
            .stdout(Stdio::piped())
            .stderr(Stdio::null())
            .spawn()
            .context("starting fringe gateway")?;
        let stdout = child.stdout.take().context("stdout")?;
        let reader = std::thread::spawn(move || {
            let mut s = String::new();
            let _ = std::io::Read::read_to_string(&mut std::io::BufReader::new(stdout), &mut s);
            s
        });
        children.push((child, reader));
    }
    let pids: Vec<u32> = children.iter().map(|(c, _)| c.id()).collect();
    let cpu_all = |pids: &[u32]| -> Result<f64> { pids.iter().map(|p| cpu_s(*p)).sum() };
    let t0 = Instant::now();
    std::thread::sleep(WARMUP);
    let c0 = cpu_all(&pids)?;
    let w0 = Instant::now();
    std::thread::sleep(Duration::from_secs(seconds));
    let c1 = cpu_all(&pids)?;
    let elapsed = w0.elapsed().as_secs_f64();
    let rss: u64 = pids.iter().map(|p| status_kb(*p, "VmRSS:")).sum();
    let hwm: u64 = pids.iter().map(|p| status_kb(*p, "VmHWM:")).sum();
    let fds: usize = pids.iter().map(|p| open_fds(*p)).max().unwrap_or(0);
    let limit = pids.iter().map(|p| fd_limit(*p)).min().unwrap_or(0);
    let mut committed = 0;
    for (mut child, reader) in children {
        let status = child.wait()?;
        let out = reader.join().unwrap_or_default();
        if !status.success() {
            bail!(
                "fringe gateway with {n} devices failed ({status}) after {:?}",
                t0.elapsed()
            );
        }
        committed += out
            .lines()
            .filter_map(|l| serde_json::from_str::<serde_json::Value>(l).ok())
            .find(|v| v["type"] == "summary")
            .and_then(|v| v["committed"].as_u64())
            .unwrap_or(0);
    }

    drop(sims);
    if pty {
        let _ = std::fs::remove_dir_all(&dir);
        return Ok(Figures {
            n,
            cpu_share: (c1 - c0) / elapsed,
            rss_mb: rss as f64 / 1024.0,
            hwm_mb: hwm as f64 / 1024.0,
            committed,
            sims_share: 0.0,
            sims_rss_mb: 0.0,
            fds,
            fd_limit: limit,
        });
    }
    let o = Command::new(sims_alone)
        .arg(dir.join("scenarios/d0000.toml"))
        .arg(n.to_string())
        .arg(seconds.to_string())
        .output()
        .context("starting sims_alone")?;
    if !o.status.success() {
        bail!("sims_alone: {}", String::from_utf8_lossy(&o.stderr));
    }
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).context("sims_alone JSON")?;
    let _ = std::fs::remove_dir_all(&dir);
    Ok(Figures {
        n,
        cpu_share: (c1 - c0) / elapsed,
        rss_mb: rss as f64 / 1024.0,
        hwm_mb: hwm as f64 / 1024.0,
        committed,
        sims_share: v["cpu_share"].as_f64().unwrap_or(f64::NAN),
        sims_rss_mb: v["rss_end_kb"].as_f64().unwrap_or(f64::NAN) / 1024.0,
        fds,
        fd_limit: limit,
    })
}

/// Runs the benchmark; `args` are device counts and `--seconds S`.
pub fn run(root: &Path, args: &[String]) -> Result<()> {
    let mut counts = Vec::new();
    let mut seconds = 60;
    let mut pty = false;
    let mut it = args.iter();
    while let Some(a) = it.next() {
        if a == "--pty" {
            pty = true;
        } else if a == "--seconds" {
            seconds = it
                .next()
                .and_then(|s| s.parse().ok())
                .context("--seconds needs a number")?;
        } else {
            let n: usize = a
                .parse()
                .with_context(|| format!("not a device count: {a}"))?;
            if n == 0 {
                bail!("0 devices: give 1 or more");
            }
            counts.push(n);
        }
    }
    if counts.is_empty() {
        counts = vec![10, 100, 247];
    }
    crate::run(crate::cargo().args([
        "build",
        "--release",
        "-p",
        "fringe-host",
        "--bin",
        "fringe",
    ]))?;
    crate::run(crate::cargo().args([
        "build",
        "--release",
        "-p",
        "fringe-sim",
        "--example",
        "sims_alone",
    ]))?;
    let t = target_dir(root).join("release");
    let mut rows = Vec::new();
    for n in counts {
        let how = if pty {
            "fringe sim processes on ptys"
        } else {
            "in-process simulated devices"
        };
        eprintln!("xtask: gateway with {n} {how}, {WARMUP:?} warm-up + {seconds} s");
        rows.push(one(
            root,
            &t.join("fringe"),
            &t.join("examples/sims_alone"),
            n,
            seconds,
            pty,
        )?);
    }
    println!("| devices | gateway process CPU (cores) | of which the simulated devices | gateway alone per device | RSS / peak (MB) | simulated devices' RSS (MB) | readings committed | open files (the gateway process with most) / soft limit |");
    println!("|---:|---:|---:|---:|---:|---:|---:|---:|");
    for f in rows {
        let own = f.cpu_share - f.sims_share;
        println!(
            "| {} | {:.3} | {:.3} | {:.2} ms/s ({:.4} cores) | {:.1} / {:.1} | {:.1} | {} | {} / {} |",
            f.n,
            f.cpu_share,
            f.sims_share,
            own / f.n as f64 * 1000.0,
            own / f.n as f64,
            f.rss_mb,
            f.hwm_mb,
            f.sims_rss_mb,
            f.committed,
            f.fds,
            f.fd_limit
        );
    }
    Ok(())
}
