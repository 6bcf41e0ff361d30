//! The firmware's [`Frontend`] and [`CurrentOutput`] on the real chips.
//!
//! ## Signal path (a board following [`Design`])
//! ```text
//! AD9959 CH0  f, amplitude A  -> electrodes or reference capacitor (switch pin)
//!        CH1  f - f_IF        -> sensor mixer    (after the transimpedance stage)
//!        CH2  f - f_IF        -> reference mixer (the excitation itself)
//!        CH3  f_CLK           -> ADS131M02 CLKIN, sample rate f_CLK / 2 / OSR
//! ADS131M02 CH0 = sensor IF, CH1 = reference IF; 24-bit words, top 16 bits kept
//! ```
//! **Low-side LO.** The mixers keep the difference `f - f_LO = f_IF`, whose
//! phase is `phi_signal - phi_LO`: with the LO below the signal the IF
//! keeps the sign of the signal's phase (a high-side LO would conjugate the
//! ratio, swapping the sign of the loss).
//!
//! **Coherence by construction.** All four channels count the same 500 MHz
//! system clock: the LO's tuning word is the excitation's minus the IF's,
//! and the IF's word is the ADC clock's word times `if_bin / (2 OSR
//! RECORD_LEN)` exactly ([`Design::if_ftw`] refuses a design where it is not
//! an integer). So every record holds exactly `if_bin` IF cycles whatever
//! the excitation frequency, as `fringe_firmware::hal` requires, and the
//! excitation frequency is the requested one to within 0.116 Hz (DS Rev. B
//! of the AD9959: 32-bit words at 500 MHz).
//!
//! **Repeatable phases.** Excitation and both LOs have the AD9959's
//! autoclear-phase bit set, so every frequency change starts their phase
//! accumulators together: the LO-to-LO phase (which the ratio sees) is the
//! same after every change, and what remains of the chain's phase is
//! measured by the reference capacitor (`fringe_firmware::measure::ChainState`).
//!
//! Errors of the chips map to [`FrontendError`]: `Unsupported` for values
//! the design cannot produce, `NotLocked` when the ADC sees no clock (the
//! DDS is not running), `Bus` for the rest. An ADC that reset itself (a
//! brown-out) is set up again at the next acquisition.

use embedded_hal::delay::DelayNs;
use embedded_hal::digital::{InputPin, OutputPin};
use embedded_hal::spi::SpiDevice;
use fringe_firmware::hal::{
    CurrentOutput, Frontend, FrontendError, FrontendInfo, Input, OutputError, RECORD_LEN,
};

use crate::ad9959::{self, Ad9959, Channels};
use crate::ads131m02::{self, Ads131m02, Osr};
use crate::dac161s997::{self, Dac161s997};
use crate::max31865::{self, Max31865};

/// The board's analog design: what the drivers cannot know.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Design {
    /// AD9959 clock (REFCLK and PLL multiplier).
    pub dds: ad9959::Config,
    /// Tuning word of CH3, the ADC's CLKIN.
    pub adc_clock_ftw: u32,
    /// ADC oversampling ratio.
    pub osr: Osr,
    /// IF cycles per record ([`FrontendInfo::if_bin`]).
    pub if_bin: u16,
    /// Amplitude scale factor of both LOs (mixer drive level), 0..=1023.
    pub lo_asf: u16,
    /// Excitation amplitude at full scale (ASF 1023), V peak.
    pub max_amplitude_v: f32,
    /// Excitation frequencies the analog path is built for, Hz (inclusive).
    pub freq_range_hz: (u32, u32),
    /// Transimpedance, ohm, by band: the first entry whose upper frequency
    /// (Hz) is at or above the excitation's applies; above all, the last.
    pub transimpedance: [(f32, f32); 2],
    /// Internal reference capacitor, pF.
    pub reference_pf: f32,
    /// Reference resistor of the RTD converter, ohm.
    pub temp_ref_ohm: f32,
    /// RTD wiring.
    pub rtd_wiring: max31865::Wiring,
    /// RTD fault thresholds, 15-bit ratios (low, high).
    pub rtd_limits: (u16, u16),
    /// Settling after a frequency or input change, microseconds (the
    /// analog filters and the switch).
    pub settle_us: u32,
    /// Samples dropped after a change (the ADC's digital filter settling).
    pub discard: u8,
}

