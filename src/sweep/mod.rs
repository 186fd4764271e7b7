//! The reverse sweep as a steppable state machine: `step` processes the next
//! node of the reverse topological order, `back` undoes it bit-exactly, and
//! the adjoints, the ledger and the flags can be read at any point.

mod flags;
mod ledger;
pub mod masked;
mod pullback;
mod scalar;

pub use flags::{Flag, FlagKind};
pub use ledger::{Contribution, DEFAULT_BUDGET, INTERVAL, Ledger};
pub use masked::{Masked, Masking};
pub use pullback::{Pulled, accumulate, bad_partial, pull_back, push_forward};

use crate::control::{Cancelled, Control};
use crate::tensor::Value;
use crate::trace::{StepKind, Trace};
use ledger::{Checkpoint, Store, Stored};
use std::borrow::Cow;

/// Bytes a ledger entry holds that the sweep itself no longer does: the
/// before, and the value unless it is the first contribution (then it is the
/// after, which the input's adjoint holds).
fn stored_bytes(before: &Option<Value>, value: &Value) -> usize {
    match before {
        Some(before) => before.bytes() + value.bytes(),
        None => 0,
    }
}

/// Whether the sweep keeps its ledger.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LedgerMode {
    /// Keep every contribution; `back` pops the ledger.
    On,
    /// Keep nothing for a fast full sweep; `back` replays from the start.
    Off,
}

/// The state of one reverse sweep over a trace.
#[derive(Debug, Clone)]
pub struct Sweep<'t> {
    trace: &'t Trace,
    /// Number of steps done; `trace.sweep_order()[cursor]` is next.
    cursor: usize,
    /// The adjoint of every scalar node (unused for tensor nodes): a flat
    /// array, so the hot loop touches 8 bytes per edge and no enum tag. Each
    /// starts at −0.0, the additive identity of IEEE 754 arithmetic
    /// (−0 + x = x for every x, −0 and +0 included), so adding every
    /// contribution gives exactly what assigning the first one would, without
    /// a branch on "first or not" per edge. Whether a node has received
    /// anything yet follows from the cursor (see
    /// `Compact::first_contribution`), so it is never stored.
    scalar_adjoints: Vec<f64>,
    /// The adjoint of every tensor node so far (`None` for scalar nodes, and
    /// before a tensor node's first contribution); empty when the trace has
    /// no tensor node.
    tensor_adjoints: Vec<Option<Value>>,
    ledger: Option<Store>,
    flags: Vec<Flag>,
    /// Flags raised by the seed itself, before any step; never undone.
    seed_flags: usize,
}

