//! Fuzz target for the message payloads themselves.
//!
//! Through [`decoder`](decoder.rs) almost every mutated input fails the
//! CRC, so the postcard decoding behind it is seldom reached. This target
//! feeds the bytes straight to postcard as a `HostFrame` and as a
//! `DeviceFrame`: it must never panic, and whatever decodes must re-encode
//! into a frame (so every message fits one) and come back with the same encoding.
#![no_main]

use fringe_protocol::frame::{encode, FrameDecoder, MAX_FRAME_LEN};
use fringe_protocol::{DeviceFrame, HostFrame};
use libfuzzer_sys::fuzz_target;
use serde::{de::DeserializeOwned, Serialize};

fn run<T: Serialize + DeserializeOwned>(data: &[u8]) {
    let Ok((msg, _rest)) = postcard::take_from_bytes::<T>(data) else {
        return;
    };
    let mut a = [0u8; MAX_FRAME_LEN];
    // Every message the types allow fits a frame (bounded vectors and strings).
    let n = encode(&msg, &mut a).expect("every decodable message fits a frame");
    let mut dec = FrameDecoder::<T>::new();
    let back = dec
        .push(&a[..n])
        .next()
        .expect("one frame")
        .expect("decodes");
    let mut b = [0u8; MAX_FRAME_LEN];
    let m = encode(&back, &mut b).expect("re-encodes");
    assert_eq!(&a[..n], &b[..m], "encoding is stable");
}

fuzz_target!(|data: &[u8]| {
    run::<HostFrame>(data);
    run::<DeviceFrame>(data);
});
