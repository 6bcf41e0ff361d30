//! Measurement (not a test): what the live drift check costs `fringe
//! monitor` and each device of `fringe gateway` on a large database
//! (`analysis::LiveData`: read once, then only what was added, keeping the
//! charts' state and not the readings), against `fringe drift`'s read of
//! the whole (`analysis::load`, every reading held).
//!
//! `cargo run --release -p fringe-host --example drift_refresh -- 200000`
//!
//! The readings are invented (one a second, an empty spell every minute, a
//! grab sample every 1000 readings).

use std::time::Instant;

use fringe_host::store::{DeviceInfo, Source, Store};
use fringe_protocol::{CalId, Flags, Reading, Seq};

/// The product calibration the readings carry.
const PRODUCT: [u8; 4] = [0x5e, 0xed, 0x00, 0x01];

fn reading(i: u32) -> Reading {
    let mut r = Reading {
        seq: Seq {
            boot: 1,
            counter: i,
        },
        time_ms: 1_796_104_800_000 + u64::from(i) * 1000,
        temperature_c: 20.0 + (i % 13) as f32 * 0.05,
        moisture_pct: Some(14.0),
        product_cal: CalId(PRODUCT),
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
    // Its record, with a calibrated range of 5..35 C (so that the
    // temperature chart runs).
    let cal = fringe_protocol::ProductCal {
        name: heapless::String::try_from("invented").expect("short"),
        model: fringe_protocol::ModelKind::SingleFrequency,
        basis: fringe_protocol::Basis::Wet,
        params: heapless::Vec::new(),
        moisture_pct: fringe_protocol::Range {
            min: 5.0,
            max: 30.0,
        },
        temperature_c: fringe_protocol::Range {
            min: 5.0,
            max: 35.0,
        },
        inputs: heapless::Vec::new(),
        sec_pct: 0.2,
        made_s: 0,
    };
    st.insert_calibration(
        "HGM-L2-9999",
        &fringe_host::store::NewCalibration {
            kind: fringe_host::store::CalKind::Product,
            cal_id: CalId(PRODUCT),
            slot: Some(0),
            name: None,
            body: serde_json::json!({
                "calibration": cal,
                "operator": "bench",
                "reason": "measurement",
                "old_id": "00000000",
                "new_id": CalId(PRODUCT).to_string(),
                "action": "push",
                "statistics": null,
                "verification": null,
            }),
            note: None,
            supersedes: None,
        },
    )?;
    // A grab sample every 1000 readings.
    for i in (500..n).step_by(1000) {
        st.insert_lab_sample(
            "HGM-L2-9999",
            &fringe_host::store::NewLabSample {
                sample_id: format!("G-{i}"),
                taken_unix_ms: reading(i).time_ms as i64,
                product: None,
                lab_moisture_pct: 14.0 + f64::from(i % 7) * 0.05,
                basis: "wet".into(),
                method: None,
                reading: Some(reading(i).seq),
                note: None,
                supersedes: None,
            },
        )?;
    }
    // The live check (`fringe monitor`, each device of `fringe gateway`):
    // the charts' state only.
    let rss0 = rss_kib();
    let t0 = Instant::now();
    let mut live = fringe_host::analysis::LiveData::load(&st, "HGM-L2-9999")?;
    let t_load = t0.elapsed();
    let t0 = Instant::now();
    let episodes = live.episodes();
    let t_episodes = t0.elapsed();
    let rss_live = rss_kib();
    println!(
        "live check, first read: {t_load:?}; its episodes: {t_episodes:?} ({}); process grew {} KiB",
        episodes.len(),
        rss_live.saturating_sub(rss0)
    );
    let more: Vec<Reading> = (n..n + 10).map(reading).collect();
    st.insert_readings("HGM-L2-9999", &more, Source::Stream)?;
    let t0 = Instant::now();
    live.refresh(&st)?;
    let t_refresh = t0.elapsed();
    let t0 = Instant::now();
    let episodes = live.episodes();
    println!(
        "live check, refreshed with 10 new readings: {t_refresh:?}; its episodes: {:?} ({} readings charted)",
        t0.elapsed(),
        live.readings()
    );
    drop(episodes);
    // `fringe drift`: every reading read and held, the traces for plots.
    let rss1 = rss_kib();
    let t0 = Instant::now();
    let d = fringe_host::analysis::load(&st, Some("HGM-L2-9999"))?;
    let t_load = t0.elapsed();
    let t0 = Instant::now();
    let traces = d.traces();
    println!(
        "read whole (fringe drift): {t_load:?}; the four monitors: {:?} ({} traces); process grew {} KiB",
        t0.elapsed(),
        traces.len(),
        rss_kib().saturating_sub(rss1)
    );
    println!(
        "held in memory by `fringe drift`: {} bytes a reading",
        std::mem::size_of::<fringe_host::analysis::Row>()
    );
    Ok(())
}

/// The process's resident set, KiB (Linux; 0 elsewhere).
fn rss_kib() -> u64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("VmRSS:"))
                .and_then(|l| l.split_whitespace().nth(1)?.parse().ok())
        })
        .unwrap_or(0)
}
