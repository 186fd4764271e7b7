//! Joining, cutting and widening tensors: concat, stack, slice, select,
//! broadcast_to and constant pad. Every rule moves elements without
//! arithmetic, so values keep their bits; each vector-Jacobian product puts
//! the adjoint back where the element came from.

use super::{Attrs, JvpArgs, Precision, StructuredRule, VjpArgs, reduce_to_shape};
use crate::format::shape as show;
use crate::tensor::{
    Value, broadcast_shapes, broadcast_source_indices, numel, resolve_axis, strides,
};

/// Inputs joined along an existing axis.
pub static CONCAT: StructuredRule = StructuredRule {
    shape: concat_shape,
    forward: concat_forward,
    vjp: concat_vjp,
    jvp: concat_jvp,
};
/// Inputs of one shape joined along a new axis.
pub static STACK: StructuredRule = StructuredRule {
    shape: stack_shape,
    forward: stack_forward,
    vjp: stack_vjp,
    jvp: stack_jvp,
};
/// `x[start:end:step]` along one axis.
pub static SLICE: StructuredRule = StructuredRule {
    shape: slice_shape,
    forward: slice_forward,
    vjp: slice_vjp,
    jvp: slice_jvp,
};
/// One index along an axis, which is dropped.
pub static SELECT: StructuredRule = StructuredRule {
    shape: select_shape,
    forward: select_forward,
    vjp: select_vjp,
    jvp: select_jvp,
};
/// NumPy broadcasting to a given shape.
pub static BROADCAST_TO: StructuredRule = StructuredRule {
    shape: broadcast_to_shape,
    forward: broadcast_to_forward,
    vjp: broadcast_to_vjp,
    jvp: broadcast_to_jvp,
};
/// Constant padding (negative counts crop).
pub static PAD: StructuredRule = StructuredRule {
    shape: pad_shape,
    forward: pad_forward,
    vjp: pad_vjp,
    jvp: pad_jvp,
};

/// The required axis resolved against `rank`.
fn axis_in(attrs: &Attrs, rank: usize) -> Result<usize, String> {
    let axis = attrs.axis.unwrap_or(0);
    resolve_axis(axis, rank).ok_or_else(|| {
        format!(
            "axis {axis} is out of range for rank {rank} (valid: {} to {})",
            -(rank as i64),
            rank as i64 - 1
        )
    })
}

fn checked_axis(attrs: &Attrs, rank: usize) -> usize {
    axis_in(attrs, rank).expect("axis checked by the validator")
}

/// (outer, inner) element counts around `axis` of `shape`.
fn around(shape: &[usize], axis: usize) -> (usize, usize) {
    (numel(&shape[..axis]), numel(&shape[axis + 1..]))
}

fn concat_shape(inputs: &[&[usize]], attrs: &Attrs) -> Result<Vec<usize>, String> {
    let first = inputs[0];
    if first.is_empty() {
        return Err(
            "concat needs tensors of rank 1 or more, got a scalar (stack joins scalars)"
                .to_string(),
        );
    }
    let axis = axis_in(attrs, first.len())?;
    let mut shape = first.to_vec();
    shape[axis] = 0;
    for (slot, input) in inputs.iter().enumerate() {
        let agrees = input.len() == first.len()
            && input
                .iter()
                .zip(first)
                .enumerate()
                .all(|(d, (a, b))| d == axis || a == b);
        if !agrees {
            return Err(format!(
                "concat input {slot} has shape {} but input 0 has {}: they must agree on every axis but {axis}",
                show(input),
                show(first)
            ));
        }
        shape[axis] += input[axis];
    }
    Ok(shape)
}

/// Copies the inputs' blocks (each `lengths[i] × inner` per outer index)
/// side by side.
fn join(
    inputs: &[&Value],
    lengths: &[usize],
    outer: usize,
    inner: usize,
    shape: Vec<usize>,
    p: Precision,
) -> Value {
    let total: usize = lengths.iter().sum();
    let mut data = Vec::with_capacity(outer * total * inner);
    let wide: Vec<_> = inputs.iter().map(|v| v.to_f64()).collect();
    for o in 0..outer {
        for (values, &length) in wide.iter().zip(lengths) {
            let block = length * inner;
            data.extend(
                values[o * block..(o + 1) * block]
                    .iter()
                    .map(|&x| p.round(x)),
            );
        }
    }
    Value::from_parts_in(p.dtype, shape, data)
}

