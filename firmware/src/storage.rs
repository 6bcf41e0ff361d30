//! Flash storage on any `embedded-storage` [`NorFlash`], through
//! `sequential-storage` (CRC-protected items, power-fail safe, wear levelled).
//!
//! ## Layout
//! ```text
//! page 0              M              M+E                        capacity
//! | settings map (M)  | event queue (E) | reading log queue (rest)       |
//! ```
//! `M` is 4 pages (3 below 12 pages), `E` 2 pages; at least 8 pages in all.
//! The settings map holds, under one-byte keys, postcard-encoded values:
//!
//! | key | value |
//! | --- | --- |
//! | 0 | identity: serial (<= 16 bytes) and the 32-byte write key |
//! | 1 | boot counter, `u32` |
//! | 2 | write counter (highest accepted), `u32` |
//! | 3 | cell calibration [`CellCal`] |
//! | 4 | active product slot, `Option<u8>` |
//! | 5 | 4-20 mA configuration [`fringe_protocol::OutputConfig`] (protocol 1.0; read at boot when 7 is absent) |
//! | 6 | self-test scratch value (written at most once a boot) |
//! | 7 | device settings [`fringe_protocol::Settings`] (tag, interval, span, failure level, stale timeout) |
//! | 8 | Modbus RTU settings [`fringe_protocol::ModbusSettings`] (unit id, baud rate, parity; protocol 1.2: absent on flash written by older firmware, which reads as the defaults; absent after being written, they are taken back from the newest `ModbusChanged` event: `Storage::newest_logged_modbus`) |
//! | 9 | the first event number of the latest boot, `u32` (written at each boot; an event ring erased as damaged numbers on past it) |
//! | 16..=23 | product calibration slot 0..=7, `Option<ProductCal>` |
//!
//! One map item is written atomically (a power cut leaves the old value or
//! the new one: the item's CRC decides), so a calibration is never a mix.
//! The two queues are rings: when full, the oldest page is erased. The
//! reading log holds [`Storage::log_capacity`] readings at least (56 per
//! 4 KiB page at the largest reading size, one page kept free for the ring):
//! 64 KiB flash 504, 256 KiB 3 192, 1 MiB 13 944 (printed by the `reading`
//! bench). The device logs every reading of its schedule: at one reading a
//! second the 256 KiB log spans about 53 minutes and each of its pages is
//! erased about 0.9 times an hour (`flash_wear` bench, BENCHMARKS.md); set
//! the interval ([`fringe_protocol::Settings`]) and
//! [`crate::DeviceConfig::log_readings`] to suit the flash's endurance.

use core::ops::Range;

use embedded_storage::nor_flash::{NorFlash, NorFlashError, NorFlashErrorKind};
use fringe_protocol::{
    CellCal, Event, ProductCal, Reading, Seq, EVENT_CHUNK, LOG_CHUNK, N_PRODUCT_SLOTS,
};
use heapless::Vec;
use sequential_storage::cache::Cache;
use sequential_storage::map::{MapConfig, MapStorage, SerializationError, Value};
use sequential_storage::queue::{QueueConfig, QueueStorage};
use serde::{de::DeserializeOwned, Serialize};

use crate::flash::{block_on, Blocking};

/// Map keys.
pub mod key {
    /// Serial and write key.
    pub const IDENTITY: u8 = 0;
    /// Boot counter.
    pub const BOOT: u8 = 1;
    /// Write counter.
    pub const WRITE_COUNTER: u8 = 2;
    /// Cell calibration.
    pub const CELL_CAL: u8 = 3;
    /// Active product slot.
    pub const ACTIVE_SLOT: u8 = 4;
    /// Output configuration (protocol 1.0; superseded by [`SETTINGS`]).
    pub const OUTPUT: u8 = 5;
    /// Device settings.
    pub const SETTINGS: u8 = 7;
    /// Modbus RTU settings (protocol 1.2).
    pub const MODBUS: u8 = 8;
    /// The first event number of the latest boot (stored at each boot): an
    /// event ring erased as damaged numbers on past it.
    pub const EVENT_FLOOR: u8 = 9;
    /// First product slot.
    pub const PRODUCT_BASE: u8 = 16;
}

