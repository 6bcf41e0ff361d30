//! Decoder robustness: valid frames interleaved with random garbage and split
//! at random chunk boundaries come out exactly once each, in order, with the
//! garbage counted; each kind of damaged frame gives its own typed error.
//! Every random test prints its seed on failure (rerun with `FRINGE_SEED=`).

mod common;

use common::*;
use fringe_protocol::frame::{encode, encode_vec, encode_with_version, MAX_RAW_LEN};
use fringe_protocol::*;
use proptest::prelude::*;
use proptest::strategy::ValueTree;
use proptest::test_runner::TestRunner;

/// One garbage burst: random bytes, then a `0x00` (line noise followed by a
/// sender's flushing zero). Returns the bytes and how many non-empty
/// zero-delimited segments it holds (each must give exactly one error).
fn garbage(rng: &mut proptest::test_runner::TestRng) -> (Vec<u8>, u32, u32) {
    loop {
        let len = match rng.random_range(0..10u32) {
            0 => rng.random_range(MAX_FRAME_LEN..3 * MAX_FRAME_LEN), // oversize
            _ => rng.random_range(1..40usize),
        };
        let zero_odds = rng.random_range(0..4u32); // some bursts hold zeros, some none
        let mut g: Vec<u8> = (0..len)
            .map(|_| {
                if zero_odds > 0 && rng.random_range(0..16u32) < zero_odds {
                    0
                } else {
                    rng.random_range(1..=255u8)
                }
            })
            .collect();
        g.push(0);
        // A burst that happens to hold a valid frame (2^-32 per segment) is
        // drawn again, so the expected counts are exact.
        let mut probe = FrameDecoder::<DeviceFrame>::new();
        if probe.push(&g).any(|r| r.is_ok()) {
            continue;
        }
        let segments = g.split(|&b| b == 0).filter(|s| !s.is_empty());
        let (n, bytes) = segments.fold((0, 0), |(n, b), s| (n + 1, b + s.len() as u32 + 1));
        return (g, n, bytes);
    }
}

#[test]
fn garbage_and_random_chunks_yield_every_frame_once() {
    let seed = seed();
    let mut rng = rng(seed);
    let mut runner = TestRunner::new_with_rng(Default::default(), rng.clone());
    let strategy = device_frame();
    for round in 0..60 {
        let frames: Vec<DeviceFrame> = (0..rng.random_range(1..40usize))
            .map(|_| strategy.new_tree(&mut runner).unwrap().current())
            .collect();
        let mut stream = Vec::new();
        let (mut bursts, mut garbage_bytes) = (0u32, 0u32);
        for f in &frames {
            if rng.random_bool(0.5) {
                let (g, n, b) = garbage(&mut rng);
                stream.extend_from_slice(&g);
                bursts += n;
                garbage_bytes += b;
            }
            stream.extend_from_slice(&encode_vec(f).unwrap());
        }
        let mut dec = FrameDecoder::<DeviceFrame>::new();
        let (mut got, mut errors) = (Vec::new(), 0u32);
        let mut pos = 0;
        while pos < stream.len() {
            let n = match rng.random_range(0..8u32) {
                0 => 0,
                1..=5 => rng.random_range(1..8usize),
                _ => rng.random_range(8..200usize),
            }
            .min(stream.len() - pos);
            for r in dec.push(&stream[pos..pos + n]) {
                match r {
                    Ok(f) => got.push(f),
                    Err(_) => errors += 1,
                }
            }
            pos += n;
        }
        let ctx = format!("round {round}, seed {seed} (rerun with FRINGE_SEED={seed})");
        assert_eq!(got.len(), frames.len(), "frames out, {ctx}");
        for (i, (g, f)) in got.iter().zip(&frames).enumerate() {
            assert!(same(g, &device_frame_on_wire(f)), "frame {i}, {ctx}");
        }
        let s = dec.stats();
        assert_eq!(errors, bursts, "errors, {ctx}");
        assert_eq!(s.errors(), bursts, "counted errors, {ctx}");
        assert_eq!(s.frames, frames.len() as u32, "counted frames, {ctx}");
        assert_eq!(s.dropped_bytes, garbage_bytes, "dropped bytes, {ctx}");
        assert_eq!(dec.pending(), 0, "{ctx}");
    }
}

/// A valid status request, its raw bytes (header + payload + CRC, before
/// COBS), and the decoder that should see it.
fn raw_frame() -> Vec<u8> {
    let msg = HostFrame {
        id: 5,
        auth: None,
        request: Request::StartStream { period_ms: 1000 },
    };
    let wire = encode_vec(&msg).unwrap();
    let mut raw = vec![0u8; MAX_RAW_LEN];
    let n = cobs::decode(&wire[..wire.len() - 1], &mut raw)
        .unwrap()
        .frame_size();
    raw.truncate(n);
    raw
}

fn cobs_frame(raw: &[u8]) -> Vec<u8> {
    let mut out = vec![0u8; cobs::max_encoding_length(raw.len()) + 1];
    let n = cobs::encode(raw, &mut out);
    out.truncate(n);
    out.push(0);
    out
}

fn with_crc(body: &[u8]) -> Vec<u8> {
    let mut raw = body.to_vec();
    raw.extend_from_slice(&frame::CRC.checksum(body).to_le_bytes());
    raw
}