/// The block of slot `slot` out of a joined value, in `shape`.
fn part(
    joined: &Value,
    lengths: &[usize],
    slot: usize,
    outer: usize,
    inner: usize,
    shape: &[usize],
    p: Precision,
) -> Value {
    let total: usize = lengths.iter().sum();
    let before: usize = lengths[..slot].iter().sum();
    let block = lengths[slot] * inner;
    let values = joined.to_f64();
    let mut data = Vec::with_capacity(outer * block);
    for o in 0..outer {
        let start = (o * total + before) * inner;
        data.extend(values[start..start + block].iter().map(|&x| p.round(x)));
    }
    Value::from_parts_in(p.dtype, shape.to_vec(), data)
}

fn concat_layout(inputs: &[&Value], attrs: &Attrs) -> (Vec<usize>, usize, usize) {
    let shape = inputs[0].shape();
    let axis = checked_axis(attrs, shape.len());
    let (outer, inner) = around(shape, axis);
    (
        inputs.iter().map(|v| v.shape()[axis]).collect(),
        outer,
        inner,
    )
}

fn concat_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    let shapes: Vec<&[usize]> = inputs.iter().map(|v| v.shape()).collect();
    let shape = concat_shape(&shapes, attrs).expect("shapes checked by the validator");
    let (lengths, outer, inner) = concat_layout(inputs, attrs);
    join(inputs, &lengths, outer, inner, shape, p)
}

/// Each input receives its own block of the adjoint.
fn concat_vjp(args: &VjpArgs) -> Value {
    let (lengths, outer, inner) = concat_layout(args.inputs, args.attrs);
    let shape = args.inputs[args.slot].shape();
    part(
        args.adjoint,
        &lengths,
        args.slot,
        outer,
        inner,
        shape,
        args.precision,
    )
}

fn concat_jvp(args: &JvpArgs) -> Value {
    concat_forward(args.tangents, args.attrs, args.precision)
}

/// The new axis of `stack` resolved against the output's rank.
fn stack_axis(attrs: &Attrs, rank: usize) -> Result<usize, String> {
    axis_in(attrs, rank + 1)
}

fn stack_shape(inputs: &[&[usize]], attrs: &Attrs) -> Result<Vec<usize>, String> {
    let first = inputs[0];
    if let Some((slot, input)) = inputs.iter().enumerate().find(|(_, s)| **s != first) {
        return Err(format!(
            "stack input {slot} has shape {} but input 0 has {}: stacked inputs share one shape",
            show(input),
            show(first)
        ));
    }
    let axis = stack_axis(attrs, first.len())?;
    let mut shape = first.to_vec();
    shape.insert(axis, inputs.len());
    Ok(shape)
}

fn stack_layout(inputs: &[&Value], attrs: &Attrs) -> (Vec<usize>, usize, usize) {
    let shape = inputs[0].shape();
    let axis = stack_axis(attrs, shape.len()).expect("axis checked by the validator");
    (
        vec![1; inputs.len()],
        numel(&shape[..axis]),
        numel(&shape[axis..]),
    )
}

fn stack_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    let shapes: Vec<&[usize]> = inputs.iter().map(|v| v.shape()).collect();
    let shape = stack_shape(&shapes, attrs).expect("shapes checked by the validator");
    let (lengths, outer, inner) = stack_layout(inputs, attrs);
    join(inputs, &lengths, outer, inner, shape, p)
}

fn stack_vjp(args: &VjpArgs) -> Value {
    let (lengths, outer, inner) = stack_layout(args.inputs, args.attrs);
    let shape = args.inputs[args.slot].shape();
    part(
        args.adjoint,
        &lengths,
        args.slot,
        outer,
        inner,
        shape,
        args.precision,
    )
}

fn stack_jvp(args: &JvpArgs) -> Value {
    stack_forward(args.tangents, args.attrs, args.precision)
}

