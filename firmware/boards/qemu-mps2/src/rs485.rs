//! UART1 (CMSDK APB UART at `0x4000_5000`, receive interrupt IRQ 2) as
//! the Modbus RTU line: received bytes go into a ring with the time they
//! arrived (for the slave's 3.5-character frame end), sent bytes leave
//! through [`Tx`] (`embedded-io` 0.7 `Write`).
//!
//! Registers as in `uart.rs` (the board's README.md). QEMU's CMSDK UART
//! models no baud rate: a byte arrives whole when the pty delivers it and
//! leaves at once, so `BAUDDIV` only has to be valid and [`Tx::flush`] has
//! no stop bit to wait for (it waits for the transmitter to take the last
//! byte). There is no transceiver either: the driver-enable pin is
//! [`NoDriverEnable`], which only counts its edges.
//!
//! **Times.** The ring stores the low 24 bits of the microsecond count
//! ([`crate::clock::cycles`] / 25) at the interrupt beside each byte, 4
//! bytes an entry; [`take`] puts the full time back from the present one
//! (right as long as a byte waits less than 16.7 s, far beyond the
//! watchdog's 3 s);
//! with `-icount shift=0` virtual time is one nanosecond per instruction
//! while the core runs and jumps ahead while it sleeps (`sleep=off`), so
//! the main loop does not sleep while a frame is in progress (see
//! `main.rs`).

use core::cell::RefCell;
use core::ptr::{read_volatile, write_volatile};
use core::sync::atomic::{AtomicU32, Ordering};

use critical_section::Mutex;
use fringe_firmware::modbus::SerialLine;
use heapless::Deque;

/// UART1 base address.
pub const UART1: usize = 0x4000_5000;
/// NVIC number of UART1's receive interrupt (mps2-an386: UART n RX is
/// IRQ 2n for n = 0, 1, 2).
pub const UART1_RX_IRQ: u16 = 2;
/// Bytes (with their times) the receive ring holds: a whole RTU frame.
pub const RX_RING: usize = 256;

const DATA: usize = 0x00;
const STATE: usize = 0x04;
const CTRL: usize = 0x08;
const INTCLEAR: usize = 0x0C;
const BAUDDIV: usize = 0x10;

const STATE_TX_FULL: u32 = 1 << 0;
const STATE_RX_FULL: u32 = 1 << 1;
const CTRL_TX_EN: u32 = 1 << 0;
const CTRL_RX_EN: u32 = 1 << 1;
const CTRL_RX_IRQ: u32 = 1 << 3;
const INT_RX: u32 = 1 << 1;

/// Received bytes with their arrival time: `us24 << 8 | byte`.
static RX: Mutex<RefCell<Deque<u32, RX_RING>>> = Mutex::new(RefCell::new(Deque::new()));
const US_MASK: u64 = 0xFF_FFFF;
/// Bytes lost because the ring was full (the slave is told: line error).
static OVERRUNS: AtomicU32 = AtomicU32::new(0);

fn reg(off: usize) -> *mut u32 {
    (UART1 + off) as *mut u32
}

fn read(off: usize) -> u32 {
    // SAFETY: a valid, aligned MMIO register of UART1.
    unsafe { read_volatile(reg(off)) }
}

fn write(off: usize, v: u32) {
    // SAFETY: as above.
    unsafe { write_volatile(reg(off), v) }
}

/// Sets UART1 up for `line` and enables its transmitter, receiver and
/// receive interrupt; called again when the device's Modbus settings
/// change. The baud divisor follows the baud rate (core clock / baud, as
/// on the real part); the CMSDK UART has no parity or stop-bit setting at
/// all (8N1 only in the hardware, and QEMU models no line timing), so on
/// this board parity and stop bits are not applied: only the slave's unit
/// id and frame gap change.
pub fn init(line: &SerialLine) {
    let bauddiv = crate::clock::CORE_HZ / line.baud.max(1);
    write(CTRL, 0);
    write(BAUDDIV, bauddiv.max(16));
    write(INTCLEAR, 0xF);
    write(CTRL, CTRL_TX_EN | CTRL_RX_EN | CTRL_RX_IRQ);
}

/// UART1 receive interrupt: timestamps each byte into the ring. The
/// interrupt is cleared before the data register is drained, so a byte
/// that arrives while draining raises it again instead of waiting unseen
/// in the register (QEMU delivers the next byte only once the last one
/// was read).
pub fn on_rx_interrupt() {
    let us = (crate::clock::cycles() / u64::from(crate::clock::CORE_HZ / 1_000_000)) & US_MASK;
    critical_section::with(|cs| {
        write(INTCLEAR, INT_RX);
        let mut ring = RX.borrow_ref_mut(cs);
        while read(STATE) & STATE_RX_FULL != 0 {
            let b = read(DATA) as u8;
            if ring.push_back((us as u32) << 8 | u32::from(b)).is_err() {
                OVERRUNS.fetch_add(1, Ordering::Relaxed);
            }
        }
    });
}

/// What the ring holds next: a byte with its time, or lost bytes.
pub enum Rx {
    /// A byte and its arrival, microseconds since boot.
    Byte(u64, u8),
    /// Bytes were lost to a full ring.
    Lost,
}

/// Takes the oldest received byte (or a report of lost bytes); `now_us`
/// is the present time, microseconds since boot.
pub fn take(now_us: u64) -> Option<Rx> {
    if OVERRUNS.swap(0, Ordering::Relaxed) > 0 {
        return Some(Rx::Lost);
    }
    let e = critical_section::with(|cs| RX.borrow_ref_mut(cs).pop_front())?;
    // (A byte stamped after `now_us` was read is taken as arrived now.)
    let at = fringe_firmware::modbus::arrival_us(now_us, u64::from(e >> 8), US_MASK);
    Some(Rx::Byte(at, e as u8))
}

/// Whether received bytes wait in the ring.
pub fn rx_waiting() -> bool {
    critical_section::with(|cs| !RX.borrow_ref(cs).is_empty())
}

/// UART1's transmit side.
pub struct Tx;

impl embedded_io::ErrorType for Tx {
    type Error = core::convert::Infallible;
}

impl embedded_io::Write for Tx {
    fn write(&mut self, buf: &[u8]) -> Result<usize, Self::Error> {
        for &b in buf {
            while read(STATE) & STATE_TX_FULL != 0 {}
            write(DATA, u32::from(b));
        }
        Ok(buf.len())
    }

    /// Waits until the transmitter has taken the last byte (QEMU sends it
    /// at once; a real UART would wait for its last stop bit here).
    fn flush(&mut self) -> Result<(), Self::Error> {
        while read(STATE) & STATE_TX_FULL != 0 {}
        Ok(())
    }
}

/// The driver-enable "pin" of a board without a transceiver: counts its
/// rising edges (frames sent), drives nothing.
#[derive(Default)]
pub struct NoDriverEnable {
    /// Times it was asserted.
    pub asserted: u32,
}

impl embedded_hal::digital::ErrorType for NoDriverEnable {
    type Error = core::convert::Infallible;
}

impl embedded_hal::digital::OutputPin for NoDriverEnable {
    fn set_low(&mut self) -> Result<(), Self::Error> {
        Ok(())
    }

    fn set_high(&mut self) -> Result<(), Self::Error> {
        self.asserted = self.asserted.wrapping_add(1);
        Ok(())
    }
}
