//! The hardware seam: what the core asks of a board.
//!
//! The analog board excites the electrodes at one frequency, mixes the
//! sensor current (through a transimpedance stage) and the excitation itself
//! (the reference channel) down to an intermediate frequency (IF), and samples
//! both with an ADC. The core only ever sees ADC codes, the temperature
//! sensor's raw code and the board constants in [`FrontendInfo`]: exactly what
//! a real board gives, nothing more.
//!
//! Real boards implement these traits on top of embedded-hal 1.0 (`SpiDevice`
//! for the ADC and synthesiser, `OutputPin` for the reference-capacitor
//! switch, `DelayNs` for settling); none of that reaches the core.
//!
//! ## Sampling contract
//! One record is [`RECORD_LEN`] samples per channel, taken with a sample clock
//! coherent with the IF: exactly [`FrontendInfo::if_bin`] IF cycles per record
//! (the synthesiser and the ADC share one crystal). The demodulator relies on
//! that (see [`crate::demod`]).

use core::fmt;

/// Samples per channel in one record.
pub const RECORD_LEN: usize = 256;

/// Constants of the analog board, fixed by its design.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FrontendInfo {
    /// IF cycles per record (the DFT bin the signal falls in), 1..RECORD_LEN/2.
    pub if_bin: u16,
    /// Largest positive ADC code; the negative rail is `-adc_full_scale - 1`.
    pub adc_full_scale: i16,
    /// Nominal value of the internal reference capacitor, pF.
    pub reference_pf: f32,
    /// Reference resistor of the ratiometric temperature measurement, ohm:
    /// sensor resistance = raw / 2^24 * `temp_ref_ohm`.
    pub temp_ref_ohm: f32,
    /// Largest excitation amplitude, volts.
    pub max_amplitude_v: f32,
}

/// What the front end can fail with.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum FrontendError {
    /// The requested frequency or amplitude is outside what the board can do.
    Unsupported,
    /// The board did not answer (bus error, timeout).
    Bus,
    /// The synthesiser did not lock.
    NotLocked,
    /// The converter has not finished the record yet: the core asks again
    /// at its next step. A front end that stays here has stalled; the
    /// device then produces no reading, and its loop goes to the failure
    /// level after the stale-output timeout ([`fringe_protocol::Settings`]).
    NotReady,
}

impl fmt::Display for FrontendError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            FrontendError::Unsupported => {
                write!(f, "front end: frequency or amplitude not supported")
            }
            FrontendError::Bus => write!(f, "front end: no answer on the bus"),
            FrontendError::NotLocked => write!(f, "front end: synthesiser not locked"),
            FrontendError::NotReady => write!(f, "front end: record not ready"),
        }
    }
}

impl core::error::Error for FrontendError {}

/// Which element the sensor channel sees.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Input {
    /// The electrodes (the product).
    Electrodes,
    /// The internal reference capacitor.
    Reference,
}

/// The analog front end.
pub trait Frontend {
    /// Board constants.
    fn info(&self) -> FrontendInfo;
    /// Nominal transimpedance of the sensor chain at `freq_hz`, ohm: the
    /// complex ratio sensor/reference is `Y * transimpedance_ohm` for a cell
    /// admittance `Y` (siemens), up to the chain's small phase error, which
    /// the reference capacitor measures.
    fn transimpedance_ohm(&self, freq_hz: f32) -> f32;
    /// Sets the excitation frequency (Hz) and amplitude (V peak); settles before returning.
    ///
    /// # Errors
    /// [`FrontendError::Unsupported`] for values the board cannot produce.
    fn set_excitation(&mut self, freq_hz: f32, amplitude_v: f32) -> Result<(), FrontendError>;
    /// Routes the sensor channel to the electrodes or the internal reference capacitor.
    ///
    /// # Errors
    /// [`FrontendError::Bus`] if the switch cannot be driven.
    fn select_input(&mut self, input: Input) -> Result<(), FrontendError>;
    /// Acquires one record of both channels (ADC codes).
    ///
    /// # Errors
    /// [`FrontendError::NotReady`] while the record is not complete (the
    /// core retries the same record at its next step); another
    /// [`FrontendError`] if the ADC does not deliver.
    fn acquire(
        &mut self,
        sensor: &mut [i16; RECORD_LEN],
        reference: &mut [i16; RECORD_LEN],
    ) -> Result<(), FrontendError>;
    /// Raw 24-bit code of the ratiometric temperature measurement
    /// (see [`FrontendInfo::temp_ref_ohm`]).
    ///
    /// # Errors
    /// [`FrontendError::Bus`] if the converter does not answer.
    fn read_temperature_raw(&mut self) -> Result<u32, FrontendError>;
}

/// Error of the current output.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum OutputError {
    /// The loop is open or its supply too low (the DAC cannot drive the current).
    LoopFault,
}

impl fmt::Display for OutputError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "current loop fault (open loop or supply too low)")
    }
}

impl core::error::Error for OutputError {}

/// A 4-20 mA current-output DAC.
pub trait CurrentOutput {
    /// Drives `ma` milliamps (the core keeps it within 3.5..=22.0 mA).
    ///
    /// # Errors
    /// [`OutputError::LoopFault`] when the loop cannot carry the current.
    fn set_ma(&mut self, ma: f32) -> Result<(), OutputError>;
}

/// A watchdog the device loop kicks once per [`crate::Device::poll`].
pub trait Watchdog {
    /// Restarts the watchdog's countdown.
    fn kick(&mut self);
}

/// A monotonic millisecond clock (for boards; the core itself takes `now_ms` arguments).
pub trait Clock {
    /// Milliseconds since boot, monotonic.
    fn now_ms(&mut self) -> u64;
}

/// A current output that goes nowhere (boards without a loop, tests).
#[derive(Debug, Default, Clone, Copy, PartialEq)]
pub struct NullOutput {
    /// Last current driven, mA.
    pub last_ma: f32,
}

impl CurrentOutput for NullOutput {
    fn set_ma(&mut self, ma: f32) -> Result<(), OutputError> {
        self.last_ma = ma;
        Ok(())
    }
}

/// A watchdog that does nothing (host, tests).
#[derive(Debug, Default, Clone, Copy)]
pub struct NoWatchdog {
    /// Kicks seen.
    pub kicks: u64,
}

impl Watchdog for NoWatchdog {
    fn kick(&mut self) {
        self.kicks = self.kicks.wrapping_add(1);
    }
}
