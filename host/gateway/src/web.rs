//! The live page for the control room: one read-only page per site that
//! shows every device's latest moisture with its uncertainty, its flags in
//! words, a trend of the last hours, its drift alarms with their advice and
//! the calibration in force, updated every 2 s without a reload.
//!
//! Served by `hyper` (HTTP/1.1) from the binary itself (page, script and
//! style are compiled in: a plant's control-room PC often has no
//! internet), on the address of the site file's `[web] listen`. Only `GET`
//! and `HEAD` without a body are answered (405 or 413 otherwise); nothing
//! on the page changes a device. The page asks for `/api/site` every 2 s.
//!
//! A client on the plant network cannot take the gateway down with it
//! (found by review: the HTTP library before this one read a request body
//! it was not asked to into one buffer of the size the client announced,
//! so one request with a huge `Content-Length` aborted the whole gateway,
//! Modbus and MQTT with it, and it had no time or size limit): a body is
//! never read; headers must arrive within [`HEADER_TIMEOUT`] and fit
//! [`MAX_HEADER_BYTES`]; at most [`MAX_CONNECTIONS`] connections are open
//! at once (more are closed at once), each for at most
//! [`CONNECTION_LIFETIME`]; a failed accept is said and listening goes on.
//!
//! ```text
//! GET /            the page
//! GET /app.js      its script
//! GET /style.css   its style
//! GET /api/site    every device as JSON (the page's own; docs/GATEWAY.md, "The live page")
//! GET /api/site?epoch=E&after=M
//!                  the same, each trend only from point M on where the
//!                  page has the points before it (E and M from its last
//!                  answer; [`LiveTable::views_since`])
//! ```

use std::io;
use std::net::SocketAddr;
use std::sync::Arc;
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use fringe_protocol::Flags;
use fringe_registers as reg;
use serde_json::{json, Value};

use crate::live::{LiveTable, Since, UnitView};

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
        "history": v.history.iter().map(|p| json!([p.time_ms, p.moisture_pct, p.uncertainty_pct, p.flags, p.mark])).collect::<Vec<_>>(),
        "history_full": v.history_full,
        "history_len": v.history_len,
        "alarms": v.alarms,
        "calibration": v.calibration,
        "moisture_basis": v.moisture_basis,
    })
}

/// The whole site as the page's JSON.
pub fn site_json(site: &str, table: &LiveTable, now: Instant) -> Value {
    site_json_since(site, table, now, None)
}

/// As [`site_json`], each trend from `since` on where it can
/// ([`LiveTable::views_since`]); with the `epoch` and `mark` to ask from
/// next time.
pub fn site_json_since(
    site: &str,
    table: &LiveTable,
    now: Instant,
    since: Option<&Since>,
) -> Value {
    let (mark, views) = table.views_since(now, since);
    json!({
        "site": site,
        "now_ms": now_ms(),
        "epoch": table.epoch(),
        "mark": mark,
        "units": views.iter().map(unit_json).collect::<Vec<_>>(),
    })
}

/// The `epoch` and `after` of a query (`None`: neither given).
///
/// # Errors
/// The parameter at fault and why, for a 400 answer: one without the
/// other, an `after` that is not a whole number. Other parameters are
/// ignored.
pub fn parse_since(query: Option<&str>) -> Result<Option<Since>, String> {
    let (mut epoch, mut after) = (None, None);
    for pair in query.unwrap_or("").split('&').filter(|p| !p.is_empty()) {
        let (k, v) = pair.split_once('=').unwrap_or((pair, ""));
        match k {
            "epoch" => epoch = Some(v.to_string()),
            "after" => {
                after = Some(
                    v.parse::<u64>()
                        .map_err(|_| format!("after={v:.40}: not a whole number"))?,
                );
            }
            // Ignored, as before the page asked from a mark (a proxy's
            // or a tool's cache-buster).
            _ => {}
        }
    }
    match (epoch, after) {
        (None, None) => Ok(None),
        (Some(epoch), Some(after)) => Ok(Some(Since { epoch, after })),
        _ => Err("epoch and after go together".into()),
    }
}

/// The live page's server, on its own threads.
pub struct WebServer {
    addr: SocketAddr,
    stop: Option<tokio::sync::oneshot::Sender<()>>,
    thread: Option<std::thread::JoinHandle<()>>,
}

impl std::fmt::Debug for WebServer {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("WebServer")
            .field("addr", &self.addr)
            .finish()
    }
}

