//! The ledger: every contribution in the order it was made, so a branch
//! point's adjoint can be watched filling up. It doubles as the undo log.
//!
//! It is cheap enough to keep on for a million-node trace, and for a network
//! at real size. A scalar contribution stores one number, the adjoint its
//! receiver held before; everything else is derived: which edge (the trace
//! fixes each step's edges), the value added (the consumer's adjoint is
//! final once its step runs, and pulling it back again through the same
//! partial with the same rounding gives the same bits) and the sum after. A
//! tensor contribution keeps the value, the before and the after as shared
//! references to the elements the sweep made anyway (a first contribution is
//! its own after; an after is the next contribution's before), so only a
//! branch point's sums cost memory.
//!
//! Tensor entries are kept while they fit a memory budget. Beyond it the
//! ledger keeps a checkpoint of every adjoint every [`INTERVAL`] steps
//! instead (tensors shared, not copied), and undo restores the nearest
//! checkpoint and replays forward: the same bits, since every step is
//! deterministic.

use super::Sweep;
use super::scalar::Rounding;
use crate::tensor::Value;
use crate::trace::{Compact, StepKind};

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
}

/// The default most bytes of tensor befores a ledger keeps (512 MiB).
pub const DEFAULT_BUDGET: usize = 512 << 20;

/// Steps between checkpoints once the budget is spent: each undo beyond the
/// budget replays at most this many steps.
pub const INTERVAL: usize = 16;

/// A contribution of a general (tensor, structured or recorded-partial)
/// step, its elements shared with the sweep's.
#[derive(Debug, Clone, PartialEq)]
pub(super) struct Stored {
    /// The edge's index in the trace's sweep-order edge list.
    pub edge: usize,
    pub value: Value,
    /// The receiver's adjoint before (`None`: its first contribution).
    pub before: Option<Value>,
    pub after: Value,
}

/// Every adjoint just before step `step`.
#[derive(Debug, Clone, PartialEq)]
pub(super) struct Checkpoint {
    pub step: usize,
    pub scalar: Vec<f64>,
    pub tensor: Vec<Option<Value>>,
}

/// What the sweep writes as it goes.
#[derive(Debug, Clone, PartialEq)]
pub(super) struct Store {
    /// For every edge done, in sweep order, the scalar adjoint its receiver
    /// held before the contribution (NaN, unused, on edges of general steps).
    pub held: Vec<f64>,
    /// The contributions of general steps, in order, for the steps before `spill`.
    pub general: Vec<Stored>,
    /// Bytes of tensor elements `general` holds that the sweep no longer
    /// does: the befores, and the values that are not their own after.
    pub bytes: usize,
    /// Most bytes `general` may hold.
    pub budget: usize,
    /// The first step done after the budget was spent: from here on the
    /// ledger keeps checkpoints, not befores.
    pub spill: Option<usize>,
    /// Checkpoints at `spill`, `spill + INTERVAL`, ..., in order.
    pub checkpoints: Vec<Checkpoint>,
}

impl Store {
    /// Room for every edge of the sweep, reserved once: the trace fixes how
    /// many contributions a full sweep makes.
    pub(super) fn with_capacity(edges: usize, budget: usize) -> Store {
        Store {
            held: Vec::with_capacity(edges),
            general: Vec::new(),
            bytes: 0,
            budget,
            spill: None,
            checkpoints: Vec::new(),
        }
    }

    /// True when `step`'s befores were not kept.
    pub(super) fn spilled(&self, step: usize) -> bool {
        self.spill.is_some_and(|spill| step >= spill)
    }

    /// Bytes of tensor elements the ledger holds: befores, and checkpointed
    /// tensors (counted as if unshared, so this is an upper bound).
    pub fn held_bytes(&self) -> usize {
        self.bytes
            + self
                .checkpoints
                .iter()
                .map(|checkpoint| checkpoint.scalar.len() * 8)
                .sum::<usize>()
    }
}

