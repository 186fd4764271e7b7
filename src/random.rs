//! A small seeded generator for reproducible sampling: xorshift64* (Vigna,
//! "An experimental exploration of Marsaglia's xorshift generators,
//! scrambled", ACM TOMS 42(4), 2016). Not for anything that needs strong
//! randomness; only so that a check samples the same entries every run.

/// xorshift64* state.
#[derive(Debug, Clone)]
pub struct Rng(u64);

impl Rng {
    /// A generator from a seed (any value; zero is remapped).
    pub fn new(seed: u64) -> Rng {
        Rng(seed | 1)
    }

    /// The next 64 random bits.
    pub fn next_u64(&mut self) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545_F491_4F6C_DD1D)
    }

    /// Uniform in [lo, hi).
    pub fn uniform(&mut self, lo: f64, hi: f64) -> f64 {
        lo + (hi - lo) * ((self.next_u64() >> 11) as f64 / (1u64 << 53) as f64)
    }

    /// Uniform integer in [0, n); n must be positive.
    pub fn below(&mut self, n: usize) -> usize {
        (self.next_u64() % n as u64) as usize
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn reproducible_and_in_range() {
        let (mut a, mut b) = (Rng::new(7), Rng::new(7));
        for _ in 0..100 {
            let x = a.uniform(-1.0, 1.0);
            assert_eq!(x, b.uniform(-1.0, 1.0));
            assert!((-1.0..1.0).contains(&x));
            assert!(a.below(5) < 5);
            b.below(5);
        }
    }
}
