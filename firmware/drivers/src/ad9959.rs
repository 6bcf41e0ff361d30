//! AD9959: four phase-locked DDS channels on one SPI port.
//!
//! Source for every register, bit and timing below (unless a line says
//! "from memory"): Analog Devices, *4-Channel, 500 MSPS DDS with 10-Bit
//! DACs*, AD9959 data sheet, **Rev. B** (©2005-2008), cited as "DS".
//!
//! ## Why this part covers 1 MHz and 20 MHz
//! DS p. 1: four synchronised DDS cores at up to 500 MSPS, each with a
//! 32-bit frequency tuning word ("0.12 Hz or better frequency tuning
//! resolution", i.e. 500 MHz / 2^32), 14-bit phase and 10-bit amplitude,
//! channel-to-channel isolation above 65 dB, and a 4x to 20x REFCLK
//! multiplier. A DDS puts out any frequency from DC to below half its
//! system clock (Nyquist); with a 25 MHz crystal times 20 the system clock
//! is 500 MHz, so 1 MHz and 20 MHz sit at 0.2 % and 4 % of it, far below
//! the usual 40 % limit of the reconstruction filter (common practice, no
//! source), with 0.116 Hz steps. Because all four channels run from one
//! system clock, excitation, both local oscillators and the ADC clock keep
//! a fixed phase relation: what coherent sampling needs (`fringe_firmware::hal`).
//!
//! ## Serial protocol (DS "Serial Port Operation", Table 25 of the sibling
//! AD9958 data sheet has the same instruction byte; for the AD9959 from memory)
//! One CS-low frame per register: an instruction byte (bit 7 = 1 reads,
//! bits 4:0 the register address) followed by the register's bytes, MSB
//! first. Writes land in buffers; a rising edge on IO_UPDATE moves them to
//! the active registers of every enabled channel.
//!
//! ```text
//! addr  reg    bytes  used here
//! 0x00  CSR    1      [7:4] channel enables CH3..CH0, [2:1] serial mode, [0] LSB first
//! 0x01  FR1    3      [23] VCO gain, [22:18] PLL divider, [17:16] charge pump
//! 0x03  CFR    3      [9:8] DAC full-scale current, [2] autoclear phase accumulator
//! 0x04  CFTW0  4      frequency tuning word
//! 0x06  ACR    3      [12] amplitude multiplier enable, [9:0] amplitude scale factor
//! ```

use embedded_hal::delay::DelayNs;
use embedded_hal::digital::OutputPin;
use embedded_hal::spi::{Operation, SpiDevice};

/// Channel select register (DS "Register Maps", address 0x00, 1 byte).
pub const REG_CSR: u8 = 0x00;
/// Function register 1 (DS, address 0x01, 3 bytes).
pub const REG_FR1: u8 = 0x01;
/// Channel function register (DS, address 0x03, 3 bytes).
pub const REG_CFR: u8 = 0x03;
/// Channel frequency tuning word 0 (DS, address 0x04, 4 bytes).
pub const REG_CFTW0: u8 = 0x04;
/// Amplitude control register (DS, address 0x06, 3 bytes).
pub const REG_ACR: u8 = 0x06;

/// Instruction byte bit 7: 1 = read (DS instruction byte; from memory for
/// the AD9959, as the AD9958 data sheet Rev. 0, Table 25, states it).
pub const INSTR_READ: u8 = 0x80;

/// CSR[2:1] = 01: single-bit serial 3-wire mode, SDIO_0 in, SDIO_2 out
/// (DS Table 27, p. 33). The default after reset is 00 (2-wire).
pub const CSR_IO_3WIRE: u8 = 0b01 << 1;

/// FR1[23]: VCO gain control, 1 for a system clock above 255 MHz (from memory).
pub const FR1_VCO_GAIN_HIGH: u32 = 1 << 23;
/// FR1[22:18]: PLL divider ratio, 4..=20 multiplies REFCLK; other values
/// bypass the PLL (DS p. 1 "4x to 20x"; bit position from memory).
pub const FR1_PLL_SHIFT: u32 = 18;
/// FR1[17:16] = 11: charge pump current 150 uA, the lowest phase noise (from memory).
pub const FR1_CHARGE_PUMP_MAX: u32 = 0b11 << 16;

