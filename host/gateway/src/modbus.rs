//! A Modbus TCP server of the [`LiveTable`] (tokio-modbus).
//!
//! Each device is one unit id. Function 04 (read input registers) answers
//! from the register map of `fringe-registers`. A unit gets one thing
//! written only when its site entry says `[device.density] from =
//! "modbus"`: the plant's bulk density, a float32 in holding registers
//! 0-1, written with function 16 from an address of `[modbus]
//! density_writers` ([`DensityWrites`]; function 03 reads back the last one
//! taken). Every other function and every other write is refused with
//! exception 01 (illegal function). A unit the gateway does not serve is
//! answered with exception 0B (gateway target device failed to respond),
//! the answer the Modbus application protocol specification V1.1b3 gives a
//! gateway for a target it cannot reach.
//!
//! Modbus has no authentication: the server listens on localhost unless the
//! site file says otherwise, and a plant network puts it inside its control
//! zone behind the OT firewall (see `docs/MODBUS.md`). A density changes
//! the moisture a device reports; the list of writers is the only guard
//! here, and an address can be borrowed on a network that lets it.

use std::future;
use std::io;
use std::net::{IpAddr, SocketAddr};
use std::sync::Arc;
use std::time::{Duration, Instant};

use fringe_registers::{map, read_input_registers, with_word_order, Exception, WordOrder};
use tokio::net::TcpListener;
use tokio_modbus::server::tcp::Server;
use tokio_modbus::{ExceptionCode, Request, Response, SlaveRequest};

use crate::density::DensityInbox;
use crate::live::LiveTable;
use crate::site::DensitySource;

/// Holding registers of a unit fed its density over Modbus: 0-1, the bulk
/// density in kg/m3 as a float32.
pub const DENSITY_REGISTERS: u16 = 2;

/// Most Modbus TCP connections open at once. One more is closed as soon as
/// it is accepted (its client connects again later): without a limit a
/// client that opens connections and keeps them (a misconfigured HMI, a
/// scan) took the gateway's file descriptors, and the accept that then
/// failed closed every connection, the PLC's too (tokio-modbus ends its
/// connections with a failed accept). A gateway holds 16 descriptors
/// plus one per device on a serial port (measured at 10 and 100 devices
/// with `cargo xtask bench-gateway --pty`, without MQTT), so about 263 at
/// 247 devices (arithmetic), and the live page at most 64 connections:
/// with these, about 455 of the 1,024 a process gets by default on Linux
/// (systemd's soft limit, from memory).
pub const MAX_CONNECTIONS: usize = 128;

/// Most Modbus TCP connections open at once from one address, so that one
/// client that keeps opening connections cannot take every place: the
/// PLC's own connection is still taken.
pub const MAX_CONNECTIONS_PER_CLIENT: usize = 32;

/// A connection without a request for this long is closed to make room
/// when a new one would pass a limit ([`MAX_CONNECTIONS`] in all or
/// [`MAX_CONNECTIONS_PER_CLIENT`] from its address), the one idle longest
/// first: the places are not held for good by connections a client opened
/// and forgot (four such clients, or one behind an address translation or
/// a tunnel that all clients share, locked a PLC out when it connected
/// again: found by review). Servers that close the connection unused
/// longest when their table is full are common practice (the Modbus TCP
/// implementation guide's connection management, from memory). A PLC
/// polls far more often than once a minute; one that polls less often
/// connects again.
pub const EVICT_IDLE: Duration = Duration::from_secs(60);

/// One open connection: its address, its last request, and the flag that
/// closes it (its stream reads as ended once set).
struct Conn {
    client: IpAddr,
    last: std::sync::Mutex<Instant>,
    closing: std::sync::atomic::AtomicBool,
    waker: std::sync::Mutex<Option<std::task::Waker>>,
}

impl Conn {
    fn close(&self) {
        self.closing
            .store(true, std::sync::atomic::Ordering::SeqCst);
        let w = self.waker.lock().unwrap_or_else(|e| e.into_inner()).take();
        if let Some(w) = w {
            w.wake();
        }
    }

    fn closing(&self) -> bool {
        self.closing.load(std::sync::atomic::Ordering::SeqCst)
    }

    /// Whether the connection is closed, else the task of `cx` is the one
    /// `close` wakes (checked again after the store: closed in between).
    fn closed_for(&self, cx: &std::task::Context<'_>) -> bool {
        if self.closing() {
            return true;
        }
        *self.waker.lock().unwrap_or_else(|e| e.into_inner()) = Some(cx.waker().clone());
        self.closing()
    }

    fn idle(&self, now: Instant) -> Duration {
        now.saturating_duration_since(*self.last.lock().unwrap_or_else(|e| e.into_inner()))
    }
}

/// The connections open (at most [`MAX_CONNECTIONS`]: their counts, in
/// all and per address, are read off the list).
#[derive(Default)]
struct Open {
    conns: Vec<Arc<Conn>>,
    /// The last connection closed to make room (its address and how long
    /// it had gone without a request), until it is said.
    evicted: Option<(IpAddr, Duration)>,
}

