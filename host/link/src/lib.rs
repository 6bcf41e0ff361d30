//! # fringe-link: a connection to one device
//!
//! The host's `link` stage (docs/DESIGN.md, docs/ARCHITECTURE.md): frames in
//! and out over a serial port, nothing of the store.
//!
//! [`Link`] opens a port, runs the handshake (Identify, protocol major
//! version check), sends requests with ids and waits for the matching
//! answer with a timeout and retries, hands streamed readings and events to
//! the caller, and reconnects with backoff when the port vanishes. Frames use
//! `fringe_protocol::frame` (COBS, CRC-32); the decoder resynchronises after
//! garbage and its counters are the link-error figures shown to the user.
//!
//! The port is behind the small [`Port`] trait so the logic can be driven by
//! an in-memory device (`fringe-sim`'s simulated port, the tests here);
//! [`SerialOpener`] opens real (or pseudo) serial ports with `serialport`.
//! Errors are typed ([`LinkError`], each naming the port); what a program
//! does with them (an exit code, a retry) is its own business.
#![forbid(unsafe_code)]
#![warn(missing_docs)]

use std::collections::VecDeque;
use std::io;
use std::path::Path;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

use fringe_protocol::auth::Key;
use fringe_protocol::frame::{self, DecoderStats, FrameError};
use fringe_protocol::{
    Capabilities, DeviceFrame, ErrorCode, FrameDecoder, HostFrame, Identity, Request, Response,
    Settings, Status, Version, MAX_FRAME_LEN, PROTOCOL_VERSION,
};

/// What to do about a refusal, for the message (empty when the device's
/// reason says it all).
fn refusal_hint(code: u16, reason: &str) -> &'static str {
    if code != fringe_protocol::ErrorCode::AuthFailed.code() {
        return "";
    }
    if reason.contains("does not verify") {
        "; wrong key file? The key file must hold this device's write key (64 hex digits)"
    } else if reason.contains("needs an auth tag") {
        "; give the device's key file with --key-file (or key_file in the line file)"
    } else if reason.contains("held off") {
        "; the device holds writes off after failed ones (1 s after the fourth in a row, doubling to 64 s): check the key file before trying again"
    } else {
        ""
    }
}

/// A link failure a user can act on. Each names the port.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum LinkError {
    /// No such port.
    #[error("serial port {port} does not exist{}", available_hint(.available))]
    PortMissing {
        /// Port path.
        port: String,
        /// Ports the system lists.
        available: Vec<String>,
    },
    /// Another program holds the port.
    #[error("serial port {port} is busy: another program (another fringe, a terminal program, ModemManager) has it open; close it and try again")]
    PortBusy {
        /// Port path.
        port: String,
    },
    /// No permission to open the port.
    #[error("permission denied opening serial port {port}{}", group_hint(.group))]
    PortPermission {
        /// Port path.
        port: String,
        /// Group owning the device file, if known.
        group: Option<String>,
    },
    /// The path is not a serial port, or it could not be set up.
    #[error("cannot use {port} as a serial port: {reason}")]
    NotASerialPort {
        /// Port path.
        port: String,
        /// What failed.
        reason: String,
    },
    /// The port vanished (adapter unplugged, simulator stopped).
    #[error("serial port {port} went away: {reason}")]
    Disconnected {
        /// Port path.
        port: String,
        /// What the system said.
        reason: String,
    },
    /// Nothing came back.
    #[error("no answer from the device on {port} to {request} after {tries} tries of {timeout_ms} ms: check the port name, the baud rate (--baud), that the device is powered, and the cable")]
    NoAnswer {
        /// Port path.
        port: String,
        /// Request name.
        request: &'static str,
        /// Tries made.
        tries: u32,
        /// Timeout of each try, ms.
        timeout_ms: u64,
    },
    /// Only damaged frames came back.
    #[error("only garbled data from {port} at {baud} baud ({errors} damaged frames, none valid): the baud rate is probably wrong (the device's is on its label and in `fringe identify` at the right rate), or the line is noisy")]
    Garbled {
        /// Port path.
        port: String,
        /// Baud rate used.
        baud: u32,
        /// Damaged frames seen.
        errors: u32,
    },
    /// The device speaks another protocol major version.
    #[error("the device on {port} speaks protocol {theirs}; this fringe speaks {ours} (major versions must match): update {}", if .theirs.major > .ours.major { "fringe" } else { "the device firmware" })]
    Incompatible {
        /// Port path.
        port: String,
        /// Our version.
        ours: Version,
        /// The device's version.
        theirs: Version,
    },
    /// The device refused a request.
    #[error("the device refused {request}: {reason} (error code {code}){hint}")]
    Refused {
        /// Request name.
        request: &'static str,
        /// What to do about it, for the message (`; wrong key file? ...`),
        /// empty when the device's reason says it all.
        hint: &'static str,
        /// Numeric error code.
        code: u16,
        /// The device's reason.
        reason: String,
    },
    /// The device answered with something else than the request calls for.
    #[error("unexpected answer to {request}: {got}")]
    Unexpected {
        /// Request name.
        request: &'static str,
        /// What came.
        got: String,
    },
    /// Other I/O failure on the port.
    #[error("serial port {port}: {reason}")]
    Io {
        /// Port path.
        port: String,
        /// What failed.
        reason: String,
    },
    /// Stopped by the user while waiting (Ctrl-C).
    #[error("stopped")]
    Stopped,
    /// The device's protocol lacks what was asked (an older firmware).
    #[error("{serial} speaks protocol {protocol} and has no {what} (it needs firmware with protocol {needs} or later)")]
    NotSupported {
        /// Device serial.
        serial: String,
        /// Its protocol version.
        protocol: Version,
        /// What it lacks.
        what: &'static str,
        /// The protocol version that has it.
        needs: &'static str,
    },
}

fn available_hint(ports: &[String]) -> String {
    if ports.is_empty() {
        " (no serial ports found: is the adapter plugged in?)".into()
    } else {
        format!(" (ports found: {})", ports.join(", "))
    }
}

fn group_hint(group: &Option<String>) -> String {
    match group {
        Some(g) => format!(
            ": the device file belongs to group `{g}`; add yourself with `sudo usermod -aG {g} $USER` and log in again"
        ),
        None => ": add yourself to the group owning it (often `dialout`) and log in again".into(),
    }
}

