//! Measurement (not a test): flash wear of the reading log at one reading a
//! second, on the QEMU board's flash geometry (256 KiB NOR, 4 KiB erase
//! pages, 4-byte writes).
//!
//! `cargo bench -p fringe-firmware --bench flash_wear [-- HOURS]`
//!
//! The real firmware core ([`Device`]) runs on the simulated front end with
//! a calibrated product (so every reading carries a moisture value, as on a
//! working line) and its clock set (so times are Unix milliseconds), on its
//! own schedule at the default interval of 1000 ms, with no host attached,
//! for `HOURS` of device time (default 6). A counting wrapper around the
//! RAM flash records every erase per page and every write. Printed: the
//! erases of each storage region's pages, and the years until the most
//! erased page reaches a given endurance.

use std::cell::RefCell;
use std::rc::Rc;

use embedded_storage::nor_flash::{ErrorType, NorFlash, ReadNorFlash};
use fringe_calibration::synth::SynthProduct;
use fringe_firmware::flash::{RamFlash, RAM_ERASE_SIZE};
use fringe_firmware::hal::NullOutput;
use fringe_firmware::protocol::auth::sign;
use fringe_firmware::protocol::frame::encode_vec;
use fringe_firmware::protocol::{CellCal, CellPoint, HostFrame, Request, ResetCause, SERIAL_LEN};
use fringe_firmware::sim::{exact_calibration, Material, SIM_CELL};
use fringe_firmware::storage::Layout;
use fringe_firmware::{Device, DeviceConfig, Scenario, SimFrontend};

/// The QEMU board's emulated NOR flash (`firmware/boards/qemu-mps2`).
const FLASH: usize = 256 * 1024;
const PAGES: usize = FLASH / RAM_ERASE_SIZE;

#[derive(Default)]
struct Counts {
    erases: Vec<u64>,
    writes: u64,
    bytes: u64,
}

/// RAM flash that counts erases per page and writes.
struct Counting {
    inner: &'static mut RamFlash<FLASH>,
    counts: Rc<RefCell<Counts>>,
}

impl ErrorType for Counting {
    type Error = <RamFlash<FLASH> as ErrorType>::Error;
}

impl ReadNorFlash for Counting {
    const READ_SIZE: usize = <RamFlash<FLASH> as ReadNorFlash>::READ_SIZE;
    fn read(&mut self, offset: u32, bytes: &mut [u8]) -> Result<(), Self::Error> {
        self.inner.read(offset, bytes)
    }
    fn capacity(&self) -> usize {
        self.inner.capacity()
    }
}

impl NorFlash for Counting {
    const WRITE_SIZE: usize = <RamFlash<FLASH> as NorFlash>::WRITE_SIZE;
    const ERASE_SIZE: usize = <RamFlash<FLASH> as NorFlash>::ERASE_SIZE;
    fn erase(&mut self, from: u32, to: u32) -> Result<(), Self::Error> {
        let mut c = self.counts.borrow_mut();
        for page in from as usize / Self::ERASE_SIZE..to as usize / Self::ERASE_SIZE {
            c.erases[page] += 1;
        }
        drop(c);
        self.inner.erase(from, to)
    }
    fn write(&mut self, offset: u32, bytes: &[u8]) -> Result<(), Self::Error> {
        let mut c = self.counts.borrow_mut();
        c.writes += 1;
        c.bytes += bytes.len() as u64;
        drop(c);
        self.inner.write(offset, bytes)
    }
}

