//! Booting the `qemu-mps2` board under QEMU and talking to it over its
//! UART (a pseudo-terminal), for the end-to-end tests and `cargo xtask`.
//!
//! QEMU facts this relies on (firmware/boards/qemu-mps2/README.md): `-serial pty` prints the pty's
//! path; QEMU discards what the firmware sends until a client has the pty
//! open and notices a new client only about once a second, so the host
//! speaks first and repeats its handshake until answered;
//! `-icount shift=0` makes virtual time one nanosecond per instruction
//! (`sleep=off`: while the CPU idles, virtual time jumps to the next timer
//! instead of waiting in real time, so the tests run as fast as the host
//! can emulate; the instruction counts are the same).

use std::io::{BufRead, BufReader, Read, Write};
use std::os::unix::net::UnixStream;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use fringe_protocol::frame::{encode_vec, FrameDecoder};
use fringe_protocol::{
    auth, DeviceFrame, ErrorCode, Event, HostFrame, Identity, Reading, Request, Response,
    PROTOCOL_VERSION,
};

/// Serial number of the board's emulated device (`firmware/boards/qemu-mps2/src/main.rs`).
pub const BOARD_SERIAL: &str = "QEMU-MPS2-0001";
/// The board's demo write key (same file; published, never for a real device).
pub const BOARD_KEY: auth::Key = *b"fringe-qemu-mps2-demo-write-key!";
/// Bytes of stack the board paints and watches (`diag::STACK_BYTES`): the
/// stack high-water mark is this minus `Status::stack_free_bytes`.
pub const BOARD_STACK_BYTES: u32 = 64 * 1024;

/// The board ELF as `cargo xtask firmware` builds it, from the repository root.
pub fn board_elf(root: &Path) -> PathBuf {
    root.join("firmware/boards/qemu-mps2/target/thumbv7em-none-eabihf/release/fringe-qemu-mps2")
}

/// Whether `qemu-system-arm` can be started.
pub fn qemu_available() -> bool {
    Command::new("qemu-system-arm")
        .arg("--version")
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .status()
        .map(|s| s.success())
        .unwrap_or(false)
}

/// `qemu-system-arm` for `elf` on the board's machine (mps2-an386, a
/// Cortex-M4), without a display, with semihosting on the host's console.
pub fn qemu_command(elf: &Path) -> Command {
    let mut c = Command::new("qemu-system-arm");
    c.args([
        "-machine",
        "mps2-an386",
        "-cpu",
        "cortex-m4",
        "-display",
        "none",
    ])
    .args(["-semihosting-config", "enable=on,target=native"])
    .arg("-kernel")
    .arg(elf);
    c
}

/// A running QEMU with the board; killed when dropped.
pub struct Qemu {
    child: Child,
    /// The board's UART0 (Fringe protocol).
    pub pty: PathBuf,
    /// The board's UART1 (Modbus RTU).
    pub modbus_pty: PathBuf,
    monitor: PathBuf,
}

/// What went wrong talking to QEMU or the board.
pub type Result<T> = std::result::Result<T, String>;

impl Qemu {
    /// Boots `elf` (mps2-an386, UART0 and UART1 each on its own pty, monitor
    /// on a Unix socket, `-icount shift=0,sleep=off`).
    ///
    /// # Errors
    /// When QEMU does not start or does not print both ptys' paths within 10 s.
    pub fn boot(elf: &Path) -> Result<Self> {
        let monitor = std::env::temp_dir().join(format!(
            "fringe-qemu-{}-{}.sock",
            std::process::id(),
            COUNTER.fetch_add(1, std::sync::atomic::Ordering::Relaxed)
        ));
        let _ = std::fs::remove_file(&monitor);
        let mut child = qemu_command(elf)
            .args(["-icount", "shift=0,sleep=off"])
            // `-serial` number n is UARTn: the protocol, then Modbus RTU.
            .args(["-serial", "pty", "-serial", "pty"])
            .arg("-monitor")
            .arg(format!("unix:{},server=on,wait=off", monitor.display()))
            .stdin(Stdio::null())
            .stdout(Stdio::piped())
            .stderr(Stdio::inherit())
            .spawn()
            .map_err(|e| format!("could not start qemu-system-arm: {e}"))?;
        let stdout = child.stdout.take().ok_or("no stdout from QEMU")?;
        let (tx, rx) = std::sync::mpsc::channel();
        std::thread::spawn(move || {
            for line in BufReader::new(stdout).lines().map_while(|l| l.ok()) {
                // "char device redirected to /dev/pts/N (label serial0)"
                if let Some(i) = line.find("/dev/pts/") {
                    let path: String = line[i..]
                        .chars()
                        .take_while(|c| !c.is_whitespace())
                        .collect();
                    let uart = usize::from(line.contains("label serial1"));
                    let _ = tx.send((uart, path));
                }
            }
        });
        let mut ptys: [Option<PathBuf>; 2] = [None, None];
        let deadline = Instant::now() + Duration::from_secs(10);
        while ptys.iter().any(Option::is_none) {
            let left = deadline.saturating_duration_since(Instant::now());
            match rx.recv_timeout(left) {
                Ok((uart, p)) => ptys[uart] = Some(PathBuf::from(p)),
                Err(_) => {
                    let _ = child.kill();
                    let _ = child.wait();
                    return Err(format!(
                        "QEMU did not print both ptys within 10 s (got {ptys:?})"
                    ));
                }
            }
        }
        let [Some(pty), Some(modbus_pty)] = ptys else {
            unreachable!("both set above")
        };
        Ok(Self {
            child,
            pty,
            modbus_pty,
            monitor,
        })
    }

