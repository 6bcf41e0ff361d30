//! `fringe identify` and `fringe status`.

use anyhow::Context;
use fringe_protocol::{Capabilities, Flags, Identity, Status};
use serde_json::json;

use crate::cli::{IdentifyArgs, StatusArgs};
use crate::config::LineConfig;
use crate::out;

fn capability_names(c: Capabilities) -> Vec<&'static str> {
    [
        (Capabilities::RELAXATION, "relaxation"),
        (Capabilities::CURRENT_OUTPUT, "current_output"),
        (Capabilities::SIMULATED, "simulated"),
        (Capabilities::LOG, "log"),
        (Capabilities::DIAGNOSTICS, "diagnostics"),
        (Capabilities::SETTINGS, "settings"),
    ]
    .into_iter()
    .filter(|(f, _)| c.contains(*f))
    .map(|(_, n)| n)
    .collect()
}

/// The identity as JSON (stable keys, units in names).
pub fn identity_json(port: &str, id: &Identity) -> serde_json::Value {
    json!({
        "port": port,
        "serial": id.serial.as_str(),
        "firmware": format!("{}.{}.{}", id.firmware[0], id.firmware[1], id.firmware[2]),
        "protocol": id.protocol.to_string(),
        "capabilities": capability_names(id.capabilities),
        "boot": id.boot,
        "freqs_hz": id.freqs_hz,
    })
}

fn flag_list(f: Flags) -> String {
    let v: Vec<&str> = f.names().collect();
    if v.is_empty() {
        "none".into()
    } else {
        v.join(", ")
    }
}

/// `fringe identify`.
///
/// # Errors
/// Port, link or output errors.
pub fn identify(args: &IdentifyArgs, cfg: &LineConfig) -> anyhow::Result<()> {
    let link = super::connect(&args.port, cfg)?;
    let id = link.identity().context("no identity after the handshake")?;
    if args.json {
        out::json(&identity_json(link.port_name(), id))?;
        return Ok(());
    }
    let caps = capability_names(id.capabilities);
    out::line(&format!("device     {}", id.serial))?;
    out::line(&format!(
        "firmware   {}.{}.{}",
        id.firmware[0], id.firmware[1], id.firmware[2]
    ))?;
    out::line(&format!("protocol   {}", id.protocol))?;
    out::line(&format!(
        "frequency  {:.3} MHz, {:.3} MHz",
        id.freqs_hz[0] / 1e6,
        id.freqs_hz[1] / 1e6
    ))?;
    out::line(&format!("boot       {}", id.boot))?;
    out::line(&format!("can        {}", caps.join(", ")))?;
    if id.capabilities.contains(Capabilities::SIMULATED) {
        out::line("note       simulated device, not a real sensor")?;
    }
    Ok(())
}

/// 2000-01-01 in Unix ms: a device time below it counts from boot.
const CLOCK_SET_AFTER_MS: u64 = 946_684_800_000;

/// The status as JSON.
pub fn status_json(id: &Identity, s: &Status, host_link_errors: u32) -> serde_json::Value {
    json!({
        "serial": id.serial.as_str(),
        "time_ms": s.time_ms,
        "clock_set": !s.last_flags.contains(Flags::CLOCK_UNSET) && s.time_ms >= CLOCK_SET_AFTER_MS,
        "uptime_ms": s.uptime_ms,
        "boot": s.boot,
        "next_seq": s.next_seq.to_string(),
        "log_first": s.log_first.to_string(),
        "log_len": s.log_len,
        "next_event": s.next_event,
        "stream_period_ms": s.stream_period_ms,
        "active_slot": s.active_slot,
        "cell_cal": s.cell_cal.to_string(),
        "product_cal": s.product_cal.to_string(),
        "last_flags": s.last_flags.names().collect::<Vec<_>>(),
        "write_counter": s.write_counter,
        "device_link_errors": s.link_errors,
        "host_link_errors": host_link_errors,
        "reference_ratio": s.reference_ratio,
        "output_ma": s.output_ma,
        "stack_free_bytes": s.stack_free_bytes,
        "reading_cost": s.reading_cost,
    })
}

/// `fringe status`.
///
/// # Errors
/// Port, link or output errors.
pub fn status(args: &StatusArgs, cfg: &LineConfig) -> anyhow::Result<()> {
    let mut link = super::connect(&args.port, cfg)?;
    let s = super::request_status(&mut link)?;
    let id = link.identity().context("no identity after the handshake")?;
    let host_errors = link.stats().damaged;
    if args.json {
        out::json(&status_json(id, &s, host_errors))?;
        return Ok(());
    }
    // Before its clock is set a device counts from boot (no flag tells
    // until the first reading): anything before 2000 is such a count.
    let clock = if s.last_flags.contains(Flags::CLOCK_UNSET) || s.time_ms < CLOCK_SET_AFTER_MS {
        format!("{} since boot (clock not set)", out::duration_ms(s.time_ms))
    } else {
        crate::timefmt::fmt_time(s.time_ms as i64)
    };
    let none = |id: fringe_protocol::CalId| {
        if id == fringe_protocol::CalId::NONE {
            "none".to_string()
        } else {
            id.to_string()
        }
    };
    let rows = [
        ("device", id.serial.to_string()),
        ("time", clock),
        ("uptime", out::duration_ms(s.uptime_ms)),
        ("boot", s.boot.to_string()),
        ("next seq", s.next_seq.to_string()),
        (
            "log",
            format!("{} readings from {}", s.log_len, s.log_first),
        ),
        ("next event", s.next_event.to_string()),
        (
            "streaming",
            s.stream_period_ms
                .map_or("off".into(), |p| format!("every {p} ms")),
        ),
        (
            "product",
            match s.active_slot {
                Some(slot) => format!("slot {slot}, calibration {}", none(s.product_cal)),
                None => "none selected".into(),
            },
        ),
        ("cell cal", none(s.cell_cal)),
        ("flags", flag_list(s.last_flags)),
        ("write ctr", s.write_counter.to_string()),
        (
            "link errs",
            format!("device {}, host {}", s.link_errors, host_errors),
        ),
        ("reference", format!("{:.5}", s.reference_ratio)),
        ("output", format!("{:.2} mA", s.output_ma)),
    ];
    for (k, v) in rows {
        out::line(&format!("{k:<11}{v}"))?;
    }
    if let Some(b) = s.stack_free_bytes {
        out::line(&format!("{:<11}{b} bytes", "stack free"))?;
    }
    Ok(())
}
