//! Variance and standard deviation of all elements or along an axis, with a
//! correction subtracted from the count (1 by default: Bessel's correction).
//!
//! Mean and sum of squares are carried in the accumulation dtype (two
//! passes: the mean first, then the squared deviations, which avoids the
//! cancellation of Σx² − nμ²); each result is rounded once into the dtype.

use super::reduce::{Lanes, checked_axis, reduced_shape};
use super::{Attrs, JvpArgs, Precision, StructuredRule, VjpArgs};
use crate::tensor::Value;

/// Σ (x − μ)² / (n − correction).
pub static VAR: StructuredRule = StructuredRule {
    shape: reduced_shape,
    forward: var_forward,
    vjp: var_vjp,
    jvp: var_jvp,
};
/// √var.
pub static STD: StructuredRule = StructuredRule {
    shape: reduced_shape,
    forward: std_forward,
    vjp: std_vjp,
    jvp: std_jvp,
};

/// One lane's statistics, in the accumulation dtype.
struct Moments {
    mean: f64,
    /// n − correction, the divisor (never below 0).
    divisor: f64,
    var: f64,
}

fn lanes_of(x: &Value, attrs: &Attrs) -> Lanes {
    Lanes::of(x.shape(), checked_axis(attrs, x.shape().len(), None))
}

fn moments(p: Precision, lane: &[f64], attrs: &Attrs) -> Moments {
    let n = lane.len() as f64;
    let mean = p.acc(p.sum(lane.iter().copied()) / n);
    let divisor = (n - attrs.correction.unwrap_or(1.0)).max(0.0);
    let squares = lane.iter().map(|&x| {
        let d = p.acc(x - mean);
        p.acc(d * d)
    });
    Moments {
        mean,
        divisor,
        var: p.acc(p.sum(squares) / divisor),
    }
}

/// Runs `per_lane(moments, lane values, lane indices)` over every lane.
fn each_lane(
    x: &Value,
    attrs: &Attrs,
    p: Precision,
    mut per_lane: impl FnMut(usize, &Moments, &[f64], &[usize]),
) {
    let lanes = lanes_of(x, attrs);
    let values = x.to_f64();
    for lane in 0..lanes.count() {
        let indices: Vec<usize> = lanes.indices(lane).collect();
        let lane_values: Vec<f64> = indices.iter().map(|&i| values[i]).collect();
        per_lane(
            lane,
            &moments(p, &lane_values, attrs),
            &lane_values,
            &indices,
        );
    }
}

fn reduced(x: &Value, attrs: &Attrs, p: Precision, of: impl Fn(&Moments) -> f64) -> Value {
    let mut data = Vec::new();
    each_lane(x, attrs, p, |_, m, _, _| data.push(p.round(of(m))));
    let shape = reduced_shape(&[x.shape()], attrs).expect("axis checked by the validator");
    Value::from_parts_in(p.dtype, shape, data)
}

fn var_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    reduced(inputs[0], attrs, p, |m| m.var)
}

fn std_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    reduced(inputs[0], attrs, p, |m| p.acc(m.var.sqrt()))
}

/// x̄ₖ = ḡ · scale(m) · (xₖ − μ), with the scale per lane.
fn spread(args: &VjpArgs, scale: impl Fn(&Moments) -> f64) -> Value {
    let (x, p) = (args.inputs[0], args.precision);
    let g = args.adjoint.elements();
    let mut out = vec![0.0; x.len()];
    each_lane(x, args.attrs, p, |lane, m, values, indices| {
        let factor = p.acc(g.get(lane) * scale(m));
        for (&i, &v) in indices.iter().zip(values) {
            out[i] = p.round(p.acc(factor * p.acc(v - m.mean)));
        }
    });
    Value::from_parts_in(p.dtype, x.shape().to_vec(), out)
}

/// x̄ₖ = ḡ · 2(xₖ − μ)/(n − correction).
fn var_vjp(args: &VjpArgs) -> Value {
    let p = args.precision;
    spread(args, |m| p.acc(2.0 / m.divisor))
}

/// x̄ₖ = ḡ · (xₖ − μ)/((n − correction) σ).
fn std_vjp(args: &VjpArgs) -> Value {
    let p = args.precision;
    spread(args, |m| {
        p.acc(1.0 / p.acc(m.divisor * p.acc(m.var.sqrt())))
    })
}

/// scale(m) · Σₖ (xₖ − μ) ẋₖ per lane.
fn tangent(args: &JvpArgs, scale: impl Fn(&Moments) -> f64) -> Value {
    let (x, p) = (args.inputs[0], args.precision);
    let t = args.tangents[0].to_f64();
    let mut data = Vec::new();
    each_lane(x, args.attrs, p, |_, m, values, indices| {
        let terms = indices
            .iter()
            .zip(values)
            .map(|(&i, &v)| p.acc(p.acc(v - m.mean) * t[i]));
        data.push(p.round(p.acc(scale(m) * p.sum(terms))));
    });
    Value::from_parts_in(p.dtype, args.output.shape().to_vec(), data)
}

fn var_jvp(args: &JvpArgs) -> Value {
    let p = args.precision;
    tangent(args, |m| p.acc(2.0 / m.divisor))
}

fn std_jvp(args: &JvpArgs) -> Value {
    let p = args.precision;
    tangent(args, |m| {
        p.acc(1.0 / p.acc(m.divisor * p.acc(m.var.sqrt())))
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::dtype::Dtype;

    // Sample variance of (2, 4, 4, 4, 5, 5, 7, 9): mean 5, Σ(x − 5)² = 32, so
    // 32/8 = 4 with no correction and 32/7 with Bessel's (by hand).
    #[test]
    fn variance_by_hand() {
        let x = Value::from_parts(vec![8], vec![2.0, 4.0, 4.0, 4.0, 5.0, 5.0, 7.0, 9.0]);
        let population = Attrs {
            correction: Some(0.0),
            ..Attrs::default()
        };
        assert_eq!(
            var_forward(&[&x], &population, Dtype::F64.into()),
            Value::Scalar(4.0)
        );
        assert_eq!(
            std_forward(&[&x], &population, Dtype::F64.into()),
            Value::Scalar(2.0)
        );
        assert_eq!(
            var_forward(&[&x], &Attrs::default(), Dtype::F64.into()),
            Value::Scalar(32.0 / 7.0)
        );
    }
}