    /// Sends a command to the QEMU monitor and returns what it printed.
    ///
    /// # Errors
    /// When the monitor socket cannot be reached.
    pub fn monitor(&self, command: &str) -> Result<String> {
        let deadline = Instant::now() + Duration::from_secs(5);
        let mut s = loop {
            match UnixStream::connect(&self.monitor) {
                Ok(s) => break s,
                Err(e) if Instant::now() > deadline => return Err(format!("QEMU monitor: {e}")),
                Err(_) => std::thread::sleep(Duration::from_millis(100)),
            }
        };
        s.set_read_timeout(Some(Duration::from_millis(500)))
            .map_err(|e| e.to_string())?;
        s.write_all(format!("{command}\n").as_bytes())
            .map_err(|e| e.to_string())?;
        let mut out = Vec::new();
        let mut buf = [0u8; 1024];
        while let Ok(n) = s.read(&mut buf) {
            if n == 0 {
                break;
            }
            out.extend_from_slice(&buf[..n]);
        }
        Ok(String::from_utf8_lossy(&out).into_owned())
    }

    /// `n` 32-bit words of guest memory at `addr` (the monitor's `xp`).
    ///
    /// # Errors
    /// When the monitor cannot be reached or prints fewer words.
    pub fn read_words(&self, addr: u64, n: usize) -> Result<Vec<u32>> {
        let out = self.monitor(&format!("xp /{n}wx {addr:#x}"))?;
        // Lines "0000000020000000: 0x00000001 0x00000000 ...".
        let words: Vec<u32> = out
            .lines()
            .filter_map(|l| l.trim().split_once(": "))
            .filter(|(a, _)| a.len() == 16 && a.chars().all(|c| c.is_ascii_hexdigit()))
            .flat_map(|(_, w)| w.split_whitespace())
            .filter_map(|w| u32::from_str_radix(w.trim_start_matches("0x"), 16).ok())
            .collect();
        if words.len() < n {
            return Err(format!(
                "xp at {addr:#x}: {} of {n} words in {out:?}",
                words.len()
            ));
        }
        Ok(words[..n].to_vec())
    }

    /// Whether QEMU is still running.
    pub fn running(&mut self) -> bool {
        matches!(self.child.try_wait(), Ok(None))
    }
}

static COUNTER: std::sync::atomic::AtomicU32 = std::sync::atomic::AtomicU32::new(0);

impl Drop for Qemu {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
        let _ = std::fs::remove_file(&self.monitor);
    }
}

/// A minimal protocol client over the board's pty (requests by id, streamed
/// readings and events kept aside), for `cargo xtask size`, which should not
/// need the host tool built. The end-to-end test uses the host tool's own
/// `fringe_host::link::Link`.
pub struct Link {
    port: serialport::TTYPort,
    dec: FrameDecoder<DeviceFrame>,
    next_id: u16,
    /// Streamed readings received so far, in arrival order.
    pub readings: Vec<Reading>,
    /// Unsolicited events received so far.
    pub events: Vec<Event>,
    /// Bytes that were not part of a valid frame (counted by the decoder).
    pub link_errors: u32,
}

/// Answer to a request: a response or the device's error.
pub type Answer = std::result::Result<Response, (ErrorCode, String)>;

