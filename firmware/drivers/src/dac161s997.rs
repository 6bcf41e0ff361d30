//! DAC161S997: the 4-20 mA loop, a 16-bit SPI DAC that drives the loop
//! current itself (2-wire, loop-powered).
//!
//! Why this part: it sets the loop current directly from a 16-bit code
//! (about 0.37 uA a step), reports a loop it cannot drive (open loop or
//! too little supply) in its STATUS register, and has its own error
//! currents in the NAMUR NE 43 failure bands, so a board fault shows on the
//! loop even when the MCU does not run.
//!
//! Source: Texas Instruments, *DAC161S997 16-bit SPI Programmable DAC for
//! 4-20 mA Loops* data sheet (SNAS621). Its revision was not available
//! while this was written: every register, bit and value below is **from
//! memory** and on the board's bring-up checklist.
//!
//! ```text
//! frame: 24 bits, MSB first, SPI mode 0: [7] read, [6:0] address | data[15:0]
//! 0x02 NOP        0x04 DACCODE   I = 24 mA * code / 2^16
//! 0x06 ERR_LOW    0x07 ERR_HIGH  error currents (reset 0x2400 = 3.375 mA, 0xE800 = 21.75 mA)
//! 0x08 RESET      write 0xC33C   0x09 STATUS [7:5] DAC_RES = 111, [3] FERR_STS,
//!                                   [2] SPI_TIMEOUT_ERR, [1] LOOP_STS (latched), [0] CURR_LOOP_STS
//! ```
//! A read sends the address with bit 7 set; the register comes out on SDO
//! during the next frame (a NOP).

use embedded_hal::spi::SpiDevice;

/// NOP register (from memory).
pub const REG_NOP: u8 = 0x02;
/// DAC code register (from memory).
pub const REG_DACCODE: u8 = 0x04;
/// Low error current register (from memory).
pub const REG_ERR_LOW: u8 = 0x06;
/// High error current register (from memory).
pub const REG_ERR_HIGH: u8 = 0x07;
/// Software reset register (from memory).
pub const REG_RESET: u8 = 0x08;
/// Status register (from memory).
pub const REG_STATUS: u8 = 0x09;
/// Read bit of the command byte (from memory).
pub const READ: u8 = 0x80;
/// Value that resets the chip when written to [`REG_RESET`] (from memory).
pub const RESET_KEY: u16 = 0xC33C;
/// Error current low, 3.375 mA (NE 43: at most 3.6 mA; reset value, from memory).
pub const ERR_LOW_CODE: u16 = 0x2400;
/// Error current high, 21.75 mA (NE 43: at least 21 mA; reset value, from memory).
pub const ERR_HIGH_CODE: u16 = 0xE800;
/// STATUS[7:5]: DAC resolution, 111 on this part (from memory).
pub const STATUS_DAC_RES: u16 = 0b111 << 5;
/// STATUS[3]: a frame of the wrong length was received (from memory).
pub const STATUS_FRAME_ERR: u16 = 1 << 3;
/// STATUS[1:0]: loop error, latched and present (from memory).
pub const STATUS_LOOP_ERR: u16 = 0b11;
/// Full scale of the DAC, mA: `I = FULL_SCALE_MA * code / 2^16` (from memory).
pub const FULL_SCALE_MA: f32 = 24.0;

/// Code for `ma` milliamps, rounded, clamped to the DAC's range; `None` for NaN.
pub fn code_for_ma(ma: f32) -> Option<u16> {
    if ma.is_nan() {
        return None;
    }
    let c = ma / FULL_SCALE_MA * 65536.0 + 0.5;
    Some(if c <= 0.0 {
        0
    } else if c >= 65535.0 {
        u16::MAX
    } else {
        c as u16
    })
}

/// What the DAC161S997 driver can fail with.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum Error<E> {
    /// The SPI bus failed.
    Bus(E),
    /// STATUS does not identify the chip (no chip, or SDO not connected): the word read.
    NotFound(u16),
    /// The loop cannot carry the current (open loop, supply too low): STATUS.
    LoopFault(u16),
    /// The chip received a frame of the wrong length: STATUS.
    Frame(u16),
    /// The current asked for is not a number.
    NotANumber,
}

