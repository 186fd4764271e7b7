//! What the panes read on every frame, kept up to date step by step instead
//! of recomputed per frame: each node's adjoint (a scalar's value with its
//! sign, a tensor's norm), each group's norm and the flags per node. Every
//! entry is a function of the sweep's cursor, so stepping back restores it
//! exactly — except the range of magnitudes met, which only widens, so
//! Order's bars keep their scale while stepping back and forth.

use crate::sweep::{FlagKind, Sweep};
use crate::trace::Trace;
use std::collections::HashMap;

/// Norms, group sums and flag marks for the sweep's current position.
#[derive(Debug, Clone)]
pub struct Tally {
    /// Each node's adjoint so far: a scalar's value, a tensor's L2 norm
    /// (`None`: no contribution yet).
    norms: Vec<Option<f64>>,
    /// log10 of the smallest and largest non-zero finite magnitude met so far.
    range: (f64, f64),
    /// Index into `groups` of each node's group.
    group_of: Vec<u32>,
    /// Group names, in the order the sweep first meets them.
    groups: Vec<String>,
    /// Per group: the sum of squared final adjoint norms of its processed nodes.
    group_squares: Vec<f64>,
    /// Per step: the group sum it replaced, so `back` restores it bit-exactly.
    group_undo: Vec<f64>,
    /// The flag kinds raised at each node so far.
    node_flags: HashMap<usize, Vec<FlagKind>>,
    /// The flags already marked, in the order the sweep raised them.
    marked: Vec<(usize, FlagKind)>,
}

impl Tally {
    /// The tally of a sweep at its start.
    pub fn new(sweep: &Sweep) -> Tally {
        let trace = sweep.trace();
        let (group_of, groups) = group_index(trace);
        let mut tally = Tally {
            norms: Vec::new(),
            range: (f64::INFINITY, f64::NEG_INFINITY),
            group_squares: vec![0.0; groups.len()],
            group_of,
            groups,
            group_undo: Vec::new(),
            node_flags: HashMap::new(),
            marked: Vec::new(),
        };
        tally.reset(sweep);
        tally
    }

    /// Back to the sweep's start (after a restart).
    pub fn reset(&mut self, sweep: &Sweep) {
        let trace = sweep.trace();
        self.norms = vec![None; trace.nodes().len()];
        self.norms[trace.output()] = sweep.adjoint(trace.output()).map(|adjoint| shown(&adjoint));
        self.widen(self.norms[trace.output()]);
        self.group_squares.iter_mut().for_each(|sum| *sum = 0.0);
        self.group_undo.clear();
        self.node_flags.clear();
        self.marked.clear();
        self.sync_flags(sweep);
    }

    /// Updates after the sweep took step `step` (its cursor is now `step + 1`).
    pub fn stepped(&mut self, sweep: &Sweep, step: usize) {
        let trace = sweep.trace();
        let node = trace.sweep_order()[step];
        if let Some(ledger) = sweep.ledger() {
            for entry in ledger.step_entries(step) {
                let value = shown(&entry.after);
                self.norms[entry.input] = Some(value);
                self.widen(Some(value));
            }
        }
        let group = self.group_of[node] as usize;
        self.group_undo.push(self.group_squares[group]);
        let norm = self.norms[node].unwrap_or(0.0);
        self.group_squares[group] += norm * norm;
        self.sync_flags(sweep);
    }

    /// Updates after the sweep undid one step; `receivers` are the nodes that
    /// step had contributed to, and `node` the node it had processed.
    pub fn stepped_back(&mut self, sweep: &Sweep, node: usize, receivers: &[usize]) {
        for &receiver in receivers {
            self.norms[receiver] = sweep.adjoint(receiver).map(|adjoint| shown(&adjoint));
        }
        if let Some(previous) = self.group_undo.pop() {
            self.group_squares[self.group_of[node] as usize] = previous;
        }
        self.sync_flags(sweep);
    }

    /// Marks flags raised since the last call and unmarks undone ones. The
    /// sweep's flags form a stack, so comparing lengths is enough.
    fn sync_flags(&mut self, sweep: &Sweep) {
        let flags = sweep.flags();
        while self.marked.len() > flags.len() {
            let (node, kind) = self.marked.pop().expect("longer than the flags");
            if let Some(kinds) = self.node_flags.get_mut(&node) {
                if let Some(at) = kinds.iter().rposition(|&marked| marked == kind) {
                    kinds.remove(at);
                }
                if kinds.is_empty() {
                    self.node_flags.remove(&node);
                }
            }
        }
        for flag in &flags[self.marked.len()..] {
            self.marked.push((flag.node, flag.kind));
            let kinds = self.node_flags.entry(flag.node).or_default();
            if !kinds.contains(&flag.kind) {
                kinds.push(flag.kind);
            }
        }
    }

