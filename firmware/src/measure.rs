//! The measurement schedule and the estimation of one reading.
//!
//! A reading is a fixed sequence of small steps, so that [`crate::Device::poll`]
//! can run a few at a time and never block for long:
//!
//! ```text
//! for each frequency (lower first): set excitation, route to the electrodes,
//!     acquire `records` records (one step each)
//! every `reference_every` readings (and on request), for each frequency:
//!     route to the internal reference capacitor, acquire records
//! read the temperature
//! estimate: ratio -> admittance Y = ratio / R_t, phase-corrected by the
//!     reference capacitor (an ideal capacitor has no conductance)
//!     -> electrode open/short, saturation, SNR checks
//!     -> eps* per frequency (cell calibration) -> empty-line check
//!     -> fringe_calibration::estimate::estimate (inversion, product model,
//!        uncertainty, range flags)
//! ```

use fringe_calibration::cell::{admittance_to_permittivity, CellConstants};
use fringe_calibration::estimate::{estimate, permittivity_sd, Channel, EstimateInput};
use fringe_calibration::product::ProductCalibration;
use fringe_calibration::real::Cx;
use fringe_calibration::temperature::{NtcBeta, PlatinumRtd};
use fringe_protocol::{CellCal, ChannelValue, Flags, N_FREQ};

use crate::demod::{self, Averaged, Averager, C32, MAX_RECORDS};
use crate::hal::{Frontend, FrontendError, FrontendInfo, Input, RECORD_LEN};

/// Settings of the schedule and of the checks (part of [`crate::DeviceConfig`]).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MeasureConfig {
    /// Excitation frequencies, Hz, lower first.
    pub freqs_hz: [f32; N_FREQ],
    /// Excitation amplitude, V peak.
    pub amplitude_v: f32,
    /// Records averaged per frequency, 1..=16.
    pub records: u8,
    /// Run the reference check every this many readings (>= 1).
    pub reference_every: u32,
    /// Relative tolerance of the reference ratio against its baseline.
    pub reference_tolerance: f32,
    /// SNR below which a reading is flagged `LOW_SNR`, dB (per record, sensor channel).
    pub min_snr_db: f32,
    /// eps' at the upper frequency below which the line counts as empty.
    pub empty_eps_max: f32,
    /// Capacitance below which the electrodes count as open, pF (intact air is above 3 pF).
    pub open_pf: f32,
    /// Temperature sensor model.
    pub temp_sensor: TempSensor,
}

/// Temperature sensor on the board (models from `fringe_calibration::temperature`).
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum TempSensor {
    /// Pt100 (IEC 60751).
    Pt100,
    /// Pt1000 (IEC 60751).
    Pt1000,
    /// NTC thermistor, beta model.
    NtcBeta {
        /// Resistance at 25 C, ohm.
        r25_ohm: f32,
        /// Beta, K.
        beta_k: f32,
    },
}

impl TempSensor {
    /// Temperature from the sensor's resistance, C.
    pub fn temperature_c(&self, r_ohm: f32) -> Option<f32> {
        match *self {
            TempSensor::Pt100 => PlatinumRtd::<f32>::pt100().temperature_c(r_ohm).ok(),
            TempSensor::Pt1000 => PlatinumRtd::<f32>::pt1000().temperature_c(r_ohm).ok(),
            TempSensor::NtcBeta { r25_ohm, beta_k } => {
                NtcBeta { r25_ohm, beta_k }.temperature_c(r_ohm).ok()
            }
        }
    }

    /// The sensor's resistance at `t_c`, ohm (for simulators and checks).
    pub fn resistance_ohm(&self, t_c: f32) -> f32 {
        match *self {
            TempSensor::Pt100 => PlatinumRtd::<f32>::pt100().resistance_ohm(t_c),
            TempSensor::Pt1000 => PlatinumRtd::<f32>::pt1000().resistance_ohm(t_c),
            TempSensor::NtcBeta { r25_ohm, beta_k } => {
                NtcBeta { r25_ohm, beta_k }.resistance_ohm(t_c)
            }
        }
    }
}

