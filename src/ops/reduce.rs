//! Reductions and normalisations along an axis: sum, mean, max, min,
//! softmax, log_softmax and logsumexp.

use super::{Attrs, JvpArgs, Precision, StructuredRule, VjpArgs};
use crate::dtype::Dtype;
use crate::format::shape as show;
use crate::tensor::{Value, resolve_axis, split_at_axis};

/// Σ of all elements, or along `axis`.
pub static SUM: StructuredRule = StructuredRule {
    shape: reduced_shape,
    forward: sum_forward,
    vjp: sum_vjp,
    jvp: sum_jvp,
};
/// Mean of all elements, or along `axis`.
pub static MEAN: StructuredRule = StructuredRule {
    shape: reduced_shape,
    forward: mean_forward,
    vjp: mean_vjp,
    jvp: mean_jvp,
};
/// Maximum along `axis`; the first maximum receives the adjoint.
pub static MAX: StructuredRule = StructuredRule {
    shape: reduced_shape,
    forward: max_forward,
    vjp: max_vjp,
    jvp: max_jvp,
};
/// Minimum along `axis`; the first minimum receives the adjoint.
pub static MIN: StructuredRule = StructuredRule {
    shape: reduced_shape,
    forward: min_forward,
    vjp: min_vjp,
    jvp: min_jvp,
};
/// Softmax along `axis` (default −1).
pub static SOFTMAX: StructuredRule = StructuredRule {
    shape: same_shape_with_axis,
    forward: softmax_forward,
    vjp: softmax_vjp,
    jvp: softmax_jvp,
};
/// Log-softmax along `axis` (default −1).
pub static LOG_SOFTMAX: StructuredRule = StructuredRule {
    shape: same_shape_with_axis,
    forward: log_softmax_forward,
    vjp: log_softmax_vjp,
    jvp: log_softmax_jvp,
};
/// log Σ eˣ of all elements, or along `axis`.
pub static LOGSUMEXP: StructuredRule = StructuredRule {
    shape: reduced_shape,
    forward: logsumexp_forward,
    vjp: logsumexp_vjp,
    jvp: logsumexp_jvp,
};

/// The lanes a reduction runs along: `outer × inner` lanes of `length`
/// elements each, `stride` apart.
#[derive(Clone, Copy)]
pub(super) struct Lanes {
    outer: usize,
    length: usize,
    inner: usize,
}

impl Lanes {
    pub(super) fn of(shape: &[usize], axis: Option<usize>) -> Lanes {
        match axis {
            None => Lanes {
                outer: 1,
                length: shape.iter().product(),
                inner: 1,
            },
            Some(axis) => {
                let (outer, length, inner) = split_at_axis(shape, axis);
                Lanes {
                    outer,
                    length,
                    inner,
                }
            }
        }
    }

    pub(super) fn count(self) -> usize {
        self.outer * self.inner
    }

    /// Flat indices of the elements of lane `lane`.
    pub(super) fn indices(self, lane: usize) -> impl Iterator<Item = usize> {
        let (o, i) = (lane / self.inner, lane % self.inner);
        let base = o * self.length * self.inner + i;
        (0..self.length).map(move |k| base + k * self.inner)
    }
}

/// The axis in force: the attribute resolved against `rank`, or `default`.
fn axis_of(attrs: &Attrs, rank: usize, default: Option<i64>) -> Result<Option<usize>, String> {
    match attrs.axis.or(default) {
        None => Ok(None),
        Some(axis) => resolve_axis(axis, rank)
            .map(Some)
            .ok_or_else(|| format!("axis {axis} is out of range for rank {rank}")),
    }
}

pub(super) fn checked_axis(attrs: &Attrs, rank: usize, default: Option<i64>) -> Option<usize> {
    axis_of(attrs, rank, default).expect("axis checked by the validator")
}

pub(super) fn reduced_shape(inputs: &[&[usize]], attrs: &Attrs) -> Result<Vec<usize>, String> {
    let input = inputs[0];
    match axis_of(attrs, input.len(), None)? {
        None => Ok(Vec::new()),
        Some(axis) => {
            let mut shape = input.to_vec();
            if attrs.keepdims {
                shape[axis] = 1;
            } else {
                shape.remove(axis);
            }
            Ok(shape)
        }
    }
}

