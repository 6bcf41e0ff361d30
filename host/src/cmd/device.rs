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
        (Capabilities::MODBUS_RTU, "modbus_rtu"),
        (Capabilities::DENSITY_INPUT, "density_input"),
        (Capabilities::STATIC_TERMS, "static_terms"),
        (Capabilities::SIGMA_HOLD, "sigma_hold"),
        (Capabilities::RELAXATION_DENSITY, "relaxation_density"),
        (Capabilities::WIDE_SPAN, "wide_span"),
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

/// Whether the device clock is set: before it is, a device counts from
/// boot, and anything before 2000 is such a count. (Not the last
/// reading's `clock_unset` flag: between a clock set and the next reading
/// it still says unset.)
fn clock_is_set(s: &Status) -> bool {
    s.time_ms >= CLOCK_SET_AFTER_MS
}

/// The status as JSON.
pub fn status_json(id: &Identity, s: &Status, host_link_errors: u32) -> serde_json::Value {
    json!({
        "serial": id.serial.as_str(),
        "time_ms": s.time_ms,
        "clock_set": clock_is_set(s),
        "uptime_ms": s.uptime_ms,
        "boot": s.boot,
        "next_seq": {"boot": s.next_seq.boot, "counter": s.next_seq.counter},
        "log_first": {"boot": s.log_first.boot, "counter": s.log_first.counter},
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
    let s = link.status()?;
    let id = link.identity().context("no identity after the handshake")?;
    let host_errors = link.stats().damaged;
    if args.json {
        out::json(&status_json(id, &s, host_errors))?;
        return Ok(());
    }
    let clock = if !clock_is_set(&s) {
        format!("{} since boot (clock not set)", out::duration_ms(s.time_ms))
    } else {
        crate::timefmt::fmt_person(s.time_ms as i64)
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
            "subscribed",
            s.stream_period_ms.map_or(
                "no (the device measures and logs all the same)".into(),
                |p| format!("yes, a reading every {p} ms"),
            ),
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
    if id.capabilities.contains(Capabilities::SETTINGS) {
        let st = read_settings(&mut link)?;
        out::line(&format!(
            "{:<11}{}, a reading every {} ms, {:.2}-{:.2} % at 4-20 mA, fail {} (`fringe device config show`)",
            "settings",
            if st.tag.is_empty() { "no tag" } else { st.tag.as_str() },
            st.interval_ms,
            st.output.span_low_pct,
            st.output.span_high_pct,
            if st.output.fail_high { "high" } else { "low" }
        ))?;
    }
    if let Some(b) = s.stack_free_bytes {
        out::line(&format!("{:<11}{b} bytes", "stack free"))?;
    }
    Ok(())
}

/// The self-test's checks: name, passed, what it checks, what to do when
/// it failed. `baseline`: the device's cell calibration holds a reference
/// value to compare with (else the firmware only checks that the reference
/// measurement is usable).
fn self_test_checks(
    t: &fringe_protocol::SelfTest,
    baseline: bool,
) -> [(&'static str, bool, &'static str, &'static str); 4] {
    let (reference_what, reference_todo) = if baseline {
        (
            "the internal reference lies within its tolerance (2 % by default) of its value at cell calibration",
            "the internal reference moved beyond its tolerance or its measurement was unusable: if the front end failed too, have the device serviced; otherwise verify against a lab sample and recalibrate the cell (`fringe cal cell`); later readings are flagged reference_drift",
        )
    } else {
        (
            "the internal reference measurement is usable (the cell calibration holds no reference value to compare with)",
            "the internal reference measurement was unusable (clipped, or its gain outside 0.5-2): have the device serviced",
        )
    };
    [
        (
            "storage",
            t.storage_ok,
            "flash: a scratch record written and read back (written at the boot's first self-test, read back at later ones)",
            "the flash did not give back what was written: the device may lose its reading log, calibrations and settings; pull its log now (`fringe pull`) and have the device serviced",
        ),
        (
            "frontend",
            t.frontend_ok,
            "no front-end operation failed (the temperature read included) and the reference pass measured at both frequencies with enough excitation",
            "the electronics did not measure properly: power the device off and on; if it persists, have it serviced (an open electrode cable shows instead as electrode_fault in the readings)",
        ),
        (
            "temperature",
            t.temperature_ok,
            "the temperature sensor reads within range",
            "the temperature sensor reads out of range: no moisture is computed and the 4-20 mA output goes to its failure level; check the sensor's wiring (flag temp_sensor_fault)",
        ),
        ("reference", t.reference_ok, reference_what, reference_todo),
    ]
}

/// The self-test's text lines, JSON and failed checks.
fn self_test_report(
    serial: &str,
    t: &fringe_protocol::SelfTest,
    baseline: bool,
) -> (Vec<String>, serde_json::Value, Vec<&'static str>) {
    let checks = self_test_checks(t, baseline);
    let failed: Vec<&'static str> = checks.iter().filter(|c| !c.1).map(|c| c.0).collect();
    let v = json!({
        "serial": serial,
        "storage_ok": t.storage_ok,
        "frontend_ok": t.frontend_ok,
        "temperature_ok": t.temperature_ok,
        "reference_ok": t.reference_ok,
        "reference_baseline": baseline,
        "flags": t.flags.names().collect::<Vec<_>>(),
        "failed": failed,
        "ok": failed.is_empty(),
    });
    let mut lines = vec![format!(
        "self-test of {serial} (one measurement and a reference check)"
    )];
    for (name, ok, what, todo) in &checks {
        let (state, text) = if *ok {
            ("pass", *what)
        } else {
            ("FAIL", *todo)
        };
        lines.push(format!("  {name:<12}{state}  {text}"));
    }
    lines.push(format!("  {:<12}{}", "flags", flag_list(t.flags)));
    (lines, v, failed)
}

/// `fringe device self-test`.
///
/// # Errors
/// Port or link errors; [`crate::exit::ProblemsFound`] when a check fails.
fn self_test(a: &crate::cli::SelfTestArgs, cfg: &LineConfig) -> anyhow::Result<()> {
    // Said to a person at a terminal (`--help` says it too).
    if std::io::IsTerminal::is_terminal(&std::io::stderr()) {
        eprintln!(
            "CAUTION: the self-test takes an ordinary reading: the 4-20 mA output follows it, and a failing measurement sends it to its failure level at once; on a running line tell the control room first."
        );
    }
    let mut link = super::connect(&a.port, cfg)?;
    let serial = link.serial_number().to_string();
    // The reference is compared with the cell calibration's value where it
    // holds one; the firmware checks only that it is usable otherwise.
    let baseline = match link.request(fringe_protocol::Request::ReadCellCal)? {
        fringe_protocol::Response::CellCal(c) => c.is_some_and(|c| c.reference_ratio > 0.0),
        other => anyhow::bail!("{serial}: unexpected answer to ReadCellCal: {other:?}"),
    };
    let t = match link.request(fringe_protocol::Request::SelfTest)? {
        fringe_protocol::Response::SelfTest(t) => t,
        other => anyhow::bail!("{serial}: unexpected answer to SelfTest: {other:?}"),
    };
    let (lines, v, failed) = self_test_report(&serial, &t, baseline);
    if a.json {
        out::json(&v)?;
    } else {
        for l in lines {
            out::line(&l)?;
        }
    }
    if failed.is_empty() {
        Ok(())
    } else {
        Err(crate::exit::ProblemsFound(format!(
            "{serial}: self-test failed: {}",
            failed.join(", ")
        ))
        .into())
    }
}

/// `fringe device ...`.
///
/// # Errors
/// The subcommand's error.
pub fn device(a: &crate::cli::DeviceArgs, cfg: &LineConfig) -> anyhow::Result<()> {
    use crate::cli::{ConfigCommand, DeviceCommand};
    match &a.command {
        DeviceCommand::Clock(c) => clock(c, cfg),
        DeviceCommand::Density(d) => density(d, cfg),
        DeviceCommand::SelfTest(t) => self_test(t, cfg),
        DeviceCommand::Config(c) => match &c.command {
            ConfigCommand::Show(s) => config_show(s, cfg),
            ConfigCommand::Set(s) => config_set(s, cfg),
        },
    }
}

fn clock_json(
    port: &str,
    serial: &str,
    c: &fringe_line::ClockCheck,
    host_ms: i64,
) -> serde_json::Value {
    use fringe_line::ClockCheck;
    let mut v = json!({
        "port": port,
        "serial": serial,
        "host_utc": crate::timefmt::fmt_time(host_ms),
        "host_unix_ms": host_ms,
    });
    match *c {
        ClockCheck::Unset { since_boot_ms } => {
            v["clock_set"] = json!(false);
            v["since_boot_ms"] = json!(since_boot_ms);
        }
        ClockCheck::Set { device_ms, off_ms } => {
            v["clock_set"] = json!(true);
            v["device_utc"] = json!(crate::timefmt::fmt_time(device_ms));
            v["device_unix_ms"] = json!(device_ms);
            v["off_ms"] = json!(off_ms);
        }
    }
    v
}

fn clock_lines(c: &fringe_line::ClockCheck, host_ms: i64) -> Vec<String> {
    use fringe_line::ClockCheck;
    let p = crate::timefmt::fmt_person;
    let mut out = Vec::new();
    match *c {
        ClockCheck::Unset { since_boot_ms } => out.push(format!(
            "device     not set: {} since boot (its readings carry clock_unset)",
            out::duration_ms(since_boot_ms)
        )),
        ClockCheck::Set { device_ms, off_ms } => {
            out.push(format!("device     {}", p(device_ms)));
            out.push(format!(
                "off by     {:+.3} s against this computer{}",
                off_ms as f64 / 1000.0,
                if c.needs_setting() {
                    " (more than 1 s: set it)"
                } else {
                    ""
                }
            ));
        }
    }
    out.push(format!("computer   {}", p(host_ms)));
    out
}

/// `fringe device clock`.
///
/// # Errors
/// Port, link, key or output errors.
pub fn clock(a: &crate::cli::ClockArgs, cfg: &LineConfig) -> anyhow::Result<()> {
    use crate::store::now_unix_ms;
    let mut link = super::connect(&a.port, cfg)?;
    let serial = link.serial_number().to_string();
    let host = now_unix_ms();
    let before = fringe_line::check_clock(&link.status()?, host);
    let target = if a.set { Some(now_unix_ms()) } else { a.set_to };
    let Some(target) = target else {
        if a.json {
            out::json(&clock_json(link.port_name(), &serial, &before, host))?;
        } else {
            out::line(&format!("{:<11}{serial}", "serial"))?;
            for l in clock_lines(&before, host) {
                out::line(&l)?;
            }
        }
        return Ok(());
    };
    let key = super::optional_key(a.key_file.as_deref(), cfg)?
        .ok_or_else(|| super::missing_key("setting the device clock"))?;
    // Given a time, keep its distance to now (the write takes a moment).
    let offset = target - host;
    let t = now_unix_ms() + if a.set { 0 } else { offset };
    fringe_line::set_clock(&mut link, &key, t)?;
    let host = now_unix_ms();
    let after = fringe_line::check_clock(&link.status()?, host);
    if a.json {
        let mut v = clock_json(link.port_name(), &serial, &after, host);
        v["before"] = clock_json(link.port_name(), &serial, &before, host);
        v["set_to_utc"] = json!(crate::timefmt::fmt_time(t));
        out::json(&v)?;
    } else {
        out::line(&format!("{:<11}{serial}", "serial"))?;
        for l in clock_lines(&before, host) {
            out::line(&format!("before: {l}"))?;
        }
        out::line(&format!(
            "set to     {} (the device logged a clock_set event with the old and new time)",
            crate::timefmt::fmt_person(t)
        ))?;
        for l in clock_lines(&after, host) {
            out::line(&l)?;
        }
    }
    Ok(())
}

/// `fringe device density`.
///
/// # Errors
/// Values out of range (a usage error, nothing sent), port, link, key
/// errors, a device without a density input, the device's refusal.
pub fn density(a: &crate::cli::DensityArgs, cfg: &LineConfig) -> anyhow::Result<()> {
    use fringe_protocol::{DENSITY_HOLD_MAX_MS, DENSITY_HOLD_MIN_MS};
    let kg_m3 = fringe_line::check_density(a.kg_m3).map_err(|why| {
        crate::exit::UsageError(format!("--kg-m3 {}: {why}; nothing sent", a.kg_m3))
    })?;
    let hold_ms = a.hold_s.saturating_mul(1000);
    if !(DENSITY_HOLD_MIN_MS..=DENSITY_HOLD_MAX_MS).contains(&hold_ms) {
        return Err(crate::exit::UsageError(format!(
            "--hold-s {}: must lie in {}..{} s; nothing sent",
            a.hold_s,
            DENSITY_HOLD_MIN_MS / 1000,
            DENSITY_HOLD_MAX_MS / 1000
        ))
        .into());
    }
    let key = super::optional_key(a.key_file.as_deref(), cfg)?
        .ok_or_else(|| super::missing_key("sending a density"))?;
    // Said to a person at a terminal (a script feeding the density every
    // few seconds would fill its log with it; `--help` says it too).
    if std::io::IsTerminal::is_terminal(&std::io::stderr()) {
        eprintln!(
            "CAUTION: where the active calibration takes the density, the moisture and the 4-20 mA output follow it at once; a wrong value (g/cm3 for kg/m3) moves the value a control loop may use. Local codes and site rules come first."
        );
    }
    let mut link = super::connect(&a.port, cfg)?;
    let serial = link.serial_number().to_string();
    match fringe_line::set_density(&mut link, &key, kg_m3, hold_ms) {
        Ok(()) => {}
        Err(fringe_line::DensityError::Link(e)) => {
            return Err(anyhow::Error::from(e).context(format!(
                "{serial} did not take the density {} kg/m3",
                a.kg_m3
            )))
        }
        Err(e) => return Err(e.into()),
    }
    let until = crate::store::now_unix_ms() + i64::from(hold_ms);
    // Whether the calibration in use takes it (the device holds it either way).
    let active = active_calibration(&mut link)?;
    let used = active.as_ref().is_some_and(|(_, takes)| *takes);
    if a.json {
        out::json(&json!({
            "port": link.port_name(),
            "serial": serial,
            // The value as typed (the f32 sent, widened to f64, would show
            // digits nobody typed: 1650.3 as 1650.300048828125).
            "bulk_density_kg_m3": a.kg_m3,
            "hold_s": a.hold_s,
            "holds_until": crate::timefmt::fmt_time(until),
            "active_calibration": active.as_ref().map(|(name, _)| name.as_str()),
            "used_by_active_calibration": used,
        }))?;
    } else {
        out::line(&format!("{:<11}{serial}", "serial"))?;
        out::line(&format!(
            "density    {} kg/m3, held until {} (then readings of a calibration with a density input are flagged density_missing)",
            a.kg_m3,
            crate::timefmt::fmt_person(until)
        ))?;
    }
    if !used {
        eprintln!(
            "note: {}: the device holds the density, but its readings do not change until a calibration fitted with --density-input is active",
            match &active {
                Some((name, _)) => format!("the active calibration `{name}` does not take one"),
                None => "no product calibration is active".to_string(),
            }
        );
    }
    Ok(())
}

/// The active product calibration's name and whether it takes the plant's
/// bulk density; `None` when none is active.
fn active_calibration(link: &mut crate::link::Link) -> anyhow::Result<Option<(String, bool)>> {
    use fringe_protocol::{Request, Response};
    let Some(slot) = link.status()?.active_slot else {
        return Ok(None);
    };
    match link.request(Request::ReadProductCal { slot })? {
        Response::ProductCal { cal: Some(pc), .. } => Ok(Some((
            pc.name.to_string(),
            fringe_device::product::takes_density(&pc),
        ))),
        _ => Ok(None),
    }
}

/// The device settings, read.
///
/// # Errors
/// Link errors; a device without settings (protocol 1.0).
pub fn read_settings(link: &mut crate::link::Link) -> anyhow::Result<fringe_protocol::Settings> {
    Ok(link.settings()?)
}

/// The settings as JSON (stable keys, units in names).
pub fn settings_json(s: &fringe_protocol::Settings) -> serde_json::Value {
    json!({
        "tag": s.tag.as_str(),
        "interval_ms": s.interval_ms,
        "span_low_pct": s.output.span_low_pct,
        "span_high_pct": s.output.span_high_pct,
        "fail": if s.output.fail_high { "high" } else { "low" },
        "stale_timeout_ms": s.stale_timeout_ms,
        "settings_id": s.content_id().to_string(),
    })
}

/// The Modbus RTU settings as JSON keys (merged into the settings' JSON).
pub fn modbus_json(m: &fringe_protocol::ModbusSettings) -> serde_json::Value {
    json!({
        "modbus_unit": m.unit_id,
        "modbus_baud": m.baud,
        "modbus_parity": parity_name(m.parity),
        "modbus_frame": frame_name(m),
    })
}

fn parity_name(p: fringe_protocol::ModbusParity) -> &'static str {
    match p {
        fringe_protocol::ModbusParity::Even => "even",
        fringe_protocol::ModbusParity::Odd => "odd",
        fringe_protocol::ModbusParity::None => "none",
    }
}

/// `8E1`, `8O1` or `8N2`.
fn frame_name(m: &fringe_protocol::ModbusSettings) -> &'static str {
    match m.parity {
        fringe_protocol::ModbusParity::Even => "8E1",
        fringe_protocol::ModbusParity::Odd => "8O1",
        fringe_protocol::ModbusParity::None => "8N2",
    }
}

/// The Modbus RTU settings as lines for a person.
pub fn modbus_lines(m: &fringe_protocol::ModbusSettings) -> Vec<(String, String)> {
    let t = fringe_firmware::modbus::SerialLine::from(*m).timing();
    vec![
        ("modbus unit".into(), m.unit_id.to_string()),
        (
            "modbus line".into(),
            format!(
                "{} baud, {} ({} parity), frame gap {:.2} ms",
                m.baud,
                frame_name(m),
                parity_name(m.parity),
                f64::from(t.t35_us) / 1000.0
            ),
        ),
    ]
}

/// The settings and, when the device has them, the Modbus settings as JSON.
fn config_json(
    s: &fringe_protocol::Settings,
    m: Option<&fringe_protocol::ModbusSettings>,
) -> serde_json::Value {
    let mut v = settings_json(s);
    if let (Some(m), Some(o)) = (m, v.as_object_mut()) {
        if let Some(mo) = modbus_json(m).as_object() {
            o.extend(mo.clone());
        }
    }
    v
}

/// The settings and the Modbus settings as lines for a person.
fn config_lines(
    s: &fringe_protocol::Settings,
    m: Option<&fringe_protocol::ModbusSettings>,
) -> Vec<(String, String)> {
    let mut l = settings_lines(s);
    if let Some(m) = m {
        l.extend(modbus_lines(m));
    }
    l
}

/// The Modbus settings when the device keeps them (protocol 1.2 on).
fn read_modbus(
    link: &mut crate::link::Link,
) -> anyhow::Result<Option<fringe_protocol::ModbusSettings>> {
    if link.has_modbus_settings() {
        Ok(Some(link.modbus()?))
    } else {
        Ok(None)
    }
}

/// The settings as lines for a person.
pub fn settings_lines(s: &fringe_protocol::Settings) -> Vec<(String, String)> {
    use fringe_firmware::output::{MA_FAIL_HIGH, MA_FAIL_LOW};
    vec![
        (
            "tag".into(),
            if s.tag.is_empty() {
                "(none)".into()
            } else {
                s.tag.to_string()
            },
        ),
        ("interval".into(), format!("{} ms", s.interval_ms)),
        (
            "4-20 mA span".into(),
            format!(
                "{:.2} % at 4 mA, {:.2} % at 20 mA",
                s.output.span_low_pct, s.output.span_high_pct
            ),
        ),
        (
            "failure level".into(),
            if s.output.fail_high {
                format!("high ({MA_FAIL_HIGH} mA; NAMUR NE 43: >= 21 mA)")
            } else {
                format!("low ({MA_FAIL_LOW} mA; NAMUR NE 43: <= 3.6 mA)")
            },
        ),
        (
            "stale timeout".into(),
            format!(
                "{} ms (with no valid reading for this long the loop goes to its failure level)",
                s.stale_timeout_ms
            ),
        ),
        ("settings id".into(), s.content_id().to_string()),
    ]
}

/// `fringe device config show`.
///
/// # Errors
/// Port, link or output errors.
pub fn config_show(a: &crate::cli::ConfigShowArgs, cfg: &LineConfig) -> anyhow::Result<()> {
    let mut link = super::connect(&a.port, cfg)?;
    let s = read_settings(&mut link)?;
    let m = read_modbus(&mut link)?;
    if a.json {
        let mut v = config_json(&s, m.as_ref());
        v["serial"] = json!(link.serial_number());
        out::json(&v)?;
        return Ok(());
    }
    out::line(&format!("{:<15}{}", "device", link.serial_number()))?;
    for (k, v) in config_lines(&s, m.as_ref()) {
        out::line(&format!("{k:<15}{v}"))?;
    }
    if m.is_none() {
        out::line(&format!(
            "{:<15}not settable: the device speaks protocol {} (Modbus settings need 1.2)",
            "modbus",
            link.identity()
                .map_or("?".into(), |i| i.protocol.to_string())
        ))?;
    }
    Ok(())
}

/// What `config set` did.
#[derive(Debug, Clone, serde::Serialize)]
pub struct ConfigSetOutcome {
    /// Device serial.
    pub serial: String,
    /// Settings before.
    pub old: serde_json::Value,
    /// Settings now (read back).
    pub new: serde_json::Value,
    /// Chain position of the (last) audit record.
    pub position: u64,
    /// Chain positions of every audit record written (one for the
    /// settings, one for the Modbus settings, in that order).
    pub positions: Vec<u64>,
    /// Whether anything was written (false: the device held these
    /// settings already; `position` 0, `positions` empty).
    pub changed: bool,
}

/// `fringe device config set`.
///
/// # Errors
/// Port, link, key, database or output errors; a refused value; a
/// declined confirmation.
pub fn config_set(a: &crate::cli::ConfigSetArgs, cfg: &LineConfig) -> anyhow::Result<()> {
    use fringe_device::guide::Guide as _;
    let key = super::optional_key(a.key_file.as_deref(), cfg)?
        .ok_or_else(|| super::missing_key("changing the settings"))?;
    let db = super::db_path(a.db.as_deref(), cfg)?;
    let change = fringe_device::settings::SettingsChange {
        tag: a.tag.clone(),
        interval_ms: a.interval_ms,
        span_low_pct: a.span_low_pct,
        span_high_pct: a.span_high_pct,
        fail_high: a.fail.map(|f| f == crate::cli::FailLevel::High),
        stale_timeout_ms: a.stale_timeout_ms,
    };
    let mchange = fringe_device::settings::ModbusChange {
        unit_id: a.modbus_unit,
        baud: a.modbus_baud,
        parity: a.modbus_parity.map(Into::into),
    };
    let mut link = super::connect(&a.port, cfg)?;
    let id = link
        .identity()
        .cloned()
        .context("no identity after the handshake")?;
    let old = read_settings(&mut link)?;
    let new = change.apply(&old)?;
    fringe_device::settings::check_capabilities(&new, id.capabilities, id.serial.as_str())?;
    // Asked for Modbus settings, a device before protocol 1.2 is refused
    // here, by name and version, before anything is written.
    let old_m = if mchange.is_empty() {
        read_modbus(&mut link)?
    } else {
        Some(link.modbus()?)
    };
    let new_m = match &old_m {
        Some(o) => Some(mchange.apply(o)?),
        None => None,
    };
    let settings_changed = new != old;
    let modbus_changed = new_m != old_m;
    if !settings_changed && !modbus_changed {
        if a.json {
            let o = ConfigSetOutcome {
                serial: id.serial.to_string(),
                old: config_json(&old, old_m.as_ref()),
                new: config_json(&new, new_m.as_ref()),
                position: 0,
                positions: Vec::new(),
                changed: false,
            };
            out::json(&serde_json::to_value(&o)?)?;
        } else {
            out::line("nothing to change: the device holds these settings already")?;
        }
        return Ok(());
    }
    // What changes and the cautions, on stderr with --json too: the
    // answer to the question below moves the output a control loop uses.
    {
        eprintln!("{} on {}:", id.serial, link.port_name());
        let before = config_lines(&old, old_m.as_ref());
        let after = config_lines(&new, new_m.as_ref());
        for ((k, o), (_, n)) in before.into_iter().zip(after) {
            if o != n {
                eprintln!("  {k:<15}{o}\n  {:<15}-> {n}", "");
            }
        }
        if new.output.span_high_pct > 100.0
            && (new.output.span_low_pct, new.output.span_high_pct)
                != (old.output.span_low_pct, old.output.span_high_pct)
        {
            eprintln!(
                "\nthe span reaches above 100 %: only a dry-basis calibration (water over dry mass) reports such values; on a wet basis the moisture stays below 100 % and the 4-20 mA signal uses only part of its range"
            );
        }
        if settings_changed {
            eprintln!("\n{}", fringe_device::SETTINGS_CAUTION);
        }
        if modbus_changed {
            eprintln!("\n{}", fringe_device::MODBUS_CAUTION);
        }
        eprintln!();
    }
    if !a.yes && !crate::terminal::Terminal.confirm("write these settings to the device?")? {
        anyhow::bail!(
            "not written: declined (nothing changed on the device or in {})",
            db.display()
        );
    }
    // The clock only once the change is confirmed: a refusal or a "no"
    // leaves the device as it was.
    super::sync_clock(&mut link, Some(&key), "device config")?;
    super::with_db(&db, |store| {
        fringe_line::register(store, &id)?;
        let mut positions = Vec::new();
        if settings_changed {
            let position = fringe_device::settings::write_settings(
                &mut link,
                &key,
                store,
                &old,
                &new,
                &a.operator,
                &a.reason,
            )?;
            if !a.json {
                out::line(&format!(
                    "settings {} -> {} written to {}, read back and verified; audit record at chain position {} of {}",
                    old.content_id(),
                    new.content_id(),
                    id.serial,
                    position,
                    db.display()
                ))?;
            }
            positions.push(position);
        }
        if let (Some(om), Some(nm), true) = (&old_m, &new_m, modbus_changed) {
            let position = fringe_device::settings::write_modbus(
                &mut link,
                &key,
                store,
                om,
                nm,
                &a.operator,
                &a.reason,
            )?;
            if !a.json {
                out::line(&format!(
                    "Modbus RTU unit {} at {} baud {} written to {}, read back and verified (in force on its RS-485 line now); audit record at chain position {} of {}",
                    nm.unit_id,
                    nm.baud,
                    frame_name(nm),
                    id.serial,
                    position,
                    db.display()
                ))?;
            }
            positions.push(position);
        }
        let o = ConfigSetOutcome {
            serial: id.serial.to_string(),
            old: config_json(&old, old_m.as_ref()),
            new: config_json(&new, new_m.as_ref()),
            position: positions.last().copied().unwrap_or(0),
            positions,
            changed: true,
        };
        if a.json {
            out::json(&serde_json::to_value(&o)?)?;
        }
        Ok(())
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use fringe_protocol::SelfTest;

    /// Right after the clock is set, before the next reading, the last
    /// reading still says `clock_unset`; the clock is set by its time
    /// (found by review: status said "clock not set" and clock_set false).
    #[test]
    fn the_clock_is_set_by_its_time_not_by_the_last_readings_flag() {
        let status = |time_ms: u64| Status {
            time_ms,
            uptime_ms: 6_000,
            boot: 1,
            next_seq: fringe_protocol::Seq::default(),
            log_first: fringe_protocol::Seq::default(),
            log_len: 0,
            next_event: 0,
            stream_period_ms: None,
            active_slot: None,
            cell_cal: fringe_protocol::CalId::NONE,
            product_cal: fringe_protocol::CalId::NONE,
            last_flags: Flags::CLOCK_UNSET,
            write_counter: 0,
            link_errors: 0,
            reference_ratio: 1.0,
            output_ma: 3.5,
            stack_free_bytes: None,
            reading_cost: None,
        };
        assert!(clock_is_set(&status(1_796_083_200_000)));
        assert!(!clock_is_set(&status(6_000)));
    }

    fn passing() -> SelfTest {
        SelfTest {
            storage_ok: true,
            frontend_ok: true,
            temperature_ok: true,
            reference_ok: true,
            flags: Flags::empty(),
        }
    }

    /// A failed check is named with what to do; every check passing is ok;
    /// the reference's text follows whether the cell calibration holds a
    /// value to compare with, and a failed reference fails either way.
    #[test]
    fn self_test_names_each_failed_check_with_what_to_do() {
        let (lines, v, failed) = self_test_report("HGM-L2-0007", &passing(), true);
        assert!(failed.is_empty());
        assert_eq!(v["ok"], true);
        assert_eq!(lines.iter().filter(|l| l.contains(" pass ")).count(), 4);

        let t = SelfTest {
            temperature_ok: false,
            flags: Flags::TEMP_SENSOR_FAULT,
            ..passing()
        };
        let (lines, v, failed) = self_test_report("HGM-L2-0007", &t, true);
        assert_eq!(failed, ["temperature"]);
        assert_eq!(v["ok"], false);
        assert_eq!(v["failed"], json!(["temperature"]));
        let line = lines
            .iter()
            .find(|l| l.trim_start().starts_with("temperature"))
            .unwrap();
        assert!(
            line.contains("FAIL") && line.contains("failure level") && line.contains("wiring"),
            "{line}"
        );
        assert!(lines.last().unwrap().contains("temp_sensor_fault"));

        let t = SelfTest {
            reference_ok: false,
            ..passing()
        };
        for baseline in [false, true] {
            let (lines, v, failed) = self_test_report("HGM-L2-0007", &t, baseline);
            assert_eq!(failed, ["reference"]);
            assert_eq!(v["reference_baseline"], baseline);
            let line = lines
                .iter()
                .find(|l| l.trim_start().starts_with("reference"))
                .unwrap();
            assert_eq!(line.contains("recalibrate the cell"), baseline, "{line}");
        }
        let (lines, _, _) = self_test_report("HGM-L2-0007", &passing(), false);
        assert!(lines.iter().any(|l| l.trim_start().starts_with("reference")
            && l.contains("no reference value to compare")));
    }
}
