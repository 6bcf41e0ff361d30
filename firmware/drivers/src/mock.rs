//! Test doubles beyond `embedded-hal-mock` 0.11, whose SPI mock cannot
//! return an error.

use embedded_hal::spi::{ErrorKind, ErrorType, Operation, SpiDevice};

/// A delay that returns at once (the drivers' waits are not under test here).
pub use embedded_hal_mock::eh1::delay::NoopDelay as NoDelay;

/// An SPI device whose first `ok` transactions succeed (reads give zeros)
/// and every later one fails with [`ErrorKind::Other`]: a bus that breaks.
#[derive(Debug, Clone)]
pub struct FailingSpi {
    ok: usize,
    /// Transactions attempted.
    pub seen: usize,
}

impl FailingSpi {
    /// Fails from transaction number `ok` (counting from 0) on.
    pub fn after(ok: usize) -> Self {
        Self { ok, seen: 0 }
    }
}

impl ErrorType for FailingSpi {
    type Error = ErrorKind;
}

impl SpiDevice for FailingSpi {
    fn transaction(&mut self, ops: &mut [Operation<'_, u8>]) -> Result<(), ErrorKind> {
        self.seen += 1;
        if self.seen > self.ok {
            return Err(ErrorKind::Other);
        }
        for op in ops {
            match op {
                Operation::Read(b) | Operation::TransferInPlace(b) => b.fill(0),
                Operation::Transfer(r, _) => r.fill(0),
                _ => {}
            }
        }
        Ok(())
    }
}
