//! Serves the live page of a full site for a browser benchmark (not a
//! test): `cargo run --release -p fringe-gateway --example live_page_serve
//! -- [UNITS] [SECONDS]`.
//!
//! UNITS devices (default 247), each with a whole trend (4 h at one point
//! per 10 s), then one reading a second per device for SECONDS (default
//! 60) while the page is served on 127.0.0.1 (the address is printed).
//! `tests/python/live_page_bench.py` opens it in headless Chromium and
//! prints how long the page took to merge and draw each answer.

use std::sync::Arc;
use std::time::{Duration, Instant};

use fringe_gateway::live::{LiveTable, HISTORY_POINTS};
use fringe_gateway::web::WebServer;
use fringe_protocol::{Flags, Reading, Seq};

fn reading(counter: u32) -> Reading {
    Reading {
        seq: Seq { boot: 1, counter },
        time_ms: 1_796_083_200_000 + u64::from(counter) * 1000,
        temperature_c: 18.25,
        moisture_pct: Some(12.0 + (counter % 97) as f32 / 37.0),
        uncertainty_pct: 0.12 + (counter % 13) as f32 / 1000.0,
        flags: if counter.is_multiple_of(101) {
            Flags::OUT_OF_RANGE
        } else {
            Flags::empty()
        },
        ..Reading::default()
    }
}

fn main() {
    let args: Vec<u64> = std::env::args()
        .skip(1)
        .filter_map(|a| a.parse().ok())
        .collect();
    let units = args.first().copied().unwrap_or(247).clamp(1, 247) as u8;
    let seconds = args.get(1).copied().unwrap_or(60);
    let table = Arc::new(LiveTable::new(Duration::from_secs(60)));
    for u in 1..=units {
        table.register(u, &format!("BENCH-{u:04}"));
    }
    let full = HISTORY_POINTS as u32 * 10;
    for c in 1..=full {
        for u in 1..=units {
            table.update(u, &reading(c), Instant::now());
        }
    }
    let web = WebServer::start(
        "127.0.0.1:0".parse().expect("address"),
        "Bench site",
        Arc::clone(&table),
    )
    .expect("bind");
    println!("http://{}/", web.local_addr());
    let t0 = Instant::now();
    let mut c = full;
    while t0.elapsed() < Duration::from_secs(seconds) {
        c += 1;
        for u in 1..=units {
            table.update(u, &reading(c), Instant::now());
        }
        std::thread::sleep(Duration::from_secs(1));
    }
    web.stop();
}
