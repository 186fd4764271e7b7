//! Dropout without an op of its own: a multiply by a recorded mask.

use super::{SplitMix64, param_tensor};
use crate::dtype::Dtype;
use crate::record::Tape;
use crate::tensor::Value;
use crate::trace::TraceFile;

const BATCH: usize = 4;
const READINGS: usize = 5;
const HIDDEN: usize = 8;
const KINDS: usize = 3;
/// The probability of dropping a hidden unit.
pub const DROP: f64 = 0.25;

/// A two-layer classifier of weather-station readings into three kinds of
/// day, with dropout on its hidden layer. The mask is a `const` whose
/// entries are 0 (dropped) or 1/(1 − p) (kept and rescaled, so the expected
/// activation is unchanged): the dropped units pass back no adjoint, the kept
/// ones pass back theirs times 1/(1 − p).
pub fn dropout() -> TraceFile {
    let mut tape = Tape::new("weather stations: dropout as a recorded mask", Dtype::F32);
    tape.describe(
        "Five readings per station pass through a hidden layer of eight units with dropout p = 0.25, recorded as a multiply by a constant mask of 0 and 4/3; the dropped units' weights receive no gradient in this step.",
    );
    let mut rng = SplitMix64::new(0xD509_0025);
    let readings = tape.scoped("stations", |tape| {
        let data = rng.fill(BATCH * READINGS, 1.0);
        tape.input("readings", Value::from_parts(vec![BATCH, READINGS], data))
    });
    let hidden = tape.scoped("hidden", |tape| {
        let w = param_tensor(tape, &mut rng, "hidden.w", &[READINGS, HIDDEN], 0.6);
        let b = param_tensor(tape, &mut rng, "hidden.b", &[HIDDEN], 0.1);
        let product = tape.matmul(readings, w);
        let pre = tape.add(product, b);
        let pre = tape.rename(pre, "hidden.pre");
        let active = tape.relu(pre);
        let active = tape.rename(active, "hidden.relu");
        let keep = 1.0 / (1.0 - DROP);
        let mask: Vec<f64> = (0..BATCH * HIDDEN)
            .map(|_| if rng.unit() < DROP { 0.0 } else { keep })
            .collect();
        let mask = tape.constant("dropout.mask", Value::from_parts(vec![BATCH, HIDDEN], mask));
        let dropped = tape.mul(active, mask);
        tape.rename(dropped, "hidden.dropped")
    });
    let loss = tape.scoped("head", |tape| {
        let w = param_tensor(tape, &mut rng, "head.w", &[HIDDEN, KINDS], 0.6);
        let logits = tape.matmul(hidden, w);
        let logits = tape.rename(logits, "head.logits");
        let kinds: Vec<usize> = (0..BATCH).map(|_| rng.below(KINDS)).collect();
        let loss = tape.cross_entropy(logits, &kinds);
        tape.rename(loss, "loss")
    });
    tape.finish(loss)
}
