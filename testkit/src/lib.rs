//! Helpers every Fringe test crate shares (a dev-dependency only).
//!
//! - [`seed`]: the seed of a random test. One variable, `FRINGE_SEED`,
//!   overrides every default; the seed in force is printed to the test's
//!   captured output, which `cargo test` shows when the test fails.
//! - [`proptest_config`]: proptest's configuration with that seed and with
//!   failure persistence on (failing inputs land in `proptest-regressions/`
//!   beside the test file and are replayed first on the next run).
#![forbid(unsafe_code)]
#![warn(missing_docs)]

use proptest::test_runner::{Config, FileFailurePersistence, RngSeed};

/// Name of the one environment variable that seeds every random test.
pub const SEED_VAR: &str = "FRINGE_SEED";

/// The seed of a random test: `FRINGE_SEED` if set (decimal or `0x` hex),
/// else `default`, so that CI runs are reproducible.
///
/// Prints `seed N (rerun with FRINGE_SEED=N)` to the test's output; cargo
/// shows it beside the failure.
///
/// # Panics
/// If `FRINGE_SEED` is set but is not a number (a typo must not silently
/// fall back to the default).
pub fn seed(default: u64) -> u64 {
    let seed = match std::env::var(SEED_VAR) {
        Ok(text) => parse(&text).unwrap_or_else(|| {
            panic!("{SEED_VAR}={text:?} is not a number (decimal, or hex with 0x)")
        }),
        Err(_) => default,
    };
    println!("seed {seed} (rerun with {SEED_VAR}={seed})");
    seed
}

fn parse(text: &str) -> Option<u64> {
    let t = text.trim();
    match t.strip_prefix("0x").or_else(|| t.strip_prefix("0X")) {
        Some(hex) => u64::from_str_radix(hex, 16).ok(),
        None => t.parse().ok(),
    }
}

/// proptest's configuration for `cases` cases, seeded by [`seed`] (with
/// `default`) and with failure persistence on.
pub fn proptest_config(cases: u32, default: u64) -> Config {
    Config {
        cases,
        rng_seed: RngSeed::Fixed(seed(default)),
        failure_persistence: Some(Box::new(FileFailurePersistence::WithSource(
            "proptest-regressions",
        ))),
        ..Config::default()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn seeds_parse_in_decimal_and_hex() {
        assert_eq!(parse("42"), Some(42));
        assert_eq!(parse(" 0x2A "), Some(42));
        assert_eq!(parse("0X2a"), Some(42));
        assert_eq!(parse("forty-two"), None);
        assert_eq!(parse(""), None);
    }
}
