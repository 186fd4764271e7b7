//! The checked trace: nodes with resolved inputs, the petgraph graph of the
//! computation, and the reverse topological order of the nodes that reach the
//! output. Only the validator builds one, so every invariant below holds.

use crate::dtype::{Dtype, Subnormals};
use crate::ops::{BoxedAttrs, Op};
use crate::tensor::Value;
use petgraph::Direction;
use petgraph::graph::{DiGraph, NodeIndex};
use petgraph::visit::EdgeRef;
use std::sync::Arc;

/// A recorded partial on one edge, checked against the edge's shapes.
#[derive(Debug, Clone, PartialEq)]
pub enum Partial {
    /// The same partial for every element.
    Scalar(f64),
    /// The Jacobian's diagonal, one entry per output element, in the output's shape.
    Diagonal(Value),
    /// A dense Jacobian, `rows` output elements by `cols` input elements, row-major.
    Jacobian {
        /// Output elements.
        rows: usize,
        /// Input elements.
        cols: usize,
        /// Entries, row-major.
        data: Vec<f64>,
    },
}

/// One checked node.
#[derive(Debug, Clone, PartialEq)]
pub struct Node {
    /// Unique id from the file.
    pub id: String,
    /// The op; `Op::Custom` for names outside the catalog.
    pub op: Op,
    /// The op's name as written (the custom name for custom ops), shared
    /// by every node that writes it.
    pub op_name: Arc<str>,
    /// The dtype the value and adjoint are stored in: the node's own, or the
    /// header's default.
    pub dtype: Dtype,
    /// Input nodes by index, in argument order; each is earlier in the trace.
    pub inputs: Vec<usize>,
    /// Scope path, possibly empty.
    pub group: String,
    /// Recording site, `file:line`, shared by every node recorded there.
    pub site: Option<Arc<str>>,
    /// Forward value.
    pub value: Value,
    /// Attributes (out of line: most nodes have none).
    pub attrs: BoxedAttrs,
    /// Recorded partial per input edge, `None` where the op's rule applies;
    /// empty when no edge has one (most nodes: a list of `None`s costs a
    /// hundred bytes a node). Read one edge's with [`Node::partial`].
    pub partials: Vec<Option<Partial>>,
    /// The gradient the original framework reported.
    pub reported: Option<Value>,
}

impl Node {
    /// The partial recorded on input edge `slot`, if any.
    pub fn partial(&self, slot: usize) -> Option<&Partial> {
        self.partials.get(slot).and_then(Option::as_ref)
    }
}

/// A node whose recorded numbers were rounded into its dtype on load.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Rounding {
    /// The node.
    pub node: usize,
    /// The first element that changed (flat index; 0 for a scalar).
    pub index: usize,
    /// The number as written in the file.
    pub written: f64,
    /// The value it became in the node's dtype.
    pub stored: f64,
    /// How many elements changed.
    pub count: usize,
}

/// A validated trace.
#[derive(Debug, Clone)]
pub struct Trace {
    pub(super) title: String,
    pub(super) description: String,
    pub(super) dtype: Dtype,
    pub(super) accumulate: Dtype,
    /// Nodes whose recorded numbers were not representable in their dtype.
    pub(super) rounded: Vec<Rounding>,
    pub(super) subnormals: Subnormals,
    pub(super) nodes: Vec<Node>,
    pub(super) output: usize,
    pub(super) seed: Value,
    /// Shared by every re-typed copy: ids never change.
    pub(super) index: Arc<super::ids::IdIndex>,
    /// Edges run from input to consumer; edge weight is the input slot.
    /// Shared, with the order and ranks, by every re-typed copy.
    pub(super) graph: Arc<DiGraph<(), u32>>,
    pub(super) order: Arc<Vec<usize>>,
    pub(super) rank: Arc<Vec<u32>>,
    pub(super) compact: super::compact::Compact,
}

/// Rank of nodes that do not reach the output.
pub(super) const UNREACHED: u32 = u32::MAX;

impl Trace {
    /// The compact hot-path arrays the sweep reads.
    pub(crate) fn compact(&self) -> &super::compact::Compact {
        &self.compact
    }

    /// The title from the header.
    pub fn title(&self) -> &str {
        &self.title
    }

    /// The free description from the header.
    pub fn description(&self) -> &str {
        &self.description
    }