impl LinkError {
    /// Whether a reconnect may cure it (the port vanished or is not back yet).
    pub fn is_transient(&self) -> bool {
        matches!(
            self,
            LinkError::Disconnected { .. }
                | LinkError::PortMissing { .. }
                | LinkError::PortBusy { .. }
                | LinkError::NoAnswer { .. }
                | LinkError::Io { .. }
        )
    }
}

/// A byte pipe to a device.
pub trait Port: Send {
    /// Reads what is there, waiting at most `timeout`; `Ok(0)` on timeout.
    ///
    /// # Errors
    /// An error means the port is gone or broken.
    fn read_some(&mut self, buf: &mut [u8], timeout: Duration) -> io::Result<usize>;
    /// Writes all of `bytes`.
    ///
    /// # Errors
    /// An error means the port is gone or broken.
    fn write_all(&mut self, bytes: &[u8]) -> io::Result<()>;
    /// Drops bytes received but not read (stale data after a reconnect).
    ///
    /// # Errors
    /// As [`Port::read_some`].
    fn discard_input(&mut self) -> io::Result<()>;
}

/// Opens the port, again on every reconnect.
pub trait Opener: Send {
    /// Opens the port.
    ///
    /// # Errors
    /// A [`LinkError`] saying why not.
    fn open(&mut self) -> Result<Box<dyn Port>, LinkError>;
    /// The port's name for messages.
    fn name(&self) -> &str;
    /// Baud rate, for messages.
    fn baud(&self) -> u32;
}

/// A serial port opened with `serialport` (real adapter or pseudo-terminal).
pub struct SerialPortPipe(Box<dyn serialport::SerialPort>);

impl Port for SerialPortPipe {
    fn read_some(&mut self, buf: &mut [u8], timeout: Duration) -> io::Result<usize> {
        self.0
            .set_timeout(timeout.max(Duration::from_millis(1)))
            .map_err(io::Error::from)?;
        match self.0.read(buf) {
            Ok(0) => Err(io::Error::new(io::ErrorKind::BrokenPipe, "end of file")),
            Ok(n) => Ok(n),
            Err(e)
                if matches!(
                    e.kind(),
                    io::ErrorKind::TimedOut
                        | io::ErrorKind::Interrupted
                        | io::ErrorKind::WouldBlock
                ) =>
            {
                Ok(0)
            }
            Err(e) => Err(e),
        }
    }
    fn write_all(&mut self, bytes: &[u8]) -> io::Result<()> {
        self.0
            .set_timeout(Duration::from_millis(500))
            .map_err(io::Error::from)?;
        io::Write::write_all(&mut self.0, bytes)?;
        io::Write::flush(&mut self.0)
    }
    fn discard_input(&mut self) -> io::Result<()> {
        self.0
            .clear(serialport::ClearBuffer::Input)
            .map_err(io::Error::from)
    }
}

/// Opens a serial port by path at a baud rate.
#[derive(Debug, Clone)]
pub struct SerialOpener {
    /// Port path (`/dev/ttyUSB0`, `/dev/pts/4`, a symlink to one).
    pub path: String,
    /// Baud rate.
    pub baud: u32,
}

impl Opener for SerialOpener {
    fn open(&mut self) -> Result<Box<dyn Port>, LinkError> {
        open_serial(&self.path, self.baud).map(|p| Box::new(SerialPortPipe(p)) as Box<dyn Port>)
    }
    fn name(&self) -> &str {
        &self.path
    }
    fn baud(&self) -> u32 {
        self.baud
    }
}

/// Opens `path` as a serial port (8N1, no flow control, exclusive).
///
/// # Errors
/// [`LinkError::PortMissing`], [`LinkError::PortBusy`],
/// [`LinkError::PortPermission`] (naming the device file's group) or
/// [`LinkError::NotASerialPort`].
pub fn open_serial(path: &str, baud: u32) -> Result<Box<dyn serialport::SerialPort>, LinkError> {
    let port = path.to_string();
    if !Path::new(path).exists() {
        let available = serialport::available_ports()
            .map(|v| v.into_iter().map(|p| p.port_name).collect())
            .unwrap_or_default();
        return Err(LinkError::PortMissing { port, available });
    }
    match serialport::new(path, baud)
        .timeout(Duration::from_millis(20))
        .open()
    {
        Ok(p) => Ok(p),
        Err(e) => Err(match e.kind() {
            serialport::ErrorKind::NoDevice => LinkError::PortBusy { port },
            serialport::ErrorKind::Io(io::ErrorKind::NotFound) => LinkError::PortMissing {
                port,
                available: Vec::new(),
            },
            serialport::ErrorKind::Io(io::ErrorKind::PermissionDenied) => {
                LinkError::PortPermission {
                    group: owning_group(Path::new(path)),
                    port,
                }
            }
            _ => LinkError::NotASerialPort {
                port,
                reason: e.to_string(),
            },
        }),
    }
}

/// Name of the group owning `path` (read from /etc/group).
fn owning_group(path: &Path) -> Option<String> {
    use std::os::unix::fs::MetadataExt;
    let gid = std::fs::metadata(path).ok()?.gid();
    let groups = std::fs::read_to_string("/etc/group").ok()?;
    groups.lines().find_map(|l| {
        let mut f = l.split(':');
        let name = f.next()?;
        let _pw = f.next()?;
        let id: u32 = f.next()?.parse().ok()?;
        (id == gid).then(|| name.to_string())
    })
}

/// Timeouts, retries and reconnect backoff.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LinkOptions {
    /// Wait for each answer, per try.
    pub timeout: Duration,
    /// Tries per request (at least 1).
    pub tries: u32,
    /// First reconnect delay; doubles up to `backoff_max`.
    pub backoff_min: Duration,
    /// Longest reconnect delay.
    pub backoff_max: Duration,
    /// Handshakes tried on [`Link::connect`] before a garbled or silent
    /// line is reported (a noisy line can spoil one; a wrong baud rate or
    /// a silent device spoils every one).
    pub handshakes: u32,
}

impl Default for LinkOptions {
    fn default() -> Self {
        Self {
            timeout: Duration::from_millis(400),
            tries: 3,
            backoff_min: Duration::from_millis(100),
            backoff_max: Duration::from_secs(5),
            handshakes: 1,
        }
    }
}

/// Counters a user sees as "link errors".
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize)]
pub struct LinkStats {
    /// Frames decoded.
    pub frames: u32,
    /// Damaged frames (all kinds: COBS, CRC, length, version, undecodable).
    pub damaged: u32,
    /// Requests retried after a timeout.
    pub retries: u32,
    /// Reconnects after the port vanished.
    pub reconnects: u32,
}