impl Open {
    /// Closes the connection idle longest, at least `idle`, of those from
    /// `from` (any address: `None`), and frees its place: whether there
    /// was one.
    fn evict(&mut self, from: Option<IpAddr>, idle: Duration, now: Instant) -> bool {
        let Some((i, _)) = self
            .conns
            .iter()
            .enumerate()
            .filter(|(_, c)| from.is_none_or(|a| a == c.client))
            .map(|(i, c)| (i, c.idle(now)))
            .filter(|(_, d)| *d >= idle)
            .max_by_key(|(_, d)| *d)
        else {
            return false;
        };
        let c = self.conns.swap_remove(i);
        c.close();
        self.evicted = Some((c.client, c.idle(now)));
        true
    }

    /// Connections open from `client`.
    fn from(&self, client: IpAddr) -> usize {
        self.conns.iter().filter(|c| c.client == client).count()
    }
}

/// One open connection, counted until the connection ends (its service is
/// dropped with it) or it is closed to make room ([`EVICT_IDLE`]).
struct Slot {
    open: Arc<std::sync::Mutex<Open>>,
    conn: Arc<Conn>,
}

impl Slot {
    /// A place for a connection from `client`, or why there is none: at a
    /// limit, the place of a connection idle at least `idle` is taken.
    fn take(
        open: &Arc<std::sync::Mutex<Open>>,
        client: IpAddr,
        idle: Duration,
    ) -> Result<Slot, String> {
        let mut o = open.lock().unwrap_or_else(|e| e.into_inner());
        let now = Instant::now();
        if o.from(client) >= MAX_CONNECTIONS_PER_CLIENT && !o.evict(Some(client), idle, now) {
            return Err(format!(
                "{client} has {MAX_CONNECTIONS_PER_CLIENT} connections open, none idle for {} s",
                idle.as_secs_f64()
            ));
        }
        if o.conns.len() >= MAX_CONNECTIONS && !o.evict(None, idle, now) {
            return Err(format!(
                "{MAX_CONNECTIONS} connections are open, none idle for {} s",
                idle.as_secs_f64()
            ));
        }
        let conn = Arc::new(Conn {
            client,
            last: std::sync::Mutex::new(now),
            closing: std::sync::atomic::AtomicBool::new(false),
            waker: std::sync::Mutex::new(None),
        });
        o.conns.push(Arc::clone(&conn));
        Ok(Slot {
            open: Arc::clone(open),
            conn,
        })
    }
}

impl Drop for Slot {
    fn drop(&mut self) {
        let mut o = self.open.lock().unwrap_or_else(|e| e.into_inner());
        // (A connection closed to make room left the list then.)
        if let Some(i) = o.conns.iter().position(|c| Arc::ptr_eq(c, &self.conn)) {
            o.conns.swap_remove(i);
        }
    }
}

/// A connection's stream that reads as ended once its connection is
/// closed to make room (tokio-modbus then ends the connection and drops
/// it); otherwise the socket's.
struct Closable {
    inner: tokio::net::TcpStream,
    conn: Arc<Conn>,
}

impl tokio::io::AsyncRead for Closable {
    fn poll_read(
        mut self: std::pin::Pin<&mut Self>,
        cx: &mut std::task::Context<'_>,
        buf: &mut tokio::io::ReadBuf<'_>,
    ) -> std::task::Poll<io::Result<()>> {
        if self.conn.closed_for(cx) {
            return std::task::Poll::Ready(Ok(()));
        }
        std::pin::Pin::new(&mut self.inner).poll_read(cx, buf)
    }
}

impl tokio::io::AsyncWrite for Closable {
    // A connection closed to make room while its answer waits on a client
    // that does not read ends too (found by review: it held its socket and
    // task for good, past the limits). `close` wakes the task.
    fn poll_write(
        mut self: std::pin::Pin<&mut Self>,
        cx: &mut std::task::Context<'_>,
        buf: &[u8],
    ) -> std::task::Poll<io::Result<usize>> {
        if self.conn.closed_for(cx) {
            return std::task::Poll::Ready(Err(io::ErrorKind::BrokenPipe.into()));
        }
        std::pin::Pin::new(&mut self.inner).poll_write(cx, buf)
    }

    fn poll_flush(
        mut self: std::pin::Pin<&mut Self>,
        cx: &mut std::task::Context<'_>,
    ) -> std::task::Poll<io::Result<()>> {
        if self.conn.closed_for(cx) {
            return std::task::Poll::Ready(Err(io::ErrorKind::BrokenPipe.into()));
        }
        std::pin::Pin::new(&mut self.inner).poll_flush(cx)
    }

    fn poll_shutdown(
        mut self: std::pin::Pin<&mut Self>,
        cx: &mut std::task::Context<'_>,
    ) -> std::task::Poll<io::Result<()>> {
        std::pin::Pin::new(&mut self.inner).poll_shutdown(cx)
    }
}

/// Counts one more event of a kind (`seen`: when last said, how many
/// since) and says it, with how many, at most once per [`SAY_EVERY`].
fn say_now_and_then(
    seen: &std::sync::Mutex<(Option<Instant>, u64)>,
    said: Option<&(dyn Fn(String) + Send + Sync)>,
    words: impl FnOnce(u64) -> String,
) {
    let mut r = seen.lock().unwrap_or_else(|e| e.into_inner());
    r.1 += 1;
    if r.0.is_none_or(|t| t.elapsed() >= SAY_EVERY) {
        if let Some(said) = said {
            said(words(r.1));
        }
        *r = (Some(Instant::now()), 0);
    }
}