fn same_shape_with_axis(inputs: &[&[usize]], attrs: &Attrs) -> Result<Vec<usize>, String> {
    let input = inputs[0];
    if input.is_empty() {
        return Err(format!("softmax needs a tensor, got shape {}", show(input)));
    }
    axis_of(attrs, input.len(), Some(-1))?;
    Ok(input.to_vec())
}

/// Applies `reduce` to every lane and shapes the result like the reduction's
/// output, each result rounded once into the storage dtype.
fn reduce_lanes(
    x: &Value,
    attrs: &Attrs,
    p: Precision,
    reduce: impl Fn(&mut dyn Iterator<Item = f64>) -> f64,
) -> Value {
    let axis = checked_axis(attrs, x.shape().len(), None);
    let lanes = Lanes::of(x.shape(), axis);
    let elements = x.elements();
    let data: Vec<f64> = (0..lanes.count())
        .map(|lane| {
            p.round(reduce(
                &mut lanes.indices(lane).map(|index| elements.get(index)),
            ))
        })
        .collect();
    let shape = reduced_shape(&[x.shape()], attrs).expect("axis checked by the validator");
    Value::from_parts_in(p.dtype, shape, data)
}

/// A sequential sum rounded into `dtype` after every addition.
fn rounded_sum(dtype: Dtype, values: &mut dyn Iterator<Item = f64>) -> f64 {
    Precision::new(dtype, dtype).sum(values)
}

/// Spreads a reduction's adjoint back over its lanes: element k of a lane gets
/// `each(lane adjoint, k, lane)`.
fn spread(
    args: &VjpArgs,
    default_axis: Option<i64>,
    each: impl Fn(f64, usize, &[usize]) -> f64,
) -> Value {
    let x = args.inputs[0];
    let axis = checked_axis(args.attrs, x.shape().len(), default_axis);
    let lanes = Lanes::of(x.shape(), axis);
    let mut out = vec![0.0; x.len()];
    let adjoint = args.adjoint.elements();
    for lane in 0..lanes.count() {
        let indices: Vec<usize> = lanes.indices(lane).collect();
        for (k, &index) in indices.iter().enumerate() {
            out[index] = each(adjoint.get(lane), k, &indices);
        }
    }
    Value::from_parts_in(args.precision.dtype, x.shape().to_vec(), out)
}

fn sum_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    reduce_lanes(inputs[0], attrs, p, |lane| p.sum(lane))
}

fn sum_vjp(args: &VjpArgs) -> Value {
    spread(args, None, |adjoint, _, _| adjoint)
}

fn lane_length(x: &Value, attrs: &Attrs) -> f64 {
    Lanes::of(x.shape(), checked_axis(attrs, x.shape().len(), None)).length as f64
}

fn mean_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    let n = lane_length(inputs[0], attrs);
    reduce_lanes(inputs[0], attrs, p, |lane| p.acc(p.sum(lane) / n))
}

fn mean_vjp(args: &VjpArgs) -> Value {
    let n = lane_length(args.inputs[0], args.attrs);
    let p = args.precision;
    spread(args, None, |adjoint, _, _| p.round(p.acc(adjoint / n)))
}

/// NaN-propagating maximum and the position of its first occurrence.
fn first_max(values: impl Iterator<Item = f64>) -> (f64, usize) {
    let mut best = (f64::NEG_INFINITY, 0);
    for (k, x) in values.enumerate() {
        if x.is_nan() {
            return (x, k);
        }
        if k == 0 || x > best.0 {
            best = (x, k);
        }
    }
    best
}

fn max_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    reduce_lanes(inputs[0], attrs, p, |lane| first_max(lane).0)
}

fn max_vjp(args: &VjpArgs) -> Value {
    let x = args.inputs[0].elements();
    spread(args, None, |adjoint, k, lane| {
        let (_, winner) = first_max(lane.iter().map(|&index| x.get(index)));
        if k == winner { adjoint } else { 0.0 }
    })
}