/// Scratch buffer for one stored item, bytes.
pub const ITEM_BUF: usize = 320;
/// Fewest pages the storage needs.
pub const MIN_PAGES: usize = 8;

/// Storage failure.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum StorageError {
    /// The flash reported an error (of this kind).
    Io(NorFlashErrorKind),
    /// Damage that the automatic repair could not fix.
    Corrupted,
    /// No room (a map larger than its region).
    Full,
    /// A value could not be encoded or decoded.
    Encoding,
    /// The flash has fewer than [`MIN_PAGES`] pages or a page is too small.
    TooSmall,
    /// An internal inconsistency that would otherwise have been a panic.
    LogicBug,
}

impl core::fmt::Display for StorageError {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        match self {
            StorageError::Io(k) => write!(f, "flash I/O error: {k}"),
            StorageError::Corrupted => write!(f, "flash contents damaged beyond repair"),
            StorageError::Full => write!(f, "flash settings area full"),
            StorageError::Encoding => write!(f, "stored value could not be encoded or decoded"),
            StorageError::TooSmall => {
                write!(f, "flash too small: need at least {MIN_PAGES} erase pages")
            }
            StorageError::LogicBug => write!(f, "storage logic error"),
        }
    }
}

impl core::error::Error for StorageError {}

fn map_err<E: NorFlashError>(e: sequential_storage::Error<E>) -> StorageError {
    use sequential_storage::Error as E2;
    match e {
        E2::Storage { value, .. } => StorageError::Io(value.kind()),
        E2::FullStorage => StorageError::Full,
        E2::Corrupted { .. } => StorageError::Corrupted,
        E2::BufferTooSmall(_) | E2::BufferTooBig | E2::SerializationError(_) | E2::ItemTooBig => {
            StorageError::Encoding
        }
        _ => StorageError::LogicBug,
    }
}

/// A postcard-encoded map value.
struct Pc<T>(T);

impl<'a, T: Serialize + DeserializeOwned> Value<'a> for Pc<T> {
    fn serialize_into(&self, buffer: &mut [u8]) -> Result<usize, SerializationError> {
        postcard::to_slice(&self.0, buffer)
            .map(|s| s.len())
            .map_err(|_| SerializationError::BufferTooSmall)
    }
    fn deserialize_from(buffer: &'a [u8]) -> Result<(Self, usize), SerializationError> {
        let (v, rest) = postcard::take_from_bytes::<T>(buffer)
            .map_err(|_| SerializationError::InvalidFormat)?;
        Ok((Pc(v), buffer.len() - rest.len()))
    }
}

/// The device identity as stored.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct StoredIdentity {
    /// Serial.
    pub serial: fringe_protocol::Serial,
    /// Write key.
    pub key: [u8; 32],
}

/// Where each part lives, byte ranges of the flash.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Layout {
    /// Settings map.
    pub map: Range<u32>,
    /// Event ring.
    pub events: Range<u32>,
    /// Reading ring.
    pub log: Range<u32>,
}

impl Layout {
    /// The layout for a flash of `capacity` bytes and `page` bytes per erase page.
    ///
    /// # Errors
    /// [`StorageError::TooSmall`] below [`MIN_PAGES`] pages.
    pub fn new(capacity: usize, page: usize) -> Result<Self, StorageError> {
        let pages = capacity.checked_div(page).ok_or(StorageError::TooSmall)?;
        if pages < MIN_PAGES || page < 512 {
            return Err(StorageError::TooSmall);
        }
        let m = if pages >= 12 { 4 } else { 3 };
        let e = 2;
        let p = page as u32;
        Ok(Self {
            map: 0..m * p,
            events: m * p..(m + e) * p,
            log: (m + e) * p..pages as u32 * p,
        })
    }
}

