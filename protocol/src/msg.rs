//! Typed messages.
//!
//! The host sends [`HostFrame`]s (a request with its id and, for requests
//! that change the device, an [`Auth`] tag); the device sends
//! [`DeviceFrame`]s (a response to a request id, an error for a request id, a
//! streamed [`Reading`] or an unsolicited [`Event`]).
//!
//! Units are in the field names (`_hz`, `_pf`, `_c`, `_pct`, `_ms`, `_s`
//! for siemens). Permittivity follows eps* = eps' - j eps'' with
//! `eps_im` = eps'' >= 0 for a lossy material. Admittance is Y = G + jB in
//! siemens.
//!
//! **Compatibility:** postcard encodes an enum variant by its position and a
//! struct by its field order. Variants and flags are only appended; a field is
//! never reordered or removed within a major version.

use bitflags::bitflags;
use heapless::{String, Vec};
use serde::{Deserialize, Serialize};

use crate::version::Version;

/// Number of excitation frequencies per reading.
pub const N_FREQ: usize = 2;
/// Number of product calibration slots a device holds.
pub const N_PRODUCT_SLOTS: usize = 8;
/// Longest device serial, in bytes.
pub const SERIAL_LEN: usize = 16;
/// Longest product name, in bytes.
pub const NAME_LEN: usize = 16;
/// Longest error reason, in bytes.
pub const REASON_LEN: usize = 32;
/// Most parameters a product calibration carries (layout owned by `fringe-calibration`).
pub const MAX_CAL_PARAMS: usize = 32;
/// Most input ranges a product calibration carries.
pub const MAX_CAL_INPUTS: usize = 6;
/// Most readings in one [`Response::Log`] chunk.
pub const LOG_CHUNK: usize = 4;
/// Most events in one [`Response::Events`] chunk.
pub const EVENT_CHUNK: usize = 6;
/// Longest measuring-point tag in [`Settings`], bytes.
pub const TAG_LEN: usize = 24;

/// Device serial number (ASCII).
pub type Serial = String<SERIAL_LEN>;

/// Identifier of a calibration: the first four bytes of the SHA-256 of its
/// postcard encoding (see [`CellCal::content_id`], [`ProductCal::content_id`]).
#[derive(
    Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize, Default,
)]
pub struct CalId(pub [u8; 4]);

impl CalId {
    /// The id as one big-endian number (for display, `{:08x}`).
    pub const fn as_u32(self) -> u32 {
        u32::from_be_bytes(self.0)
    }
    /// "No calibration".
    pub const NONE: CalId = CalId([0; 4]);
}

impl core::fmt::Display for CalId {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        write!(f, "{:08x}", self.as_u32())
    }
}

/// Sequence number of a reading: never repeats for a device.
///
/// Ordered by boot, then counter; the counter restarts at 0 on every boot.
#[derive(
    Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize, Default,
)]
pub struct Seq {
    /// Boot counter (stored in flash, raised at every start).
    pub boot: u32,
    /// Readings since this boot.
    pub counter: u32,
}

impl Seq {
    /// The sequence as one 64-bit key (`boot << 32 | counter`), monotonic in the order above.
    pub const fn as_u64(self) -> u64 {
        ((self.boot as u64) << 32) | self.counter as u64
    }
    /// Inverse of [`Seq::as_u64`].
    pub const fn from_u64(v: u64) -> Self {
        Self {
            boot: (v >> 32) as u32,
            counter: v as u32,
        }
    }
}

impl core::fmt::Display for Seq {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        write!(f, "{}.{}", self.boot, self.counter)
    }
}

bitflags! {
    /// Quality flags of a reading. A set flag means the number is doubtful
    /// for the stated reason; bits are only appended.
    #[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize, Default)]
    #[serde(transparent)]
    pub struct Flags: u16 {
        /// An ADC channel clipped during acquisition.
        const SATURATED = 1 << 0;
        /// No product in front of the window (empty line).
        const NO_PRODUCT = 1 << 1;
        /// Moisture or an input lies outside the product calibration's valid range.
        const OUT_OF_RANGE = 1 << 2;
        /// Temperature outside the product calibration's range (a reading
        /// outside the sensor's own range is `TEMP_SENSOR_FAULT`).
        const TEMP_OUT_OF_RANGE = 1 << 3;
        /// The relaxation inversion did not converge within its budget, was
        /// singular, or had no valid input.
        const FIT_NOT_CONVERGED = 1 << 4;
        /// Electrode open or short detected.
        const ELECTRODE_FAULT = 1 << 5;
        /// The internal reference check moved beyond its tolerance.
        const REFERENCE_DRIFT = 1 << 6;
        /// No valid cell or product calibration: no moisture is reported.
        const NOT_CALIBRATED = 1 << 7;
        /// The device clock was never set: `time_ms` counts from boot.
        const CLOCK_UNSET = 1 << 8;
        /// Signal-to-noise ratio below the acceptance threshold.
        const LOW_SNR = 1 << 9;
        /// Temperature sensor open, shorted or out of its range.
        const TEMP_SENSOR_FAULT = 1 << 10;
        /// The product calibration takes a bulk density input and no fresh
        /// one was there: the moisture assumes the calibration's reference
        /// density, with its uncertainty widened.
        const DENSITY_MISSING = 1 << 11;
    }
}