impl Link {
    /// Opens the pty and does the handshake, repeating `Identify` until the
    /// device answers (QEMU notices a new pty client only about once a second).
    ///
    /// # Errors
    /// When the port cannot be opened or no identity arrives within `timeout`.
    pub fn connect(pty: &Path, timeout: Duration) -> Result<(Self, Identity)> {
        let path = pty.to_str().ok_or("pty path is not UTF-8")?;
        let port = serialport::new(path, 115_200)
            .timeout(Duration::from_millis(50))
            .open_native()
            .map_err(|e| format!("open {path}: {e}"))?;
        let mut link = Self {
            port,
            dec: FrameDecoder::new(),
            next_id: 1,
            readings: Vec::new(),
            events: Vec::new(),
            link_errors: 0,
        };
        let deadline = Instant::now() + timeout;
        while Instant::now() < deadline {
            let req = Request::Identify {
                host: PROTOCOL_VERSION,
            };
            if let Ok(Ok(Response::Identity(id))) =
                link.request(req, None, Duration::from_millis(700))
            {
                PROTOCOL_VERSION
                    .check_compatible(id.protocol)
                    .map_err(|e| e.to_string())?;
                return Ok((link, id));
            }
        }
        Err(format!(
            "no answer to Identify on {path} within {timeout:?}"
        ))
    }

    /// Sends `request` (signed with `key` and `counter` when given) and waits
    /// for its answer, keeping readings and events that arrive meanwhile.
    ///
    /// # Errors
    /// On a port error or when no answer arrives within `timeout`.
    pub fn request(
        &mut self,
        request: Request,
        sign: Option<(&auth::Key, &str, u32)>,
        timeout: Duration,
    ) -> Result<Answer> {
        let id = self.next_id;
        self.next_id = self.next_id.wrapping_add(1).max(1);
        let auth = match sign {
            Some((key, serial, counter)) => {
                Some(auth::sign(key, serial, counter, &request).ok_or("request too long to sign")?)
            }
            None => None,
        };
        let frame = encode_vec(&HostFrame { id, auth, request }).map_err(|e| e.to_string())?;
        // A leading zero flushes whatever noise the device holds.
        self.port.write_all(&[0]).map_err(|e| e.to_string())?;
        self.port.write_all(&frame).map_err(|e| e.to_string())?;
        let deadline = Instant::now() + timeout;
        while Instant::now() < deadline {
            for f in self.receive(Duration::from_millis(50))? {
                match f {
                    DeviceFrame::Response { id: i, response } if i == id => {
                        return Ok(Ok(response))
                    }
                    DeviceFrame::Error {
                        id: i,
                        code,
                        reason,
                    } if i == id => return Ok(Err((code, reason.to_string()))),
                    _ => {}
                }
            }
        }
        Err(format!("no answer to request {id} within {timeout:?}"))
    }

    /// Reads for up to `wait` and returns the frames that were not kept
    /// aside (responses and errors); readings and events go to their lists.
    ///
    /// # Errors
    /// On a port error other than a timeout.
    pub fn receive(&mut self, wait: Duration) -> Result<Vec<DeviceFrame>> {
        let mut out = Vec::new();
        let mut buf = [0u8; 1024];
        let deadline = Instant::now() + wait;
        loop {
            match self.port.read(&mut buf) {
                Ok(n) => {
                    for r in self.dec.push(&buf[..n]) {
                        match r {
                            Ok(DeviceFrame::Reading(r)) => self.readings.push(r),
                            Ok(DeviceFrame::Event(e)) => self.events.push(e),
                            Ok(f) => out.push(f),
                            Err(_) => self.link_errors += 1,
                        }
                    }
                }
                Err(e) if e.kind() == std::io::ErrorKind::TimedOut => {}
                Err(e) => return Err(format!("read: {e}")),
            }
            if !out.is_empty() || Instant::now() >= deadline {
                return Ok(out);
            }
        }
    }
}

/// The address of the symbol `name` in `elf` (`llvm-nm`, else GNU `nm`).
///
/// # Errors
/// When neither tool runs or the symbol is not there.
pub fn symbol_address(elf: &Path, name: &str) -> Result<u64> {
    let mut last = String::new();
    for tool in ["llvm-nm", "nm"] {
        match Command::new(tool).arg(elf).output() {
            Ok(out) if out.status.success() => {
                let text = String::from_utf8_lossy(&out.stdout).into_owned();
                return text
                    .lines()
                    .find_map(|l| {
                        let mut w = l.split_whitespace();
                        let addr = w.next()?;
                        let _kind = w.next()?;
                        (w.next()? == name).then(|| u64::from_str_radix(addr, 16).ok())?
                    })
                    .ok_or_else(|| format!("no symbol {name} in {}", elf.display()));
            }
            Ok(out) => last = format!("{tool}: {}", String::from_utf8_lossy(&out.stderr)),
            Err(e) => last = format!("{tool}: {e}"),
        }
    }
    Err(format!("cannot list symbols of {} ({last})", elf.display()))
}

