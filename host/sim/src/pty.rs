//! The simulator on a pseudo-terminal (`fringe sim`): the real firmware
//! core with the simulated front end behind the [`SimDevice`] seam.
//!
//! The simulator owns a pty pair. The host opens the slave side (its path is
//! printed, and kept in a symlink with `--link`); the simulator reads and
//! writes the master side and feeds the bytes to [`SimDevice::poll`]. Line
//! faults from the scenario are applied in both directions; a disconnect
//! closes the pty and opens a new one after the pause (the symlink follows).
//! When the host sets another baud rate on the port than the scenario's
//! device baud, every byte is garbled both ways, as on a real UART.

use std::collections::HashSet;
use std::io::{self, Read, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

use fringe_protocol::{DeviceFrame, FrameDecoder, Reading, Response};
use serialport::{SerialPort, TTYPort};

use crate::device::{Bench, SimDevice};
use crate::faults::Injector;
use crate::scenario::Scenario;

/// Where the simulator is reachable and what it did.
#[derive(Debug, Default, Clone, Copy, PartialEq, Eq)]
pub struct SimStats {
    /// Device polls run.
    pub polls: u64,
    /// Bytes from the host.
    pub rx_bytes: u64,
    /// Bytes to the host (after faults).
    pub tx_bytes: u64,
    /// Bytes lost because no host was reading.
    pub tx_lost: u64,
    /// Disconnects performed.
    pub disconnects: u32,
    /// Bytes the line's faults dropped (both directions).
    pub dropped: u64,
    /// Bytes with a bit flipped by the line's faults (both directions).
    pub flipped: u64,
    /// Garbage bytes the line's faults inserted (both directions).
    pub inserted: u64,
}

/// Options of one simulator run.
#[derive(Debug, Clone)]
pub struct SimOptions {
    /// Keep a symlink to the current pty here.
    pub link: Option<PathBuf>,
    /// Append every reading the device sent (before line faults) as JSON lines here.
    pub record: Option<PathBuf>,
    /// Stop after this much wall time.
    pub duration: Option<Duration>,
    /// Bench fixture file (see `fringe sim --bench`).
    pub bench: Option<PathBuf>,
}

/// How long the loop waits for the host's bytes while the device is idle
/// (and how long a write may wait for room in the pseudo-terminal).
const WAIT: Duration = Duration::from_millis(1);

/// Wall time for `device_ms` of device time at `scale`.
fn wall_wait(device_ms: u64, scale: f64) -> Duration {
    Duration::from_secs_f64(device_ms as f64 / 1000.0 / scale.max(1e-3))
}

struct Pty {
    master: TTYPort,
    // Held open so the master never sees a hang-up while no host is
    // connected, and so the host's baud setting can be read.
    slave: TTYPort,
    path: String,
}

fn open_pty(link: Option<&Path>) -> io::Result<Pty> {
    let (mut master, slave) = TTYPort::pair().map_err(io::Error::from)?;
    master.set_timeout(WAIT).map_err(io::Error::from)?;
    let path = slave
        .name()
        .ok_or_else(|| io::Error::other("pty has no name"))?;
    if let Some(link) = link {
        // Replace the symlink atomically: a host reconnecting never sees it missing.
        let tmp = link.with_extension("fringe-sim-tmp");
        let _ = std::fs::remove_file(&tmp);
        std::os::unix::fs::symlink(&path, &tmp)?;
        std::fs::rename(&tmp, link)?;
    }
    Ok(Pty {
        master,
        slave,
        path,
    })
}

/// Writes one recorded reading as a JSON line: seq and the hex of its frame.
fn record_line(out: &mut impl Write, r: &Reading) -> io::Result<()> {
    let frame = fringe_protocol::frame::encode_vec(&DeviceFrame::Reading(*r))
        .map_err(|e| io::Error::other(e.to_string()))?;
    let hex: String = frame.iter().map(|b| format!("{b:02x}")).collect();
    writeln!(
        out,
        "{{\"boot\":{},\"counter\":{},\"frame\":\"{hex}\"}}",
        r.seq.boot, r.seq.counter
    )
}

/// How often the simulator reports what the device does (wall time).
pub const REPORT_EVERY: Duration = Duration::from_secs(10);

/// What the simulator tells its owner while it runs.
#[derive(Debug, Clone, PartialEq)]
#[non_exhaustive]
pub enum SimNote {
    /// A pty was opened: the path a host opens.
    Port(String),
    /// The bench fixture file now says this material (`line` for the line).
    Bench(String),
    /// The bench fixture file could not be used (the old material stays).
    BadBench(String),
    /// What the device does (every [`REPORT_EVERY`]).
    Device(String),
}

/// Runs the simulator until `stop` is set (or the duration passes), on
/// this machine's clock scaled by the scenario's time scale. `tell` hears
/// what happens ([`SimNote`]); an error it returns stops the run.
///
/// # Errors
/// Failure to create the pty, the symlink or the record file; what `tell`
/// returns.
pub fn run(
    device: &mut dyn SimDevice,
    scenario: &Scenario,
    opts: &SimOptions,
    stop: &AtomicBool,
    tell: &mut dyn FnMut(SimNote) -> io::Result<()>,
) -> io::Result<SimStats> {
    let mut stats = SimStats::default();
    let mut injector = Injector::new(scenario.link.clone(), scenario.device.seed ^ 0x9e37_79b9);
    let mut record = match &opts.record {
        Some(p) => Some(io::BufWriter::new(
            std::fs::OpenOptions::new()
                .create(true)
                .append(true)
                .open(p)?,
        )),
        None => None,
    };
    let mut recorded: HashSet<u64> = HashSet::new();
    let mut watch = FrameDecoder::<DeviceFrame>::new();
    let mut disconnects: Vec<_> = scenario.link.disconnect.clone();
    disconnects.sort_by(|a, b| a.at_s.total_cmp(&b.at_s));
    let mut next_disconnect = 0usize;

    let mut pty = Some(open_pty(opts.link.as_deref())?);
    if let Some(p) = &pty {
        tell(SimNote::Port(p.path.clone()))?;
    }
    let start = Instant::now();
    let scale = scenario.device.time_scale;
    let mut reopen_at: Option<Instant> = None;
    let mut last_conditions = Instant::now() - Duration::from_secs(1);
    let mut last_bench = Instant::now() - Duration::from_secs(1);
    let mut bench_text = String::new();
    let mut baud_ok = true;
    let mut tx_blocked_until: Option<Instant> = None;
    // The device runs alone: say what it does now and then.
    let mut last_report = Instant::now();
    let mut buf = [0u8; 2048];
    let mut rx = Vec::with_capacity(2048);
    let mut tx = Vec::with_capacity(4096);
    let mut wire = Vec::with_capacity(4096);

    while !stop.load(Ordering::Relaxed) {
        let wall = start.elapsed();
        if opts.duration.is_some_and(|d| wall >= d) {
            break;
        }
        let now_ms = (wall.as_secs_f64() * 1000.0 * scale) as u64;
        let t_s = now_ms as f64 / 1000.0;

        // Disconnects: close the pty and take its symlink away, as an
        // unplugged adapter's device node goes (left in place, it named a
        // closed pseudo-terminal whose number another program could get,
        // and a host reconnecting found a different device there); open a
        // new one after the pause.
        if let Some(d) = disconnects.get(next_disconnect) {
            if t_s >= d.at_s && pty.is_some() {
                pty = None;
                if let Some(link) = &opts.link {
                    let _ = std::fs::remove_file(link);
                }
                stats.disconnects += 1;
                reopen_at = Some(Instant::now() + Duration::from_secs_f64(d.for_s));
                next_disconnect += 1;
            }
        }
        if pty.is_none() && reopen_at.is_some_and(|t| Instant::now() >= t) {
            let p = open_pty(opts.link.as_deref())?;
            tell(SimNote::Port(p.path.clone()))?;
            pty = Some(p);
            reopen_at = None;
        }

        if let Some(path) = opts.bench.as_deref() {
            if last_bench.elapsed() >= Duration::from_millis(100) {
                last_bench = Instant::now();
                let text = std::fs::read_to_string(path).unwrap_or_default();
                if text != bench_text {
                    match Bench::parse(&text) {
                        Ok(b) => {
                            device.set_bench(b);
                            // In effect before it is announced: a request
                            // answered after the announcement sees it.
                            device.set_conditions(&scenario.at(t_s));
                            last_conditions = Instant::now();
                            tell(SimNote::Bench(
                                text.split_whitespace().next().unwrap_or("line").into(),
                            ))?;
                        }
                        // Keep what was there; say why once per change.
                        Err(e) => tell(SimNote::BadBench(format!("{}: {e}", path.display())))?,
                    }
                    bench_text = text;
                }
            }
        }
        if last_conditions.elapsed() >= Duration::from_millis(20) {
            device.set_conditions(&scenario.at(t_s));
            last_conditions = Instant::now();
        }

        // Bytes from the host.
        rx.clear();
        match pty.as_mut() {
            Some(p) => {
                // Mid-job the device is polled again as soon as the front
                // end has done the steps of the last poll (their device
                // time, scaled to wall time): each poll runs only a few
                // steps, and waiting 1 ms of wall time between them
                // stretched a 53 ms job to about 200 ms of device time at
                // 40x, past the interval (139 readings a second where 400
                // were due; 392 measured since, over 10 s with no host).
                let busy = device
                    .busy_until_ms()
                    .map(|t| wall_wait(t.saturating_sub(now_ms), scale).min(WAIT));
                let read = if let Some(wait) = busy {
                    p.master.set_timeout(wait).map_err(io::Error::from)?;
                    let r = p.master.read(&mut buf);
                    p.master.set_timeout(WAIT).map_err(io::Error::from)?;
                    r
                } else {
                    p.master.read(&mut buf)
                };
                match read {
                    Ok(n) => {
                        // The host's baud setting, as a UART would feel it.
                        baud_ok = p
                            .slave
                            .baud_rate()
                            .map_or(true, |b| b == scenario.device.baud);
                        stats.rx_bytes += n as u64;
                        let bytes = &buf[..n];
                        if !baud_ok {
                            injector.garble(bytes, &mut rx);
                        } else if injector.active() {
                            injector.apply(bytes, &mut rx);
                        } else {
                            rx.extend_from_slice(bytes);
                        }
                    }
                    Err(e) if e.kind() == io::ErrorKind::TimedOut => {}
                    Err(_) => std::thread::sleep(Duration::from_millis(1)),
                }
            }
            None => std::thread::sleep(Duration::from_millis(1)),
        }

        tx.clear();
        device.poll(now_ms, &rx, &mut |b| tx.extend_from_slice(b));
        stats.polls += 1;
        if last_report.elapsed() >= REPORT_EVERY {
            last_report = Instant::now();
            if let Some(r) = device.report() {
                tell(SimNote::Device(r))?;
            }
        }
        device.reboot_if_requested(now_ms);

        if tx.is_empty() {
            continue;
        }
        // Record what the device said, before the line touches it.
        if let Some(out) = record.as_mut() {
            for f in watch.push(&tx).flatten() {
                let readings: Vec<Reading> = match f {
                    DeviceFrame::Reading(r) => vec![r],
                    DeviceFrame::Response {
                        response: Response::Log { readings, .. },
                        ..
                    } => readings.to_vec(),
                    DeviceFrame::Response {
                        response: Response::Reading(r),
                        ..
                    } => vec![r],
                    _ => Vec::new(),
                };
                for r in readings {
                    if recorded.insert(r.seq.as_u64()) {
                        record_line(out, &r)?;
                    }
                }
            }
            out.flush()?;
        }
        wire.clear();
        if !baud_ok {
            injector.garble(&tx, &mut wire);
        } else {
            injector.apply(&tx, &mut wire);
        }
        let Some(p) = pty.as_mut() else {
            stats.tx_lost += wire.len() as u64;
            continue;
        };
        if tx_blocked_until.is_some_and(|t| Instant::now() < t) {
            stats.tx_lost += wire.len() as u64;
            continue;
        }
        match p.master.write_all(&wire) {
            Ok(()) => {
                stats.tx_bytes += wire.len() as u64;
                tx_blocked_until = None;
            }
            Err(_) => {
                // Nobody is reading: the bytes are lost, as on a real line.
                stats.tx_lost += wire.len() as u64;
                tx_blocked_until = Some(Instant::now() + Duration::from_millis(50));
            }
        }
    }
    if let Some(link) = &opts.link {
        let _ = std::fs::remove_file(link);
    }
    stats.dropped = injector.dropped;
    stats.flipped = injector.flipped;
    stats.inserted = injector.inserted;
    Ok(stats)
}
