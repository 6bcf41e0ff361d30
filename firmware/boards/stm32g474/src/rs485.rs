//! USART2 as the Modbus RTU line on RS-485: a receive interrupt that
//! timestamps every byte (and every parity, framing, noise or overrun
//! error) into a ring for the slave's 3.5-character frame end. Transmit is
//! `embassy-stm32`'s blocking `UartTx` (its flush waits for the
//! transmission-complete flag, so the driver enable drops after the last
//! stop bit) behind the core's `HalfDuplex`.
//!
//! Registers (RM0440, USART ISR/ICR/RDR, from memory; through
//! `embassy-stm32`'s PAC): RXNE, PE, FE, NE, ORE in ISR, cleared in ICR;
//! RDR read clears RXNE. Not run on hardware.
//!
//! Ring entries are `us23 << 9 | error << 8 | byte`: the low 23 bits of the
//! microsecond clock (`embassy-time`, 1 MHz ticks), put back whole by
//! [`take`] as long as an entry waits less than 8.3 s (the watchdog resets
//! the board after 2 s without a poll).

use core::cell::RefCell;

use critical_section::Mutex;
use embassy_stm32::interrupt::typelevel::{Handler, USART2};
use embassy_stm32::pac;
use embassy_time::Instant;
use heapless::Deque;

/// Entries the ring holds: one whole RTU frame.
pub const RX_RING: usize = 256;
const US_MASK: u64 = (1 << 23) - 1;
const ERROR: u32 = 1 << 8;

static RX: Mutex<RefCell<Deque<u32, RX_RING>>> = Mutex::new(RefCell::new(Deque::new()));

/// USART2's interrupt, bound in `main.rs`.
pub struct RxInterrupt;

impl Handler<USART2> for RxInterrupt {
    unsafe fn on_interrupt() {
        let us = (Instant::now().as_micros() & US_MASK) as u32;
        let r = pac::USART2;
        let isr = r.isr().read();
        let error = isr.pe() || isr.fe() || isr.ne() || isr.ore();
        if error {
            r.icr().write(|w| {
                w.set_pe(true);
                w.set_fe(true);
                w.set_ne(true);
                w.set_ore(true);
            });
        }
        let byte = isr.rxne().then(|| r.rdr().read().dr() as u8);
        if !(error || byte.is_some()) {
            return;
        }
        let entry = us << 9 | if error { ERROR } else { 0 } | u32::from(byte.unwrap_or(0));
        critical_section::with(|cs| {
            let mut ring = RX.borrow_ref_mut(cs);
            if ring.push_back(entry).is_err() {
                // Full: the newest entry becomes an error, so the frame
                // it belongs to is dropped rather than answered wrongly.
                if let Some(last) = ring.back_mut() {
                    *last |= ERROR;
                }
            }
        });
    }
}

/// Enables USART2's receive and error interrupts (after the UART is
/// configured).
pub fn enable_rx_interrupt() {
    use embassy_stm32::interrupt::InterruptExt;
    let r = pac::USART2;
    r.cr1().modify(|w| {
        w.set_rxneie(true);
        w.set_peie(true);
    });
    r.cr3().modify(|w| w.set_eie(true));
    embassy_stm32::interrupt::USART2.unpend();
    // SAFETY: the handler only touches the ring, behind a critical section.
    unsafe { embassy_stm32::interrupt::USART2.enable() };
}

/// What the ring holds next.
pub enum Rx {
    /// A byte and its arrival, microseconds.
    Byte(u64, u8),
    /// A damaged character (parity, framing, noise, overrun) and its time.
    Error(u64),
}

/// Takes the oldest entry; `now_us` is the present time.
pub fn take(now_us: u64) -> Option<Rx> {
    let e = critical_section::with(|cs| RX.borrow_ref_mut(cs).pop_front())?;
    // (A byte stamped after `now_us` was read is taken as arrived now.)
    let at = fringe_firmware::modbus::arrival_us(now_us, u64::from(e >> 9), US_MASK);
    Some(if e & ERROR != 0 {
        Rx::Error(at)
    } else {
        Rx::Byte(at, e as u8)
    })
}