/// Whether `request` is asked again soon after a damaged frame came
/// ([`after_damage`]) rather than after the whole answer timeout: a read
/// the device answers at once. Not a write (its counter is spent), nor the
/// handshake (only damaged answers to it show a wrong baud rate), nor a
/// request answered after a measurement job (53-316 ms: a damaged frame
/// meanwhile is not its answer, and asking again would queue a second job,
/// logging an extra reading or repeating a flash test).
pub fn asked_again_after_damage(request: &Request) -> bool {
    !request.needs_auth()
        && !matches!(
            request,
            Request::Identify { .. }
                | Request::Measure
                | Request::SelfTest
                | Request::ReferenceCheck
        )
}

/// How long a read waits for an undamaged answer after a damaged frame
/// before it asks again: the time of a largest frame
/// ([`fringe_protocol::frame::MAX_FRAME_LEN`] bytes, 10 bits each) at
/// `baud`, and 20 ms (54 ms at 115,200 baud; at 9,600 baud more than the
/// answer timeout, which then comes first).
pub fn after_damage(baud: u32) -> Duration {
    let bits = fringe_protocol::frame::MAX_FRAME_LEN as u64 * 10;
    Duration::from_micros(bits * 1_000_000 / u64::from(baud.max(1))) + Duration::from_millis(20)
}

/// A short name of a request for messages.
pub fn request_name(r: &Request) -> &'static str {
    match r {
        Request::Identify { .. } => "Identify",
        Request::Status => "Status",
        Request::Measure => "Measure",
        Request::StartStream { .. } => "StartStream",
        Request::StopStream => "StopStream",
        Request::ReadCellCal => "ReadCellCal",
        Request::WriteCellCal(_) => "WriteCellCal",
        Request::ReadProductCal { .. } => "ReadProductCal",
        Request::WriteProductCal { .. } => "WriteProductCal",
        Request::SelectProduct { .. } => "SelectProduct",
        Request::ListProducts => "ListProducts",
        Request::ReferenceCheck => "ReferenceCheck",
        Request::ReadLog { .. } => "ReadLog",
        Request::ReadEvents { .. } => "ReadEvents",
        Request::SetClock { .. } => "SetClock",
        Request::SelfTest => "SelfTest",
        Request::Reboot => "Reboot",
        Request::SetOutput(_) => "SetOutput",
        Request::ReadSettings => "ReadSettings",
        Request::WriteSettings(_) => "WriteSettings",
        Request::ReadModbus => "ReadModbus",
        Request::WriteModbus(_) => "WriteModbus",
        Request::SetDensity { .. } => "SetDensity",
    }
}

/// One connection to one device.
pub struct Link {
    opener: Box<dyn Opener>,
    port: Option<Box<dyn Port>>,
    decoder: FrameDecoder<DeviceFrame>,
    frames: VecDeque<DeviceFrame>,
    next_id: u16,
    opts: LinkOptions,
    identity: Option<Identity>,
    bad_version: Option<Version>,
    stats: LinkStats,
    base: DecoderStats,
}

impl std::fmt::Debug for Link {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Link")
            .field("port", &self.opener.name())
            .field("connected", &self.port.is_some())
            .field("stats", &self.stats)
            .finish()
    }
}

impl Link {
    /// Opens the port and runs the handshake.
    ///
    /// # Errors
    /// Any [`LinkError`] of opening or the handshake.
    pub fn connect(opener: Box<dyn Opener>, opts: LinkOptions) -> Result<Self, LinkError> {
        let mut link = Link {
            opener,
            port: None,
            decoder: FrameDecoder::new(),
            frames: VecDeque::new(),
            next_id: 1,
            opts,
            identity: None,
            bad_version: None,
            stats: LinkStats::default(),
            base: DecoderStats::default(),
        };
        let mut tries = 0;
        loop {
            tries += 1;
            match link.open_and_handshake() {
                Ok(_) => return Ok(link),
                Err(LinkError::Garbled { .. } | LinkError::NoAnswer { .. })
                    if tries < link.opts.handshakes =>
                {
                    link.port = None;
                }
                Err(e) => return Err(e),
            }
        }
    }

    /// Opens a serial port at `baud` and runs the handshake.
    ///
    /// # Errors
    /// As [`Link::connect`].
    pub fn serial(path: &str, baud: u32, opts: LinkOptions) -> Result<Self, LinkError> {
        Self::connect(
            Box::new(SerialOpener {
                path: path.into(),
                baud,
            }),
            opts,
        )
    }

    /// The device's identity from the last handshake.
    pub fn identity(&self) -> Option<&Identity> {
        self.identity.as_ref()
    }

    /// The device serial from the last handshake ("" before one).
    pub fn serial_number(&self) -> &str {
        self.identity.as_ref().map_or("", |i| i.serial.as_str())
    }

    /// The port's name.
    pub fn port_name(&self) -> &str {
        self.opener.name()
    }

    /// Link counters so far (decoder counters summed over reconnects).
    pub fn stats(&self) -> LinkStats {
        let d = self.decoder.stats();
        LinkStats {
            frames: self.base.frames + d.frames,
            damaged: self.base.errors() + d.errors(),
            ..self.stats
        }
    }

    /// Whether the port is open.
    pub fn is_connected(&self) -> bool {
        self.port.is_some()
    }

