//! Summary statistics of a value: what a user scans first when a gradient
//! looks wrong.

use crate::dtype::Dtype;
use crate::tensor::NormAccumulator;

/// Summary of a value's elements.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct Summary {
    /// Number of elements.
    pub len: usize,
    /// Euclidean norm (NaN if any element is NaN).
    pub norm: f64,
    /// Smallest finite element (NaN when none is finite).
    pub min: f64,
    /// Largest finite element (NaN when none is finite).
    pub max: f64,
    /// Mean of the finite elements (NaN when none is finite).
    pub mean: f64,
    /// NaN elements.
    pub nan: usize,
    /// +inf elements.
    pub pos_inf: usize,
    /// −inf elements.
    pub neg_inf: usize,
    /// Exact zeros.
    pub zeros: usize,
    /// Non-zero elements below the dtype's smallest normal magnitude.
    pub subnormal: usize,
}

impl Summary {
    /// Summarises `data` as values of `dtype`.
    pub fn of(data: &[f64], dtype: Dtype) -> Summary {
        let mut builder = Summary::builder(dtype);
        data.iter().for_each(|&x| builder.push(x));
        builder.finish()
    }

    /// A summary built one element at a time (one pass, no buffer).
    pub fn builder(dtype: Dtype) -> SummaryBuilder {
        SummaryBuilder {
            min_normal: dtype.limits().min_normal(),
            norm: NormAccumulator::default(),
            len: 0,
            finite: 0,
            min: f64::INFINITY,
            max: f64::NEG_INFINITY,
            sum: 0.0,
            nan: 0,
            pos_inf: 0,
            neg_inf: 0,
            zeros: 0,
            subnormal: 0,
        }
    }

    /// Count of NaN and ±inf elements.
    pub fn non_finite(&self) -> usize {
        self.nan + self.pos_inf + self.neg_inf
    }
}

/// The running state of a [`Summary`].
#[derive(Debug, Clone)]
pub struct SummaryBuilder {
    min_normal: f64,
    norm: NormAccumulator,
    len: usize,
    finite: usize,
    min: f64,
    max: f64,
    sum: f64,
    nan: usize,
    pos_inf: usize,
    neg_inf: usize,
    zeros: usize,
    subnormal: usize,
}

impl SummaryBuilder {
    /// Adds one element.
    #[inline]
    pub fn push(&mut self, x: f64) {
        self.len += 1;
        self.norm.push(x);
        if x.is_nan() {
            self.nan += 1;
        } else if x == f64::INFINITY {
            self.pos_inf += 1;
        } else if x == f64::NEG_INFINITY {
            self.neg_inf += 1;
        } else {
            self.finite += 1;
            self.min = self.min.min(x);
            self.max = self.max.max(x);
            self.sum += x;
            if x == 0.0 {
                self.zeros += 1;
            } else if x.abs() < self.min_normal {
                self.subnormal += 1;
            }
        }
    }

    /// The summary of the elements pushed so far.
    pub fn finish(&self) -> Summary {
        let (min, max, mean) = if self.finite == 0 {
            (f64::NAN, f64::NAN, f64::NAN)
        } else {
            (self.min, self.max, self.sum / self.finite as f64)
        };
        Summary {
            len: self.len,
            norm: self.norm.finish(),
            min,
            max,
            mean,
            nan: self.nan,
            pos_inf: self.pos_inf,
            neg_inf: self.neg_inf,
            zeros: self.zeros,
            subnormal: self.subnormal,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn counts_every_class_of_element() {
        let data = [
            0.0,
            -1.0,
            3.0,
            f64::NAN,
            f64::INFINITY,
            f64::NEG_INFINITY,
            1e-40,
        ];
        let summary = Summary::of(&data, Dtype::F32);
        assert_eq!(
            (
                summary.nan,
                summary.pos_inf,
                summary.neg_inf,
                summary.zeros,
                summary.subnormal
            ),
            (1, 1, 1, 1, 1)
        );
        assert_eq!((summary.min, summary.max), (-1.0, 3.0));
        assert_eq!(summary.non_finite(), 3);
        assert!(summary.norm.is_nan());
        let summary = Summary::of(&data[..3], Dtype::F64);
        assert_eq!(summary.norm, 10f64.sqrt());
        assert!((summary.mean - 2.0 / 3.0).abs() < 1e-15);
    }
}