    /// The norm of `node`'s adjoint so far.
    pub fn norm(&self, node: usize) -> Option<f64> {
        self.norms[node].map(f64::abs)
    }

    /// `node`'s adjoint so far as Order shows it: a scalar's value with its
    /// sign, a tensor's norm.
    pub fn signed(&self, node: usize) -> Option<f64> {
        self.norms[node]
    }

    /// The decades Order's bars span: from the smallest to the largest
    /// non-zero finite magnitude met so far, whole decades, at least one.
    pub fn decades(&self) -> (i32, i32) {
        let (low, high) = self.range;
        if !(low.is_finite() && high.is_finite()) {
            return (-1, 1);
        }
        let (low, high) = (low.floor() as i32, high.ceil() as i32);
        (low, high.max(low + 1))
    }

    fn widen(&mut self, value: Option<f64>) {
        if let Some(magnitude) = value.map(f64::abs)
            && magnitude.is_finite()
            && magnitude > 0.0
        {
            let decade = magnitude.log10();
            self.range = (self.range.0.min(decade), self.range.1.max(decade));
        }
    }

    /// The flag kinds raised at `node`.
    pub fn flags_at(&self, node: usize) -> &[FlagKind] {
        self.node_flags.get(&node).map_or(&[], Vec::as_slice)
    }

    /// Each group with the norm of its processed nodes' adjoints taken
    /// together (√ of the sum of squares), in sweep order; `None` for groups
    /// with nothing processed yet.
    pub fn group_norms(&self) -> impl Iterator<Item = (&str, Option<f64>)> + '_ {
        self.groups
            .iter()
            .zip(&self.group_squares)
            .map(|(name, &sum)| {
                (
                    name.as_str(),
                    (sum > 0.0 || sum.is_nan()).then(|| sum.sqrt()),
                )
            })
    }

    /// The group name of `node`.
    pub fn group(&self, node: usize) -> &str {
        &self.groups[self.group_of[node] as usize]
    }
}

/// A value as the tally keeps it: a scalar itself, a tensor's L2 norm.
fn shown(value: &crate::tensor::Value) -> f64 {
    match value {
        crate::tensor::Value::Scalar(x) => *x,
        tensor => tensor.l2_norm(),
    }
}

/// Each node's group as an index, and the names in the order the sweep meets them.
fn group_index(trace: &Trace) -> (Vec<u32>, Vec<String>) {
    let mut index: HashMap<&str, u32> = HashMap::new();
    let mut names: Vec<String> = Vec::new();
    let mut group_of = vec![0u32; trace.nodes().len()];
    let in_sweep_order = trace.sweep_order().iter().copied().chain(trace.unreached());
    for node in in_sweep_order {
        let name = trace.node(node).group.as_str();
        let next = names.len() as u32;
        let at = *index.entry(name).or_insert_with(|| {
            names.push(if name.is_empty() {
                "(no group)".to_string()
            } else {
                name.to_string()
            });
            next
        });
        group_of[node] = at;
    }
    (group_of, names)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::sweep::LedgerMode;
    use crate::trace::validate;

    #[test]
    fn norms_and_group_sums_follow_steps_and_undo_exactly() {
        let trace = validate(crate::demos::teaching()).unwrap();
        let mut sweep = Sweep::new(&trace, LedgerMode::On);
        let mut tally = Tally::new(&sweep);
        let start = (tally.norms.clone(), tally.group_squares.clone());
        let mut snapshots = Vec::new();
        while let Some(node) = sweep.step() {
            tally.stepped(&sweep, sweep.cursor() - 1);
            snapshots.push((node, tally.norms.clone(), tally.group_squares.clone()));
        }
        // Every norm is the norm of the adjoint the sweep holds (common practice: L2 norm),
        // and a scalar keeps its sign.
        for node in 0..trace.nodes().len() {
            assert_eq!(
                tally.norm(node),
                sweep.adjoint(node).map(|adjoint| adjoint.l2_norm())
            );
            assert_eq!(
                tally.signed(node),
                sweep.adjoint(node).and_then(|adjoint| adjoint.as_scalar())
            );
        }
        let (low, high) = tally.decades();
        assert!(low < high);
        while let Some((node, norms, squares)) = snapshots.pop() {
            assert_eq!((&tally.norms, &tally.group_squares), (&norms, &squares));
            let step = sweep.cursor() - 1;
            let receivers: Vec<usize> = sweep
                .ledger()
                .unwrap()
                .step_entries(step)
                .iter()
                .map(|entry| entry.input)
                .collect();
            sweep.back();
            tally.stepped_back(&sweep, node, &receivers);
        }
        assert_eq!((tally.norms, tally.group_squares), start);
    }
}