/// CFR[9:8] = 11: DAC full-scale current at its full value (the reset default, from memory).
pub const CFR_DAC_FULL_SCALE: u32 = 0b11 << 8;
/// CFR[2]: autoclear phase accumulator: each IO_UPDATE restarts the
/// channel's phase accumulator at zero (from memory). Set on the
/// excitation and both local oscillators, it makes their phase relation
/// after a frequency change the same every time.
pub const CFR_AUTOCLEAR_PHASE: u32 = 1 << 2;

/// ACR[12]: amplitude multiplier enable; without it the ASF is bypassed (from memory).
pub const ACR_MULTIPLIER_ENABLE: u32 = 1 << 12;
/// Largest amplitude scale factor, ACR[9:0] (DS p. 1, "10-bit output amplitude scaling").
pub const ASF_MAX: u16 = 1023;

/// MASTER_RESET high time used, microseconds. DS asks for a minimum in
/// SYNC_CLK cycles (nanoseconds); 1 us is far above it (from memory).
pub const RESET_PULSE_US: u32 = 1;
/// IO_UPDATE high time used, microseconds (DS: a few SYNC_CLK cycles; from memory).
pub const IO_UPDATE_PULSE_US: u32 = 1;
/// Wait after setting the PLL before the clock is used, microseconds
/// (DS "REFCLK multiplier" lock time, 1 ms; from memory).
pub const PLL_LOCK_US: u32 = 1000;

/// The four output channels as CSR enable bits (DS Table 27 neighbours: CSR[7:4]).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Channels(u8);

impl Channels {
    /// Channel 0 (CSR[4]).
    pub const CH0: Channels = Channels(0x10);
    /// Channel 1 (CSR[5]).
    pub const CH1: Channels = Channels(0x20);
    /// Channel 2 (CSR[6]).
    pub const CH2: Channels = Channels(0x40);
    /// Channel 3 (CSR[7]).
    pub const CH3: Channels = Channels(0x80);
    /// All four.
    pub const ALL: Channels = Channels(0xF0);

    /// Both sets of channels.
    pub const fn with(self, other: Channels) -> Channels {
        Channels(self.0 | other.0)
    }
    /// The CSR enable bits.
    pub const fn bits(self) -> u8 {
        self.0
    }
}

/// Clock configuration of the chip.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Config {
    /// REFCLK (crystal or oscillator), Hz.
    pub ref_clock_hz: u32,
    /// REFCLK multiplier, 4..=20 (DS p. 1).
    pub pll_multiplier: u8,
}

impl Config {
    /// System clock: REFCLK times the multiplier, Hz.
    pub const fn sysclk_hz(&self) -> u64 {
        self.ref_clock_hz as u64 * self.pll_multiplier as u64
    }

    /// FR1 for this configuration: PLL divider, charge pump, and the VCO
    /// range for a system clock above 255 MHz.
    pub const fn fr1(&self) -> u32 {
        let vco = if self.sysclk_hz() > 255_000_000 {
            FR1_VCO_GAIN_HIGH
        } else {
            0
        };
        vco | ((self.pll_multiplier as u32 & 0x1F) << FR1_PLL_SHIFT) | FR1_CHARGE_PUMP_MAX
    }
}

/// Frequency tuning word for `freq_hz` at system clock `sysclk_hz`:
/// `FTW = round(f_out * 2^32 / f_sysclk)` (DS "Theory of Operation":
/// `f_out = FTW * f_sysclk / 2^32`), in exact integer arithmetic.
///
/// `None` when the clock is zero or the frequency is not below Nyquist
/// (`f_out < f_sysclk / 2`), where a DDS cannot put it out.
pub const fn ftw(freq_hz: u32, sysclk_hz: u64) -> Option<u32> {
    if sysclk_hz == 0 || (freq_hz as u64) * 2 >= sysclk_hz {
        return None;
    }
    let num = ((freq_hz as u128) << 32) + (sysclk_hz as u128) / 2;
    let word = num / sysclk_hz as u128;
    if word > u32::MAX as u128 {
        None
    } else {
        Some(word as u32)
    }
}

