//! Products and running sums along lanes: prod (of all elements or along an
//! axis) and cumsum.
//!
//! prod's partial ∂/∂xₖ = Πⱼ≠ₖ xⱼ is formed from prefix and suffix products,
//! never by dividing the product by xₖ, so a zero entry gives exact partials
//! (Speelpenning's product in Griewank & Walther, "Evaluating Derivatives",
//! 2nd ed., SIAM 2008: y/xₖ is undefined where xₖ = 0).

use super::reduce::{Lanes, checked_axis, reduced_shape};
use super::{Attrs, JvpArgs, Precision, StructuredRule, VjpArgs};
use crate::tensor::{Value, resolve_axis};

/// Π of all elements, or along `axis`.
pub static PROD: StructuredRule = StructuredRule {
    shape: reduced_shape,
    forward: prod_forward,
    vjp: prod_vjp,
    jvp: prod_jvp,
};
/// Running sum along `axis`.
pub static CUMSUM: StructuredRule = StructuredRule {
    shape: cumsum_shape,
    forward: cumsum_forward,
    vjp: cumsum_vjp,
    jvp: cumsum_jvp,
};

/// The lanes of a reduction over `x` with the node's axis (all elements when none).
fn lanes_of(x: &Value, attrs: &Attrs) -> Lanes {
    Lanes::of(x.shape(), checked_axis(attrs, x.shape().len(), None))
}

/// A product in the accumulation dtype, rounded after every multiplication.
fn product(p: Precision, values: impl IntoIterator<Item = f64>) -> f64 {
    values.into_iter().fold(1.0, |acc, x| p.acc(acc * x))
}

fn prod_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    let x = inputs[0];
    let lanes = lanes_of(x, attrs);
    let values = x.to_f64();
    let data = (0..lanes.count())
        .map(|lane| p.round(product(p, lanes.indices(lane).map(|i| values[i]))))
        .collect();
    let shape = reduced_shape(&[x.shape()], attrs).expect("axis checked by the validator");
    Value::from_parts_in(p.dtype, shape, data)
}

/// Πⱼ≠ₖ xⱼ for every k of one lane, from prefix and suffix products.
fn others(p: Precision, lane: &[f64]) -> Vec<f64> {
    let n = lane.len();
    let mut suffix = vec![1.0; n + 1];
    for k in (0..n).rev() {
        suffix[k] = p.acc(suffix[k + 1] * lane[k]);
    }
    let mut prefix = 1.0;
    let mut out = Vec::with_capacity(n);
    for k in 0..n {
        out.push(p.acc(prefix * suffix[k + 1]));
        prefix = p.acc(prefix * lane[k]);
    }
    out
}

/// x̄ₖ = ḡ · Πⱼ≠ₖ xⱼ.
fn prod_vjp(args: &VjpArgs) -> Value {
    let (x, p) = (args.inputs[0], args.precision);
    let lanes = lanes_of(x, args.attrs);
    let (values, g) = (x.to_f64(), args.adjoint.elements());
    let mut out = vec![0.0; x.len()];
    for lane in 0..lanes.count() {
        let indices: Vec<usize> = lanes.indices(lane).collect();
        let lane_values: Vec<f64> = indices.iter().map(|&i| values[i]).collect();
        let adjoint = g.get(lane);
        for (&i, partial) in indices.iter().zip(others(p, &lane_values)) {
            out[i] = p.round(p.acc(adjoint * partial));
        }
    }
    Value::from_parts_in(p.dtype, x.shape().to_vec(), out)
}

/// ẏ = Σₖ (Πⱼ≠ₖ xⱼ) ẋₖ.
fn prod_jvp(args: &JvpArgs) -> Value {
    let (x, p) = (args.inputs[0], args.precision);
    let lanes = lanes_of(x, args.attrs);
    let (values, tangent) = (x.to_f64(), args.tangents[0].to_f64());
    let data = (0..lanes.count())
        .map(|lane| {
            let indices: Vec<usize> = lanes.indices(lane).collect();
            let lane_values: Vec<f64> = indices.iter().map(|&i| values[i]).collect();
            let terms = indices
                .iter()
                .zip(others(p, &lane_values))
                .map(|(&i, partial)| p.acc(partial * tangent[i]));
            p.round(p.sum(terms))
        })
        .collect();
    Value::from_parts_in(p.dtype, args.output.shape().to_vec(), data)
}

