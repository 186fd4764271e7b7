//! A wrong partial: a custom op whose hand-written derivative has a sign error.

use super::{SplitMix64, dense};
use crate::dtype::Dtype;
use crate::record::{Tape, Var};
use crate::sweep::{LedgerMode, Sweep};
use crate::tensor::Value;
use crate::trace::{PartialRepr, TraceFile, validate};

/// The custom op's name: y = x·σ(x), a smooth gate.
pub const GATE: &str = "smooth_gate";

fn sigmoid(x: f64) -> f64 {
    1.0 / (1.0 + (-x).exp())
}

/// The gate's forward value, computed by "the user's" code, not the op table.
fn gate(x: f64) -> f64 {
    x * sigmoid(x)
}

/// d/dx x·σ(x) = σ(x) + x·σ(x)·(1 − σ(x)) (product rule and σ' = σ(1 − σ)).
fn gate_partial(x: f64) -> f64 {
    let s = sigmoid(x);
    s + x * s * (1.0 - s)
}

/// The same with the sign error this demo is about: σ(x) − x·σ(x)·(1 − σ(x)).
fn gate_partial_with_sign_error(x: f64) -> f64 {
    let s = sigmoid(x);
    s - x * s * (1.0 - s)
}

/// [`wrong_partial_with`] with the sign error, and every node carrying the
/// gradient a reference implementation reported (the same step with the
/// correct derivative, swept by Ebb): the demo as shipped.
pub fn wrong_partial() -> TraceFile {
    let reference = validate(wrong_partial_with(false)).expect("the reference trace is valid");
    let mut sweep = Sweep::new(&reference, LedgerMode::Off);
    sweep.run_to_end();
    let mut file = wrong_partial_with(true);
    for (index, node) in file.nodes.iter_mut().enumerate() {
        if let Some(adjoint) = sweep.adjoint(index) {
            node.reported = Some(crate::record::value_repr(&adjoint));
        }
    }
    file
}

/// A delivery-time model for a bakery's vans: 3 route features → dense → a
/// custom `smooth_gate` layer whose partial is written by hand → dense → mse.
/// With `sign_error` the recorded partial is σ(x) − x·σ(x)(1 − σ(x)) instead of
/// σ(x) + x·σ(x)(1 − σ(x)): no NaN, no flag, just wrong gradients upstream.
pub fn wrong_partial_with(sign_error: bool) -> TraceFile {
    let mut tape = Tape::new("bakery vans: a custom gate with a sign error", Dtype::F64);
    tape.describe(
        "A delivery-time model with a hand-written smooth_gate layer (x * sigmoid(x)) whose recorded partial flips the sign of one term; reported gradients come from the reference implementation.",
    );
    let mut rng = SplitMix64::new(0x0B4E_3A75);
    let routes = tape.scoped("routes", |tape| {
        tape.input(
            "route_features",
            Value::from_parts(vec![4, 3], rng.fill(12, 1.5)),
        )
    });
    let minutes = tape.scoped("model", |tape| {
        let pre = tape.scoped("hidden", |tape| {
            dense(tape, &mut rng, "hidden", routes, 3, 5)
        });
        let gated = tape.scoped("gate", |tape| record_gate(tape, pre, sign_error));
        tape.scoped("out", |tape| dense(tape, &mut rng, "out", gated, 5, 1))
    });
    let loss = tape.scoped("loss", |tape| {
        let observed = tape.input(
            "observed_minutes",
            Value::from_parts(vec![4, 1], rng.fill(4, 1.0)),
        );
        let loss = tape.mse(minutes, observed);
        tape.rename(loss, "loss")
    });
    tape.finish(loss)
}

/// Records the custom gate with its forward value and diagonal partial.
fn record_gate(tape: &mut Tape, x: Var, sign_error: bool) -> Var {
    let input = tape.value(x).clone();
    let value = input.map(gate);
    let partial = if sign_error {
        gate_partial_with_sign_error
    } else {
        gate_partial
    };
    let diagonal = input.to_f64().iter().map(|&xi| partial(xi)).collect();
    let gated = tape
        .custom(GATE, &[x], value, vec![PartialRepr::Diagonal(diagonal)])
        .expect("the gate is a custom op");
    tape.rename(gated, "gated")
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Central finite differences (common practice; error O(h²)) confirm the
    /// correct partial and refute the one with the sign error.
    #[test]
    fn the_correct_partial_matches_finite_differences() {
        let h = 1e-5;
        for x in [-2.0, -0.3, 0.7, 1.9] {
            let numeric = (gate(x + h) - gate(x - h)) / (2.0 * h);
            assert!((gate_partial(x) - numeric).abs() < 1e-8, "x = {x}");
            assert!(
                (gate_partial_with_sign_error(x) - numeric).abs() > 1e-2,
                "x = {x}"
            );
        }
    }
}