fn main() {
    let hours: f64 = std::env::args()
        .skip(1)
        .find_map(|a| a.parse().ok())
        .unwrap_or(6.0);
    let counts = Rc::new(RefCell::new(Counts {
        erases: vec![0; PAGES],
        ..Counts::default()
    }));
    let flash = Counting {
        inner: Box::leak(Box::new(RamFlash::new())),
        counts: counts.clone(),
    };
    let key = [0x42u8; 32];
    let serial = "QEMU-MPS2-0001";
    assert!(serial.len() <= SERIAL_LEN);
    let mut cfg = DeviceConfig::new(serial, key);
    cfg.simulated = true;
    let grain = SynthProduct::<f32>::grain();
    let scenario = Scenario {
        material: Material::Product {
            product: grain,
            moisture_pct: 14.5,
            water_sigma25_s_m: 0.1,
        },
        temperature_c: 22.0,
        ..Scenario::default()
    };
    let mut dev = Device::new(
        SimFrontend::new(7, scenario),
        flash,
        NullOutput::default(),
        cfg.clone(),
        ResetCause::PowerOn,
        0,
    )
    .expect("boot");
    // Calibrate (the simulator's own cell constants, the grain's exact
    // product calibration), select it and set the clock, as a host would.
    let point = |f: f32| CellPoint {
        freq_hz: f,
        stray_pf: SIM_CELL.stray_pf,
        cell_pf: SIM_CELL.cell_pf,
        g_offset_s: SIM_CELL.g_offset_s,
    };
    let writes = [
        Request::WriteCellCal(CellCal {
            points: [point(1.0e6), point(20.0e6)],
            reference_ratio: 1.0,
            made_s: 1_796_000_000,
        }),
        Request::WriteProductCal {
            slot: 0,
            cal: exact_calibration(&grain, "wheat"),
        },
        Request::SelectProduct { slot: 0 },
        Request::SetClock {
            unix_ms: 1_796_083_200_000,
        },
    ];
    for (i, request) in writes.into_iter().enumerate() {
        let auth = sign(&key, serial, i as u32 + 1, &request);
        let frame = encode_vec(&HostFrame {
            id: i as u16 + 1,
            auth,
            request,
        })
        .expect("encode");
        dev.poll(0, &frame, &mut |_| {});
    }
    let before = {
        let c = counts.borrow();
        (c.erases.clone(), c.writes, c.bytes)
    };
    let readings0 = dev.readings_since_boot();
    let end_ms = (hours * 3_600_000.0) as u64;
    let step = 5;
    let mut now = 0;
    let mut with_moisture = 0u64;
    let mut last = readings0;
    while now < end_ms {
        now += step;
        dev.frontend_mut().advance_ms(step);
        dev.poll(now, &[], &mut |_| {});
        if dev.readings_since_boot() != last {
            last = dev.readings_since_boot();
            if dev.output_ma() > 3.6 {
                with_moisture += 1;
            }
        }
    }
    let readings = u64::from(dev.readings_since_boot() - readings0);
    let c = counts.borrow();
    let layout = Layout::new(FLASH, RAM_ERASE_SIZE).expect("layout");
    let page = RAM_ERASE_SIZE as u32;
    let region = |r: &std::ops::Range<u32>| -> Vec<u64> {
        (r.start / page..r.end / page)
            .map(|p| c.erases[p as usize] - before.0[p as usize])
            .collect()
    };
    println!(
        "flash {FLASH} bytes, {PAGES} pages of {RAM_ERASE_SIZE} bytes; {hours} h of device time at {} ms",
        cfg.settings.interval_ms
    );
    println!(
        "readings {readings} ({with_moisture} with a moisture value on the loop), log capacity {}",
        dev.log_capacity()
    );
    println!(
        "flash writes {} ({} bytes, {:.1} bytes per reading)",
        c.writes - before.1,
        c.bytes - before.2,
        (c.bytes - before.2) as f64 / readings as f64
    );
    let years = |per_h: f64, cycles: f64| cycles / (per_h * 24.0 * 365.25);
    for (name, r) in [
        ("settings map", &layout.map),
        ("event ring", &layout.events),
        ("reading log", &layout.log),
    ] {
        let e = region(r);
        let max = e.iter().copied().max().unwrap_or(0);
        let sum: u64 = e.iter().sum();
        let per_h = max as f64 / hours;
        let mean_h = sum as f64 / e.len().max(1) as f64 / hours;
        let (y10k, y100k) = if max > 0 {
            (
                format!("{:.1}", years(per_h, 10_000.0)),
                format!("{:.1}", years(per_h, 100_000.0)),
            )
        } else {
            ("-".into(), "-".into())
        };
        println!(
            "{name:>13}: {} pages, {sum} erases, per page {mean_h:.3}/h on average, most erased page {max} ({per_h:.3}/h); years to 10k cycles {y10k}, to 100k cycles {y100k} (most erased page)",
            e.len()
        );
    }
}