/// How often one sender's refused requests of one kind are said: a client
/// that repeats a wrong request (or probes the port) must not bury the
/// gateway's other messages.
pub const SAY_EVERY: std::time::Duration = std::time::Duration::from_secs(60);

/// (sender, kind of refusal) -> when last said, how many not said since.
type Said = std::collections::HashMap<(IpAddr, &'static str), (Instant, u64)>;

/// What a Modbus server may write: the densities of the units whose site
/// entry takes them from Modbus, from the addresses listed.
#[derive(Clone)]
pub struct DensityWrites {
    /// Where the values go (and refusals are said).
    pub inbox: Arc<DensityInbox>,
    /// The units that take their density from Modbus.
    pub units: Vec<u8>,
    /// The addresses that may write (`[modbus] density_writers`).
    pub writers: Vec<IpAddr>,
    /// (sender, kind of refusal) -> when last said, how many since.
    said: Arc<std::sync::Mutex<Said>>,
}

impl DensityWrites {
    /// Writes to `units` from `writers`, into `inbox`.
    pub fn new(inbox: Arc<DensityInbox>, units: Vec<u8>, writers: Vec<IpAddr>) -> Self {
        Self {
            inbox,
            units,
            writers: writers.iter().map(IpAddr::to_canonical).collect(),
            said: Arc::default(),
        }
    }

    /// Says `text` about a request of `kind` from `peer` to `unit`, at most
    /// once per [`SAY_EVERY`] for the same sender and kind (with how many
    /// were not said since).
    fn say(&self, unit: u8, peer: IpAddr, kind: &'static str, text: &str, now: Instant) {
        let mut said = self.said.lock().unwrap_or_else(|e| e.into_inner());
        let e = said.entry((peer, kind)).or_insert((now, u64::MAX));
        if e.1 == u64::MAX || now.saturating_duration_since(e.0) >= SAY_EVERY {
            let more = if e.1 == u64::MAX || e.1 == 0 {
                String::new()
            } else {
                format!(" ({} more like it since it was last said)", e.1)
            };
            *e = (now, 0);
            drop(said);
            self.inbox.say_for(unit, &format!("{text}{more}"));
        } else {
            e.1 += 1;
        }
    }
}

/// The address a client is known by: an IPv4 client on a dual-stack
/// socket arrives as `::ffff:a.b.c.d` and is the IPv4 address.
pub fn peer_ip(addr: SocketAddr) -> IpAddr {
    addr.ip().to_canonical()
}

impl std::fmt::Debug for DensityWrites {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("DensityWrites")
            .field("units", &self.units)
            .field("writers", &self.writers)
            .finish_non_exhaustive()
    }
}

fn words_of(v: f32, order: WordOrder) -> [u16; 2] {
    let b = v.to_bits();
    let (hi, lo) = ((b >> 16) as u16, b as u16);
    match order {
        WordOrder::HighFirst => [hi, lo],
        WordOrder::LowFirst => [lo, hi],
    }
}

fn value_of(w: &[u16], order: WordOrder) -> f32 {
    let (hi, lo) = match order {
        WordOrder::HighFirst => (w[0], w[1]),
        WordOrder::LowFirst => (w[1], w[0]),
    };
    f32::from_bits(u32::from(hi) << 16 | u32::from(lo))
}

/// Answers a request about a unit's density registers (functions 03, 06
/// and 16) from `peer` at `now`; `connected`: whether the gateway has the
/// unit's device on its line now.
///
/// # Errors
/// The Modbus exception the request earns; a write refused is also said
/// through the inbox (its value every time, as from the broker; a wrong
/// sender, address or length at most once a minute per sender).
pub fn answer_density(
    writes: Option<&DensityWrites>,
    unit: u8,
    req: &Request<'_>,
    peer: IpAddr,
    now: Instant,
    order: WordOrder,
    connected: bool,
) -> Result<Response, ExceptionCode> {
    let Some(w) = writes.filter(|w| w.units.contains(&unit)) else {
        return Err(ExceptionCode::IllegalFunction);
    };
    match req {
        Request::ReadHoldingRegisters(addr, count) => {
            if *count == 0 || *count > 125 {
                return Err(ExceptionCode::IllegalDataValue);
            }
            if u32::from(*addr) + u32::from(*count) > u32::from(DENSITY_REGISTERS) {
                return Err(ExceptionCode::IllegalDataAddress);
            }
            let last = w
                .inbox
                .serial_of(unit, DensitySource::Modbus)
                .and_then(|s| w.inbox.latest(&s))
                .map_or(f32::NAN, |o| o.kg_m3);
            let words = words_of(last, order);
            Ok(Response::ReadHoldingRegisters(
                words[usize::from(*addr)..usize::from(*addr + *count)].to_vec(),
            ))
        }
        Request::WriteMultipleRegisters(addr, words) => {
            if !w.writers.contains(&peer) {
                w.say(
                    unit,
                    peer,
                    "sender",
                    &format!(
                        "density write from {peer} to Modbus unit {unit} refused, nothing sent: {peer} is not in the site file's [modbus] density_writers"
                    ),
                    now,
                );
                return Err(ExceptionCode::IllegalFunction);
            }
            if words.is_empty()
                || words.len() > 123
                || *addr != 0
                || words.len() != usize::from(DENSITY_REGISTERS)
            {
                w.say(
                    unit,
                    peer,
                    "shape",
                    &format!(
                        "density write from {peer} to Modbus unit {unit} refused, nothing sent: {} register(s) at address {addr} (4{:04} in 4xxxx numbering); the density is a float32 in the two holding registers at address 0 (40001-40002), written in one request",
                        words.len(),
                        u32::from(*addr) + 1
                    ),
                    now,
                );
                return Err(if words.is_empty() || words.len() > 123 {
                    ExceptionCode::IllegalDataValue
                } else {
                    ExceptionCode::IllegalDataAddress
                });
            }
            let serial = w
                .inbox
                .serial_of(unit, DensitySource::Modbus)
                .filter(|_| connected);
            let Some(serial) = serial else {
                // The device has not answered the gateway yet, or its line
                // is down: nothing can be sent now.
                return Err(ExceptionCode::GatewayTargetDevice);
            };
            let v = value_of(words, order);
            // Its shortest decimal form (1650.5, not 1650.5000000...).
            let v64 = v.to_string().parse().unwrap_or(f64::from(v));
            let source = format!("Modbus TCP unit {unit} from {peer}");
            match w
                .inbox
                .post(&serial, Ok(v64), DensitySource::Modbus, &source, now)
            {
                Ok(_) => Ok(Response::WriteMultipleRegisters(*addr, DENSITY_REGISTERS)),
                Err(_) => Err(ExceptionCode::IllegalDataValue),
            }
        }
        // Half a float cannot be written: both registers, function 16.
        _ => Err(ExceptionCode::IllegalFunction),
    }
}

