//! Shared test bench: a simulated device on a RAM flash, driven tick by tick.
#![allow(dead_code)]

use embedded_storage::nor_flash::ReadNorFlash as _;
use fringe_calibration::cell::two_point_calibration;
use fringe_calibration::real::Cx;
use fringe_firmware::hal::{CurrentOutput, OutputError};
use fringe_firmware::protocol::auth::sign;
use fringe_firmware::protocol::frame::encode_vec;
use fringe_firmware::protocol::*;
use fringe_firmware::sim::Material;
use fringe_firmware::{Device, DeviceConfig, RamFlash, Scenario, SimFrontend};

pub const FLASH: usize = 64 * 1024;
pub type Flash = RamFlash<FLASH>;
pub type Dev = Device<SimFrontend, Flash, TestOutput>;

/// The loop's current output: keeps the last current it took; refuses
/// the next `refuse_failure_level` writes of a failure level (at or below
/// 3.6 mA, at or above 21 mA), as a loop fault or a failed write on a
/// shared bus would.
#[derive(Debug, Default, Clone, Copy, PartialEq)]
pub struct TestOutput {
    /// Last current taken, mA.
    pub last_ma: f32,
    /// Writes of a failure level still to refuse.
    pub refuse_failure_level: u32,
    /// Writes refused so far.
    pub refused: u32,
}

impl CurrentOutput for TestOutput {
    fn set_ma(&mut self, ma: f32) -> Result<(), OutputError> {
        if (ma <= 3.6 || ma >= 21.0) && self.refuse_failure_level > 0 {
            self.refuse_failure_level -= 1;
            self.refused += 1;
            return Err(OutputError::LoopFault);
        }
        self.last_ma = ma;
        Ok(())
    }
}

pub const KEY: [u8; 32] = [0x42; 32];
pub const SERIAL: &str = "HGM-L2-0007";

pub fn config() -> DeviceConfig {
    let mut c = DeviceConfig::new(SERIAL, KEY);
    c.simulated = true;
    c
}

/// The test configuration with the device's own schedule slowed to one
/// reading an hour (it still takes one at boot; see [`Bench::settle`]), for
/// tests that count flash operations or readings of their own requests.
pub fn quiet_config() -> DeviceConfig {
    let mut c = config();
    c.settings.interval_ms = fringe_firmware::settings::MAX_INTERVAL_MS;
    c.settings.stale_timeout_ms = fringe_firmware::settings::MAX_STALE_TIMEOUT_MS;
    c
}

pub struct Bench {
    pub dev: Dev,
    pub now: u64,
    dec: FrameDecoder<DeviceFrame>,
    pub seen: Vec<DeviceFrame>,
    next_id: u16,
    pub counter: u32,
}

impl Bench {
    pub fn new(seed: u64, scenario: Scenario) -> Self {
        Self::on_flash(seed, scenario, Flash::new())
    }

    pub fn on_flash(seed: u64, scenario: Scenario, flash: Flash) -> Self {
        Self::with_config(seed, scenario, flash, config())
    }

    pub fn with_config(seed: u64, scenario: Scenario, flash: Flash, cfg: DeviceConfig) -> Self {
        let dev = Device::new(
            SimFrontend::new(seed, scenario),
            flash,
            TestOutput::default(),
            cfg,
            ResetCause::PowerOn,
            0,
        )
        .expect("boot");
        Self {
            dev,
            now: 0,
            dec: FrameDecoder::new(),
            seen: Vec::new(),
            next_id: 1,
            counter: 100,
        }
    }

    /// Reboots on the same flash.
    pub fn reboot(self, seed: u64) -> Self {
        let (fe, flash, _) = self.dev.into_parts();
        let sc = *fe.scenario();
        let mut b = Self::on_flash(seed, sc, flash);
        b.counter = self.counter;
        b
    }

    /// Polls until the reading the schedule takes at boot is done (and
    /// logged), so that what follows starts from a quiet device.
    pub fn settle(&mut self) {
        for _ in 0..10_000 {
            if self.dev.readings_since_boot() > 0 {
                return;
            }
            self.tick(1);
        }
        panic!("no reading within 10 s of boot");
    }

