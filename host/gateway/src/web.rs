//! The live page for the control room: one read-only page per site that
//! shows every device's latest moisture with its uncertainty, its flags in
//! words, a trend of the last hours, its drift alarms with their advice and
//! the calibration in force, updated every 2 s without a reload.
//!
//! Served by `tiny_http` from the binary itself (page, script and style are
//! compiled in: a plant's control-room PC often has no internet), on the
//! address of the site file's `[web] listen`. Only `GET` and `HEAD` are
//! answered (405 otherwise); nothing on the page changes a device. The
//! page asks for `/api/site` every 2 s.
//!
//! ```text
//! GET /            the page
//! GET /app.js      its script
//! GET /style.css   its style
//! GET /api/site    every device as JSON (the page's own; docs/GATEWAY.md, "The live page")
//! ```

use std::io;
use std::net::SocketAddr;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use fringe_protocol::Flags;
use fringe_registers as reg;
use serde_json::{json, Value};

use crate::live::{LiveTable, UnitView};

const PAGE: &str = include_str!("../web/index.html");
const SCRIPT: &str = include_str!("../web/app.js");
const STYLE: &str = include_str!("../web/style.css");

/// Each quality flag: its name, what it means on the line, what to do
/// (the table of the README's "Signal chain and quality flags").
pub const FLAG_WORDS: [(Flags, &str, &str, &str); 12] = [
    (
        Flags::SATURATED,
        "saturated",
        "the signal overran the front end (very wet or salty product, or a short)",
        "check the product is within the sensor's range; if it persists, inspect the electrodes",
    ),
    (
        Flags::NO_PRODUCT,
        "no_product",
        "the window sees air: empty chute or belt",
        "nothing, unless product should be flowing",
    ),
    (
        Flags::OUT_OF_RANGE,
        "out_of_range",
        "moisture or a model input outside what the calibration was made for",
        "take a lab sample; extend the calibration if this product state is normal",
    ),
    (
        Flags::TEMP_OUT_OF_RANGE,
        "temp_out_of_range",
        "product temperature outside the calibration's range",
        "take a lab sample; extend the calibration if this is normal",
    ),
    (
        Flags::FIT_NOT_CONVERGED,
        "fit_not_converged",
        "the two frequencies do not fit the product's model",
        "often a product change or heavy build-up; check the active product",
    ),
    (
        Flags::ELECTRODE_FAULT,
        "electrode_fault",
        "electrodes open or shorted",
        "the value is not usable; inspect the sensor with the line stopped and locked out",
    ),
    (
        Flags::REFERENCE_DRIFT,
        "reference_drift",
        "the internal reference moved beyond 2 % of its value at calibration",
        "verify against a lab sample and recalibrate the cell",
    ),
    (
        Flags::NOT_CALIBRATED,
        "not_calibrated",
        "no cell calibration or no active product calibration",
        "calibrate the cell and select a product",
    ),
    (
        Flags::CLOCK_UNSET,
        "clock_unset",
        "the device clock was not set when the reading was taken",
        "let the gateway set it (it needs the device key)",
    ),
    (
        Flags::LOW_SNR,
        "low_snr",
        "signal too weak against noise",
        "check wiring and grounding, the gap to the product",
    ),
    (
        Flags::TEMP_SENSOR_FAULT,
        "temp_sensor_fault",
        "temperature sensor open, shorted or out of range",
        "no moisture without a temperature; check the sensor",
    ),
    (
        Flags::DENSITY_MISSING,
        "density_missing",
        "the calibration takes the plant's bulk density and none came with the reading",
        "check the density gauge or weigh belt and its connection",
    ),
];

