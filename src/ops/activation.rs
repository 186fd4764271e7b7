//! Forward and partial rules of the activations and the other elementwise
//! functions networks use beyond the basic ones (`elementwise.rs`): one
//! scalar function each, applied over tensors with broadcasting by `ops`.
//!
//! At kinks and ties the partial is the one PyTorch computes (common
//! practice; recalled from its derivative definitions), so a captured trace's
//! reported gradients agree: clamp's bounds are inclusive, maximum and
//! minimum split a tie evenly, elu takes its left side at 0.

use super::attrs::Approximate;
use super::{Attrs, BinaryRule, UnaryRule};
use std::f64::consts::{FRAC_1_SQRT_2, FRAC_2_SQRT_PI, PI};

/// max(a, b); NaN propagates; a tie gives each input half the adjoint.
pub static MAXIMUM: BinaryRule = BinaryRule {
    value: |a, b| {
        if a.is_nan() || b.is_nan() {
            a + b
        } else if a >= b {
            a
        } else {
            b
        }
    },
    partials: [|a, b, _| share(a, b), |a, b, _| share(b, a)],
};

/// min(a, b); NaN propagates; a tie gives each input half the adjoint.
pub static MINIMUM: BinaryRule = BinaryRule {
    value: |a, b| {
        if a.is_nan() || b.is_nan() {
            a + b
        } else if a <= b {
            a
        } else {
            b
        }
    },
    partials: [|a, b, _| share(b, a), |a, b, _| share(a, b)],
};

/// aᵇ with a tensor exponent: ∂/∂a = b·a^(b−1) (0 where b = 0), ∂/∂b = aᵇ·ln a
/// (0 where a = 0 and b ≥ 0, the limit PyTorch takes).
pub static POWT: BinaryRule = BinaryRule {
    value: |a, b| a.powf(b),
    partials: [
        |a, b, _| {
            if b == 0.0 { 0.0 } else { b * a.powf(b - 1.0) }
        },
        |a, b, _| {
            if a == 0.0 && b >= 0.0 {
                0.0
            } else {
                a.powf(b) * a.ln()
            }
        },
    ],
};

/// x²: 2x.
pub static SQUARE: UnaryRule = UnaryRule {
    value: |x, _| x * x,
    partial: |x, _, _| 2.0 * x,
};
/// 1/x: −1/x².
pub static RECIPROCAL: UnaryRule = UnaryRule {
    value: |x, _| 1.0 / x,
    partial: |x, _, _| -1.0 / (x * x),
};
/// 1/√x: −½ x^(−3/2).
pub static RSQRT: UnaryRule = UnaryRule {
    value: |x, _| 1.0 / x.sqrt(),
    partial: |x, _, _| -0.5 / (x * x.sqrt()),
};
/// ln(1 + x): 1/(1 + x).
pub static LOG1P: UnaryRule = UnaryRule {
    value: |x, _| x.ln_1p(),
    partial: |x, _, _| 1.0 / (1.0 + x),
};
/// eˣ − 1: eˣ.
pub static EXPM1: UnaryRule = UnaryRule {
    value: |x, _| x.exp_m1(),
    partial: |x, _, _| x.exp(),
};
/// erf x: (2/√π) e^(−x²).
pub static ERF: UnaryRule = UnaryRule {
    value: |x, _| libm::erf(x),
    partial: |x, _, _| FRAC_2_SQRT_PI * (-x * x).exp(),
};
/// tan x: 1 + tan² x.
pub static TAN: UnaryRule = UnaryRule {
    value: |x, _| x.tan(),
    partial: |x, _, _| {
        let t = x.tan();
        1.0 + t * t
    },
};
/// x Φ(x), or its tanh approximation.
pub static GELU: UnaryRule = UnaryRule {
    value: |x, a| match approximate(a) {
        Approximate::None => x * normal_cdf(x),
        Approximate::Tanh => {
            let (t, _) = gelu_tanh_inner(x);
            0.5 * x * (1.0 + t)
        }
    },
    partial: |x, _, a| match approximate(a) {
        // Φ(x) + x φ(x).
        Approximate::None => normal_cdf(x) + x * normal_pdf(x),
        Approximate::Tanh => {
            let (t, du) = gelu_tanh_inner(x);
            0.5 * (1.0 + t) + 0.5 * x * (1.0 - t * t) * du
        }
    },
};
/// x σ(x): σ(x)(1 + x(1 − σ(x))).
pub static SILU: UnaryRule = UnaryRule {
    value: |x, _| x * sigmoid(x),
    partial: |x, _, _| {
        let s = sigmoid(x);
        s * (1.0 + x * (1.0 - s))
    },
};
/// (1/β) ln(1 + e^(βx)), x above the threshold: σ(βx), 1 above it.
pub static SOFTPLUS: UnaryRule = UnaryRule {
    value: |x, a| {
        let (beta, threshold) = softplus_attrs(a);
        let z = beta * x;
        if z > threshold {
            x
        } else {
            // max(z, 0) + ln(1 + e^(−|z|)): no overflow for large |z|.
            (z.max(0.0) + (-z.abs()).exp().ln_1p()) / beta
        }
    },
    partial: |x, _, a| {
        let (beta, threshold) = softplus_attrs(a);
        let z = beta * x;
        if z > threshold { 1.0 } else { sigmoid(z) }
    },
};
/// x for x > 0, α(eˣ − 1) otherwise: 1, or α eˣ (α at 0, the left side).
pub static ELU: UnaryRule = UnaryRule {
    value: |x, a| {
        if x > 0.0 || x.is_nan() {
            x
        } else {
            alpha(a) * x.exp_m1()
        }
    },
    partial: |x, _, a| {
        if x.is_nan() {
            x
        } else if x > 0.0 {
            1.0
        } else {
            alpha(a) * x.exp()
        }
    },
};
/// min(max(x, lo), hi); NaN propagates; the adjoint passes at the bounds.
pub static CLAMP: UnaryRule = UnaryRule {
    value: |x, a| {
        let (lo, hi) = bounds(a);
        if x.is_nan() {
            x
        } else {
            // PyTorch's order: the lower bound first, then the upper, so
            // min > max gives max everywhere.
            let lifted = if x < lo { lo } else { x };
            if lifted > hi { hi } else { lifted }
        }
    },
    partial: |x, _, a| {
        let (lo, hi) = bounds(a);
        if x.is_nan() {
            x
        } else if lo <= x && x <= hi {
            1.0
        } else {
            0.0
        }
    },
};

