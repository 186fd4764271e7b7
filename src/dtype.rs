//! The floating-point formats a recorded run can use, and rounding into them.
//!
//! Every value the engine computes is held as an `f64` and rounded into the
//! trace's dtype after each arithmetic operation. For f32, f16 and bf16 this
//! gives exactly the result the narrower format would have produced for
//! `+ - * /` and `sqrt`, because f64 carries more than twice their precision
//! plus two bits, so rounding twice cannot differ from rounding once
//! (Goldberg, "What Every Computer Scientist Should Know About Floating-Point
//! Arithmetic", ACM Computing Surveys 23(1), 1991, discussion of double rounding;
//! Figueroa, "When is double rounding innocuous?", SIGNUM Newsletter 30(3), 1995).

use serde::{Deserialize, Serialize};
use std::fmt;

/// The dtype of a recorded run.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum Dtype {
    /// IEEE 754 binary16.
    F16,
    /// bfloat16: f32's exponent range with an 8-bit significand.
    Bf16,
    /// IEEE 754 binary32.
    F32,
    /// IEEE 754 binary64.
    #[default]
    F64,
}

/// What a format does with results below its smallest normal magnitude.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum Subnormals {
    /// Gradual underflow, as IEEE 754 requires.
    #[default]
    Keep,
    /// Subnormal results become zero of the same sign, as hardware running
    /// in flush-to-zero mode does.
    Flush,
}

/// Parameters of a binary floating-point format.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FormatLimits {
    /// Significand bits including the implicit leading bit.
    pub precision: i32,
    /// Exponent of the smallest normal number.
    pub min_exponent: i32,
    /// Exponent of the largest finite number.
    pub max_exponent: i32,
}

impl FormatLimits {
    /// The largest finite value: (2 − 2^(1−p)) · 2^emax.
    pub fn max_finite(&self) -> f64 {
        (2.0 - pow2(1 - self.precision)) * pow2(self.max_exponent)
    }

    /// The smallest positive normal value: 2^emin.
    pub fn min_normal(&self) -> f64 {
        pow2(self.min_exponent)
    }

    /// The smallest positive subnormal value: 2^(emin − p + 1).
    pub fn min_subnormal(&self) -> f64 {
        pow2(self.min_exponent - self.precision + 1)
    }
}

impl Dtype {
    /// All dtypes, narrowest first.
    pub const ALL: [Dtype; 4] = [Dtype::F16, Dtype::Bf16, Dtype::F32, Dtype::F64];

    /// The format's precision and exponent range (IEEE 754-2019 table 3.5;
    /// bfloat16 from Intel, "BFLOAT16 – Hardware Numerics Definition", 2018).
    pub fn limits(self) -> FormatLimits {
        match self {
            Dtype::F16 => FormatLimits {
                precision: 11,
                min_exponent: -14,
                max_exponent: 15,
            },
            Dtype::Bf16 => FormatLimits {
                precision: 8,
                min_exponent: -126,
                max_exponent: 127,
            },
            Dtype::F32 => FormatLimits {
                precision: 24,
                min_exponent: -126,
                max_exponent: 127,
            },
            Dtype::F64 => FormatLimits {
                precision: 53,
                min_exponent: -1022,
                max_exponent: 1023,
            },
        }
    }

    /// The dtype sums accumulate in by default for values of this dtype:
    /// f32 for f16, bf16 and f32 (what mixed-precision hardware and
    /// frameworks do; common practice), f64 for f64.
    pub fn default_accumulate(self) -> Dtype {
        match self {
            Dtype::F64 => Dtype::F64,
            _ => Dtype::F32,
        }
    }

    /// The dtype a binary op on values of `self` and `other` computes in:
    /// the wider of the two, and f32 for f16 with bf16 (neither holds the
    /// other); the floating-point rule of NumPy's and PyTorch's type
    /// promotion (common practice).
    pub fn promote(self, other: Dtype) -> Dtype {
        match (self, other) {
            (a, b) if a == b => a,
            (Dtype::F16, Dtype::Bf16) | (Dtype::Bf16, Dtype::F16) => Dtype::F32,
            (a, b) => {
                if a.limits().precision >= b.limits().precision {
                    a
                } else {
                    b
                }
            }
        }
    }

