//! A simulated device inside this process, behind the link's [`Port`]
//! seam: the firmware core (`fringe_firmware::Device`) on the simulated
//! front end and a RAM flash, driven on a virtual clock.
//!
//! Bytes written to the port go straight into `Device::poll`; a read lets
//! virtual time run (in `step_ms` polls, up to `max_virtual_ms` per read)
//! until the device has sent something. Nothing sleeps, so a shift of eight
//! hours at one reading a minute runs in seconds. The demo and the tests
//! use it; `fringe sim` serves the same core over a pseudo-terminal.

use std::collections::VecDeque;
use std::io;
use std::sync::{Arc, Mutex, MutexGuard};
use std::time::Duration;

use fringe_firmware::hal::NullOutput;
use fringe_firmware::{Device, DeviceConfig, RamFlash, Scenario, SimFrontend};
use fringe_protocol::ResetCause;

use fringe_link::{LinkError, Opener, Port};

/// Flash of a simulated device, bytes.
pub const SIM_FLASH_BYTES: usize = 64 * 1024;

/// The simulated device type.
pub type SimDevice = Device<SimFrontend, RamFlash<SIM_FLASH_BYTES>, NullOutput>;

/// State shared by the port and whoever steers the simulated world.
pub struct SimState {
    /// The device.
    pub device: SimDevice,
    /// Virtual time since the device started, ms.
    pub now_ms: u64,
    /// Bytes the device sent that nobody read yet.
    pub out: VecDeque<u8>,
    /// Virtual time per poll while waiting, ms.
    pub step_ms: u64,
    /// Most virtual time one read may let pass, ms.
    pub max_virtual_ms: u64,
}

impl SimState {
    /// Lets `ms` of virtual time pass, polling the device.
    pub fn run_for(&mut self, ms: u64) {
        let end = self.now_ms + ms;
        while self.now_ms < end {
            let step = self.step_ms.min(end - self.now_ms).max(1);
            self.advance(step);
        }
    }

    fn advance(&mut self, step: u64) {
        self.now_ms += step;
        self.device.frontend_mut().advance_ms(step);
        let out = &mut self.out;
        let now = self.now_ms;
        self.device
            .poll(now, &[], &mut |b: &[u8]| out.extend(b.iter().copied()));
    }

    /// The simulated world now.
    pub fn scenario(&mut self) -> Scenario {
        *self.device.frontend_mut().scenario()
    }

    /// Changes the simulated world.
    pub fn set_scenario(&mut self, s: Scenario) {
        self.device.frontend_mut().set_scenario(s);
    }
}

/// A handle on a simulated device (cheap to clone; all clones share it).
#[derive(Clone)]
pub struct SimHandle(Arc<Mutex<SimState>>);

impl std::fmt::Debug for SimHandle {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("SimHandle")
    }
}

impl SimHandle {
    /// Boots a simulated device with `config` (simulated flag set) on a
    /// blank flash, its front end seeded with `seed`.
    ///
    /// # Errors
    /// The firmware's boot error, as text.
    pub fn boot(seed: u64, scenario: Scenario, mut config: DeviceConfig) -> Result<Self, String> {
        config.simulated = true;
        let device = Device::new(
            SimFrontend::new(seed, scenario),
            RamFlash::<SIM_FLASH_BYTES>::new(),
            NullOutput::default(),
            config,
            ResetCause::PowerOn,
            0,
        )
        .map_err(|e| format!("simulated device did not boot: {e:?}"))?;
        Ok(SimHandle(Arc::new(Mutex::new(SimState {
            device,
            now_ms: 0,
            out: VecDeque::new(),
            step_ms: 50,
            max_virtual_ms: 120_000,
        }))))
    }

    /// Locks the state (a poisoned lock is taken over: the state is plain data).
    pub fn lock(&self) -> MutexGuard<'_, SimState> {
        self.0.lock().unwrap_or_else(|p| p.into_inner())
    }

    /// An opener for [`fringe_link::Link::connect`].
    pub fn opener(&self, name: &str) -> Box<dyn Opener> {
        Box::new(SimOpener {
            sim: self.clone(),
            name: name.to_string(),
        })
    }
}

struct SimOpener {
    sim: SimHandle,
    name: String,
}

impl Opener for SimOpener {
    fn open(&mut self) -> Result<Box<dyn Port>, LinkError> {
        Ok(Box::new(SimPort(self.sim.clone())))
    }
    fn name(&self) -> &str {
        &self.name
    }
    fn baud(&self) -> u32 {
        115_200
    }
}

struct SimPort(SimHandle);

impl Port for SimPort {
    fn read_some(&mut self, buf: &mut [u8], _timeout: Duration) -> io::Result<usize> {
        let mut s = self.0.lock();
        let mut waited = 0;
        while s.out.is_empty() && waited < s.max_virtual_ms {
            let step = s.step_ms.max(1);
            s.advance(step);
            waited += step;
        }
        let n = buf.len().min(s.out.len());
        for (d, b) in buf.iter_mut().zip(s.out.drain(..n)) {
            *d = b;
        }
        Ok(n)
    }

    fn write_all(&mut self, bytes: &[u8]) -> io::Result<()> {
        let mut s = self.0.lock();
        let now = s.now_ms;
        let SimState { device, out, .. } = &mut *s;
        device.poll(now, bytes, &mut |b: &[u8]| out.extend(b.iter().copied()));
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
    use fringe_firmware::sim::Material;
    use fringe_link::{Link, LinkOptions};
    use fringe_protocol::{Request, Response};

    #[test]
    fn a_simulated_device_answers_over_the_in_process_port() {
        let cfg = DeviceConfig::new("HGM-L2-0099", [7; 32]);
        let sim = SimHandle::boot(
            3,
            Scenario {
                material: Material::Air,
                temperature_c: 31.5,
                ..Scenario::default()
            },
            cfg,
        )
        .expect("boot");
        let mut link = Link::connect(sim.opener("sim"), LinkOptions::default()).expect("handshake");
        assert_eq!(link.serial_number(), "HGM-L2-0099");
        let before = sim.lock().now_ms;
        let Response::Reading(r) = link.request(Request::Measure).expect("measure") else {
            panic!("not a reading")
        };
        assert!(
            (r.temperature_c - 31.5).abs() < 0.3,
            "temperature {}",
            r.temperature_c
        );
        assert!(sim.lock().now_ms > before, "virtual time ran");
        let mut s = sim.lock().scenario();
        s.temperature_c = 12.0;
        sim.lock().set_scenario(s);
        let Response::Reading(r) = link.request(Request::Measure).expect("measure") else {
            panic!("not a reading")
        };
        assert!(
            (r.temperature_c - 12.0).abs() < 0.3,
            "temperature {}",
            r.temperature_c
        );
    }
}
