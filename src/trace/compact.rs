//! A compact, structure-of-arrays copy of what the sweep reads, laid out in
//! sweep order. A `Node` is a few hundred bytes spread over several heap
//! blocks; reading one per edge costs a cache miss or more, which dominated
//! the sweep of large scalar traces. Here step `k`'s edges sit right after
//! step `k − 1`'s, so a full sweep streams through memory.

use super::model::{Node, UNREACHED};
use crate::dtype::Dtype;
use crate::ops;
use crate::tensor::Value;

/// How the sweep handles one step.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum StepKind {
    /// A scalar node of an elementwise op (or a leaf) whose value and
    /// precomputed partials are all finite: only the sums need checking.
    Plain,
    /// As `Plain`, but its value or a partial is non-finite and gets flagged.
    Scalar,
    /// Anything else: recorded partials, tensors, structured ops.
    General,
}

/// Hot data, in sweep order where it is per step or per edge.
#[derive(Debug, Clone, Default)]
pub(crate) struct Compact {
    /// The forward value of each node that is a scalar (NaN for tensor nodes),
    /// indexed like the trace's nodes.
    pub scalars: Vec<f64>,
    /// True for each node whose value (and so adjoint) is a scalar.
    pub is_scalar: Vec<bool>,
    /// How each step is handled, indexed by sweep step.
    pub kind: Vec<StepKind>,
    /// The edges of step `k` are `edge_start[k]..edge_start[k + 1]`, in slot order.
    pub edge_start: Vec<u32>,
    /// The input node of each edge.
    pub edge_input: Vec<u32>,
    /// For `Plain` and `Scalar` steps, the local partial on each edge (NaN
    /// elsewhere). Partials depend only on recorded values, so they are
    /// computed once per trace (through the op table), not once per sweep.
    pub edge_partial: Vec<f64>,
    /// For each node, the first step that sends it a contribution
    /// (`UNREACHED` when none does): a node has received its first
    /// contribution exactly when that step is done, so the sweep need not
    /// mark it.
    pub first_contribution: Vec<u32>,
    /// Whether each node's forward value is finite, learnt on first need:
    /// values never change, so every sweep after the first skips the scan.
    pub value_finite: FiniteCache,
}

/// Per node: 0 not yet known, 1 finite, 2 holds NaN or ±inf.
#[derive(Debug, Default)]
pub(crate) struct FiniteCache(Vec<std::sync::atomic::AtomicU8>);

impl Clone for FiniteCache {
    fn clone(&self) -> FiniteCache {
        use std::sync::atomic::{AtomicU8, Ordering};
        FiniteCache(
            self.0
                .iter()
                .map(|state| AtomicU8::new(state.load(Ordering::Relaxed)))
                .collect(),
        )
    }
}

impl FiniteCache {
    fn new(nodes: usize) -> FiniteCache {
        FiniteCache(
            (0..nodes)
                .map(|_| std::sync::atomic::AtomicU8::new(0))
                .collect(),
        )
    }

    /// Whether `value` (node `node`'s forward value) is finite, scanning it
    /// only the first time.
    pub(crate) fn is_finite(&self, node: usize, value: &Value) -> bool {
        use std::sync::atomic::Ordering;
        match self.0[node].load(Ordering::Relaxed) {
            1 => true,
            2 => false,
            _ => {
                let finite = value.is_finite();
                self.0[node].store(if finite { 1 } else { 2 }, Ordering::Relaxed);
                finite
            }
        }
    }
}

