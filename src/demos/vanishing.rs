//! Vanishing gradients: a tower of 16 sigmoid layers.

use super::{SplitMix64, param_tensor};
use crate::dtype::Dtype;
use crate::record::Tape;
use crate::tensor::Value;
use crate::trace::TraceFile;

/// Layers in the tower.
pub const LAYERS: usize = 16;
const WIDTH: usize = 6;
const BATCH: usize = 4;

/// Sixteen sigmoid layers of width 6 in f32, each `σ(h @ W + b)`, scoring
/// how ripe a batch of four fruit crates is from six colour measurements.
/// Each layer's Jacobian is at most a quarter of its weights' gain (the
/// sigmoid's slope peaks at 1/4), so the first layers' gradients fall below 1e-8.
pub fn vanishing() -> TraceFile {
    let mut tape = Tape::new("fruit ripeness: a tower of sixteen sigmoids", Dtype::F32);
    tape.describe(
        "A ripeness score from six colour readings passes through 16 sigmoid layers; each sigmoid passes back at most a quarter of its adjoint, so the first layers' weight gradients fall below 1e-8.",
    );
    let mut rng = SplitMix64::new(0x5166_0016);
    let colours = tape.scoped("crates", |tape| {
        let data = rng.fill(BATCH * WIDTH, 1.0);
        tape.input("colours", Value::from_parts(vec![BATCH, WIDTH], data))
    });
    let mut h = colours;
    for layer in 1..=LAYERS {
        let name = format!("layer{layer:02}");
        h = tape.scoped("tower", |tape| {
            tape.scoped(&name, |tape| {
                let w = param_tensor(tape, &mut rng, &format!("{name}.w"), &[WIDTH, WIDTH], 0.6);
                let b = param_tensor(tape, &mut rng, &format!("{name}.b"), &[WIDTH], 0.1);
                let product = tape.matmul(h, w);
                let product = tape.rename(product, &format!("{name}.hw"));
                let pre = tape.add(product, b);
                let pre = tape.rename(pre, &format!("{name}.pre"));
                let out = tape.sigmoid(pre);
                tape.rename(out, &format!("{name}.out"))
            })
        });
    }
    let loss = tape.scoped("loss", |tape| {
        let ripeness = tape.input(
            "ripeness",
            Value::from_parts(
                vec![BATCH, WIDTH],
                rng.fill(BATCH * WIDTH, 0.5)
                    .iter()
                    .map(|x| 0.5 + x)
                    .collect(),
            ),
        );
        let loss = tape.mse(h, ripeness);
        tape.rename(loss, "loss")
    });
    tape.finish(loss)
}
