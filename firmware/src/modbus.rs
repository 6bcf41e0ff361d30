//! Modbus RTU slave: the device's input registers (the map of
//! `fringe-registers`, the same the gateway serves over Modbus TCP) on an
//! RS-485 line, read-only.
//!
//! The board hands every received byte to [`RtuSlave::receive`] with the
//! time it arrived, calls [`RtuSlave::poll`] with the present time, and
//! sends what `poll` returns through a [`HalfDuplex`] port. The slave
//! reads no clock: all times are arguments, in microseconds on one
//! monotonic clock of the board.
//!
//! ## Framing (Modbus over Serial Line V1.02, section 2.5.1.1)
//! ```text
//! | silence >= t3.5 | unit | function | data ...  | CRC lo | CRC hi | silence >= t3.5 |
//!                     1 B    1 B        0..252 B    CRC-16/MODBUS, low byte first
//! ```
//! A frame ends after 3.5 character times without a byte (`t3.5`); a gap
//! of more than 1.5 character times (`t1.5`) inside a frame damages it, and
//! a damaged frame is dropped. A character is 11 bits on the line (start,
//! 8 data, parity or a second stop bit, stop). Above 19200 baud the
//! specification fixes t1.5 = 750 us and t3.5 = 1750 us ([`Timing`]).
//! Byte times are the ends of their characters (when the receiver has the
//! byte), so the silence before a byte is its time less one character.
//!
//! ## What is answered
//! CRC (checked with the `crc` crate's CRC-16/MODBUS) and length are
//! checked first; a frame that fails either is dropped without an answer,
//! as are frames for another unit and every broadcast (unit 0: a read is
//! never answered on broadcast, and this slave has nothing to write).
//! Then, per the Modbus Application Protocol V1.1b3 (section 6.4, section 7),
//! through `rmodbus` for the PDU and the answer's CRC:
//!
//! | request | answer |
//! | --- | --- |
//! | function 04, 1..=125 registers inside the map | the registers |
//! | function 04, quantity 0 or above 125 | exception 03 |
//! | function 04, range past the map's end | exception 02 |
//! | function 04 of the wrong length | exception 03 |
//! | any other function code 1..=127 (every write included) | exception 01 |
//! | function code 0x80..=0xFF (the exception range) | nothing |
//!
//! Nothing a Modbus request carries can change the device.
//!
//! An answer is not sent while a frame is coming in: it waits for that
//! frame's end. If that was a frame of 4 characters or more (the least a
//! request has), good or garbled here, the master has gone on (after its
//! timeout, the board busy past it, or to another unit) and the request
//! is dropped unanswered ([`Counters::late`]): an answer then would go out
//! over the next request or another unit's answer, or be taken for the
//! answer to the next request (RTU has no transaction id). If it was
//! shorter (a glitch as a master's driver lets go of the line, say), the
//! answer goes out after it. Only one master talks on a Modbus serial line
//! (V1.02 section 2.1), and it starts no new frame while it waits for an
//! answer.
//!
//! ## Half duplex
//! [`HalfDuplex`] drives the transceiver's driver enable through an
//! embedded-hal [`OutputPin`]: asserted before the first byte, released
//! once [`embedded_io::Write::flush`] has returned, which a UART
//! implementation must only do after the last stop bit has left the line
//! (on the STM32, the transmission-complete flag).

use crc::{Crc, CRC_16_MODBUS};
use embedded_hal::digital::OutputPin;
use fringe_protocol::{ModbusParity, ModbusSettings};
use fringe_registers::{read_input_registers, Exception, MAP_LEN};
use heapless::Vec;
use rmodbus::server::{ModbusFrame, Read};
use rmodbus::{ErrorKind, ModbusProto};

/// Longest RTU frame (application data unit), bytes (V1.02 section 2.5.1).
pub const MAX_ADU: usize = 256;
/// Bits of one RTU character on the line: start, 8 data, parity (or a
/// second stop bit without parity), stop (V1.02 section 2.5.1).
pub const BITS_PER_CHAR: u32 = 11;
/// Baud rates the slave accepts (V1.02 section 2.5: 9600 and 19200
/// required, the others common practice).
pub const BAUD_RATES: [u32; 8] = [1200, 2400, 4800, 9600, 19_200, 38_400, 57_600, 115_200];
/// The only function code answered with data: Read Input Registers.
pub const READ_INPUT_REGISTERS: u8 = 0x04;

const CRC16: Crc<u16> = Crc::<u16>::new(&CRC_16_MODBUS);

/// Parity of the serial line. Without parity the line carries two stop
/// bits (V1.02 section 2.5.1), so a character stays 11 bits.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Parity {
    /// No parity, two stop bits (8N2).
    None,
    /// Even parity, one stop bit (8E1, the specification's default).
    Even,
    /// Odd parity, one stop bit (8O1).
    Odd,
}

/// The serial line's settings: the slave's unit id, baud rate and parity.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct SerialLine {
    /// Unit id (slave address), 1..=247.
    pub unit_id: u8,
    /// Baud rate, one of [`BAUD_RATES`].
    pub baud: u32,
    /// Parity.
    pub parity: Parity,
}

impl SerialLine {
    /// The defaults: unit 1, 19200 baud, even parity (V1.02 section 2.5.1
    /// names 19200 and even parity as the defaults).
    pub const DEFAULT: SerialLine = SerialLine {
        unit_id: 1,
        baud: 19_200,
        parity: Parity::Even,
    };

    /// Checks the settings.
    ///
    /// # Errors
    /// [`SerialLineError`] naming the first refused value.
    pub fn validate(&self) -> Result<(), SerialLineError> {
        if !(1..=247).contains(&self.unit_id) {
            return Err(SerialLineError::UnitId(self.unit_id));
        }
        if !BAUD_RATES.contains(&self.baud) {
            return Err(SerialLineError::Baud(self.baud));
        }
        Ok(())
    }