/// The design this crate's board follows: a 25 MHz crystal times 20
/// (500 MHz, AD9959 maximum), ADC clock word 34 360 x 2048 (8.192 062 MHz,
/// 32 000.2 SPS at OSR 128), 32 IF cycles a record (IF 4 000.03 Hz),
/// transimpedance 120 ohm up to 5 MHz and 50 ohm above (as the simulated
/// board uses: `fringe_firmware::sim`), a 33 pF reference capacitor, a
/// Pt100 on a 430 ohm reference in 4 wires with faults outside 40..=250
/// ohm, 1 ms settling and 4 samples dropped (three sinc3 conversion
/// periods and one more; from memory of the ADS131M02 data sheet).
pub const DESIGN: Design = Design {
    dds: ad9959::Config {
        ref_clock_hz: 25_000_000,
        pll_multiplier: 20,
    },
    adc_clock_ftw: 34_360 * 2048,
    osr: Osr::X128,
    if_bin: 32,
    lo_asf: 1023,
    max_amplitude_v: 1.0,
    freq_range_hz: (100_000, 50_000_000),
    transimpedance: [(5.0e6, 120.0), (f32::INFINITY, 50.0)],
    reference_pf: 33.0,
    temp_ref_ohm: 430.0,
    rtd_wiring: max31865::Wiring::TwoOrFour,
    // 40 ohm and 250 ohm as ratios of 430 ohm, times 2^15.
    rtd_limits: (3048, 19_051),
    settle_us: 1000,
    discard: 4,
};

impl Design {
    /// Tuning word of the IF, `adc_clock_ftw * if_bin / (2 OSR RECORD_LEN)`;
    /// `None` unless that is an exact integer (coherent sampling) and the
    /// IF is at most half the sample rate.
    pub fn if_ftw(&self) -> Option<u32> {
        let den = 2 * u64::from(self.osr.ratio()) * RECORD_LEN as u64;
        let num = u64::from(self.adc_clock_ftw) * u64::from(self.if_bin);
        if den == 0
            || !num.is_multiple_of(den)
            || self.if_bin == 0
            || usize::from(self.if_bin) * 2 > RECORD_LEN
        {
            return None;
        }
        u32::try_from(num / den).ok()
    }

    /// ADC sample rate, millihertz.
    pub fn sample_rate_mhz(&self) -> u64 {
        ad9959::freq_mhz(self.adc_clock_ftw, self.dds.sysclk_hz()) / 2 / u64::from(self.osr.ratio())
    }

    fn transimpedance_at(&self, freq_hz: f32) -> f32 {
        let [(f0, r0), (_, r1)] = self.transimpedance;
        if freq_hz <= f0 {
            r0
        } else {
            r1
        }
    }
}

/// Which chip did not come up.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum Part {
    /// The design itself is inconsistent ([`Design::if_ftw`] is `None`).
    Design,
    /// The AD9959.
    Synthesiser,
    /// The ADS131M02.
    Adc,
    /// The MAX31865.
    Rtd,
}

impl core::fmt::Display for Part {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        f.write_str(match self {
            Part::Design => "front-end design: IF not coherent with the ADC clock",
            Part::Synthesiser => "AD9959 synthesiser did not come up",
            Part::Adc => "ADS131M02 ADC did not come up",
            Part::Rtd => "MAX31865 RTD converter did not come up",
        })
    }
}

impl core::error::Error for Part {}

/// The front end on the AD9959, ADS131M02 and MAX31865, with the input
/// switch (high = internal reference capacitor) and a delay.
pub struct AnalogFrontend<DS, DR, DU, AS, AR, TS, TD, SW, D>
where
    DS: SpiDevice,
    DR: OutputPin,
    DU: OutputPin,
    AS: SpiDevice,
    AR: InputPin,
    TS: SpiDevice,
    TD: DelayNs,
    SW: OutputPin,
    D: DelayNs,
{
    design: Design,
    dds: Ad9959<DS, DR, DU>,
    adc: Ads131m02<AS, AR>,
    rtd: Max31865<TS, TD>,
    switch: SW,
    delay: D,
    /// Samples still to drop before the next record.
    discard: u8,
    /// The ADC reset itself: set it up again before the next record.
    adc_lost: bool,
}

impl<DS, DR, DU, AS, AR, TS, TD, SW, D> core::fmt::Debug
    for AnalogFrontend<DS, DR, DU, AS, AR, TS, TD, SW, D>