/// What mounting found.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct MountReport {
    /// A region was damaged and erased (its contents are lost).
    pub repaired: bool,
    /// The region erased was the settings map: the boot and write counters
    /// it held are lost with the rest (the device then moves them on past
    /// any value they can have had: `device::REPAIR_COUNTER_JUMP`).
    pub settings_lost: bool,
    /// The region erased was the event ring: its numbers are lost with it
    /// (the device numbers on past any it can have used:
    /// `device::repair_counter` above the latest boot's first number).
    pub events_lost: bool,
    /// The settings map was erased, or its erase completed, under a
    /// repair marker: a [`fringe_protocol::EventKind::StorageRepaired`]
    /// event appended before the erase, whose boot number this boot takes
    /// (and whose event is this boot's record of the repair).
    pub repair_boot: Option<u32>,
    /// The event ring or the log was erased as damaged in the same mount as
    /// the map (its repair is logged besides the marker).
    pub rings_repaired: bool,
}

/// The least write counter a device takes when its settings map was
/// erased as damaged and the counter with it: far past any it can have
/// accepted (a host signs each write with the stored counter plus one;
/// 2^24 writes would be one every 40 s for 20 years), so a write captured
/// before is still refused as a replay. See [`repair_counter`].
pub const REPAIR_COUNTER_JUMP: u32 = 1 << 24;

/// The write counter after a repair at boot number `boot`:
/// [`REPAIR_COUNTER_JUMP`] plus 4,096 per boot. Boot numbers never repeat,
/// so a second repair moves the counter past the first one's as long as
/// fewer than 4,096 signed writes a boot were accepted between them. (Also
/// the jump of the event numbers after an event ring erased as damaged.)
pub const fn repair_counter(boot: u32) -> u32 {
    REPAIR_COUNTER_JUMP.saturating_add(boot.saturating_mul(4096))
}

/// Bookkeeping of a ring, rebuilt at mount by one scan.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
struct RingState {
    first: u64,
    last: u64,
    len: u32,
}

/// The device's flash storage.
pub struct Storage<S: NorFlash> {
    flash: S,
    layout: Layout,
    buf: [u8; ITEM_BUF],
    log: RingState,
    events: RingState,
    /// Whole-ring scans since mount (for the tests and benchmarks).
    scans: u32,
}

impl<S: NorFlash> core::fmt::Debug for Storage<S> {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        f.debug_struct("Storage")
            .field("layout", &self.layout)
            .field("log", &self.log)
            .field("events", &self.events)
            .finish()
    }
}

macro_rules! map {
    ($self:ident) => {
        MapStorage::<u8, _, _>::new(
            Blocking(&mut $self.flash),
            MapConfig::try_new($self.layout.map.clone()).map_err(|_| StorageError::TooSmall)?,
            Cache::new_uncached(),
        )
    };
}

macro_rules! queue {
    ($self:ident, $range:ident) => {
        QueueStorage::new(
            Blocking(&mut $self.flash),
            QueueConfig::try_new($self.layout.$range.clone())
                .map_err(|_| StorageError::TooSmall)?,
            Cache::new_uncached(),
        )
    };
}

fn run<T, E: NorFlashError>(
    f: impl core::future::Future<Output = Result<T, sequential_storage::Error<E>>>,
) -> Result<T, StorageError> {
    block_on(f).ok_or(StorageError::LogicBug)?.map_err(map_err)
}