/// The partial of max(a, b) on a: 1 where a wins, ½ at a tie, NaN with NaN.
fn share(a: f64, b: f64) -> f64 {
    if a.is_nan() || b.is_nan() {
        f64::NAN
    } else if a > b {
        1.0
    } else if a == b {
        0.5
    } else {
        0.0
    }
}

fn approximate(attrs: &Attrs) -> Approximate {
    attrs.approximate.unwrap_or(Approximate::None)
}

/// β and the threshold of softplus, PyTorch's defaults 1 and 20.
fn softplus_attrs(attrs: &Attrs) -> (f64, f64) {
    (attrs.beta.unwrap_or(1.0), attrs.threshold.unwrap_or(20.0))
}

fn alpha(attrs: &Attrs) -> f64 {
    attrs.alpha.unwrap_or(1.0)
}

/// clamp's bounds; a missing one is unbounded.
pub(super) fn bounds(attrs: &Attrs) -> (f64, f64) {
    (
        attrs.min.unwrap_or(f64::NEG_INFINITY),
        attrs.max.unwrap_or(f64::INFINITY),
    )
}

/// Φ(x) = ½ erfc(−x/√2): accurate in the far left tail, where ½(1 + erf)
/// would cancel to 0.
fn normal_cdf(x: f64) -> f64 {
    0.5 * libm::erfc(-x * FRAC_1_SQRT_2)
}

/// φ(x) = e^(−x²/2) / √(2π).
fn normal_pdf(x: f64) -> f64 {
    (-0.5 * x * x).exp() / (2.0 * PI).sqrt()
}

/// tanh(u) and du/dx for u = √(2/π)(x + 0.044715 x³), the tanh form of GELU
/// (Hendrycks & Gimpel, "Gaussian Error Linear Units (GELUs)", 2016, §2).
fn gelu_tanh_inner(x: f64) -> (f64, f64) {
    const C: f64 = 0.044715;
    let k = (2.0 / PI).sqrt();
    let u = k * (x + C * x * x * x);
    (u.tanh(), k * (1.0 + 3.0 * C * x * x))
}

/// The logistic function, written so that neither branch overflows.
fn sigmoid(x: f64) -> f64 {
    if x >= 0.0 {
        1.0 / (1.0 + (-x).exp())
    } else {
        let e = x.exp();
        e / (1.0 + e)
    }
}

