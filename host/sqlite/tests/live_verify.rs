//! Verifying the chain of a store that another process is writing (an
//! auditor's `fringe audit verify` on a gateway's live SQLite file): the
//! verification checks the chain up to the head it read first, so it never
//! reports a break that a writer's commit between its reads made up
//! (before, 51 of 77 verifications beside one writer did). (Found by the soak: a
//! verification run while three pulls wrote the same file reported a broken
//! chain that verified once they were done.)

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

mod common;

use common::reading;
use fringe_protocol::Reading;
use fringe_sqlite::Store;
use fringe_store::Source;

#[test]
fn a_verification_beside_writers_sees_one_consistent_chain() {
    let dir = tempfile::tempdir().expect("dir");
    let path = dir.path().join("live.db");
    Store::open(&path).expect("create");
    let stop = Arc::new(AtomicBool::new(false));
    // A writer with its own connection, as a gateway's process would be.
    let writers: Vec<_> = (0..1u32)
        .map(|w| {
            let (path, stop) = (path.clone(), Arc::clone(&stop));
            std::thread::spawn(move || {
                let mut s = Store::open(&path).expect("writer");
                let serial = format!("HGM-LV-000{w}");
                let mut c = 0u32;
                while !stop.load(Ordering::Relaxed) && c < 40_000 {
                    let batch: Vec<Reading> = (c..c + 5).map(|k| reading(1, k)).collect();
                    let t = std::time::Instant::now();
                    s.insert_readings(&serial, &batch, Source::Stream)
                        .unwrap_or_else(|e| panic!("insert at {c} after {:?}: {e:?}", t.elapsed()));
                    c += 5;
                }
                c
            })
        })
        .collect();
    let reader = Store::open_read_only(&path).expect("reader");
    let mut checked = 0;
    let mut broken = Vec::new();
    let t0 = std::time::Instant::now();
    while t0.elapsed() < std::time::Duration::from_secs(4) {
        let v = reader.verify_chain().expect("verify");
        checked += 1;
        if !v.ok() {
            broken.push(format!("{:?}", v.problems));
        }
    }
    stop.store(true, Ordering::Relaxed);
    let written: u32 = writers.into_iter().map(|h| h.join().expect("writer")).sum();
    assert!(written > 100, "the writers wrote only {written} readings");
    assert!(checked >= 5, "only {checked} verifications ran");
    assert!(
        broken.is_empty(),
        "{} of {checked} verifications beside the writers reported a break, e.g. {}",
        broken.len(),
        broken[0]
    );
    // And once they are done, as it should.
    assert!(reader.verify_chain().expect("verify").ok());
}