    pub fn poll_bytes(&mut self, rx: &[u8]) {
        let mut got: Vec<u8> = Vec::new();
        self.dev
            .poll(self.now, rx, &mut |b: &[u8]| got.extend_from_slice(b));
        for r in self.dec.push(&got) {
            self.seen.push(r.expect("device frame decodes"));
        }
    }

    pub fn tick(&mut self, ms: u64) {
        self.now += ms;
        self.dev.frontend_mut().advance_ms(ms);
        self.poll_bytes(&[]);
    }

    pub fn send_frame(&mut self, frame: &HostFrame) {
        let bytes = encode_vec(frame).expect("encode");
        self.poll_bytes(&bytes);
    }

    /// Sends a request (signed when it needs it) and polls until it is answered.
    pub fn ask(&mut self, request: Request) -> DeviceFrame {
        let auth = if request.needs_auth() {
            self.counter += 1;
            sign(&KEY, SERIAL, self.counter, &request)
        } else {
            None
        };
        self.ask_with(request, auth)
    }

    pub fn ask_with(&mut self, request: Request, auth: Option<Auth>) -> DeviceFrame {
        let id = self.next_id;
        self.next_id = self.next_id.wrapping_add(1);
        self.send_frame(&HostFrame { id, auth, request });
        for _ in 0..10_000 {
            if let Some(pos) = self.seen.iter().position(|f| match f {
                DeviceFrame::Response { id: i, .. } | DeviceFrame::Error { id: i, .. } => *i == id,
                _ => false,
            }) {
                return self.seen.remove(pos);
            }
            self.tick(1);
        }
        panic!("no answer to request {id}");
    }

    pub fn ok(&mut self, request: Request) -> Response {
        match self.ask(request.clone()) {
            DeviceFrame::Response { response, .. } => response,
            other => panic!("{request:?} answered {other:?}"),
        }
    }

    pub fn measure(&mut self) -> Reading {
        match self.ok(Request::Measure) {
            Response::Reading(r) => r,
            other => panic!("Measure answered {other:?}"),
        }
    }

    pub fn events(&mut self) -> Vec<Event> {
        let mut out = Vec::new();
        let mut from = 0;
        loop {
            match self.ok(Request::ReadEvents { from, max: 6 }) {
                Response::Events { events, next, end } => {
                    out.extend(events);
                    from = next;
                    if end {
                        return out;
                    }
                }
                other => panic!("{other:?}"),
            }
        }
    }

    /// Every stored reading from `from` on, read chunk by chunk.
    pub fn read_log_from(&mut self, from: Seq) -> Vec<Reading> {
        let mut out = Vec::new();
        let mut at = from;
        loop {
            match self.ok(Request::ReadLog { from: at, max: 4 }) {
                Response::Log {
                    readings,
                    next,
                    end,
                } => {
                    out.extend(readings);
                    at = next;
                    if end {
                        return out;
                    }
                }
                other => panic!("{other:?}"),
            }
        }
    }

    pub fn error_code(frame: &DeviceFrame) -> Option<ErrorCode> {
        match frame {
            DeviceFrame::Error { code, .. } => Some(*code),
            _ => None,
        }
    }
}

/// Runs `f` on a thread with a large stack: a `Device` that owns its RAM
/// flash by value is moved around whole in unoptimised builds.
/// The device's flash with every page of its settings map marked closed:
/// damage sequential-storage reports as corrupted and cannot repair, so the
/// next boot erases the map.
pub fn damaged_settings_map(b: Bench) -> Flash {
    let mut b = b;
    let map = b.dev.storage_mut().layout().map.clone();
    damaged_region(b, map)
}

/// The device's flash with every page of its event ring marked closed
/// (as [`damaged_settings_map`]): the next boot erases the ring.
pub fn damaged_event_ring(b: Bench) -> Flash {
    let mut b = b;
    let events = b.dev.storage_mut().layout().events.clone();
    damaged_region(b, events)
}

/// The device's flash with every page of both its settings map and its
/// event ring marked closed: the next boot erases both.
pub fn damaged_settings_map_and_event_ring(b: Bench) -> Flash {
    let mut b = b;
    let layout = b.dev.storage_mut().layout().clone();
    let (_, mut flash, _) = b.dev.into_parts();
    mark_closed(&mut flash, layout.map);
    mark_closed(&mut flash, layout.events);
    flash
}

