//! Typed indices: a node of the trace and a step of the sweep are both
//! numbers, and one must never be passed where the other is meant. The
//! library speaks in plain indices; the view converts at its edge.

use crate::trace::Trace;

/// A node of the trace, by its index in recording order.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct NodeIx(usize);

/// A step of the reverse sweep, by its position in the sweep order (step 0
/// processes the output); shown to people as `step + 1`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct StepIx(usize);

impl NodeIx {
    /// The node at `index` in recording order.
    pub const fn new(index: usize) -> NodeIx {
        NodeIx(index)
    }

    /// The index the library uses.
    pub const fn index(self) -> usize {
        self.0
    }

    /// The step that processes this node, if it reaches the output.
    pub fn step(self, trace: &Trace) -> Option<StepIx> {
        trace.sweep_rank(self.0).map(StepIx)
    }
}

impl StepIx {
    /// The step at `position` in the sweep order.
    pub const fn new(position: usize) -> StepIx {
        StepIx(position)
    }

    /// The position in the sweep order.
    pub const fn position(self) -> usize {
        self.0
    }

    /// The step as people count it, from 1.
    pub const fn number(self) -> usize {
        self.0 + 1
    }

    /// The node this step processes.
    pub fn node(self, trace: &Trace) -> NodeIx {
        NodeIx(trace.sweep_order()[self.0])
    }
}
