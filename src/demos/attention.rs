//! Attention without an op of its own: matmul, a scale, a mask and softmax.

use super::{SplitMix64, param_tensor};
use crate::dtype::Dtype;
use crate::record::Tape;
use crate::tensor::Value;
use crate::trace::TraceFile;

const TOKENS: usize = 4;
const WIDTH: usize = 4;

/// One causal attention head over a four-note melody: each note attends to
/// itself and the notes before it. scores = q kᵀ / √d; masked =
/// where(causal, scores, −1e9); weights = softmax(masked); out = weights v.
/// The fill is a large finite number, so no non-finite value enters the
/// trace, and softmax gives the masked places a weight of exactly 0.
pub fn attention() -> TraceFile {
    let mut tape = Tape::new("melody: one causal attention head", Dtype::F32);
    tape.describe(
        "Four notes attend causally to the notes before them: queries, keys and values are matmuls, the scores are scaled by 1/sqrt(4), masked with where(causal, scores, -1e9) and normalised by softmax. Masked places get weight 0 and pass back no adjoint.",
    );
    let mut rng = SplitMix64::new(0xA77E_4701);
    let notes = tape.scoped("melody", |tape| {
        let data = rng.fill(TOKENS * WIDTH, 1.0);
        tape.input("notes", Value::from_parts(vec![TOKENS, WIDTH], data))
    });
    let out = tape.scoped("head", |tape| {
        let mut project = |tape: &mut Tape, name: &str| {
            let w = param_tensor(
                tape,
                &mut rng,
                &format!("head.{name}"),
                &[WIDTH, WIDTH],
                0.5,
            );
            let projected = tape.matmul(notes, w);
            tape.rename(projected, name)
        };
        let (q, k, v) = (project(tape, "q"), project(tape, "k"), project(tape, "v"));
        let kt = tape.transpose(k);
        let scores = tape.matmul(q, kt);
        let scale = tape.constant("scale", 1.0 / (WIDTH as f64).sqrt());
        let scores = tape.mul(scores, scale);
        let scores = tape.rename(scores, "scores");
        let causal: Vec<f64> = (0..TOKENS * TOKENS)
            .map(|i| if i % TOKENS <= i / TOKENS { 1.0 } else { 0.0 })
            .collect();
        let causal = tape.constant("causal", Value::from_parts(vec![TOKENS, TOKENS], causal));
        let fill = tape.constant("fill", -1e9);
        let masked = tape.where_(causal, scores, fill);
        let masked = tape.rename(masked, "masked");
        let weights = tape.softmax(masked, -1);
        let weights = tape.rename(weights, "weights");
        let out = tape.matmul(weights, v);
        tape.rename(out, "out")
    });
    let loss = tape.scoped("loss", |tape| {
        let next = rng.fill(TOKENS * WIDTH, 1.0);
        let next = tape.input("next_notes", Value::from_parts(vec![TOKENS, WIDTH], next));
        let loss = tape.mse(out, next);
        tape.rename(loss, "loss")
    });
    tape.finish(loss)
}