    fn open_and_handshake(&mut self) -> Result<Identity, LinkError> {
        let mut port = self.opener.open()?;
        // Drop stale bytes, then lead with a delimiter so the device drops
        // any partial frame it holds.
        let name = self.opener.name().to_string();
        let io_err = |e: io::Error| LinkError::Disconnected {
            port: name.clone(),
            reason: e.to_string(),
        };
        port.discard_input().map_err(io_err)?;
        port.write_all(&[0]).map_err(io_err)?;
        let d = self.decoder.stats();
        self.base = DecoderStats {
            frames: self.base.frames + d.frames,
            bad_cobs: self.base.bad_cobs + d.bad_cobs,
            truncated: self.base.truncated + d.truncated,
            too_long: self.base.too_long + d.too_long,
            bad_crc: self.base.bad_crc + d.bad_crc,
            bad_version: self.base.bad_version + d.bad_version,
            undecodable: self.base.undecodable + d.undecodable,
            dropped_bytes: self.base.dropped_bytes + d.dropped_bytes,
        };
        self.decoder = FrameDecoder::new();
        self.frames.clear();
        self.port = Some(port);
        self.bad_version = None;
        let resp = self.request_inner(
            Request::Identify {
                host: PROTOCOL_VERSION,
            },
            None,
        );
        let resp = match resp {
            Err(LinkError::Refused { code, .. })
                if code == ErrorCode::UnsupportedVersion.code() =>
            {
                return Err(LinkError::Incompatible {
                    port: self.opener.name().into(),
                    ours: PROTOCOL_VERSION,
                    theirs: self.bad_version.unwrap_or(Version { major: 0, minor: 0 }),
                })
            }
            r => r?,
        };
        match resp {
            Response::Identity(id) => {
                PROTOCOL_VERSION
                    .check_compatible(id.protocol)
                    .map_err(|m| LinkError::Incompatible {
                        port: self.opener.name().into(),
                        ours: m.ours,
                        theirs: m.theirs,
                    })?;
                self.identity = Some(id.clone());
                Ok(id)
            }
            other => Err(LinkError::Unexpected {
                request: "Identify",
                got: format!("{other:?}"),
            }),
        }
    }

    /// Closes the port and opens it again (with backoff) until the
    /// handshake succeeds or `stop` is set. The device must keep its serial.
    ///
    /// # Errors
    /// [`LinkError::Stopped`], or a non-transient error (permission, version).
    pub fn reconnect(&mut self, stop: &AtomicBool) -> Result<Identity, LinkError> {
        self.port = None;
        let mut delay = self.opts.backoff_min;
        loop {
            if stop.load(Ordering::Relaxed) {
                return Err(LinkError::Stopped);
            }
            match self.open_and_handshake() {
                Ok(id) => {
                    self.stats.reconnects += 1;
                    return Ok(id);
                }
                Err(e) if e.is_transient() || matches!(e, LinkError::Garbled { .. }) => {
                    self.port = None;
                }
                Err(e) => return Err(e),
            }
            let until = Instant::now() + delay;
            while Instant::now() < until {
                if stop.load(Ordering::Relaxed) {
                    return Err(LinkError::Stopped);
                }
                std::thread::sleep(Duration::from_millis(20));
            }
            delay = (delay * 2).min(self.opts.backoff_max);
        }
    }

    fn send(&mut self, frame: &HostFrame) -> Result<(), LinkError> {
        let mut buf = [0u8; MAX_FRAME_LEN];
        let n = frame::encode(frame, &mut buf).map_err(|e| LinkError::Unexpected {
            request: request_name(&frame.request),
            got: format!("cannot encode: {e}"),
        })?;
        let name = self.opener.name().to_string();
        let port = self.port.as_mut().ok_or_else(|| LinkError::Disconnected {
            port: name.clone(),
            reason: "not connected".into(),
        })?;
        if let Err(e) = port.write_all(&buf[..n]) {
            self.port = None;
            return Err(LinkError::Disconnected {
                port: name,
                reason: e.to_string(),
            });
        }
        Ok(())
    }

    /// Reads one chunk (waiting at most `timeout`) and decodes it.
    fn fill(&mut self, timeout: Duration) -> Result<(), LinkError> {
        let name = self.opener.name().to_string();
        let port = self.port.as_mut().ok_or_else(|| LinkError::Disconnected {
            port: name.clone(),
            reason: "not connected".into(),
        })?;
        let mut buf = [0u8; 4096];
        let n = match port.read_some(&mut buf, timeout) {
            Ok(n) => n,
            Err(e) => {
                self.port = None;
                return Err(LinkError::Disconnected {
                    port: name,
                    reason: e.to_string(),
                });
            }
        };
        for r in self.decoder.push(&buf[..n]) {
            match r {
                Ok(f) => self.frames.push_back(f),
                Err(FrameError::UnsupportedVersion(v)) => self.bad_version = Some(v),
                Err(_) => {}
            }
        }
        Ok(())
    }

    /// The answer to any of `ids` (the tries of one request: a late answer
    /// to an earlier try is as good as the answer to the last).
    fn take_answer(&mut self, ids: &[u16]) -> Option<Result<Response, (u16, String)>> {
        let i = self.frames.iter().position(|f| match f {
            DeviceFrame::Response { id: r, .. } | DeviceFrame::Error { id: r, .. } => {
                ids.contains(r)
            }
            _ => false,
        })?;
        match self.frames.remove(i)? {
            DeviceFrame::Response { response, .. } => Some(Ok(response)),
            DeviceFrame::Error { code, reason, .. } => Some(Err((code.code(), reason.to_string()))),
            _ => None,
        }
    }

    /// Sends `request` and waits for its answer, retrying after a timeout.
    /// Streamed readings and events that arrive meanwhile are kept for
    /// [`Link::next_frame`].
    ///
    /// # Errors
    /// [`LinkError::NoAnswer`], [`LinkError::Garbled`] (only damaged frames
    /// came), [`LinkError::Refused`], [`LinkError::Disconnected`].
    pub fn request(&mut self, request: Request) -> Result<Response, LinkError> {
        self.request_inner(request, None)
    }

    /// Sends a request that changes the device, signed with the device key
    /// (HMAC, `fringe_protocol::auth`); the counter is one above the
    /// device's stored one (read with a Status request first). A repeated
    /// try refused as a replay is checked against the device's stored
    /// counter: the write landed if it is this write's (its Ack was lost).
    ///
    /// # Errors
    /// As [`Link::request`].
    pub fn request_signed(&mut self, request: Request, key: &Key) -> Result<Response, LinkError> {
        self.request_signed_counted(request, key).0
    }

    /// [`Link::request_signed`], with the counter the write was signed with
    /// (`None`: it was not sent, the device's counter could not be read
    /// first). Where no answer came, the device's stored counter equal to
    /// it says the write landed (`fringe_device::landed`).
    pub fn request_signed_counted(
        &mut self,
        request: Request,
        key: &Key,
    ) -> (Result<Response, LinkError>, Option<u32>) {
        let counter = match self.request(Request::Status) {
            Ok(Response::Status(s)) => s.write_counter.wrapping_add(1),
            Ok(other) => {
                return (
                    Err(LinkError::Unexpected {
                        request: "Status",
                        got: format!("{other:?}"),
                    }),
                    None,
                )
            }
            Err(e) => return (Err(e), None),
        };
        (self.send_signed(request, key, counter), Some(counter))
    }

