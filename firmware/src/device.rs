//! The device: owns the front end, the flash, the current output and all
//! state; [`Device::poll`] decodes requests, runs a few measurement steps
//! and emits frames. No globals, no clock but `now_ms`.
//!
//! ## The schedule
//! The device measures on its own clock every [`Settings::interval_ms`]
//! from boot on, whether or not a host is attached: each reading goes to
//! the flash log, the 4-20 mA output and, while a host is subscribed
//! ([`Request::StartStream`]), the link. A `Measure` request takes one extra
//! reading, started after the request. When no valid reading (one with a
//! moisture value) has come for [`Settings::stale_timeout_ms`] (a stalled
//! front end produces none at all), the loop goes to its NAMUR NE 43
//! failure level instead of holding the last value, and a
//! [`FaultCode::StaleOutput`] event is logged. A reading without a valid
//! value drives the failure level at once, as before.
//!
//! ## Time
//! Until a host sets the clock, time counts from boot and readings carry
//! [`Flags::CLOCK_UNSET`]. Setting it logs [`EventKind::ClockSet`] whose
//! `old_ms` is then the time since boot, which is what a host needs to
//! re-base the earlier readings of the boot (see `protocol/WIRE.md`).
//!
//! ## The plant's bulk density
//! A product calibration with a density input takes the density the host
//! last sent ([`Request::SetDensity`]) while it holds; without one its
//! readings carry [`Flags::DENSITY_MISSING`] (see `protocol/WIRE.md`).
//!
//! ## Writes
//! A request that changes the device ([`Request::needs_auth`]) is carried
//! out only if its HMAC tag verifies ([`fringe_protocol::auth::verify`]) and
//! its counter exceeds the stored write counter; otherwise it is answered
//! with [`ErrorCode::AuthFailed`] and an [`EventKind::AuthFailed`] event is
//! stored. An accepted counter is stored before the write is carried out,
//! so a request can never be replayed, even after a power cut. The one
//! exception is [`Request::SetDensity`], which may come every second: its
//! counter is a sequence of its own, kept in RAM (storing it would wear the
//! flash), and the request names the boot it is for, so a captured one is
//! refused after a restart too. The same signed density received again
//! (its answer was lost) is answered and not applied again.
//! After [`FREE_WRITE_FAILURES`] failed writes in a row, writes are held
//! off for a time that doubles with each further failure
//! ([`write_hold_ms`]); a write during a hold is refused unchecked with
//! [`AuthFailure::Throttled`] (logged once per hold). Reads are never held
//! off. Values are then checked (finite, in range) and refused with
//! [`ErrorCode::NotFinite`], [`ErrorCode::OutOfRange`],
//! [`ErrorCode::NoSuchSlot`] or [`ErrorCode::BadCalibration`] without
//! touching the stored state.

use fringe_calibration::product::{self as cal_product, ProductCalibration};
use fringe_protocol::auth::{verify, Key};
use fringe_protocol::frame::{encode, encode_with_version};
use fringe_protocol::{
    short_string, AuthFailure, Basis, CalId, Capabilities, CellCal, DeviceFrame, ErrorCode, Event,
    EventKind, FaultCode, Flags, FrameDecoder, FrameError, HostFrame, Identity, ModbusSettings,
    ModelKind, OutputConfig, ProductCal, Reading, RefCheck, Request, ResetCause, Response,
    SelfTest, Seq, Serial, Settings, SlotInfo, Status, Version, DENSITY_HOLD_MAX_MS,
    DENSITY_HOLD_MIN_MS, DENSITY_RANGE_KG_M3, EVENT_CHUNK, LOG_CHUNK, MAX_FRAME_LEN, N_FREQ,
    N_PRODUCT_SLOTS, PROTOCOL_VERSION,
};
use heapless::Vec;

use embedded_storage::nor_flash::NorFlash;

use crate::hal::{CurrentOutput, Frontend, NoWatchdog, Watchdog};
use crate::measure::{self, ChainState, Job, MeasureConfig, Runner, DEFAULT_MEASURE};
use crate::modbus::SerialLine;
use crate::output::{self};
use crate::settings::{self as device_settings, default_settings};
use crate::storage::{key, Storage, StorageError, StoredIdentity};

/// Firmware version, `[major, minor, patch]`.
pub const FIRMWARE_VERSION: [u8; 3] = [0, 1, 0];
/// Failed writes in a row the device takes without holding writes off.
pub const FREE_WRITE_FAILURES: u32 = 3;
pub use crate::storage::{repair_counter, REPAIR_COUNTER_JUMP};
/// Longest hold after failed writes, ms.
pub const MAX_WRITE_HOLD_MS: u64 = 64_000;

/// How long writes are held off after the `failures`-th failed write in a
/// row, ms: none for the first [`FREE_WRITE_FAILURES`], then 1 s,
/// doubling with each further failure up to [`MAX_WRITE_HOLD_MS`]. During a
/// hold every write is refused unchecked ([`AuthFailure::Throttled`]) and
/// does not count as a failure, so an online guess costs the whole hold: at
/// most about 1,350 guesses a day against a 256-bit key. An accepted write
/// ends the count; so does a restart (the count is not kept in flash, which
/// a stream of guesses would wear, and a restart needs the key or the power).
pub const fn write_hold_ms(failures: u32) -> u64 {
    if failures <= FREE_WRITE_FAILURES {
        return 0;
    }
    let doublings = failures - FREE_WRITE_FAILURES - 1;
    if doublings >= 6 {
        MAX_WRITE_HOLD_MS
    } else {
        1000 << doublings
    }
}

/// Shortest `StartStream` period accepted, ms (since protocol 1.1 the
/// period is only checked; the device measures at its own interval).
pub const MIN_PERIOD_MS: u32 = 100;
/// The longest a reading is taken to last (with the reference check), ms:
/// about 160 ms on the simulator and 390 ms estimated on the STM32G474
/// board; a job running longer is stuck.
pub const LONGEST_READING_MS: u64 = 2000;
/// How often a current the loop did not take is written again, ms.
pub const OUTPUT_RETRY_MS: u64 = 1000;
/// Least time between two events of the same fault (10 min): a fault that
/// comes and goes more often is logged once per this time, its flag on
/// every reading it marks. At one event per 10 min per fault the event
/// ring's pages are erased a few times a day at most.
pub const FAULT_EVENT_HOLDOFF_MS: u64 = 600_000;
/// Longest `StartStream` period accepted, ms (one day).
pub const MAX_PERIOD_MS: u32 = 86_400_000;
/// Earliest clock accepted by `SetClock` (2000-01-01), Unix ms.
pub const MIN_UNIX_MS: u64 = 946_684_800_000;
/// Latest clock accepted by `SetClock` (2200-01-01), Unix ms.
pub const MAX_UNIX_MS: u64 = 7_258_118_400_000;

const SCRATCH_KEY: u8 = 6;

/// Configuration given at build or commissioning time.
#[derive(Debug, Clone, PartialEq)]
pub struct DeviceConfig {
    /// Serial used on a blank flash (a stored serial wins).
    pub serial: Serial,
    /// Write key used on a blank flash (a stored key wins).
    pub key: Key,
    /// Frequencies, amplitude, records, the reference check and the
    /// thresholds of the flags.
    pub measure: MeasureConfig,
    /// Measurement steps (one record each) per `poll`, >= 1.
    pub steps_per_poll: u8,
    /// Store every reading in the flash log.
    pub log_readings: bool,
    /// Settings used on a blank flash (stored settings win; see
    /// [`crate::settings`] for the defaults).
    pub settings: Settings,
    /// Announce [`Capabilities::SIMULATED`].
    pub simulated: bool,
    /// Take the plant's bulk density ([`Request::SetDensity`], protocol
    /// 1.4) and announce [`Capabilities::DENSITY_INPUT`]; off, the device
    /// answers it as a 1.3 device would, with `UnknownRequest` (for tests
    /// of a host meeting older firmware).
    pub density_input: bool,
    /// Take a relaxation calibration with the static terms (layout 2) and
    /// announce [`Capabilities::STATIC_TERMS`]; off, the device refuses
    /// one as firmware before them did, a bad calibration (for tests of a
    /// host meeting older firmware).
    pub static_terms: bool,
    /// Take a relaxation calibration with the conductivity hold (layout 3)
    /// and announce [`Capabilities::SIGMA_HOLD`]; off, the device refuses
    /// one as firmware before it did (as without `static_terms`, which
    /// also refuses layout 3).
    pub sigma_hold: bool,
    /// Take a relaxation calibration whose mixing model takes each
    /// reading's bulk density (layout 4) and announce
    /// [`Capabilities::RELAXATION_DENSITY`]; off, the device refuses one
    /// as firmware before it did.
    pub relaxation_density: bool,
    /// Take a 4-20 mA span up to 327.67 % and announce
    /// [`Capabilities::WIDE_SPAN`]; off, the device refuses a span above
    /// 100 % as firmware before it did (`OutOfRange`).
    pub wide_span: bool,
}

