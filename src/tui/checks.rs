//! The Verify pane's state: `ebb::verify` run once on demand (never per
//! frame), the highlighted suspect, and for a recorded-partial suspect its
//! recorded and recomputed partials side by side, built when the highlight
//! moves. Also the `App` actions that drive it, kept here so `app.rs` stays small.

use super::app::App;
use crate::tensor::numel;
use crate::trace::Trace;
use crate::verify::{Evidence, Verification, VerifyOptions, partial_pair, relative_error, verify};
use std::time::Instant;

/// Traces up to this many nodes are verified as soon as asked; bigger ones
/// first draw a "verifying…" message, then run.
pub const AT_ONCE: usize = 20_000;

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

    /// Element `at` as written in the table: `i` for a diagonal, `(row, column)` for a Jacobian.
    pub fn label(&self, at: usize) -> String {
        if self.columns == 1 {
            at.to_string()
        } else {
            format!("({}, {})", at / self.columns, at % self.columns)
        }
    }
}

/// The verification and what the pane shows of it.
#[derive(Debug, Clone, Default)]
pub struct Checks {
    /// The result of the last run, if any.
    pub verification: Option<Verification>,
    /// A run was asked for and waits for the next turn of the event loop.
    pub requested: bool,
    /// The highlighted suspect.
    pub cursor: usize,
    /// Mismatching edges of the highlighted suspect (recorded-partial evidence only).
    pub pairs: Vec<EdgePair>,
    /// Seconds the last run took.
    pub seconds: f64,
}

impl Checks {
    /// Runs every check on `trace`.
    pub fn run(&mut self, trace: &Trace) {
        let started = Instant::now();
        self.verification = Some(verify(trace, &VerifyOptions::default()));
        self.seconds = started.elapsed().as_secs_f64();
        self.requested = false;
        self.highlight(trace, 0);
    }

    /// Highlights suspect `at` and builds its side-by-side partials.
    pub fn highlight(&mut self, trace: &Trace, at: usize) {
        self.pairs.clear();
        let Some(verification) = &self.verification else {
            return;
        };
        self.cursor = at.min(verification.suspects.len().saturating_sub(1));
        let Some(suspect) = verification.suspects.get(self.cursor) else {
            return;
        };
        if suspect.evidence != Evidence::RecordedPartial {
            return;
        }
        let tolerance = verification.tolerance;
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
            self.pairs.push(EdgePair {
                node: check.node,
                slot: check.slot,
                recorded,
                recomputed,
                columns,
                differing,
                worst: check.worst.element,
            });
        }
    }
}

impl<'t> App<'t> {
    /// Runs the checks now for a small trace; for a big one, asks the event
    /// loop to run them after drawing a message.
    pub(super) fn request_verification(&mut self) {
        let nodes = self.trace.nodes().len();
        if nodes <= AT_ONCE {
            self.run_verification();
        } else {
            self.checks.requested = true;
            self.message = Some(format!(
                "verifying {nodes} nodes: recorded partials, finite differences, tangent sweep…"
            ));
        }
    }

    /// True when work waits for the event loop (a requested verification).
    pub fn has_pending(&self) -> bool {
        self.checks.requested
    }

    /// Does the waiting work; the event loop calls it right after a draw.
    pub fn run_pending(&mut self) {
        if self.checks.requested {
            self.run_verification();
        }
    }

    fn run_verification(&mut self) {
        self.checks.run(self.trace);
        let verification = self.checks.verification.as_ref().expect("just run");
        let took = format!("{:.2} s", self.checks.seconds);
        self.message = Some(match verification.suspects.len() {
            0 if !verification.agrees() => format!(
                "verified in {took}: cannot judge: values are NaN or infinite, and NaN never agrees with anything"
            ),
            0 => format!(
                "verified in {took}: every check agrees within {:e}",
                verification.tolerance
            ),
            count => format!(
                "verified in {took}: {count} suspect(s), worst first in the Verify pane (Enter there selects the node)"
            ),
        });
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::dtype::Dtype;
    use crate::record::Tape;
    use crate::trace::validate;
    use crate::tui::{Action, Theme};

    #[test]
    fn a_big_trace_is_verified_after_its_message_is_drawn() {
        let mut tape = Tape::new("sine chain", Dtype::F64);
        let mut x = tape.param("x", 0.5);
        while tape.len() <= AT_ONCE {
            x = tape.sin(x);
        }
        let trace = validate(tape.finish(x)).unwrap();
        let mut app = App::new(&trace, "test", vec![Theme::default_theme()]);
        app.update(Action::Verify);
        assert!(
            app.has_pending() && app.checks.verification.is_none(),
            "nothing runs inside the key press"
        );
        assert_eq!(
            app.message
                .as_deref()
                .map(|m| m.starts_with(&format!("verifying {} nodes", AT_ONCE + 1))),
            Some(true)
        );
        app.run_pending();
        assert!(!app.has_pending());
        assert!(app.checks.verification.is_some());
        assert!(
            app.message
                .as_deref()
                .is_some_and(|m| m.starts_with("verified in"))
        );
        // A second press reruns rather than waiting forever.
        app.update(Action::Verify);
        assert!(app.has_pending());
    }
}
