//! The ledger: every contribution in the order it was made, threaded per
//! receiving node, so a branch point's adjoint can be watched filling up. It
//! doubles as the undo log: each entry keeps the adjoint it replaced.

use crate::tensor::Value;

/// No entry: end of a per-node list.
const NONE: u32 = u32::MAX;

/// One contribution to one input's adjoint.
#[derive(Debug, Clone, PartialEq)]
pub struct Contribution {
    /// The step that made it.
    pub step: usize,
    /// The node whose adjoint was pulled back.
    pub consumer: usize,
    /// The node that received it.
    pub input: usize,
    /// The input slot of the edge.
    pub slot: usize,
    /// The value added.
    pub value: Value,
    /// The receiver's adjoint before (`None`: this was its first contribution).
    pub before: Option<Value>,
    /// The receiver's adjoint after.
    pub after: Value,
    /// Previous entry for the same receiver (set by the ledger).
    pub(super) previous: u32,
}

/// All contributions so far.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Ledger {
    entries: Vec<Contribution>,
    /// Index of the first entry of each step.
    step_starts: Vec<u32>,
    /// Last entry received by each node.
    last: Vec<u32>,
}

impl Ledger {
    pub(super) fn new(nodes: usize) -> Ledger {
        Ledger {
            entries: Vec::new(),
            step_starts: Vec::new(),
            last: vec![NONE; nodes],
        }
    }

    pub(super) fn begin_step(&mut self) {
        self.step_starts.push(self.entries.len() as u32);
    }

    /// Appends `entry`, threading it onto its receiver's list.
    pub(super) fn record(&mut self, mut entry: Contribution) {
        entry.previous = self.last[entry.input];
        self.last[entry.input] = self.entries.len() as u32;
        self.entries.push(entry);
    }

    /// Removes the last step's entries, newest first, handing each to `restore`.
    pub(super) fn pop_step(&mut self, mut restore: impl FnMut(Contribution)) {
        let Some(start) = self.step_starts.pop() else {
            return;
        };
        while self.entries.len() > start as usize {
            let entry = self.entries.pop().expect("entries after the step start");
            self.last[entry.input] = entry.previous;
            restore(entry);
        }
    }

    /// Every contribution in the order made.
    pub fn entries(&self) -> &[Contribution] {
        &self.entries
    }

    /// The contributions made by step `step`.
    pub fn step_entries(&self, step: usize) -> &[Contribution] {
        let Some(&start) = self.step_starts.get(step) else {
            return &[];
        };
        let end = self
            .step_starts
            .get(step + 1)
            .map_or(self.entries.len(), |&end| end as usize);
        &self.entries[start as usize..end]
    }

    /// The contributions `node` has received so far, oldest first.
    pub fn received(&self, node: usize) -> Vec<&Contribution> {
        let mut received = Vec::new();
        let mut cursor = self.last[node];
        while cursor != NONE {
            let entry = &self.entries[cursor as usize];
            received.push(entry);
            cursor = entry.previous;
        }
        received.reverse();
        received
    }
}
