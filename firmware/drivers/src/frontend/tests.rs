//! Tests of the front end built from mocked drivers: the SPI transactions
//! each call makes (listed from the data sheets through each driver's
//! `expect` module), error mapping, and the equivalence with the simulated
//! front end through the firmware's own measurement chain.

use super::*;
use crate::mock::NoDelay;
use crate::{ad9959, ads131m02, dac161s997, max31865};
use embedded_hal_mock::eh1::digital::{Mock as Pin, State, Transaction as P};
use embedded_hal_mock::eh1::spi::{Mock as Spi, Transaction as T};
use fringe_firmware::measure::{
    chain_from_reference, evaluate, Job, MeasureConfig, Runner, DEFAULT_MEASURE,
};
use fringe_firmware::protocol::{CellCal, CellPoint};
use fringe_firmware::sim::{Material, Scenario, SimFrontend, SIM_CELL};

type Fe = AnalogFrontend<Spi<u8>, Pin, Pin, Spi<u8>, Pin, Spi<u8>, NoDelay, Pin, NoDelay>;

/// The mocks of one front end, kept to call `.done()` on.
struct Mocks {
    dds: Spi<u8>,
    reset: Pin,
    update: Pin,
    adc: Spi<u8>,
    drdy: Pin,
    rtd: Spi<u8>,
    switch: Pin,
}

impl Mocks {
    fn done(mut self) {
        self.dds.done();
        self.reset.done();
        self.update.done();
        self.adc.done();
        self.drdy.done();
        self.rtd.done();
        self.switch.done();
    }
}

/// Expected transactions, per bus and pin.
#[derive(Default)]
struct Script {
    dds: Vec<T<u8>>,
    reset: Vec<P>,
    update: Vec<P>,
    adc: Vec<T<u8>>,
    drdy: Vec<P>,
    rtd: Vec<T<u8>>,
    switch: Vec<P>,
}

impl Script {
    fn build(&self, design: Design) -> (Fe, Mocks) {
        let m = Mocks {
            dds: Spi::new(&self.dds),
            reset: Pin::new(&self.reset),
            update: Pin::new(&self.update),
            adc: Spi::new(&self.adc),
            drdy: Pin::new(&self.drdy),
            rtd: Spi::new(&self.rtd),
            switch: Pin::new(&self.switch),
        };
        let fe = AnalogFrontend::new(
            design,
            Ad9959::new(m.dds.clone(), m.reset.clone(), m.update.clone(), design.dds),
            Ads131m02::new(m.adc.clone(), m.drdy.clone()),
            Max31865::new(m.rtd.clone(), NoDelay, design.rtd_wiring, 4.3),
            m.switch.clone(),
            NoDelay,
        );
        (fe, m)
    }

    /// `set_excitation(f, a)` on the DDS: CH0 at f with its amplitude,
    /// CH1 and CH2 (CSR 0x60) at f - IF at the LO level, both with
    /// autoclear, then one IO_UPDATE pulse.
    fn excitation(&mut self, design: &Design, freq_hz: u32, asf: u16) {
        let ftw = ad9959::ftw(freq_hz, design.dds.sysclk_hz()).unwrap();
        let lo = ftw - design.if_ftw().unwrap();
        self.dds
            .extend(ad9959::expect::set_channels(0x10, ftw, asf, true));
        self.dds
            .extend(ad9959::expect::set_channels(0x60, lo, design.lo_asf, true));
        self.update
            .extend([P::set(State::High), P::set(State::Low)]);
    }

    /// One ADC sample frame with DRDY low: 16-bit codes as the top of 24-bit
    /// words, with low bytes that the front end must drop.
    fn sample(&mut self, s: i16, r: i16) {
        self.drdy.push(P::get(State::Low));
        self.adc.extend(ads131m02::expect::sample(
            (i32::from(s) << 8) | 0x5A,
            (i32::from(r) << 8) | 0xA5,
        ));
    }
}

