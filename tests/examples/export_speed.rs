//! Export benchmark: how long `fringe export`'s library part takes to write
//! N readings of one device as CSV and as JSON Lines to a file, from a
//! SQLite store built here (a benchmark, not a test).
//!
//! Run: `cargo run --release -p fringe-tests --example export_speed`.
//! Environment: `FRINGE_BENCH_N` (readings, default 300000).
//!
//! Cases: the whole history, and a range holding 1 % of it (the store has
//! no index by wall-clock time: the range is applied while every reading
//! is read).

use std::time::Instant;

use fringe_protocol::{CalId, ChannelValue, Flags, Reading, Seq};
use fringe_quality::export::{export, Format, Kind, Selection};
use fringe_store::{Source, BATCH_MAX_LEN};

const T0: u64 = 1_780_000_000_000;

fn reading(counter: u32) -> Reading {
    // Plausible varying values, one reading a second.
    let x = counter as f32;
    let ch = |k: f32| ChannelValue {
        g_s: 1.2e-6 * k + x * 1e-12,
        b_s: 2.1e-4 * k + x * 1e-11,
        eps_re: 6.5 + k + (x * 0.001).sin(),
        eps_im: 0.8 + 0.1 * (x * 0.002).cos(),
    };
    Reading {
        seq: Seq { boot: 1, counter },
        time_ms: T0 + u64::from(counter) * 1000,
        channels: [ch(1.0), ch(2.0)],
        temperature_c: 21.0 + (x * 0.0005).sin(),
        moisture_pct: Some(14.0 + (x * 0.001).sin()),
        uncertainty_pct: 0.31,
        flags: Flags::empty(),
        cell_cal: CalId([1, 2, 3, 4]),
        product_cal: CalId([5, 6, 7, 8]),
    }
}

fn main() {
    let n: u32 = std::env::var("FRINGE_BENCH_N")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(300_000);
    let dir = tempfile::tempdir().expect("temp dir");
    let db = dir.path().join("export.db");
    let mut store = fringe_sqlite::Store::open(&db).expect("store");
    let t = Instant::now();
    let all: Vec<Reading> = (0..n).map(reading).collect();
    for chunk in all.chunks(BATCH_MAX_LEN) {
        store
            .insert_readings("EXP-0001", chunk, Source::Stream)
            .expect("insert");
    }
    drop(all);
    println!("built {n} readings in {:.1} s", t.elapsed().as_secs_f64());
    let from = T0 as i64 + i64::from(n / 2) * 1000;
    let ranges = [
        ("whole history", Selection::default()),
        (
            "1 % of it",
            Selection {
                serials: Vec::new(),
                from_ms: Some(from),
                to_ms: Some(from + i64::from(n / 100) * 1000 - 1),
            },
        ),
    ];
    for (what, sel) in &ranges {
        for (name, format) in [("csv", Format::Csv), ("jsonl", Format::Jsonl)] {
            let out = dir.path().join(format!("out.{name}"));
            let file = std::fs::File::create(&out).expect("out file");
            let mut w = std::io::BufWriter::new(file);
            let t = Instant::now();
            let s = export(
                &store,
                "export.db",
                Kind::Readings,
                sel,
                format,
                &mut w,
                &mut |_| {},
            )
            .expect("export");
            drop(w);
            let secs = t.elapsed().as_secs_f64();
            let bytes = std::fs::metadata(&out).expect("size").len();
            println!(
                "{what}, {name}: {} rows in {secs:.2} s ({:.0} rows/s), {:.1} bytes/row",
                s.rows,
                s.rows as f64 / secs,
                bytes as f64 / s.rows.max(1) as f64
            );
        }
    }
}
