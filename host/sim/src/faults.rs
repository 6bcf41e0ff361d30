//! Serial-line faults injected by `fringe sim`, from a seed (as smoltcp's
//! `FaultInjector` drops and corrupts packets).

use rand::rngs::StdRng;
use rand::{RngExt, SeedableRng};

use crate::scenario::LinkFaults;

/// Applies dropped bytes, flipped bits and inserted garbage to a byte stream.
#[derive(Debug)]
pub struct Injector {
    cfg: LinkFaults,
    rng: StdRng,
    /// Bytes dropped so far.
    pub dropped: u64,
    /// Bits flipped so far.
    pub flipped: u64,
    /// Garbage bytes inserted so far.
    pub inserted: u64,
}

impl Injector {
    /// An injector with the scenario's fault rates and a seed.
    pub fn new(cfg: LinkFaults, seed: u64) -> Self {
        Self {
            cfg,
            rng: StdRng::seed_from_u64(seed),
            dropped: 0,
            flipped: 0,
            inserted: 0,
        }
    }

    /// Whether any byte fault is configured.
    pub fn active(&self) -> bool {
        self.cfg.drop_per_byte > 0.0
            || self.cfg.flip_per_byte > 0.0
            || self.cfg.garbage_per_frame > 0.0
    }

    /// Appends `bytes`, faults applied, to `out`.
    pub fn apply(&mut self, bytes: &[u8], out: &mut Vec<u8>) {
        if bytes.is_empty() {
            return;
        }
        if self.cfg.garbage_per_frame > 0.0 && self.rng.random_bool(self.cfg.garbage_per_frame) {
            let n = self.rng.random_range(1..=self.cfg.garbage_max_bytes.max(1));
            for _ in 0..n {
                out.push(self.rng.random());
            }
            self.inserted += u64::from(n);
        }
        for &b in bytes {
            if self.cfg.drop_per_byte > 0.0 && self.rng.random_bool(self.cfg.drop_per_byte) {
                self.dropped += 1;
                continue;
            }
            if self.cfg.flip_per_byte > 0.0 && self.rng.random_bool(self.cfg.flip_per_byte) {
                self.flipped += 1;
                out.push(b ^ (1 << self.rng.random_range(0..8u32)));
            } else {
                out.push(b);
            }
        }
    }

    /// What a UART at the wrong baud rate makes of `bytes`: each byte is
    /// sampled at the wrong bit times, which scrambles it and loses about
    /// half of them (framing errors).
    pub fn garble(&mut self, bytes: &[u8], out: &mut Vec<u8>) {
        for &b in bytes {
            if self.rng.random_bool(0.5) {
                out.push(b.rotate_left(3) ^ 0x5a ^ self.rng.random::<u8>() & 0x0f);
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rates_come_out_near_the_configured_ones() {
        let seed = 11;
        let mut inj = Injector::new(
            LinkFaults {
                drop_per_byte: 0.01,
                flip_per_byte: 0.02,
                ..Default::default()
            },
            seed,
        );
        let input = vec![0xAAu8; 100_000];
        let mut out = Vec::new();
        inj.apply(&input, &mut out);
        // Binomial(100000, 0.01): mean 1000, sd ~31; 6 sd bounds.
        assert!(
            (800..1200).contains(&inj.dropped),
            "seed {seed}: {}",
            inj.dropped
        );
        assert!(
            (1700..2300).contains(&inj.flipped),
            "seed {seed}: {}",
            inj.flipped
        );
        assert_eq!(out.len() as u64, 100_000 - inj.dropped);
        let changed = out.iter().filter(|&&b| b != 0xAA).count() as u64;
        assert_eq!(changed, inj.flipped);
    }

    #[test]
    fn no_faults_is_a_copy() {
        let mut inj = Injector::new(LinkFaults::default(), 1);
        let mut out = Vec::new();
        inj.apply(b"abc", &mut out);
        assert_eq!(out, b"abc");
        assert!(!inj.active());
    }
}