/// The board's Modbus figures (`FRINGE_MODBUS` in the board's `main.rs`).
#[derive(Debug, Clone, Copy, Default)]
pub struct ModbusFigures {
    /// Answers sent.
    pub sent: u32,
    /// Instructions the last answer cost.
    pub cost: u32,
    /// Instructions from the last answered frame's gap to its answer.
    pub latency: u32,
    /// The largest such delay.
    pub max_latency: u32,
    /// Frames delimited.
    pub frames: u32,
    /// Frames dropped for a bad CRC.
    pub bad_crc: u32,
    /// Frames dropped as damaged.
    pub damaged: u32,
    /// Frames for another unit.
    pub other_unit: u32,
    /// Broadcast frames.
    pub broadcast: u32,
    /// Answers with data.
    pub answered: u32,
    /// Exception answers.
    pub exceptions: u32,
    /// Instructions since the service before the last answer, less the
    /// simulated front end's.
    pub own_wait: u32,
    /// The largest such figure.
    pub max_own_wait: u32,
    /// Requests dropped unanswered as late (a frame came before the
    /// answer was sent).
    pub late: u32,
}

impl Qemu {
    /// The board's Modbus figures, read from its memory.
    ///
    /// # Errors
    /// As [`symbol_address`] and [`Qemu::read_words`].
    pub fn modbus_figures(&self, elf: &Path) -> Result<ModbusFigures> {
        let addr = symbol_address(elf, "FRINGE_MODBUS")?;
        let w = self.read_words(addr, 14)?;
        Ok(ModbusFigures {
            sent: w[0],
            cost: w[1],
            latency: w[2],
            max_latency: w[3],
            frames: w[4],
            bad_crc: w[5],
            damaged: w[6],
            other_unit: w[7],
            broadcast: w[8],
            answered: w[9],
            exceptions: w[10],
            own_wait: w[11],
            max_own_wait: w[12],
            late: w[13],
        })
    }
}

/// Flash and static RAM of the board ELF, bytes.
#[derive(Debug, Clone, Copy)]
pub struct Footprint {
    /// Vector table, code, read-only data and the initial image of `.data`.
    pub flash: u64,
    /// `.data`, `.bss` and `.uninit` (the stack comes on top).
    pub ram: u64,
}

/// Section sizes of an ELF (`llvm-size -A`, else GNU `size -A`).
///
/// # Errors
/// When neither tool runs.
pub fn sections(elf: &Path) -> Result<Vec<(String, u64)>> {
    let mut last = String::new();
    for tool in ["llvm-size", "size"] {
        match Command::new(tool).arg("-A").arg(elf).output() {
            Ok(out) if out.status.success() => {
                let text = String::from_utf8_lossy(&out.stdout).into_owned();
                return Ok(text
                    .lines()
                    .filter_map(|l| {
                        let mut w = l.split_whitespace();
                        let name = w.next()?.to_string();
                        let size = w.next()?.parse().ok()?;
                        name.starts_with('.').then_some((name, size))
                    })
                    .collect());
            }
            Ok(out) => last = format!("{tool}: {}", String::from_utf8_lossy(&out.stderr)),
            Err(e) => last = format!("{tool}: {e}"),
        }
    }
    Err(format!(
        "cannot read section sizes of {} ({last}); install llvm or binutils",
        elf.display()
    ))
}

/// Flash and static RAM of `elf`.
///
/// # Errors
/// As [`sections`].
pub fn footprint(elf: &Path) -> Result<Footprint> {
    let s = sections(elf)?;
    // A firmware without a vector table or code is not a firmware: refuse
    // rather than report a flash size of 0 that every budget would pass.
    for needed in [".vector_table", ".text"] {
        if !s.iter().any(|(n, v)| n == needed && *v > 0) {
            return Err(format!(
                "{} has no {needed} section (or an empty one): not a board image",
                elf.display()
            ));
        }
    }
    let sum = |names: &[&str]| -> u64 {
        s.iter()
            .filter(|(n, _)| names.contains(&n.as_str()))
            .map(|(_, v)| v)
            .sum()
    };
    Ok(Footprint {
        flash: sum(&[".vector_table", ".text", ".rodata", ".data"]),
        ram: sum(&[".data", ".bss", ".uninit"]),
    })
}
