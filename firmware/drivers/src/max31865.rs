//! MAX31865: the product temperature from a platinum RTD, as the ratio of
//! its resistance to the board's reference resistor.
//!
//! The register access is `embedded-devices` 0.10.3 (module
//! `devices::analog_devices::max31865`, embedded-hal 1.0, kept: releases
//! through 2026, MSRV 1.89 like ours); this module only decides the
//! sequence and maps its errors to one [`Error<E>`]. Its own
//! `measure()` is not used: it converts to `f64` degrees (the core wants
//! the raw ratio) and blocks 64.5 ms for a one-shot conversion.
//!
//! Source for the registers and bits (Maxim Integrated, *MAX31865
//! RTD-to-Digital Converter* data sheet; revision not checked here, so
//! **from memory**, and agreeing with the register definitions of
//! `embedded-devices`, which cite the same data sheet):
//!
//! ```text
//! read  write  register
//! 0x00  0x80   configuration: [7] VBIAS, [6] auto conversion, [5] 1-shot,
//!              [4] 3-wire, [3:2] fault detection cycle, [1] fault clear, [0] 50 Hz
//! 0x01-02      RTD ratio, 15 bits in [15:1], [0] fault
//! 0x03-04 0x83 high fault threshold       0x05-06 0x85 low fault threshold
//! 0x07         fault status: [7] RTD high, [6] RTD low, [5] REFIN- > 0.85 VBIAS,
//!              [4] REFIN- < 0.85 VBIAS (FORCE- open), [3] RTDIN- < 0.85 VBIAS, [2] over/under voltage
//! ```
//! `embedded-devices` reads a register with one full-duplex transfer
//! (address, then zeros while the data come back) and writes it with one
//! write (address | 0x80, data): the transactions the tests list.
//!
//! Mode used: VBIAS on and automatic conversion (50 Hz filter), so the
//! newest result can be read at any time without waiting; the cost is the
//! sensor's self-heating from the bias current (for Pt100 and a 430 ohm
//! reference about 4 mA, 1.6 mW; the probe's self-heating coefficient
//! decides what that means: bring-up checklist).

use embedded_devices::devices::analog_devices::max31865::registers::{
    Configuration, ConversionMode, FaultStatus, FaultThresholdHigh, FaultThresholdLow, FilterMode,
    Resistance, WiringMode,
};
use embedded_devices::devices::analog_devices::max31865::MAX31865Sync;
use embedded_hal::delay::DelayNs;
use embedded_hal::spi::SpiDevice;

/// Bits of the RTD ratio (the 16-bit register's top 15 bits).
pub const RATIO_BITS: u32 = 15;

/// How the RTD is wired (configuration bit 4).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Wiring {
    /// Two or four wires (bit 4 = 0).
    TwoOrFour,
    /// Three wires (bit 4 = 1).
    Three,
}

/// Fault status register bits (see the module doc's map).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Faults(pub u8);

impl Faults {
    /// Ratio at or above the high threshold (open RTD, bit 7).
    pub const RTD_HIGH: u8 = 0x80;
    /// Ratio at or below the low threshold (shorted RTD, bit 6).
    pub const RTD_LOW: u8 = 0x40;
    /// Over- or undervoltage on a protected input (bit 2).
    pub const OVERVOLTAGE: u8 = 0x04;
}

/// What the MAX31865 driver can fail with.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum Error<E> {
    /// The SPI bus failed.
    Bus(E),
    /// The chip flags a fault (status register given); the status has been cleared.
    Fault(Faults),
    /// The register layer refused a value (not expected: its codec cannot fail).
    Codec,
}

impl<E: core::fmt::Debug> core::fmt::Display for Error<E> {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        match self {
            Error::Bus(e) => write!(f, "MAX31865: SPI bus error {e:?}"),
            Error::Fault(s) => write!(f, "MAX31865: fault status 0x{:02X}", s.0),
            Error::Codec => write!(f, "MAX31865: register codec error"),
        }
    }
}

impl<E: core::fmt::Debug> core::error::Error for Error<E> {}

type Inner<SPI, D> = MAX31865Sync<D, embedded_interfaces::spi::SpiDeviceSync<SPI>>;

fn map<E>(e: embedded_interfaces::TransportError<(), E>) -> Error<E> {
    match e {
        embedded_interfaces::TransportError::Bus(b) => Error::Bus(b),
        _ => Error::Codec,
    }
}

