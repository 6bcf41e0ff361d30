//! Framing and the streaming decoder.
//!
//! ```text
//! raw frame (before COBS):
//! +--------+---------------------------+----------------------+
//! | header | postcard payload          | CRC-32/ISO-HDLC (LE) |
//! | 1 byte | 0..=MAX_PAYLOAD_LEN bytes | over header+payload  |
//! +--------+---------------------------+----------------------+
//! header = protocol major << 4 | minor
//!
//! on the wire:  COBS(raw frame)  0x00
//! ```
//!
//! COBS (Cheshire and Baker 1999) removes every zero byte from the raw frame so
//! that `0x00` can only be a delimiter: a receiver that joins mid-stream or
//! sees garbage resynchronises at the next zero. Empty frames (two zeros in a
//! row) are ignored, so a sender may lead with a zero to flush the line.
//!
//! [`FrameDecoder`] takes chunks of any size, never allocates, never panics,
//! and counts every kind of error in [`DecoderStats`].

use core::fmt;
use core::marker::PhantomData;

use serde::{de::DeserializeOwned, Serialize};

use crate::version::{Version, PROTOCOL_VERSION};

/// Largest postcard payload in one frame, bytes.
pub const MAX_PAYLOAD_LEN: usize = 384;
/// Largest raw frame: header + payload + CRC.
pub const MAX_RAW_LEN: usize = 1 + MAX_PAYLOAD_LEN + 4;
/// Largest frame on the wire, COBS overhead and the delimiter included.
pub const MAX_FRAME_LEN: usize = cobs::max_encoding_length(MAX_RAW_LEN) + 1;

/// Table layout of the CRC: one 1 KiB byte-wise table on microcontrollers
/// (flash is scarce), slice-by-16 (16 KiB, several times faster) on hosts.
/// Both compute the same CRC.
#[cfg(target_os = "none")]
pub type CrcTable = crc::Table<1>;
/// Table layout of the CRC (see the embedded variant).
#[cfg(not(target_os = "none"))]
pub type CrcTable = crc::Table<16>;

/// The CRC used: CRC-32/ISO-HDLC (poly 0x04C11DB7 reflected, init and xorout
/// 0xFFFFFFFF), check value 0xCBF43926.
pub const CRC: crc::Crc<u32, CrcTable> = crc::Crc::<u32, CrcTable>::new(&crc::CRC_32_ISO_HDLC);

/// Encoding failed: the message does not fit in [`MAX_PAYLOAD_LEN`] or the
/// output buffer.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum EncodeError {
    /// The postcard payload exceeds [`MAX_PAYLOAD_LEN`].
    PayloadTooLong,
    /// The output buffer is too small (give it [`MAX_FRAME_LEN`] bytes).
    BufferTooSmall,
    /// The version does not fit the one-byte header.
    BadVersion,
}

impl fmt::Display for EncodeError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            EncodeError::PayloadTooLong => {
                write!(f, "message longer than {MAX_PAYLOAD_LEN} bytes")
            }
            EncodeError::BufferTooSmall => write!(f, "output buffer too small for the frame"),
            EncodeError::BadVersion => write!(f, "protocol version does not fit the header"),
        }
    }
}

impl core::error::Error for EncodeError {}

/// Encodes `msg` as one complete frame (COBS bytes and the trailing `0x00`)
/// into `out`, with this crate's [`PROTOCOL_VERSION`] in the header.
///
/// # Errors
/// [`EncodeError`] if the message or the frame does not fit.
pub fn encode<T: Serialize>(msg: &T, out: &mut [u8]) -> Result<usize, EncodeError> {
    encode_with_version(msg, PROTOCOL_VERSION, out)
}

/// As [`encode`], with an explicit header version (for tests and for
/// answering a peer of another version with an error it can read).
///
/// # Errors
/// [`EncodeError`] if the message or the frame does not fit.
pub fn encode_with_version<T: Serialize>(
    msg: &T,
    version: Version,
    out: &mut [u8],
) -> Result<usize, EncodeError> {
    let mut raw = [0u8; MAX_RAW_LEN];
    let header = version.header_byte().ok_or(EncodeError::BadVersion)?;
    raw[0] = header;
    let payload_len = postcard::to_slice(msg, &mut raw[1..1 + MAX_PAYLOAD_LEN])
        .map_err(|_| EncodeError::PayloadTooLong)?
        .len();
    let body_len = 1 + payload_len;
    let crc = CRC.checksum(&raw[..body_len]);
    raw[body_len..body_len + 4].copy_from_slice(&crc.to_le_bytes());
    let raw_len = body_len + 4;
    let n = cobs::try_encode(&raw[..raw_len], out).map_err(|_| EncodeError::BufferTooSmall)?;
    let slot = out.get_mut(n).ok_or(EncodeError::BufferTooSmall)?;
    *slot = 0;
    Ok(n + 1)
}

