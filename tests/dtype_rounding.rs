//! Property tests: `Dtype::round` into f16, bf16 and f32 is correctly rounded
//! (round to nearest, ties to even, gradual underflow, overflow to infinity),
//! checked against an exact reference built from the formats' bit patterns.
//!
//! The reference decodes bit patterns with the `half` crate's widening
//! conversions (f16/bf16 → f64 is exact; only the narrowing direction
//! double-rounds) and with `f32::from_bits`, finds the two neighbours of |x|
//! by binary search over the patterns (positive floats order like their
//! patterns, IEEE 754-2019 §3.4), and compares the two distances in f64. The
//! distances are exact: with neighbours a ≤ x ≤ b and a > 0, an ulp never
//! exceeds a, so a ≤ x ≤ 2a and b ≤ 2x, and Sterbenz's lemma (Sterbenz,
//! "Floating-Point Computation", 1974, Theorem 4.3.1) makes x − a and b − x
//! exact. When a = 0, x − 0 is exact, and b − x can only be inexact for
//! x < b/2, where the comparison cannot flip. Ties go to the even pattern
//! (IEEE 754-2019 §4.3.1, roundTiesToEven).

use ebb::dtype::{Dtype, Subnormals};
use proptest::prelude::*;

/// A format seen through its positive bit patterns.
struct Patterns {
    dtype: Dtype,
    /// Pattern of the largest finite value.
    max_finite: u32,
    /// Pattern of the smallest normal value.
    min_normal: u32,
    decode: fn(u32) -> f64,
}

const F16: Patterns = Patterns {
    dtype: Dtype::F16,
    max_finite: 0x7bff,
    min_normal: 0x0400,
    decode: |p| half::f16::from_bits(p as u16).to_f64(),
};
const BF16: Patterns = Patterns {
    dtype: Dtype::Bf16,
    max_finite: 0x7f7f,
    min_normal: 0x0080,
    decode: |p| half::bf16::from_bits(p as u16).to_f64(),
};
const F32: Patterns = Patterns {
    dtype: Dtype::F32,
    max_finite: 0x7f7f_ffff,
    min_normal: 0x0080_0000,
    decode: |p| f32::from_bits(p) as f64,
};

impl Patterns {
    /// The value one ulp above the largest finite one, where rounding past
    /// the largest finite value would land: 2^(emax+1), pattern max_finite + 1.
    fn beyond_max(&self) -> f64 {
        let max = (self.decode)(self.max_finite);
        max + (max - (self.decode)(self.max_finite - 1))
    }

    fn value(&self, pattern: u32) -> f64 {
        if pattern > self.max_finite {
            self.beyond_max()
        } else {
            (self.decode)(pattern)
        }
    }

    /// The correctly rounded value of `x`, by the neighbour comparison.
    fn reference(&self, x: f64) -> f64 {
        if !x.is_finite() || x == 0.0 {
            return x;
        }
        let a = x.abs();
        // Largest pattern whose value is ≤ a (pattern 0 is +0 ≤ a).
        let (mut low, mut high) = (0u32, self.max_finite + 1);
        while high - low > 1 {
            let middle = low + (high - low) / 2;
            if self.value(middle) <= a {
                low = middle
            } else {
                high = middle
            }
        }
        let (below, above) = (self.value(low), self.value(low + 1));
        let chosen = if a == below {
            low
        } else {
            let (to_below, to_above) = (a - below, above - a);
            if to_below < to_above {
                low
            } else if to_above < to_below {
                low + 1
            } else if low % 2 == 0 {
                low
            } else {
                low + 1
            }
        };
        let magnitude = if chosen > self.max_finite {
            f64::INFINITY
        } else {
            self.value(chosen)
        };
        magnitude.copysign(x)
    }

    /// A point at or next to the midpoint between two neighbouring values.
    fn near_tie(&self, pattern: u32, nudge: i64, negative: bool) -> f64 {
        let pattern = pattern % (self.max_finite + 1);
        let middle = (self.value(pattern) + self.value(pattern + 1)) / 2.0;
        let bits = middle.to_bits() as i64 + nudge;
        let x = f64::from_bits(bits.max(0) as u64);
        if negative { -x } else { x }
    }
}