/// NaN-propagating minimum and the position of its first occurrence.
fn first_min(values: impl Iterator<Item = f64>) -> (f64, usize) {
    let (best, position) = first_max(values.map(|x| -x));
    (-best, position)
}

fn min_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    reduce_lanes(inputs[0], attrs, p, |lane| first_min(lane).0)
}

fn min_vjp(args: &VjpArgs) -> Value {
    let x = args.inputs[0].elements();
    spread(args, None, |adjoint, k, lane| {
        let (_, winner) = first_min(lane.iter().map(|&index| x.get(index)));
        if k == winner { adjoint } else { 0.0 }
    })
}

/// The tangent of the first minimum of each lane.
fn min_jvp(args: &JvpArgs) -> Value {
    let (x, tangent) = (args.inputs[0], args.tangents[0]);
    let lanes = Lanes::of(x.shape(), checked_axis(args.attrs, x.shape().len(), None));
    let (xs, ts) = (x.elements(), tangent.elements());
    let data = (0..lanes.count())
        .map(|lane| {
            let indices: Vec<usize> = lanes.indices(lane).collect();
            let (_, winner) = first_min(indices.iter().map(|&i| xs.get(i)));
            ts.get(indices[winner])
        })
        .collect();
    Value::from_parts_in(args.precision.dtype, args.output.shape().to_vec(), data)
}

/// Softmax of one lane, stabilised by subtracting the lane maximum.
fn softmax_lane(dtype: Dtype, lane: &[f64]) -> Vec<f64> {
    let (m, _) = first_max(lane.iter().copied());
    let shift = if m.is_finite() { m } else { 0.0 };
    let exps: Vec<f64> = lane
        .iter()
        .map(|&x| dtype.round(dtype.round(x - shift).exp()))
        .collect();
    let total = rounded_sum(dtype, &mut exps.iter().copied());
    exps.iter().map(|&e| dtype.round(e / total)).collect()
}

/// log Σ eˣ of one lane, stabilised by the lane maximum.
fn logsumexp_lane(dtype: Dtype, lane: &[f64]) -> f64 {
    let (m, _) = first_max(lane.iter().copied());
    if !m.is_finite() {
        // All −inf gives −inf; any +inf or NaN dominates.
        return m;
    }
    let total = rounded_sum(
        dtype,
        &mut lane.iter().map(|&x| dtype.round(dtype.round(x - m).exp())),
    );
    dtype.round(m + dtype.round(total.ln()))
}

/// Maps every lane along `axis` (default −1) through `f`, keeping the shape;
/// each result rounded once into the storage dtype.
fn map_lanes(x: &Value, attrs: &Attrs, p: Precision, f: impl Fn(&[f64]) -> Vec<f64>) -> Value {
    let axis = checked_axis(attrs, x.shape().len(), Some(-1));
    let lanes = Lanes::of(x.shape(), axis);
    let mut out = vec![0.0; x.len()];
    let elements = x.elements();
    for lane in 0..lanes.count() {
        let indices: Vec<usize> = lanes.indices(lane).collect();
        let values: Vec<f64> = indices.iter().map(|&index| elements.get(index)).collect();
        for (&index, y) in indices.iter().zip(f(&values)) {
            out[index] = p.round(y);
        }
    }
    Value::from_parts_in(p.dtype, x.shape().to_vec(), out)
}

fn softmax_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    map_lanes(inputs[0], attrs, p, |lane| softmax_lane(p.accumulate, lane))
}

/// x̄ₖ = yₖ (ḡₖ − Σⱼ ḡⱼ yⱼ) along each lane.
fn softmax_vjp(args: &VjpArgs) -> Value {
    let (y, g, p) = (args.output.to_f64(), args.adjoint.to_f64(), args.precision);
    let acc = p.accumulate;
    let lanes = Lanes::of(
        args.output.shape(),
        checked_axis(args.attrs, args.output.shape().len(), Some(-1)),
    );
    let mut out = vec![0.0; y.len()];
    for lane in 0..lanes.count() {
        let indices: Vec<usize> = lanes.indices(lane).collect();
        let weighted = rounded_sum(acc, &mut indices.iter().map(|&i| acc.round(g[i] * y[i])));
        for &i in &indices {
            out[i] = p.round(acc.round(y[i] * acc.round(g[i] - weighted)));
        }
    }
    Value::from_parts_in(p.dtype, args.output.shape().to_vec(), out)
}