impl<'t> Sweep<'t> {
    /// A sweep at its start: only the output holds an adjoint, the seed.
    /// With the ledger on, tensor befores are kept up to [`DEFAULT_BUDGET`]
    /// bytes (see [`Sweep::with_budget`]).
    pub fn new(trace: &'t Trace, mode: LedgerMode) -> Sweep<'t> {
        Sweep::start(trace, mode, DEFAULT_BUDGET)
    }

    /// A sweep with its ledger on, keeping at most `budget` bytes of tensor
    /// befores; beyond that it keeps checkpoints and undo replays from them.
    pub fn with_budget(trace: &'t Trace, budget: usize) -> Sweep<'t> {
        Sweep::start(trace, LedgerMode::On, budget)
    }

    fn start(trace: &'t Trace, mode: LedgerMode, budget: usize) -> Sweep<'t> {
        let mut scalar_adjoints = vec![-0.0; trace.nodes().len()];
        // Only tensor nodes use their slot: an all-scalar trace needs none.
        let has_tensors = !trace.compact().is_scalar.iter().all(|&scalar| scalar);
        let mut tensor_adjoints = if has_tensors {
            vec![None; trace.nodes().len()]
        } else {
            Vec::new()
        };
        // The seed has the output's shape (validated), so it goes where the output's adjoint lives.
        match trace.seed() {
            Value::Scalar(seed) if trace.compact().is_scalar[trace.output()] => {
                scalar_adjoints[trace.output()] = *seed
            }
            seed => tensor_adjoints[trace.output()] = Some(seed.clone()),
        }
        let ledger = (mode == LedgerMode::On)
            .then(|| Store::with_capacity(trace.compact().edge_input.len(), budget));
        let flags: Vec<Flag> =
            Flag::for_value(0, trace.output(), FlagKind::NonFiniteAdjoint, trace.seed())
                .into_iter()
                .collect();
        Sweep {
            trace,
            cursor: 0,
            scalar_adjoints,
            tensor_adjoints,
            ledger,
            seed_flags: flags.len(),
            flags,
        }
    }

    /// The trace being swept.
    pub fn trace(&self) -> &'t Trace {
        self.trace
    }

    /// Steps done so far.
    pub fn cursor(&self) -> usize {
        self.cursor
    }

    /// Total steps: the number of nodes that reach the output.
    pub fn len(&self) -> usize {
        self.trace.sweep_order().len()
    }

    /// True when the trace has no step (never: the output itself is one).
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// True when every step is done.
    pub fn is_done(&self) -> bool {
        self.cursor == self.len()
    }

    /// The node the next step will process.
    pub fn current(&self) -> Option<usize> {
        self.trace.sweep_order().get(self.cursor).copied()
    }

    /// The node the last step processed.
    pub fn last_done(&self) -> Option<usize> {
        self.cursor
            .checked_sub(1)
            .map(|step| self.trace.sweep_order()[step])
    }

    /// True when `node` has been processed: its adjoint is final and has been pulled back.
    pub fn is_finished(&self, node: usize) -> bool {
        self.trace
            .sweep_rank(node)
            .is_some_and(|rank| rank < self.cursor)
    }

    /// The adjoint of `node` so far; `None` before its first contribution.
    /// A tensor adjoint is borrowed; a scalar one is built from its slot.
    pub fn adjoint(&self, node: usize) -> Option<Cow<'_, Value>> {
        if !self.has_received(node) {
            return None;
        }
        if self.trace.compact().is_scalar[node] {
            Some(Cow::Owned(Value::Scalar(self.scalar_adjoints[node])))
        } else {
            self.tensor_adjoints[node].as_ref().map(Cow::Borrowed)
        }
    }

    /// True when `node` is the output or some step done so far sent it a contribution.
    fn has_received(&self, node: usize) -> bool {
        node == self.trace.output() || self.trace.compact().has_received(node, self.cursor)
    }

    /// Takes `node`'s adjoint out of its slot (a scalar's stays in place).
    fn take_slot(&mut self, node: usize) -> Option<Value> {
        if self.trace.compact().is_scalar[node] {
            Some(Value::Scalar(self.scalar_adjoints[node]))
        } else {
            self.tensor_adjoints[node].take()
        }
    }

    /// Puts `adjoint` in `node`'s slot; `None` empties it (−0.0 for a scalar).
    fn put_slot(&mut self, node: usize, adjoint: Option<Value>) {
        if self.trace.compact().is_scalar[node] {
            self.scalar_adjoints[node] = adjoint.map_or(-0.0, |adjoint| {
                adjoint
                    .as_scalar()
                    .expect("contributions to a scalar node are scalars")
            });
        } else {
            self.tensor_adjoints[node] = adjoint;
        }
    }

    /// The ledger, when on.
    pub fn ledger(&self) -> Option<Ledger<'_, 't>> {
        self.ledger.as_ref().map(|store| Ledger::new(self, store))
    }

    /// The flags raised so far, in the order raised.
    pub fn flags(&self) -> &[Flag] {
        &self.flags
    }

    /// The consumers of `node` that reach the output and have not been
    /// processed yet: the contributions still to come, in sweep order.
    pub fn pending_consumers(&self, node: usize) -> Vec<(usize, usize)> {
        let mut pending: Vec<(usize, usize)> = self
            .trace
            .consumers(node)
            .into_iter()
            .filter(|&(consumer, _)| {
                self.trace
                    .sweep_rank(consumer)
                    .is_some_and(|rank| rank >= self.cursor)
            })
            .collect();
        pending.sort_by_key(|&(consumer, _)| self.trace.sweep_rank(consumer));
        pending
    }

    /// Processes the next node: pulls its adjoint back along every input edge
    /// and adds each contribution to that input's adjoint. Returns the node,
    /// or `None` when the sweep is done.
    pub fn step(&mut self) -> Option<usize> {
        let node = self.current()?;
        self.run_until(self.cursor + 1);
        Some(node)
    }

    /// Runs steps until `end` are done (or the sweep is): the one driver of
    /// every step, taking runs of scalar steps through the hot loop.
    fn run_until(&mut self, end: usize) {
        let end = end.min(self.len());
        while self.cursor < end {
            if self.trace.compact().kind[self.cursor] == StepKind::General {
                self.step_general();
                self.cursor += 1;
            } else {
                self.run_scalar_steps(end);
            }
        }
    }

    /// One step of any node: recorded partials, tensors, structured ops.
    fn step_general(&mut self) {
        let (step, trace) = (self.cursor, self.trace);
        let compact = trace.compact();
        let node = trace.sweep_order()[step];
        let recorded = trace.node(node);
        if !compact.value_finite.is_finite(node, &recorded.value)
            && let Some(flag) =
                Flag::for_value(step, node, FlagKind::NonFiniteValue, &recorded.value)
        {
            self.flags.push(flag);
        }
        let keep = self.prepare_log(step);
        let adjoint = self
            .take_slot(node)
            .expect("a node's consumers are swept before it, so it holds an adjoint");
        let first_edge = compact.edges_of(step).start;
        for (slot, &input) in recorded.inputs.iter().enumerate() {
            // An input met earlier in this step (x·x) has received already.
            let received =
                compact.has_received(input, step) || recorded.inputs[..slot].contains(&input);
            let held = self.take_slot(input);
            let before = if received { held } else { None };
            let formed = pullback::form(trace, node, slot, &adjoint, before.as_ref());
            if let Some(bad) = formed.bad_partial {
                self.flags.push(Flag::partial(step, node, slot, bad));
            }
            if !formed.after_finite && before.as_ref().is_none_or(Value::is_finite) {
                self.flags
                    .extend(Flag::adjoint(step, node, slot, input, &formed.after));
            }
            if let Some(store) = self.ledger.as_mut() {
                store.held.push(f64::NAN);
                if keep {
                    store.bytes += stored_bytes(&before, &formed.contribution);
                    store.general.push(Stored {
                        edge: first_edge + slot,
                        value: formed.contribution,
                        before,
                        after: formed.after.clone(),
                    });
                }
            }
            self.put_slot(input, Some(formed.after));
        }
        self.put_slot(node, Some(adjoint));
    }

    /// Before a general step with the ledger on: whether its befores fit the
    /// budget; once they do not, a checkpoint every [`INTERVAL`] steps.
    fn prepare_log(&mut self, step: usize) -> bool {
        let Some(store) = self.ledger.as_mut() else {
            return false;
        };
        if store.spill.is_none() && store.bytes > store.budget {
            store.spill = Some(step);
        }
        let Some(spill) = store.spill else {
            return true;
        };
        let due = (step - spill).is_multiple_of(INTERVAL)
            && store.checkpoints.last().is_none_or(|last| last.step < step);
        if due {
            store.checkpoints.push(Checkpoint {
                step,
                scalar: self.scalar_adjoints.clone(),
                tensor: self.tensor_adjoints.clone(),
            });
        }
        false
    }

    /// Undoes the last step bit-exactly. Returns false at the start.
    pub fn back(&mut self) -> bool {
        if self.cursor == 0 {
            return false;
        }
        let target = self.cursor - 1;
        let Some(mut store) = self.ledger.take() else {
            self.restart();
            self.run_steps(target);
            return true;
        };
        if store.spilled(target) {
            self.ledger = Some(store);
            self.replay_to(target);
            return true;
        }
        // Below the budget again: what was spilled is no longer done.
        store.spill = None;
        store.checkpoints.clear();
        let compact = self.trace.compact();
        let edges = compact.edges_of(target);
        // Newest first, so an input met twice in the step (x·x) ends with
        // what it held before the first.
        if compact.kind[target] == StepKind::General {
            while store
                .general
                .last()
                .is_some_and(|stored| stored.edge >= edges.start)
            {
                let stored = store.general.pop().expect("checked above");
                store.bytes -= stored_bytes(&stored.before, &stored.value);
                self.put_slot(compact.edge_input[stored.edge] as usize, stored.before);
            }
        } else {
            for edge in edges.clone().rev() {
                self.scalar_adjoints[compact.edge_input[edge] as usize] = store.held[edge];
            }
        }
        store.held.truncate(edges.start);
        self.ledger = Some(store);
        self.cursor = target;
        self.drop_flags_from(target);
        true
    }

    /// Drops the flags raised at step `step` or later (the seed's stay).
    fn drop_flags_from(&mut self, step: usize) {
        while self.flags.len() > self.seed_flags
            && self.flags.last().is_some_and(|flag| flag.step >= step)
        {
            self.flags.pop();
        }
    }

    /// Goes back to `target` (in the spilled part of the sweep) by restoring
    /// the last checkpoint at or before it and replaying forward.
    fn replay_to(&mut self, target: usize) {
        let store = self
            .ledger
            .as_mut()
            .expect("replays happen with the ledger on");
        let at = store
            .checkpoints
            .partition_point(|checkpoint| checkpoint.step <= target);
        let checkpoint = store.checkpoints[at - 1].clone();
        store.checkpoints.truncate(at);
        let first_edge = self.trace.compact().edge_start[checkpoint.step] as usize;
        store.held.truncate(first_edge);
        self.scalar_adjoints = checkpoint.scalar;
        self.tensor_adjoints = checkpoint.tensor;
        self.cursor = checkpoint.step;
        self.drop_flags_from(checkpoint.step);
        self.run_until(target);
    }

    /// What input `slot` of step `step` (a spilled general step, done) held
    /// before its contribution: replayed on a scratch copy from the last
    /// checkpoint at or before the step.
    pub(in crate::sweep) fn spilled_before(
        &self,
        store: &Store,
        step: usize,
        slot: usize,
    ) -> Option<Value> {
        let at = store
            .checkpoints
            .partition_point(|checkpoint| checkpoint.step <= step);
        let checkpoint = &store.checkpoints[at - 1];
        let mut scratch = Sweep {
            trace: self.trace,
            cursor: checkpoint.step,
            scalar_adjoints: checkpoint.scalar.clone(),
            tensor_adjoints: checkpoint.tensor.clone(),
            ledger: None,
            flags: Vec::new(),
            seed_flags: 0,
        };
        scratch.run_until(step);
        let trace = self.trace;
        let node = trace.sweep_order()[step];
        let inputs = &trace.node(node).inputs;
        let input = inputs[slot];
        let adjoint = scratch
            .adjoint(node)
            .expect("a step's node holds its adjoint")
            .into_owned();
        let mut held = trace
            .compact()
            .has_received(input, step)
            .then(|| scratch.adjoint(input).map(std::borrow::Cow::into_owned))
            .flatten();
        for (earlier, _) in inputs[..slot]
            .iter()
            .enumerate()
            .filter(|&(_, &other)| other == input)
        {
            held = Some(pullback::form(trace, node, earlier, &adjoint, held.as_ref()).after);
        }
        held
    }

    /// Returns to the start, keeping the ledger mode and budget.
    pub fn restart(&mut self) {
        let budget = self.ledger.as_ref().map(|store| store.budget);
        *self = match budget {
            Some(budget) => Sweep::with_budget(self.trace, budget),
            None => Sweep::new(self.trace, LedgerMode::Off),
        };
    }

    /// Whether the ledger has spent its budget and keeps checkpoints, and
    /// the bytes of tensors it holds (an upper bound).
    pub fn ledger_usage(&self) -> Option<(bool, usize)> {
        self.ledger
            .as_ref()
            .map(|store| (store.spill.is_some(), store.held_bytes()))
    }

    /// Takes up to `count` steps; returns how many were taken.
    pub fn run_steps(&mut self, count: usize) -> usize {
        let start = self.cursor;
        self.run_until(start.saturating_add(count));
        self.cursor - start
    }

    /// Steps until `stop` holds after a step, or the sweep ends. Returns the
    /// number of steps taken.
    pub fn run_to(&mut self, mut stop: impl FnMut(&Sweep) -> bool) -> usize {
        let mut taken = 0;
        while self.step().is_some() {
            taken += 1;
            if stop(self) {
                break;
            }
        }
        taken
    }

    /// Steps until a new flag is raised or the sweep ends.
    pub fn run_to_next_flag(&mut self) -> usize {
        let seen = self.flags.len();
        self.run_to(|sweep| sweep.flags.len() > seen)
    }

    /// Runs every remaining step.
    pub fn run_to_end(&mut self) -> usize {
        let start = self.cursor;
        self.run_until(self.len());
        self.cursor - start
    }

    /// Runs every remaining step, reporting the fraction of steps done as
    /// `stage` and stopping between steps when `control` is cancelled (the
    /// sweep then stands where it stopped). Returns the number of steps taken.
    pub fn run_to_end_with(&mut self, control: &Control, stage: &str) -> Result<usize, Cancelled> {
        let (start, len) = (self.cursor, self.len());
        // Chunks of a thousandth of the sweep (at least one step), so a long
        // scalar chain keeps its fast path and a tensor step is never waited on
        // for longer than itself.
        let chunk = (len / 1000).max(1);
        while self.cursor < len {
            control.check()?;
            self.run_until(self.cursor.saturating_add(chunk));
            control.progress(stage, self.cursor as f64 / len as f64);
        }
        Ok(self.cursor - start)
    }

    /// Goes back or forward to exactly `cursor` steps done.
    pub fn seek(&mut self, cursor: usize) {
        let cursor = cursor.min(self.len());
        match &self.ledger {
            Some(store) if self.cursor > cursor => {
                // Beyond the budget, one replay to the spill point (or the
                // target) instead of one per step.
                if let Some(spill) = store.spill
                    && self.cursor > spill
                {
                    self.replay_to(cursor.max(spill));
                }
                while self.cursor > cursor {
                    self.back();
                }
            }
            None if self.cursor > cursor => self.restart(),
            _ => {}
        }
        self.run_steps(cursor - self.cursor);
    }
}