impl DeviceConfig {
    /// Defaults (1 MHz and 20 MHz, 8 records, reference every 10 readings)
    /// with this serial and key.
    pub fn new(serial: &str, key: Key) -> Self {
        Self {
            serial: short_string(serial),
            key,
            measure: DEFAULT_MEASURE,
            steps_per_poll: 4,
            log_readings: true,
            settings: default_settings(),
            simulated: false,
            density_input: true,
            static_terms: true,
            sigma_hold: true,
            relaxation_density: true,
            wide_span: true,
        }
    }

    fn measure(&self) -> MeasureConfig {
        MeasureConfig {
            reference_every: self.measure.reference_every.max(1),
            ..self.measure
        }
    }

    fn check(&self) -> Result<(), BootError> {
        let m = &self.measure;
        let [lo, hi] = m.freqs_hz;
        let ok = lo.is_finite()
            && hi.is_finite()
            && lo > 0.0
            && hi > lo
            && m.amplitude_v.is_finite()
            && m.amplitude_v > 0.0
            && (1..=16).contains(&m.records)
            && m.reference_tolerance.is_finite()
            && m.reference_tolerance > 0.0
            && m.min_snr_db.is_finite()
            && m.empty_eps_max.is_finite()
            && m.open_pf.is_finite()
            && device_settings::validate(&self.settings).is_ok();
        if ok {
            Ok(())
        } else {
            Err(BootError::BadConfig)
        }
    }
}

/// Why the device could not start.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum BootError {
    /// The flash could not be mounted.
    Storage(StorageError),
    /// A configuration value is out of range (frequencies, amplitude,
    /// records, the blank-flash settings).
    BadConfig,
}

impl core::fmt::Display for BootError {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        match self {
            BootError::Storage(e) => write!(f, "boot: {e}"),
            BootError::BadConfig => write!(
                f,
                "boot: configuration out of range (need 0 < freqs_hz[0] < freqs_hz[1], amplitude_v > 0, records 1..=16, valid settings)"
            ),
        }
    }
}

impl core::error::Error for BootError {}

impl From<StorageError> for BootError {
    fn from(e: StorageError) -> Self {
        BootError::Storage(e)
    }
}

/// A request waiting for a measurement.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
struct Pending {
    measure: Option<u16>,
    refcheck: Option<u16>,
    selftest: Option<u16>,
}

/// The active product calibration, parsed.
#[derive(Debug, Clone, Copy)]
struct Active {
    slot: u8,
    id: CalId,
    cal: ProductCalibration<f32>,
}

/// Figures a board measures about itself (stack painting, cost of a
/// reading), reported in [`Status`] and announced with
/// [`Capabilities::DIAGNOSTICS`]. The core cannot measure them: they need
/// the board's stack bounds and cycle counter.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct Diagnostics {
    /// Untouched stack bytes since boot.
    pub stack_free_bytes: Option<u32>,
    /// Cost of the last full reading, in the unit the board documents
    /// (instructions under QEMU, core cycles on silicon).
    pub reading_cost: Option<u32>,
}

/// The sensor's core (see the module doc).
pub struct Device<F: Frontend, S: NorFlash, O: crate::hal::CurrentOutput> {
    fe: F,
    storage: Storage<S>,
    out: O,
    cfg: DeviceConfig,
    mcfg: MeasureConfig,
    serial: Serial,
    key: Key,
    boot: u32,
    counter: u32,
    write_counter: u32,
    /// The counter of the last [`Request::SetDensity`] accepted this boot,
    /// and what it carried (kg/m^3 as bits, hold); RAM only: a density may
    /// come every second, and storing its counter would wear the flash
    /// (the request names the boot instead). A sequence of its own, apart from [`Self::write_counter`],
    /// so that it never raises the counter the stored writes must exceed.
    density_last: Option<(u32, u32, u32)>,
    /// The counter of the density being carried out (authorized, its
    /// values not yet checked): it becomes [`Self::density_last`] only if
    /// they are accepted.
    density_pending: Option<u32>,
    /// The plant's bulk density, kg/m^3, and until when it holds (ms since
    /// the board started); RAM only.
    density: Option<(f32, u64)>,
    /// Failed writes in a row since the last accepted one (RAM only).
    auth_failures: u32,
    /// Writes are held off, unchecked, until this time (ms since the board
    /// started); see [`write_hold_ms`].
    auth_hold_until_ms: u64,
    /// A refusal during the current hold has been logged.
    auth_hold_logged: bool,
    /// The scratch value the self-test wrote and read back this boot
    /// (RAM only). Later self-tests of the boot read it back without
    /// writing again: `SelfTest` needs no key, and a client repeating it
    /// must not wear the flash.
    scratch_written: Option<u32>,
    next_event: u32,
    boot_ms: u64,
    clock_offset_ms: Option<i64>,
    cell: Option<CellCal>,
    cell_id: CalId,
    active: Option<Active>,
    active_slot: Option<u8>,
    settings: Settings,
    /// The Modbus RTU slave's settings (protocol 1.2; the board applies them).
    modbus: ModbusSettings,
    /// Number of the newest `ModbusChanged` event in the ring: the copy a
    /// lost settings map takes them back from (see [`modbus_copy_due`]).
    modbus_copy: Option<u32>,
    /// The protocol version the host announced in `Identify` (`None`
    /// before one): events it cannot decode are sent in an older form.
    host_version: Option<Version>,
    output_ma: f32,
    output_fault: bool,
    /// When a current the loop did not take is written again (device ms).
    output_retry_ms: u64,
    /// The loop fault of this episode is logged (a boot's failed first
    /// write is logged by the first retry that fails too).
    output_fault_logged: bool,
    /// Moisture of the last reading and when it was taken (for a span
    /// change between readings); `None` when it had none.
    last_moisture: Option<f32>,
    /// When the last valid reading was taken (boot time before the first).
    last_valid_ms: u64,
    /// When the job running (or the last one) started.
    job_started_ms: u64,
    /// The latest reading, valid or not, as the protocol carries it
    /// ([`Reading::on_wire`]), and when it was taken (for the Modbus
    /// registers: the same numbers a host, and so the gateway, receives).
    latest: Option<(Reading, u64)>,
    /// The moisture basis of the calibration [`Device::latest`]'s reading
    /// was computed with (none without one), for the Modbus registers.
    latest_basis: Option<Basis>,
    /// The loop was sent to its failure level by the stale-output timeout.
    stale: bool,
    chain: ChainState,
    chain_valid: bool,
    chain_n: u32,
    reference_ok: bool,
    last_ref: [f32; N_FREQ],
    since_ref: u32,
    runner: Runner,
    subscribed: bool,
    next_due_ms: u64,
    pending: Pending,
    /// The requests the running job answers (taken from `pending` when it started).
    in_job: Pending,
    last_flags: Flags,
    saturated_run: u8,
    /// When each fault (electrode, temperature sensor, saturation) was
    /// last logged as an event ([`FAULT_EVENT_HOLDOFF_MS`]).
    fault_logged_ms: [Option<u64>; 3],
    decoder: FrameDecoder<HostFrame>,
    txbuf: [u8; MAX_FRAME_LEN],
    reboot: bool,
    diag: Diagnostics,
}

impl<F: Frontend, S: NorFlash, O: CurrentOutput> core::fmt::Debug for Device<F, S, O> {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        f.debug_struct("Device")
            .field("serial", &self.serial)
            .field("boot", &self.boot)
            .field("counter", &self.counter)
            .field("storage", &self.storage)
            .finish_non_exhaustive()
    }
}

fn to_cal_range(r: fringe_protocol::Range) -> cal_product::Range<f32> {
    cal_product::Range::new(r.min, r.max)
}

/// Parses a wire product calibration into the calibration crate's form.
///
/// # Errors
/// The calibration crate's reason, as [`ErrorCode::BadCalibration`].
pub fn parse_product(cal: &ProductCal) -> Result<ProductCalibration<f32>, ErrorCode> {
    let kind = match cal.model {
        ModelKind::SingleFrequency => cal_product::ModelKind::SingleFrequency,
        ModelKind::Relaxation => cal_product::ModelKind::Relaxation,
        ModelKind::Multivariate => cal_product::ModelKind::Multivariate,
    };
    let basis = match cal.basis {
        Basis::Wet => fringe_calibration::moisture::Basis::Wet,
        Basis::Dry => fringe_calibration::moisture::Basis::Dry,
    };
    let mut inputs: Vec<cal_product::Range<f32>, { fringe_protocol::MAX_CAL_INPUTS }> = Vec::new();
    for r in cal.inputs.iter() {
        if inputs.push(to_cal_range(*r)).is_err() {
            return Err(ErrorCode::BadCalibration);
        }
    }
    ProductCalibration::<f32>::from_parts(
        kind,
        &cal.params,
        basis,
        to_cal_range(cal.moisture_pct),
        to_cal_range(cal.temperature_c),
        &inputs,
        cal.sec_pct,
    )
    .map_err(|_| ErrorCode::BadCalibration)
}

