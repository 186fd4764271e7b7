//! What to do about it: loss-scale advice for f16, a gradient-clipping
//! preview, and one line of advice per problem found.
//!
//! Loss scaling follows Micikevicius et al., "Mixed Precision Training", ICLR
//! 2018, §3.2: multiply the loss (and so every adjoint) by S so small
//! adjoints stay above f16's underflow, and divide the gradients by S before
//! the update. Clipping follows Pascanu, Mikolov & Bengio, "On the difficulty
//! of training recurrent neural networks", ICML 2013, Algorithm 1.

use crate::dtype::{Dtype, Subnormals};
use crate::tensor::l2_norm;
use serde::Serialize;

/// Loss-scale advice for f16.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct LossScale {
    /// The largest finite |adjoint| entry.
    pub max_abs: f64,
    /// log2 of the advised scale.
    pub exponent: i32,
    /// The largest power of two S with S·max_abs below f16's largest finite value.
    pub scale: f64,
    /// Non-zero finite adjoint entries considered.
    pub nonzero: usize,
    /// Fraction of them that round to zero in f16 without scaling.
    pub underflow_unscaled: f64,
    /// Fraction of them that round to zero in f16 at the advised scale.
    pub underflow_scaled: f64,
}

/// The advice for adjoint entries `entries` (non-finite and zero entries are
/// skipped); `None` when no entry is non-zero and finite.
pub fn loss_scale(entries: &[f64], subnormals: Subnormals) -> Option<LossScale> {
    loss_scale_of(&[entries], subnormals)
}

/// [`loss_scale`] over entries held in several slices (every adjoint of a
/// sweep), read in place.
pub fn loss_scale_of(chunks: &[&[f64]], subnormals: Subnormals) -> Option<LossScale> {
    // Plain loops over each chunk, branch-free, so they vectorise: the
    // entries are every adjoint of the trace.
    let (mut max_abs, mut nonzero) = (0.0f64, 0usize);
    for chunk in chunks {
        for &x in *chunk {
            let a = x.abs();
            let counted = a.is_finite() & (a > 0.0);
            max_abs = if counted { max_abs.max(a) } else { max_abs };
            nonzero += usize::from(counted);
        }
    }
    if max_abs == 0.0 {
        return None;
    }
    let limit = Dtype::F16.limits().max_finite();
    let scale_of = |exponent: i32| 2f64.powi(exponent);
    let mut exponent = (limit / max_abs).log2().floor().clamp(-1000.0, 1000.0) as i32;
    // The logarithm is a guess; settle the strict inequality exactly.
    while exponent > -1000 && scale_of(exponent) * max_abs >= limit {
        exponent -= 1;
    }
    while exponent < 1000 && scale_of(exponent + 1) * max_abs < limit {
        exponent += 1;
    }
    let scale = scale_of(exponent);
    // Rounding is monotone, so "rounds to zero in f16" is "below the smallest
    // magnitude that does not": one comparison an entry, both scales in one pass.
    let least = least_surviving(Dtype::F16, subnormals);
    let (mut unscaled, mut scaled) = (0usize, 0usize);
    for chunk in chunks {
        for &x in *chunk {
            let a = x.abs();
            let counted = a.is_finite() & (a > 0.0);
            unscaled += usize::from(counted & (a < least));
            scaled += usize::from(counted & (scale * a < least));
        }
    }
    Some(LossScale {
        max_abs,
        exponent,
        scale,
        nonzero,
        underflow_unscaled: unscaled as f64 / nonzero as f64,
        underflow_scaled: scaled as f64 / nonzero as f64,
    })
}

/// The smallest positive f64 that `dtype` (with `subnormals`) does not round
/// to zero, found by bisection over the bit patterns of positive numbers,
/// which are ordered as the numbers are.
fn least_surviving(dtype: Dtype, subnormals: Subnormals) -> f64 {
    let (mut zero, mut survives) = (0u64, 1f64.to_bits());
    while survives - zero > 1 {
        let middle = zero + (survives - zero) / 2;
        if dtype.round_with(f64::from_bits(middle), subnormals) == 0.0 {
            zero = middle;
        } else {
            survives = middle;
        }
    }
    f64::from_bits(survives)
}

/// What norm clipping at a threshold would do to the gradient.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ClipPreview {
    /// The global L2 norm of all parameter gradients together.
    pub norm: f64,
    /// The clipping threshold.
    pub threshold: f64,
    /// The factor clipping applies: threshold / norm when the norm reaches the threshold, else 1.
    pub factor: f64,
    /// Whether clipping would change the gradient.
    pub clips: bool,
}

impl ClipPreview {
    /// The preview for `gradients` (each parameter's entries) at `threshold`.
    pub fn new(gradients: &[&[f64]], threshold: f64) -> ClipPreview {
        let norms: Vec<f64> = gradients.iter().map(|gradient| l2_norm(gradient)).collect();
        let norm = l2_norm(&norms);
        let clips = norm >= threshold;
        ClipPreview {
            norm,
            threshold,
            factor: if clips { threshold / norm } else { 1.0 },
            clips,
        }
    }

    /// One gradient after clipping: threshold · g / ‖g‖ when the norm reaches the threshold, else g unchanged.
    pub fn apply(&self, gradient: &[f64]) -> Vec<f64> {
        if self.clips {
            gradient
                .iter()
                .map(|&g| self.threshold * g / self.norm)
                .collect()
        } else {
            gradient.to_vec()
        }
    }
}

/// What a piece of advice is about.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Topic {
    /// The first origin of a non-finite adjoint.
    Origin,
    /// An exploding gradient.
    Exploding,
    /// A vanishing gradient.
    Vanishing,
    /// Underflow in f16, and the loss scale that avoids it.
    LossScale,
    /// Overflow in a narrower dtype.
    Overflow,
    /// Contributions lost to rounding.
    LostPrecision,
}

/// One piece of advice.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Advice {
    /// What it is about.
    pub topic: Topic,
    /// The node it points at, if any.
    pub node: Option<usize>,
    /// What to do, in one or two sentences.
    pub text: String,
}

#[cfg(test)]
mod tests {
    use super::least_surviving;
    use crate::dtype::{Dtype, Subnormals};

    /// IEEE 754-2019 binary16 (§3.6, Table 3.5): the smallest subnormal is
    /// 2^-24, and round to nearest, ties to even sends exactly half of it,
    /// 2^-25, to zero. Flushing subnormal results, the smallest survivor is
    /// the one that rounds up to the smallest normal 2^-14: the midpoint
    /// between it and the largest subnormal 2^-14 − 2^-24, a tie won by the
    /// even 2^-14.
    #[test]
    fn the_least_surviving_f16_magnitudes() {
        let keep = least_surviving(Dtype::F16, Subnormals::Keep);
        assert_eq!(keep, f64::from_bits(2f64.powi(-25).to_bits() + 1));
        let flush = least_surviving(Dtype::F16, Subnormals::Flush);
        assert_eq!(flush, 2f64.powi(-14) - 2f64.powi(-25));
    }
}