#[test]
fn the_design_is_coherent_and_as_documented() {
    // IF word: 34 360 x 2048 x 32 / (2 x 128 x 256) = 34 360.
    assert_eq!(DESIGN.if_ftw(), Some(34_360));
    // Exactly 1/8 IF cycle a sample (32 cycles in 256 samples), in words.
    assert_eq!(
        u64::from(DESIGN.if_ftw().unwrap()) * 2 * 128 * 256,
        u64::from(DESIGN.adc_clock_ftw) * 32
    );
    // 34 360 x 2048 x 500 MHz / 2^32 = 8 192 062.38 Hz; / 256 = 32 000.24 SPS;
    // IF 34 360 x 500 MHz / 2^32 = 4 000.03 Hz (computed outside, in Python).
    assert_eq!(DESIGN.sample_rate_mhz(), 32_000_243);
    assert_eq!(ad9959::freq_mhz(34_360, 500_000_000), 4_000_030);
    // The RTD limits are 40 and 250 ohm on 430 ohm.
    let ohm = |r: u16| f32::from(r) / 32768.0 * DESIGN.temp_ref_ohm;
    assert!((ohm(DESIGN.rtd_limits.0) - 40.0).abs() < 0.02);
    assert!((ohm(DESIGN.rtd_limits.1) - 250.0).abs() < 0.02);
    // A design whose IF is not a whole number of words is refused.
    let bad = Design {
        adc_clock_ftw: DESIGN.adc_clock_ftw + 1,
        ..DESIGN
    };
    assert_eq!(bad.if_ftw(), None);
}

#[test]
fn init_brings_the_chips_up_in_clock_order() {
    let mut s = Script::default();
    // AD9959: reset pulse, CSR, FR1, IO_UPDATE, FR1 read back.
    s.reset.extend([P::set(State::High), P::set(State::Low)]);
    s.dds.extend(ad9959::expect::write(0x00, 0xF2));
    s.dds.extend(ad9959::expect::write(0x01, DESIGN.dds.fr1()));
    s.dds.extend(ad9959::expect::read(0x01, DESIGN.dds.fr1()));
    // CH3 (CSR 0x80) as the ADC clock, no autoclear, full amplitude; IO_UPDATE.
    s.dds.extend(ad9959::expect::set_channels(
        0x80,
        DESIGN.adc_clock_ftw,
        1023,
        false,
    ));
    s.update.extend([
        P::set(State::High),
        P::set(State::Low),
        P::set(State::High),
        P::set(State::Low),
    ]);
    s.adc.extend(ads131m02::expect::init(Osr::X128));
    s.rtd.extend(max31865::expect::init(
        DESIGN.rtd_limits.0,
        DESIGN.rtd_limits.1,
    ));
    s.switch.push(P::set(State::Low));
    let (mut fe, m) = s.build(DESIGN);
    fe.init().unwrap();
    m.done();
}

#[test]
fn excitation_sets_ch0_and_both_los_below_it() {
    let mut s = Script::default();
    // 1 MHz at full amplitude: CH0 word 0x0083_126F, LO word 34 360 lower.
    s.excitation(&DESIGN, 1_000_000, 1023);
    // 20 MHz at 0.5 V: ASF round(511.5) = 512.
    s.excitation(&DESIGN, 20_000_000, 512);
    let (mut fe, m) = s.build(DESIGN);
    fe.set_excitation(1.0e6, 1.0).unwrap();
    fe.set_excitation(20.0e6, 0.5).unwrap();
    // Outside the design: refused before any transaction.
    assert_eq!(
        fe.set_excitation(60.0e6, 0.5),
        Err(FrontendError::Unsupported)
    );
    assert_eq!(
        fe.set_excitation(1.0e6, 1.5),
        Err(FrontendError::Unsupported)
    );
    assert_eq!(
        fe.set_excitation(f32::NAN, 0.5),
        Err(FrontendError::Unsupported)
    );
    m.done();
}