    /// The frame timing at this baud rate.
    pub fn timing(&self) -> Timing {
        Timing::for_baud(self.baud)
    }
}

impl SerialLine {
    /// Stop bits on the line: two without parity, else one (V1.02
    /// section 2.5.1: a character is always 11 bits).
    pub const fn stop_bits(&self) -> u8 {
        match self.parity {
            Parity::None => 2,
            Parity::Even | Parity::Odd => 1,
        }
    }
}

impl From<ModbusSettings> for SerialLine {
    fn from(m: ModbusSettings) -> Self {
        Self {
            unit_id: m.unit_id,
            baud: m.baud,
            parity: match m.parity {
                ModbusParity::Even => Parity::Even,
                ModbusParity::Odd => Parity::Odd,
                ModbusParity::None => Parity::None,
            },
        }
    }
}

impl From<SerialLine> for ModbusSettings {
    fn from(l: SerialLine) -> Self {
        Self {
            unit_id: l.unit_id,
            baud: l.baud,
            parity: match l.parity {
                Parity::Even => ModbusParity::Even,
                Parity::Odd => ModbusParity::Odd,
                Parity::None => ModbusParity::None,
            },
        }
    }
}

impl SerialLineError {
    /// A short reason for the protocol's error frame (at most 32 bytes).
    pub fn reason(self) -> &'static str {
        match self {
            SerialLineError::UnitId(_) => "modbus unit id not 1..=247",
            SerialLineError::Baud(_) => "modbus baud not 1200..115200 std",
        }
    }
}

impl Default for SerialLine {
    fn default() -> Self {
        Self::DEFAULT
    }
}

/// Why serial-line settings were refused.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum SerialLineError {
    /// The unit id is 0 (broadcast) or above 247 (reserved).
    UnitId(u8),
    /// The baud rate is not one of [`BAUD_RATES`].
    Baud(u32),
}

impl core::fmt::Display for SerialLineError {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        match self {
            SerialLineError::UnitId(u) => write!(f, "modbus: unit id {u} not 1..=247"),
            SerialLineError::Baud(b) => write!(
                f,
                "modbus: baud {b} not one of 1200, 2400, 4800, 9600, 19200, 38400, 57600, 115200"
            ),
        }
    }
}

impl core::error::Error for SerialLineError {}

/// Character and silence times of a baud rate, microseconds (rounded up).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Timing {
    /// One character (11 bits).
    pub char_us: u32,
    /// Longest silence allowed inside a frame (1.5 characters; 750 us
    /// above 19200 baud).
    pub t15_us: u32,
    /// Silence that ends a frame (3.5 characters; 1750 us above 19200 baud).
    pub t35_us: u32,
}

impl Timing {
    /// The timing at `baud` (V1.02 section 2.5.1.1). A baud rate of 0 is
    /// treated as 1.
    pub const fn for_baud(baud: u32) -> Self {
        let baud = if baud == 0 { 1 } else { baud as u64 };
        let char_us = tenths_us(10, baud);
        if baud > 19_200 {
            Timing {
                char_us,
                t15_us: 750,
                t35_us: 1750,
            }
        } else {
            Timing {
                char_us,
                t15_us: tenths_us(15, baud),
                t35_us: tenths_us(35, baud),
            }
        }
    }
}

/// `tenths` tenths of a character at `baud`, microseconds, rounded up.
const fn tenths_us(tenths: u64, baud: u64) -> u32 {
    let v = (tenths * BITS_PER_CHAR as u64 * 100_000).div_ceil(baud);
    if v > u32::MAX as u64 {
        u32::MAX
    } else {
        v as u32
    }
}

/// What the slave has seen since it started (the spirit of the
/// specification's diagnostic counters; for tests and a board's report).
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Counters {
    /// Frames delimited by silence (all of them, good or not).
    pub frames: u32,
    /// Frames dropped for a bad CRC.
    pub bad_crc: u32,
    /// Frames dropped as damaged: a gap above t1.5, a line error (parity,
    /// framing, overrun), longer than [`MAX_ADU`], shorter than 4 bytes, or
    /// a function code in the exception range.
    pub damaged: u32,
    /// Frames for another unit (not answered).
    pub other_unit: u32,
    /// Broadcast frames (unit 0, never answered).
    pub broadcast: u32,
    /// Answers with data.
    pub answered: u32,
    /// Exception answers.
    pub exceptions: u32,
    /// Requests for this unit dropped unanswered: a frame came before the
    /// answer was sent (see the module docs).
    pub late: u32,
}

/// The arrival time, microseconds since boot, of a byte stamped `stamp_us`
/// by a receive interrupt with a clock of `mask + 1` microseconds (the
/// stamp holds the time modulo it), read at `now_us`: `now_us` less the
/// wait. A stamp after `now_us` (the interrupt came while the board was
/// emptying its ring, after it read the clock) is taken as now: it wrapped
/// to almost a whole period in the past (8.4 s on the STM32G474, 16.8 s on
/// QEMU), and the slave took the gap for silence and dropped the request
/// (found by review).
pub fn arrival_us(now_us: u64, stamp_us: u64, mask: u64) -> u64 {
    let waited = now_us.wrapping_sub(stamp_us) & mask;
    let waited = if waited > mask / 2 { 0 } else { waited };
    now_us.saturating_sub(waited)
}

/// The Modbus RTU slave (see the module doc). About 800 bytes: keep it in
/// a `static` or the main loop's frame, not in a deep call.
#[derive(Debug)]
pub struct RtuSlave {
    unit_id: u8,
    timing: Timing,
    rx: [u8; MAX_ADU],
    rx_len: usize,
    /// Time of the last byte (or line error) received.
    last_us: Option<u64>,
    /// The frame in progress is damaged (dropped when it ends).
    damaged: bool,
    /// A complete request for this unit, waiting for its answer.
    req: [u8; MAX_ADU],
    req_len: usize,
    resp: Vec<u8, MAX_ADU>,
    counters: Counters,
}

