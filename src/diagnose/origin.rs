//! Root causes of non-finite adjoints: for every node whose adjoint became
//! NaN or ±inf, the contribution that first made it so is found in the
//! ledger and followed back, iteratively, to the earliest origin, which is
//! then classified.

use super::explain;
use crate::ops;
use crate::sweep::{FlagKind, Masking, Sweep};
use crate::tensor::{Value, broadcast_source_indices};
use crate::trace::{Partial, Trace};
use serde::Serialize;
use std::collections::HashMap;

/// How a non-finite adjoint was born.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum OriginClass {
    /// (a) A forward value is non-finite (log of 0, sqrt of a negative, 0/0, exp overflow).
    NonFiniteValue,
    /// (b) A partial is non-finite where the value is finite (sqrt at 0, x^p with 0 < p < 1 at 0).
    NonFinitePartial,
    /// (c) An adjoint times a partial, both finite, overflowed.
    ProductOverflow,
    /// (d) Finite contributions summed past the largest finite value at a branch.
    SumOverflow,
    /// (e) NaN from 0 × inf or inf − inf while pulling back or accumulating.
    NanFromInfinity,
    /// The seed itself is non-finite.
    NonFiniteSeed,
}

impl OriginClass {
    /// The letter used in the design: a–e (and `seed`).
    pub fn letter(self) -> &'static str {
        match self {
            OriginClass::NonFiniteValue => "a",
            OriginClass::NonFinitePartial => "b",
            OriginClass::ProductOverflow => "c",
            OriginClass::SumOverflow => "d",
            OriginClass::NanFromInfinity => "e",
            OriginClass::NonFiniteSeed => "seed",
        }
    }

    /// A short name for reports.
    pub fn title(self) -> &'static str {
        match self {
            OriginClass::NonFiniteValue => "non-finite forward value",
            OriginClass::NonFinitePartial => "non-finite partial at a finite value",
            OriginClass::ProductOverflow => "product of finite numbers overflowed",
            OriginClass::SumOverflow => "sum of finite contributions overflowed at a branch",
            OriginClass::NanFromInfinity => "NaN from 0 × inf or inf − inf",
            OriginClass::NonFiniteSeed => "non-finite seed",
        }
    }
}

/// The earliest origin of one or more non-finite adjoints.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Origin {
    /// How it was born.
    pub class: OriginClass,
    /// Where: the node with the non-finite value (a), the node whose pull-back
    /// went bad (b, c, e), the branch point whose sum overflowed (d), the output (seed).
    pub node: usize,
    /// The origin node's own sweep step (0-based): where it is processed.
    pub step: usize,
    /// The node whose adjoint became non-finite first.
    pub first_adjoint: usize,
    /// The sweep step (0-based) at which that first non-finite adjoint
    /// appeared. For a forward value that travels to a consumer before it
    /// spoils an adjoint, this can come before `step`.
    pub first_adjoint_step: usize,
    /// For a pull-back: the node pulled back and the input slot of the edge.
    pub edge: Option<(usize, usize)>,
    /// The numbers involved: the op's input elements (a); the input and the
    /// partial (b); the adjoint and the partial (c, e); the adjoint before and
    /// the contribution (d).
    pub operands: Vec<f64>,
    /// The offending result.
    pub result: f64,
    /// One sentence saying what happened.
    pub explanation: String,
    /// The parameters whose gradient it made non-finite, in recording order.
    pub reached: Vec<usize>,
    /// For a non-finite value (a): its non-finite inputs are all a mask's
    /// −inf (`sweep::masked`), which this node let through instead of absorbing.
    pub leak: bool,
}

/// Where an infinite adjoint turned into NaN downstream of its origin.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct NanBirth {
    /// The node whose adjoint became NaN.
    pub node: usize,
    /// The sweep step (0-based).
    pub step: usize,
    /// The node whose contribution did it.
    pub from: usize,
    /// Which operation made the NaN.
    pub how: NanHow,
}

/// The operation that turned infinities into NaN.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum NanHow {
    /// An infinite contribution met an adjoint infinite the other way at a branch.
    InfMinusInfAtBranch,
    /// An infinite adjoint met a zero partial while being pulled back.
    ZeroTimesInf,
    /// Infinite terms of opposite signs cancelled inside one pull-back.
    InfMinusInfInPullBack,
}

impl NanHow {
    /// A short phrase for reports.
    pub fn phrase(self) -> &'static str {
        match self {
            NanHow::InfMinusInfAtBranch => "inf − inf at a branch",
            NanHow::ZeroTimesInf => "0 × inf: an infinite adjoint times a zero partial",
            NanHow::InfMinusInfInPullBack => "inf − inf inside a pull-back",
        }
    }
}

