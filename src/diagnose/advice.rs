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
    let magnitudes: Vec<f64> = entries
        .iter()
        .map(|x| x.abs())
        .filter(|x| x.is_finite() && *x > 0.0)
        .collect();
    let max_abs = magnitudes.iter().copied().fold(0.0f64, f64::max);
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
    let underflowing = |s: f64| {
        magnitudes
            .iter()
            .filter(|&&x| Dtype::F16.round_with(s * x, subnormals) == 0.0)
            .count() as f64
            / magnitudes.len() as f64
    };
    Some(LossScale {
        max_abs,
        exponent,
        scale,
        nonzero: magnitudes.len(),
        underflow_unscaled: underflowing(1.0),
        underflow_scaled: underflowing(scale),
    })
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