fn damaged_region(b: Bench, region: std::ops::Range<u32>) -> Flash {
    let (_, mut flash, _) = b.dev.into_parts();
    mark_closed(&mut flash, region);
    flash
}

/// Every page of `region` marked closed (start and end markers written).
fn mark_closed(flash: &mut Flash, region: std::ops::Range<u32>) {
    use embedded_storage::nor_flash::NorFlash;
    let (page, word) = (Flash::ERASE_SIZE as u32, Flash::WRITE_SIZE);
    for p in (region.start..region.end).step_by(page as usize) {
        for at in [p, p + page - word as u32] {
            flash
                .write(at, &vec![0u8; word])
                .expect("mark the page closed");
        }
    }
}

pub fn big_stack(f: impl FnOnce() + Send + 'static) {
    std::thread::Builder::new()
        .stack_size(256 << 20)
        .spawn(f)
        .expect("spawn")
        .join()
        .expect("test thread");
}

/// A cell calibration with stray capacitance `stray` pF at both frequencies.
pub fn cell_cal(stray: f32, reference_ratio: f32) -> CellCal {
    let p = |f: f32| CellPoint {
        freq_hz: f,
        stray_pf: stray,
        cell_pf: 1.5,
        g_offset_s: 2e-8,
    };
    CellCal {
        points: [p(1.0e6), p(20.0e6)],
        reference_ratio,
        made_s: 1_764_000_000,
    }
}

/// The cell calibration the device holds now.
pub fn stored_cell(b: &mut Bench) -> Option<CellCal> {
    match b.ok(Request::ReadCellCal) {
        Response::CellCal(c) => c,
        other => panic!("{other:?}"),
    }
}

/// Air at 20 C, ITU-R P.453 refractivity (docs/REFERENCES.md section 2), as the simulator uses.
pub const EPS_AIR: f32 = 1.000_54;
/// Ethanol at 20 C, Gregory and Clarke, NPL Report MAT 23 (2012): 25.16.
pub const EPS_ETHANOL_20C: f32 = 25.16;

pub fn mean_admittance(b: &mut Bench, n: usize) -> [Cx<f32>; 2] {
    let mut acc = [Cx::new(0.0f64, 0.0); 2];
    for _ in 0..n {
        let r = b.measure();
        for (a, c) in acc.iter_mut().zip(r.channels.iter()) {
            a.re += f64::from(c.g_s);
            a.im += f64::from(c.b_s);
        }
    }
    acc.map(|a| Cx::new((a.re / n as f64) as f32, (a.im / n as f64) as f32))
}

/// Calibrates the cell on the bench (air, then ethanol; `readings` averaged
/// for each) and writes it.
pub fn bench_calibrate(b: &mut Bench, readings: usize) -> CellCal {
    let freqs = [1.0e6f32, 20.0e6];
    b.dev.frontend_mut().set_scenario(Scenario {
        material: Material::Air,
        ..Scenario::default()
    });
    let y_air = mean_admittance(b, readings);
    b.dev.frontend_mut().set_scenario(Scenario {
        material: Material::Liquid {
            eps_re: EPS_ETHANOL_20C,
            eps_im: 0.4,
        },
        ..Scenario::default()
    });
    let y_liq = mean_admittance(b, readings);
    let baseline = match b.ok(Request::ReferenceCheck) {
        Response::RefCheck(r) => r.ratio.iter().sum::<f32>() / 2.0,
        other => panic!("{other:?}"),
    };
    let mut points = [CellPoint::default(); 2];
    for (k, p) in points.iter_mut().enumerate() {
        let c = two_point_calibration(freqs[k], y_air[k], EPS_AIR, y_liq[k], EPS_ETHANOL_20C)
            .expect("cell calibration");
        *p = CellPoint {
            freq_hz: freqs[k],
            stray_pf: c.stray_pf,
            cell_pf: c.cell_pf,
            g_offset_s: c.g_offset_s,
        };
    }
    let cal = CellCal {
        points,
        reference_ratio: baseline,
        made_s: 1_764_000_000,
    };
    assert_eq!(b.ok(Request::WriteCellCal(cal)), Response::Ack);
    cal
}

