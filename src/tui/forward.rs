//! Forward mode for teaching: a tangent sweep stepped in recording order along
//! one direction, each node's dual number (value, tangent), and at the end the
//! directional derivative beside the reverse sweep's ⟨v, ∇f⟩ for the same v.
//! Also the `App` actions that drive it, kept here so `app.rs` stays small.

use super::app::App;
use crate::format::number;
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
            Some(Some(Value::Scalar(t))) => super::panes::fit_number(*t, width),
            Some(Some(tangent)) => format!("‖·‖ {}", crate::format::compact(tangent.l2_norm())),
        }
    }

    /// The dual number of a scalar node as `(value, tangent)`, exact; the tangent `—` while pending.
    pub fn dual_text(&self, node: usize) -> String {
        let value = &self.trace.node(node).value;
        match (value, self.tangent(node)) {
            (Value::Scalar(x), Some(tangent)) => format!(
                "({}, {})",
                number(*x),
                number(tangent.and_then(Value::as_scalar).unwrap_or(0.0))
            ),
            (Value::Scalar(x), None) => format!("({}, —)", number(*x)),
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

/// What `d` does next, as words for the message.
fn along_for(app: &App) -> Result<Along, String> {
    let selected = app.selected;
    let current = app.forward.as_ref().map(|forward| forward.along);
    let is_leaf =
        app.trace.node(selected).op.is_leaf() && !app.trace.node(selected).value.is_empty();
    match current {
        Some(Along::Leaf(node)) if node == selected || !is_leaf => Ok(Along::Random(VerifyOptions::default().seed)),
        _ if is_leaf => Ok(Along::Leaf(selected)),
        _ => Err("select a leaf (an input, parameter or constant) first: d then goes along its first element".to_string()),
    }
}

impl<'t> App<'t> {
    /// Enters forward mode (along the selected leaf, else a seeded random
    /// direction over the parameters) or returns to the reverse sweep.
    pub(super) fn toggle_forward(&mut self) {
        if self.forward.take().is_some() {
            self.follow = true;
            self.message = Some(format!(
                "reverse sweep: step {}/{} (m returns to forward mode)",
                self.sweep.cursor(),
                self.sweep.len()
            ));
            return;
        }
        let node = self.trace.node(self.selected);
        let along = if node.op.is_leaf() && !node.value.is_empty() {
            Along::Leaf(self.selected)
        } else {
            Along::Random(VerifyOptions::default().seed)
        };
        self.forward = Some(Forward::new(self.trace, along));
        self.follow = true;
        let hint = if self.trace.params().next().is_none() && matches!(along, Along::Random(_)) {
            " — no parameters, so every tangent is 0: select a leaf and press d"
        } else {
            ""
        };
        self.message = Some(format!(
            "forward mode, {}: s steps the tangent sweep in recording order{hint}",
            along.describe(self.trace)
        ));
    }

    /// Forward mode: switches the direction, keeping the tangent sweep's position.
    pub(super) fn cycle_direction(&mut self) {
        let Some(cursor) = self.forward.as_ref().map(|forward| forward.sweep.cursor()) else {
            self.message = Some("the direction is for forward mode: m enters it".to_string());
            return;
        };
        match along_for(self) {
            Ok(along) => {
                let mut forward = Forward::new(self.trace, along);
                forward.seek(cursor);
                self.forward = Some(forward);
                self.message = Some(format!(
                    "{}: tangents recomputed up to step {cursor}",
                    along.describe(self.trace)
                ));
            }
            Err(message) => self.message = Some(message),
        }
    }

    /// The sweep actions in forward mode; false for actions it leaves alone.
    pub(super) fn forward_action(&mut self, action: super::action::Action) -> bool {
        use super::action::Action;
        let Some(forward) = self.forward.as_mut() else {
            return false;
        };
        match action {
            Action::Step => {
                if forward.step() {
                    self.follow_forward_end();
                } else {
                    self.message = Some("the tangent sweep is done (b steps back, r restarts, m returns to the reverse sweep)".to_string());
                }
            }
            Action::Back => {
                if !forward.sweep.back() {
                    self.message = Some(
                        "at the start of the tangent sweep: no node has its tangent yet"
                            .to_string(),
                    );
                }
            }
            Action::RunToEnd => {
                while forward.step() {}
                self.follow_forward_end();
            }
            Action::Restart => {
                forward.seek(0);
                self.follow = true;
            }
            Action::RunToFlag => {
                self.message =
                    Some("flags belong to the reverse sweep: m returns to it".to_string())
            }
            _ => return false,
        }
        true
    }

    /// At the end of the tangent sweep, says how the two modes compare.
    fn follow_forward_end(&mut self) {
        let Some(comparison) = self.forward.as_ref().and_then(Forward::comparison) else {
            return;
        };
        let verdict = if comparison.agrees(VerifyOptions::default().tolerance) {
            "they agree"
        } else {
            "they DISAGREE"
        };
        self.message = Some(format!(
            "∂f/∂v = {} (tangent) · ⟨v, ∇f⟩ = {} (reverse): {verdict}",
            number(comparison.tangent),
            number(comparison.reverse)
        ));
    }

    /// Rows of Order: the sweep order, or every node in recording order in forward mode.
    pub fn order_len(&self) -> usize {
        if self.forward.is_some() {
            self.trace.nodes().len()
        } else {
            self.trace.sweep_order().len()
        }
    }

    /// The node on row `rank` of Order.
    pub fn order_node(&self, rank: usize) -> usize {
        if self.forward.is_some() {
            rank
        } else {
            self.trace.sweep_order()[rank]
        }
    }

    /// The row of `node` in Order, if listed.
    pub fn order_rank(&self, node: usize) -> Option<usize> {
        if self.forward.is_some() {
            Some(node)
        } else {
            self.trace.sweep_rank(node)
        }
    }
}