impl RtuSlave {
    /// A slave for `line`'s unit id and timing.
    ///
    /// # Errors
    /// The settings' [`SerialLineError`].
    pub fn new(line: &SerialLine) -> Result<Self, SerialLineError> {
        line.validate()?;
        Ok(Self {
            unit_id: line.unit_id,
            timing: line.timing(),
            rx: [0; MAX_ADU],
            rx_len: 0,
            last_us: None,
            damaged: false,
            req: [0; MAX_ADU],
            req_len: 0,
            resp: Vec::new(),
            counters: Counters::default(),
        })
    }

    /// Moves the slave to `line`'s unit id and timing (a device settings
    /// change): a frame in progress and a request not yet answered are
    /// dropped (they were read under the old settings); the counters stay.
    /// Refused settings change nothing.
    ///
    /// # Errors
    /// The settings' [`SerialLineError`].
    pub fn reconfigure(&mut self, line: &SerialLine) -> Result<(), SerialLineError> {
        line.validate()?;
        self.unit_id = line.unit_id;
        self.timing = line.timing();
        self.rx_len = 0;
        self.last_us = None;
        self.damaged = false;
        self.req_len = 0;
        Ok(())
    }

    /// The unit id answered.
    pub fn unit_id(&self) -> u8 {
        self.unit_id
    }

    /// The frame timing in use.
    pub fn timing(&self) -> Timing {
        self.timing
    }

    /// What the slave has seen.
    pub fn counters(&self) -> Counters {
        self.counters
    }

    /// A byte received at `at_us` (the end of its character). Bytes must
    /// come in the order received, with non-decreasing times.
    pub fn receive(&mut self, at_us: u64, byte: u8) {
        self.gap_before(at_us);
        match self.rx.get_mut(self.rx_len) {
            Some(slot) => {
                *slot = byte;
                self.rx_len += 1;
            }
            None => self.damaged = true,
        }
        self.last_us = Some(at_us);
    }

    /// A character received damaged at `at_us` (parity or framing error,
    /// or bytes lost to an overrun): the frame it belongs to is dropped.
    pub fn line_error(&mut self, at_us: u64) {
        self.gap_before(at_us);
        self.damaged = true;
        // A character arrived, even if unreadable: it counts in the frame's
        // length (which decides whether it was a frame or a glitch: a
        // request garbled here is the master going on; found by review).
        // What `rx` holds there does not matter: the frame is dropped.
        self.rx_len = (self.rx_len + 1).min(MAX_ADU);
        self.last_us = Some(at_us);
    }

    /// When the frame in progress ends if no byte comes (`None` when no
    /// frame is in progress): a board can sleep until then.
    pub fn frame_deadline_us(&self) -> Option<u64> {
        match self.last_us {
            Some(last) if self.rx_len > 0 => {
                Some(last.saturating_add(u64::from(self.timing.t35_us)))
            }
            _ => None,
        }
    }

    /// Ends the frame in progress once t3.5 of silence has passed at
    /// `now_us`, and answers a complete request for this unit: the answer
    /// to send (unit, PDU, CRC), or `None` for silence. `registers` is
    /// called only when a read is answered, for the map at this moment.
    pub fn poll(
        &mut self,
        now_us: u64,
        registers: impl FnOnce() -> [u16; MAP_LEN],
    ) -> Option<&[u8]> {
        if let Some(deadline) = self.frame_deadline_us() {
            if now_us >= deadline {
                self.end_frame();
            }
        }
        // Not over a frame coming in (its end decides: see the module docs).
        if self.req_len == 0 || self.rx_len > 0 {
            return None;
        }
        let n = core::mem::take(&mut self.req_len);
        match self.answer(n, registers) {
            Some(true) => self.counters.exceptions = self.counters.exceptions.wrapping_add(1),
            Some(false) => self.counters.answered = self.counters.answered.wrapping_add(1),
            None => return None,
        }
        Some(self.resp.as_slice())
    }

    /// Ends the frame in progress if the silence before a character
    /// arriving at `at_us` reaches t3.5; marks it damaged above t1.5.
    fn gap_before(&mut self, at_us: u64) {
        let Some(last) = self.last_us else { return };
        let silence = at_us
            .saturating_sub(last)
            .saturating_sub(u64::from(self.timing.char_us));
        if silence >= u64::from(self.timing.t35_us) {
            self.end_frame();
        } else if silence > u64::from(self.timing.t15_us) && self.rx_len > 0 {
            self.damaged = true;
        }
    }

    /// The frame in progress is complete: check it and keep it if it is a
    /// request for this unit.
    fn end_frame(&mut self) {
        let n = core::mem::take(&mut self.rx_len);
        let damaged = core::mem::take(&mut self.damaged);
        if n == 0 {
            return;
        }
        let c = &mut self.counters;
        c.frames = c.frames.wrapping_add(1);
        // A frame since a request not yet answered: the master has gone
        // on. (Not a glitch shorter than any request.)
        if n >= 4 && self.req_len > 0 {
            self.req_len = 0;
            c.late = c.late.wrapping_add(1);
        }
        let Some(frame) = self.rx.get(..n) else {
            c.damaged = c.damaged.wrapping_add(1);
            return;
        };
        if damaged || n < 4 {
            c.damaged = c.damaged.wrapping_add(1);
            return;
        }
        let (body, crc) = frame.split_at(n - 2);
        let sent = match crc {
            [lo, hi] => u16::from_le_bytes([*lo, *hi]),
            _ => return,
        };
        if CRC16.checksum(body) != sent {
            c.bad_crc = c.bad_crc.wrapping_add(1);
            return;
        }
        match (body.first(), body.get(1)) {
            (Some(0), _) => c.broadcast = c.broadcast.wrapping_add(1),
            (Some(&u), Some(&f)) if u == self.unit_id => {
                if f >= 0x80 {
                    c.damaged = c.damaged.wrapping_add(1);
                } else if let Some(dst) = self.req.get_mut(..n) {
                    dst.copy_from_slice(frame);
                    self.req_len = n;
                }
            }
            _ => c.other_unit = c.other_unit.wrapping_add(1),
        }
    }