impl<S: NorFlash> Storage<S> {
    /// Mounts the storage: checks every region, erases a region that is
    /// damaged beyond the crate's own repair (reported), and scans the rings.
    ///
    /// # Errors
    /// [`StorageError::TooSmall`] for a small flash, [`StorageError::Io`] when
    /// the flash does not work.
    pub fn mount(flash: S) -> Result<(Self, MountReport), StorageError> {
        let layout = Layout::new(flash.capacity(), S::ERASE_SIZE)?;
        let mut s = Self {
            flash,
            layout,
            buf: [0; ITEM_BUF],
            log: RingState::default(),
            events: RingState::default(),
            scans: 0,
        };
        let mut report = MountReport::default();
        // Settings: touch every key once; a decode failure of one value is
        // treated like a missing value by the getters. (Erased below, once
        // the rings are known.)
        let map_damaged = matches!(s.get::<u32>(key::BOOT), Err(StorageError::Corrupted));
        match s.scan(false) {
            Ok(st) => s.events = st,
            Err(StorageError::Corrupted) => {
                s.erase(s.layout.events.clone())?;
                report.repaired = true;
                report.events_lost = true;
            }
            Err(e) => return Err(e),
        }
        match s.scan(true) {
            Ok(st) => s.log = st,
            Err(StorageError::Corrupted) => {
                s.erase(s.layout.log.clone())?;
                report.repaired = true;
            }
            Err(e) => return Err(e),
        }
        // A damaged map is erased under a marker outside it: the repair's
        // event, appended first, with the boot number this boot takes. A
        // power cut within the erase can leave the map reading again, with
        // older values (the write counter among them) from pages the erase
        // did not reach; the next boot finds the marker newer than the
        // map's boot number and erases the map again. Where the map already
        // holds this boot's number, the repair was done (a map left empty
        // by a cut reads without one, and is erased again, which costs
        // nothing).
        let newest = match s.last_event() {
            Some(n) => s.read_events(n, 1)?.0.first().cloned(),
            None => None,
        };
        // (A read error here fails the mount, as it would fail the boot
        // after it: it must not pass for a map without a boot number.)
        let map_boot = if map_damaged {
            None
        } else {
            s.get::<u32>(key::BOOT)?
        };
        let unfinished = newest
            .as_ref()
            .filter(|e| {
                !map_damaged && matches!(e.kind, fringe_protocol::EventKind::StorageRepaired)
            })
            .map(|e| e.boot)
            .filter(|b| map_boot.is_none_or(|m| m < *b));
        if map_damaged || unfinished.is_some() {
            report.rings_repaired = report.repaired;
            report.repair_boot = match unfinished {
                Some(b) => Some(b),
                None => {
                    // Two past the newest logged boot: a boot that stored
                    // its number in the map and lost its boot event leaves
                    // that number, one past the newest logged, on pages a
                    // cut erase may not reach; the marker must be newer.
                    let logged = s
                        .log_last()
                        .map_or(0, |q| q.boot)
                        .max(newest.as_ref().map_or(0, |e| e.boot));
                    let b = logged.wrapping_add(2);
                    // An event ring erased above numbers on past any number
                    // it can have held, as the boot does
                    // (`device::Stored::load`; the map's floor is lost).
                    let number = if report.events_lost {
                        repair_counter(b)
                    } else {
                        s.last_event().map_or(0, |n| n.wrapping_add(1))
                    };
                    let marker = Event {
                        number,
                        boot: b,
                        time_ms: 0,
                        kind: fringe_protocol::EventKind::StorageRepaired,
                    };
                    // Without it the repair is as before (the boot logs
                    // its event, with its own number).
                    s.append_event(&marker).is_ok().then_some(b)
                }
            };
            s.erase(s.layout.map.clone())?;
            report.repaired = true;
            report.settings_lost = true;
        }
        Ok((s, report))
    }

    fn erase(&mut self, r: Range<u32>) -> Result<(), StorageError> {
        self.flash
            .erase(r.start, r.end)
            .map_err(|e| StorageError::Io(e.kind()))
    }

    /// The flash, for power-cut injection in tests (the storage keeps no
    /// cached flash state beyond ring counters, so this is safe to use
    /// between operations).
    pub fn flash_mut(&mut self) -> &mut S {
        &mut self.flash
    }

    /// The flash back.
    pub fn into_inner(self) -> S {
        self.flash
    }

    /// The layout in use.
    pub fn layout(&self) -> &Layout {
        &self.layout
    }

    /// Reads a settings value; `None` when absent or undecodable.
    ///
    /// # Errors
    /// [`StorageError`] on flash failure.
    pub fn get<T: Serialize + DeserializeOwned>(
        &mut self,
        k: u8,
    ) -> Result<Option<T>, StorageError> {
        let mut map = map!(self);
        match block_on(map.fetch_item::<Pc<T>>(&mut self.buf, &k)).ok_or(StorageError::LogicBug)? {
            Ok(v) => Ok(v.map(|p| p.0)),
            Err(sequential_storage::Error::SerializationError(_)) => Ok(None),
            Err(e) => Err(map_err(e)),
        }
    }