/// The positions a Python slice `start:end:step` takes along an axis of
/// `length` (the rules of Python's `slice.indices`, Python Language
/// Reference, "Slicings"; negative bounds count from the end, bounds out of
/// range are clipped).
pub(super) fn slice_positions(
    length: usize,
    start: Option<i64>,
    end: Option<i64>,
    step: i64,
) -> Vec<usize> {
    let n = length as i64;
    let resolve = |bound: i64, low: i64, high: i64| {
        let bound = if bound < 0 { bound + n } else { bound };
        bound.clamp(low, high)
    };
    if step > 0 {
        let first = start.map_or(0, |s| resolve(s, 0, n));
        let last = end.map_or(n, |e| resolve(e, 0, n));
        (first..last)
            .step_by(step as usize)
            .map(|i| i as usize)
            .collect()
    } else {
        let first = start.map_or(n - 1, |s| resolve(s, -1, n - 1));
        let last = end.map_or(-1, |e| resolve(e, -1, n - 1));
        let mut positions = Vec::new();
        let mut i = first;
        while i > last {
            positions.push(i as usize);
            i += step;
        }
        positions
    }
}

fn slice_step(attrs: &Attrs) -> Result<i64, String> {
    match attrs.step.unwrap_or(1) {
        0 => Err("slice step must not be 0".to_string()),
        step => Ok(step),
    }
}

fn slice_shape(inputs: &[&[usize]], attrs: &Attrs) -> Result<Vec<usize>, String> {
    let input = inputs[0];
    if input.is_empty() {
        return Err("slice needs a tensor, got a scalar".to_string());
    }
    let axis = axis_in(attrs, input.len())?;
    let step = slice_step(attrs)?;
    let mut shape = input.to_vec();
    shape[axis] = slice_positions(input[axis], attrs.start, attrs.end, step).len();
    Ok(shape)
}

/// The positions along the axis a slice or select reads, and the axis.
fn taken(x: &[usize], attrs: &Attrs, select: bool) -> (usize, Vec<usize>) {
    let axis = checked_axis(attrs, x.len());
    if select {
        let index = attrs.index.unwrap_or(0);
        let position = if index < 0 {
            index + x[axis] as i64
        } else {
            index
        };
        (axis, vec![position as usize])
    } else {
        let step = slice_step(attrs).expect("step checked by the validator");
        (axis, slice_positions(x[axis], attrs.start, attrs.end, step))
    }
}

/// Reads `positions` along `axis` of `x` into `shape`.
fn take(x: &Value, axis: usize, positions: &[usize], shape: Vec<usize>, p: Precision) -> Value {
    let (outer, inner) = around(x.shape(), axis);
    let length = x.shape()[axis];
    let values = x.to_f64();
    let mut data = Vec::with_capacity(outer * positions.len() * inner);
    for o in 0..outer {
        for &position in positions {
            let start = (o * length + position) * inner;
            data.extend(values[start..start + inner].iter().map(|&v| p.round(v)));
        }
    }
    Value::from_parts_in(p.dtype, shape, data)
}

/// Writes `adjoint` (laid out as `positions` along `axis`) back into zeros
/// of the input's shape; positions are distinct, so nothing is summed.
fn put_back(
    adjoint: &Value,
    input: &[usize],
    axis: usize,
    positions: &[usize],
    p: Precision,
) -> Value {
    let (outer, inner) = around(input, axis);
    let length = input[axis];
    let g = adjoint.to_f64();
    let mut data = vec![0.0; numel(input)];
    for o in 0..outer {
        for (k, &position) in positions.iter().enumerate() {
            let from = (o * positions.len() + k) * inner;
            let to = (o * length + position) * inner;
            data[to..to + inner].copy_from_slice(&g[from..from + inner]);
        }
    }
    Value::from_parts_in(p.dtype, input.to_vec(), data)
}

fn slice_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    let x = inputs[0];
    let (axis, positions) = taken(x.shape(), attrs, false);
    let mut shape = x.shape().to_vec();
    shape[axis] = positions.len();
    take(x, axis, &positions, shape, p)
}

/// The adjoint goes back to the sliced positions; the others receive 0.
fn slice_vjp(args: &VjpArgs) -> Value {
    let input = args.inputs[0].shape();
    let (axis, positions) = taken(input, args.attrs, false);
    put_back(args.adjoint, input, axis, &positions, args.precision)
}

fn slice_jvp(args: &JvpArgs) -> Value {
    slice_forward(args.tangents, args.attrs, args.precision)
}

fn select_shape(inputs: &[&[usize]], attrs: &Attrs) -> Result<Vec<usize>, String> {
    let input = inputs[0];
    if input.is_empty() {
        return Err("select needs a tensor, got a scalar".to_string());
    }
    let axis = axis_in(attrs, input.len())?;
    let index = attrs.index.unwrap_or(0);
    if resolve_axis(index, input[axis]).is_none() {
        return Err(format!(
            "select index {index} is out of range for axis {axis} of length {}",
            input[axis]
        ));
    }
    let mut shape = input.to_vec();
    shape.remove(axis);
    Ok(shape)
}