/// Encodes `msg` into a bounded vector (see [`encode`]).
///
/// # Errors
/// [`EncodeError::PayloadTooLong`] if the message does not fit.
pub fn encode_vec<T: Serialize>(msg: &T) -> Result<heapless::Vec<u8, MAX_FRAME_LEN>, EncodeError> {
    let mut buf = [0u8; MAX_FRAME_LEN];
    let n = encode(msg, &mut buf)?;
    let mut v = heapless::Vec::new();
    v.extend_from_slice(&buf[..n])
        .map_err(|_| EncodeError::BufferTooSmall)?;
    Ok(v)
}

/// What went wrong with one frame. Each is counted in [`DecoderStats`].
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum FrameError {
    /// Bad COBS: a block runs past the delimiter. This is what a frame cut
    /// short (or garbage) looks like.
    BadCobs,
    /// The decoded frame is shorter than header + CRC.
    Truncated,
    /// The frame exceeded [`MAX_FRAME_LEN`] before its delimiter; the bytes up
    /// to the next delimiter were dropped.
    TooLong,
    /// The CRC did not match.
    BadCrc,
    /// The header names a protocol major version we do not speak.
    UnsupportedVersion(Version),
    /// The CRC matched but the payload is not a message of the expected type.
    Undecodable,
}

impl fmt::Display for FrameError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            FrameError::BadCobs => write!(f, "bad COBS framing (frame cut short or garbage)"),
            FrameError::Truncated => write!(f, "frame shorter than header and CRC"),
            FrameError::TooLong => write!(f, "frame longer than {MAX_FRAME_LEN} bytes"),
            FrameError::BadCrc => write!(f, "CRC mismatch"),
            FrameError::UnsupportedVersion(v) => write!(
                f,
                "peer speaks protocol {v}, we speak {PROTOCOL_VERSION} (major versions must match)"
            ),
            FrameError::Undecodable => write!(f, "payload is not a valid message"),
        }
    }
}

impl core::error::Error for FrameError {}

/// Counters kept by a [`FrameDecoder`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct DecoderStats {
    /// Frames decoded successfully.
    pub frames: u32,
    /// [`FrameError::BadCobs`] count.
    pub bad_cobs: u32,
    /// [`FrameError::Truncated`] count.
    pub truncated: u32,
    /// [`FrameError::TooLong`] count.
    pub too_long: u32,
    /// [`FrameError::BadCrc`] count.
    pub bad_crc: u32,
    /// [`FrameError::UnsupportedVersion`] count.
    pub bad_version: u32,
    /// [`FrameError::Undecodable`] count.
    pub undecodable: u32,
    /// Bytes that belonged to frames that failed, their delimiters included.
    pub dropped_bytes: u32,
}

impl DecoderStats {
    /// All errors together.
    pub fn errors(&self) -> u32 {
        self.bad_cobs
            .saturating_add(self.truncated)
            .saturating_add(self.too_long)
            .saturating_add(self.bad_crc)
            .saturating_add(self.bad_version)
            .saturating_add(self.undecodable)
    }
}

/// Streaming frame decoder for messages of type `T`.
///
/// Feed it bytes as they arrive; it yields one `Result` per delimited frame.
/// It holds one frame buffer of [`MAX_FRAME_LEN`] bytes and nothing else.
pub struct FrameDecoder<T> {
    buf: [u8; MAX_FRAME_LEN],
    len: usize,
    overflow: bool,
    stats: DecoderStats,
    _t: PhantomData<fn() -> T>,
}

impl<T> Default for FrameDecoder<T> {
    fn default() -> Self {
        Self::new()
    }
}

impl<T> fmt::Debug for FrameDecoder<T> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("FrameDecoder")
            .field("pending", &self.len)
            .field("overflow", &self.overflow)
            .field("stats", &self.stats)
            .finish()
    }
}

impl<T> FrameDecoder<T> {
    /// An empty decoder.
    pub const fn new() -> Self {
        Self {
            buf: [0; MAX_FRAME_LEN],
            len: 0,
            overflow: false,
            stats: DecoderStats {
                frames: 0,
                bad_cobs: 0,
                truncated: 0,
                too_long: 0,
                bad_crc: 0,
                bad_version: 0,
                undecodable: 0,
                dropped_bytes: 0,
            },
            _t: PhantomData,
        }
    }

