//! ADS131M02: two simultaneously sampled 24-bit delta-sigma channels, the
//! sensor IF and the reference IF.
//!
//! ## Why this part
//! - Both channels are sampled at the same instant by one modulator clock,
//!   so the sensor/reference ratio sees no skew between them (a
//!   multiplexed ADC would turn the skew into a phase error of the ratio).
//! - Its modulator clock is an external input (CLKIN): the board drives it
//!   from the AD9959's fourth channel, so the sample rate is a fixed
//!   rational fraction of the DDS system clock, exactly as coherent with
//!   the IF as the demodulator wants (`fringe_firmware::hal`, sampling
//!   contract) without a second oscillator.
//! - 32 kSPS (OSR 128 at 8.192 MHz) is 8 samples per cycle of a 4 kHz IF;
//!   24-bit words leave headroom above the 16-bit codes the core takes.
//!
//! Source: Texas Instruments, *ADS131M02 2-Channel, Simultaneously-Sampling,
//! 24-Bit, Delta-Sigma ADC* data sheet. The revision was not available
//! while this was written: unless a line names another source, the values
//! below are **from memory** of that data sheet and are on the board's
//! bring-up checklist. Confirmed elsewhere: the CLOCK register at 0x03
//! holds the OSR, and the default rate is 4 kSPS at 8.192 MHz (TI E2E
//! forum thread 1396388, "ADS131M02: Writing register", which also shows a
//! WREG of CLOCK as `0110 0001 1000 0000`).
//!
//! ## Frames (24-bit words, MSB first, one CS-low transaction each)
//! ```text
//! in : command | data (WREG) | 0 ...                  (4 words)
//! out: response | CH0 | CH1 | CRC-16 (CCITT, init FFFF) (4 words)
//! ```
//! The response word answers the command of the previous frame: the STATUS
//! register for NULL, `FF22` after RESET, `010a aaaa ammm mmmm` after WREG,
//! the register's value after a one-register RREG.

use crc::{Crc, CRC_16_IBM_3740};
use embedded_hal::delay::DelayNs;
use embedded_hal::digital::InputPin;
use embedded_hal::spi::SpiDevice;

/// Bytes per word at the reset word length (24 bits; from memory).
pub const WORD: usize = 3;
/// Bytes per frame: response, CH0, CH1, CRC.
pub const FRAME: usize = 4 * WORD;

/// NULL command: reads the STATUS register and the conversion data (from memory).
pub const CMD_NULL: u16 = 0x0000;
/// RESET command (from memory).
pub const CMD_RESET: u16 = 0x0011;
/// Response to RESET on the ADS131M02: `FF2x`, x the channel count (from memory).
pub const RESET_ACK: u16 = 0xFF22;
/// WREG opcode `011a aaaa annn nnnn` (address a, count-1 n; confirmed by
/// the E2E thread named in the module doc).
pub const CMD_WREG: u16 = 0x6000;
/// RREG opcode `101a aaaa annn nnnn` (from memory).
pub const CMD_RREG: u16 = 0xA000;
/// Acknowledgement of a WREG: `010a aaaa ammm mmmm` (from memory).
pub const WREG_ACK: u16 = 0x4000;

/// MODE register address (from memory).
pub const REG_MODE: u8 = 0x02;
/// CLOCK register address (E2E thread of the module doc).
pub const REG_CLOCK: u8 = 0x03;

/// MODE value written: RESET flag [10] cleared, WLENGTH [9:8] = 01
/// (24 bit), TIMEOUT [4] = 1 (SPI timeout on), DRDY_SEL [3:2] = 00 (the
/// most lagging channel), DRDY active low. The reset value is 0x0510 (from memory).
pub const MODE_RUN: u16 = 0x0110;
/// CLOCK[9]: channel 1 enable (from memory).
pub const CLOCK_CH1_EN: u16 = 1 << 9;
/// CLOCK[8]: channel 0 enable (from memory).
pub const CLOCK_CH0_EN: u16 = 1 << 8;
/// CLOCK[4:2]: oversampling ratio (from memory; the field the E2E thread writes).
pub const CLOCK_OSR_SHIFT: u16 = 2;
/// CLOCK[1:0] = 10: high-resolution power mode (the reset value, from memory).
pub const CLOCK_PWR_HIGH_RES: u16 = 0b10;

