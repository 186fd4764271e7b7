//! The session: what the view is looking at, apart from how it is shown —
//! the trace (as recorded, or a re-typed copy), the reverse sweep and its
//! tally, forward mode's tangent sweep, the diagnoses, the verification, the
//! forward-value survey and the selection with its walk history. It knows no
//! keys and no screen areas; what it says to the user names actions as
//! `{key:NAME}`, which the app fills in from the key map.

use super::diagnosis::{Diagnosed, Diagnoses, Row};
use super::forward::Forward;
use super::ids::{NodeIx, StepIx};
use super::neighbours::{EdgeRow, edges};
use super::precision::{Contrast, Traces};
use super::prompt::{matches, sorted_ids};
use super::symbols::flag_symbol;
use super::tally::Tally;
use super::watch::{Condition, Moment};
use super::work::{Survey, Verified};
use crate::dtype::Dtype;
use crate::stats::Summary;
use crate::sweep::{DEFAULT_BUDGET, Sweep};
use crate::tensor::Value;
use crate::trace::Trace;
use std::cell::OnceCell;
use std::collections::HashMap;
use std::sync::Arc;

/// What a change has to say: a line for the status line, if anything.
pub type Note = Option<String>;

/// Summaries of the selected node, computed when the selection or the sweep
/// moves, never per frame.
#[derive(Debug, Clone, Default)]
pub struct Detail {
    /// Summary of the forward value (tensors only).
    pub value: Option<Summary>,
    /// Summary of the adjoint so far (tensors only).
    pub adjoint: Option<Summary>,
    /// The node's input and consumer edges with their partials.
    pub edges: Vec<EdgeRow>,
    /// While the precision toggle is on: the adjoint against the recorded dtype's.
    pub contrast: Option<Contrast>,
    /// The node and sweep position these describe.
    key: Option<(NodeIx, usize)>,
}

/// The session.
pub struct Session<'t> {
    traces: &'t Arc<Traces>,
    trace: &'t Trace,
    sweep: Sweep<'t>,
    tally: Tally,
    compare: Option<Sweep<'t>>,
    pub(super) forward: Option<Forward<'t>>,
    diagnoses: Diagnoses,
    verified: Option<Verified>,
    survey: Option<Survey>,
    selected: NodeIx,
    pub(super) follow: bool,
    walk: Vec<NodeIx>,
    search: Option<String>,
    detail: Detail,
    value_summaries: HashMap<NodeIx, Summary>,
    by_id: OnceCell<Vec<usize>>,
    /// Bytes of tensor contributions each sweep's ledger keeps.
    ledger_budget: usize,
}

impl<'t> Session<'t> {
    /// Sweeps from here on keep at most `budget` bytes of tensor
    /// contributions in their ledgers (see [`Sweep::with_budget`]); the sweep
    /// in use starts again under it, at the same step.
    pub fn set_ledger_budget(&mut self, budget: usize) {
        self.ledger_budget = budget;
        let cursor = self.sweep.cursor();
        self.sweep = Sweep::with_budget(self.trace, budget);
        self.tally = Tally::new(&self.sweep);
        self.seek(StepIx::new(cursor));
    }

    /// A fresh sweep over the recorded trace, the output selected.
    pub fn new(traces: &'t Arc<Traces>) -> Session<'t> {
        let trace = traces.recorded();
        let sweep = Sweep::with_budget(trace, DEFAULT_BUDGET);
        let tally = Tally::new(&sweep);
        let mut session = Session {
            traces,
            trace,
            sweep,
            tally,
            compare: None,
            forward: None,
            diagnoses: Diagnoses::default(),
            verified: None,
            survey: None,
            selected: NodeIx::new(trace.output()),
            follow: true,
            walk: Vec::new(),
            search: None,
            detail: Detail::default(),
            value_summaries: HashMap::new(),
            by_id: OnceCell::new(),
            ledger_budget: DEFAULT_BUDGET,
        };
        session.refresh();
        session
    }

    /// The traces shared with the worker.
    pub fn traces(&self) -> &'t Arc<Traces> {
        self.traces
    }

