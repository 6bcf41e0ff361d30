//! A small seeded generator for synthetic data, demos and tests
//! (SplitMix64, Steele, Lea and Flood, OOPSLA 2014; normals by Box-Muller).
//! Not for cryptography. Every random test prints the seed it used.

/// SplitMix64 generator.
#[derive(Debug, Clone)]
pub struct SeededRng(u64);

impl SeededRng {
    /// A generator from `seed` (any value, 0 included).
    pub fn new(seed: u64) -> Self {
        SeededRng(seed)
    }

    /// Next 64 random bits.
    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in [0, 1).
    pub fn uniform(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 / (1u64 << 53) as f64
    }

    /// Uniform in [lo, hi).
    pub fn range(&mut self, lo: f64, hi: f64) -> f64 {
        lo + (hi - lo) * self.uniform()
    }

    /// Standard normal (Box-Muller).
    pub fn normal(&mut self) -> f64 {
        let u = self.uniform().max(f64::MIN_POSITIVE);
        let v = self.uniform();
        (-2.0 * u.ln()).sqrt() * (2.0 * std::f64::consts::PI * v).cos()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Normal draws have mean 0 and variance 1 within about 4 standard
    /// errors at n = 20000 (definition of the distribution).
    #[test]
    fn moments_are_right() {
        let mut r = SeededRng::new(42);
        let n = 20000;
        let (mut s, mut s2) = (0.0, 0.0);
        for _ in 0..n {
            let x = r.normal();
            s += x;
            s2 += x * x;
        }
        let m = s / n as f64;
        let v = s2 / n as f64 - m * m;
        assert!(m.abs() < 0.03, "seed 42: mean {m}");
        assert!((v - 1.0).abs() < 0.04, "seed 42: variance {v}");
    }
}