impl<E: core::fmt::Debug> core::fmt::Display for Error<E> {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        match self {
            Error::Bus(e) => write!(f, "DAC161S997: SPI bus error {e:?}"),
            Error::NotFound(s) => write!(f, "DAC161S997: STATUS reads 0x{s:04X}: no chip"),
            Error::LoopFault(s) => write!(f, "DAC161S997: loop error (STATUS 0x{s:04X})"),
            Error::Frame(s) => write!(f, "DAC161S997: frame error (STATUS 0x{s:04X})"),
            Error::NotANumber => write!(f, "DAC161S997: current is NaN"),
        }
    }
}

impl<E: core::fmt::Debug> core::error::Error for Error<E> {}

/// The DAC161S997 on an SPI device (mode 0).
#[derive(Debug)]
pub struct Dac161s997<SPI> {
    spi: SPI,
}

impl<SPI: SpiDevice> Dac161s997<SPI> {
    /// The chip, not yet touched.
    pub fn new(spi: SPI) -> Self {
        Self { spi }
    }

    /// Gives the bus back.
    pub fn release(self) -> SPI {
        self.spi
    }

    /// Writes a 16-bit register.
    ///
    /// # Errors
    /// [`Error::Bus`].
    pub fn write(&mut self, reg: u8, value: u16) -> Result<(), Error<SPI::Error>> {
        let [hi, lo] = value.to_be_bytes();
        self.spi.write(&[reg & 0x7F, hi, lo]).map_err(Error::Bus)
    }

    /// Reads a 16-bit register: the read frame, then a NOP frame that
    /// clocks the value out.
    ///
    /// # Errors
    /// [`Error::Bus`].
    pub fn read(&mut self, reg: u8) -> Result<u16, Error<SPI::Error>> {
        self.spi
            .write(&[READ | (reg & 0x7F), 0, 0])
            .map_err(Error::Bus)?;
        let mut buf = [REG_NOP, 0, 0];
        self.spi.transfer_in_place(&mut buf).map_err(Error::Bus)?;
        let [_, hi, lo] = buf;
        Ok(u16::from_be_bytes([hi, lo]))
    }

    /// Resets the chip, sets the error currents, and checks that STATUS
    /// identifies it.
    ///
    /// # Errors
    /// [`Error::NotFound`], [`Error::Bus`].
    pub fn init(&mut self) -> Result<(), Error<SPI::Error>> {
        self.write(REG_RESET, RESET_KEY)?;
        self.write(REG_ERR_LOW, ERR_LOW_CODE)?;
        self.write(REG_ERR_HIGH, ERR_HIGH_CODE)?;
        let s = self.read(REG_STATUS)?;
        if s & STATUS_DAC_RES != STATUS_DAC_RES {
            return Err(Error::NotFound(s));
        }
        Ok(())
    }

    /// Drives `ma` milliamps (rounded to the DAC's step, clamped to
    /// 0..24 mA), then reads STATUS.
    ///
    /// # Errors
    /// [`Error::LoopFault`] when the loop cannot carry it, [`Error::Frame`],
    /// [`Error::NotFound`] (STATUS no longer identifies the chip),
    /// [`Error::NotANumber`], [`Error::Bus`].
    pub fn set_ma(&mut self, ma: f32) -> Result<(), Error<SPI::Error>> {
        let code = code_for_ma(ma).ok_or(Error::NotANumber)?;
        self.write(REG_DACCODE, code)?;
        let s = self.read(REG_STATUS)?;
        if s & STATUS_DAC_RES != STATUS_DAC_RES {
            Err(Error::NotFound(s))
        } else if s & STATUS_LOOP_ERR != 0 {
            Err(Error::LoopFault(s))
        } else if s & STATUS_FRAME_ERR != 0 {
            Err(Error::Frame(s))
        } else {
            Ok(())
        }
    }
}

/// The SPI transactions, for the tests.
#[cfg(test)]
pub(crate) mod expect {
    use embedded_hal_mock::eh1::spi::Transaction as T;

    /// One register write.
    pub fn write(reg: u8, value: u16) -> Vec<T<u8>> {
        let [hi, lo] = value.to_be_bytes();
        vec![
            T::transaction_start(),
            T::write_vec(vec![reg, hi, lo]),
            T::transaction_end(),
        ]
    }

