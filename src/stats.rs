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
    /// Smallest element that is not NaN, −inf included (NaN when every element is NaN).
    pub min: f64,
    /// Largest element that is not NaN, +inf included (NaN when every element is NaN).
    pub max: f64,
    /// Smallest finite element (NaN when none is finite).
    pub finite_min: f64,
    /// Largest finite element (NaN when none is finite).
    pub finite_max: f64,
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

    /// The non-finite elements in words: `0`, `3 NaN`, `1 +inf`, `5 (2 NaN, 3 -inf)`.
    pub fn non_finite_text(&self) -> String {
        non_finite_text(self.nan, self.pos_inf, self.neg_inf)
    }
}

/// Counts of non-finite elements in words: `0`, `3 NaN`, `1 +inf`, `5 (2 NaN, 3 -inf)`.
pub fn non_finite_text(nan: usize, pos_inf: usize, neg_inf: usize) -> String {
    let parts: Vec<String> = [(nan, "NaN"), (pos_inf, "+inf"), (neg_inf, "-inf")]
        .into_iter()
        .filter(|&(count, _)| count > 0)
        .map(|(count, name)| format!("{count} {name}"))
        .collect();
    match parts.len() {
        0 => "0".to_string(),
        1 => parts[0].clone(),
        _ => format!("{} ({})", nan + pos_inf + neg_inf, parts.join(", ")),
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
        let (finite_min, finite_max, mean) = if self.finite == 0 {
            (f64::NAN, f64::NAN, f64::NAN)
        } else {
            (self.min, self.max, self.sum / self.finite as f64)
        };
        let ordered = self.finite + self.pos_inf + self.neg_inf;
        let (min, max) = if ordered == 0 {
            (f64::NAN, f64::NAN)
        } else {
            (
                if self.neg_inf > 0 {
                    f64::NEG_INFINITY
                } else if self.finite > 0 {
                    self.min
                } else {
                    f64::INFINITY
                },
                if self.pos_inf > 0 {
                    f64::INFINITY
                } else if self.finite > 0 {
                    self.max
                } else {
                    f64::NEG_INFINITY
                },
            )
        };
        Summary {
            len: self.len,
            norm: self.norm.finish(),
            min,
            max,
            finite_min,
            finite_max,
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
        assert_eq!(
            (summary.min, summary.max),
            (f64::NEG_INFINITY, f64::INFINITY),
            "infinities are ordered: min and max include them"
        );
        assert_eq!((summary.finite_min, summary.finite_max), (-1.0, 3.0));
        assert_eq!(summary.non_finite(), 3);
        assert_eq!(summary.non_finite_text(), "3 (1 NaN, 1 +inf, 1 -inf)");
        assert!(summary.norm.is_nan());
        // A scalar +inf: min and max are +inf, not NaN (IEEE 754-2019 §5.10
        // orders infinities with the finite numbers; only NaN is unordered).
        let summary = Summary::of(&[f64::INFINITY], Dtype::F32);
        assert_eq!((summary.min, summary.max), (f64::INFINITY, f64::INFINITY));
        assert!(summary.finite_min.is_nan() && summary.mean.is_nan());
        assert_eq!(summary.non_finite_text(), "1 +inf");
        let summary = Summary::of(&[f64::NAN, 2.0], Dtype::F32);
        assert_eq!((summary.min, summary.max), (2.0, 2.0));
        assert_eq!(summary.non_finite_text(), "1 NaN");
        let summary = Summary::of(&[f64::NAN], Dtype::F32);
        assert!(summary.min.is_nan() && summary.max.is_nan());
        let summary = Summary::of(&data[..3], Dtype::F64);
        assert_eq!(summary.norm, 10f64.sqrt());
        assert!((summary.mean - 2.0 / 3.0).abs() < 1e-15);
    }
}