    /// Stores a settings value (atomically: old or new after a power cut).
    ///
    /// # Errors
    /// [`StorageError`] on flash failure or when the value does not fit [`ITEM_BUF`].
    pub fn put<T: Serialize + DeserializeOwned + Clone>(
        &mut self,
        k: u8,
        v: &T,
    ) -> Result<(), StorageError> {
        let mut map = map!(self);
        run(map.store_item(&mut self.buf, &k, &Pc(v.clone())))
    }

    /// Product slot `slot` (0-based).
    ///
    /// # Errors
    /// [`StorageError`] on flash failure.
    pub fn product(&mut self, slot: u8) -> Result<Option<ProductCal>, StorageError> {
        if usize::from(slot) >= N_PRODUCT_SLOTS {
            return Ok(None);
        }
        Ok(self
            .get::<Option<ProductCal>>(key::PRODUCT_BASE + slot)?
            .flatten())
    }

    /// Writes product slot `slot`.
    ///
    /// # Errors
    /// [`StorageError`] on flash failure; [`StorageError::Encoding`] for a slot beyond the last.
    pub fn put_product(&mut self, slot: u8, cal: &ProductCal) -> Result<(), StorageError> {
        if usize::from(slot) >= N_PRODUCT_SLOTS {
            return Err(StorageError::Encoding);
        }
        self.put(key::PRODUCT_BASE + slot, &Some(cal.clone()))
    }

    /// Cell calibration.
    ///
    /// # Errors
    /// [`StorageError`] on flash failure.
    pub fn cell_cal(&mut self) -> Result<Option<CellCal>, StorageError> {
        self.get(key::CELL_CAL)
    }

    /// Scans a ring: first and last key and count; `log` picks the reading log.
    fn scan(&mut self, log: bool) -> Result<RingState, StorageError> {
        self.scans = self.scans.wrapping_add(1);
        let mut st = RingState::default();
        let mut q = if log {
            queue!(self, log)
        } else {
            queue!(self, events)
        };
        let mut it = run(q.iter())?;
        while let Some(e) = run(it.next(&mut self.buf))? {
            let Some(k) = decode_key(&e, log) else {
                continue;
            };
            if st.len == 0 {
                st.first = k;
            }
            st.last = k;
            st.len += 1;
        }
        Ok(st)
    }

    fn push(
        &mut self,
        log: bool,
        bytes_of: impl FnOnce(&mut [u8]) -> Option<usize>,
    ) -> Result<(), StorageError> {
        let mut tmp = [0u8; ITEM_BUF];
        let n = bytes_of(&mut tmp).ok_or(StorageError::Encoding)?;
        let data = tmp.get(..n).ok_or(StorageError::Encoding)?;
        let mut q = if log {
            queue!(self, log)
        } else {
            queue!(self, events)
        };
        run(q.push(data, true))
    }

    /// Appends a reading to the log ring (the oldest page goes when full).
    ///
    /// # Errors
    /// [`StorageError`] on flash failure.
    pub fn append_reading(&mut self, r: &Reading) -> Result<(), StorageError> {
        self.push(true, |b| postcard::to_slice(r, b).ok().map(|s| s.len()))?;
        self.after_push(true, r.seq.as_u64())
    }

    /// Appends an event to the event ring.
    ///
    /// # Errors
    /// [`StorageError`] on flash failure.
    pub fn append_event(&mut self, e: &Event) -> Result<(), StorageError> {
        self.push(false, |b| postcard::to_slice(e, b).ok().map(|s| s.len()))?;
        self.after_push(false, u64::from(e.number))
    }

    /// The key of the oldest item of a ring (reads its first item only).
    fn peek_first(&mut self, log: bool) -> Result<Option<u64>, StorageError> {
        let mut q = if log {
            queue!(self, log)
        } else {
            queue!(self, events)
        };
        let mut it = run(q.iter())?;
        while let Some(e) = run(it.next(&mut self.buf))? {
            if let Some(k) = decode_key(&e, log) {
                return Ok(Some(k));
            }
        }
        Ok(None)
    }

    /// Whole-ring scans since mount.
    pub fn scans(&self) -> u32 {
        self.scans
    }

