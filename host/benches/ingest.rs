//! Ingest benchmark: readings per second into the store, batched as
//! `fringe monitor` batches them versus one transaction per reading, and the
//! bytes on disk per reading.
//!
//! Run: `cargo bench -p fringe-host --bench ingest` (release profile). The
//! database lives in a temporary folder under the target directory, on the
//! same disk as a real database would be (WAL, `synchronous = FULL`).
//! Environment: `FRINGE_BENCH_N` (batched readings, default 300000),
//! `FRINGE_BENCH_SINGLE` (single-transaction readings, default 2000).
//! It also times what opening costs: SQLite's `quick_check` (every command
//! that reads a database), its `integrity_check` and the hash chain's
//! verification (`audit verify` and `audit export`).

use std::time::Instant;

use fringe_host::store::{Source, Store, BATCH_MAX_LEN};
use fringe_protocol::{CalId, ChannelValue, Flags, Reading, Seq};

fn reading(counter: u32) -> Reading {
    // Plausible varying values so SQLite's record encoding is not flattered.
    let x = counter as f32;
    Reading {
        seq: Seq { boot: 7, counter },
        time_ms: 1_780_000_000_000 + u64::from(counter) * 1000,
        channels: [
            ChannelValue {
                g_s: 1.2e-6 + x * 1e-12,
                b_s: 2.1e-4 + x * 1e-11,
                eps_re: 6.5 + (x * 0.01).sin(),
                eps_im: 0.8 + (x * 0.013).cos() * 0.1,
            },
            ChannelValue {
                g_s: 3.3e-6 + x * 1e-12,
                b_s: 4.0e-3 + x * 1e-10,
                eps_re: 5.9 + (x * 0.011).sin(),
                eps_im: 0.3 + (x * 0.017).cos() * 0.05,
            },
        ],
        temperature_c: 24.0 + (x * 0.001).sin(),
        moisture_pct: Some(14.0 + (x * 0.003).sin()),
        uncertainty_pct: 0.35 + (x * 0.002).cos() * 0.02,
        flags: Flags::empty(),
        cell_cal: CalId([0x8a, 0x11, 0x02, 0xfe]),
        product_cal: CalId([0x3c, 0x40, 0x99, 0x01]),
    }
}

fn env_n(name: &str, default: u32) -> u32 {
    std::env::var(name)
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(default)
}

fn db_size(path: &std::path::Path) -> u64 {
    let wal = path.with_extension("db-wal");
    std::fs::metadata(path).map_or(0, |m| m.len()) + std::fs::metadata(wal).map_or(0, |m| m.len())
}

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let n_batched = env_n("FRINGE_BENCH_N", 300_000);
    let n_single = env_n("FRINGE_BENCH_SINGLE", 2_000);
    let target = std::env::var("CARGO_TARGET_DIR")
        .unwrap_or_else(|_| concat!(env!("CARGO_MANIFEST_DIR"), "/../target").to_string());
    std::fs::create_dir_all(&target)?;
    let dir = tempfile::tempdir_in(&target)?;
    let serial = "HGM-L2-0001";

    // Batched, as the monitor commits (at most BATCH_MAX_LEN per transaction).
    let path = dir.path().join("batched.db");
    let mut store = Store::open(&path)?;
    let empty = {
        store
            .connection()
            .execute_batch("PRAGMA wal_checkpoint(TRUNCATE)")?;
        db_size(&path)
    };
    let all: Vec<Reading> = (0..n_batched).map(reading).collect();
    let t0 = Instant::now();
    for chunk in all.chunks(BATCH_MAX_LEN) {
        store.insert_readings(serial, chunk, Source::Stream)?;
    }
    let batched_s = t0.elapsed().as_secs_f64();
    store
        .connection()
        .execute_batch("PRAGMA wal_checkpoint(TRUNCATE)")?;
    let bytes = db_size(&path) - empty;
    let t0 = Instant::now();
    let ok = store.verify_chain()?.ok();
    let chain_s = t0.elapsed().as_secs_f64();
    drop(store);
    // What a command pays for SQLite's own checks on open (read-only, as
    // `drift`, `report` and `cal history` open it; `audit` runs the full one).
    let t0 = Instant::now();
    let ro = Store::open_read_only(&path)?;
    ro.check_integrity(false)?;
    let quick_s = t0.elapsed().as_secs_f64();
    let t0 = Instant::now();
    ro.check_integrity(true)?;
    let full_s = t0.elapsed().as_secs_f64();
    drop(ro);

    // One transaction per reading.
    let path = dir.path().join("single.db");
    let mut store = Store::open(&path)?;
    let t0 = Instant::now();
    for r in all.iter().take(n_single as usize) {
        store.insert_readings(serial, std::slice::from_ref(r), Source::Stream)?;
    }
    let single_s = t0.elapsed().as_secs_f64();

    let batched_rate = f64::from(n_batched) / batched_s;
    let single_rate = f64::from(n_single) / single_s;
    println!("fringe-host ingest benchmark");
    println!(
        "  batched ({BATCH_MAX_LEN} per transaction): {n_batched} readings in {batched_s:.3} s = {batched_rate:.0} readings/s"
    );
    println!(
        "  one transaction per reading:         {n_single} readings in {single_s:.3} s = {single_rate:.0} readings/s"
    );
    println!(
        "  ratio batched / single: {:.0}",
        batched_rate / single_rate
    );
    println!(
        "  on disk: {bytes} bytes for {n_batched} readings = {:.1} bytes/reading (after a WAL checkpoint)",
        bytes as f64 / f64::from(n_batched)
    );
    println!("  chain verifies: {ok} ({chain_s:.3} s for {n_batched} readings)");
    println!(
        "  on open, {n_batched} readings: open + quick_check {quick_s:.3} s, integrity_check {full_s:.3} s"
    );
    Ok(())
}
