//! Why the board last reset: two RTC backup registers (TAMP_BKP0R magic,
//! TAMP_BKP1R cause; they survive a system reset, and a power cut while
//! VBAT holds) and the reset flags of RCC_CSR (the watchdog's, IWDGRSTF).
//! Register names from memory of RM0440 (STM32G4 reference manual), as
//! `stm32-metapac` names them.

use embassy_stm32::pac;
use embassy_stm32::rtc::Rtc;
use fringe_firmware::protocol::ResetCause;

const MAGIC: u32 = 0x4652_4e47; // "FRNG"

/// Why the board is about to reset.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[repr(u32)]
pub enum Cause {
    /// The host asked for a reboot.
    Requested = 1,
    /// The panic handler.
    Panic = 3,
}

/// Reads and clears the cause of the last reset.
pub fn take_cause(rtc: &Rtc) -> ResetCause {
    let csr = pac::RCC.csr().read();
    let magic = rtc.read_backup_register(0);
    let cause = rtc.read_backup_register(1);
    rtc.write_backup_register(0, MAGIC);
    rtc.write_backup_register(1, 0);
    // Clear the reset flags for the next boot (RMVF).
    pac::RCC.csr().modify(|w| w.set_rmvf(true));
    if csr.iwdgrstf() {
        return ResetCause::Watchdog;
    }
    match (magic, cause) {
        (Some(MAGIC), Some(1)) => ResetCause::Requested,
        (Some(MAGIC), Some(3)) => ResetCause::Panic,
        // Power on, the reset pin, a debugger.
        _ => ResetCause::PowerOn,
    }
}

/// Records `cause` and resets the system.
pub fn reset(rtc: &Rtc, cause: Cause) -> ! {
    rtc.write_backup_register(0, MAGIC);
    rtc.write_backup_register(1, cause as u32);
    cortex_m::peripheral::SCB::sys_reset()
}

/// Records a panic and resets (no `Rtc` at hand: the same registers
/// through the PAC; backup-domain write access was enabled at start-up).
pub fn reset_from_panic() -> ! {
    cortex_m::interrupt::disable();
    pac::TAMP.bkpr(0).write_value(pac::tamp::regs::Bkpr(MAGIC));
    pac::TAMP
        .bkpr(1)
        .write_value(pac::tamp::regs::Bkpr(Cause::Panic as u32));
    cortex_m::peripheral::SCB::sys_reset()
}