    /// The dtype of the recorded run.
    pub fn dtype(&self) -> Dtype {
        self.dtype
    }

    /// The dtype `node`'s value and adjoint are stored in: its own, or the
    /// header's default.
    pub fn node_dtype(&self, node: usize) -> Dtype {
        self.nodes[node].dtype
    }

    /// The dtype matmul, convolution and reduction sums accumulate in before
    /// one rounding into the output's dtype: the header's `accumulate`, by
    /// default f32 for f16, bf16 and f32 runs and f64 for f64 runs (what
    /// mixed-precision hardware does; common practice).
    pub fn accumulate(&self) -> Dtype {
        self.accumulate
    }

    /// True when some node's dtype differs from the header's.
    pub fn is_mixed(&self) -> bool {
        self.nodes.iter().any(|node| node.dtype != self.dtype)
    }

    /// Nodes whose recorded numbers were not representable in their dtype
    /// and were rounded on load, in recording order: every sweep uses the
    /// rounded values.
    pub fn rounded_on_load(&self) -> &[Rounding] {
        &self.rounded
    }

    /// The precision `node`'s op computes in: its dtype and the trace's
    /// accumulation dtype.
    pub fn precision(&self, node: usize) -> crate::ops::Precision {
        crate::ops::Precision::new(self.node_dtype(node), self.accumulate())
    }

    /// Whether the sweep keeps subnormal results or flushes them to zero
    /// (`Keep` for every loaded trace; see [`Trace::retyped`]).
    pub fn subnormals(&self) -> Subnormals {
        self.subnormals
    }

    /// All nodes in recording order.
    pub fn nodes(&self) -> &[Node] {
        &self.nodes
    }

    /// One node by index.
    pub fn node(&self, node: usize) -> &Node {
        &self.nodes[node]
    }

    /// The output node.
    pub fn output(&self) -> usize {
        self.output
    }

    /// The seed of the output's adjoint.
    pub fn seed(&self) -> &Value {
        &self.seed
    }

    /// The index of a node id.
    pub fn find(&self, id: &str) -> Option<usize> {
        self.index.get(id, |at| self.nodes[at].id.as_str())
    }

    /// The petgraph graph: one graph node per trace node (same index), edges
    /// from input to consumer weighted by the input slot.
    pub fn graph(&self) -> &DiGraph<(), u32> {
        &self.graph
    }

    /// Number of edges.
    pub fn edge_count(&self) -> usize {
        self.graph.edge_count()
    }

    /// The nodes that reach the output in reverse topological order: the order
    /// the reverse sweep visits them. It is the recording order reversed,
    /// restricted to those nodes, so the output comes first.
    pub fn sweep_order(&self) -> &[usize] {
        &self.order
    }

    /// The position of `node` in [`Trace::sweep_order`], or `None` when it does
    /// not reach the output (it receives no adjoint).
    pub fn sweep_rank(&self, node: usize) -> Option<usize> {
        let rank = self.rank[node];
        (rank != UNREACHED).then_some(rank as usize)
    }

    /// Nodes that do not reach the output, in recording order.
    pub fn unreached(&self) -> impl Iterator<Item = usize> + '_ {
        (0..self.nodes.len()).filter(|&node| self.rank[node] == UNREACHED)
    }

    /// The consumers of `node` as (consumer, input slot) pairs, in recording order.
    pub fn consumers(&self, node: usize) -> Vec<(usize, usize)> {
        let mut consumers: Vec<(usize, usize)> = self
            .graph
            .edges_directed(NodeIndex::new(node), Direction::Outgoing)
            .map(|edge| (edge.target().index(), *edge.weight() as usize))
            .collect();
        consumers.sort_unstable();
        consumers
    }

    /// The parameter nodes, in recording order.
    pub fn params(&self) -> impl Iterator<Item = usize> + '_ {
        (0..self.nodes.len()).filter(|&node| self.nodes[node].op == Op::Param)
    }

    /// The distinct groups in order of first appearance (the empty group included).
    pub fn groups(&self) -> Vec<&str> {
        let mut seen = std::collections::HashSet::new();
        self.nodes
            .iter()
            .map(|node| node.group.as_str())
            .filter(|group| seen.insert(*group))
            .collect()
    }
}