/// Time a client has to send a request's headers.
pub const HEADER_TIMEOUT: Duration = Duration::from_secs(10);
/// Largest request head (line and headers) read, bytes.
pub const MAX_HEADER_BYTES: usize = 16 * 1024;
/// Connections served at once; more are closed as they come.
pub const MAX_CONNECTIONS: usize = 64;
/// Longest a connection is kept (a client that stops reading cannot hold
/// one longer; a browser connects again).
pub const CONNECTION_LIFETIME: Duration = Duration::from_secs(300);

impl WebServer {
    /// Binds `addr` (port 0 picks a free one) and serves the page of site
    /// `site` from `table` until [`WebServer::stop`] or drop.
    ///
    /// # Errors
    /// When the address cannot be bound or the runtime cannot start.
    pub fn start(addr: SocketAddr, site: &str, table: Arc<LiveTable>) -> io::Result<Self> {
        Self::start_with(addr, site, table, None)
    }

    /// As [`WebServer::start`]; `said` is told, in words, when accepting a
    /// connection fails (listening goes on a second later).
    ///
    /// # Errors
    /// As [`WebServer::start`].
    pub fn start_with(
        addr: SocketAddr,
        site: &str,
        table: Arc<LiveTable>,
        said: Option<Arc<dyn Fn(String) + Send + Sync>>,
    ) -> io::Result<Self> {
        let rt = tokio::runtime::Builder::new_current_thread()
            .enable_all()
            .build()?;
        let listener = rt.block_on(tokio::net::TcpListener::bind(addr))?;
        let addr = listener.local_addr()?;
        let (tx, rx) = tokio::sync::oneshot::channel::<()>();
        let site: Arc<str> = Arc::from(site);
        let thread = std::thread::Builder::new()
            .name("web".into())
            .spawn(move || {
                rt.block_on(serve(listener, site, table, said, rx));
            })?;
        Ok(Self {
            addr,
            stop: Some(tx),
            thread: Some(thread),
        })
    }

    /// The address it listens on.
    pub fn local_addr(&self) -> SocketAddr {
        self.addr
    }

    /// Stops serving and waits for its thread.
    pub fn stop(mut self) {
        self.shutdown();
    }