/// Output frequency of a tuning word, millihertz (`FTW * f_sysclk / 2^32`, rounded down).
pub const fn freq_mhz(ftw: u32, sysclk_hz: u64) -> u64 {
    ((ftw as u128 * sysclk_hz as u128 * 1000) >> 32) as u64
}

/// What the AD9959 driver can fail with.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum Error<E> {
    /// The SPI bus failed.
    Bus(E),
    /// MASTER_RESET or IO_UPDATE could not be driven.
    Pin,
    /// A register read back differs from what was written (no chip, a
    /// broken SDO line, or a chip that reset itself).
    Readback {
        /// Register address.
        register: u8,
        /// Value written.
        wrote: u32,
        /// Value read back.
        read: u32,
    },
    /// A value outside what the chip can do (frequency at or above
    /// Nyquist, amplitude above [`ASF_MAX`], multiplier outside 4..=20).
    Unsupported,
}

impl<E: core::fmt::Debug> core::fmt::Display for Error<E> {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        match self {
            Error::Bus(e) => write!(f, "AD9959: SPI bus error {e:?}"),
            Error::Pin => write!(f, "AD9959: MASTER_RESET or IO_UPDATE pin failed"),
            Error::Readback {
                register,
                wrote,
                read,
            } => write!(
                f,
                "AD9959: register 0x{register:02X} reads 0x{read:06X}, 0x{wrote:06X} written"
            ),
            Error::Unsupported => {
                write!(f, "AD9959: frequency, amplitude or multiplier out of range")
            }
        }
    }
}

impl<E: core::fmt::Debug> core::error::Error for Error<E> {}

/// Byte length of a register this driver uses (DS register map).
const fn reg_len(reg: u8) -> usize {
    match reg {
        REG_CSR => 1,
        REG_CFTW0 => 4,
        _ => 3,
    }
}

/// The AD9959 on an SPI device, with its MASTER_RESET and IO_UPDATE pins.
#[derive(Debug)]
pub struct Ad9959<SPI, RST, UPD> {
    spi: SPI,
    reset: RST,
    update: UPD,
    cfg: Config,
}