/// The MAX31865 on an SPI device (SPI mode 1 or 3).
pub struct Max31865<SPI: SpiDevice, D: DelayNs> {
    dev: Inner<SPI, D>,
    wiring: Wiring,
}

impl<SPI: SpiDevice, D: DelayNs> core::fmt::Debug for Max31865<SPI, D> {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        f.debug_struct("Max31865")
            .field("wiring", &self.wiring)
            .finish_non_exhaustive()
    }
}

impl<SPI: SpiDevice, D: DelayNs> Max31865<SPI, D> {
    /// The chip on `spi`; `delay` is kept by the register layer.
    /// `ref_over_nominal` is the reference resistor over the RTD's 0 C
    /// resistance (430 / 100 for a Pt100 on a 430 ohm reference).
    pub fn new(spi: SPI, delay: D, wiring: Wiring, ref_over_nominal: f64) -> Self {
        Self {
            dev: MAX31865Sync::new_spi(delay, spi, ref_over_nominal),
            wiring,
        }
    }

    fn config(&self) -> Configuration {
        Configuration::default()
            .with_enable_bias_voltage(true)
            .with_conversion_mode(ConversionMode::Automatic)
            .with_wiring_mode(match self.wiring {
                Wiring::TwoOrFour => WiringMode::TwoOrFourWire,
                Wiring::Three => WiringMode::ThreeWire,
            })
            .with_filter_mode(FilterMode::F_50Hz)
    }

    /// Sets it up: fault thresholds `low..=high` (15-bit ratios: a reading
    /// outside them is a fault, e.g. a broken or shorted RTD), then VBIAS
    /// on, automatic conversion, wiring, 50 Hz filter, and any old fault
    /// status cleared.
    ///
    /// # Errors
    /// [`Error::Bus`].
    pub fn init(&mut self, low: u16, high: u16) -> Result<(), Error<SPI::Error>> {
        self.dev
            .write_register(FaultThresholdHigh::default().with_resistance_ratio(high & 0x7FFF))
            .map_err(map)?;
        self.dev
            .write_register(FaultThresholdLow::default().with_resistance_ratio(low & 0x7FFF))
            .map_err(map)?;
        self.dev
            .write_register(self.config().with_clear_fault_status(true))
            .map_err(map)
    }

    /// The newest conversion: the RTD over the reference resistor as a
    /// 15-bit ratio (`R_rtd = ratio / 2^15 * R_ref`).
    ///
    /// On a fault bit the fault status is read, cleared (configuration
    /// written with the clear bit), and returned.
    ///
    /// # Errors
    /// [`Error::Fault`], [`Error::Bus`].
    pub fn read_ratio(&mut self) -> Result<u16, Error<SPI::Error>> {
        let r = self.dev.read_register::<Resistance>().map_err(map)?;
        if !r.read_fault() {
            return Ok(r.read_resistance_ratio());
        }
        let s = self.dev.read_register::<FaultStatus>().map_err(map)?;
        let bits = u8::from(s.read_high_threshold()) << 7
            | u8::from(s.read_low_threshold()) << 6
            | u8::from(s.read_v_refin_minus_exceeds_85_percent_of_v_bias()) << 5
            | u8::from(s.read_v_refin_minus_below_85_percent_of_v_bias_with_force_minus_open())
                << 4
            | u8::from(s.read_v_rtdin_minus_below_85_percent_of_v_bias_with_force_minus_open())
                << 3
            | u8::from(s.read_over_or_undervoltage()) << 2;
        self.dev
            .write_register(self.config().with_clear_fault_status(true))
            .map_err(map)?;
        Err(Error::Fault(Faults(bits)))
    }
}

/// The SPI transactions, for the tests.
#[cfg(test)]
pub(crate) mod expect {
    use embedded_hal_mock::eh1::spi::Transaction as T;

    /// Write of register `addr` (the data sheet's write address is `addr | 0x80`).
    pub fn write(addr: u8, data: &[u8]) -> Vec<T<u8>> {
        let mut b = vec![0x80 | addr];
        b.extend_from_slice(data);
        vec![
            T::transaction_start(),
            T::write_vec(b),
            T::transaction_end(),
        ]
    }

