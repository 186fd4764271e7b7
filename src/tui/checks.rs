//! The Verify pane's side-by-side partials: for a recorded-partial suspect,
//! each mismatching edge's recorded partial beside the op table's.

use crate::tensor::numel;
use crate::trace::Trace;
use crate::verify::{Evidence, Verification, partial_pair, relative_error};

/// One edge's recorded partial beside the op table's.
#[derive(Debug, Clone, PartialEq)]
pub struct EdgePair {
    /// The consumer node.
    pub node: usize,
    /// The input slot.
    pub slot: usize,
    /// Recorded, dense (or the diagonal for elementwise ops).
    pub recorded: Vec<f64>,
    /// Recomputed by the op table, laid out like `recorded`.
    pub recomputed: Vec<f64>,
    /// Columns of the layout: 1 for a diagonal, the input's size for a Jacobian.
    pub columns: usize,
    /// Elements whose relative error is above the tolerance.
    pub differing: usize,
    /// The element with the largest relative error.
    pub worst: usize,
}

impl EdgePair {
    /// Whether element `at` differs beyond `tolerance`.
    pub fn differs(&self, at: usize, tolerance: f64) -> bool {
        relative_error(self.recorded[at], self.recomputed[at]) > tolerance
    }

    /// Element `at` as written in the table: the output element's
    /// multi-index for a diagonal, `(row, column)` of the Jacobian otherwise.
    pub fn label(&self, at: usize, shape: &[usize]) -> String {
        if self.columns == 1 {
            crate::format::multi_index(at, shape)
        } else {
            format!("({}, {})", at / self.columns, at % self.columns)
        }
    }
}

/// The mismatching edges of suspect `at` (recorded-partial evidence only):
/// its recorded and recomputed partials side by side, built when the
/// highlight moves, never per frame.
pub fn pairs_for(trace: &Trace, verification: &Verification, at: usize) -> Vec<EdgePair> {
    let Some(suspect) = verification.suspects.get(at) else {
        return Vec::new();
    };
    if suspect.evidence != Evidence::RecordedPartial {
        return Vec::new();
    }
    let tolerance = verification.tolerance;
    let mut pairs = Vec::new();
    for check in verification
        .partials
        .iter()
        .filter(|check| check.node == suspect.node && check.worst.relative > tolerance)
    {
        let Ok((recorded, recomputed)) = partial_pair(trace, check.node, check.slot) else {
            continue;
        };
        let rows = numel(trace.node(check.node).value.shape());
        let columns = if recorded.len() == rows {
            1
        } else {
            recorded.len() / rows.max(1)
        };
        let differing = recorded
            .iter()
            .zip(&recomputed)
            .filter(|&(&a, &b)| relative_error(a, b) > tolerance)
            .count();
        pairs.push(EdgePair {
            node: check.node,
            slot: check.slot,
            recorded,
            recomputed,
            columns,
            differing,
            worst: check.worst.element,
        });
    }
    pairs
}