/// STATUS[10]: the device has been reset since MODE's RESET flag was cleared (from memory).
pub const STATUS_RESET: u16 = 1 << 10;
/// STATUS[1:0]: new data on channel 1 and channel 0 (from memory).
pub const STATUS_DRDY_BOTH: u16 = 0b11;

/// Wait after RESET before the next frame, microseconds (t_REGACQ, 5 us; from memory).
pub const RESET_WAIT_US: u32 = 5;
/// DRDY polls before [`Error::Timeout`], one microsecond apart: 2 ms, eight
/// periods at the slowest rate this driver sets up and 64 at 32 kSPS.
pub const DRDY_POLLS: u32 = 2000;

/// The frame CRC: CRC-16-CCITT, polynomial 0x1021, initial value 0xFFFF,
/// no reflection (from memory; the `crc` crate's CRC-16/IBM-3740).
pub const FRAME_CRC: Crc<u16> = Crc::<u16>::new(&CRC_16_IBM_3740);

/// Oversampling ratio: output rate = f_CLKIN / 2 / OSR (from memory).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[repr(u8)]
pub enum Osr {
    /// 128 (32 kSPS at 8.192 MHz).
    X128 = 0,
    /// 256.
    X256 = 1,
    /// 512.
    X512 = 2,
    /// 1024 (the reset value, 4 kSPS at 8.192 MHz).
    X1024 = 3,
}

impl Osr {
    /// The ratio.
    pub const fn ratio(self) -> u32 {
        128 << (self as u32)
    }
    /// CLOCK register value: both channels on, this OSR, high resolution.
    pub const fn clock_register(self) -> u16 {
        CLOCK_CH1_EN | CLOCK_CH0_EN | ((self as u16) << CLOCK_OSR_SHIFT) | CLOCK_PWR_HIGH_RES
    }
}

/// One conversion of both channels.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Sample {
    /// STATUS word sent with it.
    pub status: u16,
    /// Channel 0, 24-bit two's complement, sign-extended.
    pub ch0: i32,
    /// Channel 1, likewise.
    pub ch1: i32,
}

/// What the ADS131M02 driver can fail with.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum Error<E> {
    /// The SPI bus failed.
    Bus(E),
    /// DRDY could not be read.
    Pin,
    /// DRDY did not fall within [`DRDY_POLLS`] microseconds (no CLKIN?).
    Timeout,
    /// A frame's CRC does not match its content.
    Crc {
        /// CRC received.
        got: u16,
        /// CRC of the bytes received.
        computed: u16,
    },
    /// The device did not answer RESET with [`RESET_ACK`].
    NoReset(u16),
    /// A register write was not acknowledged.
    NoAck {
        /// Register address.
        register: u8,
        /// Response word received.
        response: u16,
    },
    /// A register reads back other than written.
    Readback {
        /// Register address.
        register: u8,
        /// Value read.
        read: u16,
    },
    /// A sample frame without new data on both channels (status word given).
    Stale(u16),
    /// The device reset itself (brown-out?) since it was set up: needs `init`.
    Reset,
}

impl<E: core::fmt::Debug> core::fmt::Display for Error<E> {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        match self {
            Error::Bus(e) => write!(f, "ADS131M02: SPI bus error {e:?}"),
            Error::Pin => write!(f, "ADS131M02: DRDY pin cannot be read"),
            Error::Timeout => write!(f, "ADS131M02: DRDY did not fall within {DRDY_POLLS} us"),
            Error::Crc { got, computed } => write!(
                f,
                "ADS131M02: frame CRC 0x{got:04X}, its content gives 0x{computed:04X}"
            ),
            Error::NoReset(r) => write!(
                f,
                "ADS131M02: RESET answered 0x{r:04X}, not 0x{RESET_ACK:04X}"
            ),
            Error::NoAck { register, response } => write!(
                f,
                "ADS131M02: write of register 0x{register:02X} answered 0x{response:04X}"
            ),
            Error::Readback { register, read } => {
                write!(f, "ADS131M02: register 0x{register:02X} reads 0x{read:04X}")
            }
            Error::Stale(s) => write!(f, "ADS131M02: no new data (status 0x{s:04X})"),
            Error::Reset => write!(f, "ADS131M02: the device reset itself"),
        }
    }
}