    /// The trace being swept: the recorded one, or its copy in another dtype.
    pub fn trace(&self) -> &'t Trace {
        self.trace
    }

    /// The trace as recorded.
    pub fn recorded(&self) -> &'t Trace {
        self.traces.recorded()
    }

    /// The reverse sweep.
    pub fn sweep(&self) -> &Sweep<'t> {
        &self.sweep
    }

    /// Norms, group norms and flag marks at the sweep's position.
    pub fn tally(&self) -> &Tally {
        &self.tally
    }

    /// While the precision toggle is on: the sweep over the recorded trace, at the same step.
    pub fn compare(&self) -> Option<&Sweep<'t>> {
        self.compare.as_ref()
    }

    /// Forward mode's tangent sweep, while it is on.
    pub fn forward(&self) -> Option<&Forward<'t>> {
        self.forward.as_ref()
    }

    /// The diagnosis of the sweep on screen (in the view's dtype), once made.
    pub fn diagnosis(&self) -> Option<&Diagnosed> {
        self.diagnoses.get(self.trace.dtype())
    }

    /// The diagnosis made in `dtype`, if any.
    pub fn diagnosis_in(&self, dtype: Dtype) -> Option<&Diagnosed> {
        self.diagnoses.get(dtype)
    }

    /// The last verification, once made.
    pub fn verified(&self) -> Option<&Verified> {
        self.verified.as_ref()
    }

    /// The forward-value norms per group, once summarised.
    pub fn survey(&self) -> Option<&Survey> {
        self.survey.as_ref()
    }

    /// The selected node: the one Node, Inflow and Edges show.
    pub fn selected(&self) -> NodeIx {
        self.selected
    }

    /// Whether the selection follows the sweep's current node.
    pub fn follows(&self) -> bool {
        self.follow
    }

    /// The nodes walked from, most recent last.
    pub fn walk(&self) -> &[NodeIx] {
        &self.walk
    }

    /// The selected node's summaries and edges.
    pub fn detail(&self) -> &Detail {
        &self.detail
    }

    /// The node with id `id`.
    pub fn find(&self, id: &str) -> Option<NodeIx> {
        self.trace.find(id).map(NodeIx::new)
    }

    /// The id of `node`.
    pub fn id(&self, node: NodeIx) -> &'t str {
        &self.trace.node(node.index()).id
    }

    /// Node indices sorted by id, for the jump prompt (built on first use).
    pub fn by_id(&self) -> &[usize] {
        self.by_id.get_or_init(|| sorted_ids(self.trace))
    }

    /// Rows of Order: the sweep order, or every node in recording order in forward mode.
    pub fn order_len(&self) -> usize {
        if self.forward.is_some() {
            self.trace.nodes().len()
        } else {
            self.trace.sweep_order().len()
        }
    }

    /// The node on row `row` of Order.
    pub fn order_node(&self, row: usize) -> NodeIx {
        if self.forward.is_some() {
            NodeIx::new(row)
        } else {
            StepIx::new(row).node(self.trace)
        }
    }

    /// The row of `node` in Order, if listed.
    pub fn order_row(&self, node: NodeIx) -> Option<usize> {
        if self.forward.is_some() {
            Some(node.index())
        } else {
            node.step(self.trace).map(StepIx::position)
        }
    }

    /// The adjoint of `node` so far.
    pub fn adjoint(&self, node: NodeIx) -> Option<std::borrow::Cow<'_, Value>> {
        self.sweep.adjoint(node.index())
    }

    /// The next step of the reverse sweep.
    pub fn cursor(&self) -> StepIx {
        StepIx::new(self.sweep.cursor())
    }

    // ----- stepping -----

    /// Processes the next node (in forward mode, of the tangent sweep).
    pub fn step(&mut self) -> Note {
        if let Some(forward) = self.forward.as_mut() {
            let note = if forward.step() {
                forward.end_note()
            } else {
                Some("the tangent sweep is done ({key:back} steps back, {key:restart} restarts, {key:toggle_forward} returns to the reverse sweep)".to_string())
            };
            self.refresh();
            return note;
        }
        let note = (!self.advance()).then(|| {
            "the sweep is done: every adjoint is final ({key:back} steps back, {key:restart} restarts)"
                .to_string()
        });
        self.refresh();
        note
    }

    /// Undoes the last step exactly (in forward mode, of the tangent sweep).
    pub fn back(&mut self) -> Note {
        let moved = match self.forward.as_mut() {
            Some(forward) => forward.sweep.back(),
            None => self.retreat(),
        };
        self.refresh();
        (!moved).then(|| match self.forward {
            Some(_) => "at the start of the tangent sweep: no node has its tangent yet".to_string(),
            None => "at the start: only the output holds its seed".to_string(),
        })
    }

    /// Runs to the end (in forward mode, of the tangent sweep).
    pub fn run_to_end(&mut self) -> Note {
        let note = match self.forward.as_mut() {
            Some(forward) => {
                while forward.step() {}
                forward.end_note()
            }
            None => {
                while self.advance() {}
                None
            }
        };
        self.refresh();
        note
    }

    /// Back to the start (in forward mode, of the tangent sweep).
    pub fn restart(&mut self) {
        match self.forward.as_mut() {
            Some(forward) => forward.seek(0),
            None => {
                self.sweep.restart();
                self.tally.reset(&self.sweep);
            }
        }
        self.follow = true;
        self.refresh();
    }

    /// Steps forward or back until `step` is the next one.
    pub fn seek(&mut self, step: StepIx) {
        let target = step.position();
        while self.sweep.cursor() > target && self.retreat() {}
        while self.sweep.cursor() < target && self.advance() {}
        self.refresh();
    }

    /// Forward mode: runs the tangent sweep up to `node` and selects it.
    pub fn seek_tangent(&mut self, node: NodeIx) {
        if let Some(forward) = self.forward.as_mut() {
            forward.seek(node.index());
        }
        self.select(node);
    }

    /// Runs until a flag is raised or a step with a diagnosis finding (or
    /// origin) is done, whichever comes first, and selects its node.
    pub fn run_to_flag(&mut self) -> Note {
        if self.forward.is_some() {
            return Some(
                "flags belong to the reverse sweep: {key:toggle_forward} returns to it".to_string(),
            );
        }
        let seen = self.sweep.flags().len();
        let cursor = self.sweep.cursor();
        let finding = self.diagnosis().and_then(|diagnosed| {
            diagnosed
                .rows
                .iter()
                .map(|&row| (diagnosed.row_step(row), row))
                .find(|&(step, _)| step >= cursor)
        });
        let stop = finding.map(|(step, _)| step + 1);
        while self.sweep.flags().len() == seen
            && stop.is_none_or(|stop| self.sweep.cursor() < stop)
            && self.advance()
        {}
        let note = if let Some(flag) = self.sweep.flags().get(seen).cloned() {
            self.select(NodeIx::new(flag.node));
            Some(format!(
                "{} {} at '{}' (step {})",
                flag_symbol(flag.kind),
                flag.kind.name(),
                self.trace.node(flag.node).id,
                flag.step + 1
            ))
        } else if let Some((step, row)) = finding.filter(|_| self.sweep.cursor() > cursor)
            && self.sweep.cursor() == step + 1
        {
            let diagnosed = self.diagnosis().expect("a finding came from it");
            let node = diagnosed.row_node(row);
            let text = diagnosed.row_text(self.trace, row);
            self.select(NodeIx::new(node));
            Some(format!("step {}: {text}", step + 1))
        } else {
            let more = if self.diagnosis().is_none() {
                " (no diagnosis yet: {key:diagnose} runs it, and then this stops at its findings too)"
            } else {
                ""
            };
            Some(format!(
                "no further flag or finding: the sweep ran to the end{more}"
            ))
        };
        self.refresh();
        note
    }

    /// Runs until `condition` holds after a step (or at the end), and selects
    /// the node that step processed.
    pub fn run_until(&mut self, condition: &Condition, text: &str) -> Note {
        if self.forward.is_some() {
            return Some(
                "a watch runs the reverse sweep: {key:toggle_forward} returns to it".to_string(),
            );
        }
        let note = loop {
            let flags = self.sweep.flags().len();
            let step = self.sweep.cursor();
            if !self.advance() {
                break format!("'{text}' never held: the sweep ran to the end");
            }
            let done = self.trace.sweep_order()[step];
            let moment = Moment {
                trace: self.trace,
                done,
                norm: self.tally.norm(done),
                next: self.sweep.current(),
                non_finite: self.sweep.flags()[flags..]
                    .iter()
                    .any(|flag| flag.kind == crate::sweep::FlagKind::NonFiniteAdjoint)
                    || self.tally.norm(done).is_some_and(|norm| !norm.is_finite()),
            };
            if condition.holds(&moment) {
                self.select(NodeIx::new(done));
                break format!(
                    "'{text}' holds after step {} ('{}')",
                    step + 1,
                    self.trace.node(done).id
                );
            }
        };
        self.refresh();
        Some(note)
    }

    /// Takes one step of the reverse sweep, keeping the tally in line. False when done.
    fn advance(&mut self) -> bool {
        let step = self.sweep.cursor();
        if self.sweep.step().is_none() {
            return false;
        }
        self.tally.stepped(&self.sweep, step);
        true
    }

    /// Undoes one step, keeping the tally in line. False at the start.
    fn retreat(&mut self) -> bool {
        let Some(node) = self.sweep.last_done() else {
            return false;
        };
        let step = self.sweep.cursor() - 1;
        let receivers: Vec<usize> = self
            .sweep
            .ledger()
            .map(|ledger| {
                ledger
                    .step_entries(step)
                    .iter()
                    .map(|entry| entry.input)
                    .collect()
            })
            .unwrap_or_default();
        self.sweep.back();
        self.tally.stepped_back(&self.sweep, node, &receivers);
        true
    }

    // ----- selection -----

    /// Selects `node` without walking; the selection stops following the sweep.
    pub fn select(&mut self, node: NodeIx) {
        self.follow = false;
        self.selected = node;
        self.refresh();
    }

    /// Selects `node` from a jump, search or list: the old selection goes onto the walk history.
    pub fn jump(&mut self, node: NodeIx) {
        if node != self.selected {
            self.walk.push(self.selected);
        }
        self.select(node);
    }

    /// Goes back to the node selected before the last jump.
    pub fn walk_back(&mut self) -> Note {
        match self.walk.pop() {
            Some(node) => {
                self.select(node);
                None
            }
            None => Some(
                "the walk history is empty: jumps, {key:enter} on a row and searches fill it"
                    .to_string(),
            ),
        }
    }

    /// Selects the current node and follows the sweep from now on.
    pub fn follow_current(&mut self) {
        self.follow = true;
        self.refresh();
    }

    /// Jumps to the node with id `id`.
    pub fn jump_to_id(&mut self, id: &str) -> Note {
        match self.find(id) {
            Some(node) => {
                self.jump(node);
                None
            }
            None => Some(format!(
                "no node has the id '{id}' ({{key:complete}} completes ids)"
            )),
        }
    }

    /// Searches the sweep order for `query` (id, op or group) after the
    /// selection (`forward`) or before it, and jumps there; `None` repeats the last search.
    pub fn search(&mut self, query: Option<&str>, forward: bool) -> Note {
        if let Some(query) = query {
            self.search = (!query.is_empty()).then(|| query.to_string());
        }
        let Some(query) = self.search.clone() else {
            return Some("no search yet: {key:open_search} starts one".to_string());
        };
        let order = self.trace.sweep_order();
        let start = self.trace.sweep_rank(self.selected.index()).unwrap_or(0);
        let len = order.len();
        let found = (1..=len)
            .map(|offset| {
                if forward {
                    (start + offset) % len
                } else {
                    (start + len - offset) % len
                }
            })
            .find(|&rank| matches(self.trace, order[rank], &query));
        match found {
            Some(rank) => {
                self.jump(NodeIx::new(order[rank]));
                Some(format!("'{query}': step {} of {len}", rank + 1))
            }
            None => Some(format!("nothing in the sweep matches '{query}'")),
        }
    }

    /// Selects the origin behind the selected node, else the first origin.
    pub fn jump_to_origin(&mut self) -> Note {
        let Some(diagnosed) = self.diagnosis() else {
            return Some("no diagnosis yet: {key:diagnose} runs it".to_string());
        };
        let origin = diagnosed
            .origin_for(self.selected.index())
            .or(diagnosed.diagnosis.first_origin());
        match origin {
            Some(origin) => {
                let (node, letter) = (origin.node, origin.class.letter());
                let text = format!(
                    "origin ({letter}) at '{}': {}",
                    self.trace.node(node).id,
                    origin.explanation
                );
                self.jump(NodeIx::new(node));
                Some(text)
            }
            None => Some(format!(
                "every adjoint is finite in {}: no origin to trace back",
                self.trace.dtype()
            )),
        }
    }

    // ----- results from the worker -----

    /// Keeps a diagnosis; says what it found when it is the recorded
    /// trace's and on screen (a re-typed copy's arrives after the precision
    /// toggle has said what changes, which stays on the status line).
    pub fn diagnosed(&mut self, diagnosed: Diagnosed) -> Note {
        let dtype = diagnosed.diagnosis.dtype;
        self.diagnoses.insert(diagnosed);
        self.refresh();
        (dtype == self.trace.dtype() && dtype == self.recorded().dtype())
            .then(|| diagnosis_message(self.trace, self.diagnosis().expect("just kept")))
    }

    /// Keeps a verification.
    pub fn keep_verification(&mut self, verified: Verified) -> Note {
        let verification = &verified.verification;
        let took = format!("{:.2} s", verified.seconds);
        let note = match verification.suspects.len() {
            0 if !verification.agrees() => format!(
                "verified in {took}: cannot judge: values are NaN or infinite, and NaN never agrees with anything"
            ),
            0 => format!(
                "verified in {took}: every check agrees within {:e}",
                verification.tolerance
            ),
            count => format!(
                "verified in {took}: {count} suspect(s), worst first in Verify ({{key:enter}} there selects the node)"
            ),
        };
        self.verified = Some(verified);
        Some(note)
    }

    /// Keeps the forward-value survey.
    pub fn surveyed(&mut self, survey: Survey) {
        self.survey = Some(survey);
    }

    /// Whether the trace in `dtype` exists (the precision toggle can switch at once).
    pub fn has_dtype(&self, dtype: Dtype) -> bool {
        self.traces.has(dtype)
    }

    /// Sweeps the trace in `dtype` (made already) up to the same step.
    pub fn switch_dtype(&mut self, dtype: Dtype) -> Note {
        // The tangent sweep runs over the trace it was started on: forward mode ends here.
        let left_forward = self.forward.take().is_some();
        let cursor = self.sweep.cursor();
        self.trace = self.traces.get(dtype);
        self.sweep = Sweep::with_budget(self.trace, self.ledger_budget);
        self.tally = Tally::new(&self.sweep);
        self.value_summaries.clear();
        self.detail = Detail::default();
        self.by_id = OnceCell::new();
        let recorded = self.recorded();
        self.compare =
            (dtype != recorded.dtype()).then(|| Sweep::with_budget(recorded, self.ledger_budget));
        self.seek(StepIx::new(cursor));
        let note = if left_forward {
            "; forward mode ended ({key:toggle_forward} starts it again)"
        } else {
            ""
        };
        Some(self.precision_message() + note)
    }

    /// What changes in the view's dtype, from the recorded trace's replay against f64.
    fn precision_message(&self) -> String {
        let (dtype, recorded) = (self.trace.dtype(), self.recorded().dtype());
        if dtype == recorded {
            return format!("back to the recorded dtype {dtype}");
        }
        let Some(run) = self
            .diagnoses
            .get(recorded)
            .and_then(|diagnosed| diagnosed.diagnosis.replay_in(dtype))
        else {
            return format!(
                "swept in {dtype}, sums accumulated in {} (recorded {recorded}); {{key:diagnose}} diagnoses it",
                self.trace.accumulate()
            );
        };
        let id = |node: usize| self.trace.node(node).id.as_str();
        let at = |finding: Option<&crate::diagnose::Finding>| {
            finding.map_or("none".to_string(), |finding| {
                format!("'{}' step {}", id(finding.node), finding.step + 1)
            })
        };
        let lost = run.first_lost().map_or("none".to_string(), |lost| {
            format!("'{}' step {}", id(lost.node), lost.step + 1)
        });
        format!(
            "{dtype} (sums in {}) vs f64: first overflow {} · underflow {} · lost contribution {lost}",
            run.accumulate,
            at(run.first_overflow()),
            at(run.first_underflow())
        )
    }

    /// Brings the selection in line with the sweep and recomputes what
    /// depends on the selected node or on the sweep's position.
    pub(super) fn refresh(&mut self) {
        if self.follow {
            let node = match &self.forward {
                Some(forward) => forward.current().or(forward.last_done()),
                None => self.sweep.current().or(self.sweep.last_done()),
            };
            self.selected = NodeIx::new(node.unwrap_or(self.trace.output()));
        }
        let node = self.selected;
        let cursor = self.sweep.cursor();
        if let Some(compare) = &mut self.compare {
            compare.seek(cursor);
        }
        let moved_node = self.detail.key.map(|(shown, _)| shown) != Some(node);
        if moved_node {
            let value = &self.trace.node(node.index()).value;
            let dtype = self.trace.node_dtype(node.index());
            self.detail.value = match value {
                Value::Tensor(_) => Some(
                    *self
                        .value_summaries
                        .entry(node)
                        .or_insert_with(|| value.summary(dtype)),
                ),
                Value::Scalar(_) => None,
            };
            self.detail.edges = edges(self.trace, node.index());
        }
        if self.detail.key != Some((node, cursor)) {
            let dtype = self.trace.node_dtype(node.index());
            self.detail.adjoint = match self.sweep.adjoint(node.index()).as_deref() {
                Some(adjoint @ Value::Tensor(_)) => Some(adjoint.summary(dtype)),
                _ => None,
            };
            self.detail.contrast = match (
                self.sweep.adjoint(node.index()),
                self.compare
                    .as_ref()
                    .and_then(|compare| compare.adjoint(node.index())),
            ) {
                (Some(here), Some(recorded)) => Some(Contrast::of(&here, &recorded)),
                _ => None,
            };
        }
        self.detail.key = Some((node, cursor));
    }
}

