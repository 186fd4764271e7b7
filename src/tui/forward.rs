//! Forward mode for teaching: a tangent sweep stepped in recording order along
//! one direction, each node's dual number (value, tangent), and at the end the
//! directional derivative beside the reverse sweep's ⟨v, ∇f⟩ for the same v.
//! Also the session's actions that drive it.

use super::ids::NodeIx;
use super::session::{Note, Session};
use crate::format::{number, readable};
use crate::sweep::{LedgerMode, Sweep};
use crate::tensor::Value;
use crate::trace::Trace;
use crate::verify::{Direction, TangentSweep, VerifyOptions, relative_error};

/// Along which direction the tangent sweep runs.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Along {
    /// The unit vector of the first element of this leaf.
    Leaf(usize),
    /// Entries uniform in [−1, 1] over every parameter, from this seed.
    Random(u64),
}

impl Along {
    fn direction(self) -> Direction {
        match self {
            Along::Leaf(node) => Direction::Unit { node, element: 0 },
            Along::Random(seed) => Direction::Random { seed },
        }
    }

    /// The direction in words, for the status line and titles.
    pub fn describe(self, trace: &Trace) -> String {
        match self {
            Along::Leaf(node) if trace.node(node).value.shape().is_empty() => {
                format!("v = unit along {}", trace.node(node).id)
            }
            Along::Leaf(node) => format!("v = unit along {}[0]", trace.node(node).id),
            Along::Random(seed) => format!(
                "v = random over {} parameter(s), seed {seed:#x}",
                trace.params().count()
            ),
        }
    }
}

/// The tangent sweep against the reverse sweep, once both are at the end.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Comparison {
    /// ∂f/∂v: the output's tangent against the seed.
    pub tangent: f64,
    /// ⟨v, ∇f⟩ from a finished reverse sweep.
    pub reverse: f64,
    /// Their relative error.
    pub relative: f64,
}

impl Comparison {
    /// True when the two modes agree within `tolerance` (relative).
    pub fn agrees(&self, tolerance: f64) -> bool {
        self.relative <= tolerance
    }
}

/// Forward mode's state.
pub struct Forward<'t> {
    trace: &'t Trace,
    /// The tangent sweep being stepped.
    pub sweep: TangentSweep<'t>,
    /// Its direction.
    pub along: Along,
    /// The direction in words, kept: counting the parameters walks every node.
    pub description: String,
    /// ⟨v, ∇f⟩ by a separate reverse sweep, computed the first time the tangent sweep ends.
    reverse: Option<f64>,
}

