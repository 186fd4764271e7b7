//! Arithmetic in the accumulation type, for kernels that sum: f32 and f64
//! natively (each IEEE 754 operation rounds once into its type, which is
//! exactly the accumulation dtype's rounding, and lets the compiler
//! vectorise), and any other accumulation (f16 or bf16, or f32 for an f64
//! node) as f64 rounded into the accumulation dtype after every operation.

use super::im2col::Column;
use crate::dtype::Dtype;
use std::ops::{Div, Mul, Sub};

/// The element types sums are carried in.
pub trait Arith:
    Column + Sub<Output = Self> + Mul<Output = Self> + Div<Output = Self> + PartialOrd
{
    /// The square root, correctly rounded in the type.
    fn sqrt(self) -> Self;
}

impl Arith for f32 {
    #[inline]
    fn sqrt(self) -> f32 {
        f32::sqrt(self)
    }
}

impl Arith for f64 {
    #[inline]
    fn sqrt(self) -> f64 {
        f64::sqrt(self)
    }
}

/// The rounding after each operation: none when the carrier type is the
/// accumulation dtype itself, else into the accumulation dtype (f16 or bf16
/// accumulation, or f32 accumulation of an f64 node, carried in f64).
#[derive(Debug, Clone, Copy)]
pub struct Fix(Option<Dtype>);

impl Fix {
    /// The rounding that makes `T` arithmetic act as `accumulate` arithmetic.
    pub fn of<T: Arith>(accumulate: Dtype) -> Fix {
        Fix((accumulate != T::DTYPE).then_some(accumulate))
    }

    /// `x` rounded into the accumulation dtype.
    #[inline(always)]
    pub fn at<T: Arith>(self, x: T) -> T {
        match self.0 {
            None => x,
            Some(dtype) => T::from_f64(dtype.round(x.to_f64())),
        }
    }
}

/// Runs `$body::<T>(args)` with `T` the type that carries the arithmetic of
/// `$precision`: f32 for f32 accumulation of f32, f16 or bf16 values (which
/// f32 holds exactly), f64 for everything else.
#[macro_export]
#[doc(hidden)]
macro_rules! in_accumulation_type {
    ($precision:expr, $body:ident ( $($arg:expr),* )) => {{
        let precision: $crate::ops::Precision = $precision;
        match (precision.dtype, precision.accumulate) {
            ($crate::dtype::Dtype::F64, _) => $body::<f64>($($arg),*),
            (_, $crate::dtype::Dtype::F32) => $body::<f32>($($arg),*),
            _ => $body::<f64>($($arg),*),
        }
    }};
}

#[cfg(test)]
mod tests {
    use super::*;

    // IEEE 754-2019 §4.3.1 and table 3.5: a binary32 sum of 2^-24 to 1 is a
    // tie that rounds to even, back to 1; carried in f64 and rounded into
    // f32 after the addition, it gives the same.
    #[test]
    fn native_f32_rounds_as_f64_then_f32() {
        let (a, b) = (1.0f32, 2f32.powi(-24));
        assert_eq!(a + b, Dtype::F32.round(1.0 + 2f64.powi(-24)) as f32);
        let half = Fix::of::<f64>(Dtype::F16);
        // 1 + 2^-11 is a tie in binary16 (p = 11): rounds to 1.
        assert_eq!(half.at(1.0f64 + 2f64.powi(-11)), 1.0);
        // f32 accumulation carried in f64 (an f64 node) rounds the same tie.
        assert_eq!(Fix::of::<f64>(Dtype::F32).at(1.0f64 + 2f64.powi(-24)), 1.0);
        assert_eq!(
            Fix::of::<f64>(Dtype::F64).at(1.0f64 + 2f64.powi(-11)),
            1.0 + 2f64.powi(-11)
        );
    }
}