    /// Counters so far.
    pub fn stats(&self) -> DecoderStats {
        self.stats
    }

    /// Bytes of a frame not yet delimited.
    pub fn pending(&self) -> usize {
        self.len
    }

    /// Drops a partly received frame (e.g. after a reconnect).
    pub fn reset(&mut self) {
        self.len = 0;
        self.overflow = false;
    }
}

/// A byte count for the stats, saturating.
fn count(n: usize) -> u32 {
    u32::try_from(n).unwrap_or(u32::MAX)
}

impl<T: DeserializeOwned> FrameDecoder<T> {
    /// Feeds one byte; returns a result when the byte closed a non-empty frame.
    pub fn feed(&mut self, byte: u8) -> Option<Result<T, FrameError>> {
        if byte != 0 {
            self.absorb(&[byte]);
            return None;
        }
        self.delimiter()
    }

    /// Takes a run of non-delimiter bytes into the frame buffer, or counts
    /// them as dropped once the frame has grown past [`MAX_FRAME_LEN`].
    fn absorb(&mut self, bytes: &[u8]) {
        if self.overflow {
            self.stats.dropped_bytes = self.stats.dropped_bytes.saturating_add(count(bytes.len()));
            return;
        }
        match self.buf.get_mut(self.len..self.len + bytes.len()) {
            Some(dst) => {
                dst.copy_from_slice(bytes);
                self.len += bytes.len();
            }
            None => {
                self.overflow = true;
                let n = self.len.saturating_add(bytes.len());
                self.stats.dropped_bytes = self.stats.dropped_bytes.saturating_add(count(n));
            }
        }
    }

    /// A `0x00` arrived: closes the frame, if any.
    fn delimiter(&mut self) -> Option<Result<T, FrameError>> {
        if self.overflow {
            self.overflow = false;
            self.len = 0;
            self.stats.dropped_bytes = self.stats.dropped_bytes.saturating_add(1);
            self.stats.too_long = self.stats.too_long.saturating_add(1);
            return Some(Err(FrameError::TooLong));
        }
        if self.len == 0 {
            return None;
        }
        let n = core::mem::take(&mut self.len);
        let result = self.finish(n);
        match &result {
            Ok(_) => self.stats.frames = self.stats.frames.saturating_add(1),
            Err(e) => {
                self.stats.dropped_bytes = self.stats.dropped_bytes.saturating_add(n as u32 + 1);
                let c = match e {
                    FrameError::BadCobs => &mut self.stats.bad_cobs,
                    FrameError::Truncated => &mut self.stats.truncated,
                    FrameError::TooLong => &mut self.stats.too_long,
                    FrameError::BadCrc => &mut self.stats.bad_crc,
                    FrameError::UnsupportedVersion(_) => &mut self.stats.bad_version,
                    FrameError::Undecodable => &mut self.stats.undecodable,
                };
                *c = c.saturating_add(1);
            }
        }
        Some(result)
    }

    fn finish(&mut self, n: usize) -> Result<T, FrameError> {
        let frame = self.buf.get_mut(..n).ok_or(FrameError::TooLong)?;
        let raw_len = cobs::decode_in_place(frame).map_err(|_| FrameError::BadCobs)?;
        let raw = frame.get(..raw_len).ok_or(FrameError::BadCobs)?;
        if raw_len < 5 {
            return Err(FrameError::Truncated);
        }
        let (body, crc_bytes) = raw.split_at(raw_len - 4);
        let mut c = [0u8; 4];
        c.copy_from_slice(crc_bytes);
        if CRC.checksum(body) != u32::from_le_bytes(c) {
            return Err(FrameError::BadCrc);
        }
        let (header, payload) = body.split_first().ok_or(FrameError::Truncated)?;
        let version = Version::from_header_byte(*header);
        if version.major != PROTOCOL_VERSION.major {
            return Err(FrameError::UnsupportedVersion(version));
        }
        match postcard::take_from_bytes::<T>(payload) {
            Ok((msg, [])) => Ok(msg),
            _ => Err(FrameError::Undecodable),
        }
    }

    /// Feeds a chunk; the iterator yields one result per frame the chunk
    /// completes. Bytes not consumed when the iterator is dropped are lost,
    /// so drain it.
    pub fn push<'a>(&'a mut self, chunk: &'a [u8]) -> Push<'a, T> {
        Push {
            dec: self,
            chunk,
            pos: 0,
        }
    }
}