    /// Bytes per element.
    pub fn width(self) -> usize {
        match self {
            Dtype::F16 | Dtype::Bf16 => 2,
            Dtype::F32 => 4,
            Dtype::F64 => 8,
        }
    }

    /// The name used in trace files and reports.
    pub fn name(self) -> &'static str {
        match self {
            Dtype::F16 => "f16",
            Dtype::Bf16 => "bf16",
            Dtype::F32 => "f32",
            Dtype::F64 => "f64",
        }
    }

    /// Rounds `x` to the nearest value of this format, ties to even, with
    /// gradual underflow and overflow to infinity.
    #[inline]
    pub fn round(self, x: f64) -> f64 {
        match self {
            Dtype::F64 => x,
            Dtype::F32 => x as f32 as f64,
            Dtype::F16 => half::f16::from_f32(to_f32_odd(x)).to_f64(),
            Dtype::Bf16 => half::bf16::from_f32(to_f32_odd(x)).to_f64(),
        }
    }

    /// Rounds `x` like [`Dtype::round`], then flushes a subnormal result to
    /// zero when `subnormals` says so (the tininess test is made after
    /// rounding, so a value that rounds up to the smallest normal survives).
    #[inline]
    pub fn round_with(self, x: f64, subnormals: Subnormals) -> f64 {
        let rounded = self.round(x);
        match subnormals {
            Subnormals::Keep => rounded,
            Subnormals::Flush => self.flush(rounded),
        }
    }

    /// `x` with a subnormal magnitude of this format replaced by zero of the same sign.
    #[inline]
    pub fn flush(self, x: f64) -> f64 {
        if self.is_subnormal(x) {
            0.0f64.copysign(x)
        } else {
            x
        }
    }

    /// True for a non-zero `x` below this format's smallest normal magnitude.
    #[inline]
    pub fn is_subnormal(self, x: f64) -> bool {
        x != 0.0 && x.abs() < self.limits().min_normal()
    }
}

impl fmt::Display for Dtype {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// 2^e for exponents within f64's normal range.
fn pow2(e: i32) -> f64 {
    if e < -1022 {
        // Below f64's normal range (f64's own smallest subnormal is 2^-1074).
        return 2f64.powi(e);
    }
    f64::from_bits(((e + 1023) as u64) << 52)
}

/// The unbiased exponent of a finite, non-zero, normal f64.
#[cfg(test)]
fn exponent_of(a: f64) -> i32 {
    ((a.to_bits() >> 52) & 0x7ff) as i32 - 1023
}

/// `x` rounded to f32 *to odd*: exact when it fits, else the neighbour
/// toward zero or away from it whose last significand bit is 1 (infinities
/// and NaN pass through).
///
/// Rounding to odd into a format at least two bits wider, then to nearest
/// even into the narrow one, is the narrow format's correct rounding of `x`
/// (Boldo & Melquiond, "Emulation of FMA and correctly rounded sums: proved
/// algorithms using rounding to odd", IEEE Transactions on Computers 57(4),
/// 2008, Theorem 1; recalled from memory). f32 has 24 bits against f16's 11
/// and bf16's 8 wherever either has a non-zero value, its subnormals included,
/// so f16 and bf16 rounding becomes one hardware conversion each way (x86's
/// F16C where the processor has it) instead of a scaled integer rounding.
/// Tested bit for bit against that rounding (kept as the oracle below).
#[inline]
pub(crate) fn to_f32_odd(x: f64) -> f32 {
    let nearest = x as f32;
    if f64::from(nearest) == x || !x.is_finite() {
        return nearest;
    }
    let mut bits = nearest.to_bits();
    if f64::from(nearest).abs() > x.abs() {
        // Rounded away from zero (to infinity included): one step back.
        bits -= 1;
    }
    f32::from_bits(bits | 1)
}

/// Correctly rounded conversion of an f64 into a narrower binary format: the
/// independent method the round-to-odd path and the vectorised conversions
/// are tested against.
///
/// Scaling by a power of two is exact, so `a · 2^-k` (k the ulp's exponent)
/// is exact, and below 2^25 (the largest format here has 24 significant
/// bits): adding and subtracting 2^52 then rounds it to an integer, ties to
/// even, in IEEE 754's default rounding mode, the classic trick that needs no
/// call to `rint`. The product back by the ulp is exact too.
#[cfg(test)]
pub(crate) fn round_to_format(x: f64, limits: FormatLimits) -> f64 {
    if !x.is_finite() || x == 0.0 {
        return x;
    }
    let magnitude = x.abs();
    // Below f64's normal range every narrower format rounds to zero.
    if magnitude < f64::MIN_POSITIVE {
        return 0.0f64.copysign(x);
    }
    debug_assert!(
        limits.precision <= 25,
        "the 2^52 trick needs a narrow format"
    );
    let exponent = exponent_of(magnitude).max(limits.min_exponent);
    let ulp_exponent = exponent - (limits.precision - 1);
    const INTEGER_ROUNDING: f64 = 4_503_599_627_370_496.0; // 2^52
    let in_ulps = magnitude * pow2(-ulp_exponent);
    let rounded = ((in_ulps + INTEGER_ROUNDING) - INTEGER_ROUNDING) * pow2(ulp_exponent);
    let result = if rounded > limits.max_finite() {
        f64::INFINITY
    } else {
        rounded
    };
    result.copysign(x)
}

#[cfg(test)]
mod tests {
    use super::*;