/// Defaults: 1 MHz and 20 MHz (the project's defaults), 8 records, reference every 10
/// readings within 2 %, SNR at least 10 dB per record (air at the lower
/// frequency gives about 20 dB on the simulated board).
pub const DEFAULT_MEASURE: MeasureConfig = MeasureConfig {
    freqs_hz: [1.0e6, 20.0e6],
    amplitude_v: 1.0,
    records: 8,
    reference_every: 10,
    reference_tolerance: 0.02,
    min_snr_db: 10.0,
    empty_eps_max: 1.3,
    open_pf: 0.5,
    temp_sensor: TempSensor::Pt100,
};

/// What a measurement job includes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Job {
    /// Measure the electrodes (a reading).
    pub electrodes: bool,
    /// Measure the internal reference.
    pub reference: bool,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Step {
    Setup { pass: u8, freq: u8 },
    Record { pass: u8, freq: u8, n: u8 },
    Temperature,
    Done,
}

/// Raw results of a finished job, before estimation.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct Raw {
    /// Electrode channel per frequency.
    pub electrodes: [Averaged; N_FREQ],
    /// Reference channel per frequency (when measured).
    pub reference: Option<[Averaged; N_FREQ]>,
    /// Temperature code, `None` on a sensor read failure.
    pub temperature_raw: Option<u32>,
    /// A front-end call failed during the job.
    pub frontend_error: bool,
}

/// Runs one job step by step.
#[derive(Debug, Clone)]
pub struct Runner {
    job: Job,
    step: Step,
    avg: Averager,
    /// The front end failed (setting up or acquiring) in the frequency
    /// under way: its result is given no value.
    failed: bool,
    raw: Raw,
    sensor: [i16; RECORD_LEN],
    reference: [i16; RECORD_LEN],
}

impl Default for Runner {
    fn default() -> Self {
        Self::new()
    }
}

const PASS_ELECTRODES: u8 = 0;
const PASS_REFERENCE: u8 = 1;

impl Runner {
    /// Idle.
    pub const fn new() -> Self {
        Self {
            job: Job {
                electrodes: false,
                reference: false,
            },
            step: Step::Done,
            avg: Averager::new(),
            failed: false,
            raw: Raw {
                electrodes: [ZERO_AVG; N_FREQ],
                reference: None,
                temperature_raw: None,
                frontend_error: false,
            },
            sensor: [0; RECORD_LEN],
            reference: [0; RECORD_LEN],
        }
    }

    /// Whether a job is running.
    pub fn busy(&self) -> bool {
        self.step != Step::Done
    }

    /// The job running (or last run).
    pub fn job(&self) -> Job {
        self.job
    }

    /// Starts a job (drops any running one).
    pub fn start(&mut self, job: Job) {
        self.job = job;
        self.raw = Raw::default();
        self.avg.clear();
        self.step = if job.electrodes {
            Step::Setup {
                pass: PASS_ELECTRODES,
                freq: 0,
            }
        } else if job.reference {
            Step::Setup {
                pass: PASS_REFERENCE,
                freq: 0,
            }
        } else {
            Step::Temperature
        };
    }