fn log_softmax_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    let acc = p.accumulate;
    map_lanes(inputs[0], attrs, p, |lane| {
        let normaliser = logsumexp_lane(acc, lane);
        lane.iter().map(|&x| acc.round(x - normaliser)).collect()
    })
}

/// x̄ₖ = ḡₖ − softmax(x)ₖ Σⱼ ḡⱼ, with softmax(x) = exp(y).
fn log_softmax_vjp(args: &VjpArgs) -> Value {
    let (y, g, p) = (args.output.to_f64(), args.adjoint.to_f64(), args.precision);
    let acc = p.accumulate;
    let lanes = Lanes::of(
        args.output.shape(),
        checked_axis(args.attrs, args.output.shape().len(), Some(-1)),
    );
    let mut out = vec![0.0; y.len()];
    for lane in 0..lanes.count() {
        let indices: Vec<usize> = lanes.indices(lane).collect();
        let total = rounded_sum(acc, &mut indices.iter().map(|&i| g[i]));
        for &i in &indices {
            let probability = acc.round(y[i].exp());
            out[i] = p.round(acc.round(g[i] - acc.round(probability * total)));
        }
    }
    Value::from_parts_in(p.dtype, args.output.shape().to_vec(), out)
}

fn logsumexp_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    reduce_lanes(inputs[0], attrs, p, |lane| {
        logsumexp_lane(p.accumulate, &lane.collect::<Vec<_>>())
    })
}

/// x̄ₖ = ḡ · exp(xₖ − y): the adjoint spread by the lane's softmax.
fn logsumexp_vjp(args: &VjpArgs) -> Value {
    let (x, y, p) = (args.inputs[0], args.output, args.precision);
    let acc = p.accumulate;
    let (xs, ys, gs) = (x.elements(), y.elements(), args.adjoint.elements());
    let lanes = Lanes::of(x.shape(), checked_axis(args.attrs, x.shape().len(), None));
    let mut out = vec![0.0; x.len()];
    for lane in 0..lanes.count() {
        let (adjoint, total) = (gs.get(lane), ys.get(lane));
        for i in lanes.indices(lane) {
            out[i] = p.round(acc.round(adjoint * acc.round(acc.round(xs.get(i) - total).exp())));
        }
    }
    Value::from_parts_in(p.dtype, x.shape().to_vec(), out)
}

fn sum_jvp(args: &JvpArgs) -> Value {
    sum_forward(args.tangents, args.attrs, args.precision)
}

fn mean_jvp(args: &JvpArgs) -> Value {
    mean_forward(args.tangents, args.attrs, args.precision)
}

/// The tangent of the first maximum of each lane.
fn max_jvp(args: &JvpArgs) -> Value {
    let (x, tangent) = (args.inputs[0], args.tangents[0]);
    let lanes = Lanes::of(x.shape(), checked_axis(args.attrs, x.shape().len(), None));
    let (xs, ts) = (x.elements(), tangent.elements());
    let data = (0..lanes.count())
        .map(|lane| {
            let indices: Vec<usize> = lanes.indices(lane).collect();
            let (_, winner) = first_max(indices.iter().map(|&i| xs.get(i)));
            ts.get(indices[winner])
        })
        .collect();
    Value::from_parts_in(args.precision.dtype, args.output.shape().to_vec(), data)
}