/// Every page of the settings map of `flash` marked closed, as
/// [`damaged_settings_map`] does to a running device's.
pub fn damage_settings_map(flash: &mut Flash) {
    use embedded_storage::nor_flash::NorFlash;
    let layout =
        fringe_firmware::storage::Layout::new(flash.capacity(), Flash::ERASE_SIZE).expect("layout");
    mark_closed(flash, layout.map);
}

/// Injected flash failure of [`Faulty`].
#[derive(Debug)]
pub enum FaultyError {
    /// The failure the test asked for.
    Injected,
    /// The RAM flash's own.
    Flash(fringe_firmware::flash::RamFlashError),
}

impl embedded_storage::nor_flash::NorFlashError for FaultyError {
    fn kind(&self) -> embedded_storage::nor_flash::NorFlashErrorKind {
        embedded_storage::nor_flash::NorFlashErrorKind::Other
    }
}

/// A RAM flash that fails chosen operations, for the storage's error
/// paths: every read of `reads_in` from its `fail_read_from`-th on (0 =
/// the first), and every write to `writes_in` until the first erase that
/// touches `until_erase_of`. `failed` is set when a failure was injected.
pub struct Faulty<'a> {
    pub flash: &'a mut Flash,
    pub reads_in: std::ops::Range<u32>,
    pub fail_read_from: Option<u32>,
    pub writes_in: std::ops::Range<u32>,
    pub until_erase_of: std::ops::Range<u32>,
    pub failed: &'a std::cell::Cell<bool>,
    reads: u32,
    writes_armed: bool,
}

impl<'a> Faulty<'a> {
    /// Reads of `region` fail from the `from`-th on.
    pub fn reads(
        flash: &'a mut Flash,
        region: std::ops::Range<u32>,
        from: u32,
        failed: &'a std::cell::Cell<bool>,
    ) -> Self {
        Self {
            flash,
            reads_in: region,
            fail_read_from: Some(from),
            writes_in: 0..0,
            until_erase_of: 0..0,
            failed,
            reads: 0,
            writes_armed: false,
        }
    }

    /// Writes to `region` fail until `until_erase_of` is erased.
    pub fn writes(
        flash: &'a mut Flash,
        region: std::ops::Range<u32>,
        until_erase_of: std::ops::Range<u32>,
        failed: &'a std::cell::Cell<bool>,
    ) -> Self {
        Self {
            flash,
            reads_in: 0..0,
            fail_read_from: None,
            writes_in: region,
            until_erase_of,
            failed,
            reads: 0,
            writes_armed: true,
        }
    }
}

fn overlaps(r: &std::ops::Range<u32>, from: u32, to: u32) -> bool {
    from < r.end && r.start < to
}

impl embedded_storage::nor_flash::ErrorType for Faulty<'_> {
    type Error = FaultyError;
}

impl embedded_storage::nor_flash::ReadNorFlash for Faulty<'_> {
    const READ_SIZE: usize = Flash::READ_SIZE;

    fn read(&mut self, offset: u32, bytes: &mut [u8]) -> Result<(), Self::Error> {
        if overlaps(&self.reads_in, offset, offset + bytes.len() as u32) {
            let k = self.reads;
            self.reads += 1;
            if self.fail_read_from.is_some_and(|from| k >= from) {
                self.failed.set(true);
                return Err(FaultyError::Injected);
            }
        }
        self.flash.read(offset, bytes).map_err(FaultyError::Flash)
    }

    fn capacity(&self) -> usize {
        self.flash.capacity()
    }
}

impl embedded_storage::nor_flash::NorFlash for Faulty<'_> {
    const WRITE_SIZE: usize = Flash::WRITE_SIZE;
    const ERASE_SIZE: usize = Flash::ERASE_SIZE;

    fn erase(&mut self, from: u32, to: u32) -> Result<(), Self::Error> {
        if overlaps(&self.until_erase_of, from, to) {
            self.writes_armed = false;
        }
        self.flash.erase(from, to).map_err(FaultyError::Flash)
    }

    fn write(&mut self, offset: u32, bytes: &[u8]) -> Result<(), Self::Error> {
        if self.writes_armed && overlaps(&self.writes_in, offset, offset + bytes.len() as u32) {
            self.failed.set(true);
            return Err(FaultyError::Injected);
        }
        self.flash.write(offset, bytes).map_err(FaultyError::Flash)
    }
}
