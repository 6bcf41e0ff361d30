//! A simulated device inside this process on the wall clock: the device of
//! a scenario file ([`FirmwareSim`], calibrated when the scenario says so)
//! behind the link's [`Port`] seam, as a gateway runs its `sim:` devices.
//!
//! Unlike [`crate::port`] (virtual time that runs as fast as the host
//! reads), device time here is the wall time since [`LiveSim::start`]
//! times the scenario's `time_scale`, so a device set to one reading a
//! second gives one a second. The device is polled when its port is read
//! or written (every few ms while a host waits on it); the scenario's line
//! faults (`[link]`) are not applied (they belong to the pseudo-terminal of
//! `fringe sim`).

use std::collections::VecDeque;
use std::io;
use std::sync::{Arc, Mutex, MutexGuard};
use std::time::{Duration, Instant};

use fringe_link::{LinkError, Opener, Port};

use crate::device::SimDevice;
use crate::firmware::{BootError, FirmwareSim};
use crate::scenario::{Scenario, DEFAULT_BAUD};

/// Wall time between two polls of the device while a host waits for bytes.
pub const POLL_EVERY: Duration = Duration::from_millis(10);

/// Device time between two updates of what the sensor sees, ms.
const CONDITIONS_EVERY_MS: u64 = 100;

struct LiveState {
    device: FirmwareSim,
    scenario: Scenario,
    start: Instant,
    out: VecDeque<u8>,
    last_conditions_ms: Option<u64>,
}

impl LiveState {
    fn now_ms(&self) -> u64 {
        (self.start.elapsed().as_secs_f64() * 1000.0 * self.scenario.device.time_scale) as u64
    }

    /// One poll of the device at the wall clock's device time, with `rx`.
    fn pump(&mut self, rx: &[u8]) {
        let now = self.now_ms();
        if self
            .last_conditions_ms
            .is_none_or(|t| now >= t + CONDITIONS_EVERY_MS)
        {
            self.device
                .set_conditions(&self.scenario.at(now as f64 / 1000.0));
            self.last_conditions_ms = Some(now);
        }
        let out = &mut self.out;
        self.device
            .poll(now, rx, &mut |b: &[u8]| out.extend(b.iter().copied()));
        self.device.reboot_if_requested(now);
    }
}

/// A handle on a wall-clock simulated device (clones share it).
#[derive(Clone)]
pub struct LiveSim {
    state: Arc<Mutex<LiveState>>,
    serial: String,
}

impl std::fmt::Debug for LiveSim {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "LiveSim({})", self.serial)
    }
}

impl LiveSim {
    /// Boots the device of `scenario` (commissioned if it has a
    /// `[calibration]`); a set clock starts at `wall_ms`, ms since the
    /// Unix epoch.
    ///
    /// # Errors
    /// [`BootError`].
    pub fn start(scenario: &Scenario, wall_ms: u64) -> Result<Self, BootError> {
        let device = FirmwareSim::new(scenario, wall_ms)?;
        Ok(Self {
            serial: scenario.device.serial.clone(),
            state: Arc::new(Mutex::new(LiveState {
                device,
                scenario: scenario.clone(),
                start: Instant::now(),
                out: VecDeque::new(),
                last_conditions_ms: None,
            })),
        })
    }

    fn lock(&self) -> MutexGuard<'_, LiveState> {
        // A poisoned lock is taken over: the state is plain data.
        self.state.lock().unwrap_or_else(|p| p.into_inner())
    }

    /// The device serial of its scenario.
    pub fn serial(&self) -> &str {
        &self.serial
    }

    /// Lets the device run to now without a host (it measures and logs on
    /// its own schedule).
    pub fn run_alone(&self) {
        let mut s = self.lock();
        s.pump(&[]);
        s.out.clear();
    }

    /// An opener for [`fringe_link::Link::connect`], named `name`.
    pub fn opener(&self, name: &str) -> Box<dyn Opener> {
        Box::new(LiveOpener {
            sim: self.clone(),
            name: name.to_string(),
        })
    }
}

struct LiveOpener {
    sim: LiveSim,
    name: String,
}

impl Opener for LiveOpener {
    fn open(&mut self) -> Result<Box<dyn Port>, LinkError> {
        // What the device said while no host listened is gone, as on a line.
        self.sim.lock().out.clear();
        Ok(Box::new(LivePort(self.sim.clone())))
    }
    fn name(&self) -> &str {
        &self.name
    }
    fn baud(&self) -> u32 {
        DEFAULT_BAUD
    }
}

