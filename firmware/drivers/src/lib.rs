//! # fringe-drivers: the front end on real chips
//!
//! The stage below the firmware core's hardware seam (`fringe_firmware::hal`):
//! each module drives one chip through embedded-hal 1.0 traits only
//! (`SpiDevice`, `OutputPin`, `InputPin`, `DelayNs`) and knows nothing of
//! the firmware; [`frontend`] puts them together into the core's
//! [`Frontend`](fringe_firmware::Frontend) and
//! [`CurrentOutput`](fringe_firmware::CurrentOutput).
//!
//! ```text
//!  25 MHz crystal -> AD9959 (x20 PLL, 500 MHz)
//!                      CH0 excitation f        -> electrodes / reference capacitor
//!                      CH1 LO f - f_IF         -> sensor mixer     \  IF (4 kHz)
//!                      CH2 LO f - f_IF         -> reference mixer  /
//!                      CH3 ADC clock (8.19 MHz) -> ADS131M02 CLKIN
//!  ADS131M02: both IF channels sampled together, 32 kSPS, coherent with the IF
//!  MAX31865: Pt100 ratio to the reference resistor (product temperature)
//!  DAC161S997: 4-20 mA loop, NAMUR NE 43 levels set by the core
//! ```
//!
//! | module | chip | datasheet (as cited beside every constant) |
//! | --- | --- | --- |
//! | [`ad9959`] | AD9959, 4-channel 500 MSPS DDS | Analog Devices, "4-Channel, 500 MSPS DDS with 10-Bit DACs", AD9959 data sheet Rev. B |
//! | [`ads131m02`] | ADS131M02, 2-channel simultaneous-sampling 24-bit delta-sigma ADC | Texas Instruments, ADS131M02 data sheet (SBAS... revision not checked here: values marked "from memory") |
//! | [`max31865`] | MAX31865 RTD-to-digital converter | Maxim Integrated (Analog Devices), MAX31865 data sheet; register access through `embedded-devices` 0.10.3 |
//! | [`dac161s997`] | DAC161S997, 16-bit SPI 4-20 mA loop DAC | Texas Instruments, DAC161S997 data sheet (SNAS621; values marked "from memory") |
//!
//! Every driver has its own `Error<E>` with `Bus(E)` for the SPI bus's
//! error. None of them panics or allocates; waits are bounded.
//!
//! **Nothing here has run on hardware.** The tests check the SPI
//! transactions against the data sheets as cited (with `embedded-hal-mock`);
//! where a value is from memory the doc comment says so, and the board's
//! bring-up checklist (`firmware/boards/stm32g474/README.md`) lists them.
#![cfg_attr(not(test), no_std)]
#![forbid(unsafe_code)]
#![warn(missing_docs)]
#![cfg_attr(
    not(test),
    deny(
        clippy::unwrap_used,
        clippy::expect_used,
        clippy::indexing_slicing,
        clippy::panic
    )
)]

pub mod ad9959;
pub mod ads131m02;
pub mod dac161s997;
pub mod frontend;
pub mod max31865;

#[cfg(test)]
mod mock;