#[test]
fn transimpedance_by_band() {
    let (fe, m) = Script::default().build(DESIGN);
    assert_eq!(fe.transimpedance_ohm(1.0e6), 120.0);
    assert_eq!(fe.transimpedance_ohm(5.0e6), 120.0);
    assert_eq!(fe.transimpedance_ohm(20.0e6), 50.0);
    assert_eq!(fe.info().if_bin, 32);
    m.done();
}

#[test]
fn an_adc_without_clock_is_not_locked_and_a_reset_adc_is_set_up_again() {
    let mut s = Script::default();
    // First record: DRDY never falls (no CLKIN from the DDS).
    s.drdy
        .extend((0..ads131m02::DRDY_POLLS).map(|_| P::get(State::High)));
    // Second record: the device reports a reset (STATUS[10]).
    s.drdy.push(P::get(State::Low));
    s.adc
        .extend(ads131m02::expect::frame(0, None, 0x0503, 0, 0));
    // Third: set up again, 4 samples dropped, then a full record.
    s.adc.extend(ads131m02::expect::init(Osr::X128));
    for _ in 0..DESIGN.discard {
        s.sample(0, 0);
    }
    for n in 0..RECORD_LEN {
        s.sample(n as i16, -(n as i16));
    }
    let (mut fe, m) = s.build(DESIGN);
    let (mut a, mut b) = ([0i16; RECORD_LEN], [0i16; RECORD_LEN]);
    assert_eq!(fe.acquire(&mut a, &mut b), Err(FrontendError::NotLocked));
    // The timeout came on the first sample to drop; after the reset all
    // four are dropped again before the record.
    assert_eq!(fe.acquire(&mut a, &mut b), Err(FrontendError::Bus));
    fe.acquire(&mut a, &mut b).unwrap();
    assert_eq!((a[7], b[7]), (7, -7));
    m.done();
}

#[test]
fn temperature_is_the_15_bit_ratio_scaled_to_24_bits() {
    let mut s = Script::default();
    s.rtd.extend(max31865::expect::ratio(7620));
    s.rtd.extend(max31865::expect::read(0x01, &[0xFF, 0xFF]));
    s.rtd.extend(max31865::expect::read(0x07, &[0x80]));
    s.rtd.extend(max31865::expect::write(0x00, &[0xC3]));
    let (mut fe, m) = s.build(DESIGN);
    assert_eq!(fe.read_temperature_raw(), Ok(7620 << 9));
    // An open RTD is a failed read (the core flags the temperature sensor).
    assert_eq!(fe.read_temperature_raw(), Err(FrontendError::Bus));
    m.done();
}

#[test]
fn loop_output_drives_the_dac_and_reports_loop_faults() {
    let mut want = dac161s997::expect::set_code(9557); // 3.5 mA
    want.extend(dac161s997::expect::write(0x04, 0x2AAB));
    want.extend(dac161s997::expect::read(0x09, 0x00E1));
    let mut spi = Spi::new(&want);
    let mut out = LoopOutput::new(Dac161s997::new(spi.clone()));
    out.set_ma(3.5).unwrap();
    assert_eq!(out.set_ma(4.0), Err(OutputError::LoopFault));
    assert_eq!(out.last_error, Some(dac161s997::Error::LoopFault(0x00E1)));
    spi.done();
}

/// What the measurement chain asked of the simulated front end, in order.
enum Call {
    Input(Input),
    Excite(f32, f32),
    Acquire(Box<[i16; RECORD_LEN]>, Box<[i16; RECORD_LEN]>),
    Temperature(u32),
}

/// The simulated front end, recording every call and the codes it gave.
struct Recorder {
    sim: SimFrontend,
    calls: Vec<Call>,
}

