//! Forward re-evaluation of a trace with some leaves replaced: the numerical
//! check of the sweep (finite differences) perturbs a parameter and runs the
//! recorded computation again through the op table.

use crate::ops;
use crate::tensor::Value;
use crate::trace::Trace;

/// Why a trace cannot be re-evaluated.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum EvalError {
    /// A custom op has no forward rule, so a perturbation cannot pass through it.
    #[error("node '{node}' is the custom op '{op}', which has no forward rule to re-evaluate")]
    Custom {
        /// Node id.
        node: String,
        /// Custom op name.
        op: String,
    },
    /// A replacement does not have the leaf's shape.
    #[error("replacement for node '{node}' has the wrong shape")]
    Shape {
        /// Node id.
        node: String,
    },
}

/// Recomputes every node's forward value in recording order, with the values
/// of the leaves in `replace` (node index, new value) swapped in. Nodes that
/// depend on nothing replaced keep their recorded value.
pub fn reevaluate(trace: &Trace, replace: &[(usize, Value)]) -> Result<Vec<Value>, EvalError> {
    let mut values: Vec<Value> = Vec::with_capacity(trace.nodes().len());
    let mut changed = vec![false; trace.nodes().len()];
    for (index, node) in trace.nodes().iter().enumerate() {
        if let Some((_, value)) = replace.iter().find(|(at, _)| *at == index) {
            if value.shape() != node.value.shape() {
                return Err(EvalError::Shape { node: node.id.clone() });
            }
            values.push(value.clone());
            changed[index] = true;
            continue;
        }
        if node.op.is_leaf() || !node.inputs.iter().any(|&input| changed[input]) {
            values.push(node.value.clone());
            continue;
        }
        if node.op == ops::Op::Custom {
            return Err(EvalError::Custom { node: node.id.clone(), op: node.op_name.clone() });
        }
        let inputs: Vec<&Value> = node.inputs.iter().map(|&input| &values[input]).collect();
        let value = ops::forward(node.op, &inputs, &node.attrs, trace.dtype());
        values.push(value);
        changed[index] = true;
    }
    Ok(values)
}
