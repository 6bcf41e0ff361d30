//! Benchmark (not a test): processing cost of one two-frequency reading on
//! the host build, and the RAM the core needs.
//!
//! `cargo bench -p fringe-firmware --bench reading`
//!
//! The records are acquired from the simulated front end beforehand and
//! replayed, so the figure is the core's own work: Goertzel demodulation of
//! 2 frequencies x 8 records x 2 channels x 256 samples, outlier rejection
//! and averaging, admittance, cell calibration, two-frequency inversion and
//! the product model (`fringe_calibration::estimate`).

use criterion::{criterion_group, criterion_main, Criterion};
use embedded_storage::nor_flash::{ErrorType, NorFlash, ReadNorFlash};
use fringe_calibration::synth::SynthProduct;
use fringe_firmware::demod::Averager;
use fringe_firmware::device::parse_product;
use fringe_firmware::hal::{Frontend, FrontendError, FrontendInfo, Input, NullOutput, RECORD_LEN};
use fringe_firmware::measure::{self, ChainState, Job, Runner, DEFAULT_MEASURE};
use fringe_firmware::protocol::{CellCal, CellPoint, FrameDecoder, HostFrame};
use fringe_firmware::sim::{exact_calibration, Material, SimFrontend, SIM_CELL};
use fringe_firmware::storage::{ring_capacity_readings, Layout, Storage, ITEM_BUF};
use fringe_firmware::{Device, Scenario};

type Rec = ([i16; RECORD_LEN], [i16; RECORD_LEN]);

/// Replays recorded ADC records (and the simulator's board constants).
struct Replay {
    sim: SimFrontend,
    recs: Vec<Rec>,
    next: usize,
    temp: u32,
}

impl Frontend for Replay {
    fn info(&self) -> FrontendInfo {
        self.sim.info()
    }
    fn transimpedance_ohm(&self, f: f32) -> f32 {
        self.sim.transimpedance_ohm(f)
    }
    fn set_excitation(&mut self, _: f32, _: f32) -> Result<(), FrontendError> {
        Ok(())
    }
    fn select_input(&mut self, _: Input) -> Result<(), FrontendError> {
        Ok(())
    }
    fn acquire(
        &mut self,
        s: &mut [i16; RECORD_LEN],
        r: &mut [i16; RECORD_LEN],
    ) -> Result<(), FrontendError> {
        let (a, b) = &self.recs[self.next % self.recs.len()];
        s.copy_from_slice(a);
        r.copy_from_slice(b);
        self.next += 1;
        Ok(())
    }
    fn read_temperature_raw(&mut self) -> Result<u32, FrontendError> {
        Ok(self.temp)
    }
}

fn recorded() -> Replay {
    let sc = Scenario {
        material: Material::Product {
            product: SynthProduct::grain(),
            moisture_pct: 15.0,
            water_sigma25_s_m: 0.3,
        },
        temperature_c: 22.0,
        ..Scenario::default()
    };
    let mut sim = SimFrontend::new(1, sc);
    let mut recs = Vec::new();
    for &f in &DEFAULT_MEASURE.freqs_hz {
        sim.set_excitation(f, 1.0).unwrap();
        for _ in 0..DEFAULT_MEASURE.records {
            let mut r: Rec = ([0; RECORD_LEN], [0; RECORD_LEN]);
            sim.acquire(&mut r.0, &mut r.1).unwrap();
            recs.push(r);
        }
    }
    let temp = sim.read_temperature_raw().unwrap();
    Replay {
        sim,
        recs,
        next: 0,
        temp,
    }
}

fn cell() -> CellCal {
    // The simulated cell as a bench calibration finds it (board gain 1.012/0.994 included).
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
        points: [p(1.0e6), p(20.0e6)],
        reference_ratio: 0.0,
        made_s: 0,
    }
}

/// A flash of no size, to weigh the Device alone.
#[derive(Debug)]
struct NoFlash;
impl ErrorType for NoFlash {
    type Error = core::convert::Infallible;
}
impl ReadNorFlash for NoFlash {
    const READ_SIZE: usize = 1;
    fn read(&mut self, _: u32, _: &mut [u8]) -> Result<(), Self::Error> {
        Ok(())
    }
    fn capacity(&self) -> usize {
        0
    }
}
impl NorFlash for NoFlash {
    const WRITE_SIZE: usize = 4;
    const ERASE_SIZE: usize = 4096;
    fn erase(&mut self, _: u32, _: u32) -> Result<(), Self::Error> {
        Ok(())
    }
    fn write(&mut self, _: u32, _: &[u8]) -> Result<(), Self::Error> {
        Ok(())
    }
}
fn ram_report() {
    use core::mem::size_of;
    eprintln!("RAM of the core (size_of, host build, x86_64):");
    // The front end is owned by value: weigh the Device with the replay
    // front end and take that back off.
    let core = size_of::<Device<Replay, NoFlash, NullOutput>>() - size_of::<Replay>();
    eprintln!("  Device without front end and flash (0-size flash, NullOutput): {core} bytes");
    eprintln!(
        "    of which Runner (2 ADC records, averager): {} bytes",
        size_of::<Runner>()
    );
    eprintln!("    of which Averager: {} bytes", size_of::<Averager>());
    eprintln!(
        "    of which Storage (item buffer {ITEM_BUF}): {} bytes",
        size_of::<Storage<NoFlash>>()
    );
    eprintln!(
        "    of which FrameDecoder<HostFrame>: {} bytes",
        size_of::<FrameDecoder<HostFrame>>()
    );
    eprintln!(
        "  SimFrontend (simulator only): {} bytes",
        size_of::<SimFrontend>()
    );
    for kib in [64usize, 256, 1024] {
        let layout = Layout::new(kib * 1024, 4096).expect("layout");
        let n = ring_capacity_readings(&layout, 4096, 4);
        eprintln!(
            "  reading log on {kib} KiB flash (4 KiB pages, 4-byte words): at least {n} readings"
        );
    }
}

fn bench(c: &mut Criterion) {
    ram_report();
    let mut fe = recorded();
    let cell = cell();
    let product = parse_product(&exact_calibration(&SynthProduct::grain(), "bench grain")).unwrap();
    let chain = ChainState::default();
    let mut runner = Runner::new();
    // One full reading: acquisition (replayed), demodulation through the estimate.
    let mut reading = || {
        runner.start(Job {
            electrodes: true,
            reference: false,
        });
        let raw = loop {
            if let Some(r) = runner.step(&mut fe, &DEFAULT_MEASURE) {
                break r;
            }
        };
        measure::evaluate(
            &fe,
            &DEFAULT_MEASURE,
            &raw,
            &chain,
            Some(&cell),
            Some(&product),
            None,
        )
    };
    // One check that the figure is for a real estimate.
    let o = reading();
    eprintln!(
        "reading: moisture {:?} +/- {} %, flags {:?}",
        o.moisture_pct, o.uncertainty_pct, o.flags
    );
    assert!(o.moisture_pct.is_some());
    c.bench_function("reading_two_freq_8_records_demod_through_estimate", |b| {
        b.iter(&mut reading)
    });
}

criterion_group!(benches, bench);
criterion_main!(benches);
