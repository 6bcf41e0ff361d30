//! What the board measures about itself: stack use (painting) and the
//! cost of one reading.
//!
//! **Stack.** The stack grows down from the top of RAM (`_stack_start`,
//! cortex-m-rt). At boot [`paint_stack`] fills the [`STACK_BYTES`] below the
//! top (minus what is already in use) with [`PAINT`]; [`stack_free_bytes`]
//! counts the words still painted from the bottom up. The high-water mark is
//! `STACK_BYTES - free`. Nothing else lives in that range: it lies 2 MiB
//! above the data and bss sections (memory.x).
//!
//! **Cost of a reading.** [`Timed`] wraps the front end and adds up the
//! cycles spent inside it: on this board that is the simulator computing
//! ADC samples, on a real board the wait for the ADC's DMA. The device loop
//! adds up the cycles of every poll that did measurement work, minus those,
//! until a reading is finished: what remains is the firmware's own work from
//! demodulation to the frame (demodulation, cell model, inversion, estimate,
//! log write, encoding).

use core::ptr::{addr_of, read_volatile, write_volatile};

use fringe_firmware::hal::{Frontend, FrontendError, FrontendInfo, Input, RECORD_LEN};

/// Bytes of stack painted and watched.
pub const STACK_BYTES: usize = 64 * 1024;
/// The paint pattern.
pub const PAINT: u32 = 0xDEAD_BEEF;

extern "C" {
    static _stack_start: u32;
}

fn stack_top() -> usize {
    // Only the symbol's address is taken (cortex-m-rt defines it).
    addr_of!(_stack_start) as usize
}

fn stack_bottom() -> usize {
    stack_top() - STACK_BYTES
}

/// Paints the unused part of the stack. Call first thing in `main`.
#[inline(never)]
pub fn paint_stack() {
    // Leave a margin below the current frame (this function's own).
    let sp = cortex_m::register::msp::read() as usize - 64;
    let mut a = stack_bottom();
    while a < sp {
        // SAFETY: below the live stack, inside RAM reserved for the stack.
        unsafe { write_volatile(a as *mut u32, PAINT) };
        a += 4;
    }
}

/// Stack bytes never touched since [`paint_stack`].
pub fn stack_free_bytes() -> u32 {
    let mut a = stack_bottom();
    let top = stack_top();
    // SAFETY: reads within the stack region, word aligned.
    while a < top && unsafe { read_volatile(a as *const u32) } == PAINT {
        a += 4;
    }
    (a - stack_bottom()) as u32
}

/// A front end that counts the cycles spent inside it (see the module doc).
pub struct Timed<F> {
    inner: F,
    /// Core cycles spent in the front end so far.
    pub cycles: u64,
    /// Calls that did acquisition work (acquire, temperature).
    pub acquisitions: u32,
}

impl<F> Timed<F> {
    /// Wraps `inner`.
    pub fn new(inner: F) -> Self {
        Self {
            inner,
            cycles: 0,
            acquisitions: 0,
        }
    }

    fn time<T>(&mut self, f: impl FnOnce(&mut F) -> T) -> T {
        let t0 = crate::clock::cycles();
        let r = f(&mut self.inner);
        self.cycles += crate::clock::cycles() - t0;
        r
    }
}

impl<F: Frontend> Frontend for Timed<F> {
    fn info(&self) -> FrontendInfo {
        self.inner.info()
    }
    fn transimpedance_ohm(&self, freq_hz: f32) -> f32 {
        self.inner.transimpedance_ohm(freq_hz)
    }
    fn set_excitation(&mut self, freq_hz: f32, amplitude_v: f32) -> Result<(), FrontendError> {
        self.time(|f| f.set_excitation(freq_hz, amplitude_v))
    }
    fn select_input(&mut self, input: Input) -> Result<(), FrontendError> {
        self.time(|f| f.select_input(input))
    }
    fn acquire(
        &mut self,
        sensor: &mut [i16; RECORD_LEN],
        reference: &mut [i16; RECORD_LEN],
    ) -> Result<(), FrontendError> {
        self.acquisitions += 1;
        self.time(|f| f.acquire(sensor, reference))
    }
    fn read_temperature_raw(&mut self) -> Result<u32, FrontendError> {
        self.acquisitions += 1;
        self.time(|f| f.read_temperature_raw())
    }
}