impl<SPI, RST, UPD> Ad9959<SPI, RST, UPD>
where
    SPI: SpiDevice,
    RST: OutputPin,
    UPD: OutputPin,
{
    /// The chip on `spi` (CPOL/CPHA 0, MSB first, at most 200 MHz per DS),
    /// not yet touched.
    pub fn new(spi: SPI, reset: RST, update: UPD, cfg: Config) -> Self {
        Self {
            spi,
            reset,
            update,
            cfg,
        }
    }

    /// The clock configuration.
    pub fn config(&self) -> Config {
        self.cfg
    }

    /// Gives the bus and pins back.
    pub fn release(self) -> (SPI, RST, UPD) {
        (self.spi, self.reset, self.update)
    }

    /// Resets the chip and starts its clock: MASTER_RESET pulse, CSR to
    /// 3-wire mode with all channels enabled, FR1 (PLL multiplier, charge
    /// pump, VCO range), IO_UPDATE, the PLL's lock time, then FR1 read
    /// back and compared.
    ///
    /// # Errors
    /// [`Error::Unsupported`] for a multiplier outside 4..=20,
    /// [`Error::Bus`], [`Error::Pin`], [`Error::Readback`].
    pub fn init<D: DelayNs>(&mut self, delay: &mut D) -> Result<(), Error<SPI::Error>> {
        if !(4..=20).contains(&self.cfg.pll_multiplier) {
            return Err(Error::Unsupported);
        }
        self.reset.set_high().map_err(|_| Error::Pin)?;
        delay.delay_us(RESET_PULSE_US);
        self.reset.set_low().map_err(|_| Error::Pin)?;
        delay.delay_us(RESET_PULSE_US);
        // The reset default is 2-wire mode (CSR[2:1] = 00): this write is
        // understood either way, and from here on SDIO_2 answers reads.
        self.write(REG_CSR, u32::from(Channels::ALL.bits() | CSR_IO_3WIRE))?;
        let fr1 = self.cfg.fr1();
        self.write(REG_FR1, fr1)?;
        self.io_update(delay)?;
        delay.delay_us(PLL_LOCK_US);
        let read = self.read(REG_FR1)?;
        if read != fr1 {
            return Err(Error::Readback {
                register: REG_FR1,
                wrote: fr1,
                read,
            });
        }
        Ok(())
    }

    /// Writes frequency and amplitude of `channels` into the buffers
    /// (CSR, CFR, CFTW0, ACR; effective at the next [`Self::io_update`]).
    /// `autoclear` restarts their phase accumulators at each IO_UPDATE.
    ///
    /// # Errors
    /// [`Error::Unsupported`] for `asf` above [`ASF_MAX`]; [`Error::Bus`].
    pub fn set_channels(
        &mut self,
        channels: Channels,
        ftw: u32,
        asf: u16,
        autoclear: bool,
    ) -> Result<(), Error<SPI::Error>> {
        if asf > ASF_MAX {
            return Err(Error::Unsupported);
        }
        self.write(REG_CSR, u32::from(channels.bits() | CSR_IO_3WIRE))?;
        let cfr = CFR_DAC_FULL_SCALE | if autoclear { CFR_AUTOCLEAR_PHASE } else { 0 };
        self.write(REG_CFR, cfr)?;
        self.write(REG_CFTW0, ftw)?;
        self.write(REG_ACR, ACR_MULTIPLIER_ENABLE | u32::from(asf))?;
        Ok(())
    }

    /// Pulses IO_UPDATE: the buffered registers become active on all
    /// channels at once.
    ///
    /// # Errors
    /// [`Error::Pin`].
    pub fn io_update<D: DelayNs>(&mut self, delay: &mut D) -> Result<(), Error<SPI::Error>> {
        self.update.set_high().map_err(|_| Error::Pin)?;
        delay.delay_us(IO_UPDATE_PULSE_US);
        self.update.set_low().map_err(|_| Error::Pin)
    }

    /// Writes register `reg` (its length from the register map), MSB first.
    ///
    /// # Errors
    /// [`Error::Bus`].
    pub fn write(&mut self, reg: u8, value: u32) -> Result<(), Error<SPI::Error>> {
        let n = reg_len(reg);
        let bytes = value.to_be_bytes();
        let mut frame = [0u8; 5];
        frame[0] = reg & 0x1F;
        let data = bytes.get(4 - n..).unwrap_or(&[]);
        let len = 1 + data.len();
        if let Some(dst) = frame.get_mut(1..len) {
            dst.copy_from_slice(data);
        }
        self.spi
            .write(frame.get(..len).unwrap_or(&[]))
            .map_err(Error::Bus)
    }

    /// Reads register `reg` back (instruction with the read bit, then its bytes).
    ///
    /// # Errors
    /// [`Error::Bus`].
    pub fn read(&mut self, reg: u8) -> Result<u32, Error<SPI::Error>> {
        let n = reg_len(reg);
        let mut buf = [0u8; 4];
        let instr = [INSTR_READ | (reg & 0x1F)];
        let data = buf.get_mut(..n).unwrap_or(&mut []);
        self.spi
            .transaction(&mut [Operation::Write(&instr), Operation::Read(data)])
            .map_err(Error::Bus)?;
        Ok(buf
            .iter()
            .take(n)
            .fold(0u32, |acc, &b| (acc << 8) | u32::from(b)))
    }
}

/// The SPI transactions the data sheet prescribes, for the tests.
#[cfg(test)]
pub(crate) mod expect {
    use super::*;
    use embedded_hal_mock::eh1::spi::Transaction as T;

    /// One register write as a CS-low frame.
    pub fn write(reg: u8, value: u32) -> Vec<T<u8>> {
        let n = reg_len(reg);
        let mut bytes = vec![reg];
        bytes.extend_from_slice(&value.to_be_bytes()[4 - n..]);
        vec![
            T::transaction_start(),
            T::write_vec(bytes),
            T::transaction_end(),
        ]
    }

    /// One register read returning `value`.
    pub fn read(reg: u8, value: u32) -> Vec<T<u8>> {
        let n = reg_len(reg);
        vec![
            T::transaction_start(),
            T::write_vec(vec![0x80 | reg]),
            T::read_vec(value.to_be_bytes()[4 - n..].to_vec()),
            T::transaction_end(),
        ]
    }

