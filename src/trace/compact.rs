//! A compact, structure-of-arrays copy of what the sweep reads for scalar
//! nodes. A `Node` is a few hundred bytes spread over several heap blocks;
//! reading one per edge costs a cache miss or more, which dominated the sweep
//! of large scalar traces. These arrays keep the hot data a few bytes apart.

use super::model::Node;
use crate::dtype::Dtype;
use crate::ops;
use crate::tensor::Value;

/// Hot per-node data, indexed like the trace's nodes.
#[derive(Debug, Clone, Default)]
pub(crate) struct Compact {
    /// Inputs of node `k` are `inputs[input_start[k]..input_start[k + 1]]`.
    pub input_start: Vec<u32>,
    /// All input lists, concatenated in node order.
    pub inputs: Vec<u32>,
    /// The forward value of scalar nodes (NaN for tensor nodes).
    pub scalars: Vec<f64>,
    /// True when the node, its inputs and its adjoint are scalars, its op is
    /// elementwise or a leaf, and no partial is recorded: the sweep's fast path.
    pub fast: Vec<bool>,
    /// For fast-path nodes, the local partial on each input edge, aligned with
    /// `inputs` (NaN elsewhere). Partials depend only on recorded values, so
    /// they are computed once per trace (through the op table) rather than
    /// once per sweep.
    pub partials: Vec<f64>,
}

impl Compact {
    pub(crate) fn new(nodes: &[Node], dtype: Dtype) -> Compact {
        let mut compact = Compact {
            input_start: Vec::with_capacity(nodes.len() + 1),
            inputs: Vec::with_capacity(nodes.iter().map(|node| node.inputs.len()).sum()),
            scalars: Vec::with_capacity(nodes.len()),
            fast: Vec::with_capacity(nodes.len()),
            partials: Vec::with_capacity(nodes.iter().map(|node| node.inputs.len()).sum()),
        };
        compact.input_start.push(0);
        for node in nodes {
            let scalar = match node.value {
                Value::Scalar(x) => Some(x),
                Value::Tensor(_) => None,
            };
            let inputs_scalar = node
                .inputs
                .iter()
                .all(|&input| matches!(nodes[input].value, Value::Scalar(_)));
            let fast = scalar.is_some()
                && inputs_scalar
                && node.inputs.len() <= 2
                && (node.op.is_leaf() || node.op.is_elementwise())
                && node.partials.iter().all(Option::is_none);
            compact
                .inputs
                .extend(node.inputs.iter().map(|&input| input as u32));
            compact.input_start.push(compact.inputs.len() as u32);
            compact.scalars.push(scalar.unwrap_or(f64::NAN));
            compact.fast.push(fast);
            if fast && let Some(output) = scalar {
                let mut input_values = [0.0f64; 2];
                for (value, &input) in input_values.iter_mut().zip(&node.inputs) {
                    *value = nodes[input]
                        .value
                        .as_scalar()
                        .expect("fast inputs are scalars");
                }
                let input_values = &input_values[..node.inputs.len()];
                compact.partials.extend((0..node.inputs.len()).map(|slot| {
                    ops::scalar_partial(node.op, slot, input_values, output, &node.attrs, dtype)
                        .expect("fast-path nodes are elementwise")
                }));
            } else {
                compact
                    .partials
                    .extend(node.inputs.iter().map(|_| f64::NAN));
            }
        }
        compact
    }

    /// The precomputed partials on `node`'s input edges (fast-path nodes only).
    #[inline]
    pub(crate) fn partials_of(&self, node: usize) -> &[f64] {
        &self.partials[self.input_start[node] as usize..self.input_start[node + 1] as usize]
    }

    /// The inputs of `node`.
    #[inline]
    pub(crate) fn inputs_of(&self, node: usize) -> &[u32] {
        &self.inputs[self.input_start[node] as usize..self.input_start[node + 1] as usize]
    }
}
