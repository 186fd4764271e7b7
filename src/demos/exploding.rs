//! Exploding gradients: a linear recurrent cell unrolled over 50 steps.

use super::{SplitMix64, param_tensor};
use crate::dtype::Dtype;
use crate::record::Tape;
use crate::tensor::Value;
use crate::trace::TraceFile;

/// Time steps unrolled.
pub const STEPS: usize = 50;
/// The recurrent weight's gain: every singular value of W equals it.
pub const GAIN: f64 = 1.2;
const STATE: usize = 4;

/// The recurrent weight: `GAIN` times a rotation (two 2×2 blocks at angles
/// whose cosines and sines are exact: 3-4-5 and 5-12-13 triangles), so
/// ‖hW‖ = GAIN·‖h‖ for every h.
fn recurrent_weight() -> Vec<f64> {
    let (c1, s1) = (0.6, 0.8);
    let (c2, s2) = (5.0 / 13.0, 12.0 / 13.0);
    let rotation = [
        [c1, -s1, 0.0, 0.0],
        [s1, c1, 0.0, 0.0],
        [0.0, 0.0, c2, -s2],
        [0.0, 0.0, s2, c2],
    ];
    rotation
        .iter()
        .flatten()
        .map(|entry| GAIN * entry)
        .collect()
}

/// A linear recurrent cell h_t = h_{t−1} W + x_t U in f32 forecasting a
/// river's level from 50 hourly rain-gauge pairs. W has gain 1.2, so the
/// adjoint reaching step t grows like 1.2^(50 − t): about 7.6e3 at the first step.
pub fn exploding() -> TraceFile {
    let mut tape = Tape::new("river level: a recurrent cell with gain 1.2", Dtype::F32);
    tape.describe(
        "An hourly river-level forecaster unrolled over 50 rain-gauge readings; its recurrent weight scales every state by 1.2, so adjoints grow about 1.2x per step back in time.",
    );
    let mut rng = SplitMix64::new(0x0E1B_0050);
    let (w, u) = tape.scoped("cell", |tape| {
        let w = tape.param(
            "cell.w",
            Value::from_parts(vec![STATE, STATE], recurrent_weight()),
        );
        let u = param_tensor(tape, &mut rng, "cell.u", &[2, STATE], 0.5);
        (w, u)
    });
    let mut state = tape.scoped("cell", |tape| {
        tape.constant("h00", Value::from_parts(vec![1, STATE], vec![0.0; STATE]))
    });
    for step in 1..=STEPS {
        let name = format!("t{step:02}");
        state = tape.scoped("unrolled", |tape| {
            tape.scoped(&name, |tape| {
                let rain = tape.input(
                    &format!("{name}.rain"),
                    Value::from_parts(vec![1, 2], vec![rng.unit(), rng.unit()]),
                );
                let carried = tape.matmul(state, w);
                let carried = tape.rename(carried, &format!("{name}.hw"));
                let fresh = tape.matmul(rain, u);
                let fresh = tape.rename(fresh, &format!("{name}.xu"));
                let next = tape.add(carried, fresh);
                tape.rename(next, &format!("h{step:02}"))
            })
        });
    }
    let loss = tape.scoped("loss", |tape| {
        let level = tape.input(
            "observed_level",
            Value::from_parts(vec![1, STATE], rng.fill(STATE, 1.0)),
        );
        let loss = tape.mse(state, level);
        tape.rename(loss, "loss")
    });
    tape.finish(loss)
}