impl<E: core::fmt::Debug> core::error::Error for Error<E> {}

fn word16(frame: &[u8; FRAME], i: usize) -> u16 {
    let hi = frame.get(i * WORD).copied().unwrap_or(0);
    let lo = frame.get(i * WORD + 1).copied().unwrap_or(0);
    u16::from_be_bytes([hi, lo])
}

fn word24(frame: &[u8; FRAME], i: usize) -> i32 {
    let b = |k: usize| frame.get(i * WORD + k).copied().unwrap_or(0);
    // Sign-extend from bit 23 by placing the word in the top of an i32.
    i32::from_be_bytes([b(0), b(1), b(2), 0]) >> 8
}

/// The ADS131M02 on an SPI device (CPOL 0, CPHA 1; from memory) with its DRDY pin.
#[derive(Debug)]
pub struct Ads131m02<SPI, DRDY> {
    spi: SPI,
    drdy: DRDY,
}

impl<SPI: SpiDevice, DRDY: InputPin> Ads131m02<SPI, DRDY> {
    /// The chip, not yet touched.
    pub fn new(spi: SPI, drdy: DRDY) -> Self {
        Self { spi, drdy }
    }

    /// Gives the bus and pin back.
    pub fn release(self) -> (SPI, DRDY) {
        (self.spi, self.drdy)
    }

    /// One frame: sends `cmd` (and `data` as the second word), returns what came back.
    ///
    /// # Errors
    /// [`Error::Bus`]; [`Error::Crc`] when the output CRC does not match.
    pub fn frame(&mut self, cmd: u16, data: Option<u16>) -> Result<[u8; FRAME], Error<SPI::Error>> {
        let mut buf = [0u8; FRAME];
        let [c0, c1] = cmd.to_be_bytes();
        buf[0] = c0;
        buf[1] = c1;
        if let Some(d) = data {
            let [d0, d1] = d.to_be_bytes();
            buf[WORD] = d0;
            buf[WORD + 1] = d1;
        }
        self.spi.transfer_in_place(&mut buf).map_err(Error::Bus)?;
        let got = word16(&buf, 3);
        let computed = FRAME_CRC.checksum(buf.get(..3 * WORD).unwrap_or(&[]));
        if got != computed {
            return Err(Error::Crc { got, computed });
        }
        Ok(buf)
    }

    /// Resets the device and sets it up: RESET, its acknowledgement,
    /// MODE (reset flag cleared, 24-bit words), CLOCK (both channels,
    /// `osr`, high resolution), and CLOCK read back.
    ///
    /// # Errors
    /// [`Error::NoReset`], [`Error::NoAck`], [`Error::Readback`], and those of [`Self::frame`].
    pub fn init<D: DelayNs>(&mut self, delay: &mut D, osr: Osr) -> Result<(), Error<SPI::Error>> {
        self.frame(CMD_RESET, None)?;
        delay.delay_us(RESET_WAIT_US);
        let r = word16(&self.frame(CMD_NULL, None)?, 0);
        if r != RESET_ACK {
            return Err(Error::NoReset(r));
        }
        self.write_register(REG_MODE, MODE_RUN)?;
        let clock = osr.clock_register();
        self.write_register(REG_CLOCK, clock)?;
        let read = self.read_register(REG_CLOCK)?;
        if read != clock {
            return Err(Error::Readback {
                register: REG_CLOCK,
                read,
            });
        }
        Ok(())
    }

    /// Writes one register and checks the acknowledgement in the next frame.
    ///
    /// # Errors
    /// [`Error::NoAck`], and those of [`Self::frame`].
    pub fn write_register(&mut self, reg: u8, value: u16) -> Result<(), Error<SPI::Error>> {
        let addr = u16::from(reg & 0x3F) << 7;
        self.frame(CMD_WREG | addr, Some(value))?;
        let response = word16(&self.frame(CMD_NULL, None)?, 0);
        if response != WREG_ACK | addr {
            return Err(Error::NoAck {
                register: reg,
                response,
            });
        }
        Ok(())
    }