    fn send_signed(
        &mut self,
        request: Request,
        key: &Key,
        counter: u32,
    ) -> Result<Response, LinkError> {
        let serial = self.serial_number().to_string();
        let auth = fringe_protocol::auth::sign(key, &serial, counter, &request);
        let retries_before = self.stats.retries;
        match self.request_inner(request, auth) {
            // A repeated try refused as a replay: the first try may have
            // landed and only its Ack been lost. The device stores the
            // counter of the last write it accepted, so it says which: if
            // that is this write's counter, the write took effect (every
            // write is answered with a plain Ack).
            Err(e)
                if self.stats.retries > retries_before
                    && matches!(&e, LinkError::Refused { code, reason, .. }
                        if *code == fringe_protocol::ErrorCode::AuthFailed.code()
                            && reason.as_str() == fringe_protocol::AuthFailure::Replay.reason()) =>
            {
                match self.request(Request::Status)? {
                    Response::Status(s) if s.write_counter == counter => Ok(Response::Ack),
                    _ => Err(e),
                }
            }
            other => other,
        }
    }

    /// Sends a request that changes the device, signed with `key` and this
    /// `counter` as it stands (for [`Request::SetDensity`], whose counter is
    /// a sequence of its own; see `protocol/WIRE.md`). No check of a
    /// refused repeat: the device answers the same signed density again.
    ///
    /// # Errors
    /// As [`Link::request`].
    pub fn request_signed_with(
        &mut self,
        request: Request,
        key: &Key,
        counter: u32,
    ) -> Result<Response, LinkError> {
        let serial = self.serial_number().to_string();
        let auth = fringe_protocol::auth::sign(key, &serial, counter, &request);
        self.request_inner(request, auth)
    }

    fn request_inner(
        &mut self,
        request: Request,
        auth: Option<fringe_protocol::Auth>,
    ) -> Result<Response, LinkError> {
        let name = request_name(&request);
        let tries = self.opts.tries.max(1);
        // A try answered only by damaged frames shows the device is there
        // on a noisy line: a read gets up to twice as many more of those
        // (a long log chunk is damaged far more often than a short frame).
        // A write is not repeated beyond `tries` (its counter is spent),
        // nor the handshake (only damaged answers to it diagnose a wrong
        // baud rate; `LinkOptions::handshakes` repeats it on a noisy line).
        let once = request.needs_auth() || matches!(request, Request::Identify { .. });
        let soon = asked_again_after_damage(&request);
        let most = if once { tries } else { tries * 3 };
        let errors_before = self.stats().damaged;
        let frames_before = self.stats().frames;
        let mut ids = Vec::with_capacity(most as usize);
        let (mut attempt, mut plain) = (0u32, 0u32);
        loop {
            attempt += 1;
            let damaged_before = self.stats().damaged;
            let id = self.next_id;
            self.next_id = self.next_id.wrapping_add(1).max(1);
            ids.push(id);
            self.send(&HostFrame {
                id,
                auth,
                request: request.clone(),
            })?;
            let mut deadline = Instant::now() + self.opts.timeout;
            let mut shortened = false;
            loop {
                match self.take_answer(&ids) {
                    Some(Ok(r)) => return Ok(r),
                    Some(Err((code, reason))) => {
                        if code == ErrorCode::Busy.code() && attempt < most {
                            std::thread::sleep(Duration::from_millis(20));
                            break;
                        }
                        return Err(LinkError::Refused {
                            request: name,
                            hint: refusal_hint(code, &reason),
                            code,
                            reason,
                        });
                    }
                    None => {}
                }
                let now = Instant::now();
                if now >= deadline {
                    break;
                }
                self.fill((deadline - now).min(Duration::from_millis(50)))?;
                // A damaged frame came: most likely the answer, which will
                // not come again by itself. A read answered at once is
                // asked again after a short wait for an undamaged answer
                // (the damaged frame may have been a streamed reading)
                // instead of the whole timeout; an answer to any earlier
                // try still counts. Not a write (its counter is spent), the
                // handshake, nor a request answered after a measurement job.
                if soon && !shortened && self.stats().damaged > damaged_before {
                    shortened = true;
                    deadline = deadline.min(Instant::now() + after_damage(self.opener.baud()));
                }
            }
            if self.stats().damaged == damaged_before {
                plain += 1;
            }
            if plain >= tries || attempt >= most {
                break;
            }
            self.stats.retries += 1;
        }
        let s = self.stats();
        if let Some(theirs) = self.bad_version {
            return Err(LinkError::Incompatible {
                port: self.opener.name().into(),
                ours: PROTOCOL_VERSION,
                theirs,
            });
        }
        if s.frames == frames_before && s.damaged > errors_before {
            return Err(LinkError::Garbled {
                port: self.opener.name().into(),
                baud: self.opener.baud(),
                errors: s.damaged - errors_before,
            });
        }
        Err(LinkError::NoAnswer {
            port: self.opener.name().into(),
            request: name,
            tries,
            timeout_ms: self.opts.timeout.as_millis() as u64,
        })
    }

    /// The device's status.
    ///
    /// # Errors
    /// As [`Link::request`]; [`LinkError::Unexpected`] for another answer.
    pub fn status(&mut self) -> Result<Status, LinkError> {
        match self.request(Request::Status)? {
            Response::Status(s) => Ok(s),
            other => Err(LinkError::Unexpected {
                request: "Status",
                got: format!("{other:?}"),
            }),
        }
    }

    /// The device's settings (protocol 1.1 on).
    ///
    /// # Errors
    /// [`LinkError::NotSupported`] for a device without settings; as
    /// [`Link::request`].
    pub fn settings(&mut self) -> Result<Settings, LinkError> {
        if let Some(id) = self.identity() {
            if !id.capabilities.contains(Capabilities::SETTINGS) {
                return Err(LinkError::NotSupported {
                    serial: id.serial.to_string(),
                    protocol: id.protocol,
                    what: "settings to read or write",
                    needs: "1.1",
                });
            }
        }
        match self.request(Request::ReadSettings)? {
            Response::Settings(s) => Ok(s),
            other => Err(LinkError::Unexpected {
                request: "ReadSettings",
                got: format!("{other:?}"),
            }),
        }
    }

    /// Whether the device keeps Modbus RTU settings (protocol 1.2 on;
    /// `false` before the handshake).
    pub fn has_modbus_settings(&self) -> bool {
        self.identity()
            .is_some_and(|id| id.capabilities.contains(Capabilities::MODBUS_RTU))
    }

