//! A RAM-backed NOR flash with NOR rules and power-cut injection, and the
//! blocking adapter that lets `sequential-storage` (async) run on a blocking
//! `embedded-storage` [`NorFlash`].
//!
//! [`RamFlash`] behaves as NOR flash does: erase sets a page to `0xFF`, a
//! write can only clear bits (a write that would set a bit is refused, which
//! catches a double write of a word), accesses must be aligned. A power cut
//! can be armed to strike at the `n`-th mutating operation (write or erase):
//! that operation is left half done (a write keeps its first half of words,
//! an erase leaves the page's first half erased and the rest as it was) and
//! every later mutating operation fails, as if the chip had lost power. A
//! test then takes the bytes ([`RamFlash::restart`]) and boots again.

use core::future::Future;
use core::pin::pin;
use core::task::{Context, Poll, Waker};

use embedded_storage::nor_flash::{
    ErrorType, NorFlash, NorFlashError, NorFlashErrorKind, ReadNorFlash,
};

/// Write granularity of [`RamFlash`], bytes.
pub const RAM_WRITE_SIZE: usize = 4;
/// Erase granularity (page) of [`RamFlash`], bytes.
pub const RAM_ERASE_SIZE: usize = 4096;

/// Error of [`RamFlash`].
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum RamFlashError {
    /// Misaligned or out-of-range access.
    Bounds,
    /// A write would have set a bit (NOR can only clear bits between erases).
    NotErased,
    /// The power was cut (injected): the chip does not answer until restart.
    PowerCut,
}

impl core::fmt::Display for RamFlashError {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        match self {
            RamFlashError::Bounds => write!(f, "flash access misaligned or out of range"),
            RamFlashError::NotErased => write!(f, "flash write to a word that is not erased"),
            RamFlashError::PowerCut => write!(f, "flash lost power"),
        }
    }
}

impl core::error::Error for RamFlashError {}

impl NorFlashError for RamFlashError {
    fn kind(&self) -> NorFlashErrorKind {
        match self {
            RamFlashError::Bounds => NorFlashErrorKind::OutOfBounds,
            _ => NorFlashErrorKind::Other,
        }
    }
}

/// NOR flash of `N` bytes in RAM (`N` a multiple of [`RAM_ERASE_SIZE`]).
#[derive(Clone)]
pub struct RamFlash<const N: usize> {
    mem: [u8; N],
    /// Mutating operations left before the injected cut (`None`: never).
    cut_after: Option<u32>,
    dead: bool,
    writes: u32,
    erases: u32,
}

impl<const N: usize> core::fmt::Debug for RamFlash<N> {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        f.debug_struct("RamFlash")
            .field("bytes", &N)
            .field("writes", &self.writes)
            .field("erases", &self.erases)
            .field("cut_after", &self.cut_after)
            .field("dead", &self.dead)
            .finish()
    }
}

impl<const N: usize> Default for RamFlash<N> {
    fn default() -> Self {
        Self::new()
    }
}

impl<const N: usize> RamFlash<N> {
    const CHECK: () = assert!(
        N.is_multiple_of(RAM_ERASE_SIZE) && N >= 4 * RAM_ERASE_SIZE,
        "RamFlash size must be a multiple of the page size and at least 4 pages"
    );

    /// An erased flash (all `0xFF`), usable in a `static`.
    pub const fn new() -> Self {
        #[allow(clippy::let_unit_value)]
        let () = Self::CHECK;
        Self {
            mem: [0xFF; N],
            cut_after: None,
            dead: false,
            writes: 0,
            erases: 0,
        }
    }

    /// Arms a power cut: the `n`-th mutating operation from now (0 = the
    /// next one) is left half done and all later ones fail.
    pub fn cut_power_after(&mut self, n: u32) {
        self.cut_after = Some(n);
    }

    /// Whether the injected cut has struck.
    pub fn power_cut_happened(&self) -> bool {
        self.dead
    }

    /// Power back on: clears the cut and the armed trigger, keeps the bytes.
    pub fn restart(&mut self) {
        self.dead = false;
        self.cut_after = None;
    }

    /// Writes and erases done so far.
    pub fn op_counts(&self) -> (u32, u32) {
        (self.writes, self.erases)
    }

    /// The raw contents.
    pub fn bytes(&self) -> &[u8; N] {
        &self.mem
    }

    /// Whether this operation is the one the cut strikes (and marks it).
    fn strike(&mut self) -> Result<bool, RamFlashError> {
        if self.dead {
            return Err(RamFlashError::PowerCut);
        }
        match self.cut_after {
            Some(0) => {
                self.dead = true;
                self.cut_after = None;
                Ok(true)
            }
            Some(n) => {
                self.cut_after = Some(n - 1);
                Ok(false)
            }
            None => Ok(false),
        }
    }

    fn range(
        &self,
        offset: u32,
        len: usize,
        align: usize,
    ) -> Result<core::ops::Range<usize>, RamFlashError> {
        let start = offset as usize;
        let end = start.checked_add(len).ok_or(RamFlashError::Bounds)?;
        if !start.is_multiple_of(align) || !len.is_multiple_of(align) || end > N {
            return Err(RamFlashError::Bounds);
        }
        Ok(start..end)
    }
}

impl<const N: usize> ErrorType for RamFlash<N> {
    type Error = RamFlashError;
}

impl<const N: usize> ReadNorFlash for RamFlash<N> {
    const READ_SIZE: usize = 1;

    fn read(&mut self, offset: u32, bytes: &mut [u8]) -> Result<(), Self::Error> {
        let r = self.range(offset, bytes.len(), 1)?;
        bytes.copy_from_slice(self.mem.get(r).ok_or(RamFlashError::Bounds)?);
        Ok(())
    }

