//! Faults in the store as test inputs, following SQLite's own testing
//! (sqlite.org/testing.html: I/O error and out-of-space tests, crash
//! tests): a write that fails at its Nth operation, raised until it
//! succeeds, loses no committed reading and stores none twice; a power cut
//! (the database and its WAL copied at random moments inside a batch)
//! reopens to a consistent chain. The counts of each loop are printed and
//! recorded in BENCHMARKS.md ("Store fault loops").
//!
//! Two fault kinds stand in for a failing disk: a full database (SQLite's
//! `max_page_count`, which fails a write with SQLITE_FULL exactly as a full
//! file system does) and a write interrupted at its Nth virtual-machine
//! step (SQLite's progress handler). The power cut copies the files between
//! two steps of the writer (its own thread, so the copy is not torn); a
//! torn page write inside one step is left to SQLite's WAL checksums and
//! not simulated here.

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;

mod common;

use fringe_protocol::Reading;
use fringe_sqlite::Store;
use fringe_store::{Source, StoreError};
use rand::{rngs::StdRng, RngExt as _, SeedableRng};

const SERIAL: &str = "HGM-L2-0400";

fn reading(counter: u32) -> Reading {
    common::reading(3, counter)
}

fn batch(range: std::ops::Range<u32>) -> Vec<Reading> {
    range.map(reading).collect()
}

/// A closed database holding counters 0..600 in three batches.
fn base(dir: &Path) -> PathBuf {
    let p = dir.join("base.db");
    let mut s = Store::open(&p).expect("open");
    for b in [0..200, 200..400, 400..600] {
        s.insert_readings(SERIAL, &batch(b), Source::Stream)
            .expect("base batch");
    }
    p
}

fn copy_db(from: &Path, to_dir: &Path) -> PathBuf {
    std::fs::create_dir_all(to_dir).expect("dir");
    let to = to_dir.join("line2.db");
    std::fs::copy(from, &to).expect("copy db");
    to
}

/// The counters stored, checked for order and uniqueness; the chain and
/// SQLite's integrity check must pass.
fn consistent(path: &Path, ctx: &str) -> Vec<u32> {
    let s = Store::open(path).unwrap_or_else(|e| panic!("{ctx}: reopen: {e}"));
    s.check_integrity(true)
        .unwrap_or_else(|e| panic!("{ctx}: integrity: {e}"));
    let chain = s.verify_chain().expect("verify");
    assert!(chain.ok(), "{ctx}: chain: {:?}", chain.problems);
    let mut got: Vec<u32> = s
        .readings(SERIAL)
        .unwrap_or_else(|e| panic!("{ctx}: read: {e}"))
        .iter()
        .map(|r| r.reading.seq.counter)
        .collect();
    let n = got.len();
    got.dedup();
    assert_eq!(got.len(), n, "{ctx}: a reading stored twice");
    got
}

/// What a fault loop counted.
#[derive(Debug, Default)]
struct Counts {
    runs: u32,
    failed: u32,
}

/// Batch A (600..800) then batch B (700..1000, overlapping A by 100, as a
/// backfill does) into a copy of the base, with `fault` set up on the
/// connection; then reopen, check, and retry both as the line session
/// would. Returns whether both went through the first time.
fn one_run(
    base: &Path,
    dir: &Path,
    ctx: &str,
    fault: &mut dyn FnMut(&mut Store),
    allowed: &dyn Fn(&StoreError) -> bool,
) -> bool {
    let a = batch(600..800);
    let b = batch(700..1000);
    let work = copy_db(base, dir);
    let mut s = Store::open(&work).expect("open copy");
    fault(&mut s);
    let ra = s.insert_readings(SERIAL, &a, Source::Stream);
    let rb = if ra.is_ok() {
        Some(s.insert_readings(SERIAL, &b, Source::Log))
    } else {
        None
    };
    drop(s);
    for r in [Some(&ra), rb.as_ref()].into_iter().flatten() {
        if let Err(e) = r {
            assert!(allowed(e), "{ctx}: unexpected error {e:?}");
        }
    }
    let want = match (&ra, &rb) {
        (Ok(_), Some(Ok(_))) => 1000,
        (Ok(_), _) => 800,
        _ => 600,
    };
    let got = consistent(&work, ctx);
    assert_eq!(
        got,
        (0..want).collect::<Vec<u32>>(),
        "{ctx}: committed readings lost or a failed batch partly stored"
    );
    // The retry stores exactly what is missing.
    let mut s = Store::open(&work).expect("reopen");
    s.insert_readings(SERIAL, &a, Source::Stream)
        .expect("retry A");
    s.insert_readings(SERIAL, &b, Source::Log).expect("retry B");
    drop(s);
    let got = consistent(&work, ctx);
    assert_eq!(
        got,
        (0..1000).collect::<Vec<u32>>(),
        "{ctx}: after the retry"
    );
    std::fs::remove_dir_all(dir).ok();
    matches!((&ra, &rb), (Ok(_), Some(Ok(_))))
}