where
    DS: SpiDevice,
    DR: OutputPin,
    DU: OutputPin,
    AS: SpiDevice,
    AR: InputPin,
    TS: SpiDevice,
    TD: DelayNs,
    SW: OutputPin,
    D: DelayNs,
{
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        f.debug_struct("AnalogFrontend")
            .field("design", &self.design)
            .field("adc_lost", &self.adc_lost)
            .finish_non_exhaustive()
    }
}

impl<DS, DR, DU, AS, AR, TS, TD, SW, D> AnalogFrontend<DS, DR, DU, AS, AR, TS, TD, SW, D>
where
    DS: SpiDevice,
    DR: OutputPin,
    DU: OutputPin,
    AS: SpiDevice,
    AR: InputPin,
    TS: SpiDevice,
    TD: DelayNs,
    SW: OutputPin,
    D: DelayNs,
{
    /// Puts the parts together; touches no hardware (see [`Self::init`]).
    pub fn new(
        design: Design,
        dds: Ad9959<DS, DR, DU>,
        adc: Ads131m02<AS, AR>,
        rtd: Max31865<TS, TD>,
        switch: SW,
        delay: D,
    ) -> Self {
        Self {
            design,
            dds,
            adc,
            rtd,
            switch,
            delay,
            discard: design.discard,
            adc_lost: false,
        }
    }

    /// Brings the chips up in the order the clocks need: the AD9959 (PLL),
    /// its CH3 as the ADC clock, then the ADS131M02, then the MAX31865;
    /// the input switch on the electrodes.
    ///
    /// # Errors
    /// The [`Part`] that failed.
    pub fn init(&mut self) -> Result<(), Part> {
        self.design.if_ftw().ok_or(Part::Design)?;
        self.dds
            .init(&mut self.delay)
            .map_err(|_| Part::Synthesiser)?;
        self.dds
            .set_channels(
                Channels::CH3,
                self.design.adc_clock_ftw,
                ad9959::ASF_MAX,
                false,
            )
            .and_then(|()| self.dds.io_update(&mut self.delay))
            .map_err(|_| Part::Synthesiser)?;
        self.delay.delay_us(self.design.settle_us);
        self.adc
            .init(&mut self.delay, self.design.osr)
            .map_err(|_| Part::Adc)?;
        let (lo, hi) = self.design.rtd_limits;
        self.rtd.init(lo, hi).map_err(|_| Part::Rtd)?;
        self.switch.set_low().map_err(|_| Part::Synthesiser)?;
        self.discard = self.design.discard;
        Ok(())
    }

    /// The design in use.
    pub fn design(&self) -> &Design {
        &self.design
    }

    fn record(
        &mut self,
        sensor: &mut [i16; RECORD_LEN],
        reference: &mut [i16; RECORD_LEN],
    ) -> Result<(), ads131m02::Error<AS::Error>> {
        if self.adc_lost {
            self.adc.init(&mut self.delay, self.design.osr)?;
            self.adc_lost = false;
            self.discard = self.design.discard;
        }
        while self.discard > 0 {
            self.adc.next_sample(&mut self.delay)?;
            self.discard -= 1;
        }
        for (s, r) in sensor.iter_mut().zip(reference.iter_mut()) {
            let x = self.adc.next_sample(&mut self.delay)?;
            // The top 16 of the 24 bits (floor: a constant offset the
            // demodulator removes with the mean).
            *s = (x.ch0 >> 8) as i16;
            *r = (x.ch1 >> 8) as i16;
        }
        Ok(())
    }
}

impl<DS, DR, DU, AS, AR, TS, TD, SW, D> Frontend
    for AnalogFrontend<DS, DR, DU, AS, AR, TS, TD, SW, D>
