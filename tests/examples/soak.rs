//! The long soak of the line (issue 17; a measurement, not a test): see
//! `fringe_tests::soak`. Run it with `cargo xtask soak` (which builds a
//! release `fringe` first and passes it as `FRINGE_BIN`), e.g.
//!
//! ```text
//! cargo xtask soak --readings 1000000 --kills 100 --devices 1 --scale 50
//! ```
//!
//! Flags (defaults in brackets): `--readings N` per device [1000000],
//! `--kills K` SIGKILLs of each device's monitor [100], `--devices D` [1],
//! `--error-rate E` byte error rate of the line [0.001], `--scale S`
//! device seconds per wall second [50], `--disconnect-every S` device
//! seconds between 1 s disconnects [600], `--seed N` [FRINGE_SEED or 1],
//! `--gateway`: all devices through one `fringe gateway`, which is killed,
//! rather than a `fringe monitor` per device.
//! Prints one JSON line per device and a closing line; exits non-zero (a
//! panic naming the device and seed) on the first reading lost,
//! duplicated or changed.

use fringe_tests::soak::{soak, SoakOptions};

fn main() {
    let mut o = SoakOptions {
        readings: 1_000_000,
        kills: 100,
        devices: 1,
        byte_error_rate: 1e-3,
        time_scale: 50.0,
        disconnect_every_s: 600.0,
        seed: fringe_tests::seed(1),
        gateway: false,
    };
    let args: Vec<String> = std::env::args().skip(1).collect();
    let mut it = args.iter();
    while let Some(flag) = it.next() {
        if flag == "--gateway" {
            o.gateway = true;
            continue;
        }
        let value = it
            .next()
            .unwrap_or_else(|| panic!("{flag} needs a value (see the example's doc)"));
        let bad = |e: &dyn std::fmt::Display| -> ! { panic!("{flag} {value}: {e}") };
        match flag.as_str() {
            "--readings" => o.readings = value.parse().unwrap_or_else(|e| bad(&e)),
            "--kills" => o.kills = value.parse().unwrap_or_else(|e| bad(&e)),
            "--devices" => o.devices = value.parse().unwrap_or_else(|e| bad(&e)),
            "--error-rate" => o.byte_error_rate = value.parse().unwrap_or_else(|e| bad(&e)),
            "--scale" => o.time_scale = value.parse().unwrap_or_else(|e| bad(&e)),
            "--disconnect-every" => {
                o.disconnect_every_s = value.parse().unwrap_or_else(|e| bad(&e))
            }
            "--seed" => o.seed = value.parse().unwrap_or_else(|e| bad(&e)),
            _ => panic!("unknown flag {flag} (see the example's doc)"),
        }
    }
    eprintln!("soak: {o:?}");
    let started = std::time::Instant::now();
    let report = soak(&o);
    let mut total = (0u64, 0u32);
    for d in &report {
        println!("{}", d.to_json());
        total.0 += d.readings;
        total.1 += d.kills;
    }
    if o.gateway {
        // One gateway for all: its kills once, not once per device.
        total.1 = report.first().map_or(0, |d| d.kills);
    }
    println!(
        "{}",
        serde_json::json!({
            "type": "soak",
            "devices": report.len(),
            "readings": total.0,
            "kills": total.1,
            "byte_error_rate": o.byte_error_rate,
            "time_scale": o.time_scale,
            "seed": o.seed,
            "through": if o.gateway { "one gateway" } else { "a monitor per device" },
            "seconds": started.elapsed().as_secs_f64(),
            "verdict": "every reading each device logged is stored exactly once, as sent; chain verified",
        })
    );
}