fn has_nan(value: &Value) -> bool {
    value.to_f64().iter().any(|x| x.is_nan())
}

/// Why a node's adjoint is non-finite.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) enum Cause {
    /// Finite adjoint.
    Finite,
    /// Born here, from an origin (index into the origins), through the
    /// contribution of consumer `via` (the node itself for the seed and for
    /// a sum that overflowed at it).
    Origin {
        /// Index into the origins.
        index: usize,
        /// The consumer whose contribution made the adjoint non-finite.
        via: usize,
    },
    /// Carried in by the contribution of this consumer, whose adjoint was already non-finite.
    From(usize),
}

/// Origins and the cause pointer of every node.
#[derive(Debug, Clone)]
pub(super) struct RootCauses {
    pub origins: Vec<Origin>,
    pub causes: Vec<Cause>,
    /// The origin of each node's non-finite adjoint, so lookups need not walk the chain.
    origin_index: Vec<Option<usize>>,
    /// Where infinities turned into NaN, in sweep order.
    pub nan_births: Vec<NanBirth>,
    /// For each node whose forward value is not finite, its first input whose value is not finite either.
    forward_input: HashMap<usize, usize>,
}

impl RootCauses {
    /// The chain of nodes from the origin to `node`; empty when `node`'s
    /// adjoint is finite. Consecutive nodes are joined by an edge of the graph:
    /// the chain opens with the forward path from a non-finite forward value
    /// to the consumer that pulled it back (each node an input of the next;
    /// [`RootCauses::forward_hops`] says how many), then follows the
    /// non-finite adjoint through inputs (each node an input of the one
    /// before) down to `node`.
    pub fn chain(&self, node: usize) -> Vec<usize> {
        let mut chain = Vec::new();
        let mut cursor = node;
        loop {
            match self.causes[cursor] {
                Cause::Finite => return Vec::new(),
                Cause::From(consumer) => {
                    chain.push(cursor);
                    cursor = consumer;
                }
                Cause::Origin { index, via } => {
                    chain.push(cursor);
                    let origin = &self.origins[index];
                    if via != cursor {
                        chain.push(via);
                    }
                    if origin.class == OriginClass::NonFiniteValue && origin.node != via {
                        // The non-finite value travelled forward from its origin to `via`.
                        let mut at = via;
                        while let Some(&input) = self.forward_input.get(&at) {
                            chain.push(input);
                            at = input;
                            if input == origin.node {
                                break;
                            }
                        }
                    }
                    chain.reverse();
                    return chain;
                }
            }
        }
    }

    /// How many of the chain's first hops run forward (from a non-finite
    /// value to the consumer that carried it into the sweep); the rest run
    /// along the adjoint. 0 when `node`'s adjoint is finite.
    pub fn forward_hops(&self, node: usize) -> usize {
        let mut cursor = node;
        loop {
            match self.causes[cursor] {
                Cause::Finite => return 0,
                Cause::From(consumer) => cursor = consumer,
                Cause::Origin { index, via } => {
                    let origin = &self.origins[index];
                    if origin.class != OriginClass::NonFiniteValue || origin.node == via {
                        return 0;
                    }
                    let mut hops = 0;
                    let mut at = via;
                    while let Some(&input) = self.forward_input.get(&at) {
                        hops += 1;
                        at = input;
                        if input == origin.node {
                            break;
                        }
                    }
                    return hops;
                }
            }
        }
    }

    /// The origin behind `node`'s non-finite adjoint.
    pub fn origin_of(&self, node: usize) -> Option<usize> {
        self.origin_index[node]
    }
}

/// The local partial on an edge as a value of the node's shape, when it is
/// elementwise: recorded, or derived from the op table.
pub(super) fn edge_partial(trace: &Trace, node: usize, slot: usize) -> Option<Value> {
    let recorded = trace.node(node);
    match recorded.partial(slot) {
        Some(Partial::Scalar(s)) => Some(Value::Scalar(*s)),
        Some(Partial::Diagonal(diagonal)) => Some(diagonal.clone()),
        Some(Partial::Jacobian { .. }) => None,
        None => {
            let inputs: Vec<&Value> = recorded
                .inputs
                .iter()
                .map(|&input| &trace.node(input).value)
                .collect();
            ops::elementwise_partial(
                recorded.op,
                slot,
                &inputs,
                &recorded.value,
                &recorded.attrs,
                trace.dtype(),
            )
        }
    }
}

