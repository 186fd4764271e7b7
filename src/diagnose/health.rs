//! Forward health: the usual causes of vanishing and exploding gradients,
//! read from the recorded forward values. Saturated sigmoid and tanh units
//! (their derivative is nearly 0, so they pass almost nothing back), ReLU
//! units dead for the whole batch (they pass nothing back at all), and
//! activation norms that grow or shrink group after group (Glorot & Bengio,
//! "Understanding the difficulty of training deep feedforward neural
//! networks", AISTATS 2010, §3–4, watch exactly these: saturation and the
//! spread of activations from layer to layer).

use super::groups::GroupNorm;
use crate::dtype::Dtype;
use crate::ops::{self, Attrs, Op, Precision};
use crate::tensor::Value;
use crate::trace::Trace;
use serde::Serialize;

/// Saturated units of one sigmoid or tanh node.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Saturation {
    /// The activation node.
    pub node: usize,
    /// Its sweep step (0-based).
    pub step: usize,
    /// Units whose derivative is below the threshold times its peak.
    pub saturated: usize,
    /// All units (elements).
    pub units: usize,
    /// Flat index of the most saturated unit.
    pub element: usize,
    /// Its input (pre-activation).
    pub input: f64,
    /// Its derivative over the derivative's peak (σ'(0) = 1/4, tanh'(0) = 1).
    pub relative_derivative: f64,
}

impl Saturation {
    /// The fraction of units saturated.
    pub fn fraction(&self) -> f64 {
        self.saturated as f64 / self.units.max(1) as f64
    }
}

/// Dead units of one ReLU node: zero for every row of the batch.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct DeadUnits {
    /// The ReLU node.
    pub node: usize,
    /// Its sweep step (0-based).
    pub step: usize,
    /// Units (last axis) that are 0 in every row.
    pub dead: usize,
    /// Units in all.
    pub units: usize,
    /// Rows of the batch (the product of the other axes).
    pub rows: usize,
    /// The first dead unit.
    pub first: usize,
}

impl DeadUnits {
    /// The fraction of units dead.
    pub fn fraction(&self) -> f64 {
        self.dead as f64 / self.units.max(1) as f64
    }
}

/// The derivative of a unary activation at each input element, over its
/// peak at 0, from the op table in f64.
fn relative_derivative(op: Op, input: &Value, output: &Value) -> Option<Vec<f64>> {
    let precision = Precision::of(Dtype::F64);
    let attrs = Attrs::default();
    let zero = Value::Scalar(0.0);
    let at_zero = ops::forward(op, &[&zero], &attrs, precision);
    let peak =
        ops::elementwise_partial(op, 0, &[&zero], &at_zero, &attrs, Dtype::F64)?.as_scalar()?;
    let partial = ops::elementwise_partial(op, 0, &[input], output, &attrs, Dtype::F64)?;
    Some(partial.to_f64().iter().map(|d| d / peak).collect())
}

/// Every swept sigmoid or tanh node with at least one unit whose derivative
/// is below `below` times its peak, in sweep order.
pub fn saturation(trace: &Trace, below: f64) -> Vec<Saturation> {
    let mut found = Vec::new();
    for (step, &node) in trace.sweep_order().iter().enumerate() {
        let recorded = trace.node(node);
        if !matches!(recorded.op, Op::Sigmoid | Op::Tanh) {
            continue;
        }
        let input = &trace.node(recorded.inputs[0]).value;
        let Some(relative) = relative_derivative(recorded.op, input, &recorded.value) else {
            continue;
        };
        let inputs = input.to_f64();
        let mut saturated = 0;
        let mut worst: Option<(usize, f64)> = None;
        for (element, &d) in relative.iter().enumerate() {
            if d < below {
                saturated += 1;
                if worst.is_none_or(|(_, least)| d < least) {
                    worst = Some((element, d));
                }
            }
        }
        if let Some((element, d)) = worst {
            found.push(Saturation {
                node,
                step,
                saturated,
                units: relative.len(),
                element,
                input: inputs[element.min(inputs.len() - 1)],
                relative_derivative: d,
            });
        }
    }
    found
}