#[test]
fn a_full_disk_at_every_size_loses_nothing_and_stores_nothing_twice() {
    let t = tempfile::tempdir().expect("tmp");
    let base = base(t.path());
    let pages: i64 = Store::open(&base)
        .expect("open")
        .connection()
        .query_row("PRAGMA page_count", [], |r| r.get(0))
        .expect("pages");
    let mut counts = Counts::default();
    let mut n = pages;
    loop {
        counts.runs += 1;
        let done = one_run(
            &base,
            &t.path().join(format!("full-{n}")),
            &format!("max_page_count {n}"),
            &mut |s| {
                s.connection()
                    .execute_batch(&format!("PRAGMA max_page_count = {n}"))
                    .expect("limit");
            },
            &|e| matches!(e, StoreError::DiskFull { .. }),
        );
        if done {
            break;
        }
        counts.failed += 1;
        n += 1;
        assert!(n < pages + 1000, "never succeeded");
    }
    eprintln!(
        "full-disk loop: {} runs from {pages} to {n} pages, {} failed writes, every one consistent after reopen and retry",
        counts.runs, counts.failed
    );
    assert!(counts.failed >= 5, "the loop must exercise failures");
}

#[test]
fn a_write_interrupted_at_every_step_loses_nothing_and_stores_nothing_twice() {
    let t = tempfile::tempdir().expect("tmp");
    let base = base(t.path());
    // How many hook calls the two batches take without a fault (one call
    // per `EVERY` steps of SQLite's virtual machine).
    const EVERY: i32 = 50;
    let calls = Arc::new(AtomicU64::new(0));
    let c = calls.clone();
    one_run(
        &base,
        &t.path().join("count"),
        "counting",
        &mut |s| {
            let c = c.clone();
            s.set_step_hook(
                EVERY,
                Some(Box::new(move || {
                    c.fetch_add(1, Ordering::Relaxed);
                    false
                })),
            )
            .expect("hook");
        },
        &|_| false,
    );
    let total = calls.load(Ordering::Relaxed);
    assert!(total > 20, "only {total} hook calls");
    // Raise N in steps so that about 150 runs cover the whole write.
    let stride = (total / 150).max(1);
    let mut counts = Counts::default();
    let mut n = 1u64;
    loop {
        counts.runs += 1;
        let left = Arc::new(AtomicU64::new(n));
        let done = one_run(
            &base,
            &t.path().join(format!("int-{n}")),
            &format!("interrupted at hook call {n} of {total}"),
            &mut |s| {
                let left = left.clone();
                s.set_step_hook(
                    EVERY,
                    Some(Box::new(move || {
                        // Interrupt once, at the Nth call.
                        left.fetch_sub(1, Ordering::Relaxed) == 1
                    })),
                )
                .expect("hook");
            },
            &|_| true,
        );
        if done {
            break;
        }
        counts.failed += 1;
        n += stride;
        assert!(n <= total + stride * 2, "never succeeded past {total}");
    }
    eprintln!(
        "interrupt loop: {} runs (N from 1 by {stride} up to {n} of {total} hook calls, one per {EVERY} steps), {} interrupted writes, every one consistent after reopen and retry",
        counts.runs, counts.failed
    );
    assert!(
        counts.failed >= 50,
        "only {} interrupted writes",
        counts.failed
    );
}

#[test]
fn a_power_cut_inside_a_batch_reopens_to_a_consistent_chain() {
    let seed = fringe_testkit::seed(7);
    let t = tempfile::tempdir().expect("tmp");
    let path = t.path().join("line2.db");
    let snaps = t.path().join("snaps");
    std::fs::create_dir_all(&snaps).expect("snaps");
    let mut s = Store::open(&path).expect("open");
    let taken = Arc::new(AtomicU64::new(0));
    {
        let (path, snaps, taken) = (path.clone(), snaps.clone(), taken.clone());
        let mut rng = StdRng::seed_from_u64(seed);
        s.set_step_hook(
            50,
            Some(Box::new(move || {
                if rng.random_range(0..40u32) == 0 {
                    let k = taken.fetch_add(1, Ordering::Relaxed);
                    let d = snaps.join(k.to_string());
                    std::fs::create_dir_all(&d).expect("snap dir");
                    // The database and its WAL as a power cut leaves them
                    // (the shared-memory index is rebuilt on open).
                    std::fs::copy(&path, d.join("line2.db")).expect("copy db");
                    let wal = path.with_extension("db-wal");
                    if wal.exists() {
                        std::fs::copy(&wal, d.join("line2.db-wal")).expect("copy wal");
                    }
                }
                false
            })),
        )
        .expect("hook");
    }
    const BATCH: u32 = 100;
    for k in 0..20 {
        s.insert_readings(SERIAL, &batch(k * BATCH..(k + 1) * BATCH), Source::Stream)
            .expect("batch");
    }
    drop(s);
    let n = taken.load(Ordering::Relaxed);
    assert!(n >= 20, "seed {seed}: only {n} power cuts taken");
    let mut by_batches = std::collections::BTreeMap::<u32, u32>::new();
    for k in 0..n {
        let p = snaps.join(k.to_string()).join("line2.db");
        let got = consistent(&p, &format!("seed {seed}, power cut {k}"));
        let len = got.len() as u32;
        assert_eq!(
            len % BATCH,
            0,
            "seed {seed}, cut {k}: a batch partly stored ({len})"
        );
        assert_eq!(got, (0..len).collect::<Vec<u32>>(), "seed {seed}, cut {k}");
        *by_batches.entry(len / BATCH).or_default() += 1;
    }
    eprintln!(
        "power-cut loop (seed {seed}): {n} cuts inside 20 batches of {BATCH}, each reopened to a consistent chain; cuts by batches committed: {by_batches:?}"
    );
    assert!(
        by_batches.len() >= 10,
        "cuts cover only {} batches",
        by_batches.len()
    );
}