/// Iterator returned by [`FrameDecoder::push`].
pub struct Push<'a, T> {
    dec: &'a mut FrameDecoder<T>,
    chunk: &'a [u8],
    pos: usize,
}

impl<T: DeserializeOwned> Iterator for Push<'_, T> {
    type Item = Result<T, FrameError>;

    fn next(&mut self) -> Option<Self::Item> {
        // Whole runs up to the next delimiter are copied at once.
        while let Some(rest) = self.chunk.get(self.pos..).filter(|r| !r.is_empty()) {
            match memchr::memchr(0, rest) {
                None => {
                    self.dec.absorb(rest);
                    self.pos = self.chunk.len();
                }
                Some(i) => {
                    self.dec.absorb(rest.get(..i).unwrap_or(&[]));
                    self.pos += i + 1;
                    if let Some(r) = self.dec.delimiter() {
                        return Some(r);
                    }
                }
            }
        }
        None
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::msg::*;

    #[test]
    fn crc_check_value() {
        // CRC-32/ISO-HDLC check value, RevEng CRC catalogue (Rocksoft/Williams model).
        assert_eq!(CRC.checksum(b"123456789"), 0xCBF4_3926);
    }

    #[test]
    fn cobs_published_examples() {
        // Cheshire and Baker, IEEE/ACM Trans. Networking 7(2), 1999, and the
        // worked examples commonly reproduced from it.
        let cases: &[(&[u8], &[u8])] = &[
            (&[0x00], &[0x01, 0x01]),
            (&[0x00, 0x00], &[0x01, 0x01, 0x01]),
            (&[0x11, 0x22, 0x00, 0x33], &[0x03, 0x11, 0x22, 0x02, 0x33]),
            (&[0x11, 0x22, 0x33, 0x44], &[0x05, 0x11, 0x22, 0x33, 0x44]),
            (&[0x11, 0x00, 0x00, 0x00], &[0x02, 0x11, 0x01, 0x01, 0x01]),
        ];
        for (raw, enc) in cases {
            let mut out = [0u8; 16];
            let n = cobs::encode(raw, &mut out);
            assert_eq!(&out[..n], *enc, "encode {raw:02x?}");
            let mut back = [0u8; 16];
            let r = cobs::decode(enc, &mut back).unwrap();
            assert_eq!(&back[..r.frame_size()], *raw, "decode {enc:02x?}");
        }
        // 254 non-zero bytes: one full block, code 0xFF.
        let raw: std::vec::Vec<u8> = (1..=254u8).collect();
        let mut out = [0u8; 300];
        let n = cobs::encode(&raw, &mut out);
        assert_eq!(out[0], 0xFF);
        assert_eq!(&out[1..255], &raw[..]);
        assert!(n == 255 || (n == 256 && out[255] == 0x01));
    }

    #[test]
    fn round_trip_and_garbage() {
        let msg = HostFrame {
            id: 7,
            auth: None,
            request: Request::Status,
        };
        let f = encode_vec(&msg).unwrap();
        let mut dec = FrameDecoder::<HostFrame>::new();
        let mut stream = std::vec![0x13, 0x37, 0x00];
        stream.extend_from_slice(&f);
        let out: std::vec::Vec<_> = dec.push(&stream).collect();
        assert_eq!(out.len(), 2);
        assert!(out[0].is_err());
        assert_eq!(out[1].as_ref().unwrap(), &msg);
        assert_eq!(dec.stats().frames, 1);
        assert_eq!(dec.stats().errors(), 1);
    }

    #[test]
    fn sizes_as_documented_in_wire_md() {
        assert_eq!(
            (MAX_PAYLOAD_LEN, MAX_RAW_LEN, MAX_FRAME_LEN),
            (384, 389, 392)
        );
    }

    #[test]
    fn max_frame_len_holds_biggest_payload() {
        let mut out = [0u8; MAX_FRAME_LEN];
        let big = [0xA5u8; MAX_PAYLOAD_LEN - 3];
        // A byte string of that length encodes as a 2-byte varint length + bytes.
        struct Bytes<'a>(&'a [u8]);
        impl Serialize for Bytes<'_> {
            fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
                s.serialize_bytes(self.0)
            }
        }
        let n = encode(&Bytes(&big), &mut out).unwrap();
        assert!(n <= MAX_FRAME_LEN);
        let too_big = [0xA5u8; MAX_PAYLOAD_LEN];
        assert_eq!(
            encode(&Bytes(&too_big), &mut out),
            Err(EncodeError::PayloadTooLong)
        );
    }
}