    fn after_push(&mut self, log: bool, k: u64) -> Result<(), StorageError> {
        // The ring may have dropped a page once the count says it could
        // have: then its oldest item tells (read alone, cheap), and only a
        // changed one asks for a scan of the whole ring. (Rescanning at
        // every push once past the count, which assumes the largest item,
        // scanned some 3,700 readings at every reading after the first
        // wrap on the STM32 board, where readings are smaller than the
        // largest: found by review.)
        let st = if log { &mut self.log } else { &mut self.events };
        if st.len == 0 {
            st.first = k;
        }
        st.last = k;
        st.len = st.len.saturating_add(1);
        let cap = if log {
            self.log_capacity()
        } else {
            self.event_capacity()
        };
        let (len, first) = if log {
            (self.log.len, self.log.first)
        } else {
            (self.events.len, self.events.first)
        };
        if len > cap && self.peek_first(log)? != Some(first) {
            let fresh = self.scan(log)?;
            if log {
                self.log = fresh;
            } else {
                self.events = fresh;
            }
        }
        Ok(())
    }

    /// Readings the log is guaranteed to hold (all pages but one, at the
    /// largest reading size).
    pub fn log_capacity(&self) -> u32 {
        ring_capacity(
            &self.layout.log,
            S::ERASE_SIZE,
            S::WRITE_SIZE,
            MAX_READING_BYTES,
        )
    }

    /// Events the event ring is guaranteed to hold.
    pub fn event_capacity(&self) -> u32 {
        ring_capacity(
            &self.layout.events,
            S::ERASE_SIZE,
            S::WRITE_SIZE,
            MAX_EVENT_BYTES,
        )
    }

    /// `(first seq, readings)` in the log; `None` when empty.
    pub fn log_span(&self) -> Option<(Seq, u32)> {
        (self.log.len > 0).then(|| (Seq::from_u64(self.log.first), self.log.len))
    }

    /// Sequence of the newest reading in the log, if any.
    pub fn log_last(&self) -> Option<Seq> {
        (self.log.len > 0).then(|| Seq::from_u64(self.log.last))
    }

    /// Number of the last stored event, if any.
    pub fn last_event(&self) -> Option<u32> {
        (self.events.len > 0).then_some(self.events.last as u32)
    }

    /// Readings with `seq >= from`, at most `max` (and [`LOG_CHUNK`]), oldest
    /// first; returns them, the sequence to ask for next, and whether nothing
    /// follows.
    ///
    /// # Errors
    /// [`StorageError`] on flash failure.
    pub fn read_log(
        &mut self,
        from: Seq,
        max: usize,
    ) -> Result<(Vec<Reading, LOG_CHUNK>, Seq, bool), StorageError> {
        let mut out: Vec<Reading, LOG_CHUNK> = Vec::new();
        let max = max.min(LOG_CHUNK);
        let mut next = from;
        let mut end = true;
        let mut q = queue!(self, log);
        let mut it = run(q.iter())?;
        while let Some(e) = run(it.next(&mut self.buf))? {
            // A reading's encoding starts with its Seq: skip without decoding the rest.
            match postcard::take_from_bytes::<Seq>(&e) {
                Ok((seq, _)) if seq >= from => {}
                _ => continue,
            }
            let Ok((r, _)) = postcard::take_from_bytes::<Reading>(&e) else {
                continue;
            };
            if out.len() >= max {
                end = false;
                break;
            }
            next = Seq::from_u64(r.seq.as_u64().saturating_add(1));
            if out.push(r).is_err() {
                end = false;
                break;
            }
        }
        Ok((out, next, end))
    }

    /// Calls `f` with the stored bytes of every reading in the log, oldest
    /// first, in one pass (for dumps and tests; [`Storage::read_log`] serves
    /// the protocol).
    ///
    /// # Errors
    /// [`StorageError`] on flash failure.
    pub fn visit_log(&mut self, mut f: impl FnMut(&[u8])) -> Result<(), StorageError> {
        let mut q = queue!(self, log);
        let mut it = run(q.iter())?;
        while let Some(e) = run(it.next(&mut self.buf))? {
            f(&e);
        }
        Ok(())
    }