    /// Read of register `addr` returning `data` (full duplex: address out,
    /// zeros out while the data come back; the first byte back is ignored).
    pub fn read(addr: u8, data: &[u8]) -> Vec<T<u8>> {
        let mut out = vec![addr];
        out.extend(std::iter::repeat_n(0, data.len()));
        let mut back = vec![0];
        back.extend_from_slice(data);
        vec![
            T::transaction_start(),
            T::transfer_in_place(out, back),
            T::transaction_end(),
        ]
    }

    /// Configuration byte in use: VBIAS, auto, 4-wire, 50 Hz = 0b1100_0001.
    pub const CONFIG_4WIRE: u8 = 0xC1;

    /// `init(low, high)` for a 4-wire RTD.
    pub fn init(low: u16, high: u16) -> Vec<T<u8>> {
        let mut v = write(0x03, &(high << 1).to_be_bytes());
        v.extend(write(0x05, &(low << 1).to_be_bytes()));
        v.extend(write(0x00, &[CONFIG_4WIRE | 0x02]));
        v
    }

    /// A good reading of `ratio`.
    pub fn ratio(ratio: u16) -> Vec<T<u8>> {
        read(0x01, &(ratio << 1).to_be_bytes())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::mock::{FailingSpi, NoDelay};
    use embedded_hal_mock::eh1::spi::Mock as Spi;

    #[test]
    fn init_writes_thresholds_then_configuration() {
        // Thresholds as 15-bit ratios in [15:1] (0x83/0x84 and 0x85/0x86,
        // MSB first); configuration 0xC1 | 0x02: VBIAS [7], auto [6],
        // 4-wire [4] = 0, fault clear [1], 50 Hz [0].
        let mut spi = Spi::new(&expect::init(0x0800, 0x6000));
        let mut rtd = Max31865::new(spi.clone(), NoDelay, Wiring::TwoOrFour, 4.3);
        rtd.init(0x0800, 0x6000).unwrap();
        spi.done();
        let mut want = expect::write(0x03, &[0xFF, 0xFE]);
        want.extend(expect::write(0x05, &[0x00, 0x00]));
        want.extend(expect::write(0x00, &[0xD3]));
        let mut spi = Spi::new(&want);
        let mut rtd = Max31865::new(spi.clone(), NoDelay, Wiring::Three, 4.3);
        rtd.init(0, 0x7FFF).unwrap();
        spi.done();
    }

    #[test]
    fn reads_the_15_bit_ratio() {
        // A Pt100 at 0 C on 430 ohm: 100/430 * 2^15 = 7620.5 -> 7620 (0x1DC4),
        // sent as 0x3B88 (the ratio in [15:1], fault bit 0 clear).
        let mut spi = Spi::new(&expect::read(0x01, &[0x3B, 0x88]));
        let mut rtd = Max31865::new(spi.clone(), NoDelay, Wiring::TwoOrFour, 4.3);
        assert_eq!(rtd.read_ratio(), Ok(7620));
        spi.done();
    }

    #[test]
    fn a_fault_is_read_cleared_and_reported() {
        // An open RTD: ratio at full scale with the fault bit, status RTD
        // high (0x80); the driver clears it with the configuration's bit 1.
        let mut want = expect::read(0x01, &[0xFF, 0xFF]);
        want.extend(expect::read(0x07, &[0x80]));
        want.extend(expect::write(0x00, &[expect::CONFIG_4WIRE | 0x02]));
        let mut spi = Spi::new(&want);
        let mut rtd = Max31865::new(spi.clone(), NoDelay, Wiring::TwoOrFour, 4.3);
        assert_eq!(
            rtd.read_ratio(),
            Err(Error::Fault(Faults(Faults::RTD_HIGH)))
        );
        spi.done();
    }

    #[test]
    fn bus_errors_surface() {
        let mut rtd = Max31865::new(FailingSpi::after(0), NoDelay, Wiring::TwoOrFour, 4.3);
        assert_eq!(
            rtd.read_ratio(),
            Err(Error::Bus(embedded_hal::spi::ErrorKind::Other))
        );
        let mut rtd = Max31865::new(FailingSpi::after(1), NoDelay, Wiring::TwoOrFour, 4.3);
        assert_eq!(
            rtd.init(0, 0x7FFF),
            Err(Error::Bus(embedded_hal::spi::ErrorKind::Other))
        );
    }
}
