//! Forming one contribution: a node's adjoint pulled back through the partial
//! on one input edge, recorded or derived from the op table.

use crate::dtype::Dtype;
use crate::ops::{self, Precision, VjpArgs};
use crate::tensor::Value;
use crate::trace::{Partial, Trace};

/// A contribution and what it revealed about the edge's partial.
pub struct Pulled {
    /// The value added to the input's adjoint, in the input's shape.
    pub contribution: Value,
    /// The first non-finite entry of the edge's local partial, if any.
    pub bad_partial: Option<f64>,
    /// True when the partial was not formed (an elementwise op's fused
    /// product), so `bad_partial` is unknown; see [`bad_partial`].
    pub unchecked: bool,
}

/// Pulls `adjoint` (the adjoint of `node`) back along input edge `slot`.
pub fn pull_back(trace: &Trace, node: usize, slot: usize, adjoint: &Value) -> Pulled {
    let dtype = trace.precision(node);
    let recorded = &trace.node(node);
    let input_shape = trace.node(recorded.inputs[slot]).value.shape();
    match recorded.partial(slot) {
        Some(Partial::Scalar(s)) => Pulled {
            contribution: ops::scale_and_reduce(adjoint, &Value::Scalar(*s), input_shape, dtype),
            bad_partial: (!s.is_finite()).then_some(*s),
            unchecked: false,
        },
        Some(Partial::Diagonal(diagonal)) => Pulled {
            contribution: ops::scale_and_reduce(adjoint, diagonal, input_shape, dtype),
            bad_partial: diagonal.first_non_finite().map(|(_, x)| x),
            unchecked: false,
        },
        Some(Partial::Jacobian { rows, cols, data }) => Pulled {
            contribution: jacobian_transpose_product(
                adjoint,
                *rows,
                *cols,
                data,
                input_shape,
                dtype,
            ),
            bad_partial: data.iter().copied().find(|x| !x.is_finite()),
            unchecked: false,
        },
        None => derived(trace, node, slot, adjoint),
    }
}

/// x̄ⱼ = Σᵢ ḡᵢ Jᵢⱼ: each product rounded into the node's dtype, the sum
/// carried in the accumulation dtype and rounded once.
fn jacobian_transpose_product(
    adjoint: &Value,
    rows: usize,
    cols: usize,
    data: &[f64],
    shape: &[usize],
    precision: Precision,
) -> Value {
    let g = adjoint.to_f64();
    let out = (0..cols)
        .map(|j| {
            let products = (0..rows).map(|i| precision.round(g[i] * data[i * cols + j]));
            precision.round(precision.sum(products))
        })
        .collect();
    Value::from_parts_in(precision.dtype, shape.to_vec(), out)
}

/// The contribution from the op's own rule.
fn derived(trace: &Trace, node: usize, slot: usize, adjoint: &Value) -> Pulled {
    let recorded = trace.node(node);
    let inputs: Vec<&Value> = recorded
        .inputs
        .iter()
        .map(|&input| &trace.node(input).value)
        .collect();
    let args = VjpArgs {
        slot,
        inputs: &inputs,
        output: &recorded.value,
        adjoint,
        attrs: &recorded.attrs,
        precision: trace.precision(node),
    };
    // An elementwise op's contribution is formed without storing its
    // partial; see `bad_partial`. A structured op's partials are its
    // recorded forward values, checked as values.
    Pulled {
        contribution: ops::vjp(recorded.op, &args),
        bad_partial: None,
        unchecked: recorded.op.is_elementwise(),
    }
}

/// The first non-finite entry of the derived partial on `node`'s edge
/// `slot`, formed only when asked: a non-finite partial always leaves a
/// non-finite contribution (∞·0 and NaN·x are NaN, ∞·x is ∞), so the sweep
/// asks only when a contribution is not finite.
pub fn bad_partial(trace: &Trace, node: usize, slot: usize) -> Option<f64> {
    let recorded = trace.node(node);
    let inputs: Vec<&Value> = recorded
        .inputs
        .iter()
        .map(|&input| &trace.node(input).value)
        .collect();
    ops::elementwise_partial(
        recorded.op,
        slot,
        &inputs,
        &recorded.value,
        &recorded.attrs,
        trace.node_dtype(node),
    )
    .and_then(|partial| partial.first_non_finite().map(|(_, x)| x))
}

