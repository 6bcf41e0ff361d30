//! SysTick as the device clock and the cycle counter, and the watchdog
//! stand-in that runs in its interrupt.
//!
//! SysTick counts the core clock (25 MHz on mps2-an386) down from
//! [`RELOAD`]; its interrupt every millisecond raises a 64-bit millisecond
//! count. [`cycles`] combines both into a monotonic cycle count. Under QEMU
//! with `-icount shift=0` virtual time advances one nanosecond per guest
//! instruction, so one SysTick cycle (40 ns at 25 MHz) is 40 instructions:
//! [`cycles_to_instructions`].

use core::cell::Cell;

use cortex_m::peripheral::syst::SystClkSource;
use cortex_m::peripheral::{SCB, SYST};
use critical_section::Mutex;

/// Core clock of the board, Hz.
pub const CORE_HZ: u32 = 25_000_000;
/// SysTick cycles per millisecond.
pub const CYCLES_PER_MS: u32 = CORE_HZ / 1000;
const RELOAD: u32 = CYCLES_PER_MS - 1;
/// Guest instructions per core cycle under `-icount shift=0` (1 ns each).
pub const INSTRUCTIONS_PER_CYCLE: u32 = 1_000_000_000 / CORE_HZ;

/// Milliseconds without a kick after which the watchdog stand-in resets.
pub const WATCHDOG_MS: u64 = 3_000;

static MS: Mutex<Cell<u64>> = Mutex::new(Cell::new(0));
static LAST_KICK_MS: Mutex<Cell<u64>> = Mutex::new(Cell::new(0));

/// Starts SysTick: 1 kHz interrupt from the core clock.
pub fn init(mut syst: SYST) {
    syst.set_clock_source(SystClkSource::Core);
    syst.set_reload(RELOAD);
    syst.clear_current();
    syst.enable_interrupt();
    syst.enable_counter();
    // From here on SYST is only read, through `SYST::get_current`.
}

/// Core cycles since [`init`], monotonic.
pub fn cycles() -> u64 {
    critical_section::with(|cs| {
        let ms = MS.borrow(cs).get();
        let cvr = SYST::get_current();
        // The counter may have wrapped with its interrupt still pending.
        let wrapped = SCB::is_pendst_pending() && cvr > RELOAD / 2;
        let ms = if wrapped { ms + 1 } else { ms };
        ms * u64::from(CYCLES_PER_MS) + u64::from(RELOAD - cvr)
    })
}

/// Milliseconds since [`init`] (the device's only clock).
pub fn now_ms() -> u64 {
    cycles() / u64::from(CYCLES_PER_MS)
}

/// Instructions `cycles` core cycles stand for under `-icount shift=0`.
pub fn cycles_to_instructions(cycles: u64) -> u64 {
    cycles * u64::from(INSTRUCTIONS_PER_CYCLE)
}

/// SysTick interrupt: the millisecond count and the watchdog stand-in.
pub fn on_systick() {
    let starved = critical_section::with(|cs| {
        let ms = MS.borrow(cs).get() + 1;
        MS.borrow(cs).set(ms);
        ms.saturating_sub(LAST_KICK_MS.borrow(cs).get()) > WATCHDOG_MS
    });
    if starved {
        crate::retained::reset(crate::retained::Cause::Watchdog);
    }
}

/// The watchdog stand-in: the device loop must kick it at least every
/// [`WATCHDOG_MS`], or the SysTick interrupt resets the board with reset
/// cause `Watchdog`. (mps2-an386 has a CMSDK watchdog as well; a stand-in
/// keeps the behaviour the same under every QEMU version.)
pub struct SoftWatchdog;

impl fringe_firmware::Watchdog for SoftWatchdog {
    fn kick(&mut self) {
        critical_section::with(|cs| LAST_KICK_MS.borrow(cs).set(MS.borrow(cs).get()));
    }
}