where
    DS: SpiDevice,
    DR: OutputPin,
    DU: OutputPin,
    AS: SpiDevice,
    AR: InputPin,
    TS: SpiDevice,
    TD: DelayNs,
    SW: OutputPin,
    D: DelayNs,
{
    fn info(&self) -> FrontendInfo {
        FrontendInfo {
            if_bin: self.design.if_bin,
            adc_full_scale: i16::MAX,
            reference_pf: self.design.reference_pf,
            temp_ref_ohm: self.design.temp_ref_ohm,
            max_amplitude_v: self.design.max_amplitude_v,
        }
    }

    fn transimpedance_ohm(&self, freq_hz: f32) -> f32 {
        self.design.transimpedance_at(freq_hz)
    }

    fn set_excitation(&mut self, freq_hz: f32, amplitude_v: f32) -> Result<(), FrontendError> {
        let d = self.design;
        let (lo, hi) = d.freq_range_hz;
        // NaN is in neither range.
        if !(lo as f32..=hi as f32).contains(&freq_hz)
            || !(0.0..=d.max_amplitude_v).contains(&amplitude_v)
        {
            return Err(FrontendError::Unsupported);
        }
        let f = libm_round(freq_hz);
        let sysclk = d.dds.sysclk_hz();
        let ftw = ad9959::ftw(f, sysclk).ok_or(FrontendError::Unsupported)?;
        let lo_ftw = d
            .if_ftw()
            .and_then(|w| ftw.checked_sub(w))
            .ok_or(FrontendError::Unsupported)?;
        let asf = libm_round(amplitude_v / d.max_amplitude_v * f32::from(ad9959::ASF_MAX)) as u16;
        let map = |e: ad9959::Error<DS::Error>| match e {
            ad9959::Error::Unsupported => FrontendError::Unsupported,
            _ => FrontendError::Bus,
        };
        self.dds
            .set_channels(Channels::CH0, ftw, asf.min(ad9959::ASF_MAX), true)
            .map_err(map)?;
        self.dds
            .set_channels(Channels::CH1.with(Channels::CH2), lo_ftw, d.lo_asf, true)
            .map_err(map)?;
        self.dds.io_update(&mut self.delay).map_err(map)?;
        self.delay.delay_us(d.settle_us);
        self.discard = d.discard;
        Ok(())
    }

    fn select_input(&mut self, input: Input) -> Result<(), FrontendError> {
        match input {
            Input::Electrodes => self.switch.set_low(),
            Input::Reference => self.switch.set_high(),
        }
        .map_err(|_| FrontendError::Bus)?;
        self.delay.delay_us(self.design.settle_us);
        self.discard = self.design.discard;
        Ok(())
    }

    fn acquire(
        &mut self,
        sensor: &mut [i16; RECORD_LEN],
        reference: &mut [i16; RECORD_LEN],
    ) -> Result<(), FrontendError> {
        self.record(sensor, reference).map_err(|e| match e {
            ads131m02::Error::Timeout => FrontendError::NotLocked,
            ads131m02::Error::Reset => {
                self.adc_lost = true;
                FrontendError::Bus
            }
            _ => FrontendError::Bus,
        })
    }

    fn read_temperature_raw(&mut self) -> Result<u32, FrontendError> {
        // ratio / 2^15 = raw / 2^24 (the core's ratiometric code).
        self.rtd
            .read_ratio()
            .map(|r| u32::from(r) << (24 - max31865::RATIO_BITS))
            .map_err(|_| FrontendError::Bus)
    }
}

/// Rounds a non-negative float to the nearest integer (saturating), without `std`.
fn libm_round(x: f32) -> u32 {
    let r = x + 0.5;
    if r <= 0.0 {
        0
    } else if r >= u32::MAX as f32 {
        u32::MAX
    } else {
        r as u32
    }
}

/// The 4-20 mA output on a DAC161S997.
#[derive(Debug)]
pub struct LoopOutput<SPI: SpiDevice> {
    dac: Dac161s997<SPI>,
    /// The last error of the DAC, for diagnostics.
    pub last_error: Option<dac161s997::Error<SPI::Error>>,
}

impl<SPI: SpiDevice> LoopOutput<SPI> {
    /// The loop on `dac` (call [`Dac161s997::init`] first).
    pub fn new(dac: Dac161s997<SPI>) -> Self {
        Self {
            dac,
            last_error: None,
        }
    }
}

impl<SPI: SpiDevice> CurrentOutput for LoopOutput<SPI> {
    /// Any DAC error is a loop the device cannot drive: [`OutputError::LoopFault`]
    /// (the detail stays in `last_error`).
    fn set_ma(&mut self, ma: f32) -> Result<(), OutputError> {
        match self.dac.set_ma(ma) {
            Ok(()) => {
                self.last_error = None;
                Ok(())
            }
            Err(e) => {
                self.last_error = Some(e);
                Err(OutputError::LoopFault)
            }
        }
    }
}

#[cfg(test)]
mod tests;