/// Element `index` of a value, reading a one-element value as broadcast.
fn element(value: &Value, index: usize) -> f64 {
    let data = value.to_f64();
    if data.len() == 1 {
        data[0]
    } else {
        data.get(index).copied().unwrap_or(f64::NAN)
    }
}

/// The first input of `node` whose forward value is not finite.
fn first_non_finite_input(trace: &Trace, node: usize) -> Option<usize> {
    trace
        .node(node)
        .inputs
        .iter()
        .copied()
        .find(|&input| !trace.node(input).value.is_finite())
}

/// Follows non-finite forward values from `node` back to the first node whose
/// inputs are all finite, or to the node where a mask's −inf leaked (its
/// non-finite inputs all carry a mask, which is not a fault in itself: the
/// fault is the op that let it through). The second part says which.
fn forward_origin(trace: &Trace, node: usize, masking: &Masking) -> (usize, bool) {
    let mut cursor = node;
    while let Some(input) = first_non_finite_input(trace, cursor) {
        if masking.leaked_at(trace, cursor) {
            return (cursor, true);
        }
        cursor = input;
    }
    (cursor, false)
}

/// The input elements that produced element `index` of an elementwise node.
fn input_elements(trace: &Trace, node: usize, index: usize) -> Vec<f64> {
    let recorded = trace.node(node);
    if !recorded.op.is_elementwise() {
        return Vec::new();
    }
    recorded
        .inputs
        .iter()
        .map(|&input| {
            let value = &trace.node(input).value;
            let sources = broadcast_source_indices(value.shape(), recorded.value.shape());
            sources
                .get(index)
                .map_or(f64::NAN, |&source| value.get(source))
        })
        .collect()
}