type Refusal = (ErrorCode, &'static str);

fn finite(ok: bool, what: &'static str) -> Result<(), Refusal> {
    if ok {
        Ok(())
    } else {
        Err((ErrorCode::NotFinite, what))
    }
}

/// What the authentication of a write decided.
enum Authorized {
    /// Carry it out.
    Go,
    /// Refused (answered and, where it is a failure, logged).
    Refused,
    /// The very write accepted last (a density tried again): answer it
    /// again, change nothing.
    Duplicate,
}

fn in_range(ok: bool, what: &'static str) -> Result<(), Refusal> {
    if ok {
        Ok(())
    } else {
        Err((ErrorCode::OutOfRange, what))
    }
}

/// Checks a cell calibration against the device's frequencies.
fn check_cell(c: &CellCal, freqs: &[f32; N_FREQ]) -> Result<(), Refusal> {
    for (p, &f) in c.points.iter().zip(freqs.iter()) {
        finite(p.freq_hz.is_finite(), "cell freq_hz not finite")?;
        finite(p.stray_pf.is_finite(), "cell stray_pf not finite")?;
        finite(p.cell_pf.is_finite(), "cell cell_pf not finite")?;
        finite(p.g_offset_s.is_finite(), "cell g_offset_s not finite")?;
        in_range(
            (p.freq_hz / f - 1.0).abs() <= 0.005,
            "cell freq_hz != device freq",
        )?;
        in_range(
            (-100.0..=1000.0).contains(&p.stray_pf),
            "cell stray_pf not -100..1000",
        )?;
        in_range(
            p.cell_pf > 0.0 && p.cell_pf <= 1000.0,
            "cell cell_pf not 0..1000",
        )?;
        in_range(p.g_offset_s.abs() <= 1.0, "cell g_offset_s not -1..1 S")?;
    }
    finite(
        c.reference_ratio.is_finite(),
        "cell reference_ratio not finite",
    )?;
    in_range(
        (0.0..=10.0).contains(&c.reference_ratio),
        "cell reference_ratio not 0..10",
    )?;
    Ok(())
}

/// The parameter layout of a relaxation calibration as written (1 plain, 2
/// with the static terms, 3 with the conductivity hold, 4 with the density
/// input; checked by
/// [`check_product`]); 0 for other models.
fn relaxation_layout(c: &ProductCal) -> u8 {
    match (c.model, c.params.first()) {
        (ModelKind::Relaxation, Some(v)) => *v as u8,
        _ => 0,
    }
}

fn check_product(c: &ProductCal) -> Result<ProductCalibration<f32>, Refusal> {
    let ranges = [c.moisture_pct, c.temperature_c]
        .into_iter()
        .chain(c.inputs.iter().copied());
    for r in ranges {
        finite(
            r.min.is_finite() && r.max.is_finite(),
            "product range not finite",
        )?;
        in_range(r.min <= r.max, "product range min > max")?;
    }
    finite(
        c.params.iter().all(|p| p.is_finite()),
        "product params not finite",
    )?;
    finite(c.sec_pct.is_finite(), "product sec_pct not finite")?;
    in_range(c.sec_pct >= 0.0, "product sec_pct < 0")?;
    in_range(
        (-100.0..=1000.0).contains(&c.moisture_pct.min) && c.moisture_pct.max <= 1000.0,
        "product moisture range",
    )?;
    parse_product(c).map_err(|e| (e, "product params rejected by model"))
}

impl<F: Frontend, S: NorFlash, O: CurrentOutput> Device<F, S, O> {
    /// Boot: mount storage (repairing if needed), raise the boot counter,
    /// load calibrations and settings, log a Boot event. The same as
    /// [`Booted::mount`] followed by [`Device::from_booted`].
    ///
    /// # Errors
    /// [`BootError::Storage`] when the flash cannot be used at all,
    /// [`BootError::BadConfig`] for a configuration out of range.
    pub fn new(
        frontend: F,
        flash: S,
        output: O,
        config: DeviceConfig,
        reset_cause: ResetCause,
        now_ms: u64,
    ) -> Result<Self, BootError> {
        let booted = Booted::mount(flash, config, reset_cause)?;
        Ok(Self::from_booted(booted, frontend, output, now_ms))
    }

    /// The second half of boot: builds the device from what
    /// [`Booted::mount`] read and sets the current output. Does no storage
    /// work, so a board that moves the device into a static holds the
    /// device on its stack only here, with nothing deep below it.
    pub fn from_booted(booted: Booted<S>, frontend: F, output: O, now_ms: u64) -> Self {
        let Booted {
            storage,
            stored: st,
            config,
        } = booted;
        let mut out = output;
        let (output_ma, _) = output::current_ma(&st.settings.output, None);
        let output_fault = out.set_ma(output_ma).is_err();
        let mcfg = config.measure();
        Self {
            fe: frontend,
            storage,
            out,
            mcfg,
            serial: st.ident.serial,
            key: st.ident.key,
            cfg: config,
            boot: st.boot,
            counter: 0,
            write_counter: st.write_counter,
            density_last: None,
            density_pending: None,
            density: None,
            auth_failures: 0,
            auth_hold_until_ms: 0,
            auth_hold_logged: false,
            scratch_written: None,
            next_event: st.next_event,
            boot_ms: now_ms,
            clock_offset_ms: None,
            cell_id: st.cell.as_ref().map_or(CalId::NONE, CellCal::content_id),
            cell: st.cell,
            active: st.active,
            active_slot: st.active_slot,
            settings: st.settings,
            modbus: st.modbus,
            modbus_copy: st.modbus_copy,
            host_version: None,
            output_ma,
            output_fault,
            output_retry_ms: 0,
            output_fault_logged: false,
            last_moisture: None,
            last_valid_ms: now_ms,
            job_started_ms: now_ms,
            latest: None,
            latest_basis: None,
            stale: false,
            chain: ChainState::default(),
            chain_valid: false,
            chain_n: 0,
            reference_ok: true,
            last_ref: [f32::NAN; N_FREQ],
            since_ref: 0,
            runner: Runner::new(),
            subscribed: false,
            next_due_ms: now_ms,
            pending: Pending::default(),
            in_job: Pending::default(),
            last_flags: Flags::NOT_CALIBRATED,
            saturated_run: 0,
            fault_logged_ms: [None; 3],
            decoder: FrameDecoder::new(),
            txbuf: [0; MAX_FRAME_LEN],
            reboot: false,
            diag: Diagnostics::default(),
        }
    }

    /// One step: take received serial bytes, run the schedule and commands,
    /// emit frames through `tx`. Never blocks for long (at most
    /// [`DeviceConfig::steps_per_poll`] records); `now_ms` (monotonic, ms
    /// since the board started) is the only clock.
    pub fn poll(&mut self, now_ms: u64, rx: &[u8], tx: &mut dyn FnMut(&[u8])) {
        self.poll_watched(now_ms, rx, tx, &mut NoWatchdog::default());
    }

    /// [`Device::poll`], kicking `watchdog` first.
    pub fn poll_watched(
        &mut self,
        now_ms: u64,
        rx: &[u8],
        tx: &mut dyn FnMut(&[u8]),
        watchdog: &mut dyn Watchdog,
    ) {
        watchdog.kick();
        for &b in rx {
            if let Some(r) = self.decoder.feed(b) {
                self.on_frame(now_ms, r, tx);
            }
        }
        self.schedule(now_ms);
        for _ in 0..self.cfg.steps_per_poll.max(1) {
            if let Some(raw) = self.runner.step(&mut self.fe, &self.mcfg) {
                self.finish(now_ms, &raw, tx);
                break;
            }
        }
        self.check_stale(now_ms, tx);
        // A current the loop did not take (a write that failed, say on a
        // shared bus) is written again until it is: the failure level of a
        // stalled front end is otherwise written once, and the loop keeps
        // the last moisture.
        if self.output_fault && now_ms >= self.output_retry_ms {
            self.set_output(now_ms, tx);
        }
    }

    /// Sets the clock from a source on the board (a battery-backed
    /// real-time clock, or a simulator's wall clock), as `SetClock` does:
    /// logs [`EventKind::ClockSet`] and sends it through `tx`. For boards
    /// only; a host sets the clock with an authenticated `SetClock`.
    ///
    /// # Errors
    /// [`ErrorCode::OutOfRange`] for a time before 2000 or after 2200
    /// (nothing changes).
    pub fn set_clock_from_board(
        &mut self,
        now_ms: u64,
        unix_ms: u64,
        tx: &mut dyn FnMut(&[u8]),
    ) -> Result<(), ErrorCode> {
        self.set_clock(now_ms, unix_ms, tx)
            .map_err(|(code, _)| code)
    }

    fn set_clock(
        &mut self,
        now_ms: u64,
        unix_ms: u64,
        tx: &mut dyn FnMut(&[u8]),
    ) -> Result<(), Refusal> {
        in_range(
            (MIN_UNIX_MS..=MAX_UNIX_MS).contains(&unix_ms),
            "unix_ms not 2000..2200",
        )?;
        let old_ms = self.time_ms(now_ms).0;
        self.clock_offset_ms = Some(unix_ms as i64 - now_ms as i64);
        self.event(
            now_ms,
            EventKind::ClockSet {
                old_ms,
                new_ms: unix_ms,
            },
            tx,
        );
        Ok(())
    }

    /// The settings in force.
    pub fn settings(&self) -> &Settings {
        &self.settings
    }

    /// The Modbus RTU settings in force (checked: a board hands them to
    /// [`crate::modbus::RtuSlave::reconfigure`] and its UART when they
    /// change, which only an accepted [`Request::WriteModbus`] does).
    pub fn modbus_line(&self) -> SerialLine {
        SerialLine::from(self.modbus)
    }

    /// Whether a host is subscribed to the readings.
    pub fn subscribed(&self) -> bool {
        self.subscribed
    }

    /// The stale-output timeout: with no valid reading for that long, and
    /// none under way for at most [`LONGEST_READING_MS`], the loop goes to
    /// its failure level (once per episode, with an event).
    fn check_stale(&mut self, now_ms: u64, tx: &mut dyn FnMut(&[u8])) {
        // Not while a reading is under way, for as long as a reading can
        // take: one with the reference check ends well after the next was
        // due (about 160 ms on the simulator, 390 ms estimated on the
        // STM32G474), and at the shortest settings (100 ms, 200 ms) the
        // loop went to its failure level every ten readings (found by
        // review). A job stuck longer (a stalled front end) trips it from
        // the last valid reading's end, as before.
        let running =
            self.runner.busy() && now_ms.saturating_sub(self.job_started_ms) <= LONGEST_READING_MS;
        if running {
            return;
        }
        let late =
            now_ms.saturating_sub(self.last_valid_ms) > u64::from(self.settings.stale_timeout_ms);
        if !late || self.stale {
            return;
        }
        self.stale = true;
        let showed_value = self.last_moisture.is_some();
        self.drive_output(None, now_ms, tx);
        if showed_value {
            self.event(
                now_ms,
                EventKind::Fault {
                    code: FaultCode::StaleOutput,
                },
                tx,
            );
        }
    }

    /// What the Modbus registers show at `now_ms`: the latest reading (valid
    /// or not, rounded as the protocol carries it, so the registers equal
    /// the gateway's for the same reading), its age on the device clock, and stale once that age
    /// exceeds the stale-output timeout ([`Settings::stale_timeout_ms`]).
    pub fn register_snapshot(&self, now_ms: u64) -> fringe_registers::Snapshot {
        let (reading, age_ms) = match self.latest {
            Some((r, at)) => (Some(r), now_ms.saturating_sub(at)),
            None => (None, 0),
        };
        fringe_registers::Snapshot {
            reading,
            age_s: u32::try_from(age_ms / 1000).unwrap_or(u32::MAX),
            stale: reading.is_some() && age_ms > u64::from(self.settings.stale_timeout_ms),
            connected: true,
            basis: self.latest_basis,
        }
    }

    /// The Modbus input registers at `now_ms` (`fringe_registers::map` of
    /// [`Device::register_snapshot`]), for [`crate::modbus::RtuSlave::poll`].
    pub fn modbus_registers(&self, now_ms: u64) -> [u16; fringe_registers::MAP_LEN] {
        fringe_registers::map(&self.register_snapshot(now_ms))
    }

    /// The front end (the simulator's scenario is changed through it).
    pub fn frontend_mut(&mut self) -> &mut F {
        &mut self.fe
    }

    /// The flash (tests arm power cuts through it).
    pub fn flash_mut(&mut self) -> &mut S {
        self.storage.flash_mut()
    }

    /// The storage (dumps and tests).
    pub fn storage_mut(&mut self) -> &mut Storage<S> {
        &mut self.storage
    }

    /// The current output, to change (tests of a failing loop).
    pub fn output_mut(&mut self) -> &mut O {
        &mut self.out
    }

    /// The current output.
    pub fn output(&self) -> &O {
        &self.out
    }

    /// A reboot request was accepted: the board/sim should reset (rebuild
    /// the Device from the same flash).
    pub fn reboot_requested(&self) -> bool {
        self.reboot
    }

    /// Takes the device apart (to reboot on the same flash).
    pub fn into_parts(self) -> (F, S, O) {
        (self.fe, self.storage.into_inner(), self.out)
    }

    /// Boot counter of this run.
    pub fn boot_count(&self) -> u32 {
        self.boot
    }

    /// Readings the flash log holds at least.
    pub fn log_capacity(&self) -> u32 {
        self.storage.log_capacity()
    }

    /// Present loop current, mA.
    pub fn output_ma(&self) -> f32 {
        self.output_ma
    }

    /// Whether a measurement job is under way (a board that sleeps between
    /// polls should poll again at once while it is: each poll runs only
    /// [`DeviceConfig::steps_per_poll`] steps of it).
    pub fn job_running(&self) -> bool {
        self.runner.busy()
    }

    /// Readings taken since this boot (the counter of the next sequence number).
    pub fn readings_since_boot(&self) -> u32 {
        self.counter
    }

    /// Sets what the board measured about itself (see [`Diagnostics`]).
    pub fn set_diagnostics(&mut self, diag: Diagnostics) {
        self.diag = diag;
    }

    fn send(&mut self, tx: &mut dyn FnMut(&[u8]), frame: &DeviceFrame) {
        if let Ok(n) = encode(frame, &mut self.txbuf) {
            if let Some(b) = self.txbuf.get(..n) {
                tx(b);
            }
        }
    }

    fn respond(&mut self, tx: &mut dyn FnMut(&[u8]), id: u16, response: Response) {
        self.send(tx, &DeviceFrame::Response { id, response });
    }

    fn refuse(&mut self, tx: &mut dyn FnMut(&[u8]), id: u16, (code, why): Refusal) {
        self.send(
            tx,
            &DeviceFrame::Error {
                id,
                code,
                reason: short_string(why),
            },
        );
    }

    fn time_ms(&self, now_ms: u64) -> (u64, bool) {
        match self.clock_offset_ms {
            Some(off) => ((now_ms as i64).saturating_add(off).max(0) as u64, true),
            None => (now_ms.saturating_sub(self.boot_ms), false),
        }
    }

    /// Stores an event; a storage failure is not fatal (the event is still
    /// returned for sending).
    fn log_event(&mut self, now_ms: u64, kind: EventKind) -> Event {
        let ev = Event {
            number: self.next_event,
            boot: self.boot,
            time_ms: self.time_ms(now_ms).0,
            kind,
        };
        self.next_event = self.next_event.wrapping_add(1);
        let _ = self.storage.append_event(&ev);
        if matches!(ev.kind, EventKind::ModbusChanged { .. }) {
            self.modbus_copy = Some(ev.number);
        } else if modbus_copy_due(
            self.modbus_copy.map(|n| (n, self.modbus)),
            self.modbus,
            self.next_event,
            self.storage.event_capacity(),
        ) {
            // The copy renewed (old = new), logged, not sent: a host reads
            // it with the log.
            let copy = Event {
                number: self.next_event,
                boot: self.boot,
                time_ms: self.time_ms(now_ms).0,
                kind: EventKind::ModbusChanged {
                    old: self.modbus,
                    new: self.modbus,
                },
            };
            self.next_event = self.next_event.wrapping_add(1);
            let _ = self.storage.append_event(&copy);
            self.modbus_copy = Some(copy.number);
        }
        ev
    }

    fn event(&mut self, now_ms: u64, kind: EventKind, tx: &mut dyn FnMut(&[u8])) {
        let ev = self.log_event(now_ms, kind);
        let ev = self.for_host(ev);
        self.send(tx, &DeviceFrame::Event(ev));
    }

    /// `ev` as the host can decode it: a host below protocol 1.2 (or one
    /// that has not identified itself) gets a `ModbusChanged` as a
    /// `SettingsChanged` with the two settings' content ids; a host below
    /// 1.3 gets a `Throttled` refusal as `BadTag` (the nearest reason it
    /// knows; the refusal's text says what happened).
    fn for_host(&self, ev: Event) -> Event {
        let below = |minor| {
            self.host_version
                .is_none_or(|v| v < Version { major: 1, minor })
        };
        let old_host = below(2);
        match ev.kind {
            EventKind::AuthFailed {
                reason: AuthFailure::Throttled,
                counter,
            } if below(3) => Event {
                kind: EventKind::AuthFailed {
                    reason: AuthFailure::BadTag,
                    counter,
                },
                ..ev
            },
            EventKind::ModbusChanged { old, new } if old_host => Event {
                kind: EventKind::SettingsChanged {
                    old: old.content_id(),
                    new: new.content_id(),
                },
                ..ev
            },
            _ => ev,
        }
    }

    fn on_frame(
        &mut self,
        now_ms: u64,
        r: Result<HostFrame, FrameError>,
        tx: &mut dyn FnMut(&[u8]),
    ) {
        match r {
            Ok(frame) => self.handle(now_ms, frame, tx),
            Err(FrameError::UnsupportedVersion(v)) => {
                let frame = DeviceFrame::Error {
                    id: 0,
                    code: ErrorCode::UnsupportedVersion,
                    reason: short_string("protocol major version differs"),
                };
                // Answer in the peer's header version so it can read the refusal.
                let v = if v.header_byte().is_some() {
                    v
                } else {
                    PROTOCOL_VERSION
                };
                if let Ok(n) = encode_with_version(&frame, v, &mut self.txbuf) {
                    if let Some(b) = self.txbuf.get(..n) {
                        tx(b);
                    }
                }
            }
            Err(FrameError::Undecodable) => {
                self.refuse(tx, 0, (ErrorCode::UnknownRequest, "request not decodable"));
            }
            // Damaged frames: counted by the decoder, not answered (the id is unknown).
            Err(_) => {}
        }
    }

    /// The plant's bulk density at `now_ms`, while it holds.
    fn density_at(&self, now_ms: u64) -> Option<f32> {
        self.density
            .and_then(|(kg_m3, until)| (now_ms < until).then_some(kg_m3))
    }

    fn authorize(
        &mut self,
        now_ms: u64,
        frame: &HostFrame,
        tx: &mut dyn FnMut(&[u8]),
    ) -> Authorized {
        let carried = frame.auth.map_or(0, |a| a.counter);
        if now_ms < self.auth_hold_until_ms {
            // Held off: refused without checking the tag, so a guess costs
            // the whole hold. The first refusal of a hold is logged, the
            // rest only answered (the event log is flash).
            if !self.auth_hold_logged {
                self.auth_hold_logged = true;
                self.event(
                    now_ms,
                    EventKind::AuthFailed {
                        reason: AuthFailure::Throttled,
                        counter: carried,
                    },
                    tx,
                );
            }
            let left_s = (self.auth_hold_until_ms - now_ms).div_ceil(1000);
            let mut why: heapless::String<32> = heapless::String::new();
            // Fits: at most "writes held off for 64 s more" (29 characters).
            let _ = core::fmt::Write::write_fmt(
                &mut why,
                format_args!("writes held off for {left_s} s more"),
            );
            self.send(
                tx,
                &DeviceFrame::Error {
                    id: frame.id,
                    code: ErrorCode::AuthFailed,
                    reason: short_string(&why),
                },
            );
            return Authorized::Refused;
        }
        let density = match frame.request {
            Request::SetDensity {
                boot,
                kg_m3,
                hold_ms,
            } => Some((boot, kg_m3.to_bits(), hold_ms)),
            _ => None,
        };
        let density_boot = density.map(|d| d.0);
        let reason = match verify(&self.key, &self.serial, frame.auth.as_ref(), &frame.request) {
            Err(reason) => Some(reason),
            // A density for another boot: captured before a restart (its
            // counter was never stored, so only the boot tells).
            Ok(_) if density_boot.is_some_and(|b| b != self.boot) => Some(AuthFailure::Replay),
            // The same signed density again (its answer was lost and the
            // host tried again): answered, not applied again (a replay
            // cannot extend its hold), not counted as a failure.
            // (The tag has been verified: the counter and the values are
            // the ones signed.)
            Ok(c)
                if density
                    .is_some_and(|(_, kg, hold)| self.density_last == Some((c, kg, hold))) =>
            {
                return Authorized::Duplicate;
            }
            Ok(c) if density.is_some() => {
                if self.density_last.is_some_and(|(last, _, _)| c <= last) {
                    Some(AuthFailure::Replay)
                } else {
                    self.density_pending = Some(c);
                    None
                }
            }
            Ok(c) if c <= self.write_counter => Some(AuthFailure::Replay),
            Ok(c) => {
                if self.storage.put(key::WRITE_COUNTER, &c).is_err() {
                    self.refuse(
                        tx,
                        frame.id,
                        (ErrorCode::Storage, "write counter not stored"),
                    );
                    return Authorized::Refused;
                }
                self.write_counter = c;
                None
            }
        };
        match reason {
            None => {
                self.auth_failures = 0;
                Authorized::Go
            }
            Some(reason) => {
                self.auth_failures = self.auth_failures.saturating_add(1);
                let hold = write_hold_ms(self.auth_failures);
                if hold > 0 {
                    self.auth_hold_until_ms = now_ms.saturating_add(hold);
                    self.auth_hold_logged = false;
                }
                self.event(
                    now_ms,
                    EventKind::AuthFailed {
                        reason,
                        counter: carried,
                    },
                    tx,
                );
                self.refuse(tx, frame.id, (ErrorCode::AuthFailed, reason.reason()));
                Authorized::Refused
            }
        }
    }

    fn handle(&mut self, now_ms: u64, frame: HostFrame, tx: &mut dyn FnMut(&[u8])) {
        let id = frame.id;
        if matches!(frame.request, Request::SetDensity { .. }) && !self.cfg.density_input {
            // As firmware before protocol 1.4: not a request it knows, so
            // no write (and no counter) is spent on it.
            self.refuse(tx, id, (ErrorCode::UnknownRequest, "no density input"));
            return;
        }
        if frame.request.needs_auth() {
            match self.authorize(now_ms, &frame, tx) {
                Authorized::Go => {}
                Authorized::Refused => return,
                Authorized::Duplicate => {
                    self.respond(tx, id, Response::Ack);
                    return;
                }
            }
        }
        let result = self.handle_request(now_ms, id, frame.request, tx);
        match result {
            Ok(Some(resp)) => self.respond(tx, id, resp),
            Ok(None) => {}
            Err(refusal) => self.refuse(tx, id, refusal),
        }
    }

    fn storage_refusal(_: StorageError) -> Refusal {
        (ErrorCode::Storage, "flash storage failed")
    }

    /// Answers a request; `Ok(None)` when the answer comes later (measurements).
    fn handle_request(
        &mut self,
        now_ms: u64,
        id: u16,
        request: Request,
        tx: &mut dyn FnMut(&[u8]),
    ) -> Result<Option<Response>, Refusal> {
        let st = Self::storage_refusal;
        Ok(Some(match request {
            Request::Identify { host } => {
                if PROTOCOL_VERSION.check_compatible(host).is_err() {
                    return Err((
                        ErrorCode::UnsupportedVersion,
                        "protocol major version differs",
                    ));
                }
                self.host_version = Some(host);
                Response::Identity(self.identity())
            }
            Request::Status => Response::Status(self.status(now_ms)),
            Request::Measure => {
                if self.pending.measure.is_some() {
                    return Err((ErrorCode::Busy, "a measurement is pending"));
                }
                self.pending.measure = Some(id);
                return Ok(None);
            }
            Request::StartStream { period_ms } => {
                in_range(
                    (MIN_PERIOD_MS..=MAX_PERIOD_MS).contains(&period_ms),
                    "period_ms not 100..86400000",
                )?;
                self.subscribed = true;
                Response::Ack
            }
            Request::StopStream => {
                self.subscribed = false;
                Response::Ack
            }
            Request::ReadCellCal => Response::CellCal(self.cell),
            Request::WriteCellCal(c) => {
                check_cell(&c, &self.cfg.measure.freqs_hz)?;
                let old = self.cell_id;
                self.storage.put(key::CELL_CAL, &c).map_err(st)?;
                self.cell_id = c.content_id();
                self.cell = Some(c);
                self.chain_valid = false;
                let new = self.cell_id;
                self.event(now_ms, EventKind::CellCalChanged { old, new }, tx);
                Response::Ack
            }
            Request::ReadProductCal { slot } => {
                in_slot(slot)?;
                let cal = self.storage.product(slot).map_err(st)?;
                Response::ProductCal { slot, cal }
            }
            Request::WriteProductCal { slot, cal } => {
                in_slot(slot)?;
                let parsed = check_product(&cal)?;
                let layout = relaxation_layout(&cal);
                if (!self.cfg.static_terms && layout >= 2)
                    || (!self.cfg.sigma_hold && layout >= 3)
                    || (!self.relaxation_density() && layout >= 4)
                {
                    // As firmware before the static terms (or the
                    // conductivity hold): a relaxation layout it does not
                    // know.
                    return Err((
                        ErrorCode::BadCalibration,
                        "product params rejected by model",
                    ));
                }
                let old = self
                    .storage
                    .product(slot)
                    .map_err(st)?
                    .map_or(CalId::NONE, |c| c.content_id());
                self.storage.put_product(slot, &cal).map_err(st)?;
                let new = cal.content_id();
                if self.active_slot == Some(slot) {
                    self.active = Some(Active {
                        slot,
                        id: new,
                        cal: parsed,
                    });
                }
                self.event(now_ms, EventKind::ProductCalChanged { slot, old, new }, tx);
                Response::Ack
            }
            Request::SelectProduct { slot } => {
                in_slot(slot)?;
                let pc = self
                    .storage
                    .product(slot)
                    .map_err(st)?
                    .ok_or((ErrorCode::NoSuchSlot, "product slot is empty"))?;
                let cal = parse_product(&pc).map_err(|e| (e, "stored calibration invalid"))?;
                self.storage
                    .put(key::ACTIVE_SLOT, &Some(slot))
                    .map_err(st)?;
                let old_slot = self.active_slot;
                if old_slot != Some(slot) {
                    // Another product: the last one's density is not its.
                    self.density = None;
                }
                let idc = pc.content_id();
                self.active_slot = Some(slot);
                self.active = Some(Active { slot, id: idc, cal });
                self.event(
                    now_ms,
                    EventKind::ProductSelected {
                        old_slot,
                        new_slot: slot,
                        id: idc,
                    },
                    tx,
                );
                Response::Ack
            }
            Request::ListProducts => {
                let mut slots: Vec<SlotInfo, N_PRODUCT_SLOTS> = Vec::new();
                for slot in 0..N_PRODUCT_SLOTS as u8 {
                    if let Some(pc) = self.storage.product(slot).map_err(st)? {
                        let _ = slots.push(SlotInfo {
                            slot,
                            name: pc.name.clone(),
                            id: pc.content_id(),
                            model: pc.model,
                        });
                    }
                }
                Response::Products {
                    slots,
                    active: self.active_slot,
                }
            }
            Request::ReferenceCheck => {
                if self.pending.refcheck.is_some() {
                    return Err((ErrorCode::Busy, "a reference check is pending"));
                }
                self.pending.refcheck = Some(id);
                return Ok(None);
            }
            Request::ReadLog { from, max } => {
                in_range((1..=LOG_CHUNK as u8).contains(&max), "max not 1..=4")?;
                let (readings, next, end) =
                    self.storage.read_log(from, usize::from(max)).map_err(st)?;
                Response::Log {
                    readings,
                    next,
                    end,
                }
            }
            Request::ReadEvents { from, max } => {
                in_range((1..=EVENT_CHUNK as u8).contains(&max), "max not 1..=6")?;
                let (events, next, end) = self
                    .storage
                    .read_events(from, usize::from(max))
                    .map_err(st)?;
                let mut out: Vec<Event, EVENT_CHUNK> = Vec::new();
                for ev in events {
                    // Never full: as many as were read.
                    let _ = out.push(self.for_host(ev));
                }
                Response::Events {
                    events: out,
                    next,
                    end,
                }
            }
            Request::SetClock { unix_ms } => {
                self.set_clock(now_ms, unix_ms, tx)?;
                Response::Ack
            }
            Request::SelfTest => {
                if self.pending.selftest.is_some() {
                    return Err((ErrorCode::Busy, "a self-test is pending"));
                }
                self.pending.selftest = Some(id);
                return Ok(None);
            }
            Request::Reboot => {
                self.reboot = true;
                Response::Ack
            }
            Request::SetOutput(o) => {
                let new = device_settings::with_output(&self.settings, o);
                self.write_settings(now_ms, new, tx)?;
                Response::Ack
            }
            Request::ReadSettings => Response::Settings(self.settings.clone()),
            Request::WriteSettings(new) => {
                self.write_settings(now_ms, new, tx)?;
                Response::Ack
            }
            Request::ReadModbus => Response::Modbus(self.modbus),
            Request::WriteModbus(new) => {
                self.write_modbus(now_ms, new, tx)?;
                Response::Ack
            }
            Request::SetDensity { kg_m3, hold_ms, .. } => {
                let counter = self.density_pending.take();
                if !kg_m3.is_finite() {
                    return Err((ErrorCode::NotFinite, "kg_m3 not finite"));
                }
                let (lo, hi) = DENSITY_RANGE_KG_M3;
                in_range((lo..=hi).contains(&kg_m3), "kg_m3 not 10..5000")?;
                in_range(
                    (DENSITY_HOLD_MIN_MS..=DENSITY_HOLD_MAX_MS).contains(&hold_ms),
                    "hold_ms not 1000..3600000",
                )?;
                self.density = Some((kg_m3, now_ms.saturating_add(u64::from(hold_ms))));
                if let Some(c) = counter {
                    self.density_last = Some((c, kg_m3.to_bits(), hold_ms));
                }
                Response::Ack
            }
        }))
    }

    /// Checks, stores (atomically) and applies new settings, logs
    /// [`EventKind::SettingsChanged`]; the loop follows the new span at
    /// once. Refused settings change nothing.
    fn write_settings(
        &mut self,
        now_ms: u64,
        new: Settings,
        tx: &mut dyn FnMut(&[u8]),
    ) -> Result<(), Refusal> {
        device_settings::validate(&new).map_err(|e| {
            let code = match e {
                device_settings::SettingsError::Span(output::SpanError::NotFinite) => {
                    ErrorCode::NotFinite
                }
                _ => ErrorCode::OutOfRange,
            };
            (code, e.reason())
        })?;
        if !self.cfg.wide_span && new.output.span_high_pct > 100.0 {
            return Err((ErrorCode::OutOfRange, "span: need 0<=low<high<=100"));
        }
        self.storage
            .put(key::SETTINGS, &new)
            .map_err(Self::storage_refusal)?;
        let old = self.settings.content_id();
        let interval = u64::from(new.interval_ms);
        self.settings = new;
        self.next_due_ms = self.next_due_ms.min(now_ms.saturating_add(interval));
        if !self.stale {
            self.drive_output(self.last_moisture, now_ms, tx);
        } else {
            self.drive_output(None, now_ms, tx);
        }
        let new = self.settings.content_id();
        self.event(now_ms, EventKind::SettingsChanged { old, new }, tx);
        Ok(())
    }

    /// Checks, stores (atomically) and puts in force new Modbus RTU
    /// settings, logs [`EventKind::ModbusChanged`]. The board applies them
    /// ([`Device::modbus_line`]) before the next Modbus request. Refused
    /// settings change nothing.
    fn write_modbus(
        &mut self,
        now_ms: u64,
        new: ModbusSettings,
        tx: &mut dyn FnMut(&[u8]),
    ) -> Result<(), Refusal> {
        SerialLine::from(new)
            .validate()
            .map_err(|e| (ErrorCode::OutOfRange, e.reason()))?;
        self.storage
            .put(key::MODBUS, &new)
            .map_err(Self::storage_refusal)?;
        let old = core::mem::replace(&mut self.modbus, new);
        self.event(now_ms, EventKind::ModbusChanged { old, new }, tx);
        Ok(())
    }

    /// Whether the device takes a relaxation calibration with the density
    /// input (layout 4): it builds on layouts 2 and 3 and needs the
    /// density the plant sends ([`Request::SetDensity`]).
    fn relaxation_density(&self) -> bool {
        self.cfg.static_terms
            && self.cfg.sigma_hold
            && self.cfg.density_input
            && self.cfg.relaxation_density
    }

    fn identity(&self) -> Identity {
        let mut caps = Capabilities::RELAXATION
            | Capabilities::CURRENT_OUTPUT
            | Capabilities::LOG
            | Capabilities::SETTINGS
            | Capabilities::MODBUS_RTU;
        if self.cfg.wide_span {
            caps |= Capabilities::WIDE_SPAN;
        }
        if self.cfg.simulated {
            caps |= Capabilities::SIMULATED;
        }
        if self.cfg.density_input {
            caps |= Capabilities::DENSITY_INPUT;
        }
        if self.cfg.static_terms {
            caps |= Capabilities::STATIC_TERMS;
        }
        if self.cfg.static_terms && self.cfg.sigma_hold {
            caps |= Capabilities::SIGMA_HOLD;
        }
        if self.relaxation_density() {
            caps |= Capabilities::RELAXATION_DENSITY;
        }
        if self.diag != Diagnostics::default() {
            caps |= Capabilities::DIAGNOSTICS;
        }
        Identity {
            serial: self.serial.clone(),
            firmware: FIRMWARE_VERSION,
            protocol: PROTOCOL_VERSION,
            capabilities: caps,
            boot: self.boot,
            freqs_hz: self.cfg.measure.freqs_hz,
        }
    }

    fn status(&self, now_ms: u64) -> Status {
        let (log_first, log_len) = self.storage.log_span().unwrap_or((
            Seq {
                boot: self.boot,
                counter: 0,
            },
            0,
        ));
        Status {
            time_ms: self.time_ms(now_ms).0,
            uptime_ms: now_ms.saturating_sub(self.boot_ms),
            boot: self.boot,
            next_seq: Seq {
                boot: self.boot,
                counter: self.counter,
            },
            log_first,
            log_len,
            next_event: self.next_event,
            stream_period_ms: self.subscribed.then_some(self.settings.interval_ms),
            active_slot: self.active.map(|a| a.slot),
            cell_cal: self.cell_id,
            product_cal: self.active.map_or(CalId::NONE, |a| a.id),
            last_flags: self.last_flags,
            write_counter: self.write_counter,
            link_errors: self.decoder.stats().errors(),
            reference_ratio: mean(&self.last_ref),
            output_ma: self.output_ma,
            stack_free_bytes: self.diag.stack_free_bytes,
            reading_cost: self.diag.reading_cost,
        }
    }

    fn schedule(&mut self, now_ms: u64) {
        if self.runner.busy() {
            return;
        }
        let due = now_ms >= self.next_due_ms;
        let reading = due || self.pending.measure.is_some() || self.pending.selftest.is_some();
        let reference = self.pending.refcheck.is_some()
            || self.pending.selftest.is_some()
            || !self.chain_valid
            || self.since_ref >= self.mcfg.reference_every;
        if !(reading || self.pending.refcheck.is_some()) {
            return;
        }
        if due {
            // On the device's own clock; a reading missed (a long request,
            // a stalled front end) is skipped, not caught up.
            let p = u64::from(self.settings.interval_ms);
            self.next_due_ms = self.next_due_ms.saturating_add(p);
            if self.next_due_ms <= now_ms {
                self.next_due_ms = now_ms.saturating_add(p);
            }
        }
        // The job answers the requests made before it started; later ones
        // wait for the next job (so a `Measure` after a change of product
        // never gets a reading acquired before it).
        self.in_job = core::mem::take(&mut self.pending);
        self.job_started_ms = now_ms;
        self.runner.start(Job {
            electrodes: reading,
            reference,
        });
    }

    fn finish(&mut self, now_ms: u64, raw: &measure::Raw, tx: &mut dyn FnMut(&[u8])) {
        let job = self.runner.job();
        let info = self.fe.info();
        let mut ref_check = None;
        if let Some(r) = raw.reference.as_ref() {
            self.since_ref = 0;
            match measure::chain_from_reference(&self.fe, &info, &self.mcfg, r) {
                Some(c) => {
                    self.last_ref = c.ratios();
                    self.chain = if self.chain_valid {
                        self.chain.update(&c, &mut self.chain_n)
                    } else {
                        self.chain_n = 1;
                        c
                    };
                    self.chain_valid = true;
                }
                None => self.last_ref = [f32::NAN; N_FREQ],
            }
            let baseline = self.cell.map_or(0.0, |c| c.reference_ratio);
            let ok = if baseline > 0.0 {
                self.last_ref
                    .iter()
                    .all(|r| (r / baseline - 1.0).abs() <= self.mcfg.reference_tolerance)
            } else {
                self.last_ref.iter().all(|r| r.is_finite())
            };
            if self.reference_ok && !ok {
                let ratio = mean(&self.last_ref);
                self.event(now_ms, EventKind::ReferenceDrift { ratio, baseline }, tx);
            }
            self.reference_ok = ok;
            ref_check = Some(RefCheck {
                ratio: self.last_ref,
                baseline,
                ok,
            });
            if let (Some(id), Some(rc)) = (self.in_job.refcheck.take(), ref_check) {
                self.respond(tx, id, Response::RefCheck(rc));
            }
        }
        if !job.electrodes {
            return;
        }
        self.since_ref = self.since_ref.saturating_add(1);
        let o = measure::evaluate(
            &self.fe,
            &self.mcfg,
            raw,
            &self.chain,
            self.cell.as_ref(),
            self.active.as_ref().map(|a| &a.cal),
            self.density_at(now_ms),
        );
        let (time_ms, clock_set) = self.time_ms(now_ms);
        let mut flags = o.flags;
        if !clock_set {
            flags |= Flags::CLOCK_UNSET;
        }
        if !self.reference_ok {
            flags |= Flags::REFERENCE_DRIFT;
        }
        if self.active.is_none() {
            flags |= Flags::NOT_CALIBRATED;
        }
        let reading = Reading {
            seq: Seq {
                boot: self.boot,
                counter: self.counter,
            },
            time_ms,
            channels: o.channels,
            temperature_c: o.temperature_c,
            moisture_pct: o.moisture_pct,
            uncertainty_pct: o.uncertainty_pct,
            flags,
            cell_cal: self.cell_id,
            product_cal: self.active.map_or(CalId::NONE, |a| a.id),
        };
        self.counter = self.counter.wrapping_add(1);
        self.fault_events(now_ms, flags, tx);
        self.last_flags = flags;
        if self.cfg.log_readings && self.storage.append_reading(&reading).is_err() {
            self.event(
                now_ms,
                EventKind::Fault {
                    code: FaultCode::Storage,
                },
                tx,
            );
        }
        self.latest = Some((reading.on_wire(), now_ms));
        self.latest_basis = self.active.as_ref().map(|a| match a.cal.basis {
            fringe_calibration::moisture::Basis::Wet => Basis::Wet,
            fringe_calibration::moisture::Basis::Dry => Basis::Dry,
        });
        self.last_moisture = reading.moisture_pct.filter(|m| m.is_finite());
        if self.last_moisture.is_some() {
            self.last_valid_ms = now_ms;
            self.stale = false;
        }
        self.drive_output(self.last_moisture, now_ms, tx);
        if self.subscribed {
            self.send(tx, &DeviceFrame::Reading(reading));
        }
        if let Some(id) = self.in_job.measure.take() {
            self.respond(tx, id, Response::Reading(reading));
        }
        if let Some(id) = self.in_job.selftest.take() {
            let storage_ok = self.scratch_test();
            let frontend_ok = !raw.frontend_error
                && raw.reference.is_some_and(|r| {
                    r.iter()
                        .all(|a| a.kept > 0 && a.min_reference_amplitude > 100.0)
                });
            let st = SelfTest {
                storage_ok,
                frontend_ok,
                temperature_ok: !flags.contains(Flags::TEMP_SENSOR_FAULT),
                reference_ok: ref_check.is_some_and(|r| r.ok),
                flags,
            };
            self.respond(tx, id, Response::SelfTest(st));
        }
    }

    /// The storage part of a self-test: the first of a boot writes a
    /// scratch record and reads it back; later ones read back the value
    /// written (at most one scratch write a boot, unless a write fails).
    fn scratch_test(&mut self) -> bool {
        if let Some(v) = self.scratch_written {
            return self.storage.get::<u32>(SCRATCH_KEY).ok().flatten() == Some(v);
        }
        let v = self.next_event ^ 0xA5A5_5A5A;
        let ok = self.storage.put(SCRATCH_KEY, &v).is_ok()
            && self.storage.get::<u32>(SCRATCH_KEY).ok().flatten() == Some(v);
        if ok {
            self.scratch_written = Some(v);
        }
        ok
    }

    fn fault_events(&mut self, now_ms: u64, flags: Flags, tx: &mut dyn FnMut(&[u8])) {
        let rising = |f: Flags| flags.contains(f) && !self.last_flags.contains(f);
        let electrode = rising(Flags::ELECTRODE_FAULT);
        let temp = rising(Flags::TEMP_SENSOR_FAULT);
        if flags.contains(Flags::SATURATED) {
            self.saturated_run = self.saturated_run.saturating_add(1);
        } else {
            self.saturated_run = 0;
        }
        let faults = [
            (electrode, FaultCode::Electrode),
            (temp, FaultCode::TemperatureSensor),
            (self.saturated_run == 3, FaultCode::Saturation),
        ];
        let mut logged = self.fault_logged_ms;
        for ((now, code), last) in faults.into_iter().zip(logged.iter_mut()) {
            // A fault that comes and goes is logged once per hold-off: the
            // readings carry its flag each time, and an event on every
            // edge of a flag flapping at one reading a second wore the
            // event ring's two pages out within weeks (found by review).
            let due = last.is_none_or(|t| now_ms.saturating_sub(t) >= FAULT_EVENT_HOLDOFF_MS);
            if now && due {
                *last = Some(now_ms);
                self.event(now_ms, EventKind::Fault { code }, tx);
            }
        }
        self.fault_logged_ms = logged;
    }

    /// Drives the current for `moisture_pct` (the failure level for none).
    fn drive_output(&mut self, moisture_pct: Option<f32>, now_ms: u64, tx: &mut dyn FnMut(&[u8])) {
        let (ma, _) = output::current_ma(&self.settings.output, moisture_pct);
        self.output_ma = ma;
        self.set_output(now_ms, tx);
    }

    /// Writes the current commanded; a loop fault is logged once per
    /// episode, on whichever path it is met (a reading, the stale timeout,
    /// a settings write, a retry), and the write is tried again
    /// [`OUTPUT_RETRY_MS`] later.
    fn set_output(&mut self, now_ms: u64, tx: &mut dyn FnMut(&[u8])) {
        self.output_fault = self.out.set_ma(self.output_ma).is_err();
        self.output_retry_ms = now_ms.saturating_add(OUTPUT_RETRY_MS);
        if !self.output_fault {
            self.output_fault_logged = false;
        } else if !self.output_fault_logged {
            self.output_fault_logged = true;
            self.event(
                now_ms,
                EventKind::Fault {
                    code: FaultCode::CurrentLoop,
                },
                tx,
            );
        }
    }
}

/// Storage mounted and read at boot, the device not yet built: the first
/// half of [`Device::new`]. It holds the mounted storage, the identity,
/// boot counter, calibrations and settings read from it, and the boot
/// events are already logged.
pub struct Booted<S: NorFlash> {
    storage: Storage<S>,
    stored: Stored,
    config: DeviceConfig,
}

impl<S: NorFlash> core::fmt::Debug for Booted<S> {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        f.debug_struct("Booted")
            .field("boot", &self.stored.boot)
            .field("storage", &self.storage)
            .finish_non_exhaustive()
    }
}