/// The status word's bits in words (docs/MODBUS.md).
const STATUS_WORDS: [(u16, &str); 10] = [
    (reg::STATUS_NO_VALUE, "no valid value"),
    (reg::STATUS_STALE, "stale: no new reading"),
    (reg::STATUS_NE107_FAILURE, "failure (NE 107 F)"),
    (reg::STATUS_NE107_CHECK, "function check (NE 107 C)"),
    (
        reg::STATUS_NE107_OUT_OF_SPEC,
        "out of specification (NE 107 S)",
    ),
    (
        reg::STATUS_NE107_MAINTENANCE,
        "maintenance required (NE 107 M)",
    ),
    (reg::STATUS_NO_PRODUCT, "empty line"),
    (reg::STATUS_CLOCK_UNSET, "device clock unset"),
    (reg::STATUS_DISCONNECTED, "device not connected"),
    (reg::STATUS_NO_READING, "no reading yet"),
];

fn now_ms() -> u64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map_or(0, |d| d.as_millis() as u64)
}

/// One device as the page's JSON.
pub fn unit_json(v: &UnitView) -> Value {
    let status = reg::status_word(&v.snapshot);
    let r = v.snapshot.reading.as_ref();
    let flags: Vec<Value> = r
        .map(|r| {
            FLAG_WORDS
                .iter()
                .filter(|(f, ..)| r.flags.contains(*f))
                .map(|(_, name, meaning, action)| json!({"name": name, "meaning": meaning, "action": action}))
                .collect()
        })
        .unwrap_or_default();
    let valid = status & reg::STATUS_NO_VALUE == 0;
    json!({
        "unit": v.unit,
        "serial": v.serial,
        "tag": v.tag,
        "connected": v.snapshot.connected,
        "stale": v.snapshot.stale,
        "age_s": r.map(|_| v.snapshot.age_s),
        "status": status,
        "status_words": STATUS_WORDS.iter().filter(|(b, _)| status & b != 0).map(|(_, w)| *w).collect::<Vec<_>>(),
        "moisture_pct": r.and_then(|r| r.moisture_pct).filter(|_| valid),
        "uncertainty_pct": r.filter(|_| valid).map(|r| r.uncertainty_pct),
        "temperature_c": r.map(|r| r.temperature_c),
        "time_ms": r.map(|r| r.time_ms),
        "boot": r.map(|r| r.seq.boot),
        "counter": r.map(|r| r.seq.counter),
        "flags": flags,
        "history": v.history.iter().map(|p| json!([p.time_ms, p.moisture_pct, p.uncertainty_pct, p.flags])).collect::<Vec<_>>(),
        "alarms": v.alarms,
        "calibration": v.calibration,
        "moisture_basis": v.moisture_basis,
    })
}

/// The whole site as the page's JSON.
pub fn site_json(site: &str, table: &LiveTable, now: Instant) -> Value {
    json!({
        "site": site,
        "now_ms": now_ms(),
        "units": table.views(now).iter().map(unit_json).collect::<Vec<_>>(),
    })
}

/// The live page's server, on its own threads.
pub struct WebServer {
    addr: SocketAddr,
    server: Arc<tiny_http::Server>,
    stop: Arc<AtomicBool>,
    threads: Vec<std::thread::JoinHandle<()>>,
}

impl std::fmt::Debug for WebServer {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("WebServer")
            .field("addr", &self.addr)
            .finish()
    }
}

impl WebServer {
    /// Binds `addr` (port 0 picks a free one) and serves the page of site
    /// `site` from `table` until [`WebServer::stop`] or drop.
    ///
    /// # Errors
    /// When the address cannot be bound.
    pub fn start(addr: SocketAddr, site: &str, table: Arc<LiveTable>) -> io::Result<Self> {
        let server = tiny_http::Server::http(addr).map_err(|e| io::Error::other(e.to_string()))?;
        let addr = server
            .server_addr()
            .to_ip()
            .ok_or_else(|| io::Error::other("not an IP listener"))?;
        let server = Arc::new(server);
        let stop = Arc::new(AtomicBool::new(false));
        let mut threads = Vec::new();
        for i in 0..2 {
            let (server, stop, table, site) = (
                Arc::clone(&server),
                Arc::clone(&stop),
                Arc::clone(&table),
                site.to_string(),
            );
            threads.push(std::thread::Builder::new().name(format!("web-{i}")).spawn(
                move || {
                    while !stop.load(Ordering::Relaxed) {
                        match server.recv_timeout(Duration::from_millis(200)) {
                            Ok(Some(req)) => {
                                let _ = answer(req, &site, &table);
                            }
                            Ok(None) => {}
                            Err(_) => break,
                        }
                    }
                },
            )?);
        }
        Ok(Self {
            addr,
            server,
            stop,
            threads,
        })
    }

