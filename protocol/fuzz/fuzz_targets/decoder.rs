//! Fuzz target for the streaming frame decoder.
//!
//! The first input byte picks a chunk size; the rest is fed in chunks of that
//! size to a host-side and a device-side decoder. Beyond "never panics", it
//! checks that every result is counted exactly once in the stats, that the
//! frame buffer never holds more than a frame, and that every message that
//! decodes re-encodes into a frame that decodes to the same bytes again.
#![no_main]

use fringe_protocol::frame::{encode, FrameDecoder, MAX_FRAME_LEN};
use fringe_protocol::{DeviceFrame, HostFrame};
use libfuzzer_sys::fuzz_target;
use serde::{de::DeserializeOwned, Serialize};

fn run<T: Serialize + DeserializeOwned>(chunk: usize, data: &[u8]) {
    let mut dec = FrameDecoder::<T>::new();
    let mut results = 0u32;
    for part in data.chunks(chunk) {
        for r in dec.push(part) {
            results += 1;
            if let Ok(msg) = r {
                let mut a = [0u8; MAX_FRAME_LEN];
                let n = encode(&msg, &mut a).expect("a decoded message re-encodes");
                let mut again = FrameDecoder::<T>::new();
                let back = again
                    .push(&a[..n])
                    .next()
                    .expect("one frame")
                    .expect("decodes");
                let mut b = [0u8; MAX_FRAME_LEN];
                let m = encode(&back, &mut b).expect("re-encodes");
                assert_eq!(&a[..n], &b[..m], "encoding is stable");
            }
        }
        assert!(dec.pending() <= MAX_FRAME_LEN);
    }
    let s = dec.stats();
    assert_eq!(s.frames + s.errors(), results, "every result counted once");
}

fuzz_target!(|data: &[u8]| {
    let Some((&first, rest)) = data.split_first() else {
        return;
    };
    let chunk = usize::from(first % 64) + 1;
    run::<HostFrame>(chunk, rest);
    run::<DeviceFrame>(chunk, rest);
});