    /// A register read answered with `value` in the NOP frame.
    pub fn read(reg: u8, value: u16) -> Vec<T<u8>> {
        let [hi, lo] = value.to_be_bytes();
        vec![
            T::transaction_start(),
            T::write_vec(vec![0x80 | reg, 0, 0]),
            T::transaction_end(),
            T::transaction_start(),
            T::transfer_in_place(vec![0x02, 0, 0], vec![0, hi, lo]),
            T::transaction_end(),
        ]
    }

    /// STATUS of a healthy chip: DAC_RES = 111.
    pub const STATUS_OK: u16 = 0x00E0;

    /// `set_ma` writing `code`, STATUS healthy.
    pub fn set_code(code: u16) -> Vec<T<u8>> {
        let mut v = write(0x04, code);
        v.extend(read(0x09, STATUS_OK));
        v
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::mock::FailingSpi;
    use embedded_hal_mock::eh1::spi::Mock as Spi;

    #[test]
    fn codes_for_the_ne43_levels() {
        // I = 24 mA code / 2^16: 4 mA -> 10922.67 -> 10923 (0x2AAB),
        // 20 mA -> 54613.33 -> 54613 (0xD555), 3.5 mA -> 9557.33 -> 9557,
        // 21.5 mA -> 58709.33 -> 58709. Computed by hand from the formula.
        assert_eq!(code_for_ma(4.0), Some(0x2AAB));
        assert_eq!(code_for_ma(20.0), Some(0xD555));
        assert_eq!(code_for_ma(3.5), Some(9557));
        assert_eq!(code_for_ma(21.5), Some(58709));
        assert_eq!(code_for_ma(-1.0), Some(0));
        assert_eq!(code_for_ma(30.0), Some(u16::MAX));
        assert_eq!(code_for_ma(f32::NAN), None);
        // The error currents: 0x2400 -> 3.375 mA, 0xE800 -> 21.75 mA (NE 43 bands).
        assert!(f32::from(ERR_LOW_CODE) * FULL_SCALE_MA / 65536.0 <= 3.6);
        assert!(f32::from(ERR_HIGH_CODE) * FULL_SCALE_MA / 65536.0 >= 21.0);
    }

    #[test]
    fn init_resets_sets_error_currents_and_identifies_the_chip() {
        let mut want = expect::write(0x08, 0xC33C);
        want.extend(expect::write(0x06, 0x2400));
        want.extend(expect::write(0x07, 0xE800));
        want.extend(expect::read(0x09, expect::STATUS_OK));
        let mut spi = Spi::new(&want);
        let mut dac = Dac161s997::new(spi.clone());
        dac.init().unwrap();
        spi.done();
    }

    #[test]
    fn a_missing_chip_is_found_out() {
        let mut want = expect::write(0x08, 0xC33C);
        want.extend(expect::write(0x06, 0x2400));
        want.extend(expect::write(0x07, 0xE800));
        want.extend(expect::read(0x09, 0x0000));
        let mut spi = Spi::new(&want);
        let mut dac = Dac161s997::new(spi.clone());
        assert_eq!(dac.init(), Err(Error::NotFound(0)));
        spi.done();
    }

    #[test]
    fn current_is_written_and_loop_faults_reported() {
        let mut want = expect::set_code(0x2AAB);
        want.extend(expect::write(0x04, 0xD555));
        want.extend(expect::read(0x09, 0x00E3)); // loop error, latched and present
        want.extend(expect::write(0x04, 0xD555));
        want.extend(expect::read(0x09, 0x00E8)); // frame error
        let mut spi = Spi::new(&want);
        let mut dac = Dac161s997::new(spi.clone());
        dac.set_ma(4.0).unwrap();
        assert_eq!(dac.set_ma(20.0), Err(Error::LoopFault(0x00E3)));
        assert_eq!(dac.set_ma(20.0), Err(Error::Frame(0x00E8)));
        assert_eq!(dac.set_ma(f32::NAN), Err(Error::NotANumber));
        spi.done();
    }

    #[test]
    fn bus_errors_surface() {
        let mut dac = Dac161s997::new(FailingSpi::after(0));
        assert_eq!(
            dac.set_ma(4.0),
            Err(Error::Bus(embedded_hal::spi::ErrorKind::Other))
        );
        let mut dac = Dac161s997::new(FailingSpi::after(1));
        assert_eq!(
            dac.set_ma(4.0),
            Err(Error::Bus(embedded_hal::spi::ErrorKind::Other))
        );
    }
}
