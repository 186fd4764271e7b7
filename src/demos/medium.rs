//! A medium network stored in the binary-backed form.

use super::{SplitMix64, dense};
use crate::dtype::Dtype;
use crate::record::Tape;
use crate::tensor::Value;
use crate::trace::TraceFile;

const BATCH: usize = 64;
const FEATURES: usize = 64;
const WIDTH: usize = 256;
const SPECIES: usize = 10;

/// A bird-call classifier in f32: 64 spectral features → three relu layers
/// of width 256 → 10 species, cross-entropy on a batch of 64 calls. About
/// 300 thousand elements: big enough to need the binary-backed form.
pub fn medium() -> TraceFile {
    let mut tape = Tape::new(
        "bird calls: three layers of 256 on a batch of 64",
        Dtype::F32,
    );
    tape.describe(
        "A bird-call classifier (64 spectral features, three relu layers of width 256, 10 species) on a batch of 64 recordings: a healthy step of realistic size, stored binary-backed.",
    );
    let mut rng = SplitMix64::new(0xB12D_CA11);
    let (spectra, species) = tape.scoped("calls", |tape| {
        let spectra = tape.input(
            "spectra",
            Value::from_parts(vec![BATCH, FEATURES], rng.fill(BATCH * FEATURES, 1.0)),
        );
        let species: Vec<usize> = (0..BATCH).map(|_| rng.below(SPECIES)).collect();
        (spectra, species)
    });
    let mut h = spectra;
    let mut fan_in = FEATURES;
    for layer in 1..=3 {
        let name = format!("layer{layer}");
        h = tape.scoped("body", |tape| {
            tape.scoped(&name, |tape| {
                let pre = dense(tape, &mut rng, &name, h, fan_in, WIDTH);
                let out = tape.relu(pre);
                tape.rename(out, &format!("{name}.relu"))
            })
        });
        fan_in = WIDTH;
    }
    let logits = tape.scoped("head", |tape| {
        dense(tape, &mut rng, "head", h, WIDTH, SPECIES)
    });
    let loss = tape.scoped("loss", |tape| {
        let loss = tape.cross_entropy(logits, &species);
        tape.rename(loss, "loss")
    });
    tape.finish(loss)
}
