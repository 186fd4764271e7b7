//! The losses with a `reduction` (mean, sum or none, PyTorch's choices):
//! nll_loss from log-probabilities against class indices (with an ignored
//! class), binary cross-entropy from logits, Huber and L1. Terms and sums are
//! carried in the accumulation dtype and each result rounded once.

use super::attrs::Reduction;
use super::index::check_indices;
use super::{Attrs, JvpArgs, Precision, StructuredRule, VjpArgs};
use crate::format::shape as show;
use crate::tensor::Value;

/// −log_probs[n, targets[n]], reduced.
pub static NLL_LOSS: StructuredRule = StructuredRule {
    shape: nll_shape,
    forward: nll_forward,
    vjp: nll_vjp,
    jvp: nll_jvp,
};
/// max(z, 0) − z t + ln(1 + e^(−|z|)), reduced.
pub static BCE_WITH_LOGITS: StructuredRule = StructuredRule {
    shape: |inputs, attrs| paired_shape("bce_with_logits", inputs, attrs),
    forward: |inputs, attrs, p| pointwise_forward(&BCE, inputs, attrs, p),
    vjp: |args| pointwise_vjp(&BCE, args),
    jvp: |args| pointwise_jvp(&BCE, args),
};
/// ½ d² inside ±δ, δ(|d| − ½δ) outside, d = prediction − target; reduced.
pub static HUBER: StructuredRule = StructuredRule {
    shape: |inputs, attrs| paired_shape("huber", inputs, attrs),
    forward: |inputs, attrs, p| pointwise_forward(&HUBER_TERM, inputs, attrs, p),
    vjp: |args| pointwise_vjp(&HUBER_TERM, args),
    jvp: |args| pointwise_jvp(&HUBER_TERM, args),
};
/// |prediction − target|, reduced.
pub static L1_LOSS: StructuredRule = StructuredRule {
    shape: |inputs, attrs| paired_shape("l1_loss", inputs, attrs),
    forward: |inputs, attrs, p| pointwise_forward(&L1, inputs, attrs, p),
    vjp: |args| pointwise_vjp(&L1, args),
    jvp: |args| pointwise_jvp(&L1, args),
};

fn reduction(attrs: &Attrs) -> Reduction {
    attrs.reduction.unwrap_or(Reduction::Mean)
}

/// The output shape of a reduction over terms of `shape`.
fn reduced(attrs: &Attrs, shape: &[usize]) -> Vec<usize> {
    match reduction(attrs) {
        Reduction::None => shape.to_vec(),
        Reduction::Mean | Reduction::Sum => Vec::new(),
    }
}

/// One elementwise loss term of a prediction a and a target b, and its two partials.
struct Term {
    value: fn(a: f64, b: f64, attrs: &Attrs) -> f64,
    partials: fn(a: f64, b: f64, attrs: &Attrs) -> (f64, f64),
}

/// Binary cross-entropy from a logit z against a target t, in the form that
/// neither overflows nor loses the tail (common practice; the same algebra as
/// PyTorch's BCEWithLogitsLoss): ∂/∂z = σ(z) − t, ∂/∂t = −z.
static BCE: Term = Term {
    value: |z, t, _| z.max(0.0) - z * t + (-z.abs()).exp().ln_1p(),
    partials: |z, t, _| (sigmoid(z) - t, -z),
};

/// Huber's loss (Huber, "Robust Estimation of a Location Parameter", Annals
/// of Mathematical Statistics, 1964): the partial is d clipped to ±δ.
static HUBER_TERM: Term = Term {
    value: |a, b, attrs| {
        let (d, delta) = (a - b, delta(attrs));
        if d.abs() < delta {
            0.5 * d * d
        } else {
            delta * (d.abs() - 0.5 * delta)
        }
    },
    partials: |a, b, attrs| {
        let (d, delta) = (a - b, delta(attrs));
        let clipped = if d.is_nan() {
            d
        } else {
            d.clamp(-delta, delta)
        };
        (clipped, -clipped)
    },
};

/// |a − b|: sign(a − b), 0 at a tie (the subgradient frameworks use; common practice).
static L1: Term = Term {
    value: |a, b, _| (a - b).abs(),
    partials: |a, b, _| {
        let d = a - b;
        let sign = if d.is_nan() {
            d
        } else if d > 0.0 {
            1.0
        } else if d < 0.0 {
            -1.0
        } else {
            0.0
        };
        (sign, -sign)
    },
};

fn delta(attrs: &Attrs) -> f64 {
    attrs.delta.unwrap_or(1.0)
}