/// Answers one request from `table` at `now` (the whole logic of the
/// server, callable without a socket).
///
/// # Errors
/// The Modbus exception the request earns.
pub fn answer(
    table: &LiveTable,
    unit: u8,
    req: &Request<'_>,
    now: Instant,
) -> Result<Response, ExceptionCode> {
    answer_in(table, unit, req, now, WordOrder::HighFirst)
}

/// As [`answer`], with the 32-bit values in word order `order`.
///
/// # Errors
/// The Modbus exception the request earns.
pub fn answer_in(
    table: &LiveTable,
    unit: u8,
    req: &Request<'_>,
    now: Instant,
    order: WordOrder,
) -> Result<Response, ExceptionCode> {
    let Request::ReadInputRegisters(..) = *req else {
        return Err(ExceptionCode::IllegalFunction);
    };
    let snapshot = table
        .snapshot(unit, now)
        .ok_or(ExceptionCode::GatewayTargetDevice)?;
    answer_input(&snapshot, req, order)
}

/// Answers function 04 from a unit's `snapshot`.
fn answer_input(
    snapshot: &fringe_registers::Snapshot,
    req: &Request<'_>,
    order: WordOrder,
) -> Result<Response, ExceptionCode> {
    let Request::ReadInputRegisters(addr, count) = *req else {
        return Err(ExceptionCode::IllegalFunction);
    };
    let m = with_word_order(map(snapshot), order);
    read_input_registers(&m, addr, count)
        .map(|words| Response::ReadInputRegisters(words.to_vec()))
        .map_err(|e| match e {
            Exception::IllegalFunction => ExceptionCode::IllegalFunction,
            Exception::IllegalDataAddress => ExceptionCode::IllegalDataAddress,
            Exception::IllegalDataValue => ExceptionCode::IllegalDataValue,
        })
}

struct Service {
    table: Arc<LiveTable>,
    order: WordOrder,
    density: Option<DensityWrites>,
    peer: IpAddr,
    /// This connection's place among [`MAX_CONNECTIONS`] (and its last
    /// request).
    _slot: Slot,
}

impl tokio_modbus::server::Service for Service {
    type Request = SlaveRequest<'static>;
    type Response = Response;
    type Exception = ExceptionCode;
    type Future = future::Ready<Result<Response, ExceptionCode>>;

    fn call(&self, req: Self::Request) -> Self::Future {
        let now = Instant::now();
        *self
            ._slot
            .conn
            .last
            .lock()
            .unwrap_or_else(|e| e.into_inner()) = now;
        let Some(snapshot) = self.table.snapshot(req.slave, now) else {
            // A unit the gateway does not serve, whatever is asked.
            return future::ready(Err(ExceptionCode::GatewayTargetDevice));
        };
        future::ready(match req.request {
            Request::ReadHoldingRegisters(..)
            | Request::WriteSingleRegister(..)
            | Request::WriteMultipleRegisters(..) => answer_density(
                self.density.as_ref(),
                req.slave,
                &req.request,
                self.peer,
                now,
                self.order,
                snapshot.connected,
            ),
            _ => answer_input(&snapshot, &req.request, self.order),
        })
    }
}

/// A Modbus TCP server running on its own thread.
#[derive(Debug)]
pub struct ModbusServer {
    addr: SocketAddr,
    stop: Option<tokio::sync::oneshot::Sender<()>>,
    thread: Option<std::thread::JoinHandle<()>>,
}

