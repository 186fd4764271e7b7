//! Reading by index: gather along an axis (PyTorch's `gather`, NumPy's
//! `take_along_axis`) and embedding lookup, plus the checks every index
//! tensor and condition passes on loading.
//!
//! Index tensors are ordinary nodes holding whole numbers (see
//! traces/FORMAT.md, "Index tensors and conditions"). They are not
//! differentiable: their slot receives a zero contribution. Repeated
//! indices accumulate in the data's contribution, in the order of the
//! output's elements, so the sum is the same on every run.

use super::{Attrs, JvpArgs, Precision, StructuredRule, VjpArgs};
use crate::format::shape as show;
use crate::tensor::{Value, numel, resolve_axis, strides};

/// `out[i] = data[i with indices[i] on the axis]`.
pub static GATHER: StructuredRule = StructuredRule {
    shape: gather_shape,
    forward: gather_forward,
    vjp: gather_vjp,
    jvp: gather_jvp,
};
/// Rows of a [V, D] table by index.
pub static EMBEDDING: StructuredRule = StructuredRule {
    shape: embedding_shape,
    forward: embedding_forward,
    vjp: embedding_vjp,
    jvp: embedding_jvp,
};

/// A checked index as a position; out-of-range values (impossible after
/// validation, but possible in a perturbed re-evaluation) are clamped, never
/// a panic.
pub(super) fn position(x: f64, length: usize) -> usize {
    if x.is_nan() || x < 0.0 {
        0
    } else {
        (x as usize).min(length.saturating_sub(1))
    }
}

/// The multi-index of flat element `flat` of `shape`, written `[i, j, …]`.
pub(super) fn element_name(shape: &[usize], flat: usize) -> String {
    if shape.is_empty() {
        return "(the scalar)".to_string();
    }
    let mut rest = flat;
    let mut index = vec![0; shape.len()];
    for (d, &size) in shape.iter().enumerate().rev() {
        index[d] = rest % size.max(1);
        rest /= size.max(1);
    }
    let parts: Vec<String> = index.iter().map(usize::to_string).collect();
    format!("[{}]", parts.join(", "))
}

/// Every element of `indices` is a whole number in `0..length`, or
/// `allowed` (an ignored target); else a message naming the first bad one.
pub(super) fn check_indices(
    indices: &Value,
    length: usize,
    allowed: Option<i64>,
    what: &str,
) -> Result<(), String> {
    let elements = indices.elements();
    for k in 0..elements.len() {
        let x = elements.get(k);
        let at = element_name(indices.shape(), k);
        if x.fract() != 0.0 || !x.is_finite() {
            return Err(format!("{what} element {at} is {x}, not a whole number"));
        }
        let inside = x >= 0.0 && x < length as f64;
        if !inside && allowed != Some(x as i64) {
            return Err(format!(
                "{what} element {at} is {x}, out of range 0..{length}"
            ));
        }
    }
    Ok(())
}

/// Every element of a condition is 0 or 1.
pub(super) fn check_condition(condition: &Value) -> Result<(), String> {
    let elements = condition.elements();
    match (0..elements.len()).find(|&k| !matches!(elements.get(k), 0.0 | 1.0)) {
        None => Ok(()),
        Some(k) => Err(format!(
            "condition element {} is {}, not 0 or 1",
            element_name(condition.shape(), k),
            elements.get(k)
        )),
    }
}

fn gather_shape(inputs: &[&[usize]], attrs: &Attrs) -> Result<Vec<usize>, String> {
    let (data, indices) = (inputs[0], inputs[1]);
    if data.is_empty() || data.len() != indices.len() {
        return Err(format!(
            "gather needs indices of the data's rank (1 or more): data {} and indices {}",
            show(data),
            show(indices)
        ));
    }
    let axis = attrs.axis.unwrap_or(0);
    let axis = resolve_axis(axis, data.len())
        .ok_or_else(|| format!("axis {axis} is out of range for rank {}", data.len()))?;
    if let Some(d) = (0..data.len()).find(|&d| d != axis && indices[d] > data[d]) {
        return Err(format!(
            "gather indices {} are larger than data {} on axis {d}; only axis {axis} may differ freely",
            show(indices),
            show(data)
        ));
    }
    Ok(indices.to_vec())
}

/// Checks the index values of a gather: whole numbers within the axis.
pub(super) fn check_gather(inputs: &[&Value], attrs: &Attrs) -> Result<(), String> {
    let data = inputs[0].shape();
    let axis = resolve_axis(attrs.axis.unwrap_or(0), data.len()).unwrap_or(0);
    check_indices(
        inputs[1],
        data[axis],
        None,
        &format!("index (along axis {axis})"),
    )
}

