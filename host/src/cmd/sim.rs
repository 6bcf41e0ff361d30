//! `fringe sim`: glue between the scenario, the firmware core and the pty.

use std::io::Write;
use std::sync::atomic::AtomicBool;

use anyhow::Context;
use fringe_calibration::synth::SynthProduct;
use fringe_firmware::hal::NullOutput;
use fringe_firmware::sim::{Material, Scenario as FwScenario};
use fringe_firmware::{Device, DeviceConfig, RamFlash, SimFrontend};
use fringe_protocol::ResetCause;

use crate::cli::SimArgs;
use crate::sim::scenario::{ClockStart, Conditions, Scenario};
use crate::sim::{Bench, SimDevice, SimOptions};

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
    /// Boots a simulated device for `scenario` on a blank flash.
    ///
    /// # Errors
    /// The device's boot error.
    pub fn new(scenario: &Scenario) -> anyhow::Result<Self> {
        let key = scenario.key().context("scenario device.key")?;
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
        .map_err(|e| anyhow::anyhow!("the simulated device did not boot: {e:?}"))?;
        let clock_origin_ms = (scenario.device.clock == ClockStart::Set)
            .then(|| crate::store::now_unix_ms().max(0) as u64);
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

/// `fringe sim`.
///
/// # Errors
/// A bad scenario file, boot failure, or pty failure.
pub fn sim(args: &SimArgs, stop: &AtomicBool) -> anyhow::Result<()> {
    let scenario = Scenario::load(&args.scenario)?;
    let mut dev = FirmwareSim::new(&scenario)?;
    let opts = SimOptions {
        link: args.link.clone(),
        record: args.record.clone(),
        duration: args.duration_s.map(std::time::Duration::from_secs_f64),
        bench: args.bench.clone(),
    };
    let serial = scenario.device.serial.clone();
    let title = scenario.name.clone();
    let stats = crate::sim::run(&mut dev, &scenario, &opts, stop, &mut |path| {
        let mut o = std::io::stdout().lock();
        match &opts.link {
            Some(l) => writeln!(
                o,
                "fringe sim: {serial} ({title}) on {path} (link {})",
                l.display()
            )?,
            None => writeln!(o, "fringe sim: {serial} ({title}) on {path}")?,
        }
        o.flush()
    })?;
    eprintln!(
        "fringe sim: stopped; {} bytes in, {} bytes out, {} lost while no host read, {} disconnects",
        stats.rx_bytes, stats.tx_bytes, stats.tx_lost, stats.disconnects
    );
    Ok(())
}