/// One contribution of a general step as the sweep makes it: `node`'s
/// adjoint pulled back along edge `slot`, stored in the input's dtype
/// (flushed when the trace flushes), and added to what the input held.
/// The sweep and the ledger's re-derived entries both go through here, so
/// they agree bit for bit.
pub(crate) struct Formed {
    /// The value added.
    pub contribution: Value,
    /// The input's adjoint after.
    pub after: Value,
    /// Whether `after` is finite.
    pub after_finite: bool,
    /// The first non-finite entry of the edge's partial, if any.
    pub bad_partial: Option<f64>,
}

pub(crate) fn form(
    trace: &Trace,
    node: usize,
    slot: usize,
    adjoint: &Value,
    before: Option<&Value>,
) -> Formed {
    let input = trace.node(node).inputs[slot];
    let dtype = trace.node_dtype(input);
    let flush = trace.subnormals() == crate::dtype::Subnormals::Flush;
    let pulled = pull_back(trace, node, slot, adjoint);
    let mut contribution = pulled.contribution.stored_as(dtype);
    if flush {
        contribution.map_in_place(|x| dtype.flush(x));
    }
    let mut after = accumulate(before, &contribution, dtype);
    if flush {
        after.map_in_place(|x| dtype.flush(x));
    }
    let after_finite = after.is_finite();
    // A finite sum of a finite `before` and the contribution means a finite
    // contribution, and so a finite partial: only otherwise is it looked at.
    let bad_partial = match pulled.bad_partial {
        Some(bad) => Some(bad),
        None if pulled.unchecked && !after_finite && !contribution.is_finite() => {
            bad_partial(trace, node, slot)
        }
        None => None,
    };
    Formed {
        contribution,
        after,
        after_finite,
        bad_partial,
    }
}

/// Adds a contribution to an adjoint, rounding into the dtype (the result is
/// stored in it). The first contribution becomes the adjoint as it is, as
/// frameworks assign the first gradient rather than adding it to zero (which
/// would turn −0 into +0).
pub fn accumulate(before: Option<&Value>, contribution: &Value, dtype: Dtype) -> Value {
    match (before, contribution) {
        // Shares the contribution's elements: tensors are never changed in place.
        (None, _) => contribution.clone().stored_as(dtype),
        (Some(Value::Scalar(a)), Value::Scalar(c)) => Value::Scalar(dtype.round(a + c)),
        (Some(before), _) => Value::from_buffer(
            before.shape().to_vec(),
            crate::ops::kernels::map::add(before.elements(), contribution.elements(), dtype),
        ),
    }
}

/// A recorded partial applied forward: the Jacobian times an input's tangent
/// (or small change), in the output's shape. The forward-mode twin of the
/// pull-back above, for custom ops in tangent sweeps and linearised re-evaluation.
pub fn push_forward(
    partial: &Partial,
    tangent: &Value,
    output_shape: &[usize],
    dtype: Dtype,
) -> Value {
    match partial {
        Partial::Scalar(s) => {
            let sources = crate::tensor::broadcast_source_indices(tangent.shape(), output_shape);
            Value::from_parts(
                output_shape.to_vec(),
                sources
                    .iter()
                    .map(|&k| dtype.round(s * tangent.get(k)))
                    .collect(),
            )
        }
        Partial::Diagonal(diagonal) => {
            let sources = crate::tensor::broadcast_source_indices(tangent.shape(), output_shape);
            let data = sources
                .iter()
                .zip(diagonal.to_f64().iter())
                .map(|(&k, &d)| dtype.round(d * tangent.get(k)))
                .collect();
            Value::from_parts(output_shape.to_vec(), data)
        }
        Partial::Jacobian { rows, cols, data } => {
            let t = tangent.to_f64();
            let out = (0..*rows)
                .map(|i| {
                    let mut sum: Option<f64> = None;
                    for j in 0..*cols {
                        let product = dtype.round(data[i * cols + j] * t[j]);
                        sum = Some(sum.map_or(product, |s| dtype.round(s + product)));
                    }
                    sum.unwrap_or(0.0)
                })
                .collect();
            Value::from_parts(output_shape.to_vec(), out)
        }
    }
}
