//! Measurement (not a test): what the drift check costs `fringe monitor`
//! on a large database, read whole (`analysis::load`, as `fringe drift`
//! does) against refreshed (`LineData::refresh`, as the monitor does after
//! its first check).
//!
//! `cargo run --release -p fringe-host --example drift_refresh -- 200000`
//!
//! The readings are invented (one a second, an empty spell every minute).

use std::time::Instant;

use fringe_host::store::{DeviceInfo, Source, Store};
use fringe_protocol::{Flags, Reading, Seq};

fn reading(i: u32) -> Reading {
    let mut r = Reading {
        seq: Seq {
            boot: 1,
            counter: i,
        },
        time_ms: 1_796_104_800_000 + u64::from(i) * 1000,
        temperature_c: 20.0,
        moisture_pct: Some(14.0),
        ..Reading::default()
    };
    r.channels[1].eps_re = 1.02;
    if i % 60 > 55 {
        r.flags = Flags::NO_PRODUCT;
    }
    r
}

fn main() -> anyhow::Result<()> {
    let n: u32 = match std::env::args().nth(1) {
        Some(s) => s.parse()?,
        None => 200_000,
    };
    let dir = tempfile::tempdir()?;
    let mut st = Store::open(dir.path().join("big.db"))?;
    st.ensure_device(&DeviceInfo {
        serial: "HGM-L2-9999".into(),
        ..Default::default()
    })?;
    let t0 = Instant::now();
    let all: Vec<Reading> = (0..n).map(reading).collect();
    for chunk in all.chunks(5000) {
        st.insert_readings("HGM-L2-9999", chunk, Source::Stream)?;
    }
    println!("stored {n} readings in {:?}", t0.elapsed());
    let t0 = Instant::now();
    let mut d = fringe_host::analysis::load(&st, Some("HGM-L2-9999"))?;
    let t_load = t0.elapsed();
    let t0 = Instant::now();
    let traces = d.traces();
    println!(
        "read whole: {t_load:?}; the four monitors: {:?} ({} traces)",
        t0.elapsed(),
        traces.len()
    );
    let more: Vec<Reading> = (n..n + 10).map(reading).collect();
    st.insert_readings("HGM-L2-9999", &more, Source::Stream)?;
    let t0 = Instant::now();
    d.refresh(&st)?;
    let t_refresh = t0.elapsed();
    let t0 = Instant::now();
    let traces = d.traces();
    println!(
        "refreshed with 10 new readings: {t_refresh:?}; the four monitors: {:?} ({} rows, {} traces)",
        t0.elapsed(),
        d.rows.len(),
        traces.len()
    );
    println!(
        "held in memory: {} bytes a reading",
        std::mem::size_of::<fringe_host::analysis::Row>()
    );
    Ok(())
}
