//! Masks: −inf recorded on purpose (an attention mask added to the scores,
//! or filled in with `where`) and absorbed before it can harm anything.
//!
//! A causal attention mask holds −inf above the diagonal; softmax turns those
//! places into weights of exactly 0 (e^−inf = 0) and passes back an adjoint
//! of yₖ(ḡₖ − Σ ḡy) = 0 there. The non-finite values are real, but they are
//! not a fault: this module tells such values apart from non-finite values
//! that were born in the computation or that leak into the loss or an adjoint.
//!
//! The policy, in three parts, each checked on the finished sweep:
//!
//! 1. **Source.** A recorded input or constant whose non-finite elements are
//!    all −inf (a parameter never is: a weight of −inf is a fault).
//! 2. **Carrier.** A node whose non-finite elements are all −inf, every one of
//!    whose non-finite inputs is a source or carrier, and, for an elementwise
//!    op, whose every −inf element has a −inf input element at its broadcast
//!    source (so the −inf was passed along, not born: `add(scores, mask)`,
//!    `where(causal, scores, −inf)`, a scale, a reshape or permute).
//! 3. **Absorbed.** A source or carrier is *masked* when it is not the
//!    output, its adjoint is finite, it passed back no non-finite partial or
//!    contribution, and each of its consumers is either masked itself or
//!    *absorbs* the −inf: its value is finite (softmax, log-sum-exp, max, exp,
//!    a `where` that picks the other branch) and it passed back no non-finite
//!    partial or contribution either.
//!
//! Everything else is diagnosed exactly as before: NaN or +inf never passes,
//! −inf born from finite inputs (log of 0) never passes, and a mask whose
//! −inf reaches the loss, an adjoint or a consumer that turns it into NaN
//! (a fully masked softmax row gives 0/0 = NaN, as PyTorch's softmax does)
//! is not masked. Such a consumer is where the mask *leaked*
//! ([`Masking::leaked_at`]).

use super::{Flag, FlagKind, Sweep};
use crate::ops::Op;
use crate::tensor::{Value, broadcast_source_indices};
use crate::trace::Trace;
use serde::Serialize;
use std::collections::{BTreeSet, HashMap};

/// A node whose −inf is a mask that was absorbed.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct Masked {
    /// The node.
    pub node: usize,
    /// Its sweep step (0-based).
    pub step: usize,
    /// Elements that are −inf.
    pub count: usize,
    /// The consumers with finite values where its −inf ends (directly or
    /// through other masked nodes), in recording order.
    pub absorbed_by: Vec<usize>,
}

/// The masks of one finished sweep.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct Masking {
    /// Masked nodes, in sweep order.
    pub masked: Vec<Masked>,
    /// Sources and carriers (masked or not), for the leak test.
    passing: BTreeSet<usize>,
}

/// Counts of −inf, and of other non-finite elements (NaN, +inf).
fn census(value: &Value) -> (usize, usize) {
    if value.is_finite() {
        return (0, 0);
    }
    value
        .to_f64()
        .iter()
        .fold((0, 0), |(negative, other), &x| match x {
            f64::NEG_INFINITY => (negative + 1, other),
            x if x.is_finite() => (negative, other),
            _ => (negative, other + 1),
        })
}