impl ModbusServer {
    /// Binds `addr` (port 0 picks a free one) and serves `table` until
    /// [`ModbusServer::stop`] or drop.
    ///
    /// # Errors
    /// When the address cannot be bound (in use, no permission for a port
    /// below 1024) or the runtime cannot start.
    pub fn start(addr: SocketAddr, table: Arc<LiveTable>) -> io::Result<Self> {
        Self::start_in(addr, table, WordOrder::HighFirst)
    }

    /// As [`ModbusServer::start`], serving the 32-bit values in word order
    /// `order` (the site file's `[modbus] word_order`).
    ///
    /// # Errors
    /// As [`ModbusServer::start`].
    pub fn start_in(addr: SocketAddr, table: Arc<LiveTable>, order: WordOrder) -> io::Result<Self> {
        Self::start_with(addr, table, order, None, None)
    }

    /// As [`ModbusServer::start_in`], taking the densities of `density`;
    /// `said` is told, in words, when accepting a connection fails (the
    /// server listens again a second later).
    ///
    /// # Errors
    /// As [`ModbusServer::start`].
    pub fn start_with(
        addr: SocketAddr,
        table: Arc<LiveTable>,
        order: WordOrder,
        density: Option<DensityWrites>,
        said: Option<Arc<dyn Fn(String) + Send + Sync>>,
    ) -> io::Result<Self> {
        Self::start_evicting(addr, table, order, density, said, EVICT_IDLE)
    }

