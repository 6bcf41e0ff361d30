//! How fast the MQTT publisher's store-and-forward buffer fills and
//! empties (a benchmark, not a test):
//! `cargo run --release -p fringe-tests --example mqtt_catchup -- [ROWS] [DEVICES]`.
//!
//! Buffers ROWS readings (default 20,000) of DEVICES devices (default
//! 300, each on a thread of its own, as the gateway's device sessions
//! are) while no broker is reachable, as during a broker outage, then
//! starts the publisher against a real mosquitto on localhost and times
//! until the broker has acknowledged every row (Sparkplug B, QoS 1).
//! Prints the buffering rate and the catch-up rate, and so how long a
//! reading taken just after the broker came back waits behind the
//! backlog of an outage.

use std::time::{Duration, Instant};

use fringe_gateway::mqtt::{Format, MqttConfig, Publisher};
use fringe_gateway::outbox::Outbox;
use fringe_protocol::{Flags, Reading, Seq};
use fringe_tests::servers::Mosquitto;

fn main() {
    let args: Vec<usize> = std::env::args()
        .skip(1)
        .filter_map(|a| a.parse().ok())
        .collect();
    let rows = args.first().copied().unwrap_or(20_000);
    let devices = args.get(1).copied().unwrap_or(300).max(1);
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("site.mqtt-outbox");
    let serials: Vec<String> = (0..devices).map(|d| format!("BENCH-{d:04}")).collect();
    // Buffered as the gateway does during an outage: each device's
    // thread hands its readings to the publisher, all at once.
    let config = |port: u16| MqttConfig {
        host: "127.0.0.1".into(),
        port,
        client_id: "fringe-bench".into(),
        credentials: None,
        tls_ca_pem: None,
        format: Format::Sparkplug {
            group: "bench".into(),
            edge_node: "gw-1".into(),
        },
        keep_alive: Duration::from_secs(30),
        density: None,
    };
    let t0 = Instant::now();
    {
        let p = Publisher::start(config(1), &path, serials.clone()).expect("publisher");
        std::thread::scope(|sc| {
            for (d, serial) in serials.iter().enumerate() {
                let p = &p;
                sc.spawn(move || {
                    for i in (d..rows).step_by(devices) {
                        let r = Reading {
                            seq: Seq {
                                boot: 1,
                                counter: (i / devices) as u32,
                            },
                            time_ms: 1_796_083_200_000 + (i / devices) as u64 * 1000,
                            temperature_c: 18.25,
                            moisture_pct: Some(12.5),
                            uncertainty_pct: 0.125,
                            flags: Flags::empty(),
                            ..Reading::default()
                        };
                        p.reading(serial, &r, Some("wet")).expect("buffer a row");
                    }
                });
            }
        });
        p.stop();
    }
    let fill = t0.elapsed().as_secs_f64();
    assert_eq!(
        Outbox::open(&path).expect("buffer").len().expect("count"),
        rows as u64
    );
    let broker = Mosquitto::start();
    let t1 = Instant::now();
    let p = Publisher::start(config(broker.port), &path, serials).expect("publisher");
    while p.queued().expect("count") > 0 {
        assert!(
            t1.elapsed() < Duration::from_secs(1800),
            "no catch-up within 30 min"
        );
        std::thread::sleep(Duration::from_millis(20));
    }
    let drain = t1.elapsed().as_secs_f64();
    p.stop();
    println!("| rows | devices | buffered | rows/s | sent and acknowledged | rows/s |");
    println!("| ---: | ---: | ---: | ---: | ---: | ---: |");
    println!(
        "| {rows} | {devices} | {fill:.2} s | {:.0} | {drain:.2} s | {:.0} |",
        rows as f64 / fill,
        rows as f64 / drain
    );
}