    /// The settings of the newest [`fringe_protocol::EventKind::ModbusChanged`]
    /// event the ring still holds (one pass, oldest first): what the Modbus
    /// settings were last written to, where the settings map that held them
    /// was lost.
    ///
    /// # Errors
    /// [`StorageError`] on flash failure.
    pub fn newest_logged_modbus(
        &mut self,
    ) -> Result<Option<(u32, fringe_protocol::ModbusSettings)>, StorageError> {
        let mut newest = None;
        let mut q = queue!(self, events);
        let mut it = run(q.iter())?;
        while let Some(e) = run(it.next(&mut self.buf))? {
            if let Ok((ev, _)) = postcard::take_from_bytes::<Event>(&e) {
                if let fringe_protocol::EventKind::ModbusChanged { new, .. } = ev.kind {
                    newest = Some((ev.number, new));
                }
            }
        }
        Ok(newest)
    }

    /// Events numbered `>= from`, at most `max` (and [`EVENT_CHUNK`]).
    ///
    /// # Errors
    /// [`StorageError`] on flash failure.
    pub fn read_events(
        &mut self,
        from: u32,
        max: usize,
    ) -> Result<(Vec<Event, EVENT_CHUNK>, u32, bool), StorageError> {
        let mut out: Vec<Event, EVENT_CHUNK> = Vec::new();
        let max = max.min(EVENT_CHUNK);
        let mut next = from;
        let mut end = true;
        let mut q = queue!(self, events);
        let mut it = run(q.iter())?;
        while let Some(e) = run(it.next(&mut self.buf))? {
            // An event's encoding starts with its number.
            match postcard::take_from_bytes::<u32>(&e) {
                Ok((n, _)) if n >= from => {}
                _ => continue,
            }
            let Ok((ev, _)) = postcard::take_from_bytes::<Event>(&e) else {
                continue;
            };
            if out.len() >= max {
                end = false;
                break;
            }
            next = ev.number.saturating_add(1);
            if out.push(ev).is_err() {
                end = false;
                break;
            }
        }
        Ok((out, next, end))
    }
}

/// Largest postcard encoding of a [`Reading`], bytes (varints at their
/// longest): seq 5 + 5, time 10, two channels of 4 + 4 + 2 + 2, temperature
/// 2, moisture 1 + 2, uncertainty 2, flags 3 (a u16 varint), two cal ids of 4.
pub const MAX_READING_BYTES: usize = 5 + 5 + 10 + 2 * 12 + 2 + 3 + 2 + 3 + 2 * 4;
/// Largest encoding of an [`Event`] as the firmware writes them, bytes.
pub const MAX_EVENT_BYTES: usize = 5 + 5 + 10 + 1 + 1 + 10 + 10;

/// Readings the log region of `layout` holds at least, for a flash of
/// `page`-byte erase pages and `word`-byte writes.
pub fn ring_capacity_readings(layout: &Layout, page: usize, word: usize) -> u32 {
    ring_capacity(&layout.log, page, word, MAX_READING_BYTES)
}

fn ring_capacity(r: &Range<u32>, page: usize, word: usize, item: usize) -> u32 {
    let pages = (r.end - r.start) as usize / page.max(1);
    let word = word.max(1);
    let overhead = 8usize.div_ceil(word) * word;
    let per_item = overhead + item.div_ceil(word) * word;
    let per_page = page.saturating_sub(2 * word) / per_item.max(1);
    (pages.saturating_sub(1) * per_page) as u32
}

