//! Summary statistics of a value: what a user scans first when a gradient
//! looks wrong.

use crate::dtype::Dtype;
use crate::tensor::l2_norm;

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
        let min_normal = dtype.limits().min_normal();
        let (mut min, mut max, mut sum, mut finite) = (f64::INFINITY, f64::NEG_INFINITY, 0.0, 0usize);
        let (mut nan, mut pos_inf, mut neg_inf, mut zeros, mut subnormal) = (0, 0, 0, 0, 0);
        for &x in data {
            if x.is_nan() {
                nan += 1;
            } else if x == f64::INFINITY {
                pos_inf += 1;
            } else if x == f64::NEG_INFINITY {
                neg_inf += 1;
            } else {
                finite += 1;
                min = min.min(x);
                max = max.max(x);
                sum += x;
                if x == 0.0 {
                    zeros += 1;
                } else if x.abs() < min_normal {
                    subnormal += 1;
                }
            }
        }
        let (min, max, mean) = if finite == 0 { (f64::NAN, f64::NAN, f64::NAN) } else { (min, max, sum / finite as f64) };
        Summary { len: data.len(), norm: l2_norm(data), min, max, mean, nan, pos_inf, neg_inf, zeros, subnormal }
    }

    /// Count of NaN and ±inf elements.
    pub fn non_finite(&self) -> usize {
        self.nan + self.pos_inf + self.neg_inf
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn counts_every_class_of_element() {
        let data = [0.0, -1.0, 3.0, f64::NAN, f64::INFINITY, f64::NEG_INFINITY, 1e-40];
        let summary = Summary::of(&data, Dtype::F32);
        assert_eq!((summary.nan, summary.pos_inf, summary.neg_inf, summary.zeros, summary.subnormal), (1, 1, 1, 1, 1));
        assert_eq!((summary.min, summary.max), (-1.0, 3.0));
        assert_eq!(summary.non_finite(), 3);
        assert!(summary.norm.is_nan());
        let summary = Summary::of(&data[..3], Dtype::F64);
        assert_eq!(summary.norm, 10f64.sqrt());
        assert!((summary.mean - 2.0 / 3.0).abs() < 1e-15);
    }
}