impl Flags {
    /// Short lower-case words for each flag, in bit order (used in CSV and logs).
    pub const NAMES: [(Flags, &'static str); 12] = [
        (Flags::SATURATED, "saturated"),
        (Flags::NO_PRODUCT, "no_product"),
        (Flags::OUT_OF_RANGE, "out_of_range"),
        (Flags::TEMP_OUT_OF_RANGE, "temp_out_of_range"),
        (Flags::FIT_NOT_CONVERGED, "fit_not_converged"),
        (Flags::ELECTRODE_FAULT, "electrode_fault"),
        (Flags::REFERENCE_DRIFT, "reference_drift"),
        (Flags::NOT_CALIBRATED, "not_calibrated"),
        (Flags::CLOCK_UNSET, "clock_unset"),
        (Flags::LOW_SNR, "low_snr"),
        (Flags::TEMP_SENSOR_FAULT, "temp_sensor_fault"),
        (Flags::DENSITY_MISSING, "density_missing"),
    ];

    /// Iterator over the names of the set flags.
    pub fn names(self) -> impl Iterator<Item = &'static str> {
        Self::NAMES
            .into_iter()
            .filter(move |(f, _)| self.contains(*f))
            .map(|(_, n)| n)
    }
}

/// One frequency's measured values.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize, Default)]
pub struct ChannelValue {
    /// Conductance G of the sensor cell, siemens.
    pub g_s: f32,
    /// Susceptance B of the sensor cell, siemens.
    pub b_s: f32,
    /// Real permittivity eps' after the cell calibration (NaN if uncalibrated).
    /// Carried as binary16 (about 3 significant digits, see [`crate::quant`]).
    #[serde(with = "crate::quant::f16_le")]
    pub eps_re: f32,
    /// Loss factor eps'' >= 0 after the cell calibration (NaN if uncalibrated).
    /// Carried as binary16 (see [`crate::quant`]).
    #[serde(with = "crate::quant::f16_le")]
    pub eps_im: f32,
}

/// One measurement: both frequencies, temperature, moisture, flags.
///
/// The excitation frequencies themselves are in [`Identity::freqs_hz`] and
/// the cell calibration; `channels[0]` is the lower frequency.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize, Default)]
pub struct Reading {
    /// Sequence number (never repeats for this device).
    pub seq: Seq,
    /// Device time: ms since the Unix epoch, or since boot when [`Flags::CLOCK_UNSET`].
    pub time_ms: u64,
    /// Per-frequency admittance and permittivity.
    pub channels: [ChannelValue; N_FREQ],
    /// Product temperature, degrees Celsius (wire step 0.01 C, +/-327.67 C, see [`crate::quant`]).
    #[serde(with = "crate::quant::centi_c")]
    pub temperature_c: f32,
    /// Moisture in % on the active calibration's basis; `None` when not calibrated
    /// or the estimate failed (the flags say why). Wire step 0.01 %, +/-327.67 %.
    #[serde(with = "crate::quant::opt_centi_pct")]
    pub moisture_pct: Option<f32>,
    /// Standard uncertainty (1 sigma) of `moisture_pct`, % moisture (wire step
    /// 0.001 %, 0..=65.534 %).
    #[serde(with = "crate::quant::milli_pct")]
    pub uncertainty_pct: f32,
    /// Quality flags.
    pub flags: Flags,
    /// Cell calibration in force ([`CalId::NONE`] if none).
    pub cell_cal: CalId,
    /// Product calibration in force ([`CalId::NONE`] if none).
    pub product_cal: CalId,
}