/// A read-only view of a sweep's ledger.
#[derive(Debug, Clone, Copy)]
pub struct Ledger<'s, 't> {
    sweep: &'s Sweep<'t>,
    store: &'s Store,
    /// The trace's hot arrays and rounding, looked up once per view.
    compact: &'t Compact,
    rounding: Rounding,
}

impl<'s, 't> Ledger<'s, 't> {
    pub(super) fn new(sweep: &'s Sweep<'t>, store: &'s Store) -> Ledger<'s, 't> {
        Ledger {
            sweep,
            store,
            compact: sweep.trace().compact(),
            rounding: Rounding::of(sweep.trace()),
        }
    }

    /// Number of contributions made so far.
    pub fn len(&self) -> usize {
        self.store.held.len()
    }

    /// True before the first contribution.
    pub fn is_empty(&self) -> bool {
        self.store.held.is_empty()
    }

    /// Contribution number `index` (in the order made), if made.
    pub fn entry(&self, index: usize) -> Option<Contribution> {
        (index < self.len()).then(|| self.at(self.step_of(index), index))
    }

    /// Every contribution in the order made.
    pub fn entries(&self) -> impl ExactSizeIterator<Item = Contribution> + '_ {
        let compact = self.compact;
        let mut step = 0;
        (0..self.len()).map(move |edge| {
            // Edges run step after step: move on past steps whose edges are used up.
            while compact.edge_start[step + 1] as usize <= edge {
                step += 1;
            }
            self.at(step, edge)
        })
    }

    /// The contributions made by step `step` (none if it is not done).
    pub fn step_entries(&self, step: usize) -> Vec<Contribution> {
        if step >= self.sweep.cursor() {
            return Vec::new();
        }
        self.compact
            .edges_of(step)
            .map(|edge| self.at(step, edge))
            .collect()
    }

    /// The contributions `node` has received so far, oldest first.
    pub fn received(&self, node: usize) -> Vec<Contribution> {
        let (trace, compact) = (self.sweep.trace(), self.compact);
        let mut edges: Vec<usize> = trace
            .consumers(node)
            .into_iter()
            .filter_map(|(consumer, slot)| {
                let step = trace.sweep_rank(consumer)?;
                (step < self.sweep.cursor()).then(|| compact.edges_of(step).start + slot)
            })
            .collect();
        edges.sort_unstable();
        edges
            .into_iter()
            .map(|edge| self.at(self.step_of(edge), edge))
            .collect()
    }

    /// The step whose edge range holds `edge`: the last start at or before it.
    fn step_of(&self, edge: usize) -> usize {
        let starts = &self.compact.edge_start;
        starts.partition_point(|&start| start as usize <= edge) - 1
    }

    /// The contribution on sweep-order edge `edge` of step `step`, which must be done.
    #[inline]
    fn at(&self, step: usize, edge: usize) -> Contribution {
        let compact = self.compact;
        let consumer = self.sweep.trace().sweep_order()[step];
        let slot = edge - compact.edges_of(step).start;
        let input = compact.edge_input[edge] as usize;
        if compact.kind[step] == StepKind::General {
            if !self.store.spilled(step) {
                let index = self
                    .store
                    .general
                    .binary_search_by_key(&edge, |stored| stored.edge)
                    .expect("every edge of a general step done before the budget is stored");
                let stored = &self.store.general[index];
                return Contribution {
                    step,
                    consumer,
                    input,
                    slot,
                    value: stored.value.clone(),
                    before: stored.before.clone(),
                    after: stored.after.clone(),
                };
            }
            // Beyond the budget: re-derived through the sweep's own code.
            let before = self.sweep.spilled_before(self.store, step, slot);
            let adjoint = self
                .sweep
                .adjoint(consumer)
                .expect("a step's node holds its adjoint");
            let formed = super::pullback::form(
                self.sweep.trace(),
                consumer,
                slot,
                &adjoint,
                before.as_ref(),
            );
            return Contribution {
                step,
                consumer,
                input,
                slot,
                value: formed.contribution,
                before,
                after: formed.after,
            };
        }
        let adjoint = self.sweep.scalar_adjoints[consumer];
        let rounding = self.rounding;
        let held = self.store.held[edge];
        let value = rounding.apply(adjoint * compact.edge_partial[edge]);
        let after = rounding.apply(held + value);
        // First unless an earlier step, or an earlier edge of this one (x·x), sent one.
        let earlier_edges = &compact.edge_input[edge - slot..edge];
        let first = !compact.has_received(input, step) && !earlier_edges.contains(&(input as u32));
        Contribution {
            step,
            consumer,
            input,
            slot,
            value: Value::Scalar(value),
            before: (!first).then_some(Value::Scalar(held)),
            after: Value::Scalar(after),
        }
    }
}