    // Limits from IEEE 754-2019, table 3.5 (binary16, binary32) and Intel's
    // bfloat16 definition (2018); decimal forms are the exact binary values.
    #[test]
    fn limits_match_ieee_754() {
        assert_eq!(Dtype::F16.limits().max_finite(), 65504.0);
        assert_eq!(Dtype::F16.limits().min_normal(), 2f64.powi(-14));
        assert_eq!(Dtype::F16.limits().min_subnormal(), 2f64.powi(-24));
        assert_eq!(Dtype::F32.limits().max_finite(), 3.4028234663852886e38);
        assert_eq!(Dtype::F32.limits().max_finite(), f32::MAX as f64);
        assert_eq!(Dtype::F32.limits().min_normal(), 1.1754943508222875e-38);
        assert_eq!(Dtype::Bf16.limits().max_finite(), 3.3895313892515355e38);
        assert_eq!(Dtype::F64.limits().max_finite(), f64::MAX);
        // binary64's smallest subnormal is 2^-1074, the least positive f64.
        assert_eq!(Dtype::F64.limits().min_subnormal(), f64::from_bits(1));
    }

    // Rounding probes follow from round-to-nearest-even (IEEE 754-2019 §4.3.1).
    #[test]
    fn f16_rounding_probes() {
        assert_eq!(Dtype::F16.round(65519.0), 65504.0);
        assert_eq!(Dtype::F16.round(65520.0), f64::INFINITY);
        assert_eq!(Dtype::F16.round(-65520.0), f64::NEG_INFINITY);
        assert_eq!(
            Dtype::F16.round(2f64.powi(-25)),
            0.0,
            "tie between 0 and 2^-24 goes to even (0)"
        );
        assert_eq!(Dtype::F16.round(2f64.powi(-25) * 1.5), 2f64.powi(-24));
        assert_eq!(Dtype::F16.round(2f64.powi(-24)), 2f64.powi(-24));
        assert_eq!(
            Dtype::F16.round(1.0 + 2f64.powi(-11) + 2f64.powi(-40)),
            1.0 + 2f64.powi(-10)
        );
        assert_eq!(Dtype::F16.round(1.0 + 2f64.powi(-11)), 1.0, "tie to even");
    }