    /// `set_channels` as frames: CSR, CFR, CFTW0, ACR.
    pub fn set_channels(ch: u8, ftw: u32, asf: u16, autoclear: bool) -> Vec<T<u8>> {
        let mut v = write(0x00, u32::from(ch | 0x02));
        v.extend(write(0x03, 0x300 | if autoclear { 0x4 } else { 0 }));
        v.extend(write(0x04, ftw));
        v.extend(write(0x06, 0x1000 | u32::from(asf)));
        v
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::mock::{FailingSpi, NoDelay};
    use embedded_hal_mock::eh1::digital::{Mock as Pin, State, Transaction as P};
    use embedded_hal_mock::eh1::spi::Mock as Spi;

    const CFG: Config = Config {
        ref_clock_hz: 25_000_000,
        pll_multiplier: 20,
    };

    /// FR1 for 25 MHz x 20 written out bit by bit from the register map
    /// (DS; bit positions from memory): VCO gain 1 (500 MHz > 255 MHz),
    /// divider 20 = 0b10100 at [22:18], charge pump 0b11 at [17:16].
    const FR1_500MHZ: u32 = (1 << 23) | (20 << 18) | (0b11 << 16);

    fn pulse() -> Vec<P> {
        vec![P::set(State::High), P::set(State::Low)]
    }

    #[test]
    fn fr1_for_a_500_mhz_clock() {
        assert_eq!(CFG.fr1(), FR1_500MHZ);
        assert_eq!(FR1_500MHZ, 0xD3_0000);
        assert_eq!(CFG.sysclk_hz(), 500_000_000);
    }

    #[test]
    fn init_resets_sets_3_wire_mode_starts_the_pll_and_reads_fr1_back() {
        // DS: MASTER_RESET pulse; CSR 0xF2 (all channels, 3-wire); FR1;
        // IO_UPDATE; FR1 read back with the read bit (0x81).
        let mut want = expect::write(0x00, 0xF2);
        want.extend(expect::write(0x01, FR1_500MHZ));
        want.extend(expect::read(0x01, FR1_500MHZ));
        let mut spi = Spi::new(&want);
        let mut rst = Pin::new(&pulse());
        let mut upd = Pin::new(&pulse());
        let mut dds = Ad9959::new(spi.clone(), rst.clone(), upd.clone(), CFG);
        dds.init(&mut NoDelay).unwrap();
        spi.done();
        rst.done();
        upd.done();
    }

    #[test]
    fn init_refuses_a_chip_that_does_not_read_back() {
        // A missing chip reads all ones on a pulled-up SDO.
        let mut want = expect::write(0x00, 0xF2);
        want.extend(expect::write(0x01, FR1_500MHZ));
        want.extend(expect::read(0x01, 0xFF_FFFF));
        let mut spi = Spi::new(&want);
        let mut rst = Pin::new(&pulse());
        let mut upd = Pin::new(&pulse());
        let mut dds = Ad9959::new(spi.clone(), rst.clone(), upd.clone(), CFG);
        assert_eq!(
            dds.init(&mut NoDelay),
            Err(Error::Readback {
                register: 0x01,
                wrote: FR1_500MHZ,
                read: 0xFF_FFFF
            })
        );
        spi.done();
        rst.done();
        upd.done();
    }

    #[test]
    fn frequency_words_for_the_two_measuring_frequencies() {
        // DS: FTW = f_out 2^32 / f_sysclk. 1 MHz at 500 MHz: 8 589 934.592
        // -> 8 589 935 (0x0083_126F); 20 MHz: 171 798 691.84 -> 171 798 692
        // (0x0A3D_70A4). Computed by hand from the formula.
        assert_eq!(ftw(1_000_000, 500_000_000), Some(0x0083_126F));
        assert_eq!(ftw(20_000_000, 500_000_000), Some(0x0A3D_70A4));
        let mut spi = Spi::new(&expect::set_channels(0x10, 0x0083_126F, 1023, true));
        let mut dds = Ad9959::new(spi.clone(), Pin::new(&[]), Pin::new(&[]), CFG);
        dds.set_channels(Channels::CH0, 0x0083_126F, 1023, true)
            .unwrap();
        spi.done();
        let (_, mut r, mut u) = dds.release();
        r.done();
        u.done();
    }

    #[test]
    fn nyquist_and_amplitude_limits_are_refused() {
        assert_eq!(ftw(250_000_000, 500_000_000), None);
        assert_eq!(ftw(1, 0), None);
        assert!(ftw(249_999_999, 500_000_000).is_some());
        let mut spi = Spi::new(&[]);
        let mut dds = Ad9959::new(spi.clone(), Pin::new(&[]), Pin::new(&[]), CFG);
        assert_eq!(
            dds.set_channels(Channels::CH0, 1, 1024, false),
            Err(Error::Unsupported)
        );
        spi.done();
        let (_, mut r, mut u) = dds.release();
        r.done();
        u.done();
        let mut bad = Ad9959::new(
            Spi::new(&[]),
            Pin::new(&[]),
            Pin::new(&[]),
            Config {
                ref_clock_hz: 25_000_000,
                pll_multiplier: 21,
            },
        );
        assert_eq!(bad.init(&mut NoDelay), Err(Error::Unsupported));
        let (mut s, mut r, mut u) = bad.release();
        s.done();
        r.done();
        u.done();
    }

    #[test]
    fn bus_and_pin_errors_surface() {
        let mut dds = Ad9959::new(FailingSpi::after(0), Pin::new(&[]), Pin::new(&[]), CFG);
        assert_eq!(
            dds.write(REG_CFTW0, 1),
            Err(Error::Bus(embedded_hal::spi::ErrorKind::Other))
        );
        let (_, mut r, mut u) = dds.release();
        r.done();
        u.done();
        // The second write of init fails: the error is the bus's.
        let mut rst = Pin::new(&pulse());
        let mut dds = Ad9959::new(FailingSpi::after(1), rst.clone(), Pin::new(&[]), CFG);
        assert!(matches!(dds.init(&mut NoDelay), Err(Error::Bus(_))));
        rst.done();
        let (_, _, mut u) = dds.release();
        u.done();
        // MASTER_RESET cannot be driven.
        let mut rst =
            Pin::new(&[
                P::set(State::High).with_error(embedded_hal_mock::eh1::MockError::Io(
                    std::io::ErrorKind::Other,
                )),
            ]);
        let mut dds = Ad9959::new(Spi::new(&[]), rst.clone(), Pin::new(&[]), CFG);
        assert_eq!(dds.init(&mut NoDelay), Err(Error::Pin));
        rst.done();
        let (mut s, _, mut u) = dds.release();
        s.done();
        u.done();
    }

    proptest::proptest! {
        #![proptest_config(fringe_testkit::proptest_config(2048, 0xAD_9959))]

        /// The tuning word against the data sheet's formula
        /// `f_out = FTW f_sysclk / 2^32` (DS "Theory of Operation"):
        /// the word is the nearest one, so the frequency it gives is within
        /// half a step (`f_sysclk / 2^33`) of the one asked for, and both
        /// neighbours are further away. Any clock from 4x 1 MHz to 20x 25 MHz.
        #[test]
        fn frequency_word_is_the_nearest_to_the_formula(
            f in 0u32..=200_000_000,
            ref_mhz in 1u32..=25,
            mult in 4u8..=20,
        ) {
            let fs = u64::from(ref_mhz) * 1_000_000 * u64::from(mult);
            match ftw(f, fs) {
                None => proptest::prop_assert!(2 * u64::from(f) >= fs),
                Some(w) => {
                    proptest::prop_assert!(2 * u64::from(f) < fs);
                    // Exact rational arithmetic: error of word w in units of
                    // f_sysclk / 2^32, times fs (all integers).
                    let target = u128::from(f) << 32; // f 2^32, compare with w fs
                    let err = |w: u128| (w * u128::from(fs)).abs_diff(target);
                    let e = err(u128::from(w));
                    proptest::prop_assert!(2 * e <= u128::from(fs), "f {} fs {} w {}", f, fs, w);
                    proptest::prop_assert!(e <= err(u128::from(w) + 1));
                    if w > 0 {
                        proptest::prop_assert!(e <= err(u128::from(w) - 1));
                    }
                    // And the frequency it gives, in mHz, within half a step.
                    let got = freq_mhz(w, fs) as f64 / 1000.0;
                    let step = fs as f64 / 4_294_967_296.0;
                    proptest::prop_assert!((got - f64::from(f)).abs() <= 0.5 * step + 0.001);
                }
            }
        }
    }
}