#[cfg(test)]
mod tests {
    use crate::dtype::{Dtype, Subnormals};
    use crate::sweep::{LedgerMode, Sweep};
    use crate::tensor::Value;
    use crate::trace::{Trace, validate};

    fn bits(value: &Value) -> Vec<u64> {
        value.to_f64().iter().map(|x| x.to_bits()).collect()
    }

    /// Every demo, and each again in f16 with subnormals flushed (the
    /// rounding the derived entries must reproduce bit for bit).
    fn traces() -> Vec<Trace> {
        crate::demos::all()
            .into_iter()
            .flat_map(|(_, file)| {
                let trace = validate(file).expect("demos are valid");
                let flushed = trace.retyped(Dtype::F16, Subnormals::Flush);
                [trace, flushed]
            })
            .collect()
    }

    #[test]
    fn each_nodes_contributions_chain_from_nothing_to_its_adjoint() {
        for trace in traces() {
            let mut sweep = Sweep::new(&trace, LedgerMode::On);
            sweep.run_to_end();
            let ledger = sweep.ledger().unwrap();
            for node in 0..trace.nodes().len() {
                let received = ledger.received(node);
                let expected = trace
                    .consumers(node)
                    .iter()
                    .filter(|(consumer, _)| trace.sweep_rank(*consumer).is_some())
                    .count();
                assert_eq!(received.len(), expected, "{}: node {node}", trace.title());
                let mut held: Option<Value> = None;
                for entry in &received {
                    assert_eq!(entry.input, node);
                    assert_eq!(
                        entry.before.as_ref().map(bits),
                        held.as_ref().map(bits),
                        "{}: node {node} step {}",
                        trace.title(),
                        entry.step
                    );
                    held = Some(entry.after.clone());
                }
                if node != trace.output() {
                    assert_eq!(
                        sweep.adjoint(node).map(|adjoint| bits(&adjoint)),
                        held.as_ref().map(bits),
                        "{}: node {node}",
                        trace.title()
                    );
                }
            }
        }
    }

    #[test]
    fn entries_steps_and_random_access_agree() {
        for trace in traces() {
            let mut sweep = Sweep::new(&trace, LedgerMode::On);
            sweep.run_steps(sweep.len() / 2 + 1);
            let ledger = sweep.ledger().unwrap();
            let all: Vec<_> = ledger.entries().collect();
            let by_step: Vec<_> = (0..=sweep.len())
                .flat_map(|step| ledger.step_entries(step))
                .collect();
            assert_eq!(all.len(), ledger.len());
            // Compared as text: NaN entries are equal to themselves there.
            assert_eq!(
                format!("{all:?}"),
                format!("{by_step:?}"),
                "{}",
                trace.title()
            );
            for (index, entry) in all.iter().enumerate() {
                assert_eq!(
                    format!("{:?}", ledger.entry(index)),
                    format!("{:?}", Some(entry))
                );
            }
            assert!(ledger.entry(all.len()).is_none());
            // Each step's entries come from the node the step processed, slot by slot.
            for entry in &all {
                let consumer = trace.sweep_order()[entry.step];
                assert_eq!(entry.consumer, consumer);
                assert_eq!(trace.node(consumer).inputs[entry.slot], entry.input);
            }
        }
    }