/// Which side of each kink an elementwise op's inputs are on (see
/// [`super::kink_state`]): 0 on a kink, another number per smooth piece.
pub(super) fn unary_kink(op: super::Op, x: f64, attrs: &Attrs) -> i64 {
    use super::Op;
    let sign = |v: f64| {
        if v > 0.0 {
            1
        } else if v < 0.0 {
            -1
        } else {
            0
        }
    };
    match op {
        Op::Clamp => {
            let (lo, hi) = bounds(attrs);
            if lo > hi {
                3
            } else if x == lo || x == hi {
                0
            } else if x < lo {
                -1
            } else if x > hi {
                2
            } else {
                1
            }
        }
        Op::Softplus => {
            let (beta, threshold) = softplus_attrs(attrs);
            sign(beta * x - threshold)
        }
        _ => sign(x),
    }
}

/// Whether elu with these attributes has a kink at 0: only when α ≠ 1, since
/// α e⁰ = 1 matches the right side's slope.
pub(super) fn elu_has_kink(attrs: &Attrs) -> bool {
    alpha(attrs) != 1.0
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ties_and_bounds_follow_the_framework_conventions() {
        let none = Attrs::default();
        // maximum at a tie: half to each (common practice, as PyTorch does).
        assert_eq!((MAXIMUM.partials[0])(2.0, 2.0, 2.0), 0.5);
        assert_eq!((MAXIMUM.partials[1])(2.0, 2.0, 2.0), 0.5);
        assert_eq!((MAXIMUM.partials[0])(3.0, 2.0, 3.0), 1.0);
        assert_eq!((MINIMUM.partials[0])(3.0, 2.0, 2.0), 0.0);
        assert_eq!((MINIMUM.partials[1])(3.0, 2.0, 2.0), 1.0);
        assert!((MAXIMUM.value)(f64::NAN, 1.0).is_nan());
        assert!((MINIMUM.value)(1.0, f64::NAN).is_nan());
        // clamp: the bounds pass the adjoint.
        let unit = Attrs {
            min: Some(0.0),
            max: Some(1.0),
            ..Attrs::default()
        };
        assert_eq!((CLAMP.partial)(0.0, 0.0, &unit), 1.0);
        assert_eq!((CLAMP.partial)(1.0, 1.0, &unit), 1.0);
        assert_eq!((CLAMP.partial)(1.5, 1.0, &unit), 0.0);
        assert_eq!((CLAMP.value)(-3.0, &unit), 0.0);
        let crossed = Attrs {
            min: Some(2.0),
            max: Some(1.0),
            ..Attrs::default()
        };
        assert_eq!((CLAMP.value)(5.0, &crossed), 1.0);
        assert_eq!((CLAMP.value)(-5.0, &crossed), 1.0);
        // elu at 0 takes α, the left side.
        let alpha = Attrs {
            alpha: Some(0.5),
            ..none.clone()
        };
        assert_eq!((ELU.partial)(0.0, 0.0, &alpha), 0.5);
        // powt: 0^b for b ≥ 0 has partial 0 in the exponent; b = 0 has 0 in the base.
        assert_eq!((POWT.partials[1])(0.0, 2.0, 0.0), 0.0);
        assert_eq!((POWT.partials[0])(0.0, 0.0, 1.0), 0.0);
    }

    #[test]
    fn softplus_switches_to_the_identity_above_the_threshold() {
        let none = Attrs::default();
        assert_eq!((SOFTPLUS.value)(25.0, &none), 25.0);
        assert_eq!((SOFTPLUS.partial)(25.0, 25.0, &none), 1.0);
        // ln 2 at 0, and no overflow far below.
        assert_eq!((SOFTPLUS.value)(0.0, &none), 2f64.ln());
        assert!((SOFTPLUS.value)(-800.0, &none) >= 0.0);
        let sharp = Attrs {
            beta: Some(2.0),
            ..none
        };
        assert!(((SOFTPLUS.value)(1.0, &sharp) - (1.0 + 2f64.exp()).ln() / 2.0).abs() < 1e-15);
    }

    #[test]
    fn gelu_keeps_its_left_tail() {
        // Φ(−10) ≈ 7.62e-24 (tabulated normal tail); x Φ(x) must not round to 0.
        let y = (GELU.value)(-10.0, &Attrs::default());
        assert!(y < 0.0 && y > -1e-21, "{y}");
    }
}
