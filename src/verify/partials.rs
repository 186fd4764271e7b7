//! The partial check: recompute every recorded partial of a catalog op from
//! the recorded forward values with the op table, and compare.

use super::compare::Worst;
use crate::ops::{self, VjpArgs};
use crate::tensor::{Value, broadcast_source_indices, numel};
use crate::trace::{Partial, Trace};
use serde::Serialize;

/// Largest dense Jacobian built to check a structured op's recorded partial.
pub const MAX_DENSE_ENTRIES: usize = 1 << 20;

/// One checked edge.
#[derive(Debug, Clone, Serialize)]
pub struct PartialCheck {
    /// The node whose recorded partial was checked.
    pub node: usize,
    /// Its input slot.
    pub slot: usize,
    /// The worst element, recorded (`actual`) against recomputed (`expected`),
    /// over the dense Jacobian in row-major order.
    pub worst: Worst,
}

/// An edge whose partial could not be checked, and why.
#[derive(Debug, Clone, Serialize)]
pub struct Unchecked {
    /// The node.
    pub node: usize,
    /// Its input slot.
    pub slot: usize,
    /// Why.
    pub reason: String,
}

/// Checks every recorded partial of every catalog op.
pub fn check_partials(trace: &Trace) -> (Vec<PartialCheck>, Vec<Unchecked>) {
    let mut checked = Vec::new();
    let mut unchecked = Vec::new();
    for (node, recorded) in trace.nodes().iter().enumerate() {
        if recorded.op.is_leaf() || recorded.op == ops::Op::Custom {
            continue;
        }
        for (slot, partial) in recorded.partials.iter().enumerate() {
            let Some(partial) = partial else { continue };
            match dense_pair(trace, node, slot, partial) {
                Ok((recorded_dense, recomputed)) => {
                    if let Some(worst) = Worst::of(&recorded_dense, &recomputed) {
                        checked.push(PartialCheck { node, slot, worst });
                    }
                }
                Err(reason) => unchecked.push(Unchecked { node, slot, reason }),
            }
        }
    }
    (checked, unchecked)
}

/// The recorded partial of edge `slot` of `node` and the op table's, side by
/// side: both dense Jacobians in row-major order (output elements × input
/// elements), or both diagonals when the op is elementwise. An error says why
/// the edge cannot be compared (no recorded partial, a custom op, too large).
pub fn partial_pair(
    trace: &Trace,
    node: usize,
    slot: usize,
) -> Result<(Vec<f64>, Vec<f64>), String> {
    let recorded = trace.node(node);
    if recorded.op.is_leaf() || recorded.op == ops::Op::Custom {
        return Err(format!(
            "'{}' is a {} node: the op table has no rule to compare with",
            recorded.id, recorded.op_name
        ));
    }
    match recorded.partials.get(slot) {
        Some(Some(partial)) => dense_pair(trace, node, slot, partial),
        _ => Err(format!(
            "edge {slot} of '{}' carries no recorded partial",
            recorded.id
        )),
    }
}

/// The recorded and the recomputed partial of one edge, both as dense
/// Jacobians (output elements × input elements), or diagonals when both are.
fn dense_pair(
    trace: &Trace,
    node: usize,
    slot: usize,
    partial: &Partial,
) -> Result<(Vec<f64>, Vec<f64>), String> {
    let recorded = trace.node(node);
    let dtype = trace.dtype();
    let inputs: Vec<&Value> = recorded
        .inputs
        .iter()
        .map(|&input| &trace.node(input).value)
        .collect();
    let (output_shape, input_shape) = (recorded.value.shape(), inputs[slot].shape());
    if let Some(diagonal) = ops::elementwise_partial(
        recorded.op,
        slot,
        &inputs,
        &recorded.value,
        &recorded.attrs,
        dtype,
    ) {
        // Elementwise: compare diagonals directly where the recording is one.
        match partial {
            Partial::Scalar(s) => {
                return Ok((vec![*s; diagonal.len()], diagonal.to_f64().to_vec()));
            }
            Partial::Diagonal(d) => return Ok((d.to_f64().to_vec(), diagonal.to_f64().to_vec())),
            Partial::Jacobian { .. } => {
                let expected = dense_from_diagonal(&diagonal.to_f64(), output_shape, input_shape)?;
                return Ok((dense_of(partial, output_shape, input_shape)?, expected));
            }
        }
    }
    let (rows, cols) = (numel(output_shape), numel(input_shape));
    if rows.saturating_mul(cols) > MAX_DENSE_ENTRIES {
        return Err(format!(
            "a dense Jacobian of {rows} × {cols} entries is too large to build"
        ));
    }
    // Row i of the Jacobian is the vector-Jacobian product of the unit adjoint eᵢ.
    let mut expected = Vec::with_capacity(rows * cols);
    for row in 0..rows {
        let mut unit = Value::filled(output_shape, 0.0);
        unit.set(row, 1.0);
        let args = VjpArgs {
            slot,
            inputs: &inputs,
            output: &recorded.value,
            adjoint: &unit,
            attrs: &recorded.attrs,
            precision: dtype.into(),
        };
        expected.extend_from_slice(&ops::vjp(recorded.op, &args).to_f64());
    }
    Ok((dense_of(partial, output_shape, input_shape)?, expected))
}

/// A recorded partial as a dense Jacobian.
fn dense_of(
    partial: &Partial,
    output_shape: &[usize],
    input_shape: &[usize],
) -> Result<Vec<f64>, String> {
    match partial {
        Partial::Jacobian { data, .. } => Ok(data.clone()),
        Partial::Scalar(s) => {
            dense_from_diagonal(&vec![*s; numel(output_shape)], output_shape, input_shape)
        }
        Partial::Diagonal(d) => dense_from_diagonal(&d.to_f64(), output_shape, input_shape),
    }
}

/// The Jacobian of an elementwise partial: entry (i, source(i)) is dᵢ.
fn dense_from_diagonal(
    diagonal: &[f64],
    output_shape: &[usize],
    input_shape: &[usize],
) -> Result<Vec<f64>, String> {
    let (rows, cols) = (numel(output_shape), numel(input_shape));
    if rows.saturating_mul(cols) > MAX_DENSE_ENTRIES {
        return Err(format!(
            "a dense Jacobian of {rows} × {cols} entries is too large to build"
        ));
    }
    let mut dense = vec![0.0; rows * cols];
    for (row, &source) in broadcast_source_indices(input_shape, output_shape)
        .iter()
        .enumerate()
    {
        dense[row * cols + source] = diagonal[row];
    }
    Ok(dense)
}