/// Applies `per_lane(values, tangents, outputs)` along each lane of the node's axis.
fn jvp_lanes(
    args: &JvpArgs,
    default_axis: Option<i64>,
    per_lane: impl Fn(&[f64], &[f64], &[f64]) -> Vec<f64>,
) -> Value {
    let (x, tangent, y) = (args.inputs[0], args.tangents[0], args.output);
    let lanes = Lanes::of(
        x.shape(),
        checked_axis(args.attrs, x.shape().len(), default_axis),
    );
    let same_shape = y.shape() == x.shape();
    let (xs, ts, ys) = (x.elements(), tangent.elements(), y.elements());
    let p = args.precision;
    let mut out = vec![0.0; y.len()];
    for lane in 0..lanes.count() {
        let indices: Vec<usize> = lanes.indices(lane).collect();
        let values: Vec<f64> = indices.iter().map(|&i| xs.get(i)).collect();
        let tangents: Vec<f64> = indices.iter().map(|&i| ts.get(i)).collect();
        if same_shape {
            let outputs: Vec<f64> = indices.iter().map(|&i| ys.get(i)).collect();
            for (&i, result) in indices.iter().zip(per_lane(&values, &tangents, &outputs)) {
                out[i] = p.round(result);
            }
        } else {
            out[lane] = p.round(per_lane(&values, &tangents, &[ys.get(lane)])[0]);
        }
    }
    Value::from_parts_in(p.dtype, y.shape().to_vec(), out)
}

/// Σₖ aₖ bₖ rounded into `dtype`.
fn rounded_dot(dtype: Dtype, a: &[f64], b: &[f64]) -> f64 {
    rounded_sum(
        dtype,
        &mut a.iter().zip(b).map(|(&x, &y)| dtype.round(x * y)),
    )
}

/// ẏₖ = yₖ (ẋₖ − Σⱼ yⱼ ẋⱼ).
fn softmax_jvp(args: &JvpArgs) -> Value {
    let dtype = args.precision.accumulate;
    jvp_lanes(args, Some(-1), |_, tangents, outputs| {
        let weighted = rounded_dot(dtype, outputs, tangents);
        outputs
            .iter()
            .zip(tangents)
            .map(|(&y, &t)| dtype.round(y * dtype.round(t - weighted)))
            .collect()
    })
}

/// ẏₖ = ẋₖ − Σⱼ softmax(x)ⱼ ẋⱼ, with softmax(x) = exp(y).
fn log_softmax_jvp(args: &JvpArgs) -> Value {
    let dtype = args.precision.accumulate;
    jvp_lanes(args, Some(-1), |_, tangents, outputs| {
        let probabilities: Vec<f64> = outputs.iter().map(|&y| dtype.round(y.exp())).collect();
        let weighted = rounded_dot(dtype, &probabilities, tangents);
        tangents
            .iter()
            .map(|&t| dtype.round(t - weighted))
            .collect()
    })
}

/// ẏ = Σₖ exp(xₖ − y) ẋₖ.
fn logsumexp_jvp(args: &JvpArgs) -> Value {
    let dtype = args.precision.accumulate;
    jvp_lanes(args, None, |values, tangents, outputs| {
        let weights: Vec<f64> = values
            .iter()
            .map(|&x| dtype.round(dtype.round(x - outputs[0]).exp()))
            .collect();
        vec![rounded_dot(dtype, &weights, tangents)]
    })
}

/// Per lane: the first maximum's position plus one, or 0 when tied (on a kink).
pub(super) fn max_kink_state(x: &Value, attrs: &Attrs) -> Vec<i64> {
    extremum_kink_state(x, attrs, false)
}

/// Per lane: the first minimum's position plus one, or 0 when tied.
pub(super) fn min_kink_state(x: &Value, attrs: &Attrs) -> Vec<i64> {
    extremum_kink_state(x, attrs, true)
}

fn extremum_kink_state(x: &Value, attrs: &Attrs, smallest: bool) -> Vec<i64> {
    let lanes = Lanes::of(x.shape(), checked_axis(attrs, x.shape().len(), None));
    let xs = x.elements();
    (0..lanes.count())
        .map(|lane| {
            let values: Vec<f64> = lanes.indices(lane).map(|i| xs.get(i)).collect();
            let (best, winner) = if smallest {
                first_min(values.iter().copied())
            } else {
                first_max(values.iter().copied())
            };
            let tied = values.iter().filter(|&&v| v == best).count() > 1;
            if tied { 0 } else { winner as i64 + 1 }
        })
        .collect()
}