impl<'t> Forward<'t> {
    /// A tangent sweep at its start along `along`.
    pub fn new(trace: &'t Trace, along: Along) -> Forward<'t> {
        Forward {
            trace,
            sweep: TangentSweep::new(trace, &along.direction()),
            along,
            description: along.describe(trace),
            reverse: None,
        }
    }

    /// The node the next step processes (recording order), if any.
    pub fn current(&self) -> Option<usize> {
        (!self.sweep.is_done()).then(|| self.sweep.cursor())
    }

    /// The node the last step processed, if any.
    pub fn last_done(&self) -> Option<usize> {
        self.sweep.cursor().checked_sub(1)
    }

    /// Processes the next node; at the end, runs the reverse sweep once for
    /// the comparison. False when already done.
    pub fn step(&mut self) -> bool {
        if self.sweep.step().is_none() {
            return false;
        }
        if self.sweep.is_done() && self.reverse.is_none() {
            // A separate sweep without a ledger: the view's own sweep keeps its position.
            let mut reverse = Sweep::new(self.trace, LedgerMode::Off);
            reverse.run_to_end();
            self.reverse = Some(self.sweep.reverse_counterpart(&reverse));
        }
        true
    }

    /// Moves the tangent sweep to `cursor` nodes processed.
    pub fn seek(&mut self, cursor: usize) {
        while self.sweep.cursor() > cursor && self.sweep.back() {}
        while self.sweep.cursor() < cursor && self.step() {}
    }

    /// The comparison, once the tangent sweep is at the end.
    pub fn comparison(&self) -> Option<Comparison> {
        let tangent = self.sweep.directional_derivative()?;
        let reverse = self.reverse?;
        Some(Comparison {
            tangent,
            reverse,
            relative: relative_error(tangent, reverse),
        })
    }

    /// True when `node` has been processed.
    pub fn is_done(&self, node: usize) -> bool {
        node < self.sweep.cursor()
    }

    /// The tangent of a processed node: `Some(None)` when it is zero (nothing
    /// it depends on moves along v), `None` while pending.
    pub fn tangent(&self, node: usize) -> Option<Option<&Value>> {
        self.is_done(node).then(|| self.sweep.tangent(node))
    }

    /// A node's tangent in at most `width` columns: exact when it fits, tensors by norm, `—` while pending.
    pub fn tangent_text(&self, node: usize, width: usize) -> String {
        match self.tangent(node) {
            None => "—".to_string(),
            Some(None) => "0".to_string(),
            Some(Some(Value::Scalar(t))) => super::panes::fit_number(*t, self.trace.dtype(), width),
            Some(Some(tangent)) => format!("‖·‖ {}", crate::format::compact(tangent.l2_norm())),
        }
    }

    /// The dual number of a scalar node as `(value, tangent)`, exact; the tangent `—` while pending.
    pub fn dual_text(&self, node: usize) -> String {
        let value = &self.trace.node(node).value;
        match (value, self.tangent(node)) {
            (Value::Scalar(x), Some(tangent)) => format!(
                "({}, {})",
                readable(*x, self.trace.node_dtype(node)),
                readable(
                    tangent.and_then(Value::as_scalar).unwrap_or(0.0),
                    self.trace.node_dtype(node)
                )
            ),
            (Value::Scalar(x), None) => {
                format!("({}, —)", readable(*x, self.trace.node_dtype(node)))
            }
            (_, Some(tangent)) => {
                let norm = tangent.map_or(0.0, Value::l2_norm);
                format!(
                    "tangent {} ‖·‖ {}",
                    crate::format::shape(value.shape()),
                    crate::format::compact(norm)
                )
            }
            (_, None) => "tangent — (pending)".to_string(),
        }
    }
}

/// Where the direction goes next: along the selected leaf, else (or when
/// it already goes along it) a seeded random direction over the parameters.
fn along_for(session: &Session) -> Result<Along, String> {
    let selected = session.selected().index();
    let trace = session.trace();
    let current = session.forward().map(|forward| forward.along);
    let is_leaf = trace.node(selected).op.is_leaf() && !trace.node(selected).value.is_empty();
    match current {
        Some(Along::Leaf(node)) if node == selected || !is_leaf => {
            Ok(Along::Random(VerifyOptions::default().seed))
        }
        _ if is_leaf => Ok(Along::Leaf(selected)),
        _ => Err("select a leaf (an input, parameter or constant) first: {key:cycle_direction} then goes along its first element".to_string()),
    }
}

impl Forward<'_> {
    /// At the end of the tangent sweep: how the two modes compare.
    pub fn end_note(&self) -> Note {
        let comparison = self.comparison()?;
        let verdict = if comparison.agrees(VerifyOptions::default().tolerance) {
            "they agree"
        } else {
            "they DISAGREE"
        };
        Some(format!(
            "∂f/∂v = {} (tangent) · ⟨v, ∇f⟩ = {} (reverse): {verdict}",
            number(comparison.tangent),
            number(comparison.reverse)
        ))
    }
}

impl Session<'_> {
    /// Enters forward mode (along the selected leaf, else a seeded random
    /// direction over the parameters) or returns to the reverse sweep.
    pub fn toggle_forward(&mut self) -> Note {
        if self.forward.take().is_some() {
            self.follow = true;
            self.refresh();
            return Some(format!(
                "reverse sweep: step {}/{} ({{key:toggle_forward}} returns to forward mode)",
                self.sweep().cursor(),
                self.sweep().len()
            ));
        }
        let trace = self.trace();
        let node = trace.node(self.selected().index());
        let along = if node.op.is_leaf() && !node.value.is_empty() {
            Along::Leaf(self.selected().index())
        } else {
            Along::Random(VerifyOptions::default().seed)
        };
        self.forward = Some(Forward::new(trace, along));
        self.follow = true;
        self.refresh();
        let hint = if trace.params().next().is_none() && matches!(along, Along::Random(_)) {
            " — no parameters, so every tangent is 0: select a leaf and press {key:cycle_direction}"
        } else {
            ""
        };
        Some(format!(
            "forward mode, {}: {{key:step}} steps the tangent sweep in recording order{hint}",
            along.describe(trace)
        ))
    }

    /// Forward mode: switches the direction, keeping the tangent sweep's position.
    pub fn cycle_direction(&mut self) -> Note {
        let Some(cursor) = self.forward().map(|forward| forward.sweep.cursor()) else {
            return Some(
                "the direction is for forward mode: {key:toggle_forward} enters it".to_string(),
            );
        };
        let note = match along_for(self) {
            Ok(along) => {
                let trace = self.trace();
                let mut forward = Forward::new(trace, along);
                forward.seek(cursor);
                self.forward = Some(forward);
                format!(
                    "{}: tangents recomputed up to step {cursor}",
                    along.describe(trace)
                )
            }
            Err(message) => message,
        };
        self.refresh();
        Some(note)
    }

    /// Forward mode: whether the tangent sweep has processed `node`.
    pub fn tangent_done(&self, node: NodeIx) -> bool {
        self.forward()
            .is_some_and(|forward| forward.is_done(node.index()))
    }
}