fn select_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    let x = inputs[0];
    let (axis, positions) = taken(x.shape(), attrs, true);
    let mut shape = x.shape().to_vec();
    shape.remove(axis);
    take(x, axis, &positions, shape, p)
}

fn select_vjp(args: &VjpArgs) -> Value {
    let input = args.inputs[0].shape();
    let (axis, positions) = taken(input, args.attrs, true);
    put_back(args.adjoint, input, axis, &positions, args.precision)
}

fn select_jvp(args: &JvpArgs) -> Value {
    select_forward(args.tangents, args.attrs, args.precision)
}

fn broadcast_to_shape(inputs: &[&[usize]], attrs: &Attrs) -> Result<Vec<usize>, String> {
    let target = attrs.shape.clone().unwrap_or_default();
    match broadcast_shapes(inputs[0], &target) {
        Some(shape) if shape == target => Ok(target),
        _ => Err(format!(
            "{} does not broadcast to {}",
            show(inputs[0]),
            show(&target)
        )),
    }
}

fn broadcast_to_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    let target = attrs.shape.clone().unwrap_or_default();
    let x = inputs[0].elements();
    let data = broadcast_source_indices(inputs[0].shape(), &target)
        .into_iter()
        .map(|i| p.round(x.get(i)))
        .collect();
    Value::from_parts_in(p.dtype, target, data)
}

/// The adjoint summed over the broadcast axes.
fn broadcast_to_vjp(args: &VjpArgs) -> Value {
    reduce_to_shape(args.adjoint, args.inputs[0].shape(), args.precision)
}

fn broadcast_to_jvp(args: &JvpArgs) -> Value {
    broadcast_to_forward(args.tangents, args.attrs, args.precision)
}

/// Per axis: counts added before and after (negative crops).
fn pad_counts(rank: usize, attrs: &Attrs) -> Result<Vec<(i64, i64)>, String> {
    let pads = attrs.pads.clone().unwrap_or_default();
    if pads.len() != 2 * rank {
        return Err(format!(
            "pad needs 2 · rank = {} counts (every axis's start, then every axis's end), got {}",
            2 * rank,
            pads.len()
        ));
    }
    Ok((0..rank).map(|d| (pads[d], pads[rank + d])).collect())
}

fn pad_shape(inputs: &[&[usize]], attrs: &Attrs) -> Result<Vec<usize>, String> {
    let input = inputs[0];
    let counts = pad_counts(input.len(), attrs)?;
    input
        .iter()
        .zip(&counts)
        .enumerate()
        .map(|(d, (&n, &(before, after)))| {
            let size = n as i64 + before + after;
            usize::try_from(size).map_err(|_| {
                format!("pads {before} and {after} crop more than the {n} elements of axis {d}")
            })
        })
        .collect()
}

/// For every element of the padded output, the input element it copies
/// (`None` in the padding).
fn pad_sources(input: &[usize], attrs: &Attrs) -> (Vec<usize>, Vec<Option<usize>>) {
    let shape = pad_shape(&[input], attrs).expect("pads checked by the validator");
    let counts = pad_counts(input.len(), attrs).expect("pads checked by the validator");
    let in_strides = strides(input);
    let mut sources = Vec::with_capacity(numel(&shape));
    let mut counter = vec![0usize; shape.len()];
    for _ in 0..numel(&shape) {
        let mut source = Some(0usize);
        for d in 0..shape.len() {
            let position = counter[d] as i64 - counts[d].0;
            source = match source {
                Some(s) if (0..input[d] as i64).contains(&position) => {
                    Some(s + position as usize * in_strides[d])
                }
                _ => None,
            };
        }
        sources.push(source);
        for d in (0..shape.len()).rev() {
            counter[d] += 1;
            if counter[d] < shape[d] {
                break;
            }
            counter[d] = 0;
        }
    }
    (shape, sources)
}

fn padded(x: &Value, attrs: &Attrs, fill: f64, p: Precision) -> Value {
    let (shape, sources) = pad_sources(x.shape(), attrs);
    let values = x.elements();
    let fill = p.round(fill);
    let data = sources
        .iter()
        .map(|source| source.map_or(fill, |s| p.round(values.get(s))))
        .collect();
    Value::from_parts_in(p.dtype, shape, data)
}

