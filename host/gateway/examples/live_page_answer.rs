//! The size and time of the live page's answer on a full site (a
//! benchmark, not a test):
//! `cargo run --release -p fringe-gateway --example live_page_answer -- [UNITS]`.
//!
//! With `serve [UNITS] [SECONDS]` first: serves the page of that full site
//! on 127.0.0.1 (the address is printed), each device reading once a
//! second for SECONDS (default 60), for `tests/python/live_page_bench.py`,
//! which opens it in headless Chromium and prints how long the page took
//! to merge and draw each answer.
//!
//! UNITS devices (default 247, as many as Modbus unit ids allow), each
//! with a whole trend (`HISTORY_POINTS`, 4 h at one point per 10 s); then
//! 2 s of readings at one per second per device. Prints the bytes and
//! the time (median of 21) of `/api/site` whole, as every poll asked
//! before, and of the answer from the page's last mark, as it asks now.

use std::time::{Duration, Instant};

use fringe_gateway::live::{LiveTable, Since, HISTORY_POINTS};
use fringe_gateway::web::site_json_since;
use fringe_protocol::{Flags, Reading, Seq};

fn reading(counter: u32) -> Reading {
    Reading {
        seq: Seq { boot: 1, counter },
        time_ms: 1_796_083_200_000 + u64::from(counter) * 1000,
        temperature_c: 18.25,
        moisture_pct: Some(12.0 + (counter % 97) as f32 / 37.0),
        uncertainty_pct: 0.12 + (counter % 13) as f32 / 1000.0,
        flags: Flags::empty(),
        ..Reading::default()
    }
}

fn median_ms(f: &mut dyn FnMut() -> usize) -> (f64, usize) {
    let mut bytes = 0;
    let mut t: Vec<f64> = (0..21)
        .map(|_| {
            let t0 = Instant::now();
            bytes = f();
            t0.elapsed().as_secs_f64() * 1e3
        })
        .collect();
    t.sort_by(f64::total_cmp);
    (t[10], bytes)
}

/// A site of `units` devices with whole trends: one reading per second per
/// device for 4 h (a point every 10 s). Also returns the last counter.
fn full_site(units: u8) -> (LiveTable, u32) {
    let table = LiveTable::new(Duration::from_secs(60));
    for u in 1..=units {
        table.register(u, &format!("BENCH-{u:04}"));
    }
    let seconds = HISTORY_POINTS as u32 * 10;
    for c in 1..=seconds {
        for u in 1..=units {
            table.update(u, &reading(c), Instant::now());
        }
    }
    (table, seconds)
}

/// Serves the page of a full site, each device reading once a second.
fn serve(units: u8, seconds: u64) {
    let (table, mut c) = full_site(units);
    let table = std::sync::Arc::new(table);
    let web = fringe_gateway::web::WebServer::start(
        "127.0.0.1:0".parse().expect("address"),
        "Bench site",
        std::sync::Arc::clone(&table),
    )
    .expect("bind");
    println!("http://{}/", web.local_addr());
    let t0 = Instant::now();
    while t0.elapsed() < Duration::from_secs(seconds) {
        c += 1;
        // One reading in 101 flagged: drawn as a marked point.
        let mut r = reading(c);
        if c.is_multiple_of(101) {
            r.flags = Flags::OUT_OF_RANGE;
        }
        for u in 1..=units {
            table.update(u, &r, Instant::now());
        }
        std::thread::sleep(Duration::from_secs(1));
    }
    web.stop();
}

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let number = |k: usize, default: u64| -> u64 {
        args.get(k).and_then(|a| a.parse().ok()).unwrap_or(default)
    };
    if args.first().is_some_and(|a| a == "serve") {
        serve(number(1, 247).clamp(1, 247) as u8, number(2, 60));
        return;
    }
    let units = number(0, 247).clamp(1, 247) as u8;
    let (table, seconds) = full_site(units);
    let whole = site_json_since("Bench site", &table, Instant::now(), None);
    let since = Since {
        epoch: whole["epoch"].as_str().unwrap_or_default().to_string(),
        after: whole["mark"].as_u64().unwrap_or(0),
    };
    // The next 2 s, until the page's next poll.
    for c in seconds + 1..=seconds + 2 {
        for u in 1..=units {
            table.update(u, &reading(c), Instant::now());
        }
    }
    let (t_whole, b_whole) = median_ms(&mut || {
        site_json_since("Bench site", &table, Instant::now(), None)
            .to_string()
            .len()
    });
    let (t_delta, b_delta) = median_ms(&mut || {
        site_json_since("Bench site", &table, Instant::now(), Some(&since))
            .to_string()
            .len()
    });
    // Gzipped as the server sends it to a browser (fast level).
    let gz = |since: Option<&Since>| -> usize {
        use std::io::Write;
        let json = site_json_since("Bench site", &table, Instant::now(), since).to_string();
        let mut z = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::fast());
        z.write_all(json.as_bytes()).expect("gzip");
        z.finish().expect("gzip").len()
    };
    let (tz_whole, bz_whole) = median_ms(&mut || gz(None));
    let (tz_delta, bz_delta) = median_ms(&mut || gz(Some(&since)));
    println!(
        "| answer | bytes | time to build, median of 21 | gzipped bytes | time to build and gzip |"
    );
    println!("| --- | ---: | ---: | ---: | ---: |");
    println!("| every trend whole ({units} devices x {HISTORY_POINTS} points) | {b_whole} | {t_whole:.2} ms | {bz_whole} | {tz_whole:.2} ms |");
    println!("| from the page's last mark (2 s later) | {b_delta} | {t_delta:.3} ms | {bz_delta} | {tz_delta:.3} ms |");
}
