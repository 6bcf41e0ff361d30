//! A check of the code the toolchain generates for this board, built with
//! the firmware's own profile (opt-level "s", LTO, one codegen unit).
//!
//! rustc 1.95.0 (LLVM 22.1.2) at opt-level 2 on x86-64 leaves the last value
//! out of a loop that takes `min` and `max` together over a mapped integer
//! range: 19 for the maximum of 10..=20 in f64, 17 in f32
//! (`fringe-calibration`'s guard test and the workspace Cargo.toml). The
//! firmware keeps running extremes of the same kind (the demodulator's
//! amplitudes), so this binary runs the loop on the Cortex-M4F, with the
//! range a constant and with it known only at run time, in f32 and f64.
//!
//! `cargo xtask test` runs it under QEMU (tests/tests/qemu.rs); it prints
//! each case through semihosting and exits with status 0 when every one
//! holds, 1 when one does not (or on a panic). The same two functions built
//! for x86-64 at opt-level 2 give 19 and 17 for the constant ranges, so the
//! cases reach the fault where the toolchain has it; on this board at "s"
//! and at 2 every case holds (2026-12-04).

#![no_std]
#![no_main]

use core::hint::black_box;
use core::panic::PanicInfo;

use cortex_m_rt::entry;
use cortex_m_semihosting::{debug, hprintln};

/// Smallest and largest of `start + k` for `k` in `0..n`, in f64.
fn extremes_f64(n: u16, start: f64) -> (f64, f64) {
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for x in (0..n).map(|k| start + f64::from(k)) {
        lo = lo.min(x);
        hi = hi.max(x);
    }
    (lo, hi)
}

/// The same in f32.
fn extremes_f32(n: u16, start: f32) -> (f32, f32) {
    let (mut lo, mut hi) = (f32::INFINITY, f32::NEG_INFINITY);
    for x in (0..n).map(|k| start + f32::from(k)) {
        lo = lo.min(x);
        hi = hi.max(x);
    }
    (lo, hi)
}

#[entry]
fn main() -> ! {
    let mut ok = true;
    let mut check = |name: &str, got: (f64, f64), want: (f64, f64)| {
        let pass = got == want;
        ok &= pass;
        hprintln!(
            "{} {}: min {} max {} (expected {} {})",
            if pass { "ok  " } else { "FAIL" },
            name,
            got.0,
            got.1,
            want.0,
            want.1
        );
    };
    // 10..=20, the shape and values of the fault on x86-64.
    check("f64, constant range", extremes_f64(11, 10.0), (10.0, 20.0));
    let (lo, hi) = extremes_f32(11, 10.0);
    check(
        "f32, constant range",
        (f64::from(lo), f64::from(hi)),
        (10.0, 20.0),
    );
    // The range known only at run time.
    let (n, start) = (black_box(11), black_box(10.0));
    check("f64, run-time range", extremes_f64(n, start), (10.0, 20.0));
    let (lo, hi) = extremes_f32(n, black_box(10.0f32));
    check(
        "f32, run-time range",
        (f64::from(lo), f64::from(hi)),
        (10.0, 20.0),
    );
    // Longer ranges (loops unrolled or vectorised by other factors).
    for n in [2u16, 3, 4, 5, 7, 8, 9, 16, 17, 33, 100] {
        let n = black_box(n);
        hprintln!("{} values from -5:", n);
        let want = (-5.0, -5.0 + f64::from(n - 1));
        check("f64, n values", extremes_f64(n, black_box(-5.0)), want);
        let (lo, hi) = extremes_f32(n, black_box(-5.0f32));
        check("f32, n values", (f64::from(lo), f64::from(hi)), want);
    }
    debug::exit(if ok {
        debug::EXIT_SUCCESS
    } else {
        debug::EXIT_FAILURE
    });
    loop {
        cortex_m::asm::wfi();
    }
}

#[panic_handler]
fn panic(info: &PanicInfo) -> ! {
    hprintln!("FAIL panic: {}", info);
    debug::exit(debug::EXIT_FAILURE);
    loop {
        cortex_m::asm::wfi();
    }
}