impl Compact {
    /// The arrays for `nodes` swept in `order` (reverse topological, of the
    /// nodes that reach the output).
    pub(crate) fn new(nodes: &[Node], dtype: Dtype, order: &[usize]) -> Compact {
        let edges: usize = order.iter().map(|&node| nodes[node].inputs.len()).sum();
        let mut compact = Compact {
            // Matched on the variant: `Value::data` would read (and widen) a
            // sidecar tensor's elements, which opening must not touch.
            scalars: nodes
                .iter()
                .map(|node| scalar_of(node).unwrap_or(f64::NAN))
                .collect(),
            is_scalar: nodes
                .iter()
                .map(|node| matches!(node.value, Value::Scalar(_)))
                .collect(),
            kind: Vec::with_capacity(order.len()),
            edge_start: Vec::with_capacity(order.len() + 1),
            edge_input: Vec::with_capacity(edges),
            edge_partial: Vec::with_capacity(edges),
            first_contribution: vec![UNREACHED; nodes.len()],
            value_finite: FiniteCache::new(nodes.len()),
        };
        compact.edge_start.push(0);
        for (step, &index) in order.iter().enumerate() {
            let node = &nodes[index];
            for &input in &node.inputs {
                let first = &mut compact.first_contribution[input];
                *first = (*first).min(step as u32);
            }
            compact
                .edge_input
                .extend(node.inputs.iter().map(|&input| input as u32));
            compact.edge_start.push(compact.edge_input.len() as u32);
            let kind = match scalar_partials(nodes, node, dtype) {
                Some(partials) => {
                    let partials = &partials[..node.inputs.len()];
                    let finite = node.value.is_finite() && partials.iter().all(|p| p.is_finite());
                    compact.edge_partial.extend_from_slice(partials);
                    if finite {
                        StepKind::Plain
                    } else {
                        StepKind::Scalar
                    }
                }
                None => {
                    compact
                        .edge_partial
                        .extend(node.inputs.iter().map(|_| f64::NAN));
                    StepKind::General
                }
            };
            compact.kind.push(kind);
        }
        compact
    }

    /// The edges of step `step`, as indices into the edge arrays.
    #[inline]
    pub(crate) fn edges_of(&self, step: usize) -> std::ops::Range<usize> {
        self.edge_start[step] as usize..self.edge_start[step + 1] as usize
    }

    /// True when `node` has received a contribution once `done` steps are done.
    #[inline]
    pub(crate) fn has_received(&self, node: usize, done: usize) -> bool {
        (self.first_contribution[node] as usize) < done
    }
}

/// The value of a scalar node; `None` for a tensor node, whatever its size.
fn scalar_of(node: &Node) -> Option<f64> {
    match node.value {
        Value::Scalar(x) => Some(x),
        Value::Tensor(_) => None,
    }
}

/// The partials on `node`'s input edges (the first `inputs.len()` entries)
/// when its step can take the scalar path: the node, its inputs and (so) its
/// adjoint are scalars, its op is elementwise or a leaf, it has at most two
/// inputs, and no partial is recorded.
fn scalar_partials(nodes: &[Node], node: &Node, dtype: Dtype) -> Option<[f64; 2]> {
    let Value::Scalar(output) = node.value else {
        return None;
    };
    // The hot loop rounds in the trace's one dtype: nodes of another dtype
    // (a mixed-precision trace) take the general path.
    let scalar_path = node.inputs.len() <= 2
        && (node.op.is_leaf() || node.op.is_elementwise())
        && node.partials.iter().all(Option::is_none)
        && node.dtype == dtype
        && node.inputs.iter().all(|&input| nodes[input].dtype == dtype);
    if !scalar_path {
        return None;
    }
    let mut input_values = [0.0f64; 2];
    for (value, &input) in input_values.iter_mut().zip(&node.inputs) {
        *value = scalar_of(&nodes[input])?;
    }
    let input_values = &input_values[..node.inputs.len()];
    let mut partials = [f64::NAN; 2];
    for (slot, partial) in partials.iter_mut().enumerate().take(node.inputs.len()) {
        *partial = ops::scalar_partial(node.op, slot, input_values, output, &node.attrs, dtype)
            .expect("elementwise ops have a scalar partial");
    }
    Some(partials)
}

#[cfg(test)]
mod tests {
    use super::StepKind;
    use crate::trace::model::UNREACHED;
    use crate::trace::validate;

    #[test]
    fn edges_follow_the_sweep_and_first_contributions_the_consumers() {
        for (name, file) in crate::demos::all() {
            let trace = validate(file).expect("demos are valid");
            let compact = trace.compact();
            for (step, &node) in trace.sweep_order().iter().enumerate() {
                let inputs: Vec<usize> = compact.edge_input[compact.edges_of(step)]
                    .iter()
                    .map(|&input| input as usize)
                    .collect();
                assert_eq!(inputs, trace.node(node).inputs, "{name}: step {step}");
                let value = &trace.node(node).value;
                if !value.is_finite() {
                    assert_ne!(compact.kind[step], StepKind::Plain, "{name}: step {step}");
                }
            }
            for node in 0..trace.nodes().len() {
                let first = trace
                    .consumers(node)
                    .iter()
                    .filter_map(|&(consumer, _)| trace.sweep_rank(consumer))
                    .min()
                    .map_or(UNREACHED, |rank| rank as u32);
                assert_eq!(
                    compact.first_contribution[node], first,
                    "{name}: node {node}"
                );
            }
        }
    }
}