    /// The address it listens on.
    pub fn local_addr(&self) -> SocketAddr {
        self.addr
    }

    /// Stops serving and waits for its threads.
    pub fn stop(mut self) {
        self.shutdown();
    }

    fn shutdown(&mut self) {
        self.stop.store(true, Ordering::Relaxed);
        self.server.unblock();
        for t in self.threads.drain(..) {
            let _ = t.join();
        }
    }
}

impl Drop for WebServer {
    fn drop(&mut self) {
        self.shutdown();
    }
}

fn header(name: &str, value: &str) -> tiny_http::Header {
    tiny_http::Header::from_bytes(name.as_bytes(), value.as_bytes()).expect("static header")
}

fn answer(req: tiny_http::Request, site: &str, table: &LiveTable) -> io::Result<()> {
    use tiny_http::{Method, Response};
    if !matches!(req.method(), Method::Get | Method::Head) {
        return req.respond(
            Response::from_string("read-only: only GET\n")
                .with_status_code(405)
                .with_header(header("Allow", "GET, HEAD")),
        );
    }
    let path = req.url().split('?').next().unwrap_or("/").to_string();
    let (body, kind) = match path.as_str() {
        "/" | "/index.html" => (PAGE.to_string(), "text/html; charset=utf-8"),
        "/app.js" => (SCRIPT.to_string(), "text/javascript; charset=utf-8"),
        "/style.css" => (STYLE.to_string(), "text/css; charset=utf-8"),
        "/api/site" => (
            site_json(site, table, Instant::now()).to_string(),
            "application/json",
        ),
        _ => {
            return req.respond(Response::from_string("not found\n").with_status_code(404));
        }
    };
    req.respond(
        Response::from_string(body)
            .with_header(header("Content-Type", kind))
            .with_header(header("Cache-Control", "no-store"))
            .with_header(header("X-Content-Type-Options", "nosniff"))
            .with_header(header(
                "Content-Security-Policy",
                "default-src 'self'; style-src 'self'; img-src 'self' data:",
            )),
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use fringe_protocol::{CalId, ChannelValue, Reading, Seq};

    #[test]
    fn a_device_in_json_names_its_flags_and_hides_an_invalid_value() {
        let t = LiveTable::new(Duration::from_secs(30));
        t.register(1, "PLT-A-0001");
        let r = Reading {
            seq: Seq {
                boot: 1,
                counter: 5,
            },
            time_ms: 1_796_083_200_000,
            channels: [ChannelValue::default(); 2],
            temperature_c: 20.0,
            moisture_pct: Some(14.2),
            uncertainty_pct: 0.1,
            flags: Flags::NOT_CALIBRATED | Flags::REFERENCE_DRIFT,
            cell_cal: CalId::NONE,
            product_cal: CalId::NONE,
        };
        t.update(1, &r, Instant::now());
        let j = site_json("Plant A", &t, Instant::now());
        let u = &j["units"][0];
        let names: Vec<&str> = u["flags"]
            .as_array()
            .unwrap()
            .iter()
            .map(|f| f["name"].as_str().unwrap())
            .collect();
        assert_eq!(names, ["reference_drift", "not_calibrated"]);
        // Not calibrated is a function check and no valid value: no number shown.
        assert!(u["moisture_pct"].is_null(), "{u}");
        let words = u["status_words"].to_string();
        assert!(
            words.contains("function check") && words.contains("maintenance required"),
            "{words}"
        );
        assert_eq!(u["history"].as_array().unwrap().len(), 1);
    }
}
