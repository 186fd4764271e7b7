//! Per-group adjoint norms ordered by depth, and the ratio between
//! neighbouring groups: the table of where the signal grows or decays; and
//! beside them the group's activation norms (forward values of its non-leaf
//! nodes), so exploding forward values are seen next to exploding adjoints.

use crate::sweep::Sweep;
use crate::tensor::l2_norm;
use serde::Serialize;
use std::collections::HashMap;

/// The adjoints of one group.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct GroupNorm {
    /// The group's scope path (empty for nodes recorded outside any scope).
    pub group: String,
    /// Fewest hops from the output to any node of the group.
    pub depth: usize,
    /// Swept nodes in the group.
    pub nodes: usize,
    /// L2 norm of all the group's adjoints together.
    pub adjoint_norm: f64,
    /// L2 norm of the group's parameter gradients, when it has parameters.
    pub param_norm: Option<f64>,
    /// This group's adjoint norm over the previous (shallower) group's; `None` for the first.
    pub ratio: Option<f64>,
    /// L2 norm of the forward values of the group's activations (its
    /// non-leaf nodes with more than one element, the output excepted);
    /// `None` when it has none.
    pub value_norm: Option<f64>,
    /// Root mean square of those values, comparable between groups of
    /// different sizes; `None` when it has none.
    pub value_rms: Option<f64>,
}

/// Fewest hops from the output to every node (`usize::MAX` for unreached nodes), in one pass in sweep order.
pub fn depths(sweep: &Sweep) -> Vec<usize> {
    let trace = sweep.trace();
    let mut depth = vec![usize::MAX; trace.nodes().len()];
    depth[trace.output()] = 0;
    for &node in trace.sweep_order() {
        let here = depth[node];
        for &input in &trace.node(node).inputs {
            depth[input] = depth[input].min(here.saturating_add(1));
        }
    }
    depth
}

/// The norms of every group with a swept node, shallowest first (ties in order of first appearance).
pub fn group_norms(sweep: &Sweep) -> Vec<GroupNorm> {
    let trace = sweep.trace();
    let depth = depths(sweep);
    let names = trace.groups();
    let positions: HashMap<&str, usize> = names
        .iter()
        .enumerate()
        .map(|(position, name)| (*name, position))
        .collect();
    let index_of = |group: &str| positions[group];
    let mut adjoint_norms: Vec<Vec<f64>> = vec![Vec::new(); names.len()];
    let mut param_norms: Vec<Vec<f64>> = vec![Vec::new(); names.len()];
    let mut value_norms: Vec<Vec<f64>> = vec![Vec::new(); names.len()];
    let mut value_counts = vec![0usize; names.len()];
    let mut group_depth = vec![usize::MAX; names.len()];
    for &node in trace.sweep_order() {
        let recorded = trace.node(node);
        let group = index_of(&recorded.group);
        let norm = sweep.adjoint(node).map_or(0.0, |adjoint| adjoint.l2_norm());
        adjoint_norms[group].push(norm);
        if recorded.op == crate::ops::Op::Param {
            param_norms[group].push(norm);
        }
        // Activations: what non-leaf nodes pass on; the output (the loss) and
        // other single numbers are summaries, not layers of units.
        if !recorded.op.is_leaf() && node != trace.output() && recorded.value.len() > 1 {
            value_norms[group].push(recorded.value.l2_norm());
            value_counts[group] += recorded.value.len();
        }
        group_depth[group] = group_depth[group].min(depth[node]);
    }
    let mut groups: Vec<GroupNorm> = (0..names.len())
        .filter(|&group| !adjoint_norms[group].is_empty())
        .map(|group| GroupNorm {
            group: names[group].to_string(),
            depth: group_depth[group],
            nodes: adjoint_norms[group].len(),
            adjoint_norm: l2_norm(&adjoint_norms[group]),
            param_norm: (!param_norms[group].is_empty()).then(|| l2_norm(&param_norms[group])),
            ratio: None,
            value_norm: (value_counts[group] > 0).then(|| l2_norm(&value_norms[group])),
            value_rms: (value_counts[group] > 0)
                .then(|| l2_norm(&value_norms[group]) / (value_counts[group] as f64).sqrt()),
        })
        .collect();
    groups.sort_by_key(|group| group.depth);
    for k in 1..groups.len() {
        groups[k].ratio = Some(groups[k].adjoint_norm / groups[k - 1].adjoint_norm);
    }
    groups
}