/// Softmax of one lane for the loss rules, sharing this module's stabilisation.
pub(super) fn softmax_of(dtype: Dtype, lane: &[f64]) -> Vec<f64> {
    softmax_lane(dtype, lane)
}

/// logsumexp of one lane for the loss rules.
pub(super) fn logsumexp_of(dtype: Dtype, lane: &[f64]) -> f64 {
    logsumexp_lane(dtype, lane)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn tensor(shape: &[usize], data: &[f64]) -> Value {
        Value::from_parts(shape.to_vec(), data.to_vec())
    }

    fn axis(axis: i64) -> Attrs {
        Attrs {
            axis: Some(axis),
            ..Attrs::default()
        }
    }

    #[test]
    fn sum_along_an_axis_and_back() {
        let x = tensor(&[2, 3], &[1.0, 2.0, 3.0, 4.0, 5.0, 6.0]);
        assert_eq!(
            sum_forward(&[&x], &axis(0), Dtype::F64.into()),
            tensor(&[3], &[5.0, 7.0, 9.0])
        );
        assert_eq!(
            sum_forward(&[&x], &axis(1), Dtype::F64.into()),
            tensor(&[2], &[6.0, 15.0])
        );
        assert_eq!(
            sum_forward(&[&x], &Attrs::default(), Dtype::F64.into()),
            Value::Scalar(21.0)
        );
        let y = sum_forward(&[&x], &axis(1), Dtype::F64.into());
        let g = tensor(&[2], &[1.0, 10.0]);
        let args = VjpArgs {
            slot: 0,
            inputs: &[&x],
            output: &y,
            adjoint: &g,
            attrs: &axis(1),
            precision: Dtype::F64.into(),
        };
        assert_eq!(
            sum_vjp(&args),
            tensor(&[2, 3], &[1.0, 1.0, 1.0, 10.0, 10.0, 10.0])
        );
    }

    #[test]
    fn max_sends_the_adjoint_to_the_first_maximum() {
        let x = tensor(&[2, 3], &[1.0, 5.0, 5.0, 7.0, 0.0, -1.0]);
        let y = max_forward(&[&x], &axis(1), Dtype::F64.into());
        assert_eq!(y, tensor(&[2], &[5.0, 7.0]));
        let g = tensor(&[2], &[2.0, 3.0]);
        let args = VjpArgs {
            slot: 0,
            inputs: &[&x],
            output: &y,
            adjoint: &g,
            attrs: &axis(1),
            precision: Dtype::F64.into(),
        };
        assert_eq!(
            max_vjp(&args),
            tensor(&[2, 3], &[0.0, 2.0, 0.0, 3.0, 0.0, 0.0])
        );
    }

    #[test]
    fn softmax_lanes_sum_to_one_and_log_softmax_agrees() {
        let x = tensor(&[2, 3], &[1.0, 2.0, 3.0, 1000.0, 1000.0, 1000.0]);
        let y = softmax_forward(&[&x], &Attrs::default(), Dtype::F64.into());
        assert!((y.to_f64()[..3].iter().sum::<f64>() - 1.0).abs() < 1e-15);
        assert!(
            (y.get(3) - 1.0 / 3.0).abs() < 1e-15,
            "stable at large logits"
        );
        let log_y = log_softmax_forward(&[&x], &Attrs::default(), Dtype::F64.into());
        for (p, lp) in y.to_f64().iter().zip(log_y.to_f64().iter()) {
            assert!(
                (p.ln() - lp).abs() < 1e-12,
                "x − logsumexp cancels to about ulp(1000)"
            );
        }
    }

    #[test]
    fn logsumexp_handles_infinite_lanes() {
        let x = tensor(&[2], &[f64::NEG_INFINITY, f64::NEG_INFINITY]);
        assert_eq!(
            logsumexp_forward(&[&x], &Attrs::default(), Dtype::F64.into()),
            Value::Scalar(f64::NEG_INFINITY)
        );
        let x = tensor(&[2], &[0.0, 0.0]);
        assert_eq!(
            logsumexp_forward(&[&x], &Attrs::default(), Dtype::F64.into()),
            Value::Scalar(2f64.ln())
        );
    }
}