fn sigmoid(x: f64) -> f64 {
    if x >= 0.0 {
        1.0 / (1.0 + (-x).exp())
    } else {
        let e = x.exp();
        e / (1.0 + e)
    }
}

fn paired_shape(name: &str, inputs: &[&[usize]], attrs: &Attrs) -> Result<Vec<usize>, String> {
    if inputs[0] != inputs[1] {
        return Err(format!(
            "{name} needs prediction and target of one shape, got {} and {}",
            show(inputs[0]),
            show(inputs[1])
        ));
    }
    if name == "huber" && !(delta(attrs) > 0.0 && delta(attrs).is_finite()) {
        return Err(format!(
            "huber needs a finite delta > 0, got {}",
            delta(attrs)
        ));
    }
    Ok(reduced(attrs, inputs[0]))
}

fn pointwise_forward(term: &Term, inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    let (a, b) = (inputs[0].to_f64(), inputs[1].to_f64());
    let terms = a
        .iter()
        .zip(b.iter())
        .map(|(&x, &y)| p.acc((term.value)(x, y, attrs)));
    let n = a.len() as f64;
    match reduction(attrs) {
        Reduction::None => Value::from_parts_in(
            p.dtype,
            inputs[0].shape().to_vec(),
            terms.map(|t| p.round(t)).collect(),
        ),
        Reduction::Sum => Value::Scalar(p.round(p.sum(terms))),
        Reduction::Mean => Value::Scalar(p.round(p.acc(p.sum(terms) / n))),
    }
}

/// The adjoint of each term: ḡ (or ḡ/n for the mean), or ḡᵢ for no reduction.
fn term_adjoints(adjoint: &Value, attrs: &Attrs, count: f64, len: usize, p: Precision) -> Vec<f64> {
    match reduction(attrs) {
        Reduction::None => adjoint.to_f64().into_owned(),
        Reduction::Sum => vec![adjoint.get(0); len],
        Reduction::Mean => vec![p.acc(adjoint.get(0) / count); len],
    }
}

fn pointwise_vjp(term: &Term, args: &VjpArgs) -> Value {
    let p = args.precision;
    let (a, b) = (args.inputs[0].to_f64(), args.inputs[1].to_f64());
    let adjoints = term_adjoints(args.adjoint, args.attrs, a.len() as f64, a.len(), p);
    let data = a
        .iter()
        .zip(b.iter())
        .zip(adjoints)
        .map(|((&x, &y), g)| {
            let (da, db) = (term.partials)(x, y, args.attrs);
            let partial = if args.slot == 0 { da } else { db };
            p.round(p.acc(g * partial))
        })
        .collect();
    Value::from_parts_in(p.dtype, args.inputs[args.slot].shape().to_vec(), data)
}

fn pointwise_jvp(term: &Term, args: &JvpArgs) -> Value {
    let p = args.precision;
    let (a, b) = (args.inputs[0].to_f64(), args.inputs[1].to_f64());
    let (ta, tb) = (args.tangents[0].to_f64(), args.tangents[1].to_f64());
    let terms = (0..a.len()).map(|i| {
        let (da, db) = (term.partials)(a[i], b[i], args.attrs);
        p.acc(p.acc(da * ta[i]) + p.acc(db * tb[i]))
    });
    let n = a.len() as f64;
    match reduction(args.attrs) {
        Reduction::None => Value::from_parts_in(
            p.dtype,
            args.inputs[0].shape().to_vec(),
            terms.map(|t| p.round(t)).collect(),
        ),
        Reduction::Sum => Value::Scalar(p.round(p.sum(terms))),
        Reduction::Mean => Value::Scalar(p.round(p.acc(p.sum(terms) / n))),
    }
}

/// Rows and classes of log-probabilities [N, C] or [C].
fn nll_rows(log_probs: &[usize]) -> Option<(usize, usize)> {
    match log_probs {
        [classes] => Some((1, *classes)),
        [rows, classes] => Some((*rows, *classes)),
        _ => None,
    }
}

fn nll_shape(inputs: &[&[usize]], attrs: &Attrs) -> Result<Vec<usize>, String> {
    let (log_probs, targets) = (inputs[0], inputs[1]);
    let (rows, _) = nll_rows(log_probs).ok_or_else(|| {
        format!(
            "nll_loss needs log-probabilities of shape [N, C] or [C], got {}",
            show(log_probs)
        )
    })?;
    let expected: &[usize] = if log_probs.len() == 1 { &[] } else { &[rows] };
    if targets != expected {
        return Err(format!(
            "nll_loss targets have shape {} but log-probabilities {} need {}",
            show(targets),
            show(log_probs),
            show(expected)
        ));
    }
    Ok(reduced(attrs, targets))
}