    #[test]
    fn the_ledger_changes_no_adjoint() {
        for trace in traces() {
            let (mut on, mut off) = (
                Sweep::new(&trace, LedgerMode::On),
                Sweep::new(&trace, LedgerMode::Off),
            );
            on.run_to_end();
            off.run_to_end();
            for node in 0..trace.nodes().len() {
                assert_eq!(
                    on.adjoint(node).map(|adjoint| bits(&adjoint)),
                    off.adjoint(node).map(|adjoint| bits(&adjoint)),
                );
            }
            assert_eq!(format!("{:?}", on.flags()), format!("{:?}", off.flags()));
        }
    }

    /// x·x sends two contributions to x in one step: the second must see the
    /// first as its `before`, and undo must restore what x held before both.
    /// (d/dx of x² + x is 2x + 1: closed form.)
    #[test]
    fn an_input_met_twice_in_one_step_is_logged_and_undone_in_order() {
        let mut tape = crate::record::Tape::new("square plus x", Dtype::F64);
        let x = tape.param("x", 3.0);
        let square = tape.mul(x, x);
        let square = tape.rename(square, "square");
        let y = tape.add(square, x);
        let trace = validate(tape.finish(y)).unwrap();
        let x = trace.find("x").unwrap();
        let mut sweep = Sweep::new(&trace, LedgerMode::On);
        sweep.run_to_end();
        let received = sweep.ledger().unwrap().received(x);
        let summary: Vec<_> = received
            .iter()
            .map(|entry| {
                (
                    entry.before.as_ref().and_then(Value::as_scalar),
                    entry.value.as_scalar(),
                    entry.after.as_scalar(),
                )
            })
            .collect();
        assert_eq!(
            summary,
            [
                (None, Some(1.0), Some(1.0)),
                (Some(1.0), Some(3.0), Some(4.0)),
                (Some(4.0), Some(3.0), Some(7.0)),
            ]
        );
        assert_eq!(sweep.adjoint(x).as_deref(), Some(&Value::Scalar(7.0)));
        // Back over the leaf x, then over x·x: x holds the add's 1 again.
        sweep.back();
        sweep.back();
        assert_eq!(sweep.current(), trace.find("square"));
        assert_eq!(sweep.adjoint(x).as_deref(), Some(&Value::Scalar(1.0)));
        sweep.seek(0);
        assert_eq!(sweep.adjoint(x), None);
        assert!(sweep.ledger().unwrap().is_empty());
    }

    #[test]
    fn a_tensor_input_met_twice_in_one_step_is_logged_and_undone_in_order() {
        let mut tape = crate::record::Tape::new("sum of squares", Dtype::F64);
        let x = tape.param("x", Value::from_parts(vec![2], vec![1.0, 2.0]));
        let square = tape.mul(x, x);
        let total = tape.sum(square);
        let trace = validate(tape.finish(total)).unwrap();
        let x = trace.find("x").unwrap();
        let mut sweep = Sweep::new(&trace, LedgerMode::On);
        sweep.run_to_end();
        let received = sweep.ledger().unwrap().received(x);
        assert_eq!(received.len(), 2);
        assert_eq!(received[0].before, None);
        assert_eq!(*received[0].after.to_f64(), [1.0, 2.0]);
        assert_eq!(
            received[1].before.as_ref().map(|v| v.to_f64().into_owned()),
            Some(vec![1.0, 2.0])
        );
        assert_eq!(*received[1].after.to_f64(), [2.0, 4.0]);
        assert_eq!(*sweep.adjoint(x).unwrap().to_f64(), [2.0, 4.0]);
        sweep.back();
        sweep.back();
        assert_eq!(sweep.adjoint(x), None);
        assert_eq!(sweep.ledger().unwrap().len(), 1);
    }
}
