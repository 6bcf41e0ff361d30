//! Fringe against the clients a plant uses: pymodbus (3.x, in the Python
//! virtual environment `cargo xtask test` makes) reading the gateway's
//! Modbus TCP server. Ignored in a plain `cargo test`: they need
//! `FRINGE_PYTHON`, which `cargo xtask test` sets.

use std::path::PathBuf;
use std::process::Command;
use std::sync::Arc;
use std::time::{Duration, Instant};

use fringe_gateway::live::LiveTable;
use fringe_gateway::modbus::ModbusServer;
use fringe_protocol::{CalId, ChannelValue, Flags, Reading, Seq};
use fringe_tests::workspace_root;
use serde_json::Value;

fn python() -> PathBuf {
    PathBuf::from(std::env::var_os("FRINGE_PYTHON").unwrap_or_else(|| {
        panic!("FRINGE_PYTHON is not set: run `cargo xtask test`, which makes the venv")
    }))
}

fn reading(boot: u32, counter: u32, moisture: Option<f32>, flags: Flags) -> Reading {
    Reading {
        seq: Seq { boot, counter },
        time_ms: 1_796_083_200_000 + u64::from(counter) * 1000,
        channels: [ChannelValue::default(); 2],
        temperature_c: 18.25,
        moisture_pct: moisture,
        uncertainty_pct: 0.125,
        flags,
        cell_cal: CalId::NONE,
        product_cal: CalId::NONE,
    }
}

/// pymodbus reads every register of three units of a running server; the
/// float32 and scaled values it decodes are the readings put in; a read
/// past the map gets exception 2, an unknown unit exception 11 (0x0B), a
/// holding-register read exception 1.
#[test]
#[ignore = "needs FRINGE_PYTHON (the venv): `cargo xtask test` runs it"]
fn pymodbus_reads_the_register_map_of_every_unit() {
    let table = Arc::new(LiveTable::new(Duration::from_secs(30)));
    table.register(1, "PLT-A-0001");
    table.register(2, "PLT-A-0002");
    table.register(3, "PLT-A-0003");
    let now = Instant::now();
    table.update(1, &reading(2, 70_001, Some(14.37), Flags::empty()), now);
    table.update(2, &reading(1, 12, None, Flags::NOT_CALIBRATED), now);
    // Unit 3: registered, no reading yet.
    let server = ModbusServer::start("127.0.0.1:0".parse().unwrap(), Arc::clone(&table))
        .expect("bind a free port on localhost");
    let addr = server.local_addr();
    let o = Command::new(python())
        .arg(workspace_root().join("tests/python/modbus_read.py"))
        .arg(addr.ip().to_string())
        .arg(addr.port().to_string())
        .args(["1", "2", "3"])
        .output()
        .expect("run modbus_read.py");
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let v: Value = serde_json::from_slice(&o.stdout).expect("JSON");
    let u1 = &v["units"]["1"];
    assert_eq!(
        u1["moisture_pct"].as_f64(),
        Some(f64::from(14.37f32)),
        "{v}"
    );
    assert_eq!(u1["uncertainty_pct"].as_f64(), Some(0.125), "{v}");
    assert_eq!(u1["temperature_c"].as_f64(), Some(18.25), "{v}");
    assert_eq!(u1["counter"].as_u64(), Some(70_001), "{v}");
    assert_eq!(u1["boot"].as_u64(), Some(2), "{v}");
    assert_eq!(u1["status"].as_u64(), Some(0), "{v}");
    assert_eq!(u1["scaled_moisture"].as_i64(), Some(1437), "{v}");
    assert_eq!(u1["known_value"].as_f64(), Some(1234.5), "{v}");
    assert_eq!(u1["version"].as_u64(), Some(1), "{v}");
    assert!(u1["age_s"].as_u64().unwrap_or(99) < 30, "{v}");
    // Unit 2: not calibrated: no value (NaN, 0x8000 as -32768), bits 0 and 3.
    let u2 = &v["units"]["2"];
    // NaN, which the script writes as null (JSON has no NaN).
    assert!(u2["moisture_pct"].is_null(), "{v}");
    assert_eq!(u2["scaled_moisture"].as_i64(), Some(-32768), "{v}");
    let s2 = u2["status"].as_u64().unwrap_or(0);
    assert_eq!(s2 & 0b1001, 0b1001, "{v}");
    // Unit 3: nothing yet: bit 15 and bit 0.
    let s3 = v["units"]["3"]["status"].as_u64().unwrap_or(0);
    assert_eq!(s3 & 0x8001, 0x8001, "{v}");
    assert_eq!(v["past_end_exception"].as_u64(), Some(2), "{v}");
    assert_eq!(v["unknown_unit_exception"].as_u64(), Some(11), "{v}");
    assert_eq!(v["holding_exception"].as_u64(), Some(1), "{v}");
    server.stop();
}