fn decode_key(bytes: &[u8], log: bool) -> Option<u64> {
    // Both records start with their key (postcard writes fields in order).
    if log {
        postcard::take_from_bytes::<Seq>(bytes)
            .ok()
            .map(|(s, _)| s.as_u64())
    } else {
        postcard::take_from_bytes::<u32>(bytes)
            .ok()
            .map(|(n, _)| u64::from(n))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::flash::RamFlash;
    use fringe_protocol::{EventKind, ResetCause};

    type F = RamFlash<{ 16 * 4096 }>;

    fn reading(boot: u32, counter: u32) -> Reading {
        Reading {
            seq: Seq { boot, counter },
            time_ms: u64::from(counter) * 1000,
            temperature_c: 21.5,
            ..Reading::default()
        }
    }

    #[test]
    fn the_longest_reading_fits_max_reading_bytes() {
        // Every varint at its longest, every option present, every flag set.
        let ch = fringe_protocol::ChannelValue {
            g_s: -1.0e9,
            b_s: -1.0e9,
            eps_re: -65_504.0,
            eps_im: 65_504.0,
        };
        let r = Reading {
            seq: Seq {
                boot: u32::MAX,
                counter: u32::MAX,
            },
            time_ms: u64::MAX,
            channels: [ch; fringe_protocol::N_FREQ],
            temperature_c: -327.67,
            moisture_pct: Some(-327.67),
            uncertainty_pct: 65.534,
            flags: fringe_protocol::Flags::all(),
            cell_cal: fringe_protocol::CalId([0xFF; 4]),
            product_cal: fringe_protocol::CalId([0xFF; 4]),
        };
        let mut buf = [0u8; 2 * MAX_READING_BYTES];
        let n = postcard::to_slice(&r, &mut buf).unwrap().len();
        // The flags defined today leave the top bits of the u16 clear, so
        // their varint is a byte shorter than the bound allows for.
        assert!(
            (MAX_READING_BYTES - 1..=MAX_READING_BYTES).contains(&n),
            "{n} bytes"
        );
    }

    #[test]
    fn settings_round_trip_and_survive_remount() {
        let (mut s, rep) = Storage::mount(F::new()).unwrap();
        assert!(!rep.repaired);
        assert_eq!(s.get::<u32>(key::BOOT).unwrap(), None);
        s.put(key::BOOT, &7u32).unwrap();
        s.put(key::BOOT, &8u32).unwrap();
        let f = s.into_inner();
        let (mut s, _) = Storage::mount(f).unwrap();
        assert_eq!(s.get::<u32>(key::BOOT).unwrap(), Some(8));
    }

    #[test]
    fn log_ring_keeps_the_newest_and_reads_by_range() {
        let (mut s, _) = Storage::mount(F::new()).unwrap();
        let cap = s.log_capacity();
        assert!(cap >= 300, "{cap}");
        let total = cap * 2;
        for i in 0..total {
            s.append_reading(&reading(1, i)).unwrap();
        }
        let (first, len) = s.log_span().unwrap();
        assert!(len >= cap, "{len} < {cap}");
        assert_eq!(first.counter + len, total);
        // The whole ring is scanned when a page goes, not at every reading
        // past the count (these readings are far smaller than the largest,
        // so the ring holds many more than `cap`).
        assert!(
            s.scans() < cap / 10,
            "{} scans for {total} readings",
            s.scans()
        );
        let (rs, next, end) = s
            .read_log(
                Seq {
                    boot: 1,
                    counter: total - 3,
                },
                4,
            )
            .unwrap();
        assert_eq!(rs.len(), 3);
        assert_eq!(rs[0].seq.counter, total - 3);
        assert!(end);
        assert_eq!(
            next,
            Seq {
                boot: 1,
                counter: total
            }
        );
        let (rs, _, end) = s.read_log(Seq::default(), 4).unwrap();
        assert_eq!(rs[0].seq, first);
        assert!(!end);
        // Remount rebuilds the same span.
        let f = s.into_inner();
        let (s, _) = Storage::mount(f).unwrap();
        assert_eq!(s.log_span(), Some((first, len)));
    }

    #[test]
    fn events_round_trip() {
        let (mut s, _) = Storage::mount(F::new()).unwrap();
        for n in 0..10u32 {
            s.append_event(&Event {
                number: n,
                boot: 1,
                time_ms: 5,
                kind: EventKind::Boot {
                    reset_cause: ResetCause::PowerOn,
                },
            })
            .unwrap();
        }
        let (ev, next, end) = s.read_events(4, 6).unwrap();
        assert_eq!(ev.len(), 6);
        assert_eq!(ev[0].number, 4);
        assert_eq!(next, 10);
        assert!(end);
        assert_eq!(s.last_event(), Some(9));
    }

    #[test]
    fn too_small_flash_refused() {
        let f = RamFlash::<{ 4 * 4096 }>::new();
        assert_eq!(Storage::mount(f).err(), Some(StorageError::TooSmall));
    }
}