    /// The device's Modbus RTU settings (protocol 1.2 on).
    ///
    /// # Errors
    /// [`LinkError::NotSupported`] for a device without them (firmware
    /// before protocol 1.2); as [`Link::request`].
    pub fn modbus(&mut self) -> Result<fringe_protocol::ModbusSettings, LinkError> {
        if let Some(id) = self.identity() {
            if !id.capabilities.contains(Capabilities::MODBUS_RTU) {
                return Err(LinkError::NotSupported {
                    serial: id.serial.to_string(),
                    protocol: id.protocol,
                    what: "Modbus RTU settings to read or write",
                    needs: "1.2",
                });
            }
        }
        match self.request(Request::ReadModbus)? {
            Response::Modbus(m) => Ok(m),
            other => Err(LinkError::Unexpected {
                request: "ReadModbus",
                got: format!("{other:?}"),
            }),
        }
    }

    /// The sequence number of the last reading received and not yet handed
    /// out by [`Link::next_frame`] (streamed while a request was answered).
    pub fn last_queued_reading(&self) -> Option<fringe_protocol::Seq> {
        self.frames.iter().rev().find_map(|f| match f {
            DeviceFrame::Reading(r) => Some(r.seq),
            _ => None,
        })
    }

    /// The next streamed reading or event, waiting at most `timeout`
    /// (`Ok(None)` when nothing came). Stale answers are dropped.
    ///
    /// # Errors
    /// [`LinkError::Disconnected`] when the port vanished.
    pub fn next_frame(&mut self, timeout: Duration) -> Result<Option<DeviceFrame>, LinkError> {
        let deadline = Instant::now() + timeout;
        loop {
            while let Some(f) = self.frames.pop_front() {
                if matches!(f, DeviceFrame::Reading(_) | DeviceFrame::Event(_)) {
                    return Ok(Some(f));
                }
            }
            let now = Instant::now();
            if now >= deadline {
                return Ok(None);
            }
            self.fill(deadline - now)?;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::sync::mpsc;

    /// An in-memory port whose far end is a closure answering host frames.
    struct FakePort {
        rx: mpsc::Receiver<Vec<u8>>,
        tx: mpsc::Sender<Vec<u8>>,
    }

    impl Port for FakePort {
        fn read_some(&mut self, buf: &mut [u8], timeout: Duration) -> io::Result<usize> {
            match self.rx.recv_timeout(timeout) {
                Ok(b) => {
                    let n = b.len().min(buf.len());
                    buf[..n].copy_from_slice(&b[..n]);
                    Ok(n)
                }
                Err(mpsc::RecvTimeoutError::Timeout) => Ok(0),
                Err(mpsc::RecvTimeoutError::Disconnected) => {
                    Err(io::Error::new(io::ErrorKind::BrokenPipe, "gone"))
                }
            }
        }
        fn write_all(&mut self, bytes: &[u8]) -> io::Result<()> {
            self.tx
                .send(bytes.to_vec())
                .map_err(|_| io::Error::new(io::ErrorKind::BrokenPipe, "gone"))
        }
        fn discard_input(&mut self) -> io::Result<()> {
            while self.rx.try_recv().is_ok() {}
            Ok(())
        }
    }

    type Answer = Box<dyn FnMut(&HostFrame) -> Vec<u8> + Send>;

    /// Opens fake ports served by a thread running `answer`.
    struct FakeOpener(std::sync::Arc<std::sync::Mutex<Answer>>);

    impl Opener for FakeOpener {
        fn open(&mut self) -> Result<Box<dyn Port>, LinkError> {
            let (to_dev, dev_rx) = mpsc::channel::<Vec<u8>>();
            let (dev_tx, from_dev) = mpsc::channel::<Vec<u8>>();
            let answer = self.0.clone();
            std::thread::spawn(move || {
                let mut dec = FrameDecoder::<HostFrame>::new();
                while let Ok(bytes) = dev_rx.recv() {
                    let frames: Vec<_> = dec.push(&bytes).collect();
                    for f in frames.into_iter().flatten() {
                        let out = (answer.lock().unwrap())(&f);
                        if !out.is_empty() && dev_tx.send(out).is_err() {
                            return;
                        }
                    }
                }
            });
            Ok(Box::new(FakePort {
                rx: from_dev,
                tx: to_dev,
            }))
        }
        fn name(&self) -> &str {
            "fake0"
        }
        fn baud(&self) -> u32 {
            115_200
        }
    }

    fn identity(protocol: Version) -> Identity {
        Identity {
            serial: fringe_protocol::short_string("HGM-L2-0001"),
            firmware: [0, 1, 0],
            protocol,
            capabilities: Default::default(),
            boot: 1,
            freqs_hz: [1e6, 20e6],
        }
    }

    fn enc(f: &DeviceFrame) -> Vec<u8> {
        frame::encode_vec(f).unwrap().to_vec()
    }

    fn fake(answer: impl FnMut(&HostFrame) -> Vec<u8> + Send + 'static) -> Box<dyn Opener> {
        Box::new(FakeOpener(std::sync::Arc::new(std::sync::Mutex::new(
            Box::new(answer),
        ))))
    }

    /// Short enough that the tests that wait out a lost answer stay quick,
    /// long enough that an answer on a busy machine is not taken for lost.
    fn quick() -> LinkOptions {
        LinkOptions {
            timeout: Duration::from_millis(400),
            tries: 3,
            backoff_min: Duration::from_millis(5),
            backoff_max: Duration::from_millis(20),
            handshakes: 1,
        }
    }

    /// A device for the signed-write tests: stores the counter of the last
    /// write it accepted, refuses a counter not above it as the firmware
    /// does ("auth counter not above stored"), and loses the Ack of its
    /// first `lose` accepted writes. Returns the answer closure and the
    /// number of writes it applied.
    fn counting_device(
        lose: u32,
        stored_by_other: Option<u32>,
    ) -> (
        impl FnMut(&HostFrame) -> Vec<u8> + Send + 'static,
        std::sync::Arc<std::sync::atomic::AtomicU32>,
    ) {
        let applied = std::sync::Arc::new(std::sync::atomic::AtomicU32::new(0));
        let count = applied.clone();
        let mut stored = 0u32;
        let mut lost = 0u32;
        let answer = move |f: &HostFrame| match &f.request {
            Request::Identify { .. } => enc(&DeviceFrame::Response {
                id: f.id,
                response: Response::Identity(identity(PROTOCOL_VERSION)),
            }),
            Request::Status => enc(&DeviceFrame::Response {
                id: f.id,
                response: Response::Status(Status {
                    time_ms: 0,
                    uptime_ms: 0,
                    boot: 1,
                    next_seq: fringe_protocol::Seq::default(),
                    log_first: fringe_protocol::Seq::default(),
                    log_len: 0,
                    next_event: 0,
                    stream_period_ms: None,
                    active_slot: None,
                    cell_cal: fringe_protocol::CalId::NONE,
                    product_cal: fringe_protocol::CalId::NONE,
                    last_flags: fringe_protocol::Flags::empty(),
                    write_counter: stored,
                    link_errors: 0,
                    reference_ratio: 1.0,
                    output_ma: 4.0,
                    stack_free_bytes: None,
                    reading_cost: None,
                }),
            }),
            _ => {
                let counter = f.auth.map_or(0, |a| a.counter);
                if counter <= stored {
                    return enc(&DeviceFrame::Error {
                        id: f.id,
                        code: ErrorCode::AuthFailed,
                        reason: fringe_protocol::short_string(
                            fringe_protocol::AuthFailure::Replay.reason(),
                        ),
                    });
                }
                stored = counter;
                count.fetch_add(1, std::sync::atomic::Ordering::SeqCst);
                if let Some(other) = stored_by_other {
                    // Another host's write lands between our tries.
                    stored = other;
                }
                if lost < lose {
                    lost += 1;
                    return Vec::new();
                }
                enc(&DeviceFrame::Response {
                    id: f.id,
                    response: Response::Ack,
                })
            }
        };
        (answer, applied)
    }

    /// Regression: a signed write whose Ack was lost was tried again with
    /// the same counter, refused as a replay, and reported as refused
    /// ("auth counter not above stored") although it had taken effect. The
    /// link now asks the device for its stored counter: its own counter
    /// there means the write landed.
    #[test]
    fn a_signed_write_whose_ack_was_lost_is_reported_as_done() {
        let key = [7u8; fringe_protocol::auth::KEY_LEN];
        let (answer, applied) = counting_device(1, None);
        let mut link = Link::connect(fake(answer), quick()).expect("connect");
        let r = link
            .request_signed(Request::Reboot, &key)
            .expect("the write landed on the first try");
        assert_eq!(r, Response::Ack);
        assert_eq!(applied.load(std::sync::atomic::Ordering::SeqCst), 1);
        assert!(link.stats().retries >= 1, "{:?}", link.stats());
        // The next write signs above it and goes through as usual.
        let (answer, applied) = counting_device(0, None);
        let mut link = Link::connect(fake(answer), quick()).expect("connect");
        link.request_signed(Request::Reboot, &key)
            .expect("plain write");
        assert_eq!(applied.load(std::sync::atomic::Ordering::SeqCst), 1);
    }

    /// The same refusal when the stored counter is not this write's (another
    /// host wrote in between) stays a refusal.
    #[test]
    fn a_replay_refusal_with_another_stored_counter_stays_refused() {
        let key = [7u8; fringe_protocol::auth::KEY_LEN];
        let (answer, _) = counting_device(1, Some(99));
        let mut link = Link::connect(fake(answer), quick()).expect("connect");
        let e = link
            .request_signed(Request::Reboot, &key)
            .expect_err("refused");
        assert!(
            matches!(&e, LinkError::Refused { reason, .. }
                if reason.as_str() == fringe_protocol::AuthFailure::Replay.reason()),
            "{e:?}"
        );
    }

    #[test]
    fn handshake_then_request_with_retry_after_a_lost_answer() {
        let mut status_seen = 0;
        let link = Link::connect(
            fake(move |f| match &f.request {
                Request::Identify { .. } => enc(&DeviceFrame::Response {
                    id: f.id,
                    response: Response::Identity(identity(PROTOCOL_VERSION)),
                }),
                Request::StopStream => {
                    status_seen += 1;
                    // The first answer is lost on the line.
                    if status_seen == 1 {
                        Vec::new()
                    } else {
                        enc(&DeviceFrame::Response {
                            id: f.id,
                            response: Response::Ack,
                        })
                    }
                }
                _ => Vec::new(),
            }),
            quick(),
        );
        let mut link = link.unwrap();
        assert_eq!(link.serial_number(), "HGM-L2-0001");
        assert_eq!(link.request(Request::StopStream).unwrap(), Response::Ack);
        // At least the one retry the lost answer forces (a busy machine may
        // add one more; timing decides that, not the link).
        assert!(link.stats().retries >= 1, "{:?}", link.stats());
    }

    #[test]
    fn major_mismatch_is_refused_with_both_versions() {
        let e = Link::connect(
            fake(|f| {
                enc(&DeviceFrame::Response {
                    id: f.id,
                    response: Response::Identity(identity(Version { major: 2, minor: 1 })),
                })
            }),
            quick(),
        )
        .unwrap_err();
        assert!(matches!(e, LinkError::Incompatible { .. }), "{e:?}");
        assert!(e.to_string().contains("2.1") && e.to_string().contains("update fringe"));
    }

    #[test]
    fn a_frame_header_of_another_major_is_reported_as_incompatible() {
        let e = Link::connect(
            fake(|f| {
                let mut buf = [0u8; MAX_FRAME_LEN];
                let n = frame::encode_with_version(
                    &DeviceFrame::Response {
                        id: f.id,
                        response: Response::Ack,
                    },
                    Version { major: 3, minor: 0 },
                    &mut buf,
                )
                .unwrap();
                buf[..n].to_vec()
            }),
            quick(),
        )
        .unwrap_err();
        assert!(
            matches!(
                e,
                LinkError::Incompatible {
                    theirs: Version { major: 3, .. },
                    ..
                }
            ),
            "{e:?}"
        );
    }

    #[test]
    fn only_garbage_means_wrong_baud_and_silence_means_no_answer() {
        let e = Link::connect(fake(|_| vec![0x55, 0x13, 0x99, 0x00]), quick()).unwrap_err();
        assert!(matches!(e, LinkError::Garbled { errors: 3, .. }), "{e:?}");
        let e = Link::connect(fake(|_| Vec::new()), quick()).unwrap_err();
        assert!(matches!(e, LinkError::NoAnswer { tries: 3, .. }), "{e:?}");
    }

    /// After the handshake, a read answered only by damaged frames is
    /// tried up to three times `tries` (a noisy line spoils long answers
    /// often); a write is not, and a silent device is given up after
    /// `tries`.
    #[test]
    fn a_read_outlasts_damaged_answers_a_write_does_not() {
        let answer = |spoilt: u32| {
            let mut asked = 0;
            move |f: &HostFrame| match &f.request {
                Request::Identify { .. } => enc(&DeviceFrame::Response {
                    id: f.id,
                    response: Response::Identity(identity(PROTOCOL_VERSION)),
                }),
                _ => {
                    asked += 1;
                    if asked <= spoilt {
                        vec![0x55, 0x13, 0x99, 0x00]
                    } else {
                        enc(&DeviceFrame::Response {
                            id: f.id,
                            response: Response::Ack,
                        })
                    }
                }
            }
        };
        let mut link = Link::connect(fake(answer(8)), quick()).unwrap();
        assert_eq!(link.request(Request::StopStream), Ok(Response::Ack));
        assert_eq!(link.stats().retries, 8);
        let mut link = Link::connect(fake(answer(9)), quick()).unwrap();
        let e = link.request(Request::StopStream).unwrap_err();
        assert!(matches!(e, LinkError::Garbled { errors: 9, .. }), "{e:?}");
        let mut link = Link::connect(fake(answer(3)), quick()).unwrap();
        let e = link
            .request(Request::SelectProduct { slot: 0 })
            .unwrap_err();
        assert!(matches!(e, LinkError::Garbled { errors: 3, .. }), "{e:?}");
    }

    /// A read whose answer came damaged is asked again as soon as the
    /// damaged frame is seen (after [`after_damage`]), not after the whole
    /// answer timeout: with a timeout of a minute, eight damaged answers
    /// then the good one take well under it. (Not a speed goal: the bound
    /// tells the two behaviours apart by a factor of a hundred.)
    #[test]
    fn a_damaged_answer_to_a_read_is_asked_again_at_once() {
        let mut asked = 0;
        let answer = move |f: &HostFrame| match &f.request {
            Request::Identify { .. } => enc(&DeviceFrame::Response {
                id: f.id,
                response: Response::Identity(identity(PROTOCOL_VERSION)),
            }),
            _ => {
                asked += 1;
                if asked <= 8 {
                    vec![0x55, 0x13, 0x99, 0x00]
                } else {
                    enc(&DeviceFrame::Response {
                        id: f.id,
                        response: Response::Ack,
                    })
                }
            }
        };
        let slow = LinkOptions {
            timeout: Duration::from_secs(60),
            ..quick()
        };
        let mut link = Link::connect(fake(answer), slow).unwrap();
        let t0 = Instant::now();
        assert_eq!(link.request(Request::StopStream), Ok(Response::Ack));
        assert_eq!(link.stats().retries, 8);
        assert!(t0.elapsed() < Duration::from_secs(20), "{:?}", t0.elapsed());
        assert_eq!(
            after_damage(115_200),
            Duration::from_micros(34_027 + 20_000)
        );
    }

    /// Which requests are asked again soon after a damaged frame: reads
    /// answered at once, not writes (their counter is spent), the
    /// handshake, or requests answered after a measurement job (a second
    /// one would queue a second job: a reading logged, a flash test run).
    #[test]
    fn only_reads_answered_at_once_are_asked_again_after_damage() {
        for r in [
            Request::Status,
            Request::StopStream,
            Request::StartStream { period_ms: 0 },
            Request::ReadSettings,
            Request::ListProducts,
        ] {
            assert!(asked_again_after_damage(&r), "{r:?}");
        }
        for r in [
            Request::Measure,
            Request::SelfTest,
            Request::ReferenceCheck,
            Request::Identify {
                host: PROTOCOL_VERSION,
            },
            Request::SelectProduct { slot: 0 },
            Request::Reboot,
        ] {
            assert!(!asked_again_after_damage(&r), "{r:?}");
        }
    }

    #[test]
    fn a_spoilt_handshake_is_tried_again_when_asked() {
        let answer = || {
            let mut identifies = 0;
            move |f: &HostFrame| match &f.request {
                Request::Identify { .. } => {
                    identifies += 1;
                    // The first handshake is lost on a noisy line.
                    if identifies == 1 {
                        vec![0x55, 0x13, 0x99, 0x00]
                    } else {
                        enc(&DeviceFrame::Response {
                            id: f.id,
                            response: Response::Identity(identity(PROTOCOL_VERSION)),
                        })
                    }
                }
                _ => Vec::new(),
            }
        };
        let once = LinkOptions {
            tries: 1,
            ..quick()
        };
        let e = Link::connect(fake(answer()), once).unwrap_err();
        assert!(matches!(e, LinkError::Garbled { .. }), "{e:?}");
        let twice = LinkOptions {
            handshakes: 2,
            ..once
        };
        let link = Link::connect(fake(answer()), twice).unwrap();
        assert_eq!(link.serial_number(), "HGM-L2-0001");
    }

    #[test]
    fn refusal_carries_code_and_reason() {
        let mut link = Link::connect(
            fake(|f| match &f.request {
                Request::Identify { .. } => enc(&DeviceFrame::Response {
                    id: f.id,
                    response: Response::Identity(identity(PROTOCOL_VERSION)),
                }),
                _ => enc(&DeviceFrame::Error {
                    id: f.id,
                    code: ErrorCode::OutOfRange,
                    reason: fringe_protocol::short_string("period below 10 ms"),
                }),
            }),
            quick(),
        )
        .unwrap();
        let e = link
            .request(Request::StartStream { period_ms: 1 })
            .unwrap_err();
        assert_eq!(
            e.to_string(),
            "the device refused StartStream: period below 10 ms (error code 2)"
        );
    }

    #[test]
    fn permission_message_names_the_group() {
        // Root opens any device file, so the denial itself cannot be staged
        // in a test run as root; the message is checked here.
        let e = LinkError::PortPermission {
            port: "/dev/ttyUSB0".into(),
            group: Some("dialout".into()),
        };
        assert!(e.to_string().contains("group `dialout`"));
        assert!(e.to_string().contains("usermod -aG dialout"));
        assert!(owning_group(Path::new("/")).is_some());
    }

    #[test]
    fn missing_port_lists_what_exists() {
        let e = open_serial("/dev/fringe-no-such-port", 115_200).unwrap_err();
        assert!(matches!(e, LinkError::PortMissing { .. }));
        let e = open_serial("/etc/hostname", 115_200).unwrap_err();
        assert!(matches!(e, LinkError::NotASerialPort { .. }), "{e:?}");
    }
}