impl Frontend for Recorder {
    fn info(&self) -> FrontendInfo {
        self.sim.info()
    }
    fn transimpedance_ohm(&self, f: f32) -> f32 {
        self.sim.transimpedance_ohm(f)
    }
    fn set_excitation(&mut self, f: f32, a: f32) -> Result<(), FrontendError> {
        self.calls.push(Call::Excite(f, a));
        self.sim.set_excitation(f, a)
    }
    fn select_input(&mut self, i: Input) -> Result<(), FrontendError> {
        self.calls.push(Call::Input(i));
        self.sim.select_input(i)
    }
    fn acquire(
        &mut self,
        s: &mut [i16; RECORD_LEN],
        r: &mut [i16; RECORD_LEN],
    ) -> Result<(), FrontendError> {
        self.sim.acquire(s, r)?;
        self.calls.push(Call::Acquire(Box::new(*s), Box::new(*r)));
        Ok(())
    }
    fn read_temperature_raw(&mut self) -> Result<u32, FrontendError> {
        let t = self.sim.read_temperature_raw()?;
        self.calls.push(Call::Temperature(t));
        Ok(t)
    }
}

fn run_job<F: Frontend>(fe: &mut F, cfg: &MeasureConfig) -> fringe_firmware::measure::Raw {
    let mut runner = Runner::new();
    runner.start(Job {
        electrodes: true,
        reference: true,
    });
    for _ in 0..1000 {
        if let Some(raw) = runner.step(fe, cfg) {
            return raw;
        }
    }
    panic!("the job did not finish in 1000 steps");
}

/// Exact cell constants of the simulated cell at `f` (its lead resonance
/// raises both capacitances by 1 / (1 - (f/f_res)^2)).
fn sim_cell(f: f32) -> CellPoint {
    let h = 1.0 - (f / SIM_CELL.f_res_hz) * (f / SIM_CELL.f_res_hz);
    CellPoint {
        freq_hz: f,
        stray_pf: SIM_CELL.stray_pf / h,
        cell_pf: SIM_CELL.cell_pf / h,
        g_offset_s: SIM_CELL.g_offset_s,
    }
}