    /// Runs one step; returns the raw result when the job is complete.
    pub fn step<F: Frontend>(&mut self, fe: &mut F, cfg: &MeasureConfig) -> Option<Raw> {
        let info = fe.info();
        let records = cfg.records.clamp(1, MAX_RECORDS as u8);
        // The reference is small next to most products: twice the records.
        let records_for = |pass: u8| {
            if pass == PASS_REFERENCE {
                records.saturating_mul(2).min(MAX_RECORDS as u8)
            } else {
                records
            }
        };
        match self.step {
            Step::Done => return None,
            Step::Setup { pass, freq } => {
                let f = cfg
                    .freqs_hz
                    .get(usize::from(freq))
                    .copied()
                    .unwrap_or(f32::NAN);
                let input = if pass == PASS_REFERENCE {
                    Input::Reference
                } else {
                    Input::Electrodes
                };
                let ok =
                    fe.select_input(input).is_ok() && fe.set_excitation(f, cfg.amplitude_v).is_ok();
                self.raw.frontend_error |= !ok;
                self.failed = !ok;
                self.avg.clear();
                self.step = Step::Record { pass, freq, n: 0 };
            }
            Step::Record { pass, freq, n } => {
                match fe.acquire(&mut self.sensor, &mut self.reference) {
                    // Not finished: the same record again at the next step.
                    Err(FrontendError::NotReady) => return None,
                    Ok(()) => {
                        self.avg.push(demod::record(
                            &self.sensor,
                            &self.reference,
                            info.if_bin,
                            info.adc_full_scale,
                        ));
                    }
                    Err(
                        FrontendError::Bus | FrontendError::NotLocked | FrontendError::Unsupported,
                    ) => {
                        self.raw.frontend_error = true;
                        self.failed = true;
                    }
                }
                let n = n + 1;
                if n < records_for(pass) {
                    self.step = Step::Record { pass, freq, n };
                } else {
                    let mut done = self.avg.finish();
                    // A frequency whose set-up or a record failed has no
                    // value: a failed excitation write leaves the
                    // synthesiser on the other frequency, whose clean
                    // records were taken for this one (a wrong moisture, or
                    // a misleading out-of-range; found by review). The
                    // reading then has no moisture (low SNR, no valid input).
                    if self.failed {
                        done.ratio = C32::new(f32::NAN, f32::NAN);
                        done.ratio_se = f32::NAN;
                        done.kept = 0;
                    }
                    if pass == PASS_ELECTRODES {
                        if let Some(slot) = self.raw.electrodes.get_mut(usize::from(freq)) {
                            *slot = done;
                        }
                    } else {
                        let r = self.raw.reference.get_or_insert([ZERO_AVG; N_FREQ]);
                        if let Some(slot) = r.get_mut(usize::from(freq)) {
                            *slot = done;
                        }
                    }
                    self.step = if usize::from(freq) + 1 < N_FREQ {
                        Step::Setup {
                            pass,
                            freq: freq + 1,
                        }
                    } else if pass == PASS_ELECTRODES && self.job.reference {
                        Step::Setup {
                            pass: PASS_REFERENCE,
                            freq: 0,
                        }
                    } else {
                        Step::Temperature
                    };
                }
            }
            Step::Temperature => {
                // Leave the sensor channel on the electrodes between jobs.
                let _ = fe.select_input(Input::Electrodes);
                self.raw.temperature_raw = fe.read_temperature_raw().ok();
                self.raw.frontend_error |= self.raw.temperature_raw.is_none();
                self.step = Step::Done;
                return Some(self.raw);
            }
        }
        None
    }
}

const ZERO_AVG: Averaged = Averaged {
    ratio: C32::new(0.0, 0.0),
    ratio_se: 0.0,
    kept: 0,
    rejected: 0,
    min_snr: 0.0,
    max_sensor_amplitude: 0.0,
    min_reference_amplitude: 0.0,
    clipped: 0,
};

/// What the reference capacitor says about the chain, per frequency.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ChainState {
    /// Measured Y_ref / (j w C_ref nominal): the chain's complex gain error.
    pub gain: [C32; N_FREQ],
    /// Standard deviation of the phase of `gain`, radians (its measurement noise).
    pub phase_sd: [f32; N_FREQ],
}

impl Default for ChainState {
    fn default() -> Self {
        Self {
            gain: [C32::new(1.0, 0.0); N_FREQ],
            phase_sd: [0.0; N_FREQ],
        }
    }
}

/// Reference checks averaged by [`ChainState::update`] at most.
pub const CHAIN_AVERAGE: u32 = 8;

impl ChainState {
    /// Folds a new reference measurement into the running estimate: the mean
    /// of the last checks (exponential with weight 1/min(n, 8), so a slow
    /// drift is followed within about 8 checks), its phase noise propagated
    /// exactly (v = (1-a)^2 v + a^2 s^2). A jump beyond 5 standard deviations
    /// and 1 % restarts the average at the new value.
    pub fn update(&self, new: &ChainState, n: &mut u32) -> ChainState {
        *n = n.saturating_add(1);
        let a = 1.0 / (*n).min(CHAIN_AVERAGE) as f32;
        let mut out = *self;
        for (((g, sd), ng), &nsd) in out
            .gain
            .iter_mut()
            .zip(out.phase_sd.iter_mut())
            .zip(new.gain.iter())
            .zip(new.phase_sd.iter())
        {
            let d = ng.over(*g);
            let jump = (d.abs() - 1.0).abs().max(d.arg().abs());
            if jump > 0.01 && jump > 5.0 * libm::hypotf(*sd, nsd) {
                *n = 1;
                return *new;
            }
            *g = g.scale(1.0 - a).plus(ng.scale(a));
            *sd = libm::sqrtf((1.0 - a) * (1.0 - a) * *sd * *sd + a * a * nsd * nsd);
        }
        out
    }