impl Masking {
    /// The masks of `sweep`, which must have run to the end.
    pub fn of(sweep: &Sweep) -> Masking {
        let trace = sweep.trace();
        let flagged: BTreeSet<usize> = sweep
            .flags()
            .iter()
            .filter(|flag| flag.kind == FlagKind::NonFiniteValue)
            .map(|flag| flag.node)
            .collect();
        if flagged.is_empty() {
            return Masking::default();
        }
        // Nodes that sent a non-finite partial or contribution back.
        let spoiled: BTreeSet<usize> = sweep
            .flags()
            .iter()
            .filter_map(|flag| match flag.kind {
                FlagKind::NonFinitePartial => Some(flag.node),
                FlagKind::NonFiniteAdjoint => flag.from,
                FlagKind::NonFiniteValue => None,
            })
            .collect();
        // Forward, in recording order (inputs before consumers): sources and carriers.
        let mut passing = BTreeSet::new();
        let mut counts = HashMap::new();
        for &node in &flagged {
            let recorded = trace.node(node);
            let (negative, other) = census(&recorded.value);
            if other > 0 || negative == 0 {
                continue;
            }
            let passes = match recorded.op {
                Op::Input | Op::Const => true,
                Op::Param | Op::Custom => false,
                op => {
                    let bad: Vec<usize> = recorded
                        .inputs
                        .iter()
                        .copied()
                        .filter(|&input| !trace.node(input).value.is_finite())
                        .collect();
                    !bad.is_empty()
                        && bad.iter().all(|input| passing.contains(input))
                        && (!op.is_elementwise() || passed_along(trace, node))
                }
            };
            if passes {
                passing.insert(node);
                counts.insert(node, negative);
            }
        }
        // Backward, in sweep order (consumers before inputs): absorbed or not.
        let output = trace.output();
        let mut absorbed: HashMap<usize, BTreeSet<usize>> = HashMap::new();
        let mut masked = Vec::new();
        for (step, &node) in trace.sweep_order().iter().enumerate() {
            if !passing.contains(&node) || node == output || spoiled.contains(&node) {
                continue;
            }
            if sweep
                .adjoint(node)
                .is_some_and(|adjoint| !adjoint.is_finite())
            {
                continue;
            }
            let mut ends = BTreeSet::new();
            let mut fine = true;
            for (consumer, _) in trace.consumers(node) {
                if trace.sweep_rank(consumer).is_none() {
                    continue;
                }
                if let Some(further) = absorbed.get(&consumer) {
                    ends.extend(further.iter().copied());
                } else if trace.node(consumer).value.is_finite() && !spoiled.contains(&consumer) {
                    ends.insert(consumer);
                } else {
                    fine = false;
                    break;
                }
            }
            if fine && !ends.is_empty() {
                masked.push(Masked {
                    node,
                    step,
                    count: counts[&node],
                    absorbed_by: ends.iter().copied().collect(),
                });
                absorbed.insert(node, ends);
            }
        }
        Masking { masked, passing }
    }

    /// True when `node`'s −inf is an absorbed mask.
    pub fn is_masked(&self, node: usize) -> bool {
        self.masked.iter().any(|masked| masked.node == node)
    }

    /// True when `flag` reports a masked node's −inf value: a fact, not a fault.
    pub fn explains(&self, flag: &Flag) -> bool {
        flag.kind == FlagKind::NonFiniteValue && self.is_masked(flag.node)
    }

    /// The flags that [`Masking::explains`] does not.
    pub fn unexplained<'f>(&self, flags: &'f [Flag]) -> Vec<&'f Flag> {
        flags.iter().filter(|flag| !self.explains(flag)).collect()
    }

    /// True when `node` is not a source or carrier of a mask but every one of
    /// its non-finite inputs is: a mask's −inf entered it and came out as
    /// NaN, +inf or something that reaches the loss. The mask leaked here.
    pub fn leaked_at(&self, trace: &Trace, node: usize) -> bool {
        if self.passing.contains(&node) {
            return false;
        }
        let mut bad = trace
            .node(node)
            .inputs
            .iter()
            .filter(|&&input| !trace.node(input).value.is_finite())
            .peekable();
        bad.peek().is_some() && bad.all(|input| self.passing.contains(input))
    }
}

/// For an elementwise node: every −inf element has a −inf input element at
/// its broadcast source, so the −inf was passed along rather than born.
fn passed_along(trace: &Trace, node: usize) -> bool {
    let recorded = trace.node(node);
    let out = recorded.value.to_f64();
    let shape = recorded.value.shape();
    let sources: Vec<(Vec<usize>, std::borrow::Cow<[f64]>)> = recorded
        .inputs
        .iter()
        .map(|&input| {
            let value = &trace.node(input).value;
            (
                broadcast_source_indices(value.shape(), shape),
                value.to_f64(),
            )
        })
        .collect();
    out.iter().enumerate().all(|(k, &y)| {
        y != f64::NEG_INFINITY
            || sources.iter().any(|(indices, data)| {
                let at = if data.len() == 1 { 0 } else { indices[k] };
                data[at] == f64::NEG_INFINITY
            })
    })
}