    fn shutdown(&mut self) {
        if let Some(tx) = self.stop.take() {
            let _ = tx.send(());
        }
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

impl Drop for WebServer {
    fn drop(&mut self) {
        self.shutdown();
    }
}

/// Whether one coding of an Accept-Encoding header takes gzip: `gzip` or
/// `x-gzip`, unless its weight is 0 (RFC 9110, 12.5.3: "q=0" means not
/// acceptable).
fn takes_gzip(coding: &str) -> bool {
    let mut parts = coding.split(';');
    let name = parts.next().unwrap_or("").trim();
    if !name.eq_ignore_ascii_case("gzip") && !name.eq_ignore_ascii_case("x-gzip") {
        return false;
    }
    !parts.any(|p| {
        p.trim()
            .strip_prefix("q=")
            .or_else(|| p.trim().strip_prefix("Q="))
            .and_then(|q| q.trim().parse::<f64>().ok())
            .is_some_and(|q| q <= 0.0)
    })
}

/// The accept loop: each connection on a task of its own, within the
/// limits of the module doc, until `stop`.
async fn serve(
    listener: tokio::net::TcpListener,
    site: Arc<str>,
    table: Arc<LiveTable>,
    said: Option<Arc<dyn Fn(String) + Send + Sync>>,
    stop: tokio::sync::oneshot::Receiver<()>,
) {
    let slots = Arc::new(tokio::sync::Semaphore::new(MAX_CONNECTIONS));
    let mut stop = std::pin::pin!(stop);
    let addr = listener.local_addr().ok();
    loop {
        let accepted = tokio::select! {
            a = listener.accept() => a,
            _ = &mut stop => return,
        };
        let stream = match accepted {
            Ok((stream, _)) => stream,
            Err(e) => {
                if let Some(said) = &said {
                    said(format!(
                        "live page on {}: accepting a connection failed ({e}); listening again in 1 s",
                        addr.map_or("?".into(), |a| a.to_string())
                    ));
                }
                tokio::select! {
                    () = tokio::time::sleep(Duration::from_secs(1)) => continue,
                    _ = &mut stop => return,
                }
            }
        };
        // Over the limit: closed at once (dropped).
        let Ok(slot) = Arc::clone(&slots).try_acquire_owned() else {
            continue;
        };
        let (site, table) = (Arc::clone(&site), Arc::clone(&table));
        tokio::spawn(async move {
            let _slot = slot;
            let service = hyper::service::service_fn(move |req| {
                let res = answer(&req, &site, &table);
                async move { Ok::<_, std::convert::Infallible>(res) }
            });
            let conn = hyper::server::conn::http1::Builder::new()
                .timer(hyper_util::rt::TokioTimer::new())
                .header_read_timeout(HEADER_TIMEOUT)
                .max_buf_size(MAX_HEADER_BYTES)
                .serve_connection(hyper_util::rt::TokioIo::new(stream), service);
            // At the end of its lifetime a connection finishes the answer
            // under way and closes (a browser connects again; cut off, the
            // page's poll failed and it greyed for a moment), within 10 s
            // more for a client that does not read.
            let mut conn = std::pin::pin!(conn);
            tokio::select! {
                _ = conn.as_mut() => {}
                () = tokio::time::sleep(CONNECTION_LIFETIME) => {
                    conn.as_mut().graceful_shutdown();
                    let _ = tokio::time::timeout(Duration::from_secs(10), conn).await;
                }
            }
        });
    }
}

type Body = http_body_util::Full<hyper::body::Bytes>;

fn plain(status: u16, text: impl Into<Body>) -> hyper::Response<Body> {
    let mut r = hyper::Response::new(text.into());
    *r.status_mut() = hyper::StatusCode::from_u16(status).unwrap_or_default();
    r.headers_mut().insert(
        hyper::header::CONTENT_TYPE,
        hyper::header::HeaderValue::from_static("text/plain; charset=utf-8"),
    );
    r
}

/// `bytes` gzipped (fast level: the answer is built every 2 s per page).
fn gzipped(bytes: &[u8]) -> Option<Vec<u8>> {
    use std::io::Write;
    let mut z = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::fast());
    z.write_all(bytes).ok()?;
    z.finish().ok()
}

/// The answer to one request (its body, if any, is never read).
fn answer<B>(req: &hyper::Request<B>, site: &str, table: &LiveTable) -> hyper::Response<Body> {
    use hyper::header::{self, HeaderValue};
    use hyper::Method;
    let headers = req.headers();
    let has_body = headers.contains_key(header::TRANSFER_ENCODING)
        || headers
            .get(header::CONTENT_LENGTH)
            .is_some_and(|v| v.to_str().ok().and_then(|s| s.trim().parse::<u64>().ok()) != Some(0));
    if has_body {
        let mut r = plain(413, "read-only: no request body is taken\n");
        r.headers_mut()
            .insert(header::CONNECTION, HeaderValue::from_static("close"));
        return r;
    }
    if !matches!(*req.method(), Method::GET | Method::HEAD) {
        let mut r = plain(405, "read-only: only GET\n");
        r.headers_mut()
            .insert(header::ALLOW, HeaderValue::from_static("GET, HEAD"));
        return r;
    }
    let (body, kind) = match req.uri().path() {
        "/" | "/index.html" => (PAGE.to_string(), "text/html; charset=utf-8"),
        "/app.js" => (SCRIPT.to_string(), "text/javascript; charset=utf-8"),
        "/style.css" => (STYLE.to_string(), "text/css; charset=utf-8"),
        "/api/site" => match parse_since(req.uri().query()) {
            Ok(since) => (
                site_json_since(site, table, Instant::now(), since.as_ref()).to_string(),
                "application/json",
            ),
            Err(why) => return plain(400, format!("/api/site: {why}\n")),
        },
        _ => return plain(404, "not found\n"),
    };
    // Gzip where the client takes it (every browser does): a whole site
    // is many MB of trend points (BENCHMARKS.md, "The live page's answer").
    let gzip = body.len() > 1024
        && headers
            .get_all(header::ACCEPT_ENCODING)
            .iter()
            .filter_map(|v| v.to_str().ok())
            .flat_map(|v| v.split(','))
            .any(takes_gzip);
    let (body, gzipped) = match gzip.then(|| gzipped(body.as_bytes())).flatten() {
        Some(z) => (z, true),
        None => (body.into_bytes(), false),
    };
    let mut r = hyper::Response::new(Body::from(body));
    let h = r.headers_mut();
    if gzipped {
        h.insert(header::CONTENT_ENCODING, HeaderValue::from_static("gzip"));
    }
    h.insert(header::VARY, HeaderValue::from_static("accept-encoding"));
    h.insert(header::CONTENT_TYPE, HeaderValue::from_static(kind));
    h.insert(header::CACHE_CONTROL, HeaderValue::from_static("no-store"));
    h.insert(
        header::X_CONTENT_TYPE_OPTIONS,
        HeaderValue::from_static("nosniff"),
    );
    h.insert(
        header::CONTENT_SECURITY_POLICY,
        HeaderValue::from_static("default-src 'self'; style-src 'self'; img-src 'self' data:"),
    );
    r
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

    /// A reading taken before its device's clock was set (its time since
    /// boot) is drawn at the time it was received, not in 1970.
    #[test]
    fn a_reading_of_an_unset_clock_is_drawn_when_it_came() {
        let t = LiveTable::new(Duration::from_secs(30));
        t.register(1, "PLT-A-0002");
        let now_ms = SystemTime::now()
            .duration_since(UNIX_EPOCH)
            .unwrap()
            .as_millis() as u64;
        let at = |boot: u32, counter: u32, time_ms: u64| Reading {
            seq: Seq { boot, counter },
            time_ms,
            moisture_pct: Some(11.0),
            flags: Flags::CLOCK_UNSET,
            ..Reading::default()
        };
        t.update(1, &at(1, 1, 5_000), Instant::now());
        let j = site_json("Plant A", &t, Instant::now());
        let h = j["units"][0]["history"].as_array().unwrap().clone();
        let first = h[0][0].as_u64().unwrap();
        assert!(first >= now_ms && first < now_ms + 60_000, "{h:?}");
    }

    /// The page's query: both parameters or neither; a bad one is named,
    /// one not known is ignored.
    #[test]
    fn the_query_of_api_site_is_read_or_refused_with_its_fault() {
        assert_eq!(parse_since(None), Ok(None));
        assert_eq!(parse_since(Some("")), Ok(None));
        assert_eq!(
            parse_since(Some("epoch=17&after=42")),
            Ok(Some(Since {
                epoch: "17".into(),
                after: 42
            }))
        );
        assert_eq!(
            parse_since(Some("after=-1&epoch=1")),
            Err("after=-1: not a whole number".into())
        );
        assert_eq!(
            parse_since(Some("after=3")),
            Err("epoch and after go together".into())
        );
        assert_eq!(parse_since(Some("_=1764950400")), Ok(None));
    }

    /// `/api/site` gzipped to a client that takes gzip, plain to one that
    /// does not; the same JSON either way.
    #[test]
    fn the_site_goes_gzipped_where_the_client_takes_it() {
        use std::io::{Read, Write};
        let mut t = LiveTable::new(Duration::from_secs(30));
        t.history_step_ms = 0;
        t.register(1, "PLT-A-0001");
        for counter in 1..=200 {
            let r = Reading {
                seq: Seq { boot: 1, counter },
                time_ms: 1_796_083_200_000 + u64::from(counter) * 1000,
                moisture_pct: Some(12.5),
                ..Reading::default()
            };
            t.update(1, &r, Instant::now());
        }
        let web = WebServer::start("127.0.0.1:0".parse().unwrap(), "Plant A", Arc::new(t)).unwrap();
        let get = |accept: &str| -> (String, Vec<u8>) {
            let mut c = std::net::TcpStream::connect(web.local_addr()).unwrap();
            c.set_read_timeout(Some(Duration::from_secs(5))).unwrap();
            write!(
                c,
                "GET /api/site HTTP/1.1\r\nHost: x\r\n{accept}Connection: close\r\n\r\n"
            )
            .unwrap();
            let mut out = Vec::new();
            c.read_to_end(&mut out).unwrap();
            let at = out.windows(4).position(|w| w == b"\r\n\r\n").unwrap();
            (
                String::from_utf8_lossy(&out[..at]).to_lowercase(),
                out[at + 4..].to_vec(),
            )
        };
        let (head, body) = get("Accept-Encoding: br;q=1.0, gzip;q=0.8\r\n");
        assert!(head.contains("content-encoding: gzip"), "{head}");
        let mut json = String::new();
        flate2::read::GzDecoder::new(&body[..])
            .read_to_string(&mut json)
            .unwrap();
        let zipped: Value = serde_json::from_str(&json).unwrap();
        // Refused by its weight (RFC 9110, 12.5.3), and not asked for.
        let (head, _) = get("Accept-Encoding: gzip;q=0, identity\r\n");
        assert!(!head.contains("content-encoding"), "{head}");
        let (head, body) = get("");
        assert!(!head.contains("content-encoding"), "{head}");
        let plain: Value = serde_json::from_slice(&body).unwrap();
        assert_eq!(zipped["units"], plain["units"]);
        assert_eq!(plain["units"][0]["history"].as_array().unwrap().len(), 200);
        web.stop();
    }

    /// One request and its answer on a fresh connection, as text (the
    /// answer read until the server closes or 3 s pass).
    fn exchange(addr: SocketAddr, request: &[u8]) -> String {
        use std::io::{Read, Write};
        let mut c = std::net::TcpStream::connect(addr).unwrap();
        c.set_read_timeout(Some(Duration::from_secs(3))).unwrap();
        c.write_all(request).unwrap();
        let mut out = Vec::new();
        let mut buf = [0u8; 4096];
        while let Ok(n) = c.read(&mut buf) {
            if n == 0 {
                break;
            }
            out.extend_from_slice(&buf[..n]);
            if out.windows(4).any(|w| w == b"\r\n\r\n") && !out.starts_with(b"HTTP/1.1 200") {
                break;
            }
        }
        String::from_utf8_lossy(&out).into_owned()
    }

    /// A client on the plant network cannot take the gateway down: a
    /// request announcing a 100 GB body is refused without reading it
    /// (the HTTP library before this one allocated a buffer of that size
    /// when the request was dropped, which aborts the process); a head that
    /// never ends is cut off at its size limit; connections over the limit
    /// are closed at once; and the page is served all the while.
    #[test]
    fn hostile_clients_are_refused_and_the_page_stays_up() {
        use std::io::{Read, Write};
        let t = Arc::new(LiveTable::new(Duration::from_secs(30)));
        t.register(1, "PLT-A-0001");
        let web = WebServer::start("127.0.0.1:0".parse().unwrap(), "Plant A", t).unwrap();
        let addr = web.local_addr();
        let get = b"GET /api/site HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n";
        let huge = exchange(
            addr,
            b"GET / HTTP/1.1\r\nHost: x\r\nContent-Length: 100000000000\r\n\r\n",
        );
        assert!(huge.starts_with("HTTP/1.1 413"), "{huge}");
        // A query the page would not send: 400, naming what is wrong.
        let bad = exchange(
            addr,
            b"GET /api/site?epoch=1&after=x HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n",
        );
        assert!(
            bad.starts_with("HTTP/1.1 400")
                && bad.contains("/api/site: after=x: not a whole number"),
            "{bad}"
        );
        let post = exchange(addr, b"POST /api/site HTTP/1.1\r\nHost: x\r\n\r\n");
        assert!(
            post.starts_with("HTTP/1.1 405") && post.contains("allow: GET, HEAD"),
            "{post}"
        );
        // A head that never ends: cut off, not read on into memory.
        let mut c = std::net::TcpStream::connect(addr).unwrap();
        c.set_write_timeout(Some(Duration::from_secs(3))).unwrap();
        c.set_read_timeout(Some(Duration::from_secs(5))).unwrap();
        let chunk = [b'a'; 1024];
        let mut sent = 0usize;
        // (A write fails once the server has closed: enough is sent.)
        while sent < 64 * 1024 && c.write_all(&chunk).is_ok() {
            sent += chunk.len();
        }
        let mut buf = [0u8; 256];
        let answer = c.read(&mut buf);
        assert!(
            !matches!(answer, Err(ref e) if e.kind() == std::io::ErrorKind::WouldBlock || e.kind() == std::io::ErrorKind::TimedOut),
            "the connection of an endless head stayed open: {answer:?} after {sent} bytes"
        );
        // Connections over the limit are closed at once.
        let idle: Vec<_> = (0..MAX_CONNECTIONS)
            .map(|_| std::net::TcpStream::connect(addr).unwrap())
            .collect();
        std::thread::sleep(Duration::from_millis(200));
        let mut over = std::net::TcpStream::connect(addr).unwrap();
        over.set_read_timeout(Some(Duration::from_secs(3))).unwrap();
        let closed = over.read(&mut buf);
        assert!(
            matches!(closed, Ok(0))
                || matches!(&closed, Err(e) if e.kind() != std::io::ErrorKind::WouldBlock
                    && e.kind() != std::io::ErrorKind::TimedOut),
            "a connection over the limit was kept: {closed:?}"
        );
        drop(idle);
        std::thread::sleep(Duration::from_millis(200));
        let ok = exchange(addr, get);
        assert!(
            ok.starts_with("HTTP/1.1 200") && ok.contains("PLT-A-0001"),
            "{ok}"
        );
        web.stop();
    }
}