    /// |gain| per frequency (the "reference ratio").
    pub fn ratios(&self) -> [f32; N_FREQ] {
        self.gain.map(C32::abs)
    }
}

/// Updates the chain state from a reference measurement; `None` if it is unusable.
pub fn chain_from_reference<F: Frontend>(
    fe: &F,
    info: &FrontendInfo,
    cfg: &MeasureConfig,
    r: &[Averaged; N_FREQ],
) -> Option<ChainState> {
    let mut out = ChainState::default();
    for (((g, sd), a), &f) in out
        .gain
        .iter_mut()
        .zip(out.phase_sd.iter_mut())
        .zip(r.iter())
        .zip(cfg.freqs_hz.iter())
    {
        let w = 2.0 * core::f32::consts::PI * f;
        let y = a.ratio.scale(1.0 / fe.transimpedance_ohm(f));
        let nominal = C32::new(0.0, w * info.reference_pf * 1e-12);
        let gain = y.over(nominal);
        if !gain.is_finite() || a.kept == 0 || a.clipped > 0 || !(0.5..2.0).contains(&gain.abs()) {
            return None;
        }
        *g = gain;
        *sd = a.ratio_se / a.ratio.abs();
    }
    Some(out)
}

/// The reading's numbers before sequence, time and ids are attached.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Outcome {
    /// Per-frequency values.
    pub channels: [ChannelValue; N_FREQ],
    /// Temperature, C (NaN on a sensor fault).
    pub temperature_c: f32,
    /// Moisture, if any.
    pub moisture_pct: Option<f32>,
    /// Standard uncertainty, % (NaN without moisture).
    pub uncertainty_pct: f32,
    /// Quality flags.
    pub flags: Flags,
}

/// Sensor resistance to temperature.
pub fn temperature_c(raw: Option<u32>, info: &FrontendInfo, sensor: TempSensor) -> Option<f32> {
    let raw = raw?;
    if raw == 0 || raw >= (1 << 24) - 1 {
        return None;
    }
    let r = raw as f32 / (1u32 << 24) as f32 * info.temp_ref_ohm;
    let t = sensor.temperature_c(r)?;
    // The board's specified range: outside it the sensor is taken as faulty.
    (-50.0..=250.0).contains(&t).then_some(t)
}