    fn capacity(&self) -> usize {
        N
    }
}

impl<const N: usize> NorFlash for RamFlash<N> {
    const WRITE_SIZE: usize = RAM_WRITE_SIZE;
    const ERASE_SIZE: usize = RAM_ERASE_SIZE;

    fn erase(&mut self, from: u32, to: u32) -> Result<(), Self::Error> {
        if to < from {
            return Err(RamFlashError::Bounds);
        }
        let r = self.range(from, (to - from) as usize, RAM_ERASE_SIZE)?;
        let cut = self.strike()?;
        self.erases = self.erases.wrapping_add(1);
        let mem = self.mem.get_mut(r).ok_or(RamFlashError::Bounds)?;
        let upto = if cut { mem.len() / 2 } else { mem.len() };
        mem.iter_mut().take(upto).for_each(|b| *b = 0xFF);
        if cut {
            Err(RamFlashError::PowerCut)
        } else {
            Ok(())
        }
    }

    fn write(&mut self, offset: u32, bytes: &[u8]) -> Result<(), Self::Error> {
        let r = self.range(offset, bytes.len(), RAM_WRITE_SIZE)?;
        let mem = self.mem.get(r.clone()).ok_or(RamFlashError::Bounds)?;
        if mem.iter().zip(bytes).any(|(&old, &new)| new & !old != 0) {
            return Err(RamFlashError::NotErased);
        }
        let cut = self.strike()?;
        self.writes = self.writes.wrapping_add(1);
        let words = bytes.len() / RAM_WRITE_SIZE;
        let upto = if cut {
            (words / 2) * RAM_WRITE_SIZE
        } else {
            bytes.len()
        };
        let mem = self.mem.get_mut(r).ok_or(RamFlashError::Bounds)?;
        for (m, &b) in mem.iter_mut().zip(bytes).take(upto) {
            *m &= b;
        }
        if cut {
            Err(RamFlashError::PowerCut)
        } else {
            Ok(())
        }
    }
}

/// Async view of a blocking [`NorFlash`] (every operation completes at once).
#[derive(Debug)]
pub struct Blocking<'a, S>(pub &'a mut S);

impl<S: NorFlash> embedded_storage_async::nor_flash::ErrorType for Blocking<'_, S> {
    type Error = S::Error;
}

impl<S: NorFlash> embedded_storage_async::nor_flash::ReadNorFlash for Blocking<'_, S> {
    const READ_SIZE: usize = S::READ_SIZE;
    async fn read(&mut self, offset: u32, bytes: &mut [u8]) -> Result<(), Self::Error> {
        self.0.read(offset, bytes)
    }
    fn capacity(&self) -> usize {
        self.0.capacity()
    }
}

impl<S: NorFlash> embedded_storage_async::nor_flash::NorFlash for Blocking<'_, S> {
    const WRITE_SIZE: usize = S::WRITE_SIZE;
    const ERASE_SIZE: usize = S::ERASE_SIZE;
    async fn erase(&mut self, from: u32, to: u32) -> Result<(), Self::Error> {
        self.0.erase(from, to)
    }
    async fn write(&mut self, offset: u32, bytes: &[u8]) -> Result<(), Self::Error> {
        self.0.write(offset, bytes)
    }
}

/// Most polls [`block_on`] gives a future before giving up.
const MAX_POLLS: u32 = 1_000_000;

/// Runs a future that never waits on anything external (sequential-storage
/// over [`Blocking`]) to completion with a no-op waker. Returns `None` if it
/// were ever to stay pending for [`MAX_POLLS`] polls (it cannot over
/// [`Blocking`], whose futures are ready at the first poll).
pub fn block_on<F: Future>(fut: F) -> Option<F::Output> {
    let mut fut = pin!(fut);
    let mut cx = Context::from_waker(Waker::noop());
    for _ in 0..MAX_POLLS {
        if let Poll::Ready(v) = fut.as_mut().poll(&mut cx) {
            return Some(v);
        }
    }
    None
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn nor_rules() {
        let mut f = RamFlash::<{ 4 * 4096 }>::new();
        f.write(0, &[0x0F, 0xF0, 0xFF, 0x00]).unwrap();
        // Clearing more bits is fine, setting one is not.
        f.write(0, &[0x0E, 0xF0, 0xFF, 0x00]).unwrap();
        assert_eq!(
            f.write(0, &[0x1F, 0xF0, 0xFF, 0x00]),
            Err(RamFlashError::NotErased)
        );
        assert_eq!(f.write(2, &[0; 4]), Err(RamFlashError::Bounds));
        assert_eq!(f.erase(0, 100), Err(RamFlashError::Bounds));
        f.erase(0, 4096).unwrap();
        let mut b = [0u8; 4];
        f.read(0, &mut b).unwrap();
        assert_eq!(b, [0xFF; 4]);
    }

    #[test]
    fn power_cut_leaves_half_and_kills_the_rest() {
        let mut f = RamFlash::<{ 4 * 4096 }>::new();
        f.cut_power_after(1);
        f.write(0, &[0; 8]).unwrap();
        assert_eq!(f.write(8, &[0; 16]), Err(RamFlashError::PowerCut));
        assert!(f.power_cut_happened());
        assert_eq!(f.write(64, &[0; 4]), Err(RamFlashError::PowerCut));
        assert_eq!(
            &f.bytes()[8..24],
            &[0, 0, 0, 0, 0, 0, 0, 0, 255, 255, 255, 255, 255, 255, 255, 255]
        );
        f.restart();
        f.write(64, &[0; 4]).unwrap();
    }

    #[test]
    fn block_on_runs_ready_futures() {
        assert_eq!(block_on(async { 7 }), Some(7));
    }
}