    /// Reads one register (its value is the response word of the next frame).
    ///
    /// # Errors
    /// Those of [`Self::frame`].
    pub fn read_register(&mut self, reg: u8) -> Result<u16, Error<SPI::Error>> {
        self.frame(CMD_RREG | (u16::from(reg & 0x3F) << 7), None)?;
        Ok(word16(&self.frame(CMD_NULL, None)?, 0))
    }

    /// Waits for DRDY to fall (new data), at most [`DRDY_POLLS`] microseconds.
    ///
    /// # Errors
    /// [`Error::Timeout`], [`Error::Pin`].
    pub fn wait_ready<D: DelayNs>(&mut self, delay: &mut D) -> Result<(), Error<SPI::Error>> {
        for _ in 0..DRDY_POLLS {
            if self.drdy.is_low().map_err(|_| Error::Pin)? {
                return Ok(());
            }
            delay.delay_us(1);
        }
        Err(Error::Timeout)
    }

    /// The next conversion: waits for DRDY, reads the frame, checks that
    /// both channels carry new data and that the device has not reset.
    ///
    /// # Errors
    /// [`Error::Reset`], [`Error::Stale`], and those of [`Self::wait_ready`] and [`Self::frame`].
    pub fn next_sample<D: DelayNs>(&mut self, delay: &mut D) -> Result<Sample, Error<SPI::Error>> {
        self.wait_ready(delay)?;
        let f = self.frame(CMD_NULL, None)?;
        let status = word16(&f, 0);
        if status & STATUS_RESET != 0 {
            return Err(Error::Reset);
        }
        if status & STATUS_DRDY_BOTH != STATUS_DRDY_BOTH {
            return Err(Error::Stale(status));
        }
        Ok(Sample {
            status,
            ch0: word24(&f, 1),
            ch1: word24(&f, 2),
        })
    }
}

/// The SPI transactions the data sheet prescribes, for the tests.
#[cfg(test)]
pub(crate) mod expect {
    use super::*;
    use embedded_hal_mock::eh1::spi::Transaction as T;

    /// The bytes of a frame the device sends: response, two 24-bit channel
    /// words, and the CRC over them.
    pub fn out_frame(response: u16, ch0: i32, ch1: i32) -> Vec<u8> {
        let mut b = Vec::with_capacity(FRAME);
        b.extend_from_slice(&response.to_be_bytes());
        b.push(0);
        b.extend_from_slice(&ch0.to_be_bytes()[1..]);
        b.extend_from_slice(&ch1.to_be_bytes()[1..]);
        let crc = FRAME_CRC.checksum(&b);
        b.extend_from_slice(&crc.to_be_bytes());
        b.push(0);
        b
    }

    /// The bytes the host sends: command word, optional data word, zeros.
    pub fn in_frame(cmd: u16, data: Option<u16>) -> Vec<u8> {
        let mut b = vec![0u8; FRAME];
        b[..2].copy_from_slice(&cmd.to_be_bytes());
        if let Some(d) = data {
            b[3..5].copy_from_slice(&d.to_be_bytes());
        }
        b
    }

    /// One full-duplex frame.
    pub fn frame(cmd: u16, data: Option<u16>, response: u16, ch0: i32, ch1: i32) -> Vec<T<u8>> {
        vec![
            T::transaction_start(),
            T::transfer_in_place(in_frame(cmd, data), out_frame(response, ch0, ch1)),
            T::transaction_end(),
        ]
    }

    /// Status word of a healthy data frame: 24-bit words, both DRDY bits.
    pub const STATUS_OK: u16 = 0x0103;

