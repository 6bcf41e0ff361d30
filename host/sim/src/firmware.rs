//! The firmware core on the simulated front end, driven by a scenario: the
//! device `fringe sim` serves on a pseudo-terminal.

use fringe_calibration::synth::SynthProduct;
use fringe_firmware::hal::NullOutput;
use fringe_firmware::sim::{Material, Scenario as FwScenario};
use fringe_firmware::{Device, DeviceConfig, RamFlash, SimFrontend};
use fringe_protocol::ResetCause;

use crate::device::{Bench, SimDevice};
use crate::scenario::{ClockStart, Conditions, Scenario};

/// Why the simulated device could not start.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[non_exhaustive]
pub enum BootError {
    /// The scenario's key is not 64 hex digits (never shown).
    #[error("scenario device.key: not 64 hex digits")]
    Key,
    /// The firmware did not boot.
    #[error("the simulated device did not boot: {0}")]
    Boot(String),
}

/// Flash of the simulated device: 1 MiB holds some 20,000 readings.
const FLASH_BYTES: usize = 1 << 20;

type Flash = &'static mut RamFlash<FLASH_BYTES>;

/// The firmware core on the simulated front end.
pub struct FirmwareSim {
    device: Option<Device<SimFrontend, Flash, NullOutput>>,
    config: DeviceConfig,
    product: SynthProduct<f32>,
    last_ms: u64,
    bench: Option<Bench>,
    /// Unix ms of device time 0 when the clock starts set (a battery-backed
    /// clock that runs on across reboots).
    clock_origin_ms: Option<u64>,
}

impl FirmwareSim {
    /// Boots a simulated device for `scenario` on a blank flash; a
    /// battery-backed clock (`clock = "set"`) starts at `wall_ms`, ms since
    /// the Unix epoch.
    ///
    /// # Errors
    /// [`BootError`].
    pub fn new(scenario: &Scenario, wall_ms: u64) -> Result<Self, BootError> {
        let key = scenario.key().ok_or(BootError::Key)?;
        let mut config = DeviceConfig::new(&scenario.device.serial, key);
        config.simulated = true;
        config.settings.interval_ms = scenario.device.interval_ms;
        // The default stale timeout, or twice the interval if that is longer.
        config.settings.stale_timeout_ms = config
            .settings
            .stale_timeout_ms
            .max(scenario.device.interval_ms.saturating_mul(2));
        let mut product = SynthProduct::<f32>::grain();
        product.mixture.eps_dry = scenario.product.dry_permittivity as f32;
        let flash: Flash = Box::leak(Box::new(RamFlash::new()));
        let fe = SimFrontend::new(scenario.device.seed, FwScenario::default());
        let device = Device::new(
            fe,
            flash,
            NullOutput::default(),
            config.clone(),
            ResetCause::PowerOn,
            0,
        )
        .map_err(|e| BootError::Boot(format!("{e:?}")))?;
        let clock_origin_ms = (scenario.device.clock == ClockStart::Set).then_some(wall_ms);
        let mut s = Self {
            device: Some(device),
            config,
            product,
            last_ms: 0,
            bench: None,
            clock_origin_ms,
        };
        s.start_clock(0);
        s.set_conditions(&scenario.at(0.0));
        Ok(s)
    }

    /// Sets the clock from the simulated battery-backed clock, if it has one.
    fn start_clock(&mut self, now_ms: u64) {
        if let (Some(d), Some(origin)) = (self.device.as_mut(), self.clock_origin_ms) {
            // The boot's ClockSet event goes to the log (nobody listens yet).
            let _ = d.set_clock_from_board(now_ms, origin + now_ms, &mut |_| {});
        }
    }

    /// Boot counter, readings since boot, loop current (mA), subscribed.
    pub fn summary(&self) -> Option<(u32, u32, f32, bool)> {
        self.device.as_ref().map(|d| {
            (
                d.boot_count(),
                d.readings_since_boot(),
                d.output_ma(),
                d.subscribed(),
            )
        })
    }
}

impl SimDevice for FirmwareSim {
    fn poll(&mut self, now_ms: u64, rx: &[u8], tx: &mut dyn FnMut(&[u8])) {
        if let Some(d) = self.device.as_mut() {
            d.frontend_mut()
                .advance_ms(now_ms.saturating_sub(self.last_ms));
            d.poll(now_ms, rx, tx);
        }
        self.last_ms = now_ms;
    }

    fn set_conditions(&mut self, c: &Conditions) {
        let mut product = self.product;
        product.mixture.bulk_density_kg_m3 = c.bulk_density_kg_m3 as f32;
        if let Some(d) = self.device.as_mut() {
            let fe = d.frontend_mut();
            let mut s = *fe.scenario();
            s.material = Material::Product {
                product,
                moisture_pct: c.moisture_pct as f32,
                water_sigma25_s_m: c.water_conductivity_s_m as f32,
            };
            s.product_present = c.product_present;
            s.temperature_c = c.temperature_c as f32;
            s.buildup_mm = c.buildup_mm as f32;
            if let Some(b) = self.bench {
                // At the bench: the window cleaned, the material in the cell.
                s.material = match b {
                    Bench::Air => Material::Air,
                    Bench::Liquid(l) => Material::Liquid {
                        eps_re: l.permittivity(c.temperature_c) as f32,
                        eps_im: 0.0,
                    },
                };
                s.product_present = true;
                s.buildup_mm = 0.0;
            }
            fe.set_scenario(s);
        }
    }

    fn set_bench(&mut self, bench: Option<Bench>) {
        self.bench = bench;
    }

    fn report(&self) -> Option<String> {
        self.summary().map(|(boot, n, ma, sub)| {
            format!(
                "boot {boot}: {n} readings taken and logged, loop {ma:.2} mA{}, {}",
                if ma <= 3.6 || ma >= 21.0 {
                    " (NE 43 failure level)"
                } else {
                    ""
                },
                if sub {
                    "a host is subscribed"
                } else {
                    "no host subscribed"
                }
            )
        })
    }

    fn reboot_if_requested(&mut self, now_ms: u64) {
        if !self.device.as_ref().is_some_and(|d| d.reboot_requested()) {
            return;
        }
        if let Some(d) = self.device.take() {
            let (fe, flash, out) = d.into_parts();
            // A boot failure leaves the device dead, as a real one would be.
            self.device = Device::new(
                fe,
                flash,
                out,
                self.config.clone(),
                ResetCause::Requested,
                now_ms,
            )
            .ok();
            self.start_clock(now_ms);
        }
    }
}
