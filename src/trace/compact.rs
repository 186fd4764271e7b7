//! A compact, structure-of-arrays copy of what the sweep reads for scalar
//! nodes. A `Node` is a few hundred bytes spread over several heap blocks;
//! reading one per edge costs a cache miss or more, which dominated the sweep
//! of large scalar traces. These arrays keep the hot data a few bytes apart.

use super::model::Node;
use crate::ops::{Attrs, Op};
use crate::tensor::Value;

/// Attributes of nodes whose op reads none.
pub(crate) static NO_ATTRS: Attrs = Attrs {
    axis: None,
    keepdims: false,
    exponent: None,
    slope: None,
    targets: None,
    perm: None,
    shape: None,
};

/// Hot per-node data, indexed like the trace's nodes.
#[derive(Debug, Clone, Default)]
pub(crate) struct Compact {
    /// Each node's op.
    pub ops: Vec<Op>,
    /// Inputs of node `k` are `inputs[input_start[k]..input_start[k + 1]]`.
    pub input_start: Vec<u32>,
    /// All input lists, concatenated in node order.
    pub inputs: Vec<u32>,
    /// The forward value of scalar nodes (NaN for tensor nodes).
    pub scalars: Vec<f64>,
    /// True when the node, its inputs and its adjoint are scalars, its op is
    /// elementwise or a leaf, and no partial is recorded: the sweep's fast path.
    pub fast: Vec<bool>,
    /// True when the op reads attributes (pow, leaky_relu).
    pub reads_attrs: Vec<bool>,
}

impl Compact {
    pub(crate) fn new(nodes: &[Node]) -> Compact {
        let mut compact = Compact {
            ops: Vec::with_capacity(nodes.len()),
            input_start: Vec::with_capacity(nodes.len() + 1),
            inputs: Vec::with_capacity(nodes.iter().map(|node| node.inputs.len()).sum()),
            scalars: Vec::with_capacity(nodes.len()),
            fast: Vec::with_capacity(nodes.len()),
            reads_attrs: Vec::with_capacity(nodes.len()),
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
            compact.ops.push(node.op);
            compact
                .inputs
                .extend(node.inputs.iter().map(|&input| input as u32));
            compact.input_start.push(compact.inputs.len() as u32);
            compact.scalars.push(scalar.unwrap_or(f64::NAN));
            compact.fast.push(fast);
            compact
                .reads_attrs
                .push(!node.op.spec().required.is_empty());
        }
        compact
    }

    /// The inputs of `node`.
    #[inline]
    pub(crate) fn inputs_of(&self, node: usize) -> &[u32] {
        &self.inputs[self.input_start[node] as usize..self.input_start[node + 1] as usize]
    }
}