    /// Builds the answer to the request of `n` bytes in `req` into `resp`:
    /// `Some(true)` for an exception, `Some(false)` for data, `None` when
    /// it cannot be built (never for a request `end_frame` kept).
    fn answer(&mut self, n: usize, registers: impl FnOnce() -> [u16; MAP_LEN]) -> Option<bool> {
        let req = self.req.get(..n)?;
        let func = *req.get(1)?;
        let mut frame = ModbusFrame::new(self.unit_id, req, ModbusProto::Rtu, &mut self.resp)
            .with_broadcast_units(&[]);
        let outcome = if func != READ_INPUT_REGISTERS {
            Err(ErrorKind::IllegalFunction)
        } else if n != 8 {
            // Unit, function, address, quantity, CRC: 8 bytes exactly.
            Err(ErrorKind::IllegalDataValue)
        } else {
            read_into(&mut frame, registers)
        };
        let exception = match outcome {
            Ok(()) => frame.error.is_some(),
            Err(e) => {
                frame.responding_to_fn = func;
                frame.set_modbus_error_if_unset(&e).ok()?;
                true
            }
        };
        frame.finalize_response().ok()?;
        Some(exception)
    }
}

/// Parses a function-04 request with `rmodbus` and fills the answer from
/// the register map (exceptions as `fringe_registers` decides them).
fn read_into<V: rmodbus::VectorTrait<u8>>(
    frame: &mut ModbusFrame<'_, V>,
    registers: impl FnOnce() -> [u16; MAP_LEN],
) -> Result<(), ErrorKind> {
    frame.parse().map_err(|_| ErrorKind::IllegalDataValue)?;
    if frame.error.is_some() || !frame.response_required {
        // rmodbus refused the quantity (above 125): its exception stands.
        return Ok(());
    }
    let map = registers();
    let words = read_input_registers(&map, frame.reg, frame.count).map_err(|e| match e {
        Exception::IllegalFunction => ErrorKind::IllegalFunction,
        Exception::IllegalDataAddress => ErrorKind::IllegalDataAddress,
        Exception::IllegalDataValue => ErrorKind::IllegalDataValue,
    })?;
    match frame.get_external_read()? {
        Read::Words(w) => {
            for (out, word) in w.buf.chunks_exact_mut(2).zip(words) {
                out.copy_from_slice(&word.to_be_bytes());
            }
        }
        Read::Bits(_) => return Err(ErrorKind::IllegalFunction),
    }
    frame.process_external_read(Ok(()))
}

/// Why a half-duplex send failed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum SendError<W, P> {
    /// The UART refused a byte or the flush.
    Write(W),
    /// The driver-enable pin could not be driven.
    Pin(P),
}

impl<W: core::fmt::Debug, P: core::fmt::Debug> core::fmt::Display for SendError<W, P> {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        match self {
            SendError::Write(e) => write!(f, "rs-485: transmit failed: {e:?}"),
            SendError::Pin(e) => write!(f, "rs-485: driver enable failed: {e:?}"),
        }
    }
}

impl<W: core::fmt::Debug, P: core::fmt::Debug> core::error::Error for SendError<W, P> {}

/// An RS-485 transmitter: a UART's transmit side and the transceiver's
/// driver-enable pin (high = driving the bus). Receiving is the board's.
#[derive(Debug)]
pub struct HalfDuplex<W, P> {
    tx: W,
    de: P,
}

impl<W: embedded_io::Write, P: OutputPin> HalfDuplex<W, P> {
    /// Takes the UART and the pin, and releases the bus (pin low).
    ///
    /// # Errors
    /// [`SendError::Pin`] when the pin cannot be driven low.
    pub fn new(tx: W, mut de: P) -> Result<Self, SendError<W::Error, P::Error>> {
        de.set_low().map_err(SendError::Pin)?;
        Ok(Self { tx, de })
    }

    /// Sends `frame`: driver enable asserted, every byte written, the UART
    /// flushed (its last stop bit gone), driver enable released. The pin
    /// is released even when the write fails, so the bus is never held.
    ///
    /// # Errors
    /// [`SendError::Write`] from the UART (the first error wins),
    /// [`SendError::Pin`] from the pin.
    pub fn send(&mut self, frame: &[u8]) -> Result<(), SendError<W::Error, P::Error>> {
        self.de.set_high().map_err(SendError::Pin)?;
        let written = self.tx.write_all(frame).and_then(|()| self.tx.flush());
        let released = self.de.set_low();
        written.map_err(SendError::Write)?;
        released.map_err(SendError::Pin)
    }

    /// The UART and the pin back.
    pub fn into_parts(self) -> (W, P) {
        (self.tx, self.de)
    }

    /// The UART, to reconfigure it (a board applying new Modbus
    /// settings between frames; the bus is released then).
    pub fn tx_mut(&mut self) -> &mut W {
        &mut self.tx
    }
}

#[cfg(test)]
mod tests {

    /// Arrival times from a wrapping stamp: a byte stamped 300 us before
    /// `now` waited 300 us, also across the stamp clock's wrap; one stamped
    /// 5 us after `now` (its interrupt came after the clock was read)
    /// arrived now, not a whole period earlier. (Made-up times.)
    #[test]
    fn a_byte_stamped_after_now_arrived_now() {
        let mask = (1u64 << 23) - 1;
        let now = 50_000_000u64;
        assert_eq!(arrival_us(now, (now - 300) & mask, mask), now - 300);
        let near_wrap = (mask + 1) * 7 + 100;
        assert_eq!(
            arrival_us(near_wrap, (near_wrap - 300) & mask, mask),
            near_wrap - 300
        );
        assert_eq!(arrival_us(now, (now + 5) & mask, mask), now);
        assert_eq!(arrival_us(0, 0, mask), 0);
    }

