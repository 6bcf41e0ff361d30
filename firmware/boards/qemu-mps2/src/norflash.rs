//! Emulated NOR flash in retained RAM.
//!
//! QEMU's mps2-an386 has no programmable flash (its code memory is plain
//! RAM loaded from the ELF), so the device's storage runs on
//! [`SIZE`] bytes of RAM at [`BASE`], outside what the linker uses: it keeps
//! its contents across a system reset, not across quitting QEMU. NOR rules
//! hold as on a chip: erase sets a [`ERASE_SIZE`]-byte page to `0xFF`, a
//! write can only clear bits (a write that would set one is refused, which
//! catches a double write), accesses are aligned to [`WRITE_SIZE`].

use core::ptr::{read_volatile, write_volatile};

use embedded_storage::nor_flash::{
    ErrorType, NorFlash, NorFlashError, NorFlashErrorKind, ReadNorFlash,
};

/// Start of the emulated flash.
pub const BASE: usize = 0x2020_0000;
/// Size of the emulated flash, bytes (64 pages).
pub const SIZE: usize = 256 * 1024;
/// Erase page, bytes.
pub const ERASE_SIZE: usize = 4096;
/// Write granularity, bytes.
pub const WRITE_SIZE: usize = 4;

/// Error of the emulated flash.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FlashError {
    /// Misaligned or out of range.
    Bounds,
    /// A write would set a bit that is clear (not erased).
    NotErased,
}

impl NorFlashError for FlashError {
    fn kind(&self) -> NorFlashErrorKind {
        match self {
            FlashError::Bounds => NorFlashErrorKind::OutOfBounds,
            FlashError::NotErased => NorFlashErrorKind::Other,
        }
    }
}

/// The emulated flash. Only one exists ([`RetainedFlash::take`]).
pub struct RetainedFlash {
    _private: (),
}

fn byte(i: usize) -> *mut u8 {
    (BASE + i) as *mut u8
}

impl RetainedFlash {
    /// The flash; erased entirely when `cold` (power on: RAM came up zeroed,
    /// which is not an erased NOR state).
    pub fn take(cold: bool) -> Self {
        let mut f = Self { _private: () };
        if cold {
            let _ = f.erase(0, SIZE as u32);
        }
        f
    }

    fn check(offset: u32, len: usize, align: usize) -> Result<usize, FlashError> {
        let start = offset as usize;
        let end = start.checked_add(len).ok_or(FlashError::Bounds)?;
        if end > SIZE || !start.is_multiple_of(align) || !len.is_multiple_of(align) {
            return Err(FlashError::Bounds);
        }
        Ok(start)
    }
}

impl ErrorType for RetainedFlash {
    type Error = FlashError;
}

impl ReadNorFlash for RetainedFlash {
    const READ_SIZE: usize = 1;

    fn read(&mut self, offset: u32, bytes: &mut [u8]) -> Result<(), Self::Error> {
        let start = Self::check(offset, bytes.len(), 1)?;
        for (i, b) in bytes.iter_mut().enumerate() {
            // SAFETY: within BASE..BASE+SIZE, RAM the linker never uses.
            *b = unsafe { read_volatile(byte(start + i)) };
        }
        Ok(())
    }

    fn capacity(&self) -> usize {
        SIZE
    }
}

impl NorFlash for RetainedFlash {
    const WRITE_SIZE: usize = WRITE_SIZE;
    const ERASE_SIZE: usize = ERASE_SIZE;

    fn erase(&mut self, from: u32, to: u32) -> Result<(), Self::Error> {
        let len = (to as usize)
            .checked_sub(from as usize)
            .ok_or(FlashError::Bounds)?;
        let start = Self::check(from, len, ERASE_SIZE)?;
        for i in start..start + len {
            // SAFETY: as in `read`.
            unsafe { write_volatile(byte(i), 0xFF) };
        }
        Ok(())
    }

    fn write(&mut self, offset: u32, bytes: &[u8]) -> Result<(), Self::Error> {
        let start = Self::check(offset, bytes.len(), WRITE_SIZE)?;
        // NOR: a write only clears bits. Check the whole write first.
        for (i, &b) in bytes.iter().enumerate() {
            // SAFETY: as in `read`.
            let old = unsafe { read_volatile(byte(start + i)) };
            if b & !old != 0 {
                return Err(FlashError::NotErased);
            }
        }
        for (i, &b) in bytes.iter().enumerate() {
            // SAFETY: as in `read`.
            unsafe { write_volatile(byte(start + i), b) };
        }
        Ok(())
    }
}
