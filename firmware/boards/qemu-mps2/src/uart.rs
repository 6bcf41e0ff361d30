//! CMSDK APB UART (UART0 of the MPS2 board), `embedded-io` over an
//! interrupt-filled receive ring.
//!
//! Registers (ARM CMSDK technical reference; as QEMU's `cmsdk-apb-uart`
//! models them, see the board's README.md):
//!
//! ```text
//! base + 0x00 DATA        byte in/out
//! base + 0x04 STATE       bit0 TX full, bit1 RX full
//! base + 0x08 CTRL        bit0 TX enable, bit1 RX enable, bit2 TX irq, bit3 RX irq
//! base + 0x0C INTSTATUS   (write 1 to clear) bit0 TX, bit1 RX
//! base + 0x10 BAUDDIV     >= 16
//! ```
//!
//! **Nothing the host sends is dropped.** The RX interrupt moves bytes into
//! a [`RX_RING`]-byte ring. When the ring is full the handler leaves the byte
//! in DATA and masks its interrupt; the UART then holds it (QEMU stops
//! taking bytes from the pty, a real UART would assert RTS), and the next
//! [`Uart::read`] drains the ring and unmasks. Transmit polls TX full.

use core::cell::RefCell;
use core::ptr::{read_volatile, write_volatile};

use critical_section::Mutex;
use heapless::Deque;

/// UART0 base address.
pub const UART0: usize = 0x4000_4000;
/// Bytes the receive ring holds.
pub const RX_RING: usize = 1024;

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

/// NVIC number of UART0's receive interrupt.
pub const UART0_RX_IRQ: u16 = 0;

static RX: Mutex<RefCell<Deque<u8, RX_RING>>> = Mutex::new(RefCell::new(Deque::new()));

fn reg(off: usize) -> *mut u32 {
    (UART0 + off) as *mut u32
}

fn read(off: usize) -> u32 {
    // SAFETY: a valid, aligned MMIO register of UART0.
    unsafe { read_volatile(reg(off)) }
}

fn write(off: usize, v: u32) {
    // SAFETY: as above.
    unsafe { write_volatile(reg(off), v) }
}

/// The board's serial port (UART0).
pub struct Uart {
    _private: (),
}

impl Uart {
    /// Sets the baud divisor, enables TX, RX and the RX interrupt.
    /// `bauddiv` = core clock / baud (25 MHz / 115200 = 217).
    pub fn init(bauddiv: u32) -> Self {
        write(CTRL, 0);
        write(BAUDDIV, bauddiv.max(16));
        write(INTCLEAR, 0xF);
        write(CTRL, CTRL_TX_EN | CTRL_RX_EN | CTRL_RX_IRQ);
        Self { _private: () }
    }

    /// Bytes waiting in the ring or the UART (without blocking).
    pub fn rx_waiting(&self) -> bool {
        critical_section::with(|cs| !RX.borrow_ref(cs).is_empty())
            || read(STATE) & STATE_RX_FULL != 0
    }

    /// Moves waiting bytes into `buf` without blocking; returns how many.
    pub fn read_nonblocking(&mut self, buf: &mut [u8]) -> usize {
        critical_section::with(|cs| {
            let mut ring = RX.borrow_ref_mut(cs);
            let mut n = 0;
            for slot in buf.iter_mut() {
                // The ring first (older bytes), then a byte held in DATA.
                if let Some(b) = ring.pop_front() {
                    *slot = b;
                } else if read(STATE) & STATE_RX_FULL != 0 {
                    *slot = read(DATA) as u8;
                } else {
                    break;
                }
                n += 1;
            }
            // Room again: let the interrupt fill the ring.
            if !ring.is_full() {
                write(CTRL, read(CTRL) | CTRL_RX_IRQ);
            }
            n
        })
    }

    /// Sends one byte, waiting while the transmitter is full.
    pub fn write_byte(&mut self, b: u8) {
        write_byte_raw(b);
    }
}

/// Sends one byte on UART0 without a [`Uart`] (the panic handler's path).
pub fn write_byte_raw(b: u8) {
    while read(STATE) & STATE_TX_FULL != 0 {}
    write(DATA, u32::from(b));
}

/// UART0 RX interrupt: moves received bytes into the ring (see the module doc).
pub fn on_rx_interrupt() {
    critical_section::with(|cs| {
        let mut ring = RX.borrow_ref_mut(cs);
        while read(STATE) & STATE_RX_FULL != 0 {
            if ring.is_full() {
                // Keep the byte in the UART; mask until the ring drains.
                write(CTRL, read(CTRL) & !CTRL_RX_IRQ);
                break;
            }
            let _ = ring.push_back(read(DATA) as u8);
        }
        write(INTCLEAR, INT_RX);
    });
}

impl embedded_io::ErrorType for Uart {
    type Error = core::convert::Infallible;
}

impl embedded_io::Read for Uart {
    /// Blocks until at least one byte is there (the `embedded-io` contract);
    /// the device loop uses [`Uart::read_nonblocking`] instead.
    fn read(&mut self, buf: &mut [u8]) -> Result<usize, Self::Error> {
        if buf.is_empty() {
            return Ok(0);
        }
        loop {
            let n = self.read_nonblocking(buf);
            if n > 0 {
                return Ok(n);
            }
            cortex_m::asm::wfi();
        }
    }
}

impl embedded_io::ReadReady for Uart {
    fn read_ready(&mut self) -> Result<bool, Self::Error> {
        Ok(self.rx_waiting())
    }
}

impl embedded_io::Write for Uart {
    fn write(&mut self, buf: &[u8]) -> Result<usize, Self::Error> {
        for &b in buf {
            self.write_byte(b);
        }
        Ok(buf.len())
    }

    fn flush(&mut self) -> Result<(), Self::Error> {
        Ok(())
    }
}