    use super::*;

    /// Frames for the tests, their CRC from the `crc` crate (CRC-16/MODBUS,
    /// check value 0x4B37: docs/REFERENCES.md section 20).
    fn rtu(body: &[u8]) -> std::vec::Vec<u8> {
        let mut v = body.to_vec();
        v.extend_from_slice(&CRC16.checksum(body).to_le_bytes());
        v
    }

    fn map() -> [u16; MAP_LEN] {
        core::array::from_fn(|i| 0x0100 + i as u16)
    }

    /// Feeds `frame` byte by byte at 19200 baud, back to back, from `t0`;
    /// returns the time of the last byte.
    fn feed(s: &mut RtuSlave, t0: u64, frame: &[u8]) -> u64 {
        let c = u64::from(s.timing().char_us);
        let mut t = t0;
        for &b in frame {
            t += c;
            s.receive(t, b);
        }
        t
    }

    /// The answer to `frame` sent at `t0`, polled after the frame gap.
    fn ask(s: &mut RtuSlave, t0: u64, frame: &[u8]) -> Option<std::vec::Vec<u8>> {
        let end = feed(s, t0, frame);
        let t35 = u64::from(s.timing().t35_us);
        assert_eq!(s.poll(end + t35 - 1, map), None, "answered before t3.5");
        s.poll(end + t35, map).map(<[u8]>::to_vec)
    }

    fn slave() -> RtuSlave {
        RtuSlave::new(&SerialLine::DEFAULT).unwrap()
    }

    #[test]
    fn crc_of_the_crc_catalogue_check_string() {
        // CRC-16/MODBUS of "123456789" is 0x4B37 (the catalogue's check
        // value, docs/REFERENCES.md §20.1): the tests' frames and the
        // slave's check use this CRC.
        assert_eq!(CRC16.checksum(b"123456789"), 0x4B37);
    }

    #[test]
    fn serial_line_spec_crc_example_is_accepted() {
        // Modbus over Serial Line V1.02, appendix B, CRC example: the frame
        // 02 07 carries CRC 0x1241, sent low byte first: 02 07 41 12
        // (docs/REFERENCES.md §20.2, from memory). Function 07 (Read
        // Exception Status) is not served: a correct CRC makes the slave
        // answer exception 01; one flipped CRC bit makes it silent.
        let line = SerialLine {
            unit_id: 2,
            ..SerialLine::DEFAULT
        };
        let mut s = RtuSlave::new(&line).unwrap();
        assert_eq!(rtu(&[0x02, 0x07]), [0x02, 0x07, 0x41, 0x12]);
        let answer = ask(&mut s, 0, &[0x02, 0x07, 0x41, 0x12]).expect("answered");
        assert_eq!(answer, rtu(&[0x02, 0x87, 0x01]));
        assert_eq!(ask(&mut s, 100_000, &[0x02, 0x07, 0x41, 0x13]), None);
        assert_eq!(s.counters().bad_crc, 1);
    }

    #[test]
    fn read_input_register_as_the_application_spec_example() {
        // Modbus Application Protocol V1.1b3, section 6.4, example: read
        // input register 9 (address 0x0008), quantity 1; the answer is
        // function 04, byte count 02, the register's value. Here in an RTU
        // frame for unit 1; the value is the map's word 8.
        let mut s = slave();
        let answer = ask(&mut s, 0, &rtu(&[0x01, 0x04, 0x00, 0x08, 0x00, 0x01])).unwrap();
        assert_eq!(answer, rtu(&[0x01, 0x04, 0x02, 0x01, 0x08]));
    }

    #[test]
    fn the_whole_map_is_served_high_byte_first() {
        let mut s = slave();
        let answer = ask(&mut s, 0, &rtu(&[0x01, 0x04, 0x00, 0x00, 0x00, 25])).unwrap();
        let mut want = vec![0x01, 0x04, 50];
        for w in map() {
            want.extend_from_slice(&w.to_be_bytes());
        }
        assert_eq!(answer, rtu(&want));
        assert_eq!(answer.len(), 55);
        assert_eq!(s.counters().answered, 1);
    }

    #[test]
    fn exceptions_as_the_map_and_the_specification_say() {
        let mut s = slave();
        let exc = |s: &mut RtuSlave, body: &[u8]| ask(s, 0, &rtu(body)).expect("answered");
        // Past the map (addresses 20..30): 02.
        assert_eq!(
            exc(&mut s, &[0x01, 0x04, 0x00, 20, 0x00, 10]),
            rtu(&[0x01, 0x84, 0x02])
        );
        assert_eq!(
            exc(&mut s, &[0x01, 0x04, 0x00, 25, 0x00, 1]),
            rtu(&[0x01, 0x84, 0x02])
        );
        // Quantity 0 and 126: 03.
        assert_eq!(
            exc(&mut s, &[0x01, 0x04, 0x00, 0x00, 0x00, 0]),
            rtu(&[0x01, 0x84, 0x03])
        );
        assert_eq!(
            exc(&mut s, &[0x01, 0x04, 0x00, 0x00, 0x00, 126]),
            rtu(&[0x01, 0x84, 0x03])
        );
        // Quantity checked before the address (V1.1b3 figure 16): 03.
        assert_eq!(
            exc(&mut s, &[0x01, 0x04, 0xFF, 0xFF, 0x00, 0]),
            rtu(&[0x01, 0x84, 0x03])
        );
        // A function-04 request one byte too long: 03.
        assert_eq!(
            exc(&mut s, &[0x01, 0x04, 0x00, 0x00, 0x00, 1, 0]),
            rtu(&[0x01, 0x84, 0x03])
        );
        // Reads of coils, discrete inputs, holding registers; writes of a
        // coil, a register, several coils and registers; an unknown code: 01.
        for body in [
            &[0x01, 0x01, 0x00, 0x00, 0x00, 0x01][..],
            &[0x01, 0x02, 0x00, 0x00, 0x00, 0x01],
            &[0x01, 0x03, 0x00, 0x00, 0x00, 0x01],
            &[0x01, 0x05, 0x00, 0x00, 0xFF, 0x00],
            &[0x01, 0x06, 0x00, 0x01, 0x00, 0x03],
            &[0x01, 0x0F, 0x00, 0x13, 0x00, 0x0A, 0x02, 0xCD, 0x01],
            &[0x01, 0x10, 0x00, 0x01, 0x00, 0x01, 0x02, 0x00, 0x0A],
            &[0x01, 0x2B, 0x0E, 0x01, 0x00],
            &[0x01, 0x00],
        ] {
            let want = rtu(&[0x01, body[1] | 0x80, 0x01]);
            assert_eq!(exc(&mut s, body), want, "function {:#04x}", body[1]);
        }
        assert_eq!(s.counters().exceptions, 15);
        assert_eq!(s.counters().answered, 0);
    }

