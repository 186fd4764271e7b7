//! The reverse sweep as a steppable state machine: `step` processes the next
//! node of the reverse topological order, `back` undoes it bit-exactly, and
//! the adjoints, the ledger and the flags can be read at any point.

mod flags;
mod ledger;
mod pullback;

pub use flags::{Flag, FlagKind};
pub use ledger::{Contribution, Ledger};
pub use pullback::{Pulled, accumulate, pull_back, push_forward};

use crate::dtype::Subnormals;
use crate::tensor::Value;
use crate::trace::Trace;

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
    /// Each node's adjoint slot. A scalar node's slot always holds a scalar,
    /// −0.0 until its first contribution: −0.0 is the additive identity of
    /// IEEE 754 arithmetic (−0 + x = x for every x, −0 and +0 included), so
    /// adding every contribution gives exactly what assigning the first one
    /// would, without a branch on "first or not" per edge.
    adjoints: Vec<Option<Value>>,
    /// Whether the node has received its first contribution (or is the output).
    received: Vec<bool>,
    ledger: Option<Ledger>,
    flags: Vec<Flag>,
    /// Flags raised by the seed itself, before any step; never undone.
    seed_flags: usize,
}

impl<'t> Sweep<'t> {
    /// A sweep at its start: only the output holds an adjoint, the seed.
    pub fn new(trace: &'t Trace, mode: LedgerMode) -> Sweep<'t> {
        let mut adjoints: Vec<Option<Value>> = (0..trace.nodes().len())
            .map(|node| empty_slot(trace, node))
            .collect();
        let mut received = vec![false; trace.nodes().len()];
        adjoints[trace.output()] = Some(trace.seed().clone());
        received[trace.output()] = true;
        let ledger = (mode == LedgerMode::On).then(|| Ledger::new(trace.nodes().len()));
        let flags: Vec<Flag> =
            Flag::for_value(0, trace.output(), FlagKind::NonFiniteAdjoint, trace.seed())
                .into_iter()
                .collect();
        Sweep {
            trace,
            cursor: 0,
            adjoints,
            received,
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
    pub fn adjoint(&self, node: usize) -> Option<&Value> {
        if self.received[node] {
            self.adjoints[node].as_ref()
        } else {
            None
        }
    }

    /// The ledger, when on.
    pub fn ledger(&self) -> Option<&Ledger> {
        self.ledger.as_ref()
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
        if let Some(ledger) = &mut self.ledger {
            ledger.begin_step();
        }
        self.process(node);
        self.cursor += 1;
        Some(node)
    }

    /// Pulls `node`'s adjoint back along its edges: the fast path for scalar
    /// nodes of elementwise ops, the general one for everything else.
    fn process(&mut self, node: usize) {
        match self.adjoints[node] {
            Some(Value::Scalar(adjoint)) if self.trace.compact().fast[node] => {
                self.step_scalar(node, adjoint)
            }
            _ => self.step_general(node),
        }
    }

    /// The fast path for a scalar node of an elementwise op: reads only the
    /// trace's compact arrays and allocates nothing (but the ledger entries).
    fn step_scalar(&mut self, node: usize, adjoint: f64) {
        let (step, trace) = (self.cursor, self.trace);
        let (compact, dtype) = (trace.compact(), trace.dtype());
        let output = compact.scalars[node];
        if !output.is_finite() {
            self.flags.extend(Flag::for_value(
                step,
                node,
                FlagKind::NonFiniteValue,
                &Value::Scalar(output),
            ));
        }
        let (inputs, partials) = (compact.inputs_of(node), compact.partials_of(node));
        // Flush-to-zero applies to every stored result: the contribution and the sum.
        let flush = trace.subnormals() == Subnormals::Flush;
        for (slot, (&input, &partial)) in inputs.iter().zip(partials).enumerate() {
            let mut contribution = dtype.round(adjoint * partial);
            if flush {
                contribution = dtype.flush(contribution);
            }
            if !partial.is_finite() {
                self.flag_partial(step, node, slot, partial);
            }
            let input = input as usize;
            let Some(Value::Scalar(sum)) = &mut self.adjoints[input] else {
                unreachable!("a scalar node's slot holds a scalar")
            };
            let held = *sum;
            // Before the first contribution `held` is −0.0, and −0.0 + c = c exactly.
            let mut after = dtype.round(held + contribution);
            if flush {
                after = dtype.flush(after);
            }
            *sum = after;
            let before = std::mem::replace(&mut self.received[input], true).then_some(held);
            if !after.is_finite() {
                self.note_adjoint(
                    step,
                    node,
                    slot,
                    input,
                    before.map(Value::Scalar).as_ref(),
                    &Value::Scalar(after),
                );
            }
            if let Some(ledger) = &mut self.ledger {
                let (value, before, after) = (
                    Value::Scalar(contribution),
                    before.map(Value::Scalar),
                    Value::Scalar(after),
                );
                ledger.record(Contribution {
                    step,
                    consumer: node,
                    input,
                    slot,
                    value,
                    before,
                    after,
                    previous: 0,
                });
            }
        }
    }

    /// Any node: recorded partials, tensors, structured ops.
    fn step_general(&mut self, node: usize) {
        let (step, trace) = (self.cursor, self.trace);
        let dtype = trace.dtype();
        let recorded = trace.node(node);
        if let Some(flag) = Flag::for_value(step, node, FlagKind::NonFiniteValue, &recorded.value) {
            self.flags.push(flag);
        }
        let adjoint = self.adjoints[node]
            .take()
            .expect("a node's consumers are swept before it, so it holds an adjoint");
        let flush = trace.subnormals() == Subnormals::Flush;
        for (slot, &input) in recorded.inputs.iter().enumerate() {
            let mut pulled = pull_back(trace, node, slot, &adjoint);
            if flush {
                pulled
                    .contribution
                    .data_mut()
                    .iter_mut()
                    .for_each(|x| *x = dtype.flush(*x));
            }
            if let Some(bad) = pulled.bad_partial {
                self.flag_partial(step, node, slot, bad);
            }
            let before = if self.received[input] {
                self.adjoints[input].take()
            } else {
                None
            };
            self.received[input] = true;
            let mut after = accumulate(before.as_ref(), &pulled.contribution, dtype);
            if flush {
                after
                    .data_mut()
                    .iter_mut()
                    .for_each(|x| *x = dtype.flush(*x));
            }
            self.note_adjoint(step, node, slot, input, before.as_ref(), &after);
            match &mut self.ledger {
                Some(ledger) => {
                    self.adjoints[input] = Some(after.clone());
                    ledger.record(Contribution {
                        step,
                        consumer: node,
                        input,
                        slot,
                        value: pulled.contribution,
                        before,
                        after,
                        previous: 0,
                    });
                }
                None => self.adjoints[input] = Some(after),
            }
        }
        self.adjoints[node] = Some(adjoint);
    }

    fn flag_partial(&mut self, step: usize, node: usize, slot: usize, value: f64) {
        self.flags.push(Flag {
            step,
            node,
            kind: FlagKind::NonFinitePartial,
            slot: Some(slot),
            from: None,
            element: 0,
            value,
            count: 1,
        });
    }

    /// Flags an adjoint that a contribution from `consumer` made non-finite.
    fn note_adjoint(
        &mut self,
        step: usize,
        consumer: usize,
        slot: usize,
        input: usize,
        before: Option<&Value>,
        after: &Value,
    ) {
        if after.is_finite() || !before.is_none_or(Value::is_finite) {
            return;
        }
        if let Some(mut flag) = Flag::for_value(step, input, FlagKind::NonFiniteAdjoint, after) {
            flag.slot = Some(slot);
            flag.from = Some(consumer);
            self.flags.push(flag);
        }
    }

    /// Undoes the last step bit-exactly. Returns false at the start.
    pub fn back(&mut self) -> bool {
        if self.cursor == 0 {
            return false;
        }
        let target = self.cursor - 1;
        match &mut self.ledger {
            Some(ledger) => {
                let (adjoints, received, trace) =
                    (&mut self.adjoints, &mut self.received, self.trace);
                ledger.pop_step(|entry| {
                    received[entry.input] = entry.before.is_some();
                    adjoints[entry.input] = entry.before.or_else(|| empty_slot(trace, entry.input));
                });
                self.cursor = target;
                while self.flags.len() > self.seed_flags
                    && self.flags.last().is_some_and(|flag| flag.step >= target)
                {
                    self.flags.pop();
                }
            }
            None => {
                self.restart();
                self.run_steps(target);
            }
        }
        true
    }

    /// Returns to the start, keeping the ledger mode.
    pub fn restart(&mut self) {
        let mode = if self.ledger.is_some() {
            LedgerMode::On
        } else {
            LedgerMode::Off
        };
        *self = Sweep::new(self.trace, mode);
    }

    /// Takes up to `count` steps; returns how many were taken.
    pub fn run_steps(&mut self, count: usize) -> usize {
        (0..count).take_while(|_| self.step().is_some()).count()
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
        if self.ledger.is_some() {
            return self.run_to(|_| false);
        }
        // The same steps without the per-step bookkeeping of `run_to`: a full
        // sweep with the ledger off is the engine's hot loop.
        let order = self.trace.sweep_order();
        while let Some(&node) = order.get(self.cursor) {
            self.process(node);
            self.cursor += 1;
        }
        self.cursor - start
    }

    /// Goes back or forward to exactly `cursor` steps done.
    pub fn seek(&mut self, cursor: usize) {
        let cursor = cursor.min(self.len());
        if self.ledger.is_some() {
            while self.cursor > cursor {
                self.back();
            }
        } else if self.cursor > cursor {
            self.restart();
        }
        self.run_steps(cursor - self.cursor);
    }
}

/// A node's adjoint slot before any contribution: −0.0 for a scalar node
/// (see `Sweep::adjoints`), nothing for a tensor node.
fn empty_slot(trace: &Trace, node: usize) -> Option<Value> {
    match trace.node(node).value {
        Value::Scalar(_) => Some(Value::Scalar(-0.0)),
        Value::Tensor(_) => None,
    }
}