impl<S: NorFlash> Booted<S> {
    /// Checks the configuration, mounts storage (repairing if needed),
    /// raises the boot counter, loads calibrations and settings and logs
    /// the boot events.
    ///
    /// # Errors
    /// As [`Device::new`].
    pub fn mount(
        flash: S,
        config: DeviceConfig,
        reset_cause: ResetCause,
    ) -> Result<Self, BootError> {
        config.check()?;
        let (mut storage, report) = Storage::mount(flash)?;
        let stored = Stored::load(&mut storage, &config, report, reset_cause)?;
        Ok(Self {
            storage,
            stored,
            config,
        })
    }

    /// The boot counter this boot raised it to.
    pub fn boot_count(&self) -> u32 {
        self.stored.boot
    }
}

/// What boot reads from (and writes to) storage before the device is built.
struct Stored {
    ident: StoredIdentity,
    boot: u32,
    write_counter: u32,
    next_event: u32,
    cell: Option<CellCal>,
    active: Option<Active>,
    active_slot: Option<u8>,
    settings: Settings,
    modbus: ModbusSettings,
    /// Number of the newest `ModbusChanged` event in the ring.
    modbus_copy: Option<u32>,
}

/// Whether the Modbus settings `m` in force need a fresh copy in the event
/// ring, where `newest` is the newest one it holds (number, settings) and
/// `next` the number the next event takes: settings other than the
/// defaults whose copy is missing, differs, or is `capacity / 2` events
/// old or more (so that events the device logs for any client, a wrong
/// key among them, do not push the only copy out before it is renewed).
fn modbus_copy_due(
    newest: Option<(u32, ModbusSettings)>,
    m: ModbusSettings,
    next: u32,
    capacity: u32,
) -> bool {
    if m == ModbusSettings::from(SerialLine::DEFAULT) {
        return false;
    }
    match newest {
        Some((n, copy)) => copy != m || next.wrapping_sub(n) >= (capacity / 2).max(1),
        None => true,
    }
}