fn ignore_index(attrs: &Attrs) -> i64 {
    attrs.ignore_index.unwrap_or(-100)
}

/// Checks nll_loss's targets: whole numbers within the classes, or the ignored index.
pub(super) fn check_nll(inputs: &[&Value], attrs: &Attrs) -> Result<(), String> {
    let classes = *inputs[0].shape().last().unwrap_or(&0);
    check_indices(inputs[1], classes, Some(ignore_index(attrs)), "target")
}

/// Per row: the target's column, or `None` when ignored.
fn picks(inputs: &[&Value], attrs: &Attrs) -> Vec<Option<usize>> {
    let (_, classes) = nll_rows(inputs[0].shape()).expect("shape checked by the validator");
    let ignored = ignore_index(attrs);
    let targets = inputs[1].elements();
    (0..targets.len())
        .map(|n| {
            let t = targets.get(n);
            (t as i64 != ignored).then(|| super::index::position(t, classes))
        })
        .collect()
}

/// The number of targets not ignored: the mean's divisor (0 gives NaN, as in PyTorch).
fn counted(picks: &[Option<usize>]) -> f64 {
    picks.iter().filter(|pick| pick.is_some()).count() as f64
}

fn nll_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    let log_probs = inputs[0].to_f64();
    let classes = *inputs[0].shape().last().expect("rank checked");
    let picks = picks(inputs, attrs);
    let terms = picks
        .iter()
        .enumerate()
        .map(|(n, pick)| pick.map_or(0.0, |c| -log_probs[n * classes + c]));
    match reduction(attrs) {
        Reduction::None => Value::from_parts_in(
            p.dtype,
            inputs[1].shape().to_vec(),
            terms.map(|t| p.round(t)).collect(),
        ),
        Reduction::Sum => Value::Scalar(p.round(p.sum(terms))),
        Reduction::Mean => Value::Scalar(p.round(p.acc(p.sum(terms) / counted(&picks)))),
    }
}

/// The target's log-probability in each row receives −ḡ (÷ the count for
/// the mean); everything else, and the targets, receive 0.
fn nll_vjp(args: &VjpArgs) -> Value {
    let p = args.precision;
    if args.slot == 1 {
        return Value::filled(args.inputs[1].shape(), 0.0).stored_as(p.dtype);
    }
    let picks = picks(args.inputs, args.attrs);
    let classes = *args.inputs[0].shape().last().expect("rank checked");
    let adjoints = term_adjoints(args.adjoint, args.attrs, counted(&picks), picks.len(), p);
    let mut data = vec![0.0; args.inputs[0].len()];
    for (n, (pick, g)) in picks.iter().zip(adjoints).enumerate() {
        if let Some(c) = pick {
            data[n * classes + c] = p.round(-g);
        }
    }
    Value::from_parts_in(p.dtype, args.inputs[0].shape().to_vec(), data)
}

fn nll_jvp(args: &JvpArgs) -> Value {
    let tangent = args.tangents[0];
    nll_forward(&[tangent, args.inputs[1]], args.attrs, args.precision)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::dtype::Dtype;

    #[test]
    fn nll_picks_the_targets_and_skips_the_ignored() {
        let log_probs = Value::from_parts(vec![3, 2], vec![-0.1, -2.0, -3.0, -0.5, -1.0, -1.0]);
        let targets = Value::from_parts(vec![3], vec![0.0, 1.0, -100.0]);
        let mean = nll_forward(
            &[&log_probs, &targets],
            &Attrs::default(),
            Dtype::F64.into(),
        );
        assert_eq!(mean, Value::Scalar(0.3));
        let sum = Attrs {
            reduction: Some(Reduction::Sum),
            ..Attrs::default()
        };
        assert_eq!(
            nll_forward(&[&log_probs, &targets], &sum, Dtype::F64.into()),
            Value::Scalar(0.6)
        );
    }

    #[test]
    fn bce_from_logits_does_not_overflow() {
        // At z = 0, t = 1: ln 2; at z = 1000, t = 1: 0; at z = −1000, t = 1: 1000.
        assert_eq!((BCE.value)(0.0, 1.0, &Attrs::default()), 2f64.ln());
        assert_eq!((BCE.value)(1000.0, 1.0, &Attrs::default()), 0.0);
        assert_eq!((BCE.value)(-1000.0, 1.0, &Attrs::default()), 1000.0);
    }
}
