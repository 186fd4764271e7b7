//! The tangent (forward-mode) sweep: dual numbers (value, tangent) pushed
//! through the trace in recording order along one direction, steppable like
//! the reverse sweep, and the dot-product identity ⟨v, ∇f⟩ = ∂f/∂v that ties
//! the two modes together.

use crate::ops::{self, JvpArgs, Op};
use crate::sweep::{Sweep, push_forward};
use crate::tensor::Value;
use crate::trace::Trace;

/// The direction of a tangent sweep.
#[derive(Debug, Clone, PartialEq)]
pub enum Direction {
    /// The unit vector of one element of one leaf.
    Unit {
        /// The leaf node.
        node: usize,
        /// The element.
        element: usize,
    },
    /// Every parameter gets entries uniform in [−1, 1] from this seed.
    Random {
        /// Seed of the generator.
        seed: u64,
    },
    /// Explicit tangents for some leaves (node, tangent of its shape).
    Given(Vec<(usize, Value)>),
}

/// A tangent sweep in progress.
#[derive(Debug, Clone)]
pub struct TangentSweep<'t> {
    trace: &'t Trace,
    direction: Vec<Option<Value>>,
    tangents: Vec<Option<Value>>,
    cursor: usize,
}

impl<'t> TangentSweep<'t> {
    /// A tangent sweep at its start.
    pub fn new(trace: &'t Trace, direction: &Direction) -> TangentSweep<'t> {
        let mut seeds: Vec<Option<Value>> = vec![None; trace.nodes().len()];
        match direction {
            &Direction::Unit { node, element } => {
                let mut unit = Value::filled(trace.node(node).value.shape(), 0.0);
                if element < unit.len() {
                    unit.set(element, 1.0);
                }
                seeds[node] = Some(unit);
            }
            &Direction::Random { seed } => {
                let mut rng = crate::random::Rng::new(seed);
                for param in trace.params() {
                    let shape = trace.node(param).value.shape().to_vec();
                    let data = (0..crate::tensor::numel(&shape))
                        .map(|_| rng.uniform(-1.0, 1.0))
                        .collect();
                    seeds[param] = Some(Value::from_parts(shape, data));
                }
            }
            Direction::Given(tangents) => {
                for (node, tangent) in tangents {
                    seeds[*node] = Some(tangent.clone());
                }
            }
        }
        TangentSweep {
            trace,
            direction: seeds,
            tangents: vec![None; trace.nodes().len()],
            cursor: 0,
        }
    }

    /// Nodes processed so far (in recording order).
    pub fn cursor(&self) -> usize {
        self.cursor
    }

    /// Total steps: one per node.
    pub fn len(&self) -> usize {
        self.trace.nodes().len()
    }

    /// True for an empty trace.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// True when every node has its tangent.
    pub fn is_done(&self) -> bool {
        self.cursor == self.len()
    }

    /// The tangent of `node` once processed; `None` when it is zero (nothing
    /// it depends on is in the direction) or not processed yet.
    pub fn tangent(&self, node: usize) -> Option<&Value> {
        self.tangents[node].as_ref()
    }

    /// The direction's component on a leaf.
    pub fn direction(&self, node: usize) -> Option<&Value> {
        self.direction[node].as_ref()
    }

    /// Processes the next node in recording order; returns it.
    pub fn step(&mut self) -> Option<usize> {
        let node = self.cursor;
        if node == self.len() {
            return None;
        }
        let recorded = self.trace.node(node);
        let tangent = if recorded.op.is_leaf() {
            self.direction[node].clone()
        } else if recorded
            .inputs
            .iter()
            .all(|&input| self.tangents[input].is_none())
        {
            None
        } else {
            Some(self.push(node))
        };
        self.tangents[node] = tangent;
        self.cursor += 1;
        Some(node)
    }

    /// The node's tangent from its inputs' tangents.
    fn push(&self, node: usize) -> Value {
        let (trace, dtype) = (self.trace, self.trace.dtype());
        let recorded = trace.node(node);
        let zeros: Vec<Value> = recorded
            .inputs
            .iter()
            .map(|&input| Value::filled(trace.node(input).value.shape(), 0.0))
            .collect();
        let tangents: Vec<&Value> = recorded
            .inputs
            .iter()
            .zip(&zeros)
            .map(|(&input, zero)| self.tangents[input].as_ref().unwrap_or(zero))
            .collect();
        let has_recorded = recorded.partials.iter().any(Option::is_some);
        if recorded.op == Op::Custom || has_recorded {
            // Recorded partials are what the reverse sweep uses, so the tangent uses them too.
            let mut total = Value::filled(recorded.value.shape(), 0.0);
            for (slot, tangent) in tangents.iter().enumerate() {
                let term = match recorded.partial(slot) {
                    Some(partial) => push_forward(partial, tangent, recorded.value.shape(), dtype),
                    None => self.single_edge(node, slot, tangent),
                };
                total = ops::add_rounded(&total, &term, dtype);
            }
            return total;
        }
        self.rule_tangent(node, &tangents)
    }

    /// The op rule's tangent of `node` for the given input tangents.
    fn rule_tangent(&self, node: usize, tangents: &[&Value]) -> Value {
        let recorded = self.trace.node(node);
        let inputs: Vec<&Value> = recorded
            .inputs
            .iter()
            .map(|&input| &self.trace.node(input).value)
            .collect();
        let args = JvpArgs {
            inputs: &inputs,
            output: &recorded.value,
            tangents,
            attrs: &recorded.attrs,
            precision: self.trace.dtype().into(),
        };
        ops::jvp(recorded.op, &args)
    }

    /// The op rule's tangent through one edge alone (the others held still).
    fn single_edge(&self, node: usize, slot: usize, tangent: &Value) -> Value {
        let recorded = self.trace.node(node);
        let zeros: Vec<Value> = recorded
            .inputs
            .iter()
            .map(|&input| Value::filled(self.trace.node(input).value.shape(), 0.0))
            .collect();
        let tangents: Vec<&Value> = (0..zeros.len())
            .map(|k| if k == slot { tangent } else { &zeros[k] })
            .collect();
        self.rule_tangent(node, &tangents)
    }

    /// Undoes the last step. Returns false at the start.
    pub fn back(&mut self) -> bool {
        if self.cursor == 0 {
            return false;
        }
        self.cursor -= 1;
        self.tangents[self.cursor] = None;
        true
    }

    /// Runs every remaining step.
    pub fn run_to_end(&mut self) {
        while self.step().is_some() {}
    }

    /// ⟨seed, ẏ⟩: the directional derivative of the swept objective, once the
    /// output has its tangent.
    pub fn directional_derivative(&self) -> Option<f64> {
        let output = self.trace.output();
        if self.cursor <= output {
            return None;
        }
        Some(self.tangents[output].as_ref().map_or(0.0, |t| {
            t.to_f64()
                .iter()
                .zip(self.trace.seed().to_f64().iter())
                .map(|(&a, &b)| a * b)
                .sum()
        }))
    }

    /// ⟨v, ∇f⟩ from a finished reverse sweep: the same number by the other mode.
    pub fn reverse_counterpart(&self, sweep: &Sweep) -> f64 {
        (0..self.trace.nodes().len())
            .filter_map(|node| {
                let direction = self.direction[node].as_ref()?;
                let adjoint = sweep.adjoint(node)?;
                Some(
                    direction
                        .to_f64()
                        .iter()
                        .zip(adjoint.to_f64().iter())
                        .map(|(&v, &g)| v * g)
                        .sum::<f64>(),
                )
            })
            .sum()
    }
}