impl ChannelValue {
    /// The values the peer decodes (see [`crate::quant`]).
    pub fn on_wire(self) -> Self {
        Self {
            eps_re: crate::quant::f16_round(self.eps_re),
            eps_im: crate::quant::f16_round(self.eps_im),
            ..self
        }
    }
}

impl Reading {
    /// The reading the peer decodes from this one: the compact fields
    /// rounded as [`crate::quant`] describes, everything else unchanged.
    /// Compare against this when checking a reading that crossed the wire.
    pub fn on_wire(self) -> Self {
        use crate::quant::{moisture_round, temperature_round, uncertainty_round};
        Self {
            channels: self.channels.map(ChannelValue::on_wire),
            temperature_c: temperature_round(self.temperature_c),
            moisture_pct: self.moisture_pct.map(moisture_round),
            uncertainty_pct: uncertainty_round(self.uncertainty_pct),
            ..self
        }
    }
}

/// Moisture basis of a product calibration.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
pub enum Basis {
    /// Water mass / total mass x 100 (grain, food, feed).
    #[default]
    Wet,
    /// Water mass / dry mass x 100 (timber, soil).
    Dry,
}

/// Which product calibration model a [`ProductCal`] holds.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum ModelKind {
    /// Polynomial in eps' at one frequency plus a temperature term.
    SingleFrequency,
    /// Relaxation inversion, water fraction through a mixing model, plus
    /// temperature and conductivity terms.
    Relaxation,
    /// Linear combination of physically chosen features of both
    /// frequencies (chemometrics: ridge or PLS on the host). Appended: tag 2.
    Multivariate,
}

/// Cell calibration at one frequency: Y = jw Cp + jw C0 eps* + G0.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize, Default)]
pub struct CellPoint {
    /// Excitation frequency, Hz.
    pub freq_hz: f32,
    /// Stray (parallel) capacitance Cp, pF.
    pub stray_pf: f32,
    /// Cell constant as the empty-cell capacitance C0, pF.
    pub cell_pf: f32,
    /// Residual conductance offset G0, siemens.
    pub g_offset_s: f32,
}

/// Sensor-cell calibration for both frequencies.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize, Default)]
pub struct CellCal {
    /// One point per frequency, lower frequency first.
    pub points: [CellPoint; N_FREQ],
    /// Reference capacitor's ratio at calibration time (for the drift check).
    pub reference_ratio: f32,
    /// Unix time of the calibration, seconds.
    pub made_s: u64,
}

/// Valid range of one quantity.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize, Default)]
pub struct Range {
    /// Lower bound, inclusive.
    pub min: f32,
    /// Upper bound, inclusive.
    pub max: f32,
}

impl Range {
    /// Whether `x` lies within the range (NaN never does).
    pub fn contains(&self, x: f32) -> bool {
        x >= self.min && x <= self.max
    }
}

/// A product calibration as carried on the wire and stored on the device.
///
/// The meaning of `params` per [`ModelKind`] is defined (and validated) by
/// `fringe-calibration`; this crate only carries it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ProductCal {
    /// Product name as the plant calls it.
    pub name: String<NAME_LEN>,
    /// Model kind.
    pub model: ModelKind,
    /// Moisture basis of the result.
    pub basis: Basis,
    /// Model parameters (layout per model, see `fringe-calibration`).
    pub params: Vec<f32, MAX_CAL_PARAMS>,
    /// Valid moisture range, %.
    pub moisture_pct: Range,
    /// Valid temperature range, C.
    pub temperature_c: Range,
    /// Valid range of each model input, in the model's input order.
    pub inputs: Vec<Range, MAX_CAL_INPUTS>,
    /// Standard error of calibration, % moisture (for the uncertainty).
    pub sec_pct: f32,
    /// Unix time of the fit, seconds.
    pub made_s: u64,
}

/// The device's answer to the handshake.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Identity {
    /// Device serial number.
    pub serial: Serial,
    /// Firmware version, `[major, minor, patch]`.
    pub firmware: [u8; 3],
    /// Protocol version spoken by the device.
    pub protocol: Version,
    /// What the device can do.
    pub capabilities: Capabilities,
    /// Boot counter.
    pub boot: u32,
    /// Excitation frequencies, Hz, lower first.
    pub freqs_hz: [f32; N_FREQ],
}