    #[test]
    fn f32_rounding_is_hardware_rounding() {
        let x = 0.1f64;
        assert_eq!(Dtype::F32.round(x), 0.1f32 as f64);
        assert_eq!(Dtype::F32.round(1e39), f64::INFINITY);
    }

    // Flush-to-zero replaces subnormal results by a signed zero (IEEE 754-2019
    // leaves it outside the standard; the behaviour is the common hardware mode).
    #[test]
    fn flushing_zeroes_subnormal_results_only() {
        let tiny = 2f64.powi(-24);
        assert_eq!(Dtype::F16.round_with(tiny, Subnormals::Keep), tiny);
        assert_eq!(Dtype::F16.round_with(tiny, Subnormals::Flush), 0.0);
        assert!(
            Dtype::F16
                .round_with(-tiny, Subnormals::Flush)
                .is_sign_negative()
        );
        assert_eq!(
            Dtype::F16.round_with(2f64.powi(-14), Subnormals::Flush),
            2f64.powi(-14)
        );
        // Just below 2^-14 by less than half an ulp rounds up to the smallest normal and survives.
        assert_eq!(
            Dtype::F16.round_with(2f64.powi(-14) - 2f64.powi(-30), Subnormals::Flush),
            2f64.powi(-14)
        );
        assert!(Dtype::F32.is_subnormal(1e-40));
        assert!(!Dtype::F32.is_subnormal(0.0));
    }

    /// Rounding through f32 to odd gives what the scaled integer rounding
    /// gives, bit for bit: at every f16 and bf16 value, at each midpoint
    /// between neighbours (the ties) and a few f64 ulps either side, with both
    /// signs, across the subnormal, normal and overflow ranges, and over a
    /// sweep of f64 bit patterns.
    #[test]
    fn rounding_to_odd_agrees_with_the_scaled_rounding() {
        let check = |dtype: Dtype, x: f64| {
            let expected = round_to_format(x, dtype.limits());
            let fast = dtype.round(x);
            assert!(
                fast.to_bits() == expected.to_bits() || (fast.is_nan() && expected.is_nan()),
                "{dtype} of {x:e} ({:#x}): {fast:e} against {expected:e}",
                x.to_bits()
            );
        };
        for bits in 0..u16::MAX {
            for (dtype, here, next) in [
                (
                    Dtype::F16,
                    half::f16::from_bits(bits).to_f64(),
                    half::f16::from_bits(bits + 1).to_f64(),
                ),
                (
                    Dtype::Bf16,
                    half::bf16::from_bits(bits).to_f64(),
                    half::bf16::from_bits(bits + 1).to_f64(),
                ),
            ] {
                if !(here.is_finite() && next.is_finite()) || here.is_sign_negative() {
                    continue;
                }
                let middle = (here + next) / 2.0;
                for base in [here, middle, next] {
                    for step in -3i64..=3 {
                        let x = f64::from_bits((base.to_bits() as i64 + step).max(0) as u64);
                        check(dtype, x);
                        check(dtype, -x);
                    }
                }
            }
        }
        for bits in (0..u64::MAX).step_by(1 << 44).chain([1, 2, u64::MAX >> 1]) {
            for dtype in [Dtype::F16, Dtype::Bf16] {
                check(dtype, f64::from_bits(bits));
            }
        }
        for x in [
            f64::MAX,
            f64::MIN_POSITIVE,
            3.4e38,
            3.39e38,
            65519.999,
            65520.0,
        ] {
            check(Dtype::F16, x);
            check(Dtype::Bf16, x);
        }
    }

    #[test]
    fn bf16_rounding_probes() {
        assert_eq!(Dtype::Bf16.round(1.0 + 2f64.powi(-8)), 1.0, "tie to even");
        assert_eq!(
            Dtype::Bf16.round(1.0 + 3.0 * 2f64.powi(-8)),
            1.0 + 2f64.powi(-6)
        );
        assert_eq!(Dtype::Bf16.round(3.4e38), f64::INFINITY);
    }
}