/// What the diagnosis found, in one line for the status line.
pub fn diagnosis_message(trace: &Trace, diagnosed: &Diagnosed) -> String {
    let diagnosis = &diagnosed.diagnosis;
    if let Some(origin) = diagnosis.first_origin() {
        let more = diagnosis.origins.len() - 1;
        let more = if more > 0 {
            format!(" (+{more} more)")
        } else {
            String::new()
        };
        return format!(
            "diagnosis: origin ({}) {} at '{}'{more}; {{key:jump_to_origin}} jumps to it",
            origin.class.letter(),
            origin.class.title(),
            trace.node(origin.node).id
        );
    }
    if diagnosis.is_clean() {
        return format!("diagnosis: clean, no rule fired in {}", diagnosis.dtype);
    }
    let mut rules: Vec<String> = diagnosed
        .rows
        .iter()
        .filter_map(|&row| match row {
            Row::Finding(at) => {
                Some(super::diagnosis::rule_label(diagnosed.finding(at).rule).to_string())
            }
            Row::Origin(_) => None,
        })
        .collect();
    rules.sort();
    rules.dedup();
    format!(
        "diagnosis: every adjoint finite; {} findings ({}) in Flags, paths in Paths; {{key:run_to_flag}} runs to the next",
        diagnosed.rows.len(),
        rules.join(", ")
    )
}