bitflags! {
    /// Capabilities a device announces in its [`Identity`].
    #[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize, Default)]
    #[serde(transparent)]
    pub struct Capabilities: u32 {
        /// Two-frequency relaxation model.
        const RELAXATION = 1 << 0;
        /// 4-20 mA output with NAMUR NE 43 signalling.
        const CURRENT_OUTPUT = 1 << 1;
        /// Simulated front end (not a real sensor).
        const SIMULATED = 1 << 2;
        /// Stored reading log.
        const LOG = 1 << 3;
        /// Reports stack high-water mark and per-reading cost in [`Status`].
        const DIAGNOSTICS = 1 << 4;
        /// Measures on its own schedule (whether or not a host listens) and
        /// answers [`Request::ReadSettings`] / [`Request::WriteSettings`]
        /// (protocol 1.1).
        const SETTINGS = 1 << 5;
        /// Has a Modbus RTU slave whose unit id, baud rate and parity are
        /// device settings: answers [`Request::ReadModbus`] /
        /// [`Request::WriteModbus`] (protocol 1.2).
        const MODBUS_RTU = 1 << 6;
        /// Takes the plant's bulk density for a product calibration with a
        /// density input: answers [`Request::SetDensity`] (protocol 1.4).
        /// The host refuses to push such a calibration to a device without it.
        const DENSITY_INPUT = 1 << 7;
        /// Takes a relaxation calibration with the static terms (the
        /// relaxation model's parameter layout 2, 21 values; a message
        /// that existed before, so no new protocol version). Firmware
        /// without it takes layout 1 only and refuses layouts 2 and 3 as a
        /// bad calibration; the host refuses to push one to it.
        const STATIC_TERMS = 1 << 8;
        /// Takes a relaxation calibration whose conductivity term holds
        /// sigma to a range (the relaxation model's parameter layout 3, 23
        /// values; no new protocol version). Firmware without it refuses
        /// layout 3 as a bad calibration; the host refuses to push one to
        /// it.
        const SIGMA_HOLD = 1 << 9;
        /// Takes a relaxation calibration whose mixing model takes each
        /// reading's bulk density (the relaxation model's parameter
        /// layout 4, 23 values, fitted with the density input; no new
        /// protocol version). Firmware without it refuses layout 4 as a
        /// bad calibration; the host refuses to push one to it.
        const RELAXATION_DENSITY = 1 << 10;
        /// Takes a 4-20 mA span reaching up to 327.67 % moisture (a dry-basis
        /// calibration: water over dry mass exceeds 100 % in green wood and
        /// biomass; the same [`OutputConfig`], no new protocol version).
        /// Firmware without it ends the span at 100 % and answers a higher
        /// one with `OutOfRange`; the host refuses to send one to it.
        const WIDE_SPAN = 1 << 11;
    }
}

/// Device status.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Status {
    /// Device time (see [`Reading::time_ms`]).
    pub time_ms: u64,
    /// Milliseconds since boot.
    pub uptime_ms: u64,
    /// Boot counter.
    pub boot: u32,
    /// Sequence the next reading will carry.
    pub next_seq: Seq,
    /// Oldest reading still in the stored log.
    pub log_first: Seq,
    /// Number of readings in the stored log.
    pub log_len: u32,
    /// Number of the next event.
    pub next_event: u32,
    /// Streaming period in ms, `None` when not streaming. Since protocol
    /// 1.1: the measurement interval while a host is subscribed.
    pub stream_period_ms: Option<u32>,
    /// Active product slot, `None` if none selected.
    pub active_slot: Option<u8>,
    /// Cell calibration in force.
    pub cell_cal: CalId,
    /// Product calibration in force.
    pub product_cal: CalId,
    /// Flags of the last reading.
    pub last_flags: Flags,
    /// Highest write counter accepted so far (the next write must exceed it).
    pub write_counter: u32,
    /// Frames the device's decoder rejected (all kinds).
    pub link_errors: u32,
    /// Last internal reference ratio |Y_ref| / nominal.
    pub reference_ratio: f32,
    /// Present 4-20 mA output, mA.
    pub output_ma: f32,
    /// Untouched stack bytes since boot (stack painting), if measured.
    pub stack_free_bytes: Option<u32>,
    /// Cost of the last full reading in instructions/cycles, if measured.
    pub reading_cost: Option<u32>,
}

/// Summary of one product slot.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SlotInfo {
    /// Slot number, 0-based.
    pub slot: u8,
    /// Product name.
    pub name: String<NAME_LEN>,
    /// Calibration id.
    pub id: CalId,
    /// Model kind.
    pub model: ModelKind,
}

