//! Panic handler: reports over UART0, then resets with reset cause `Panic`
//! (the next boot's `Boot` event carries it to the host).
//!
//! The report is plain text between two `0x00` bytes, so a host's frame
//! decoder counts it as one bad frame and resynchronises, while a person on
//! a terminal reads it: `PANIC at src/main.rs:42: boot failed: ...`.

use core::fmt::Write;
use core::panic::PanicInfo;

struct Raw;

impl Write for Raw {
    fn write_str(&mut self, s: &str) -> core::fmt::Result {
        for b in s.bytes() {
            // Never a zero inside the report (it would split it).
            crate::uart::write_byte_raw(if b == 0 { b'?' } else { b });
        }
        Ok(())
    }
}

#[panic_handler]
fn panic(info: &PanicInfo) -> ! {
    cortex_m::interrupt::disable();
    crate::uart::write_byte_raw(0);
    let mut w = Raw;
    let _ = w.write_str("PANIC");
    if let Some(loc) = info.location() {
        let _ = write!(w, " at {}:{}", loc.file(), loc.line());
    }
    let _ = write!(w, ": {}\r\n", info.message());
    crate::uart::write_byte_raw(0);
    crate::retained::reset(crate::retained::Cause::Panic)
}