    #[test]
    fn other_units_broadcasts_and_the_exception_range_get_silence() {
        let mut s = slave();
        let mut t = 0;
        for body in [
            &[0x02, 0x04, 0x00, 0x00, 0x00, 0x01][..],
            &[0xF7, 0x04, 0x00, 0x00, 0x00, 0x01],
            // Broadcast read and write.
            &[0x00, 0x04, 0x00, 0x00, 0x00, 0x01],
            &[0x00, 0x06, 0x00, 0x01, 0x00, 0x03],
            // A function code in the exception range.
            &[0x01, 0x84, 0x02],
        ] {
            assert_eq!(ask(&mut s, t, &rtu(body)), None, "{body:02x?}");
            t += 100_000;
        }
        let c = s.counters();
        assert_eq!((c.other_unit, c.broadcast, c.damaged), (2, 2, 1));
        // Still answers its own unit afterwards.
        assert!(ask(&mut s, t, &rtu(&[0x01, 0x04, 0x00, 0x00, 0x00, 0x01])).is_some());
    }

    #[test]
    fn a_bad_crc_is_ignored_whichever_byte_is_hit() {
        let good = rtu(&[0x01, 0x04, 0x00, 0x00, 0x00, 25]);
        let mut s = slave();
        let mut t = 0;
        for i in 0..good.len() {
            for bit in 0..8 {
                let mut bad = good.clone();
                bad[i] ^= 1 << bit;
                assert_eq!(ask(&mut s, t, &bad), None, "byte {i} bit {bit}");
                t += 100_000;
            }
        }
        // Flipping a unit-id bit can turn the frame into another unit's
        // with a bad CRC: every one of the 64 is a CRC failure.
        assert_eq!(s.counters().bad_crc, 64);
        assert_eq!(s.counters().answered, 0);
    }

    #[test]
    fn timing_per_the_serial_line_specification() {
        // 11 bits per character; t1.5 and t3.5 from the baud rate up to
        // 19200, fixed at 750 us and 1750 us above (V1.02 section 2.5.1.1).
        assert_eq!(
            Timing::for_baud(9600),
            Timing {
                char_us: 1146,
                t15_us: 1719,
                t35_us: 4011
            }
        );
        assert_eq!(
            Timing::for_baud(19_200),
            Timing {
                char_us: 573,
                t15_us: 860,
                t35_us: 2006
            }
        );
        for baud in [38_400, 57_600, 115_200] {
            let t = Timing::for_baud(baud);
            assert_eq!((t.t15_us, t.t35_us), (750, 1750), "{baud}");
        }
        assert_eq!(Timing::for_baud(115_200).char_us, 96);
        assert_eq!(Timing::for_baud(0).char_us, 11_000_000);
    }

    #[test]
    fn a_frame_ends_only_after_t35_of_silence() {
        let mut s = slave();
        let frame = rtu(&[0x01, 0x04, 0x00, 0x00, 0x00, 0x01]);
        let end = feed(&mut s, 0, &frame);
        assert_eq!(s.frame_deadline_us(), Some(end + 2006));
        assert_eq!(s.poll(end + 2005, map), None);
        assert_eq!(s.counters().frames, 0, "not ended before t3.5");
        assert!(s.poll(end + 2006, map).is_some());
        assert_eq!(s.frame_deadline_us(), None);
        assert_eq!(s.poll(end + 10_000, map), None, "answered once");
    }

    #[test]
    fn a_gap_above_t15_inside_a_frame_drops_it() {
        let mut s = slave();
        let frame = rtu(&[0x01, 0x04, 0x00, 0x00, 0x00, 0x01]);
        let c = 573;
        // A silence of exactly t1.5 (860 us) before byte 4 is allowed.
        let mut t = 0;
        for (i, &b) in frame.iter().enumerate() {
            t += c + if i == 4 { 860 } else { 0 };
            s.receive(t, b);
        }
        assert!(s.poll(t + 2006, map).is_some(), "t1.5 itself is allowed");
        // 861 us is not.
        let mut t = 1_000_000;
        for (i, &b) in frame.iter().enumerate() {
            t += c + if i == 4 { 861 } else { 0 };
            s.receive(t, b);
        }
        assert_eq!(s.poll(t + 2006, map), None);
        assert_eq!(s.counters().damaged, 1);
    }

