//! Modbus TCP read latency under many polling clients (a benchmark, not a
//! test): `cargo run --release -p fringe-gateway --example modbus_load -- [CLIENTS] [SECONDS] [PERIOD_MS]`.
//!
//! Serves 20 units with a reading each; CLIENTS tokio-modbus clients, each
//! on its own connection, read the whole 25-register map of one unit every
//! PERIOD_MS (default 50 clients, 20 s, 100 ms); prints the request rate
//! and the latency percentiles measured at the clients.

use std::sync::Arc;
use std::time::{Duration, Instant};

use fringe_gateway::live::LiveTable;
use fringe_gateway::modbus::ModbusServer;
use fringe_protocol::{CalId, ChannelValue, Flags, Reading, Seq};
use tokio_modbus::client::Reader;
use tokio_modbus::prelude::*;

fn main() {
    let args: Vec<u64> = std::env::args()
        .skip(1)
        .filter_map(|a| a.parse().ok())
        .collect();
    let clients = args.first().copied().unwrap_or(50) as usize;
    let seconds = args.get(1).copied().unwrap_or(20);
    let period = Duration::from_millis(args.get(2).copied().unwrap_or(100));

    let table = Arc::new(LiveTable::new(Duration::from_secs(60)));
    for unit in 1..=20u8 {
        table.register(unit, &format!("BENCH-{unit:04}"));
        let r = Reading {
            seq: Seq {
                boot: 1,
                counter: 1,
            },
            time_ms: 1_796_083_200_000,
            channels: [ChannelValue::default(); 2],
            temperature_c: 20.0,
            moisture_pct: Some(14.0),
            uncertainty_pct: 0.1,
            flags: Flags::empty(),
            cell_cal: CalId::NONE,
            product_cal: CalId::NONE,
        };
        table.update(unit, &r, Instant::now());
    }
    let server =
        ModbusServer::start("127.0.0.1:0".parse().unwrap(), Arc::clone(&table)).expect("bind");
    let addr = server.local_addr();

    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(1)
        .enable_all()
        .build()
        .expect("client runtime");
    let latencies: Vec<Vec<Duration>> = rt.block_on(async move {
        let mut tasks = Vec::new();
        for c in 0..clients {
            tasks.push(tokio::spawn(async move {
                let unit = Slave((c % 20) as u8 + 1);
                let mut ctx = tokio_modbus::client::tcp::connect_slave(addr, unit)
                    .await
                    .expect("connect");
                let mut lat = Vec::new();
                let end = Instant::now() + Duration::from_secs(seconds);
                let mut next = Instant::now() + period.mul_f64(c as f64 / clients as f64);
                while Instant::now() < end {
                    tokio::time::sleep_until(next.into()).await;
                    next += period;
                    let t0 = Instant::now();
                    let words = ctx
                        .read_input_registers(0, 25)
                        .await
                        .expect("io")
                        .expect("no exception");
                    lat.push(t0.elapsed());
                    assert_eq!(words.len(), 25);
                }
                lat
            }));
        }
        let mut all = Vec::new();
        for t in tasks {
            all.push(t.await.expect("client task"));
        }
        all
    });
    let mut all: Vec<Duration> = latencies.into_iter().flatten().collect();
    all.sort_unstable();
    let q = |p: f64| all[((all.len() - 1) as f64 * p).round() as usize];
    println!(
        "{clients} clients, one 25-register read each every {} ms for {seconds} s: {} requests ({:.0}/s)",
        period.as_millis(),
        all.len(),
        all.len() as f64 / seconds as f64
    );
    println!(
        "latency p50 {:.3} ms, p99 {:.3} ms, max {:.3} ms",
        q(0.5).as_secs_f64() * 1e3,
        q(0.99).as_secs_f64() * 1e3,
        all.last().copied().unwrap_or_default().as_secs_f64() * 1e3
    );
    server.stop();
}