/// Result of an internal reference check.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct RefCheck {
    /// Measured ratio to the nominal reference capacitor, per frequency.
    pub ratio: [f32; N_FREQ],
    /// Ratio at cell calibration time.
    pub baseline: f32,
    /// Whether the check lies within its tolerance.
    pub ok: bool,
}

/// Result of a self-test.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct SelfTest {
    /// Flash read/write/verify of a scratch record passed (the boot's first
    /// self-test writes the record, later ones of the boot read it back).
    pub storage_ok: bool,
    /// Front end answered and both channels are within range.
    pub frontend_ok: bool,
    /// Temperature sensor within range.
    pub temperature_ok: bool,
    /// Reference check within tolerance.
    pub reference_ok: bool,
    /// Flags seen during the test measurement.
    pub flags: Flags,
}

/// Reason a write was refused by the authentication check.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum AuthFailure {
    /// The request changes the device but carried no tag.
    Missing,
    /// The tag did not verify (wrong key, changed payload or tag).
    BadTag,
    /// The counter was not above the stored one (replay).
    Replay,
    /// Not checked: writes are held off after repeated failures (protocol
    /// 1.3; see `protocol/WIRE.md`, "Back-off after failed writes").
    Throttled,
}

impl AuthFailure {
    /// The reason text of the device's `AuthFailed` error frame (at most
    /// [`REASON_LEN`] bytes); a host matches a refusal on exactly this.
    pub const fn reason(self) -> &'static str {
        match self {
            AuthFailure::Missing => "write needs an auth tag",
            AuthFailure::BadTag => "auth tag does not verify",
            AuthFailure::Replay => "auth counter not above stored",
            AuthFailure::Throttled => "writes held off",
        }
    }
}

/// What happened on the device.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub enum EventKind {
    /// The device started.
    Boot {
        /// Why the previous run ended, as the board reports it.
        reset_cause: ResetCause,
    },
    /// The cell calibration changed.
    CellCalChanged {
        /// Previous id.
        old: CalId,
        /// New id.
        new: CalId,
    },
    /// A product calibration slot was written.
    ProductCalChanged {
        /// Slot.
        slot: u8,
        /// Previous id in that slot.
        old: CalId,
        /// New id.
        new: CalId,
    },
    /// The active product changed.
    ProductSelected {
        /// Previous active slot.
        old_slot: Option<u8>,
        /// New active slot.
        new_slot: u8,
        /// Calibration id now in force.
        id: CalId,
    },
    /// A write request was refused by the authentication check.
    AuthFailed {
        /// Why.
        reason: AuthFailure,
        /// The counter the request carried (0 if none).
        counter: u32,
    },
    /// The clock was set.
    ClockSet {
        /// Device time before, ms.
        old_ms: u64,
        /// Device time after, ms.
        new_ms: u64,
    },
    /// A fault was detected.
    Fault {
        /// Fault code.
        code: FaultCode,
    },
    /// The reference check left its tolerance.
    ReferenceDrift {
        /// Measured ratio.
        ratio: f32,
        /// Baseline ratio.
        baseline: f32,
    },
    /// Stored data were found damaged and repaired (the damaged item is lost).
    StorageRepaired,
    /// The device settings were written (protocol 1.1).
    SettingsChanged {
        /// Content id of the settings before ([`Settings::content_id`]).
        old: CalId,
        /// Content id of the settings now in force.
        new: CalId,
    },
    /// The Modbus RTU settings were written (protocol 1.2). A device sends
    /// a host that announced 1.1 or older a [`EventKind::SettingsChanged`]
    /// with the two settings' content ids instead (an older host cannot
    /// decode this variant).
    ModbusChanged {
        /// The settings before.
        old: ModbusSettings,
        /// The settings now in force.
        new: ModbusSettings,
    },
}

/// Why the device last reset.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum ResetCause {
    /// Power on (or unknown).
    PowerOn,
    /// Reboot request from the host.
    Requested,
    /// Watchdog expired.
    Watchdog,
    /// Panic handler.
    Panic,
}

/// Fault codes in [`EventKind::Fault`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum FaultCode {
    /// Electrode open or short.
    Electrode,
    /// ADC saturated on consecutive readings.
    Saturation,
    /// Temperature sensor open/short.
    TemperatureSensor,
    /// Flash operation failed.
    Storage,
    /// Current output loop fault.
    CurrentLoop,
    /// No valid reading within the stale-output timeout
    /// ([`Settings::stale_timeout_ms`]): the loop went to its failure level
    /// (protocol 1.1).
    StaleOutput,
}