/// Finds the root cause of every non-finite adjoint of a finished sweep with its ledger.
pub(super) fn trace_back(sweep: &Sweep, masking: &Masking) -> RootCauses {
    let trace = sweep.trace();
    let ledger = sweep.ledger().expect("root causes need the ledger");
    let mut causes = vec![Cause::Finite; trace.nodes().len()];
    let mut origins: Vec<Origin> = Vec::new();
    let mut by_place: HashMap<(usize, OriginClass), usize> = HashMap::new();
    let bad_partials: HashMap<(usize, usize), f64> = sweep
        .flags()
        .iter()
        .filter(|flag| flag.kind == FlagKind::NonFinitePartial)
        .map(|flag| ((flag.node, flag.slot.unwrap_or(0)), flag.value))
        .collect();
    let mut add_origin = |origin: Origin, origins: &mut Vec<Origin>| -> usize {
        *by_place
            .entry((origin.node, origin.class))
            .or_insert_with(|| {
                origins.push(origin);
                origins.len() - 1
            })
    };
    let output = trace.output();
    if let Some((_, bad)) = trace.seed().first_non_finite() {
        let explanation = explain::seed(trace, bad);
        let origin = Origin {
            class: OriginClass::NonFiniteSeed,
            node: output,
            step: 0,
            first_adjoint: output,
            first_adjoint_step: 0,
            edge: None,
            operands: Vec::new(),
            result: bad,
            explanation,
            reached: Vec::new(),
            leak: false,
        };
        causes[output] = Cause::Origin {
            index: add_origin(origin, &mut origins),
            via: output,
        };
    }
    // Every entry the loop acts on made a finite sum non-finite, which the
    // sweep flagged: without such a flag there is nothing to walk (and each
    // entry's test scans a whole tensor).
    let any_turned = sweep
        .flags()
        .iter()
        .any(|flag| flag.kind == FlagKind::NonFiniteAdjoint && flag.from.is_some());
    for entry in ledger.entries().filter(|_| any_turned) {
        if causes[entry.input] != Cause::Finite
            || entry.after.is_finite()
            || !entry.before.as_ref().is_none_or(Value::is_finite)
        {
            continue;
        }
        let (x, u, slot) = (entry.input, entry.consumer, entry.slot);
        let adjoint = sweep
            .adjoint(u)
            .expect("a processed node holds its adjoint");
        if !entry.value.is_finite() && !adjoint.is_finite() {
            causes[x] = Cause::From(u);
            continue;
        }
        let (index, result) = entry.after.first_non_finite().expect("after is not finite");
        let mut origin = Origin {
            class: OriginClass::SumOverflow,
            node: x,
            step: entry.step,
            first_adjoint: x,
            first_adjoint_step: entry.step,
            edge: Some((u, slot)),
            operands: Vec::new(),
            result,
            explanation: String::new(),
            reached: Vec::new(),
            leak: false,
        };
        let origin_is_sum = entry.value.is_finite();
        let mut leaked = false;
        if origin_is_sum {
            // Finite before, finite contribution, non-finite sum: overflow at a branch.
            let before = entry
                .before
                .as_ref()
                .map_or(0.0, |before| element(before, index));
            origin.operands = vec![before, element(&entry.value, index)];
        } else {
            let (index, result) = entry
                .value
                .first_non_finite()
                .expect("the contribution is not finite");
            origin.result = result;
            origin.node = u;
            let recorded = trace.node(u);
            let forward_bad = !recorded.value.is_finite()
                || recorded
                    .inputs
                    .iter()
                    .any(|&input| !trace.node(input).value.is_finite());
            let partial = edge_partial(trace, u, slot);
            let partial_element = partial.as_ref().map(|partial| element(partial, index));
            let g = element(&adjoint, index);
            if forward_bad {
                let (born, leak) = forward_origin(trace, u, masking);
                leaked = leak;
                origin.class = OriginClass::NonFiniteValue;
                origin.node = born;
                let bad_index = trace
                    .node(born)
                    .value
                    .first_non_finite()
                    .map_or(0, |(at, _)| at);
                origin.result = trace
                    .node(born)
                    .value
                    .first_non_finite()
                    .map_or(result, |(_, x)| x);
                origin.operands = input_elements(trace, born, bad_index);
            } else if let Some(&bad) = bad_partials.get(&(u, slot)) {
                let p = partial_element.filter(|p| !p.is_finite()).unwrap_or(bad);
                let zero_times_inf =
                    result.is_nan() && p.is_infinite() && adjoint.to_f64().contains(&0.0);
                origin.class = if zero_times_inf {
                    OriginClass::NanFromInfinity
                } else {
                    OriginClass::NonFinitePartial
                };
                let mut operands = input_elements(trace, u, index);
                operands.push(p);
                origin.operands = if zero_times_inf {
                    vec![0.0, p]
                } else {
                    operands
                };
            } else {
                origin.class = if result.is_nan() {
                    OriginClass::NanFromInfinity
                } else {
                    OriginClass::ProductOverflow
                };
                origin.operands = match partial_element {
                    Some(p) => vec![g, p],
                    None => vec![adjoint.l2_norm()],
                };
            }
        }
        origin.step = trace
            .sweep_rank(origin.node)
            .expect("an origin reaches the output");
        origin.leak = leaked;
        origin.explanation = explain::origin(trace, &origin);
        causes[x] = Cause::Origin {
            index: add_origin(origin, &mut origins),
            via: if origin_is_sum { x } else { u },
        };
    }
    // A consumer's adjoint turns non-finite before it is pulled back, so one
    // pass in ledger order sees every cause before the causes that point at it.
    let mut origin_index = vec![None; causes.len()];
    if let Cause::Origin { index, .. } = causes[output] {
        origin_index[output] = Some(index);
    }
    let mut nan_births = Vec::new();
    for entry in ledger.entries() {
        let x = entry.input;
        let adjoint = sweep
            .adjoint(entry.consumer)
            .expect("a processed node holds its adjoint");
        let born_here = entry.before.as_ref().is_none_or(Value::is_finite) && adjoint.is_finite();
        if has_nan(&entry.after) && !entry.before.as_ref().is_some_and(has_nan) && !born_here {
            if !has_nan(&entry.value) {
                nan_births.push(NanBirth {
                    node: x,
                    step: entry.step,
                    from: entry.consumer,
                    how: NanHow::InfMinusInfAtBranch,
                });
            } else if !has_nan(&adjoint) {
                let zero_partial = edge_partial(trace, entry.consumer, entry.slot)
                    .is_some_and(|partial| partial.to_f64().contains(&0.0));
                let how = if zero_partial {
                    NanHow::ZeroTimesInf
                } else {
                    NanHow::InfMinusInfInPullBack
                };
                nan_births.push(NanBirth {
                    node: x,
                    step: entry.step,
                    from: entry.consumer,
                    how,
                });
            }
        }
        if origin_index[x].is_none() {
            origin_index[x] = match causes[x] {
                Cause::Finite => None,
                Cause::Origin { index, .. } => Some(index),
                Cause::From(consumer) => origin_index[consumer],
            };
        }
    }
    let forward_input = (0..trace.nodes().len())
        .filter(|&node| !trace.node(node).value.is_finite())
        .filter_map(|node| first_non_finite_input(trace, node).map(|input| (node, input)))
        .collect();
    let mut causes = RootCauses {
        origins,
        causes,
        origin_index,
        nan_births,
        forward_input,
    };
    for param in trace.params() {
        if let Some(index) = causes.origin_of(param) {
            causes.origins[index].reached.push(param);
        }
    }
    causes
}