fn pad_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    padded(inputs[0], attrs, attrs.value.unwrap_or(0.0), p)
}

/// Each kept element receives the adjoint at its padded position; cropped
/// elements receive 0.
fn pad_vjp(args: &VjpArgs) -> Value {
    let input = args.inputs[0].shape();
    let (_, sources) = pad_sources(input, args.attrs);
    let g = args.adjoint.elements();
    let mut data = vec![0.0; numel(input)];
    for (k, source) in sources.iter().enumerate() {
        if let Some(s) = source {
            data[*s] = g.get(k);
        }
    }
    Value::from_parts_in(args.precision.dtype, input.to_vec(), data)
}

/// The padding is constant, so its tangent is 0.
fn pad_jvp(args: &JvpArgs) -> Value {
    padded(args.tangents[0], args.attrs, 0.0, args.precision)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::dtype::Dtype;

    fn tensor(shape: &[usize], data: &[f64]) -> Value {
        Value::from_parts(shape.to_vec(), data.to_vec())
    }

    // Expected index lists by Python's slice semantics (Python Language
    // Reference, "Slicings"): list(range(5))[a:b:c].
    #[test]
    fn slices_follow_python() {
        assert_eq!(slice_positions(5, None, None, 1), vec![0, 1, 2, 3, 4]);
        assert_eq!(slice_positions(5, Some(1), None, 1), vec![1, 2, 3, 4]);
        assert_eq!(slice_positions(5, None, Some(-1), 1), vec![0, 1, 2, 3]);
        assert_eq!(slice_positions(5, Some(-2), None, 1), vec![3, 4]);
        assert_eq!(slice_positions(5, Some(1), Some(100), 2), vec![1, 3]);
        assert_eq!(slice_positions(5, None, None, -1), vec![4, 3, 2, 1, 0]);
        assert_eq!(slice_positions(5, Some(3), Some(0), -2), vec![3, 1]);
        assert_eq!(slice_positions(5, Some(-1), Some(-6), -2), vec![4, 2, 0]);
        assert_eq!(slice_positions(5, Some(4), Some(2), 1), Vec::<usize>::new());
        assert_eq!(slice_positions(5, Some(-100), Some(2), 1), vec![0, 1]);
    }

    #[test]
    fn concat_joins_and_splits_back() {
        let a = tensor(&[2, 1], &[1.0, 2.0]);
        let b = tensor(&[2, 2], &[3.0, 4.0, 5.0, 6.0]);
        let attrs = Attrs {
            axis: Some(1),
            ..Attrs::default()
        };
        let y = concat_forward(&[&a, &b], &attrs, Dtype::F64.into());
        assert_eq!(y, tensor(&[2, 3], &[1.0, 3.0, 4.0, 2.0, 5.0, 6.0]));
        let args = VjpArgs {
            slot: 1,
            inputs: &[&a, &b],
            output: &y,
            adjoint: &y,
            attrs: &attrs,
            precision: Dtype::F64.into(),
        };
        assert_eq!(concat_vjp(&args), b);
        assert!(
            concat_shape(&[&[2, 1], &[3, 2]], &attrs)
                .unwrap_err()
                .contains("input 1")
        );
    }

    #[test]
    fn pad_and_crop() {
        let x = tensor(&[2, 2], &[1.0, 2.0, 3.0, 4.0]);
        let attrs = Attrs {
            pads: Some(vec![1, -1, 0, 1]),
            value: Some(9.0),
            ..Attrs::default()
        };
        // Rows: one added before; columns: the first cropped, one added after.
        let y = pad_forward(&[&x], &attrs, Dtype::F64.into());
        assert_eq!(y, tensor(&[3, 2], &[9.0, 9.0, 2.0, 9.0, 4.0, 9.0]));
        let args = VjpArgs {
            slot: 0,
            inputs: &[&x],
            output: &y,
            adjoint: &tensor(&[3, 2], &[1.0, 2.0, 3.0, 4.0, 5.0, 6.0]),
            attrs: &attrs,
            precision: Dtype::F64.into(),
        };
        assert_eq!(pad_vjp(&args), tensor(&[2, 2], &[0.0, 3.0, 0.0, 5.0]));
    }
}