    /// As [`ModbusServer::start_with`], a connection idle at least
    /// `evict_idle` closed to make room at a limit (the gateway: [`EVICT_IDLE`]).
    ///
    /// # Errors
    /// As [`ModbusServer::start`].
    pub fn start_evicting(
        addr: SocketAddr,
        table: Arc<LiveTable>,
        order: WordOrder,
        density: Option<DensityWrites>,
        said: Option<Arc<dyn Fn(String) + Send + Sync>>,
        evict_idle: Duration,
    ) -> io::Result<Self> {
        let rt = tokio::runtime::Builder::new_current_thread()
            .enable_all()
            .build()?;
        let listener = rt.block_on(TcpListener::bind(addr))?;
        let addr = listener.local_addr()?;
        let (tx, rx) = tokio::sync::oneshot::channel::<()>();
        let thread = std::thread::Builder::new()
            .name("modbus-tcp".into())
            .spawn(move || {
                rt.block_on(async move {
                    let server = Server::new(listener);
                    let open = Arc::new(std::sync::Mutex::new(Open::default()));
                    // Connections refused at the limit: said at most once
                    // per SAY_EVERY, with how many since.
                    let refused = std::sync::Mutex::new((None::<Instant>, 0u64));
                    // Connections closed to make room: said likewise.
                    let evicted = std::sync::Mutex::new((None::<Instant>, 0u64));
                    let on_connected = |stream: tokio::net::TcpStream, socket_addr: SocketAddr| {
                        let table = Arc::clone(&table);
                        let density = density.clone();
                        let slot = match Slot::take(&open, peer_ip(socket_addr), evict_idle) {
                            Ok(s) => {
                                let gone = open
                                    .lock()
                                    .unwrap_or_else(|e| e.into_inner())
                                    .evicted
                                    .take();
                                if let Some((from, idle)) = gone {
                                    say_now_and_then(&evicted, said.as_deref(), |n| format!(
                                        "Modbus TCP on {addr}: {n} connection(s) closed to make room at the limits, the last from {from}, {:.0} s without a request, for one from {}",
                                        idle.as_secs_f64(),
                                        peer_ip(socket_addr)
                                    ));
                                }
                                Some(s)
                            }
                            Err(why) => {
                                say_now_and_then(&refused, said.as_deref(), |n| format!(
                                    "Modbus TCP on {addr}: {n} connection(s) refused, the last from {} ({why}): a client that keeps opening connections?",
                                    peer_ip(socket_addr)
                                ));
                                None
                            }
                        };
                        // A client that went away without closing (a PLC
                        // power-cycled, a cable pulled) is found by TCP
                        // keepalive within about 2 minutes and its
                        // connection closed: it held a file descriptor and
                        // a task for good.
                        let keepalive = socket2::TcpKeepalive::new()
                            .with_time(Duration::from_secs(60))
                            .with_interval(Duration::from_secs(10))
                            .with_retries(6);
                        let _ = socket2::SockRef::from(&stream).set_tcp_keepalive(&keepalive);
                        async move {
                            // At the limit: the stream is dropped, which
                            // closes the connection.
                            let Some(slot) = slot else {
                                return Ok(None);
                            };
                            let stream = Closable {
                                inner: stream,
                                conn: Arc::clone(&slot.conn),
                            };
                            Ok(Some((
                                Service {
                                    table,
                                    order,
                                    density,
                                    peer: peer_ip(socket_addr),
                                    _slot: slot,
                                },
                                stream,
                            )))
                        }
                    };
                    // A broken client connection ends only that connection.
                    let on_process_error = |_err: io::Error| {};
                    let mut stop = std::pin::pin!(async move {
                        let _ = rx.await;
                    });
                    // A failed accept (out of file descriptors, a
                    // connection aborted before it was taken) ended the
                    // server for good, silently, and every PLC lost every
                    // unit (found by review): it is said and listening goes
                    // on a second later. (The connections open then are
                    // closed with it; their clients connect again.)
                    loop {
                        tokio::select! {
                            res = server.serve(&on_connected, on_process_error) => {
                                match res {
                                    Ok(()) => break,
                                    Err(e) => {
                                        if let Some(said) = &said {
                                            said(format!(
                                                "Modbus TCP on {addr}: accepting a connection failed ({e}); listening again in 1 s"
                                            ));
                                        }
                                        tokio::select! {
                                            () = tokio::time::sleep(Duration::from_secs(1)) => {}
                                            () = &mut stop => break,
                                        }
                                    }
                                }
                            }
                            () = &mut stop => break,
                        }
                    }
                });
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

    /// Stops listening and waits for the server thread.
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

impl Drop for ModbusServer {
    fn drop(&mut self) {
        self.shutdown();
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use fringe_protocol::{CalId, ChannelValue, Flags, Reading, Seq};
    use std::time::Duration;

    fn reading(counter: u32, moisture: f32) -> Reading {
        Reading {
            seq: Seq { boot: 1, counter },
            time_ms: 1_796_083_200_000,
            channels: [ChannelValue::default(); 2],
            temperature_c: 20.0,
            moisture_pct: Some(moisture),
            uncertainty_pct: 0.1,
            flags: Flags::empty(),
            cell_cal: CalId::NONE,
            product_cal: CalId::NONE,
        }
    }

    #[test]
    fn low_word_first_serves_the_floats_swapped() {
        let t = LiveTable::new(Duration::from_secs(10));
        t.register(1, "HGM-L2-0001");
        let now = Instant::now();
        t.update(1, &reading(5, 14.5), now);
        let ok = answer_in(
            &t,
            1,
            &Request::ReadInputRegisters(0, 14),
            now,
            WordOrder::LowFirst,
        )
        .unwrap();
        let Response::ReadInputRegisters(w) = ok else {
            panic!("{ok:?}")
        };
        // Low word first: the moisture and the known value 1234.5
        // (0x449A5000) with their words swapped.
        assert_eq!(
            f32::from_bits(u32::from(w[1]) << 16 | u32::from(w[0])),
            14.5
        );
        assert_eq!(&w[12..14], &[0x5000, 0x449A]);
    }

    #[test]
    fn only_function_04_of_a_served_unit_is_answered() {
        let t = LiveTable::new(Duration::from_secs(10));
        t.register(3, "HGM-L2-0001");
        let now = Instant::now();
        t.update(3, &reading(5, 14.5), now);
        let ok = answer(&t, 3, &Request::ReadInputRegisters(0, 2), now).unwrap();
        let Response::ReadInputRegisters(w) = ok else {
            panic!("{ok:?}")
        };
        assert_eq!(
            f32::from_bits(u32::from(w[0]) << 16 | u32::from(w[1])),
            14.5
        );
        assert_eq!(
            answer(&t, 4, &Request::ReadInputRegisters(0, 2), now),
            Err(ExceptionCode::GatewayTargetDevice)
        );
        assert_eq!(
            answer(&t, 3, &Request::ReadHoldingRegisters(0, 2), now),
            Err(ExceptionCode::IllegalFunction)
        );
        assert_eq!(
            answer(&t, 3, &Request::WriteSingleRegister(0, 1), now),
            Err(ExceptionCode::IllegalFunction)
        );
        assert_eq!(
            answer(&t, 3, &Request::ReadInputRegisters(24, 2), now),
            Err(ExceptionCode::IllegalDataAddress)
        );
    }

    /// A table serving units 1 and 2, unit 2's density from Modbus from
    /// 10.20.0.5, its device answered as HGM-2; what was told.
    fn fed() -> (DensityWrites, Arc<std::sync::Mutex<Vec<String>>>) {
        let told = Arc::new(std::sync::Mutex::new(Vec::new()));
        let t = Arc::clone(&told);
        let inbox = Arc::new(DensityInbox::new(Arc::new(move |unit, _, text| {
            t.lock().unwrap().push(format!("{unit}: {text}"));
        })));
        inbox.feed("HGM-2", 2, DensitySource::Modbus);
        (
            DensityWrites::new(inbox, vec![2], vec!["10.20.0.5".parse().unwrap()]),
            told,
        )
    }

    #[test]
    fn a_listed_plc_writes_a_density_as_a_float32_and_reads_it_back() {
        let (w, told) = fed();
        let plc: IpAddr = "10.20.0.5".parse().unwrap();
        let now = Instant::now();
        let ask =
            |req: Request<'_>, order| answer_density(Some(&w), 2, &req, plc, now, order, true);
        // Nothing yet: NaN (0x7FC0 0x0000).
        assert_eq!(
            ask(Request::ReadHoldingRegisters(0, 2), WordOrder::HighFirst),
            Ok(Response::ReadHoldingRegisters(vec![0x7FC0, 0]))
        );
        // 1650.5 = 0x44CE5000 (IEEE 754; Python: struct.pack(">f", 1650.5)).
        let words = [0x44CE, 0x5000];
        assert_eq!(
            ask(
                Request::WriteMultipleRegisters(0, words[..].into()),
                WordOrder::HighFirst
            ),
            Ok(Response::WriteMultipleRegisters(0, 2))
        );
        let o = w.inbox.latest("HGM-2").unwrap();
        assert_eq!(o.kg_m3, 1650.5);
        assert_eq!(o.source, "Modbus TCP unit 2 from 10.20.0.5");
        assert_eq!(
            ask(Request::ReadHoldingRegisters(0, 2), WordOrder::HighFirst),
            Ok(Response::ReadHoldingRegisters(words.to_vec()))
        );
        assert_eq!(
            ask(Request::ReadHoldingRegisters(1, 1), WordOrder::LowFirst),
            Ok(Response::ReadHoldingRegisters(vec![0x44CE]))
        );
        // Low word first: the same value with its words swapped.
        assert_eq!(
            ask(
                Request::WriteMultipleRegisters(0, [0x8000, 0x44CE][..].into()),
                WordOrder::LowFirst
            ),
            Ok(Response::WriteMultipleRegisters(0, 2))
        );
        assert_eq!(w.inbox.latest("HGM-2").unwrap().kg_m3, 1652.0);
        assert!(told.lock().unwrap().is_empty());
    }

    #[test]
    fn density_writes_are_refused_with_the_exception_they_earn_and_change_nothing() {
        let (w, told) = fed();
        let plc: IpAddr = "10.20.0.5".parse().unwrap();
        let now = Instant::now();
        let good = [0x44CE, 0x5000];
        let write = |unit, addr, words: &[u16], from: IpAddr| {
            answer_density(
                Some(&w),
                unit,
                &Request::WriteMultipleRegisters(addr, words.into()),
                from,
                now,
                WordOrder::HighFirst,
                true,
            )
        };
        // 1.65 (g/cm3 for kg/m3) = 0x3FD33333; NaN; 6000 = 0x45BB8000.
        assert_eq!(
            write(2, 0, &[0x3FD3, 0x3333], plc),
            Err(ExceptionCode::IllegalDataValue)
        );
        assert_eq!(
            write(2, 0, &[0x7FC0, 0], plc),
            Err(ExceptionCode::IllegalDataValue)
        );
        assert_eq!(
            write(2, 0, &[0x45BB, 0x8000], plc),
            Err(ExceptionCode::IllegalDataValue)
        );
        // Another address, one register, three, past the end.
        assert_eq!(
            write(2, 1, &good, plc),
            Err(ExceptionCode::IllegalDataAddress)
        );
        assert_eq!(
            write(2, 0, &good[..1], plc),
            Err(ExceptionCode::IllegalDataAddress)
        );
        assert_eq!(
            write(2, 0, &[0x44CE, 0x5000, 0], plc),
            Err(ExceptionCode::IllegalDataAddress)
        );
        // A sender not listed, a unit fed from elsewhere (1), no writes configured.
        let other: IpAddr = "10.20.0.6".parse().unwrap();
        assert_eq!(
            write(2, 0, &good, other),
            Err(ExceptionCode::IllegalFunction)
        );
        assert_eq!(write(1, 0, &good, plc), Err(ExceptionCode::IllegalFunction));
        assert_eq!(
            answer_density(
                None,
                2,
                &Request::WriteMultipleRegisters(0, good[..].into()),
                plc,
                now,
                WordOrder::HighFirst,
                true
            ),
            Err(ExceptionCode::IllegalFunction)
        );
        // Half a float (function 06); a read past the two registers.
        let ask = |req: Request<'_>| {
            answer_density(Some(&w), 2, &req, plc, now, WordOrder::HighFirst, true)
        };
        assert_eq!(
            ask(Request::WriteSingleRegister(0, 0x44CE)),
            Err(ExceptionCode::IllegalFunction)
        );
        assert_eq!(
            ask(Request::ReadHoldingRegisters(1, 2)),
            Err(ExceptionCode::IllegalDataAddress)
        );
        assert_eq!(
            ask(Request::ReadHoldingRegisters(0, 0)),
            Err(ExceptionCode::IllegalDataValue)
        );
        assert!(w.inbox.latest("HGM-2").is_none(), "nothing taken");
        let told = told.lock().unwrap().clone();
        // The three bad values (each with the value and the sender), one
        // wrong shape (the other two within the minute: not said), the
        // sender not listed.
        assert_eq!(told.len(), 5, "{told:?}");
        assert!(
            told[0].contains("1.65") && told[0].contains("from 10.20.0.5"),
            "{told:?}"
        );
        assert!(
            told[3].contains("1 register(s) at address 1 (40002")
                || told[3].contains("2 register(s) at address 1 (40002"),
            "{told:?}"
        );
        assert!(
            told[4].starts_with("2: ")
                && told[4].contains("10.20.0.6 is not in the site file's [modbus] density_writers"),
            "{told:?}"
        );
        // A device not yet answered, or whose line is down: the gateway
        // cannot reach it now.
        let (w2, _) = fed();
        let to = |w: &DensityWrites, connected| {
            answer_density(
                Some(w),
                2,
                &Request::WriteMultipleRegisters(0, good[..].into()),
                plc,
                now,
                WordOrder::HighFirst,
                connected,
            )
        };
        assert_eq!(to(&w2, false), Err(ExceptionCode::GatewayTargetDevice));
        w2.inbox.feed("HGM-2", 7, DensitySource::Modbus);
        assert_eq!(to(&w2, true), Err(ExceptionCode::GatewayTargetDevice));
        assert!(w2.inbox.latest("HGM-2").is_none());
    }

    #[test]
    fn a_repeated_refusal_is_said_once_a_minute_with_how_many_were_not() {
        let (w, told) = fed();
        let stranger: IpAddr = "10.99.0.1".parse().unwrap();
        let t0 = Instant::now();
        for k in 0..50u64 {
            let r = answer_density(
                Some(&w),
                2,
                &Request::WriteMultipleRegisters(0, [0x44CE, 0x5000][..].into()),
                stranger,
                t0 + Duration::from_secs(k),
                WordOrder::HighFirst,
                true,
            );
            assert_eq!(r, Err(ExceptionCode::IllegalFunction));
        }
        assert_eq!(told.lock().unwrap().len(), 1);
        let _ = answer_density(
            Some(&w),
            2,
            &Request::WriteMultipleRegisters(0, [0x44CE, 0x5000][..].into()),
            stranger,
            t0 + SAY_EVERY,
            WordOrder::HighFirst,
            true,
        );
        let told = told.lock().unwrap();
        assert_eq!(told.len(), 2, "{told:?}");
        assert!(
            told[1].ends_with("(49 more like it since it was last said)"),
            "{told:?}"
        );
    }

    #[test]
    fn an_ipv4_client_on_a_dual_stack_socket_is_its_ipv4_address() {
        let mapped: SocketAddr = "[::ffff:10.20.0.5]:40000".parse().unwrap();
        assert_eq!(peer_ip(mapped), "10.20.0.5".parse::<IpAddr>().unwrap());
        let v6: SocketAddr = "[fd00::5]:40000".parse().unwrap();
        assert_eq!(peer_ip(v6), "fd00::5".parse::<IpAddr>().unwrap());
        // A writer listed in the mapped form is the same address.
        let (w, _) = fed();
        let w = DensityWrites::new(
            Arc::clone(&w.inbox),
            vec![2],
            vec!["::ffff:10.20.0.5".parse().unwrap()],
        );
        assert_eq!(w.writers, vec!["10.20.0.5".parse::<IpAddr>().unwrap()]);
    }

    #[test]
    fn an_old_reading_goes_stale_and_an_older_one_never_replaces_a_newer() {
        let t = LiveTable::new(Duration::from_secs(10));
        t.register(1, "A");
        let t0 = Instant::now();
        t.update(1, &reading(9, 12.0), t0);
        t.update(1, &reading(8, 11.0), t0);
        let s = t.snapshot(1, t0 + Duration::from_secs(3)).unwrap();
        assert_eq!(s.reading.unwrap().seq.counter, 9);
        assert_eq!(s.age_s, 3);
        assert!(!s.stale);
        assert!(t.snapshot(1, t0 + Duration::from_secs(11)).unwrap().stale);
        t.set_connected(1, false);
        assert!(!t.snapshot(1, t0).unwrap().connected);
    }

    /// A device measuring every 30 s with the site's 10 s stale limit: its
    /// readings go stale after twice its interval, not between every two
    /// readings; a device measuring every second keeps the site's limit.
    #[test]
    fn a_slow_device_is_not_stale_between_its_readings() {
        let t = LiveTable::new(Duration::from_secs(10));
        t.register(1, "SLOW");
        t.register(2, "FAST");
        assert_eq!(
            t.set_interval(1, Duration::from_secs(30)),
            Duration::from_secs(60)
        );
        assert_eq!(
            t.set_interval(2, Duration::from_secs(1)),
            Duration::from_secs(10)
        );
        let t0 = Instant::now();
        t.update(1, &reading(1, 12.0), t0);
        t.update(2, &reading(1, 12.0), t0);
        let at = |u: u8, s: u64| t.snapshot(u, t0 + Duration::from_secs(s)).unwrap().stale;
        assert!(!at(1, 29));
        assert!(!at(1, 59));
        assert!(at(1, 61));
        assert!(at(2, 11));
    }

    /// A device replaced on a unit's line (boot 57 there, boot 2 on the
    /// new one): the unit serves the new device's readings, not the old
    /// one's frozen value; the same device registered again keeps its own.
    #[test]
    fn a_replacement_device_on_a_unit_is_served_from_its_first_reading() {
        let t = LiveTable::new(Duration::from_secs(10));
        t.register(3, "A");
        let t0 = Instant::now();
        let mut old = reading(9, 12.0);
        old.seq.boot = 57;
        t.update(3, &old, t0);
        t.register(3, "A");
        assert_eq!(t.snapshot(3, t0).unwrap().reading.unwrap().seq, old.seq);
        t.register(3, "B");
        assert!(t.snapshot(3, t0).unwrap().reading.is_none());
        let mut new = reading(0, 14.0);
        new.seq.boot = 2;
        t.update(3, &new, t0 + Duration::from_secs(1));
        let s = t.snapshot(3, t0 + Duration::from_secs(1)).unwrap();
        assert_eq!(s.reading.unwrap().seq, new.seq);
        assert!(!s.stale);
        assert_eq!(t.units(), [(3, "B".to_string())]);
    }
}
