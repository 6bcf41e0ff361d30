//! The few words that survive a reset (reset cause), and the reset itself.
//!
//! They live at [`RETAINED`], outside the RAM the linker uses (memory.x), so
//! start-up code never clears them; QEMU keeps RAM across a system reset and
//! zeroes it at power-on. A magic word tells a cold start (power on) from a
//! reset.

use core::ptr::{read_volatile, write_volatile};

use fringe_firmware::protocol::ResetCause;

/// Address of the retained words.
pub const RETAINED: usize = 0x2030_0000;
const MAGIC: u32 = 0x4652_4e47; // "FRNG"

/// Why the board is about to reset.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[repr(u32)]
pub enum Cause {
    /// The host asked for a reboot.
    Requested = 1,
    /// The watchdog stand-in expired.
    Watchdog = 2,
    /// The panic handler.
    Panic = 3,
}

fn word(i: usize) -> *mut u32 {
    (RETAINED + 4 * i) as *mut u32
}

/// Whether the retained words were set by an earlier run (not a cold start).
pub fn warm() -> bool {
    // SAFETY: RETAINED is RAM the linker never uses (memory.x), aligned.
    unsafe { read_volatile(word(0)) == MAGIC }
}

/// Reads and clears the cause of the last reset.
pub fn take_cause() -> ResetCause {
    // SAFETY: as in `warm`.
    let (magic, cause) = unsafe { (read_volatile(word(0)), read_volatile(word(1))) };
    // SAFETY: as in `warm`.
    unsafe {
        write_volatile(word(0), MAGIC);
        write_volatile(word(1), 0);
    }
    if magic != MAGIC {
        return ResetCause::PowerOn;
    }
    match cause {
        1 => ResetCause::Requested,
        2 => ResetCause::Watchdog,
        3 => ResetCause::Panic,
        // A reset nobody recorded (QEMU `system_reset`, a debugger, the reset pin).
        _ => ResetCause::PowerOn,
    }
}

/// Records `cause` and resets the system (SCB AIRCR.SYSRESETREQ).
pub fn reset(cause: Cause) -> ! {
    // SAFETY: as in `warm`.
    unsafe {
        write_volatile(word(0), MAGIC);
        write_volatile(word(1), cause as u32);
    }
    cortex_m::peripheral::SCB::sys_reset()
}