/// For every element of the indices, the flat position it reads in the data.
fn gather_sources(data: &[usize], indices: &Value, attrs: &Attrs) -> Vec<usize> {
    let axis =
        resolve_axis(attrs.axis.unwrap_or(0), data.len()).expect("axis checked by the validator");
    let shape = indices.shape();
    let data_strides = strides(data);
    let values = indices.elements();
    let mut counter = vec![0usize; shape.len()];
    let mut sources = Vec::with_capacity(numel(shape));
    for k in 0..numel(shape) {
        let mut source = 0;
        for d in 0..shape.len() {
            let at = if d == axis {
                position(values.get(k), data[axis])
            } else {
                counter[d]
            };
            source += at * data_strides[d];
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
    sources
}

fn gather_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    let (data, indices) = (inputs[0], inputs[1]);
    let values = data.elements();
    let out = gather_sources(data.shape(), indices, attrs)
        .into_iter()
        .map(|s| p.round(values.get(s)))
        .collect();
    Value::from_parts_in(p.dtype, indices.shape().to_vec(), out)
}

/// Sums `adjoint` element k into `sources[k]` of zeros of `shape`, in the
/// accumulation dtype, in order of k, rounded once into the dtype.
fn scatter_add(
    adjoint: &Value,
    sources: impl IntoIterator<Item = Option<usize>>,
    shape: &[usize],
    p: Precision,
) -> Value {
    let g = adjoint.elements();
    let mut out = vec![0.0; numel(shape)];
    let mut touched = vec![false; out.len()];
    for (k, source) in sources.into_iter().enumerate() {
        if let Some(s) = source {
            let x = g.get(k);
            // The first term as is, so that a lone −0 survives as a framework's sum keeps it.
            out[s] = if touched[s] { p.acc(out[s] + x) } else { x };
            touched[s] = true;
        }
    }
    let data = out.into_iter().map(|x| p.round(x)).collect();
    Value::from_parts_in(p.dtype, shape.to_vec(), data)
}

/// The data receives each adjoint element at the position it was read from
/// (repeated indices add up); the indices receive 0.
fn gather_vjp(args: &VjpArgs) -> Value {
    let (data, indices) = (args.inputs[0], args.inputs[1]);
    if args.slot == 1 {
        return Value::filled(indices.shape(), 0.0).stored_as(args.precision.dtype);
    }
    let sources = gather_sources(data.shape(), indices, args.attrs);
    scatter_add(
        args.adjoint,
        sources.into_iter().map(Some),
        data.shape(),
        args.precision,
    )
}

fn gather_jvp(args: &JvpArgs) -> Value {
    gather_forward(
        &[args.tangents[0], args.inputs[1]],
        args.attrs,
        args.precision,
    )
}

fn embedding_shape(inputs: &[&[usize]], attrs: &Attrs) -> Result<Vec<usize>, String> {
    let (table, indices) = (inputs[0], inputs[1]);
    let [rows, width] = table else {
        return Err(format!(
            "embedding needs a table of shape [V, D], got {}",
            show(table)
        ));
    };
    if let Some(padding) = attrs.padding_idx
        && resolve_axis(padding, *rows).is_none()
    {
        return Err(format!(
            "padding_idx {padding} is out of range for a table of {rows} rows"
        ));
    }
    let mut shape = indices.to_vec();
    shape.push(*width);
    Ok(shape)
}

/// Checks the index values of an embedding: whole numbers within the rows.
pub(super) fn check_embedding(inputs: &[&Value]) -> Result<(), String> {
    let rows = inputs[0].shape().first().copied().unwrap_or(0);
    check_indices(inputs[1], rows, None, "index (row of the table)")
}

fn embedding_forward(inputs: &[&Value], _: &Attrs, p: Precision) -> Value {
    let (table, indices) = (inputs[0], inputs[1]);
    let (rows, width) = (table.shape()[0], table.shape()[1]);
    let values = table.to_f64();
    let picks = indices.elements();
    let mut data = Vec::with_capacity(picks.len() * width);
    for k in 0..picks.len() {
        let row = position(picks.get(k), rows);
        data.extend(
            values[row * width..(row + 1) * width]
                .iter()
                .map(|&x| p.round(x)),
        );
    }
    let mut shape = indices.shape().to_vec();
    shape.push(width);
    Value::from_parts_in(p.dtype, shape, data)
}

/// Each looked-up row receives its output row's adjoint (repeated rows add
/// up), except the padding row; the indices receive 0.
fn embedding_vjp(args: &VjpArgs) -> Value {
    let (table, indices) = (args.inputs[0], args.inputs[1]);
    if args.slot == 1 {
        return Value::filled(indices.shape(), 0.0).stored_as(args.precision.dtype);
    }
    let (rows, width) = (table.shape()[0], table.shape()[1]);
    let padding = args
        .attrs
        .padding_idx
        .and_then(|padding| resolve_axis(padding, rows));
    let picks = indices.elements();
    let sources = (0..picks.len() * width).map(|k| {
        let row = position(picks.get(k / width), rows);
        (Some(row) != padding).then_some(row * width + k % width)
    });
    scatter_add(args.adjoint, sources, table.shape(), args.precision)
}

/// Per looked-up index: 0 where it is the padding row, 1 elsewhere.
pub(super) fn padding_state(inputs: &[&Value], attrs: &Attrs) -> Vec<i64> {
    let rows = inputs[0].shape()[0];
    let padding = attrs
        .padding_idx
        .and_then(|padding| resolve_axis(padding, rows));
    let picks = inputs[1].elements();
    (0..picks.len())
        .map(|k| i64::from(Some(position(picks.get(k), rows)) != padding))
        .collect()
}

fn embedding_jvp(args: &JvpArgs) -> Value {
    embedding_forward(
        &[args.tangents[0], args.inputs[1]],
        args.attrs,
        args.precision,
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::dtype::Dtype;

    fn tensor(shape: &[usize], data: &[f64]) -> Value {
        Value::from_parts(shape.to_vec(), data.to_vec())
    }

    // torch.gather's definition (PyTorch documentation, torch.gather):
    // out[i][j] = input[i][index[i][j]] for dim = 1.
    #[test]
    fn gather_reads_along_the_axis_and_repeats_accumulate() {
        let data = tensor(&[2, 3], &[1.0, 2.0, 3.0, 4.0, 5.0, 6.0]);
        let indices = tensor(&[2, 2], &[2.0, 2.0, 0.0, 1.0]);
        let attrs = Attrs {
            axis: Some(1),
            ..Attrs::default()
        };
        let y = gather_forward(&[&data, &indices], &attrs, Dtype::F64.into());
        assert_eq!(y, tensor(&[2, 2], &[3.0, 3.0, 4.0, 5.0]));
        let g = tensor(&[2, 2], &[1.0, 10.0, 100.0, 1000.0]);
        let args = VjpArgs {
            slot: 0,
            inputs: &[&data, &indices],
            output: &y,
            adjoint: &g,
            attrs: &attrs,
            precision: Dtype::F64.into(),
        };
        assert_eq!(
            gather_vjp(&args),
            tensor(&[2, 3], &[0.0, 0.0, 11.0, 100.0, 1000.0, 0.0])
        );
    }

    #[test]
    fn embedding_rows_accumulate_except_the_padding_row() {
        let table = tensor(&[3, 2], &[1.0, 2.0, 3.0, 4.0, 5.0, 6.0]);
        let indices = tensor(&[3], &[1.0, 1.0, 0.0]);
        let attrs = Attrs {
            padding_idx: Some(0),
            ..Attrs::default()
        };
        let y = embedding_forward(&[&table, &indices], &attrs, Dtype::F64.into());
        assert_eq!(y, tensor(&[3, 2], &[3.0, 4.0, 3.0, 4.0, 1.0, 2.0]));
        let g = tensor(&[3, 2], &[1.0, 1.0, 2.0, 2.0, 5.0, 5.0]);
        let args = VjpArgs {
            slot: 0,
            inputs: &[&table, &indices],
            output: &y,
            adjoint: &g,
            attrs: &attrs,
            precision: Dtype::F64.into(),
        };
        assert_eq!(
            embedding_vjp(&args),
            tensor(&[3, 2], &[0.0, 0.0, 3.0, 3.0, 0.0, 0.0])
        );
    }

    #[test]
    fn bad_indices_name_their_element() {
        let indices = tensor(&[2, 2], &[0.0, 1.0, 2.5, 0.0]);
        let message = check_indices(&indices, 3, None, "index").unwrap_err();
        assert!(message.contains("element [1, 0] is 2.5"), "{message}");
        let indices = tensor(&[3], &[0.0, 7.0, 1.0]);
        let message = check_indices(&indices, 3, None, "index").unwrap_err();
        assert!(
            message.contains("element [1] is 7, out of range 0..3"),
            "{message}"
        );
        assert!(check_indices(&tensor(&[1], &[-100.0]), 3, Some(-100), "target").is_ok());
        assert!(
            check_condition(&tensor(&[2], &[1.0, 0.5]))
                .unwrap_err()
                .contains("[1]")
        );
    }
}