/// An event record: a numbered entry of the device's event log.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Event {
    /// Event number (never repeats for a device).
    pub number: u32,
    /// Boot counter when it happened.
    pub boot: u32,
    /// Device time, ms (see [`Reading::time_ms`]).
    pub time_ms: u64,
    /// What happened.
    pub kind: EventKind,
}

/// 4-20 mA output configuration.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct OutputConfig {
    /// Moisture at 4 mA, %.
    pub span_low_pct: f32,
    /// Moisture at 20 mA, %.
    pub span_high_pct: f32,
    /// Signal a fault low (<= 3.6 mA) or high (>= 21 mA), per NAMUR NE 43.
    pub fail_high: bool,
}

/// The device settings a plant sets (protocol 1.1): what the loop means,
/// how often the device measures, and when a missing reading counts as a
/// failure. Kept in power-cut-safe flash; written only with an [`Auth`] tag
/// ([`Request::WriteSettings`]).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Settings {
    /// The measuring point's tag as the plant names it (e.g. `L2-DRYER-MT-201`); may be empty.
    pub tag: String<TAG_LEN>,
    /// Measurement interval on the device's own clock, ms.
    pub interval_ms: u32,
    /// 4-20 mA span and NAMUR NE 43 failure level.
    pub output: OutputConfig,
    /// With no valid reading for this long, the loop goes to its failure
    /// level instead of holding the last value, ms.
    pub stale_timeout_ms: u32,
}

/// Parity of the Modbus RTU line (Modbus over Serial Line V1.02, section
/// 2.5.1: a character is 11 bits, so no parity means two stop bits).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
pub enum ModbusParity {
    /// Even parity, one stop bit (8E1; the specification's default).
    Even,
    /// Odd parity, one stop bit (8O1).
    Odd,
    /// No parity, two stop bits (8N2).
    None,
}

/// The Modbus RTU slave's serial-line settings (protocol 1.2): kept in
/// power-cut-safe flash beside [`Settings`], written only with an [`Auth`]
/// tag ([`Request::WriteModbus`]). The device checks them: unit id
/// 1..=247, baud rate one of 1200, 2400, 4800, 9600, 19200, 38400, 57600,
/// 115200. Defaults: unit 1, 19200 baud, even parity.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
pub struct ModbusSettings {
    /// Unit id (slave address) the device answers, 1..=247.
    pub unit_id: u8,
    /// Baud rate.
    pub baud: u32,
    /// Parity (and with it the stop bits).
    pub parity: ModbusParity,
}

impl ModbusSettings {
    /// Content id: first four bytes of SHA-256 of the postcard encoding
    /// (what a 1.1 host sees in [`EventKind::SettingsChanged`]).
    pub fn content_id(&self) -> CalId {
        content_id(self)
    }
}

impl Settings {
    /// Content id: first four bytes of SHA-256 of the postcard encoding
    /// (carried in [`EventKind::SettingsChanged`]).
    pub fn content_id(&self) -> CalId {
        content_id(self)
    }
}