struct LivePort(LiveSim);

impl Port for LivePort {
    fn read_some(&mut self, buf: &mut [u8], timeout: Duration) -> io::Result<usize> {
        let deadline = Instant::now() + timeout;
        loop {
            {
                let mut s = self.0.lock();
                s.pump(&[]);
                if !s.out.is_empty() {
                    let n = buf.len().min(s.out.len());
                    for (d, b) in buf.iter_mut().zip(s.out.drain(..n)) {
                        *d = b;
                    }
                    return Ok(n);
                }
            }
            let now = Instant::now();
            if now >= deadline {
                return Ok(0);
            }
            std::thread::sleep(POLL_EVERY.min(deadline - now));
        }
    }

    fn write_all(&mut self, bytes: &[u8]) -> io::Result<()> {
        self.0.lock().pump(bytes);
        Ok(())
    }

    fn discard_input(&mut self) -> io::Result<()> {
        self.0.lock().out.clear();
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use fringe_link::{Link, LinkOptions};
    use fringe_protocol::{Request, Response};
    use std::path::Path;

    const KEY: &str = "000102030405060708090a0b0c0d0e0f101112131415161718191a1b1c1d1e1f";

    fn scenario(cal: bool) -> Scenario {
        let cal = if cal {
            "[calibration]\ncell = \"simulator\"\nproduct = \"exact\"\n"
        } else {
            ""
        };
        Scenario::parse(
            Path::new("t.toml"),
            &format!(
                "moisture_pct = [[0, 14.0]]\ntemperature_c = [[0, 25.0]]\n[device]\nserial = \"FMX-T-0001\"\nkey = \"{KEY}\"\ninterval_ms = 200\ntime_scale = 1.0\n[product]\nname = \"test grain\"\n{cal}"
            ),
        )
        .expect("scenario")
    }

    fn measure(sim: &LiveSim) -> fringe_protocol::Reading {
        let mut link = Link::connect(sim.opener("sim:t"), LinkOptions::default()).expect("link");
        match link.request(Request::Measure).expect("measure") {
            Response::Reading(r) => r,
            other => panic!("{other:?}"),
        }
    }

    /// Consistency test of the simulator (not an outside check): a device
    /// commissioned with the simulated cell's constants and the synthetic
    /// product's exact calibration reads back the scenario's moisture
    /// (within 0.5 %, the front end's noise and the float32 chain); one
    /// without a `[calibration]` has no moisture value.
    /// Runs `f` on a thread with the stack of a main thread (the device
    /// core is built on the stack before it moves to the heap).
    fn big_stack(f: impl FnOnce() + Send + 'static) {
        std::thread::Builder::new()
            .stack_size(8 << 20)
            .spawn(f)
            .expect("thread")
            .join()
            .expect("test thread");
    }

    #[test]
    fn a_calibrated_scenario_reads_its_own_moisture_and_an_uncalibrated_one_none() {
        big_stack(calibrated_reads_its_moisture);
    }

    fn calibrated_reads_its_moisture() {
        let r = measure(&LiveSim::start(&scenario(true), 1_796_104_800_000).expect("boot"));
        let m = r.moisture_pct.expect("a moisture value");
        assert!((m - 14.0).abs() < 0.5, "moisture {m}, flags {:?}", r.flags);
        let r = measure(&LiveSim::start(&scenario(false), 1_796_104_800_000).expect("boot"));
        assert_eq!(r.moisture_pct, None);
    }

    #[test]
    fn device_time_follows_the_wall_clock() {
        big_stack(wall_clock);
    }

    fn wall_clock() {
        let sim = LiveSim::start(&scenario(true), 1_796_104_800_000).expect("boot");
        let mut link = Link::connect(sim.opener("sim:t"), LinkOptions::default()).expect("link");
        link.request(Request::StartStream { period_ms: 200 })
            .expect("subscribe");
        let t0 = Instant::now();
        let mut n = 0;
        while n < 5 {
            if let Some(fringe_protocol::DeviceFrame::Reading(_)) =
                link.next_frame(Duration::from_millis(500)).expect("frame")
            {
                n += 1;
            }
            assert!(t0.elapsed() < Duration::from_secs(30), "no readings");
        }
        // Five readings at 200 ms take about a second of wall time, not
        // microseconds (a virtual clock would run ahead).
        assert!(
            t0.elapsed() >= Duration::from_millis(600),
            "{:?}",
            t0.elapsed()
        );
    }
}