/// Finite f64s spread over the exponents where the narrow formats live.
fn spread() -> impl Strategy<Value = f64> {
    (any::<bool>(), -160i32..140, any::<u64>()).prop_map(|(negative, exponent, mantissa)| {
        let bits = (((exponent + 1023) as u64) << 52) | (mantissa >> 12);
        let x = f64::from_bits(bits);
        if negative { -x } else { x }
    })
}

fn check(format: &Patterns, x: f64) -> Result<(), TestCaseError> {
    let expected = format.reference(x);
    let got = format.dtype.round(x);
    prop_assert!(
        got.to_bits() == expected.to_bits(),
        "{}: round({x:e}) = {got:e}, reference {expected:e}",
        format.dtype
    );
    let flushed = format.dtype.round_with(x, Subnormals::Flush);
    let expected_flushed = if expected != 0.0 && expected.abs() < format.value(format.min_normal) {
        0.0f64.copysign(x)
    } else {
        expected
    };
    prop_assert!(
        flushed.to_bits() == expected_flushed.to_bits(),
        "{}: flushed round({x:e}) = {flushed:e}",
        format.dtype
    );
    Ok(())
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(4096))]

    #[test]
    fn f16_is_correctly_rounded(x in spread()) { check(&F16, x)?; }

    #[test]
    fn bf16_is_correctly_rounded(x in spread()) { check(&BF16, x)?; }

    #[test]
    fn f32_is_correctly_rounded(x in spread()) { check(&F32, x)?; }

    #[test]
    fn f16_ties_and_their_neighbours(pattern in 0u32..0x7c00, nudge in -2i64..=2, negative in any::<bool>()) {
        check(&F16, F16.near_tie(pattern, nudge, negative))?;
    }

    #[test]
    fn bf16_ties_and_their_neighbours(pattern in 0u32..0x7f80, nudge in -2i64..=2, negative in any::<bool>()) {
        check(&BF16, BF16.near_tie(pattern, nudge, negative))?;
    }

    #[test]
    fn any_bit_pattern_rounds_correctly(bits in any::<u64>()) {
        let x = f64::from_bits(bits);
        prop_assume!(x.is_finite());
        check(&F16, x)?;
        check(&BF16, x)?;
    }
}

// The decoder itself against IEEE 754-2019 table 3.5 and Intel's "BFLOAT16 –
// Hardware Numerics Definition" (2018): if it were wrong, every check above would be.
#[test]
fn reference_decoding_matches_the_published_limits() {
    assert_eq!((F16.decode)(0x7bff), 65504.0);
    assert_eq!((F16.decode)(0x0400), 2f64.powi(-14));
    assert_eq!((F16.decode)(0x0001), 2f64.powi(-24));
    assert_eq!(F16.beyond_max(), 65536.0);
    assert_eq!((BF16.decode)(0x7f7f), 3.3895313892515355e38);
    assert_eq!((F32.decode)(0x7f7f_ffff), 3.4028234663852886e38);
    assert_eq!(F16.reference(65519.0), 65504.0);
    assert_eq!(F16.reference(65520.0), f64::INFINITY);
    assert_eq!(F16.reference(2f64.powi(-25)), 0.0);
    // The example the design names: 1 + 2^-11 + 2^-40 lies above the tie, so it rounds up.
    assert_eq!(
        F16.reference(1.0 + 2f64.powi(-11) + 2f64.powi(-40)),
        1.0 + 2f64.powi(-10)
    );
}

#[test]
fn non_finite_values_pass_through() {
    for dtype in Dtype::ALL {
        assert!(dtype.round(f64::NAN).is_nan());
        assert_eq!(dtype.round(f64::INFINITY), f64::INFINITY);
        assert_eq!(
            dtype.round_with(f64::NEG_INFINITY, Subnormals::Flush),
            f64::NEG_INFINITY
        );
        assert!(dtype.round(-0.0).is_sign_negative());
    }
}
