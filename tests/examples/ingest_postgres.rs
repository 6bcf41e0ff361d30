//! Ingest benchmark, PostgreSQL beside SQLite: readings per second and
//! bytes per reading through the store traits, every reading hashed into
//! the chain, on a throwaway PostgreSQL server of Debian's binaries
//! started here with its default durability (`fsync = on`,
//! `synchronous_commit = on`; [`fringe_tests::servers::Postgres::start_durable`]).
//!
//! Run: `cargo run --release -p fringe-tests --example ingest_postgres`.
//! Environment: `FRINGE_BENCH_N` (readings per case, default 300000).
//!
//! Cases (each on a fresh database or file):
//! - SQLite, one device, 1000 readings per transaction (`BATCH_MAX_LEN`,
//!   as `fringe monitor` commits at most);
//! - PostgreSQL, the same;
//! - PostgreSQL, one device, 5000 readings per transaction;
//! - PostgreSQL, 20 devices in turn, 50 readings per transaction (a
//!   gateway's many small batches).
//!
//! Bytes per reading: SQLite's file and WAL after a checkpoint; on
//! PostgreSQL the readings table with its partitions, indexes and TOAST
//! (`pg_total_relation_size`) and, separately, the growth of the whole
//! database (`pg_database_size`, which also counts the catalog of the new
//! partitions).

use std::time::Instant;

use fringe_protocol::{CalId, ChannelValue, Flags, Reading, Seq};
use fringe_store::{RecordLog, Source, BATCH_MAX_LEN};
use fringe_tests::servers::Postgres;

fn reading(boot: u32, counter: u32) -> Reading {
    // Plausible varying values (as in host/benches/ingest.rs), one every
    // 30 s of device time, so that a run spans several monthly partitions.
    let x = counter as f32;
    Reading {
        seq: Seq { boot, counter },
        time_ms: 1_780_000_000_000 + u64::from(counter) * 1000 * 30,
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

/// Stores `n` readings spread over `devices` devices in batches of `batch`,
/// devices in turn; the seconds it took.
fn ingest(
    store: &mut dyn RecordLog,
    n: u32,
    devices: u32,
    batch: u32,
) -> Result<f64, Box<dyn std::error::Error>> {
    let per_device = n / devices;
    let serials: Vec<String> = (0..devices).map(|d| format!("HGM-B{d:03}")).collect();
    let t0 = Instant::now();
    let mut next = 0u32;
    while next < per_device {
        let end = (next + batch).min(per_device);
        let rs: Vec<Reading> = (next..end).map(|c| reading(1, c)).collect();
        for s in &serials {
            let st = store.insert_readings(s, &rs, Source::Stream)?;
            assert_eq!(st.inserted, rs.len() as u64, "{s}: {st:?}");
        }
        next = end;
    }
    Ok(t0.elapsed().as_secs_f64())
}

fn line(case: &str, n: u32, secs: f64, bytes: &str) {
    println!(
        "| {case} | {n} in {secs:.2} s | {:.0} | {bytes} |",
        f64::from(n) / secs
    );
}

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let n: u32 = std::env::var("FRINGE_BENCH_N")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(300_000);
    println!("| case | readings | readings/s | bytes/reading |");
    println!("| --- | --- | --- | --- |");

    // SQLite beside it, on the disk of the target folder.
    let target = std::env::var("CARGO_TARGET_DIR")
        .unwrap_or_else(|_| concat!(env!("CARGO_MANIFEST_DIR"), "/../target").to_string());
    std::fs::create_dir_all(&target)?;
    let dir = tempfile::tempdir_in(&target)?;
    let path = dir.path().join("bench.db");
    {
        let mut lite = fringe_sqlite::Store::open(&path)?;
        let secs = ingest(&mut lite, n, 1, BATCH_MAX_LEN as u32)?;
        lite.connection()
            .execute_batch("PRAGMA wal_checkpoint(TRUNCATE)")?;
        let size = std::fs::metadata(&path)?.len()
            + std::fs::metadata(fringe_sqlite::wal_path(&path)).map_or(0, |m| m.len());
        line(
            "SQLite, 1 device, 1000 per transaction",
            n,
            secs,
            &format!("{:.1} (file)", size as f64 / f64::from(n)),
        );
    }

    let pg = Postgres::start_durable();
    let mut admin = postgres::Client::connect(&pg.url(), postgres::NoTls)?;
    let cases: [(&str, u32, u32); 3] = [
        ("PostgreSQL, 1 device, 1000 per transaction", 1, 1000),
        ("PostgreSQL, 1 device, 5000 per transaction", 1, 5000),
        ("PostgreSQL, 20 devices, 50 per transaction", 20, 50),
    ];
    for (i, (case, devices, batch)) in cases.into_iter().enumerate() {
        let db = format!("bench{i}");
        admin.batch_execute(&format!("CREATE DATABASE {db}"))?;
        let url = format!("postgres://fringe@127.0.0.1:{}/{db}", pg.port);
        let mut store = fringe_postgres::Store::connect(&url)?;
        let size = |c: &mut postgres::Client| -> Result<i64, postgres::Error> {
            c.query_one("SELECT pg_database_size($1)", &[&db])
                .map(|r| r.get(0))
        };
        let before = size(&mut admin)?;
        let secs = ingest(&mut store, n, devices, batch)?;
        let readings_bytes = store
            .table_sizes()?
            .into_iter()
            .find(|(t, _)| t == "readings")
            .map_or(0, |(_, b)| b);
        let grown = size(&mut admin)? - before;
        line(
            case,
            n,
            secs,
            &format!(
                "{:.1} (readings table), {:.1} (database growth)",
                readings_bytes as f64 / f64::from(n),
                grown as f64 / f64::from(n)
            ),
        );
    }
    Ok(())
}