    /// `init` at `osr`, the device answering as the data sheet says.
    pub fn init(osr: Osr) -> Vec<T<u8>> {
        let clock = osr.clock_register();
        let mut v = frame(0x0011, None, 0x0510, 0, 0);
        v.extend(frame(0x0000, None, 0xFF22, 0, 0));
        // WREG MODE: 011 000010 0000000 = 0x6100; ack 010 000010 0000000 = 0x4100.
        v.extend(frame(0x6100, Some(0x0110), 0x0510, 0, 0));
        v.extend(frame(0x0000, None, 0x4100, 0, 0));
        // WREG CLOCK: 0x6180 (the E2E thread's 0110 0001 1000 0000); ack 0x4180.
        v.extend(frame(0x6180, Some(clock), STATUS_OK, 0, 0));
        v.extend(frame(0x0000, None, 0x4180, 0, 0));
        // RREG CLOCK: 101 000011 0000000 = 0xA180; the value in the next frame.
        v.extend(frame(0xA180, None, STATUS_OK, 0, 0));
        v.extend(frame(0x0000, None, clock, 0, 0));
        v
    }

    /// One data sample with DRDY already low.
    pub fn sample(ch0: i32, ch1: i32) -> Vec<T<u8>> {
        frame(0x0000, None, STATUS_OK, ch0, ch1)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::mock::{FailingSpi, NoDelay};
    use embedded_hal_mock::eh1::digital::{Mock as Pin, State, Transaction as P};
    use embedded_hal_mock::eh1::spi::Mock as Spi;

    #[test]
    fn clock_register_for_32_ksps() {
        // CLOCK: CH1_EN [9], CH0_EN [8], OSR [4:2] = 000 (128), PWR [1:0] = 10.
        assert_eq!(Osr::X128.clock_register(), 0x0302);
        // The reset value 0x030E (OSR 1024) and the E2E thread's 0x030A (OSR 512).
        assert_eq!(Osr::X1024.clock_register(), 0x030E);
        assert_eq!(Osr::X512.clock_register(), 0x030A);
        assert_eq!(Osr::X128.ratio(), 128);
        // 8.192 MHz / 2 / 128 = 32 kSPS; / 2 / 1024 = 4 kSPS (the E2E thread's default).
        assert_eq!(8_192_000 / 2 / Osr::X1024.ratio(), 4000);
    }

    #[test]
    fn crc_check_value() {
        // CRC-16/IBM-3740 ("CCITT-FALSE") of "123456789" is 0x29B1 (RevEng catalogue).
        assert_eq!(FRAME_CRC.checksum(b"123456789"), 0x29B1);
    }

    #[test]
    fn init_resets_configures_and_reads_clock_back() {
        let mut spi = Spi::new(&expect::init(Osr::X128));
        let mut drdy = Pin::new(&[]);
        let mut adc = Ads131m02::new(spi.clone(), drdy.clone());
        adc.init(&mut NoDelay, Osr::X128).unwrap();
        spi.done();
        drdy.done();
    }

    #[test]
    fn a_device_that_does_not_answer_reset_is_refused() {
        // No device: MISO pulled low gives all zeros, and a zero CRC.
        let mut want = expect::frame(0x0011, None, 0, 0, 0);
        let zeros = vec![
            embedded_hal_mock::eh1::spi::Transaction::transaction_start(),
            embedded_hal_mock::eh1::spi::Transaction::transfer_in_place(
                expect::in_frame(0, None),
                vec![0; FRAME],
            ),
            embedded_hal_mock::eh1::spi::Transaction::transaction_end(),
        ];
        // The CRC of nine zero bytes is not zero, so the all-zero answer
        // of the second frame fails the CRC check first.
        want.extend(zeros);
        let mut spi = Spi::new(&want);
        let mut adc = Ads131m02::new(spi.clone(), Pin::new(&[]));
        assert_eq!(
            adc.init(&mut NoDelay, Osr::X128),
            Err(Error::Crc {
                got: 0,
                computed: FRAME_CRC.checksum(&[0; 9])
            })
        );
        spi.done();
        adc.release().1.done();
        // A device that answers, but not FF22.
        let mut want = expect::frame(0x0011, None, 0, 0, 0);
        want.extend(expect::frame(0, None, 0x0510, 0, 0));
        let mut spi = Spi::new(&want);
        let mut adc = Ads131m02::new(spi.clone(), Pin::new(&[]));
        assert_eq!(
            adc.init(&mut NoDelay, Osr::X128),
            Err(Error::NoReset(0x0510))
        );
        spi.done();
        adc.release().1.done();
    }

    #[test]
    fn unacknowledged_write_is_reported() {
        let mut want = expect::frame(0x6180, Some(0x0302), 0x0103, 0, 0);
        want.extend(expect::frame(0, None, 0x0103, 0, 0));
        let mut spi = Spi::new(&want);
        let mut adc = Ads131m02::new(spi.clone(), Pin::new(&[]));
        assert_eq!(
            adc.write_register(REG_CLOCK, 0x0302),
            Err(Error::NoAck {
                register: 3,
                response: 0x0103
            })
        );
        spi.done();
        adc.release().1.done();
    }

    #[test]
    fn samples_are_sign_extended_24_bit_words() {
        let mut want = expect::sample(0x7F_FFFF, -0x80_0000);
        want.extend(expect::sample(-1, 1));
        let mut spi = Spi::new(&want);
        // DRDY high twice, then low: the driver polls.
        let mut drdy = Pin::new(&[
            P::get(State::High),
            P::get(State::High),
            P::get(State::Low),
            P::get(State::Low),
        ]);
        let mut adc = Ads131m02::new(spi.clone(), drdy.clone());
        let s = adc.next_sample(&mut NoDelay).unwrap();
        assert_eq!((s.ch0, s.ch1), (8_388_607, -8_388_608));
        let s = adc.next_sample(&mut NoDelay).unwrap();
        assert_eq!((s.ch0, s.ch1, s.status), (-1, 1, 0x0103));
        spi.done();
        drdy.done();
    }

    #[test]
    fn faults_in_a_sample_frame() {
        // Device reset itself (STATUS[10]); no new data; a corrupted frame.
        let mut want = expect::frame(0, None, 0x0503, 5, 5);
        want.extend(expect::frame(0, None, 0x0100, 5, 5));
        let mut bad = expect::out_frame(0x0103, 5, 5);
        bad[5] ^= 0x01;
        want.extend([
            embedded_hal_mock::eh1::spi::Transaction::transaction_start(),
            embedded_hal_mock::eh1::spi::Transaction::transfer_in_place(
                expect::in_frame(0, None),
                bad.clone(),
            ),
            embedded_hal_mock::eh1::spi::Transaction::transaction_end(),
        ]);
        let mut spi = Spi::new(&want);
        let mut drdy = Pin::new(&[P::get(State::Low), P::get(State::Low), P::get(State::Low)]);
        let mut adc = Ads131m02::new(spi.clone(), drdy.clone());
        assert_eq!(adc.next_sample(&mut NoDelay), Err(Error::Reset));
        assert_eq!(adc.next_sample(&mut NoDelay), Err(Error::Stale(0x0100)));
        let computed = FRAME_CRC.checksum(&bad[..9]);
        assert_eq!(
            adc.next_sample(&mut NoDelay),
            Err(Error::Crc {
                got: u16::from_be_bytes([bad[9], bad[10]]),
                computed
            })
        );
        spi.done();
        drdy.done();
    }

    #[test]
    fn drdy_that_never_falls_times_out() {
        let polls: Vec<P> = (0..DRDY_POLLS).map(|_| P::get(State::High)).collect();
        let mut drdy = Pin::new(&polls);
        let mut spi = Spi::new(&[]);
        let mut adc = Ads131m02::new(spi.clone(), drdy.clone());
        assert_eq!(adc.next_sample(&mut NoDelay), Err(Error::Timeout));
        spi.done();
        drdy.done();
    }

    #[test]
    fn bus_errors_surface() {
        let mut adc = Ads131m02::new(FailingSpi::after(0), Pin::new(&[P::get(State::Low)]));
        assert_eq!(
            adc.next_sample(&mut NoDelay),
            Err(Error::Bus(embedded_hal::spi::ErrorKind::Other))
        );
        assert_eq!(
            adc.init(&mut NoDelay, Osr::X128),
            Err(Error::Bus(embedded_hal::spi::ErrorKind::Other))
        );
        let (_, mut p) = adc.release();
        p.done();
    }
}
