//! A tiny seeded generator for the demo traces: SplitMix64 (Steele, Lea and
//! Flood, "Fast Splittable Pseudorandom Number Generators", OOPSLA 2014).
//!
//! Written here rather than taken from a crate so that the committed demo
//! traces cannot change when a dependency changes its stream. Only `+ - * /`
//! and `sqrt` touch the floats, so the numbers are the same on every IEEE 754
//! machine.

/// SplitMix64 state.
#[derive(Debug, Clone)]
pub struct SplitMix64(u64);

impl SplitMix64 {
    /// A generator from a fixed seed.
    pub fn new(seed: u64) -> SplitMix64 {
        SplitMix64(seed)
    }

    /// The next 64 random bits.
    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in [0, 1), from the top 53 bits.
    pub fn unit(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 * (1.0 / (1u64 << 53) as f64)
    }

    /// Uniform in [−limit, limit).
    pub fn symmetric(&mut self, limit: f64) -> f64 {
        (2.0 * self.unit() - 1.0) * limit
    }

    /// `count` values uniform in [−limit, limit).
    pub fn fill(&mut self, count: usize, limit: f64) -> Vec<f64> {
        (0..count).map(|_| self.symmetric(limit)).collect()
    }

    /// An index below `bound`.
    pub fn below(&mut self, bound: usize) -> usize {
        (self.next_u64() % bound as u64) as usize
    }
}

/// The Glorot-uniform limit √(6 / (fan_in + fan_out)) (Glorot and Bengio,
/// "Understanding the difficulty of training deep feedforward neural
/// networks", AISTATS 2010, eq. 16).
pub fn glorot_limit(fan_in: usize, fan_out: usize) -> f64 {
    (6.0 / (fan_in + fan_out) as f64).sqrt()
}

#[cfg(test)]
mod tests {
    use super::*;

    // Reference outputs of SplitMix64 seeded with 1234567, from the public
    // reference implementation's test vector (Vigna, splitmix64.c,
    // prng.di.unimi.it); from memory, so also checked for distinctness and range.
    #[test]
    fn splitmix_matches_its_reference_stream() {
        let mut rng = SplitMix64::new(1234567);
        assert_eq!(rng.next_u64(), 6457827717110365317);
        assert_eq!(rng.next_u64(), 3203168211198807973);
        let mut rng = SplitMix64::new(7);
        let draws: Vec<f64> = (0..1000).map(|_| rng.unit()).collect();
        assert!(draws.iter().all(|x| (0.0..1.0).contains(x)));
        let mean = draws.iter().sum::<f64>() / draws.len() as f64;
        assert!((mean - 0.5).abs() < 0.05, "mean {mean}");
    }
}