/// Estimation of one reading (see the module doc); `bulk_density_kg_m3`
/// is the plant's bulk density while one holds (protocol 1.4), for a
/// calibration with a density input.
#[allow(clippy::too_many_arguments)]
pub fn evaluate<F: Frontend>(
    fe: &F,
    cfg: &MeasureConfig,
    raw: &Raw,
    chain: &ChainState,
    cell: Option<&CellCal>,
    product: Option<&ProductCalibration<f32>>,
    bulk_density_kg_m3: Option<f32>,
) -> Outcome {
    let info = fe.info();
    let mut flags = Flags::empty();
    let mut channels = [ChannelValue::default(); N_FREQ];
    let mut est_ch = [Channel {
        freq_hz: 0.0,
        eps_re: f32::NAN,
        eps_loss: f32::NAN,
        sd: f32::NAN,
    }; N_FREQ];
    let min_snr = libm::powf(10.0, cfg.min_snr_db / 10.0);
    let mut ys = [C32::default(); N_FREQ];
    for (i, ((a, &f), (g, &g_sd))) in raw
        .electrodes
        .iter()
        .zip(cfg.freqs_hz.iter())
        .zip(chain.gain.iter().zip(chain.phase_sd.iter()))
        .enumerate()
    {
        let rt = fe.transimpedance_ohm(f);
        // Phase correction only: the magnitude is the cell calibration's business,
        // and its drift is what the reference check reports.
        let unit = g.scale(1.0 / g.abs());
        let y = a.ratio.scale(1.0 / rt).over(unit);
        // The reading's own noise plus that of the phase correction (which
        // turns |Y| sigma_phi of susceptance into conductance and back).
        let y_sd = libm::hypotf(a.ratio_se / rt, y.abs() * g_sd);
        if let Some(y_slot) = ys.get_mut(i) {
            *y_slot = y;
        }
        if a.clipped > 0 {
            flags |= Flags::SATURATED;
        }
        if a.kept == 0 || !y.is_finite() || a.min_snr < min_snr {
            flags |= Flags::LOW_SNR;
        }
        let mut cv = ChannelValue {
            g_s: y.re,
            b_s: y.im,
            eps_re: f32::NAN,
            eps_im: f32::NAN,
        };
        if let Some(p) = cell.and_then(|c| c.points.get(i)) {
            let cc = CellConstants {
                stray_pf: p.stray_pf,
                cell_pf: p.cell_pf,
                g_offset_s: p.g_offset_s,
            };
            if let Ok(e) = admittance_to_permittivity(f, Cx::new(y.re, y.im), &cc) {
                cv.eps_re = e.re;
                cv.eps_im = -e.im;
                if let Some(ch) = est_ch.get_mut(i) {
                    *ch = Channel {
                        freq_hz: f,
                        eps_re: e.re,
                        eps_loss: -e.im,
                        sd: permittivity_sd(f, y_sd, &cc),
                    };
                }
            }
        }
        if let Some(slot) = channels.get_mut(i) {
            *slot = cv;
        }
    }
    // Electrodes: open when even the stray capacitance is missing; short when
    // the sensor channel saturates and conduction dominates at the upper frequency.
    let (lo, hi) = (
        ys.first().copied().unwrap_or_default(),
        ys.get(1).copied().unwrap_or_default(),
    );
    let w_lo = 2.0 * core::f32::consts::PI * cfg.freqs_hz.first().copied().unwrap_or(1.0);
    if lo.im < w_lo * cfg.open_pf * 1e-12
        || (flags.contains(Flags::SATURATED) && hi.re > 3.0 * hi.im.abs())
    {
        flags |= Flags::ELECTRODE_FAULT;
    }
    if raw
        .reference
        .is_some_and(|r| r.iter().any(|a| a.clipped > 0))
    {
        flags |= Flags::SATURATED;
    }
    let t = temperature_c(raw.temperature_raw, &info, cfg.temp_sensor);
    if t.is_none() {
        flags |= Flags::TEMP_SENSOR_FAULT;
    }
    if cell.is_none() {
        flags |= Flags::NOT_CALIBRATED;
    }
    let hi_eps = est_ch.get(1).map_or(f32::NAN, |c| c.eps_re);
    if hi_eps.is_finite() && hi_eps < cfg.empty_eps_max {
        flags |= Flags::NO_PRODUCT;
    }
    let mut moisture = None;
    let mut u = f32::NAN;
    let blocked =
        Flags::NO_PRODUCT | Flags::ELECTRODE_FAULT | Flags::SATURATED | Flags::TEMP_SENSOR_FAULT;
    if !flags.intersects(blocked) {
        let e = estimate(
            &EstimateInput {
                channels: est_ch,
                temperature_c: t.unwrap_or(f32::NAN),
                bulk_density_kg_m3,
            },
            product,
        );
        flags |= Flags::from_bits_truncate(e.flags.bits());
        moisture = e.moisture_pct;
        u = e.uncertainty_pct;
        // Beyond what a reading carries (a dry-basis moisture above 327.67
        // %, sent as 327.67): out of range, whatever the calibration's
        // range says (one fitted before its range was held there).
        if moisture.is_some_and(fringe_protocol::quant::moisture_beyond_reading) {
            flags |= Flags::OUT_OF_RANGE;
        }
    } else if product.is_none() {
        flags |= Flags::NOT_CALIBRATED;
    }
    Outcome {
        channels,
        temperature_c: t.unwrap_or(f32::NAN),
        moisture_pct: moisture,
        uncertainty_pct: u,
        flags,
    }
}