/// Decodes `bytes` with a fresh decoder, expecting exactly one result.
fn one(bytes: &[u8]) -> (Result<HostFrame, FrameError>, frame::DecoderStats) {
    let mut dec = FrameDecoder::<HostFrame>::new();
    let mut out: Vec<_> = dec.push(bytes).collect();
    assert_eq!(out.len(), 1, "{bytes:02x?}");
    (out.remove(0), dec.stats())
}

#[test]
fn truncated_frame() {
    // Shorter than header + CRC.
    for raw in [&[0x10u8][..], &[0x10, 0x01, 0x02, 0x03]] {
        let (r, s) = one(&cobs_frame(raw));
        assert_eq!(r, Err(FrameError::Truncated));
        assert_eq!(s.truncated, 1);
    }
    // A frame cut short on the line: its last COBS block runs past the
    // delimiter, or (cut at a block boundary) its CRC no longer matches.
    let wire = encode_vec(&HostFrame {
        id: 5,
        auth: Some(Auth {
            counter: 1,
            tag: [7; 32],
        }),
        request: Request::Reboot,
    })
    .unwrap();
    let mut cut = wire[..wire.len() - 6].to_vec();
    cut.push(0);
    let (r, s) = one(&cut);
    assert_eq!(r, Err(FrameError::BadCobs));
    assert_eq!(s.bad_cobs, 1);
}

#[test]
fn oversize_frame() {
    let mut long = vec![0x55u8; MAX_FRAME_LEN + 10];
    long.push(0);
    let (r, s) = one(&long);
    assert_eq!(r, Err(FrameError::TooLong));
    assert_eq!(s.too_long, 1);
    assert_eq!(s.dropped_bytes, long.len() as u32);
    // And the encoder refuses to build one.
    struct Big;
    impl serde::Serialize for Big {
        fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
            s.serialize_bytes(&[1u8; MAX_PAYLOAD_LEN])
        }
    }
    let mut buf = [0u8; MAX_FRAME_LEN];
    assert_eq!(
        encode(&Big, &mut buf),
        Err(frame::EncodeError::PayloadTooLong)
    );
}

#[test]
fn wrong_version() {
    let msg = HostFrame {
        id: 1,
        auth: None,
        request: Request::Status,
    };
    let mut buf = [0u8; MAX_FRAME_LEN];
    let v2 = Version { major: 2, minor: 0 };
    let n = encode_with_version(&msg, v2, &mut buf).unwrap();
    let (r, s) = one(&buf[..n]);
    assert_eq!(r, Err(FrameError::UnsupportedVersion(v2)));
    assert_eq!(s.bad_version, 1);
    // A newer minor of the same major is accepted.
    let v1_9 = Version { major: 1, minor: 9 };
    let n = encode_with_version(&msg, v1_9, &mut buf).unwrap();
    assert_eq!(one(&buf[..n]).0, Ok(msg));
}

#[test]
fn bad_crc() {
    let seed = seed();
    let mut rng = rng(seed);
    let raw = raw_frame();
    // Every single-bit flip anywhere in the raw frame is caught (CRC-32
    // detects all 1-bit errors), whatever part it lands in.
    for byte in 0..raw.len() {
        let mut bad = raw.clone();
        bad[byte] ^= 1 << rng.random_range(0..8u32);
        let (r, s) = one(&cobs_frame(&bad));
        assert_eq!(r, Err(FrameError::BadCrc), "byte {byte}, seed {seed}");
        assert_eq!(s.bad_crc, 1);
    }
}

#[test]
fn undecodable_payload() {
    // Good CRC and version, but not a HostFrame: a request tag past the last variant.
    let (r, s) = one(&cobs_frame(&with_crc(&[0x10, 0x01, 0x00, 0x7f])));
    assert_eq!(r, Err(FrameError::Undecodable));
    assert_eq!(s.undecodable, 1);
    // Trailing bytes after a complete message are refused too.
    let mut body = raw_frame();
    body.truncate(body.len() - 4);
    body.push(0x00);
    let (r, _) = one(&cobs_frame(&with_crc(&body)));
    assert_eq!(r, Err(FrameError::Undecodable));
}

#[test]
fn error_kinds_each_counted_and_decoder_recovers() {
    let good = cobs_frame(&raw_frame());
    let mut bad_crc = raw_frame();
    bad_crc[2] ^= 0x40;
    let mut v2 = raw_frame();
    v2[0] = 0x20;
    let v2 = with_crc(&v2[..v2.len() - 4]);
    let mut stream = Vec::new();
    for part in [
        cobs_frame(&[0x10]),           // truncated
        vec![0x33; MAX_FRAME_LEN + 1], // too long...
        vec![0],                       // ...until here
        cobs_frame(&bad_crc),
        cobs_frame(&v2),
        vec![0x02, 0x11, 0x05, 0x00], // bad COBS (block past the delimiter)
        good.clone(),
    ] {
        stream.extend_from_slice(&part);
    }
    let mut dec = FrameDecoder::<HostFrame>::new();
    let out: Vec<_> = dec.push(&stream).collect();
    assert_eq!(out.len(), 6);
    assert!(out[5].is_ok());
    let s = dec.stats();
    assert_eq!(
        (
            s.truncated,
            s.too_long,
            s.bad_crc,
            s.bad_version,
            s.bad_cobs,
            s.frames
        ),
        (1, 1, 1, 1, 1, 1)
    );
    assert_eq!(s.errors(), 5);
    // Display names the problem for a person.
    assert!(format!("{}", out[3].as_ref().unwrap_err()).contains("2.0"));
}
