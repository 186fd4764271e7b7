//! Half precision: an f16 run whose small gradients underflow to zero.

use super::{SplitMix64, param_tensor};
use crate::dtype::Dtype;
use crate::record::Tape;
use crate::tensor::Value;
use crate::trace::TraceFile;

const BATCH: usize = 16;
const FEATURES: usize = 8;
const HIDDEN: usize = 8;

/// [`underflow_in`] in f16: the demo as shipped.
pub fn underflow() -> TraceFile {
    underflow_in(Dtype::F16)
}

/// A nearly converged soil-moisture regressor (8 small sensor deltas → 8
/// relu units → 1 output) whose targets sit within a few thousandths of its
/// predictions. The loss's adjoint is already small; multiplied by small
/// weights and small inputs, the first layer's gradient entries fall below
/// f16's smallest subnormal, 2⁻²⁴, and become exactly 0. Recorded in any
/// dtype so tests can compare the same step in f32.
pub fn underflow_in(dtype: Dtype) -> TraceFile {
    let mut tape = Tape::new("soil moisture in f16: gradients that flush to zero", dtype);
    tape.describe(
        "A nearly converged soil-moisture regressor run in f16: the loss gradient is small, the first layer's weight gradients fall below 2^-24 and flush to exactly zero (no loss scaling).",
    );
    let mut rng = SplitMix64::new(0x0F16_0F16);
    let deltas = tape.scoped("probes", |tape| {
        let data = rng.fill(BATCH * FEATURES, 0.02);
        tape.input(
            "moisture_deltas",
            Value::from_parts(vec![BATCH, FEATURES], data),
        )
    });
    let prediction = tape.scoped("model", |tape| {
        let w1 = param_tensor(tape, &mut rng, "hidden.w", &[FEATURES, HIDDEN], 0.5);
        let b1 = param_tensor(tape, &mut rng, "hidden.b", &[HIDDEN], 0.1);
        let product = tape.matmul(deltas, w1);
        let pre = tape.add(product, b1);
        let hidden = tape.relu(pre);
        let hidden = tape.rename(hidden, "hidden.relu");
        let w2 = param_tensor(tape, &mut rng, "out.w", &[HIDDEN, 1], 0.05);
        let b2 = tape.param("out.b", Value::from_parts(vec![1], vec![0.4]));
        let product = tape.matmul(hidden, w2);
        let out = tape.add(product, b2);
        tape.rename(out, "predicted")
    });
    let loss = tape.scoped("loss", |tape| {
        let measured: Vec<f64> = tape
            .value(prediction)
            .to_f64()
            .iter()
            .map(|p| p + rng.symmetric(0.004))
            .collect();
        let measured = tape.input("measured", Value::from_parts(vec![BATCH, 1], measured));
        let loss = tape.mse(prediction, measured);
        tape.rename(loss, "loss")
    });
    tape.finish(loss)
}