impl Stored {
    /// Reads the identity (storing the configured one on first boot),
    /// raises the boot counter, loads calibrations and settings, and logs
    /// the boot events.
    fn load<S: NorFlash>(
        storage: &mut Storage<S>,
        config: &DeviceConfig,
        report: crate::storage::MountReport,
        reset_cause: ResetCause,
    ) -> Result<Self, StorageError> {
        let had_identity = storage.get::<StoredIdentity>(key::IDENTITY)?;
        let lived_before = had_identity.is_some() || storage.get::<u32>(key::BOOT)?.is_some();
        let ident = match had_identity {
            Some(id) => id,
            None => {
                let id = StoredIdentity {
                    serial: config.serial.clone(),
                    key: config.key,
                };
                storage.put(key::IDENTITY, &id)?;
                id
            }
        };
        // The boot number goes on past the newest logged reading's and
        // event's, so a sequence never repeats even where the stored number
        // was lost (a settings map erased as damaged, or a value that does
        // not decode; a device may keep no reading log).
        let event_boot = match storage.last_event() {
            Some(n) => storage.read_events(n, 1)?.0.first().map_or(0, |e| e.boot),
            None => 0,
        };
        let logged_boot = storage.log_last().map_or(0, |s| s.boot).max(event_boot);
        // A map repair's marker (its event, logged before the erase) holds
        // the number this boot takes: past every logged one already.
        let boot = match report.repair_boot {
            Some(b) => b,
            None => storage
                .get::<u32>(key::BOOT)?
                .unwrap_or(0)
                .max(logged_boot)
                .wrapping_add(1),
        };
        storage.put(key::BOOT, &boot)?;
        // A write counter lost with a damaged settings map is moved on past
        // any this device can have accepted, so a write captured before is
        // still a replay (a host asks for the counter before it signs). Lost
        // means absent on a device that has lived: the map was erased, its
        // identity or boot number was stored, or the logs hold something (a
        // power cut between the erase and this store leaves the map empty
        // or half written but not damaged). A new device stores 0, so that
        // its counter is never absent again.
        let lived = report.settings_lost
            || lived_before
            || storage.log_last().is_some()
            || storage.last_event().is_some();
        let write_counter = match storage.get::<u32>(key::WRITE_COUNTER)? {
            Some(c) => c,
            None => {
                let c = if lived { repair_counter(boot) } else { 0 };
                storage.put(key::WRITE_COUNTER, &c)?;
                c
            }
        };
        let cell = storage
            .cell_cal()?
            .filter(|c| check_cell(c, &config.measure.freqs_hz).is_ok());
        // The settings; a device that only has the 1.0 output configuration
        // keeps its span and failure level.
        let stored_settings = storage.get::<Settings>(key::SETTINGS)?;
        // Stored settings this firmware refuses (a firmware change) are
        // replaced by the defaults: logged as a settings change at boot,
        // from the stored ones' content id (found by review: silently).
        let refused_settings = stored_settings
            .as_ref()
            .filter(|s| device_settings::validate(s).is_err())
            .map(Settings::content_id);
        let settings = match stored_settings {
            Some(s) if device_settings::validate(&s).is_ok() => s,
            _ => {
                let mut s = config.settings.clone();
                if let Some(o) = storage
                    .get::<OutputConfig>(key::OUTPUT)?
                    .filter(|o| output::validate(o).is_ok())
                {
                    s.output = o;
                }
                s
            }
        };
        // The Modbus settings: absent on a new device or flash written by
        // firmware before protocol 1.2, and a stored value that no longer
        // passes the check, read as the defaults. Where they are absent but
        // were written (lost with a settings map erased as damaged, also
        // after a power cut in that repair), they are taken back from the
        // newest change the event ring still holds, and stored again, so that
        // a device on a shared RS-485 bus keeps its unit id and line rather
        // than answering as unit 1; without one, the defaults.
        let valid = |m: &ModbusSettings| SerialLine::from(*m).validate().is_ok();
        let stored_modbus = storage.get::<ModbusSettings>(key::MODBUS)?.filter(valid);
        // A ring that does not read gives no copy (the defaults), not a
        // device that cannot boot.
        let logged_modbus = storage.newest_logged_modbus().unwrap_or(None);
        let recovered = match stored_modbus {
            None => logged_modbus.map(|(_, m)| m).filter(valid),
            Some(_) => None,
        };
        if let Some(m) = recovered {
            // Not fatal: the settings are in force this boot either way.
            let _ = storage.put(key::MODBUS, &m);
        }
        let modbus = stored_modbus
            .or(recovered)
            .unwrap_or(SerialLine::DEFAULT.into());
        let active_slot = storage.get::<Option<u8>>(key::ACTIVE_SLOT)?.flatten();
        let active = load_active(storage, active_slot)?;
        // Boot events, numbered on from the log; their time is 0 (ms since
        // this boot: the host has not set the clock yet).
        let mut next_event = storage.last_event().map_or(0, |n| n.wrapping_add(1));
        // An event ring erased as damaged numbers on past any number it can
        // have held: the latest boot's first number (kept in the map at each
        // boot) moved on as the write counter is after a repair. Numbering
        // from 0 again, the host, which asks for the events after the last
        // it holds, would not see the repair's own event, and numbers would
        // collide in its store (found by review). Otherwise that first
        // number is a floor (a ring that lost its pages some other way).
        // (A power cut between the ring's erase and the store below loses
        // the jump: the next boot numbers on from the floor.)
        let floor = storage.get::<u32>(key::EVENT_FLOOR)?.unwrap_or(0);
        next_event = if report.events_lost {
            // (Past a map repair's marker, numbered so too.)
            floor.saturating_add(repair_counter(boot)).max(next_event)
        } else {
            next_event.max(floor)
        };
        storage.put(key::EVENT_FLOOR, &next_event)?;
        let boot_event = |storage: &mut Storage<S>, next_event: &mut u32, kind| {
            let ev = Event {
                number: *next_event,
                boot,
                time_ms: 0,
                kind,
            };
            *next_event = next_event.wrapping_add(1);
            // Not fatal, as in `log_event`.
            let _ = storage.append_event(&ev);
        };
        // (A map repair's marker is its event already.)
        if report.repaired && (report.repair_boot.is_none() || report.rings_repaired) {
            boot_event(storage, &mut next_event, EventKind::StorageRepaired);
        }
        boot_event(storage, &mut next_event, EventKind::Boot { reset_cause });
        if let Some(old) = refused_settings {
            boot_event(
                storage,
                &mut next_event,
                EventKind::SettingsChanged {
                    old,
                    new: settings.content_id(),
                },
            );
        }
        // The ring's copy of the Modbus settings: a recovery is logged (from
        // the defaults the map's loss left); settings other than the
        // defaults whose newest copy is missing, differs or has aged into
        // the older half of the ring are logged again (old = new).
        let mut modbus_copy = logged_modbus.map(|(n, _)| n);
        let copy_due = modbus_copy_due(logged_modbus, modbus, next_event, storage.event_capacity());
        if recovered.is_some() || copy_due {
            modbus_copy = Some(next_event);
            let old = if recovered.is_some() {
                SerialLine::DEFAULT.into()
            } else {
                modbus
            };
            boot_event(
                storage,
                &mut next_event,
                EventKind::ModbusChanged { old, new: modbus },
            );
        }
        Ok(Self {
            ident,
            boot,
            write_counter,
            next_event,
            cell,
            active,
            active_slot,
            settings,
            modbus,
            modbus_copy,
        })
    }
}

/// The product calibration in `slot`, parsed; `None` when there is no
/// slot, nothing stored there, or it no longer parses.
fn load_active<S: NorFlash>(
    storage: &mut Storage<S>,
    slot: Option<u8>,
) -> Result<Option<Active>, StorageError> {
    let Some(slot) = slot else { return Ok(None) };
    Ok(storage.product(slot)?.and_then(|pc| {
        parse_product(&pc).ok().map(|cal| Active {
            slot,
            id: pc.content_id(),
            cal,
        })
    }))
}

fn in_slot(slot: u8) -> Result<(), Refusal> {
    if usize::from(slot) < N_PRODUCT_SLOTS {
        Ok(())
    } else {
        Err((ErrorCode::NoSuchSlot, "slot not 0..=7"))
    }
}

fn mean(v: &[f32; N_FREQ]) -> f32 {
    v.iter().sum::<f32>() / N_FREQ as f32
}