/// Requests from the host.
// No heap to box into: variants stay inline (`WriteProductCal` is the largest).
#[allow(clippy::large_enum_variant)]
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub enum Request {
    /// Handshake: the host's protocol version.
    Identify {
        /// Version the host speaks.
        host: Version,
    },
    /// Device status.
    Status,
    /// One reading now.
    Measure,
    /// Subscribe to the readings: the device sends each reading its own
    /// schedule takes as a [`DeviceFrame::Reading`] until [`Request::StopStream`]
    /// or a reboot. Since protocol 1.1 the device measures at its configured
    /// [`Settings::interval_ms`] whether or not a host subscribes; `period_ms`
    /// is checked against the accepted range (100 ms to one day) and not
    /// otherwise used (a 1.0 device measured only while streaming, at this period).
    StartStream {
        /// Period, ms (a 1.0 device measures at it; see above).
        period_ms: u32,
    },
    /// End the subscription (the device keeps measuring and logging).
    StopStream,
    /// Read the cell calibration.
    ReadCellCal,
    /// Write the cell calibration (authenticated).
    WriteCellCal(CellCal),
    /// Read a product calibration slot.
    ReadProductCal {
        /// Slot.
        slot: u8,
    },
    /// Write a product calibration slot (authenticated).
    WriteProductCal {
        /// Slot.
        slot: u8,
        /// Calibration.
        cal: ProductCal,
    },
    /// Select the active product slot (authenticated).
    SelectProduct {
        /// Slot.
        slot: u8,
    },
    /// List the product slots.
    ListProducts,
    /// Run the internal reference check.
    ReferenceCheck,
    /// Read stored readings from a sequence number on.
    ReadLog {
        /// First sequence wanted (the device answers from the first stored one at or after it).
        from: Seq,
        /// Most readings wanted (at most [`LOG_CHUNK`]).
        max: u8,
    },
    /// Read stored events from an event number on.
    ReadEvents {
        /// First event number wanted.
        from: u32,
        /// Most events wanted (at most [`EVENT_CHUNK`]).
        max: u8,
    },
    /// Set the device clock (authenticated).
    SetClock {
        /// Unix time, ms.
        unix_ms: u64,
    },
    /// Run the self-test.
    SelfTest,
    /// Reboot (authenticated).
    Reboot,
    /// Configure the 4-20 mA output (authenticated); the rest of the
    /// [`Settings`] stays as it is.
    SetOutput(OutputConfig),
    /// Read the device settings (protocol 1.1).
    ReadSettings,
    /// Write the device settings, all at once (authenticated; protocol 1.1).
    WriteSettings(Settings),
    /// Read the Modbus RTU settings (protocol 1.2).
    ReadModbus,
    /// Write the Modbus RTU settings, all at once (authenticated; protocol
    /// 1.2). The device answers on the new unit id, baud rate and parity
    /// from the next request on its RS-485 line.
    WriteModbus(ModbusSettings),
    /// The plant's bulk density of the product at the sensor, from a
    /// weigh belt or a density gauge, for a product calibration with a
    /// density input (authenticated; protocol 1.4). The device uses it for
    /// the readings of the next `hold_ms` and flags the readings after that
    /// `DENSITY_MISSING` until a new one comes. Held in RAM only: a reboot
    /// forgets it. The device checks `kg_m3` (finite, 10 to 5,000 kg/m^3)
    /// and `hold_ms` (1 s to 1 h).
    ///
    /// Since it may come every second, its write counter is a sequence of
    /// its own, kept in RAM and not in flash (that would wear the settings'
    /// pages out), apart from the stored counter of the other writes
    /// ([`Status::write_counter`]); `boot` (the device's boot number,
    /// [`Identity::boot`]) ties the signed request to this boot, so that a
    /// request captured before a restart is refused as a replay after it.
    /// The density accepted last, received again, is answered again and
    /// not applied again. See `protocol/WIRE.md`.
    SetDensity {
        /// The boot of the device it is meant for.
        boot: u32,
        /// Bulk density, kg/m^3 (wet basis, as the product lies at the sensor).
        kg_m3: f32,
        /// How long the value holds, ms.
        hold_ms: u32,
    },
}

/// Shortest time a [`Request::SetDensity`] value may hold, ms (1 s).
pub const DENSITY_HOLD_MIN_MS: u32 = 1_000;
/// Longest time a [`Request::SetDensity`] value may hold, ms (1 h).
pub const DENSITY_HOLD_MAX_MS: u32 = 3_600_000;
/// The bulk densities a [`Request::SetDensity`] may carry, kg/m^3: the same
/// limits as a reference sample's density in a calibration table.
pub const DENSITY_RANGE_KG_M3: (f32, f32) = (10.0, 5_000.0);

impl Request {
    /// Whether this request changes the device and so must carry an [`Auth`] tag.
    pub fn needs_auth(&self) -> bool {
        matches!(
            self,
            Request::WriteCellCal(_)
                | Request::WriteProductCal { .. }
                | Request::SelectProduct { .. }
                | Request::SetClock { .. }
                | Request::Reboot
                | Request::SetOutput(_)
                | Request::WriteSettings(_)
                | Request::WriteModbus(_)
                | Request::SetDensity { .. }
        )
    }
}

/// Write authentication carried with a request (see [`crate::auth`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct Auth {
    /// Monotonic counter, must exceed the device's stored one.
    pub counter: u32,
    /// HMAC-SHA256 over serial, counter and the encoded request.
    pub tag: [u8; 32],
}

/// A frame from the host.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct HostFrame {
    /// Request id, echoed in the answer.
    pub id: u16,
    /// Authentication, for requests that change the device.
    pub auth: Option<Auth>,
    /// The request.
    pub request: Request,
}

