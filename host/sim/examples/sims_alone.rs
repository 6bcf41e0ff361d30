//! What N in-process simulated devices cost on their own (a benchmark, not
//! a test), so that a gateway's figures with `sim:` devices can be read
//! without them: `cargo run --release -p fringe-sim --example sims_alone --
//! SCENARIO N SECONDS`.
//!
//! Boots N devices of SCENARIO (serials numbered) and pumps each every
//! [`fringe_sim::live::POLL_EVERY`] (10 ms), as the in-process port does
//! while a gateway's session waits for bytes, for SECONDS; prints one JSON
//! line: the process's CPU seconds (user + system, from
//! /proc/self/stat) and resident memory (VmRSS, VmHWM from
//! /proc/self/status) before and after. Linux only.

use std::time::{Duration, Instant};

use fringe_sim::live::LiveSim;
use fringe_sim::scenario::Scenario;

/// User + system CPU seconds of this process.
fn cpu_s() -> f64 {
    let stat = std::fs::read_to_string("/proc/self/stat").expect("/proc/self/stat");
    // Fields after the command name in parentheses: utime is 14th, stime 15th overall.
    let rest = &stat[stat.rfind(')').expect("stat format") + 2..];
    let f: Vec<&str> = rest.split_whitespace().collect();
    let ticks: f64 = f[11].parse::<f64>().expect("utime") + f[12].parse::<f64>().expect("stime");
    ticks / 100.0 // USER_HZ is 100 on Linux
}

/// A field of /proc/self/status in kB.
fn status_kb(field: &str) -> u64 {
    std::fs::read_to_string("/proc/self/status")
        .expect("/proc/self/status")
        .lines()
        .find_map(|l| l.strip_prefix(field))
        .and_then(|v| v.trim().trim_end_matches("kB").trim().parse().ok())
        .unwrap_or(0)
}

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let path = args.first().expect("usage: sims_alone SCENARIO N SECONDS");
    let n: usize = args.get(1).and_then(|a| a.parse().ok()).unwrap_or(10);
    let seconds: u64 = args.get(2).and_then(|a| a.parse().ok()).unwrap_or(60);
    let base = Scenario::load(std::path::Path::new(path)).unwrap_or_else(|e| panic!("{e}"));
    let rss0 = status_kb("VmRSS:");
    let wall = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .expect("clock")
        .as_millis() as u64;
    let sims: Vec<LiveSim> = (0..n)
        .map(|i| {
            let mut s = base.clone();
            s.device.serial = format!("{}-{i:04}", s.device.serial);
            s.device.seed = s.device.seed.wrapping_add(i as u64);
            LiveSim::start(&s, wall).unwrap_or_else(|e| panic!("boot {i}: {e}"))
        })
        .collect();
    let rss_booted = status_kb("VmRSS:");
    let cpu0 = cpu_s();
    let t0 = Instant::now();
    let mut next = t0;
    while t0.elapsed() < Duration::from_secs(seconds) {
        for s in &sims {
            s.run_alone();
        }
        next += fringe_sim::live::POLL_EVERY;
        if let Some(d) = next.checked_duration_since(Instant::now()) {
            std::thread::sleep(d);
        }
    }
    let cpu = cpu_s() - cpu0;
    let elapsed = t0.elapsed().as_secs_f64();
    println!(
        "{{\"devices\": {n}, \"seconds\": {elapsed:.1}, \"cpu_s\": {cpu:.2}, \"cpu_share\": {:.4}, \"rss_before_kb\": {rss0}, \"rss_booted_kb\": {rss_booted}, \"rss_end_kb\": {}, \"hwm_kb\": {}}}",
        cpu / elapsed,
        status_kb("VmRSS:"),
        status_kb("VmHWM:")
    );
}
