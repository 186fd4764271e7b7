//! Forward and partial rules of the elementwise ops, one scalar function each;
//! `ops` applies them over tensors with broadcasting.

use super::{Attrs, BinaryRule, UnaryRule};

/// a + b.
pub static ADD: BinaryRule = BinaryRule {
    value: |a, b| a + b,
    partials: [|_, _, _| 1.0, |_, _, _| 1.0],
};
/// a − b.
pub static SUB: BinaryRule = BinaryRule {
    value: |a, b| a - b,
    partials: [|_, _, _| 1.0, |_, _, _| -1.0],
};
/// a · b: each input's partial is the other input.
pub static MUL: BinaryRule = BinaryRule {
    value: |a, b| a * b,
    partials: [|_, b, _| b, |a, _, _| a],
};
/// a / b: ∂/∂a = 1/b, ∂/∂b = −a/b².
pub static DIV: BinaryRule = BinaryRule {
    value: |a, b| a / b,
    partials: [|_, b, _| 1.0 / b, |a, b, _| -a / (b * b)],
};

/// −x.
pub static NEG: UnaryRule = UnaryRule {
    value: |x, _| -x,
    partial: |_, _, _| -1.0,
};
/// x^p: ∂/∂x = p·x^(p−1), infinite at 0 for 0 < p < 1.
pub static POW: UnaryRule = UnaryRule {
    value: |x, a| x.powf(exponent(a)),
    partial: |x, _, a| exponent(a) * x.powf(exponent(a) - 1.0),
};
/// eˣ: the partial is the output.
pub static EXP: UnaryRule = UnaryRule {
    value: |x, _| x.exp(),
    partial: |_, y, _| y,
};
/// ln x: 1/x.
pub static LOG: UnaryRule = UnaryRule {
    value: |x, _| x.ln(),
    partial: |x, _, _| 1.0 / x,
};
/// √x: 1/(2√x), infinite at 0.
pub static SQRT: UnaryRule = UnaryRule {
    value: |x, _| x.sqrt(),
    partial: |_, y, _| 0.5 / y,
};
/// |x|: sign(x), with 0 at the kink (the subgradient frameworks use; common practice).
pub static ABS: UnaryRule = UnaryRule {
    value: |x, _| x.abs(),
    partial: |x, _, _| sign_or_zero(x),
};
/// sin x: cos x.
pub static SIN: UnaryRule = UnaryRule {
    value: |x, _| x.sin(),
    partial: |x, _, _| x.cos(),
};
/// cos x: −sin x.
pub static COS: UnaryRule = UnaryRule {
    value: |x, _| x.cos(),
    partial: |x, _, _| -x.sin(),
};
/// tanh x: 1 − y².
pub static TANH: UnaryRule = UnaryRule {
    value: |x, _| x.tanh(),
    partial: |_, y, _| 1.0 - y * y,
};
/// σ(x): y(1 − y).
pub static SIGMOID: UnaryRule = UnaryRule {
    value: |x, _| sigmoid(x),
    partial: |_, y, _| y * (1.0 - y),
};
/// max(x, 0): 1 for x > 0, else 0 (0 at the kink; common practice).
pub static RELU: UnaryRule = UnaryRule {
    value: |x, _| if x > 0.0 || x.is_nan() { x } else { 0.0 },
    partial: |x, _, _| step(x, 0.0),
};
/// x for x > 0, else slope·x.
pub static LEAKY_RELU: UnaryRule = UnaryRule {
    value: |x, a| {
        if x > 0.0 || x.is_nan() {
            x
        } else {
            slope(a) * x
        }
    },
    partial: |x, _, a| step(x, slope(a)),
};

fn exponent(attrs: &Attrs) -> f64 {
    attrs.exponent.unwrap_or(f64::NAN)
}

fn slope(attrs: &Attrs) -> f64 {
    attrs.slope.unwrap_or(f64::NAN)
}

/// 1 above zero, `below` at or under it, NaN for NaN.
fn step(x: f64, below: f64) -> f64 {
    if x.is_nan() {
        x
    } else if x > 0.0 {
        1.0
    } else {
        below
    }
}

fn sign_or_zero(x: f64) -> f64 {
    if x.is_nan() || x == 0.0 {
        x * 0.0
    } else {
        x.signum()
    }
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn kinks_take_the_zero_subgradient() {
        let none = Attrs::default();
        assert_eq!((RELU.partial)(0.0, 0.0, &none), 0.0);
        assert_eq!((ABS.partial)(0.0, 0.0, &none), 0.0);
        assert_eq!((ABS.partial)(-2.0, 2.0, &none), -1.0);
        assert!((RELU.partial)(f64::NAN, f64::NAN, &none).is_nan());
    }

    #[test]
    fn sqrt_and_fractional_pow_have_infinite_partials_at_zero() {
        let half = Attrs {
            exponent: Some(0.5),
            ..Attrs::default()
        };
        assert_eq!((SQRT.partial)(0.0, 0.0, &Attrs::default()), f64::INFINITY);
        assert_eq!((POW.partial)(0.0, 0.0, &half), f64::INFINITY);
        assert_eq!((POW.value)(9.0, &half), 3.0);
    }

    #[test]
    fn sigmoid_is_stable_at_extremes() {
        assert_eq!(sigmoid(-800.0), 0.0);
        assert_eq!(sigmoid(800.0), 1.0);
        assert_eq!(sigmoid(0.0), 0.5);
    }
}