/// Successful answers.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub enum Response {
    /// Answer to [`Request::Identify`].
    Identity(Identity),
    /// Answer to [`Request::Status`].
    Status(Status),
    /// Answer to [`Request::Measure`].
    Reading(Reading),
    /// The request was carried out.
    Ack,
    /// Answer to [`Request::ReadCellCal`].
    CellCal(Option<CellCal>),
    /// Answer to [`Request::ReadProductCal`].
    ProductCal {
        /// Slot.
        slot: u8,
        /// Calibration stored there, if any.
        cal: Option<ProductCal>,
    },
    /// Answer to [`Request::ListProducts`].
    Products {
        /// Occupied slots.
        slots: Vec<SlotInfo, N_PRODUCT_SLOTS>,
        /// Active slot.
        active: Option<u8>,
    },
    /// Answer to [`Request::ReferenceCheck`].
    RefCheck(RefCheck),
    /// A chunk of the stored reading log.
    Log {
        /// Readings in sequence order.
        readings: Vec<Reading, LOG_CHUNK>,
        /// Where the next chunk starts.
        next: Seq,
        /// Whether the log holds nothing after this chunk.
        end: bool,
    },
    /// A chunk of the event log.
    Events {
        /// Events in number order.
        events: Vec<Event, EVENT_CHUNK>,
        /// Where the next chunk starts.
        next: u32,
        /// Whether nothing follows.
        end: bool,
    },
    /// Answer to [`Request::SelfTest`].
    SelfTest(SelfTest),
    /// Answer to [`Request::ReadSettings`] (protocol 1.1).
    Settings(Settings),
    /// Answer to [`Request::ReadModbus`] (protocol 1.2).
    Modbus(ModbusSettings),
}

/// Error codes a device answers with. Numeric values are stable.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[repr(u16)]
pub enum ErrorCode {
    /// The request could not be decoded or is not known to this device.
    UnknownRequest = 1,
    /// A value was out of its allowed range.
    OutOfRange = 2,
    /// A value was NaN or infinite.
    NotFinite = 3,
    /// Authentication failed (missing tag, bad tag or replayed counter).
    AuthFailed = 4,
    /// The product slot does not exist or is empty.
    NoSuchSlot = 5,
    /// The protocol major version is not supported.
    UnsupportedVersion = 6,
    /// Flash storage failed.
    Storage = 7,
    /// The calibration is not valid for this model.
    BadCalibration = 8,
    /// The device is busy; retry.
    Busy = 9,
}

impl ErrorCode {
    /// The stable numeric code.
    pub const fn code(self) -> u16 {
        self as u16
    }
}

/// A frame from the device.
// No heap to box into: variants stay inline (a log chunk is the largest).
#[allow(clippy::large_enum_variant)]
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub enum DeviceFrame {
    /// Answer to request `id`.
    Response {
        /// Request id.
        id: u16,
        /// The answer.
        response: Response,
    },
    /// Request `id` failed.
    Error {
        /// Request id (0 when the request could not be decoded).
        id: u16,
        /// Numeric code.
        code: ErrorCode,
        /// Short reason for a person.
        reason: String<REASON_LEN>,
    },
    /// A streamed reading.
    Reading(Reading),
    /// An unsolicited event.
    Event(Event),
}

/// Builds a `heapless::String` from `s`, cutting at a character boundary if too long.
pub fn short_string<const N: usize>(s: &str) -> String<N> {
    let mut out = String::new();
    for c in s.chars() {
        if out.push(c).is_err() {
            break;
        }
    }
    out
}

fn content_id<T: Serialize>(value: &T) -> CalId {
    use sha2::{Digest, Sha256};
    struct HashWriter(Sha256);
    let mut buf = [0u8; 512];
    let mut h = HashWriter(Sha256::new());
    // Calibrations fit in 512 bytes by construction (bounded vectors); an
    // encoding failure would be a logic bug, hashed as the empty input.
    if let Ok(bytes) = postcard::to_slice(value, &mut buf) {
        h.0.update(&*bytes);
    }
    let d = h.0.finalize();
    CalId([d[0], d[1], d[2], d[3]])
}

impl CellCal {
    /// Content id: first four bytes of SHA-256 of the postcard encoding.
    pub fn content_id(&self) -> CalId {
        content_id(self)
    }
}

impl ProductCal {
    /// Content id: first four bytes of SHA-256 of the postcard encoding.
    pub fn content_id(&self) -> CalId {
        content_id(self)
    }
}