    #[test]
    fn a_silence_of_t35_splits_two_frames_fed_before_a_poll() {
        // A board that drains its receive ring late still splits frames by
        // the bytes' own times: another unit's request, t3.5 of silence,
        // then ours, all fed before the first poll.
        let mut s = slave();
        let theirs = rtu(&[0x02, 0x04, 0x00, 0x00, 0x00, 0x01]);
        let ours = rtu(&[0x01, 0x04, 0x00, 0x09, 0x00, 0x01]);
        let end = feed(&mut s, 0, &theirs);
        let end = feed(&mut s, end + 2006, &ours);
        let answer = s.poll(end + 2006, map).map(<[u8]>::to_vec);
        assert_eq!(answer, Some(rtu(&[0x01, 0x04, 0x02, 0x01, 0x09])));
        assert_eq!(s.counters().other_unit, 1);
        // One microsecond less of silence and the two run together into
        // one frame with a gap above t1.5 inside: dropped, nothing answered.
        let mut s = slave();
        let end = feed(&mut s, 0, &theirs);
        let end = feed(&mut s, end + 2005, &ours);
        assert_eq!(s.poll(end + 2006, map), None);
        let c = s.counters();
        assert_eq!((c.frames, c.damaged, c.answered), (1, 1, 0));
    }

    #[test]
    fn an_answer_waits_for_a_frame_coming_in_and_a_good_one_drops_it() {
        // The board busy past the master's wait: our request ended, no
        // poll, and the master has gone on to unit 2. Our answer would go
        // out over unit 2's request or its answer: held while it comes in,
        // dropped once it has come whole, counted.
        let mut s = slave();
        let ours = rtu(&[0x01, 0x04, 0x00, 0x09, 0x00, 0x01]);
        let theirs = rtu(&[0x02, 0x04, 0x00, 0x00, 0x00, 0x01]);
        let end = feed(&mut s, 0, &ours);
        let mid = feed(&mut s, end + 300_000, &theirs[..3]);
        assert_eq!(s.poll(mid + 10, map), None, "inside unit 2's request");
        let end = feed(&mut s, mid, &theirs[3..]);
        assert_eq!(s.poll(end + 2006, map), None, "after it");
        let c = s.counters();
        assert_eq!((c.late, c.answered, c.other_unit), (1, 0, 1));
        // Noise after our request (a damaged character, t3.5 of silence
        // and one character after it, as a master's driver letting go of
        // the line can make): the answer waits for it to pass, then goes.
        let mut s = slave();
        let end = feed(&mut s, 0, &ours);
        s.line_error(end + 2006 + 573);
        assert_eq!(s.poll(end + 2006 + 600, map), None, "inside the noise");
        let answer = s.poll(end + 2006 + 573 + 2006, map).map(<[u8]>::to_vec);
        assert_eq!(answer, Some(rtu(&[0x01, 0x04, 0x02, 0x01, 0x09])));
        let c = s.counters();
        assert_eq!((c.late, c.damaged, c.answered), (0, 1, 1));
        // A whole request garbled here (a bad CRC) is the master going on
        // too: dropped.
        let mut s = slave();
        let end = feed(&mut s, 0, &ours);
        let mut garbled = theirs.clone();
        garbled[7] ^= 0x01;
        let end = feed(&mut s, end + 300_000, &garbled);
        assert_eq!(s.poll(end + 2006, map), None);
        let c = s.counters();
        assert_eq!((c.late, c.bad_crc, c.answered), (1, 1, 0));
        // The same with most of it lost to line errors (3 bytes read, 2
        // characters damaged): still a frame, dropped.
        let mut s = slave();
        let end = feed(&mut s, 0, &ours);
        let end = feed(&mut s, end + 300_000, &theirs[..3]);
        s.line_error(end + 573);
        s.line_error(end + 2 * 573);
        assert_eq!(s.poll(end + 2 * 573 + 2006, map), None);
        let c = s.counters();
        assert_eq!((c.late, c.damaged, c.answered), (1, 1, 0));
        // Polled in time, it is answered, and nothing is late.
        let mut s = slave();
        let answer = ask(&mut s, 0, &ours).map(|a| a.len());
        assert_eq!(answer, Some(7));
        feed(&mut s, 300_000, &theirs);
        assert_eq!(s.counters().late, 0);
    }

    #[test]
    fn line_errors_and_overlong_frames_are_dropped() {
        let mut s = slave();
        let frame = rtu(&[0x01, 0x04, 0x00, 0x00, 0x00, 0x01]);
        let end = feed(&mut s, 0, &frame[..4]);
        s.line_error(end + 573);
        let end = feed(&mut s, end + 573, &frame[5..]);
        assert_eq!(s.poll(end + 2006, map), None);
        assert_eq!(s.counters().damaged, 1);
        // 257 bytes: longer than any RTU frame.
        let long = [0x01u8; MAX_ADU + 1];
        let end = feed(&mut s, 1_000_000, &long);
        assert_eq!(s.poll(end + 2006, map), None);
        assert_eq!(s.counters().damaged, 2);
        // The next good frame is answered.
        assert!(ask(&mut s, 2_000_000, &frame).is_some());
    }

    #[test]
    fn settings_are_checked() {
        assert_eq!(SerialLine::DEFAULT.validate(), Ok(()));
        let d = SerialLine::DEFAULT;
        for (line, err) in [
            (SerialLine { unit_id: 0, ..d }, SerialLineError::UnitId(0)),
            (
                SerialLine { unit_id: 248, ..d },
                SerialLineError::UnitId(248),
            ),
            (
                SerialLine { baud: 14_400, ..d },
                SerialLineError::Baud(14_400),
            ),
        ] {
            assert_eq!(line.validate(), Err(err));
            assert_eq!(RtuSlave::new(&line).err(), Some(err));
        }
        assert_eq!(
            SerialLine {
                unit_id: 247,
                baud: 115_200,
                parity: Parity::None
            }
            .validate(),
            Ok(())
        );
    }