/// Every swept ReLU node of a batch (rank 2 or more, two rows or more) with
/// at least one unit that is 0 for every row, in sweep order.
pub fn dead_units(trace: &Trace) -> Vec<DeadUnits> {
    let mut found = Vec::new();
    for (step, &node) in trace.sweep_order().iter().enumerate() {
        let recorded = trace.node(node);
        if recorded.op != Op::Relu {
            continue;
        }
        let shape = recorded.value.shape();
        let Some(&units) = shape.last() else { continue };
        if shape.len() < 2 || units == 0 {
            continue;
        }
        let rows = recorded.value.len() / units;
        if rows < 2 {
            continue;
        }
        let data = recorded.value.to_f64();
        let dead: Vec<usize> = (0..units)
            .filter(|&unit| (0..rows).all(|row| data[row * units + unit] == 0.0))
            .collect();
        if let Some(&first) = dead.first() {
            found.push(DeadUnits {
                node,
                step,
                dead: dead.len(),
                units,
                rows,
                first,
            });
        }
    }
    found
}

/// The group whose activation RMS is furthest from the deepest group's (the
/// one nearest the inputs), as (index into `groups`, ratio, index of the
/// deepest group); `None` with fewer than two groups with activations.
pub fn activation_spread(groups: &[GroupNorm]) -> Option<(usize, f64, usize)> {
    let deepest = groups.iter().rposition(|group| {
        group
            .value_rms
            .is_some_and(|rms| rms > 0.0 && rms.is_finite())
    })?;
    let base = groups[deepest].value_rms?;
    groups
        .iter()
        .enumerate()
        .filter(|&(at, _)| at != deepest)
        .filter_map(|(at, group)| {
            let rms = group.value_rms?;
            (rms.is_finite() && rms > 0.0).then(|| (at, rms / base))
        })
        .max_by(|a, b| a.1.log10().abs().total_cmp(&b.1.log10().abs()))
        .map(|(at, ratio)| (at, ratio, deepest))
}

#[cfg(test)]
mod tests {
    use super::*;

    // σ(−827) rounds to exactly 0 in f32, so its derivative σ(1 − σ) is 0:
    // one of the six rows of the humidity model is saturated.
    #[test]
    fn nan_hunt_has_one_saturated_sigmoid_unit() {
        let trace = Trace::try_from(crate::demos::nan_hunt()).unwrap();
        let found = saturation(&trace, 0.01);
        assert_eq!(found.len(), 1);
        let sigmoid = found[0];
        assert_eq!(trace.node(sigmoid.node).id, "predicted");
        assert_eq!((sigmoid.saturated, sigmoid.units), (1, 6));
        assert!(sigmoid.input < -800.0, "{}", sigmoid.input);
        assert_eq!(sigmoid.relative_derivative, 0.0);
    }

    // tanh'(x) = 1 − tanh²(x) is below 0.01 once |x| > atanh(√0.99) ≈ 2.99
    // (closed form); 2.5 is not saturated, 3.5 is.
    #[test]
    fn tanh_saturates_past_three() {
        let mut tape = crate::record::Tape::new("tanh", Dtype::F64);
        let x = tape.input("x", Value::from_parts(vec![3], vec![0.0, 2.5, -3.5]));
        let y = tape.tanh(x);
        let trace = Trace::try_from(tape.finish(y)).unwrap();
        let found = saturation(&trace, 0.01);
        assert_eq!(found[0].saturated, 1);
        assert_eq!(found[0].element, 2);
    }

    #[test]
    fn a_unit_that_is_zero_in_every_row_is_dead() {
        let mut tape = crate::record::Tape::new("relu", Dtype::F64);
        let x = tape.input(
            "x",
            Value::from_parts(
                vec![3, 3],
                vec![1.0, -1.0, 0.5, 2.0, -3.0, -0.5, 0.1, -0.2, 0.3],
            ),
        );
        let y = tape.relu(x);
        let trace = Trace::try_from(tape.finish(y)).unwrap();
        let found = dead_units(&trace);
        assert_eq!((found[0].dead, found[0].units, found[0].first), (1, 3, 1));
    }
}
