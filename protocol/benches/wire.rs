//! `cargo bench -p fringe-protocol`: a streamed `Reading` as a frame
//! (postcard + CRC-32 + COBS) beside the same reading as a serde_json line:
//! bytes per reading, encode and decode time per reading, and their ratios.
//! The figures go into BENCHMARKS.md.

use std::hint::black_box;
use std::path::PathBuf;
use std::time::Instant;

use criterion::Criterion;
use fringe_protocol::frame::encode;
use fringe_protocol::*;

/// A reading as the firmware streams it: full-precision measured values
/// (Harrowgate Mill, line 2 dryer outlet, invented for the benchmark).
fn reading() -> Reading {
    Reading {
        seq: Seq {
            boot: 17,
            counter: 86_391,
        },
        time_ms: 1_796_083_215_377,
        channels: [
            ChannelValue {
                g_s: 2.513_874e-6,
                b_s: 3.108_392_6e-4,
                eps_re: 14.253_107,
                eps_im: 2.749_316,
            },
            ChannelValue {
                g_s: 4.107_735e-5,
                b_s: 6.003_817_5e-3,
                eps_re: 11.498_023,
                eps_im: 0.874_561_3,
            },
        ],
        temperature_c: 38.247_21,
        moisture_pct: Some(14.618_43),
        uncertainty_pct: 0.412_67,
        flags: Flags::REFERENCE_DRIFT,
        cell_cal: CalId([0x1c, 0xa7, 0x40, 0x0e]),
        product_cal: CalId([0x9b, 0x03, 0x5d, 0x21]),
    }
}

fn json_line(r: &Reading, out: &mut Vec<u8>) {
    out.clear();
    serde_json::to_writer(&mut *out, r).expect("a reading serialises");
    out.push(b'\n');
}

fn out_dir() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../target/criterion")
}

fn mean_ns(id: &str) -> Option<f64> {
    let path = out_dir().join(id).join("new/estimates.json");
    let text = std::fs::read_to_string(path).ok()?;
    let v: serde_json::Value = serde_json::from_str(&text).ok()?;
    // The slope of the linear sampling fit where criterion has one, else the mean.
    v["slope"]["point_estimate"]
        .as_f64()
        .or_else(|| v["mean"]["point_estimate"].as_f64())
}

/// Paired ratio: times `slow` and `fast` in alternating batches and returns
/// the median, lowest and highest per-round ratio `slow / fast`. On a shared
/// machine the load drifts between criterion's separate runs; alternating
/// within one loop exposes both sides to the same load.
fn paired_ratio(mut slow: impl FnMut(), mut fast: impl FnMut()) -> (f64, f64, f64) {
    const ROUNDS: usize = 301;
    const BATCH: u32 = 500;
    let time = |f: &mut dyn FnMut()| {
        let t = Instant::now();
        for _ in 0..BATCH {
            f();
        }
        t.elapsed().as_secs_f64()
    };
    let mut ratios: Vec<f64> = (0..ROUNDS)
        .map(|_| {
            let s = time(&mut slow);
            let f = time(&mut fast);
            s / f
        })
        .collect();
    ratios.sort_by(f64::total_cmp);
    (ratios[ROUNDS / 2], ratios[0], ratios[ROUNDS - 1])
}

fn main() {
    let r = reading();
    let msg = DeviceFrame::Reading(r);
    let mut frame = [0u8; MAX_FRAME_LEN];
    let frame_len = encode(&msg, &mut frame).expect("a reading fits a frame");
    let frame = &frame[..frame_len];
    let mut line = Vec::new();
    json_line(&r, &mut line);

    // Both decode to the same reading (the frame's rounding aside).
    let mut dec = FrameDecoder::<DeviceFrame>::new();
    let back: Vec<_> = dec.push(frame).collect();
    assert_eq!(back, vec![Ok(DeviceFrame::Reading(r.on_wire()))]);
    let from_json: Reading = serde_json::from_slice(&line).expect("json decodes");
    assert_eq!(from_json, r);

    let mut c = Criterion::default()
        .output_directory(&out_dir())
        .configure_from_args();
    {
        let mut g = c.benchmark_group("reading");
        g.bench_function("encode/frame", |b| {
            let mut buf = [0u8; MAX_FRAME_LEN];
            b.iter(|| encode(black_box(&msg), &mut buf).unwrap())
        });
        g.bench_function("encode/json", |b| {
            let mut buf = Vec::with_capacity(512);
            b.iter(|| json_line(black_box(&r), &mut buf))
        });
        g.bench_function("decode/frame", |b| {
            let mut dec = FrameDecoder::<DeviceFrame>::new();
            b.iter(|| dec.push(black_box(frame)).next().unwrap().unwrap())
        });
        g.bench_function("decode/json", |b| {
            b.iter(|| serde_json::from_slice::<Reading>(black_box(&line)).unwrap())
        });
        g.finish();
    }
    c.final_summary();

    println!();
    println!("Reading, one per line or frame:");
    println!(
        "  bytes   frame {frame_len:>4}   json line {:>4}   json/frame {:.2}x",
        line.len(),
        line.len() as f64 / frame_len as f64
    );
    for op in ["encode", "decode"] {
        let f = mean_ns(&format!("reading/{op}_frame"));
        let j = mean_ns(&format!("reading/{op}_json"));
        match (f, j) {
            (Some(f), Some(j)) => println!(
                "  {op}  frame {f:>7.1} ns   json {j:>7.1} ns   json/frame {:.2}x",
                j / f
            ),
            _ => println!("  {op}: no estimates (benchmarks filtered out or --test run)"),
        }
    }
    if std::env::args().any(|a| a == "--test") {
        return;
    }
    let mut buf = [0u8; MAX_FRAME_LEN];
    let mut jbuf = Vec::with_capacity(512);
    let enc = paired_ratio(
        || json_line(black_box(&r), &mut jbuf),
        || {
            black_box(encode(black_box(&msg), &mut buf).unwrap());
        },
    );
    let mut dec = FrameDecoder::<DeviceFrame>::new();
    let decr = paired_ratio(
        || {
            black_box(serde_json::from_slice::<Reading>(black_box(&line)).unwrap());
        },
        || {
            black_box(dec.push(black_box(frame)).next().unwrap().unwrap());
        },
    );
    println!("paired (alternating batches, median of 301 rounds of 500 [lowest, highest]):");
    println!(
        "  encode json/frame {:.2}x [{:.2}, {:.2}]",
        enc.0, enc.1, enc.2
    );
    println!(
        "  decode json/frame {:.2}x [{:.2}, {:.2}]",
        decr.0, decr.1, decr.2
    );
}
