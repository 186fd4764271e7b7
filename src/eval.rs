//! Forward re-evaluation of a trace with some leaves replaced: the numerical
//! check of the sweep (finite differences) perturbs a parameter and runs the
//! recorded computation again through the op table.

use crate::dtype::Dtype;
use crate::ops;
use crate::sweep::push_forward;
use crate::tensor::Value;
use crate::trace::Trace;

/// Why a trace cannot be re-evaluated.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum EvalError {
    /// A replacement does not have the leaf's shape.
    #[error("replacement for node '{node}' has the wrong shape")]
    Shape {
        /// Node id.
        node: String,
    },
}

/// Recomputes every node's forward value in recording order, in `dtype`, with
/// the values of the leaves in `replace` (node index, new value) swapped in.
/// Nodes that depend on nothing replaced keep their recorded value.
///
/// A custom op has no forward rule; it is linearised with its recorded
/// partials, y ≈ y₀ + Σ J·(x − x₀), so a finite difference through it tests
/// the rest of the trace against those partials.
pub fn reevaluate(
    trace: &Trace,
    replace: &[(usize, Value)],
    dtype: Dtype,
) -> Result<Vec<Value>, EvalError> {
    let mut values: Vec<Value> = Vec::with_capacity(trace.nodes().len());
    let mut changed = vec![false; trace.nodes().len()];
    for (index, node) in trace.nodes().iter().enumerate() {
        if let Some((_, value)) = replace.iter().find(|(at, _)| *at == index) {
            if value.shape() != node.value.shape() {
                return Err(EvalError::Shape {
                    node: node.id.clone(),
                });
            }
            values.push(value.clone());
            changed[index] = true;
            continue;
        }
        if node.op.is_leaf() || !node.inputs.iter().any(|&input| changed[input]) {
            values.push(node.value.clone());
            continue;
        }
        let value = if node.op == ops::Op::Custom {
            linearised(trace, index, &values, dtype)
        } else {
            let inputs: Vec<&Value> = node.inputs.iter().map(|&input| &values[input]).collect();
            ops::forward(node.op, &inputs, &node.attrs, dtype)
        };
        values.push(value);
        changed[index] = true;
    }
    Ok(values)
}

/// Recomputes every node's forward value from the recorded leaves, in
/// `dtype`: the step as it would have run in that dtype (custom ops
/// linearised around their recorded inputs, as in [`reevaluate`]).
pub fn forward_pass(trace: &Trace, dtype: Dtype) -> Vec<Value> {
    let mut values: Vec<Value> = Vec::with_capacity(trace.nodes().len());
    for (index, node) in trace.nodes().iter().enumerate() {
        let value = if node.op.is_leaf() {
            node.value.clone()
        } else if node.op == ops::Op::Custom {
            linearised(trace, index, &values, dtype)
        } else {
            let inputs: Vec<&Value> = node.inputs.iter().map(|&input| &values[input]).collect();
            ops::forward(node.op, &inputs, &node.attrs, dtype)
        };
        values.push(value);
    }
    values
}

/// y₀ + Σ J·(x − x₀) over a custom node's edges.
fn linearised(trace: &Trace, node: usize, values: &[Value], dtype: Dtype) -> Value {
    let recorded = trace.node(node);
    let shape = recorded.value.shape();
    let mut total = recorded.value.clone();
    for (slot, &input) in recorded.inputs.iter().enumerate() {
        let partial = recorded
            .partial(slot)
            .expect("custom ops carry every partial");
        let before = &trace.node(input).value;
        let delta = Value::from_parts(
            before.shape().to_vec(),
            values[input]
                .to_f64()
                .iter()
                .zip(before.to_f64().iter())
                .map(|(&now, &then)| dtype.round(now - then))
                .collect(),
        );
        total = ops::add_rounded(&total, &push_forward(partial, &delta, shape, dtype), dtype);
    }
    total
}
