//! The firmware core on the simulated front end, driven by a scenario: the
//! device `fringe sim` serves on a pseudo-terminal.

use fringe_calibration::synth::SynthProduct;
use fringe_firmware::hal::NullOutput;
use fringe_firmware::sim::{Material, Scenario as FwScenario};
use fringe_firmware::{Device, DeviceConfig, RamFlash, SimFrontend};
use fringe_protocol::ResetCause;

use fringe_firmware::sim::{exact_calibration_on, SIM_CELL};
use fringe_protocol::auth::sign;
use fringe_protocol::frame::encode_vec;
use fringe_protocol::{
    Basis, CellCal, CellPoint, DeviceFrame, FrameDecoder, HostFrame, ProductCal, Request, Response,
};

use crate::device::{Bench, SimDevice};
use crate::scenario::{
    switch_name, CalBasis, CalibrationSection, CellCalSource, ClockStart, Conditions,
    ProductCalSource, Scenario,
};

/// The simulated cell at the device's two frequencies `freqs_hz` as
/// a bench calibration finds it: its stray and cell capacitances seen
/// through the lead resonance, and the board's sensor/reference channel
/// gain ratio (consistency values of the simulator, not a measurement).
pub fn simulator_cell(freqs_hz: [f32; 2]) -> CellCal {
    let g = 1.012 / 0.994;
    let p = |f: f32| {
        let h = 1.0 - (f / SIM_CELL.f_res_hz) * (f / SIM_CELL.f_res_hz);
        CellPoint {
            freq_hz: f,
            stray_pf: SIM_CELL.stray_pf * g / h,
            cell_pf: SIM_CELL.cell_pf * g / h,
            g_offset_s: SIM_CELL.g_offset_s * g,
        }
    };
    CellCal {
        points: [p(freqs_hz[0]), p(freqs_hz[1])],
        reference_ratio: 0.0,
        made_s: 0,
    }
}

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
    /// Device time at which the front end is done with the job steps of
    /// the last poll.
    ready_ms: u64,
    bench: Option<Bench>,
    /// Unix ms of device time 0 when the clock starts set (a battery-backed
    /// clock that runs on across reboots).
    clock_origin_ms: Option<u64>,
    /// The device's key (for the scenario's own signed writes).
    key: [u8; 32],
    /// The scenario's later calibration, until it is written: when (device
    /// ms), what, and the tries the device refused so far.
    switch: Option<(u64, ProductCal, u32)>,
    /// The device refused the scenario's later calibration five times (said
    /// in [`SimDevice::report`]).
    switch_given_up: bool,
    /// Whether the last byte from the host ended a frame (or none came
    /// yet): the device's decoder holds no part of a host's frame, so a
    /// frame of the scenario's own can go in between.
    host_idle: bool,
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
        config.density_input = scenario.device.density_input;
        config.static_terms = scenario.device.static_terms;
        config.sigma_hold = scenario.device.sigma_hold;
        config.relaxation_density = scenario.device.relaxation_density;
        config.wide_span = scenario.device.wide_span;
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
            ready_ms: 0,
            bench: None,
            clock_origin_ms,
            key,
            switch: None,
            switch_given_up: false,
            host_idle: true,
        };
        s.start_clock(0);
        s.set_conditions(&scenario.at(0.0));
        if let Some(c) = &scenario.calibration {
            let name = c.product_name.as_deref().unwrap_or(&scenario.product.name);
            // Calibrated at the line's bulk density at the start (a
            // density change later reads as a moisture change, as it does
            // on a real line).
            let mut product = s.product;
            product.mixture.bulk_density_kg_m3 = scenario.at(0.0).bulk_density_kg_m3 as f32;
            s.commission(&key, c, &product, name)?;
            if let Some(w) = &c.switch {
                s.switch = Some((
                    (w.at_s * 1000.0).round() as u64,
                    exact_calibration_on(&product, &switch_name(name, w), basis_of(w.basis)),
                    0,
                ));
            }
        }
        Ok(s)
    }

    /// Writes the scenario's calibrations into the device as a host would
    /// (signed requests through its own protocol handler): the cell
    /// calibration, the product calibration of `product` in slot 0, and
    /// selects it.
    fn commission(
        &mut self,
        key: &[u8; 32],
        c: &CalibrationSection,
        product: &SynthProduct<f32>,
        name: &str,
    ) -> Result<(), BootError> {
        let cell = match c.cell {
            CellCalSource::Simulator => simulator_cell(self.config.measure.freqs_hz),
        };
        let product = match c.product {
            ProductCalSource::Exact => exact_calibration_on(product, name, basis_of(c.basis)),
        };
        let writes = [
            Request::WriteCellCal(cell),
            Request::WriteProductCal {
                slot: 0,
                cal: product,
            },
            Request::SelectProduct { slot: 0 },
        ];
        let serial = self.config.serial.clone();
        let Some(d) = self.device.as_mut() else {
            return Err(BootError::Boot("no device".into()));
        };
        for (i, request) in writes.into_iter().enumerate() {
            let what = format!("{request:?}");
            let id = i as u16 + 1;
            let auth = sign(key, serial.as_str(), u32::from(id), &request);
            let frame = encode_vec(&HostFrame { id, auth, request })
                .map_err(|e| BootError::Boot(format!("commissioning frame: {e}")))?;
            let mut out = Vec::new();
            d.poll(0, &frame, &mut |b: &[u8]| out.extend_from_slice(b));
            let mut dec = FrameDecoder::<DeviceFrame>::new();
            let answered = dec
                .push(&out)
                .flatten()
                .any(|f| matches!(f, DeviceFrame::Response { id: got, .. } if got == id));
            if !answered {
                return Err(BootError::Boot(format!(
                    "commissioning: the device did not accept {}",
                    what.split(['(', ' ', '{']).next().unwrap_or("a request")
                )));
            }
        }
        Ok(())
    }

    /// Writes the scenario's later calibration `cal` into slot 1 and
    /// selects it, through the device's own signed requests (the counter
    /// one above the one the device stored, as a host would sign them).
    /// The answers are not sent to the host (it did not ask); anything else
    /// the device sends meanwhile (a reading, the selection's event) is.
    fn switch_calibration(
        &mut self,
        now_ms: u64,
        cal: ProductCal,
        tx: &mut dyn FnMut(&[u8]),
    ) -> bool {
        let (key, serial) = (self.key, self.config.serial.clone());
        let Some(d) = self.device.as_mut() else {
            return false;
        };
        // One request through the device's own handler: its answer (None
        // for an error), everything else passed on to the host. Id 0 is
        // one a host never sends (fringe_link counts from 1), so no answer
        // of the host's is taken for one of these.
        let mut ask = |auth, request| -> Option<Response> {
            let id = 0;
            let Ok(bytes) = encode_vec(&HostFrame { id, auth, request }) else {
                return None;
            };
            let mut out = Vec::new();
            d.poll(now_ms, &bytes, &mut |b: &[u8]| out.extend_from_slice(b));
            let mut answer = None;
            for chunk in out.split_inclusive(|b| *b == 0) {
                let mut dec = FrameDecoder::<DeviceFrame>::new();
                match dec.push(chunk).flatten().next() {
                    Some(DeviceFrame::Response { id: got, response }) if got == id => {
                        answer = Some(response);
                    }
                    Some(DeviceFrame::Error { id: got, .. }) if got == id => {}
                    _ => tx(chunk),
                }
            }
            answer
        };
        let Some(Response::Status(st)) = ask(None, Request::Status) else {
            return false;
        };
        let writes = [
            Request::WriteProductCal { slot: 1, cal },
            Request::SelectProduct { slot: 1 },
        ];
        for (k, request) in writes.into_iter().enumerate() {
            let counter = st.write_counter.wrapping_add(1 + k as u32);
            let auth = sign(&key, serial.as_str(), counter, &request);
            if ask(auth, request).is_none() {
                return false;
            }
        }
        true
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
            let before = d.frontend_mut().time_s();
            d.poll(now_ms, rx, tx);
            // The simulated front end counts the time its settling and
            // records take; the job goes on when that time has passed.
            let spent_s = d.frontend_mut().time_s() - before;
            self.ready_ms = now_ms + (spent_s * 1000.0).round() as u64;
        }
        self.last_ms = now_ms;
        if let Some(&last) = rx.last() {
            self.host_idle = last == 0;
        }
        if self.host_idle && self.switch.as_ref().is_some_and(|(at, ..)| now_ms >= *at) {
            if let Some((_, cal, tries)) = self.switch.take() {
                // A refusal (writes held off after failed authentications,
                // a host's write signed with the same counter just before)
                // is tried again a second later, five times in all.
                if !self.switch_calibration(now_ms, cal.clone(), tx) {
                    if tries + 1 < 5 {
                        self.switch = Some((now_ms + 1000, cal, tries + 1));
                    } else {
                        self.switch_given_up = true;
                    }
                }
            }
        }
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
            ) + if self.switch_given_up {
                "; the scenario's [calibration.switch] was refused by the device 5 times and given up"
            } else {
                ""
            }
        })
    }

    fn busy_until_ms(&self) -> Option<u64> {
        self.device
            .as_ref()
            .is_some_and(|d| d.job_running())
            .then_some(self.ready_ms)
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

/// The firmware's basis of a scenario's calibration.
fn basis_of(b: CalBasis) -> Basis {
    match b {
        CalBasis::Wet => Basis::Wet,
        CalBasis::Dry => Basis::Dry,
    }
}
