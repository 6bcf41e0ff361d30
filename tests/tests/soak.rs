//! The short version of the soak (`fringe_tests::soak`; the long one is
//! `cargo xtask soak`, figures in docs/RELIABILITY.md): one simulated
//! device behind a line with a byte error rate of 1e-3 in both directions
//! (lost bytes, flipped bits, garbage bursts) and a 1 s disconnect every
//! 100 device seconds (device time 10x wall time), streamed by `fringe monitor`, which is killed with
//! SIGKILL 10 times at random moments; every reading the device logged is
//! stored exactly once, as sent, and the chain verifies. The same through
//! one gateway for three devices, killed 6 times.

use fringe_tests::soak::{disconnects, soak, SoakOptions};

#[test]
fn a_faulty_line_and_ten_kills_lose_and_duplicate_nothing() {
    let seed = fringe_tests::seed(71);
    let report = soak(&SoakOptions {
        readings: 1_500,
        kills: 10,
        devices: 1,
        byte_error_rate: 1e-3,
        time_scale: 10.0,
        disconnect_every_s: 100.0,
        seed,
        gateway: false,
    });
    for d in &report {
        println!("FRINGE_SEED={seed}: {}", d.to_json());
        assert!(d.readings >= 1_500, "{d:?}");
        assert_eq!(d.kills, 10, "{d:?}");
        assert!(disconnects(&d.line).is_some_and(|n| n >= 1), "{d:?}");
    }
}

/// The same through one gateway (`--gateway` of the long soak): three
/// devices, each behind its own faulty line with a 1 s disconnect every 60
/// device seconds, read by one `fringe gateway`
/// into one store; the gateway is killed with SIGKILL 6 times at random
/// moments and started again; every reading each device logged is stored
/// exactly once, as sent, and the chain verifies.
#[test]
fn three_devices_through_a_gateway_killed_six_times_lose_and_duplicate_nothing() {
    let seed = fringe_tests::seed(81);
    let report = soak(&SoakOptions {
        readings: 900,
        kills: 6,
        devices: 3,
        byte_error_rate: 1e-3,
        time_scale: 10.0,
        disconnect_every_s: 60.0,
        seed,
        gateway: true,
    });
    assert_eq!(report.len(), 3);
    for d in &report {
        println!("FRINGE_SEED={seed}: {}", d.to_json());
        assert!(d.stored_by_host >= 900, "{d:?}");
        assert_eq!(d.kills, 6, "{d:?}");
        assert!(disconnects(&d.line).is_some_and(|n| n >= 1), "{d:?}");
    }
}