    #[test]
    fn the_frame_gap_for_every_accepted_baud_rate() {
        // t3.5 = 3.5 x 11 bits / baud, rounded up to whole microseconds
        // (worked by hand: 38.5 / 1200 s = 32 083.3 us, ...); above 19200
        // baud fixed at 1750 us (V1.02 section 2.5.1.1).
        let want = [
            (1200, 32_084),
            (2400, 16_042),
            (4800, 8021),
            (9600, 4011),
            (19_200, 2006),
            (38_400, 1750),
            (57_600, 1750),
            (115_200, 1750),
        ];
        assert_eq!(want.map(|(b, _)| b), BAUD_RATES);
        for (baud, t35) in want {
            let line = SerialLine {
                baud,
                ..SerialLine::DEFAULT
            };
            assert_eq!(line.timing().t35_us, t35, "{baud} baud");
            let s = RtuSlave::new(&line).unwrap();
            assert_eq!(s.timing().t35_us, t35, "{baud} baud: the slave's gap");
        }
        // Two stop bits only without parity: 11 bits either way.
        for (p, stop) in [(Parity::Even, 1), (Parity::Odd, 1), (Parity::None, 2)] {
            let line = SerialLine {
                parity: p,
                ..SerialLine::DEFAULT
            };
            assert_eq!(line.stop_bits(), stop, "{p:?}");
        }
    }

    #[test]
    fn reconfigured_the_slave_answers_the_new_unit_at_the_new_gap_only() {
        let mut s = slave();
        let old = rtu(&[0x01, 0x04, 0x00, 0x08, 0x00, 0x01]);
        let new = rtu(&[0x0C, 0x04, 0x00, 0x08, 0x00, 0x01]);
        assert!(ask(&mut s, 0, &old).is_some());
        // Half a frame arrives, then the settings change: it is dropped.
        let t = feed(&mut s, 100_000, &old[..4]);
        let line = SerialLine {
            unit_id: 12,
            baud: 38_400,
            parity: Parity::None,
        };
        s.reconfigure(&line).unwrap();
        assert_eq!(s.frame_deadline_us(), None, "the partial frame is dropped");
        assert_eq!((s.unit_id(), s.timing()), (12, Timing::for_baud(38_400)));
        assert_eq!(
            ask(&mut s, t + 10_000, &old),
            None,
            "the old unit is silent"
        );
        let got = ask(&mut s, t + 20_000, &new).expect("the new unit answers");
        assert_eq!(got, rtu(&[0x0C, 0x04, 0x02, 0x01, 0x08]));
        // Refused settings change nothing.
        let bad = SerialLine { unit_id: 0, ..line };
        assert_eq!(s.reconfigure(&bad), Err(SerialLineError::UnitId(0)));
        assert_eq!(s.unit_id(), 12);
        // The protocol's form converts both ways.
        let m: ModbusSettings = line.into();
        assert_eq!(m.parity, ModbusParity::None);
        assert_eq!(SerialLine::from(m), line);
    }

    /// A UART transmit side that logs what it is asked to do, and fails
    /// its flush on request.
    struct Uart<'a> {
        log: &'a core::cell::RefCell<std::vec::Vec<&'static str>>,
        bytes: std::vec::Vec<u8>,
        fail_flush: bool,
    }

    impl embedded_io::ErrorType for Uart<'_> {
        type Error = embedded_io::ErrorKind;
    }

    impl embedded_io::Write for Uart<'_> {
        fn write(&mut self, buf: &[u8]) -> Result<usize, Self::Error> {
            self.log.borrow_mut().push("write");
            self.bytes.extend_from_slice(buf);
            Ok(buf.len())
        }
        fn flush(&mut self) -> Result<(), Self::Error> {
            self.log.borrow_mut().push("flush: last stop bit out");
            if self.fail_flush {
                Err(embedded_io::ErrorKind::TimedOut)
            } else {
                Ok(())
            }
        }
    }

    /// A driver-enable pin that logs into the same list.
    struct Pin<'a>(&'a core::cell::RefCell<std::vec::Vec<&'static str>>);

    impl embedded_hal::digital::ErrorType for Pin<'_> {
        type Error = core::convert::Infallible;
    }

    impl OutputPin for Pin<'_> {
        fn set_low(&mut self) -> Result<(), Self::Error> {
            self.0.borrow_mut().push("DE low");
            Ok(())
        }
        fn set_high(&mut self) -> Result<(), Self::Error> {
            self.0.borrow_mut().push("DE high");
            Ok(())
        }
    }

    #[test]
    fn driver_enable_spans_the_frame_up_to_the_last_stop_bit() {
        let log = core::cell::RefCell::new(std::vec::Vec::new());
        let uart = Uart {
            log: &log,
            bytes: vec![],
            fail_flush: false,
        };
        let mut port = HalfDuplex::new(uart, Pin(&log)).unwrap();
        port.send(&[0x01, 0x84, 0x02, 0xC2, 0xC1]).unwrap();
        let (uart, _) = port.into_parts();
        assert_eq!(uart.bytes, [0x01, 0x84, 0x02, 0xC2, 0xC1]);
        assert_eq!(
            *log.borrow(),
            [
                "DE low",
                "DE high",
                "write",
                "flush: last stop bit out",
                "DE low"
            ]
        );
    }

    #[test]
    fn a_failed_transmit_still_releases_the_bus() {
        use embedded_hal_mock::eh1::digital::{Mock, State, Transaction};
        let log = core::cell::RefCell::new(std::vec::Vec::new());
        let uart = Uart {
            log: &log,
            bytes: vec![],
            fail_flush: true,
        };
        let mut de = Mock::new(&[
            Transaction::set(State::Low),
            Transaction::set(State::High),
            Transaction::set(State::Low),
        ]);
        let mut port = HalfDuplex::new(uart, de.clone()).unwrap();
        assert_eq!(
            port.send(&[0x01]),
            Err(SendError::Write(embedded_io::ErrorKind::TimedOut))
        );
        de.done();
    }
}