fn cumsum_shape(inputs: &[&[usize]], attrs: &Attrs) -> Result<Vec<usize>, String> {
    let input = inputs[0];
    let axis = attrs.axis.unwrap_or(0);
    if input.is_empty() {
        return Err("cumsum needs a tensor, got a scalar".to_string());
    }
    resolve_axis(axis, input.len())
        .map(|_| input.to_vec())
        .ok_or_else(|| format!("axis {axis} is out of range for rank {}", input.len()))
}

/// Running sums along each lane, walked forwards or backwards: carried in the
/// accumulation dtype, each result rounded once into the dtype.
fn running(x: &Value, attrs: &Attrs, p: Precision, backwards: bool) -> Value {
    let lanes = lanes_of(x, attrs);
    let values = x.to_f64();
    let mut out = vec![0.0; x.len()];
    for lane in 0..lanes.count() {
        let mut indices: Vec<usize> = lanes.indices(lane).collect();
        if backwards {
            indices.reverse();
        }
        let mut total: Option<f64> = None;
        for i in indices {
            let sum = total.map_or(values[i], |t| p.acc(t + values[i]));
            total = Some(sum);
            out[i] = p.round(sum);
        }
    }
    Value::from_parts_in(p.dtype, x.shape().to_vec(), out)
}

fn cumsum_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    running(inputs[0], attrs, p, false)
}

/// x̄ₖ = Σⱼ≥ₖ ḡⱼ: the adjoint's running sum from the end.
fn cumsum_vjp(args: &VjpArgs) -> Value {
    running(args.adjoint, args.attrs, args.precision, true)
}

fn cumsum_jvp(args: &JvpArgs) -> Value {
    running(args.tangents[0], args.attrs, args.precision, false)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::dtype::Dtype;

    // Speelpenning's product y = Π xᵢ (Griewank & Walther, "Evaluating
    // Derivatives", 2nd ed., SIAM 2008) at x = (2, 3, 0, 5): the gradient
    // Πⱼ≠ₖ xⱼ is (0, 0, 30, 0) by hand.
    #[test]
    fn speelpenning_with_a_zero() {
        let x = Value::from_parts(vec![4], vec![2.0, 3.0, 0.0, 5.0]);
        let y = prod_forward(&[&x], &Attrs::default(), Dtype::F64.into());
        assert_eq!(y, Value::Scalar(0.0));
        let g = Value::Scalar(1.0);
        let args = VjpArgs {
            slot: 0,
            inputs: &[&x],
            output: &y,
            adjoint: &g,
            attrs: &Attrs::default(),
            precision: Dtype::F64.into(),
        };
        assert_eq!(
            prod_vjp(&args),
            Value::from_parts(vec![4], vec![0.0, 0.0, 30.0, 0.0])
        );
    }

    #[test]
    fn cumsum_and_its_reverse() {
        let x = Value::from_parts(vec![2, 3], vec![1.0, 2.0, 3.0, 4.0, 5.0, 6.0]);
        let attrs = Attrs {
            axis: Some(1),
            ..Attrs::default()
        };
        let y = cumsum_forward(&[&x], &attrs, Dtype::F64.into());
        assert_eq!(
            y,
            Value::from_parts(vec![2, 3], vec![1.0, 3.0, 6.0, 4.0, 9.0, 15.0])
        );
        let args = VjpArgs {
            slot: 0,
            inputs: &[&x],
            output: &y,
            adjoint: &x,
            attrs: &attrs,
            precision: Dtype::F64.into(),
        };
        assert_eq!(
            cumsum_vjp(&args),
            Value::from_parts(vec![2, 3], vec![6.0, 5.0, 3.0, 15.0, 11.0, 6.0])
        );
    }
}