/// Consistency test (not an outside check): ADC codes recorded from the
/// simulated front end for a liquid of known permittivity (ethanol at
/// 25 C, 24.43 - j 1.5, docs/REFERENCES.md section 2.1 for eps'; the loss
/// invented) are played back through the mocked chips: the DDS, switch
/// and RTD transactions each call makes are expected in the order the
/// measurement chain (`fringe_firmware::measure::Runner`) makes them, and
/// the ADC answers with the recorded codes in 24-bit frames. Both front
/// ends then go through the firmware's demodulation, reference-capacitor
/// phase correction and cell model (`fringe_firmware::measure::evaluate`,
/// `fringe_calibration::cell`). The real front end must give the same
/// admittance and permittivity at both frequencies (bit for bit: the
/// codes are the same, so any difference is a fault of the drivers: a
/// swapped channel, a wrong shift, a sign) and the same temperature to
/// within the MAX31865's 15 bits. A loose look at the truth closes it: the
/// measured admittance within 3 % of the simulated cell's (the simulator's
/// fixed channel gains, 1.012 / 0.994, are the cell calibration's to absorb).
#[test]
fn frontend_from_mocked_drivers_gives_the_permittivity_of_the_simulated_one() {
    let seed = fringe_testkit::seed(0x15_D21E);
    let eps = (24.43f32, 1.5f32);
    let scenario = Scenario {
        material: Material::Liquid {
            eps_re: eps.0,
            eps_im: eps.1,
        },
        temperature_c: 25.0,
        noise_codes: 2.0,
        ..Scenario::default()
    };
    let cfg = MeasureConfig {
        records: 4,
        ..DEFAULT_MEASURE
    };
    // The simulated front end, recorded.
    let mut rec = Recorder {
        sim: SimFrontend::new(seed, scenario),
        calls: Vec::new(),
    };
    let raw_sim = run_job(&mut rec, &cfg);
    // The real front end on the simulated board's constants (the recording
    // was made with them).
    let design = Design {
        transimpedance: [
            (5.0e6, rec.sim.transimpedance_ohm(1.0e6)),
            (f32::INFINITY, rec.sim.transimpedance_ohm(20.0e6)),
        ],
        reference_pf: rec.sim.info().reference_pf,
        temp_ref_ohm: rec.sim.info().temp_ref_ohm,
        if_bin: rec.sim.info().if_bin,
        max_amplitude_v: rec.sim.info().max_amplitude_v,
        ..DESIGN
    };
    let mut s = Script::default();
    let mut dirty = true;
    let mut records = 0;
    for call in &rec.calls {
        match call {
            Call::Input(Input::Electrodes) => {
                s.switch.push(P::set(State::Low));
                dirty = true;
            }
            Call::Input(Input::Reference) => {
                s.switch.push(P::set(State::High));
                dirty = true;
            }
            Call::Excite(f, a) => {
                let asf = (a / design.max_amplitude_v * 1023.0).round() as u16;
                s.excitation(&design, f.round() as u32, asf);
                dirty = true;
            }
            Call::Acquire(sensor, reference) => {
                if dirty {
                    for _ in 0..design.discard {
                        s.sample(0x1234, -0x1234);
                    }
                    dirty = false;
                }
                for (a, b) in sensor.iter().zip(reference.iter()) {
                    s.sample(*a, *b);
                }
                records += 1;
            }
            Call::Temperature(raw) => {
                s.rtd.extend(max31865::expect::ratio((raw >> 9) as u16));
            }
        }
    }
    // Both frequencies, 4 records on the electrodes and 8 on the reference.
    assert_eq!(records, 2 * (4 + 8), "seed {seed}");
    let (mut fe, mocks) = s.build(design);
    let raw_real = run_job(&mut fe, &cfg);
    mocks.done();
    assert!(!raw_real.frontend_error && !raw_sim.frontend_error);

    let cell = CellCal {
        points: [sim_cell(1.0e6), sim_cell(20.0e6)],
        reference_ratio: 1.0,
        made_s: 0,
    };
    let chain_sim =
        chain_from_reference(&rec, &rec.info(), &cfg, &raw_sim.reference.unwrap()).unwrap();
    let chain_real =
        chain_from_reference(&fe, &fe.info(), &cfg, &raw_real.reference.unwrap()).unwrap();
    assert_eq!(chain_sim, chain_real, "seed {seed}");
    let o_sim = evaluate(&rec, &cfg, &raw_sim, &chain_sim, Some(&cell), None, None);
    let o_real = evaluate(&fe, &cfg, &raw_real, &chain_real, Some(&cell), None, None);
    for (i, (a, b)) in o_sim
        .channels
        .iter()
        .zip(o_real.channels.iter())
        .enumerate()
    {
        assert_eq!(a, b, "seed {seed} frequency {i}: sim {a:?} real {b:?}");
        assert!(a.eps_re.is_finite() && a.eps_im.is_finite(), "seed {seed}");
    }
    assert!(
        (o_sim.temperature_c - o_real.temperature_c).abs() < 0.05,
        "seed {seed}: {} C vs {} C",
        o_sim.temperature_c,
        o_real.temperature_c
    );
    // The truth, loosely.
    for (i, f) in [1.0e6f32, 20.0e6].into_iter().enumerate() {
        let y = rec.sim.admittance(f);
        let c = o_real.channels[i];
        let rel = ((c.g_s - y.re).powi(2) + (c.b_s - y.im).powi(2)).sqrt() / y.abs();
        assert!(rel < 0.03, "seed {seed} f {f}: |dY|/|Y| = {rel}");
        assert!(
            (c.eps_re - eps.0).abs() / eps.0 < 0.04,
            "seed {seed} f {f}: eps' {} for {}",
            c.eps_re,
            eps.0
        );
    }
}
