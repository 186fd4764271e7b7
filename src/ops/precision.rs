//! The precision an op computes in: the dtype its results are stored in and
//! the dtype its sums accumulate in (traces/FORMAT.md, "Precision model").
//!
//! Elementwise ops round every result into `dtype`. Ops that sum (matmul,
//! reductions, softmax and the losses, the broadcast sums of a
//! vector-Jacobian product) compute in `accumulate` and round each result
//! once into `dtype`, as mixed-precision hardware does.

use crate::dtype::Dtype;

/// Storage and accumulation dtypes of one op evaluation.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct Precision {
    /// The dtype results are stored in.
    pub dtype: Dtype,
    /// The dtype sums accumulate in before one rounding into `dtype`.
    pub accumulate: Dtype,
}

impl Precision {
    /// A precision with an explicit accumulation dtype.
    pub const fn new(dtype: Dtype, accumulate: Dtype) -> Precision {
        Precision { dtype, accumulate }
    }

    /// `dtype` with its default accumulation ([`Dtype::default_accumulate`]).
    pub fn of(dtype: Dtype) -> Precision {
        Precision::new(dtype, dtype.default_accumulate())
    }

    /// Rounds into the storage dtype.
    #[inline]
    pub fn round(self, x: f64) -> f64 {
        self.dtype.round(x)
    }

    /// Rounds into the accumulation dtype.
    #[inline]
    pub fn acc(self, x: f64) -> f64 {
        self.accumulate.round(x)
    }

    /// The same storage dtype with every step done in the accumulation dtype:
    /// what a structured op's inner arithmetic uses before its one final rounding.
    pub fn inner(self) -> Precision {
        Precision::new(self.accumulate, self.accumulate)
    }

    /// A sequential sum in the accumulation dtype, rounded after every
    /// addition; the first term is taken as is so that −0 survives, as a
    /// framework's sum keeps it. Not rounded into `dtype`: callers round the
    /// op's result once. Empty sums are +0.
    #[inline]
    pub fn sum(self, values: impl IntoIterator<Item = f64>) -> f64 {
        let mut values = values.into_iter();
        let Some(mut sum) = values.next() else {
            return 0.0;
        };
        for x in values {
            sum = self.acc(sum + x);
        }
        sum
    }
}

impl From<Dtype> for Precision {
    fn from(dtype: Dtype) -> Precision {
        Precision::of(dtype)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // 4096 products of 2^-12 sum to exactly 1 when the sum is carried in
    // binary32; summed sequentially in binary16 the running sum stalls at
    // 0.5, where adding 2^-12 is below half an ulp (2^-11 · 2^-1 = 2^-12 is a
    // tie, rounded to even, back to 0.5). IEEE 754-2019 §4.3.1
    // (roundTiesToEven) and table 3.5 (binary16: p = 11).
    #[test]
    fn f16_sums_carried_in_f32_do_not_stall() {
        let term = 2f64.powi(-12);
        let mixed = Precision::of(Dtype::F16);
        assert_eq!(mixed.accumulate, Dtype::F32);
        assert_eq!(mixed.round(mixed.sum(std::iter::repeat_n(term, 4096))), 1.0);
        let pure = Precision::new(Dtype::F16, Dtype::F16);
        assert_eq!(pure.round(pure.sum(std::iter::repeat_n(term, 4096))), 0.5);
    }

    #[test]
    fn sums_keep_a_lone_negative_zero() {
        assert!(Precision::of(Dtype::F32).sum([-0.0]).is_sign_negative());
        assert_eq!(Precision::of(Dtype::F32).sum([]), 0.0);
    }
}
