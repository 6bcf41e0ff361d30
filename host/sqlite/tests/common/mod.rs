//! Test readings shared by the store's integration tests.

use fringe_protocol::{CalId, ChannelValue, Flags, Reading, Seq};

/// A reading of `boot` and `counter` whose values vary with the counter.
pub fn reading(boot: u32, counter: u32) -> Reading {
    let x = counter as f32;
    let ch = ChannelValue {
        g_s: 1.2e-6 + x * 1e-12,
        b_s: 2.1e-4,
        eps_re: 6.5 + (x * 0.01).sin(),
        eps_im: 0.8,
    };
    Reading {
        seq: Seq { boot, counter },
        time_ms: 1_780_000_000_000 + u64::from(counter) * 1000,
        channels: [ch, ch],
        temperature_c: 21.0 + (x * 0.002).sin(),
        moisture_pct: Some(14.0 + (x * 0.003).sin()),
        uncertainty_pct: 0.3,
        flags: Flags::empty(),
        cell_cal: CalId([1, 2, 3, 4]),
        product_cal: CalId([5, 6, 7, 8]),
    }
}
