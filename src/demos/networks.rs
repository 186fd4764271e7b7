//! Network-shaped traces at the sizes people train, generated with the
//! recorder from fixed seeds, for the benchmarks and for tests at real size.
//! `benches/peer/torch_step.py` builds the same networks in PyTorch, so the
//! two can be timed side by side.

use super::rng::{SplitMix64, glorot_limit};
use crate::dtype::Dtype;
use crate::record::{Tape, Var};
use crate::tensor::Value;
use crate::trace::TraceFile;

/// A network the benchmarks know by name, with the shapes the PyTorch peer uses.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Network {
    /// Batch 256 through 784-1024-1024-10 with ReLU, cross-entropy loss.
    Mlp,
    /// 32 tanh layers of 256 units on a batch of 64, mean-squared-error loss.
    DeepTanh,
    /// A small image classifier: batch 64 of 3×32×32 through two 3×3
    /// convolutions (32 and 64 channels), each followed by batch
    /// normalisation, ReLU and 2×2 max pooling, then a linear head on the
    /// flattened 64×8×8 features onto 10 classes, log-softmax and nll_loss.
    Cnn,
    /// Four pre-norm transformer blocks (width 256, 4 heads, feed-forward
    /// 1024 with exact GELU, attention with a causal mask of −inf above the
    /// diagonal) on 8 sequences of 128 token vectors, a final layer norm,
    /// the mean over the sequence, a linear head onto 10 classes and
    /// cross-entropy.
    TransformerStack,
}

impl Network {
    /// Every network, in the order the benchmark reports them.
    pub const ALL: [Network; 4] = [
        Network::Mlp,
        Network::DeepTanh,
        Network::Cnn,
        Network::TransformerStack,
    ];

    /// The name the benchmark and the peer script use.
    pub fn name(self) -> &'static str {
        match self {
            Network::Mlp => "mlp",
            Network::DeepTanh => "deep_tanh",
            Network::Cnn => "cnn",
            Network::TransformerStack => "transformer_stack",
        }
    }

    /// The network's trace, recorded in `dtype`.
    pub fn record(self, dtype: Dtype) -> TraceFile {
        match self {
            Network::Mlp => mlp(256, &[784, 1024, 1024, 10], dtype),
            Network::DeepTanh => deep_tanh(64, 256, 32, dtype),
            Network::Cnn => cnn(
                Images {
                    batch: 64,
                    side: 32,
                    channels: [32, 64],
                    classes: 10,
                },
                dtype,
            ),
            Network::TransformerStack => transformer_stack(
                Blocks {
                    batch: 8,
                    tokens: 128,
                    width: 256,
                    heads: 4,
                    hidden: 1024,
                    layers: 4,
                    classes: 10,
                },
                dtype,
            ),
        }
    }
}

/// A linear layer without bias, `x @ w`, weights uniform in
/// ±√(6/(fan_in + fan_out)).
fn linear(
    tape: &mut Tape,
    rng: &mut SplitMix64,
    x: Var,
    fan_in: usize,
    fan_out: usize,
    name: &str,
) -> Var {
    let limit = glorot_limit(fan_in, fan_out);
    let w = tape.param(
        &format!("{name}.w"),
        Value::from_parts(vec![fan_in, fan_out], rng.fill(fan_in * fan_out, limit)),
    );
    tape.matmul(x, w)
}

/// A dense layer `x @ w + b`, weights uniform in ±√(6/(fan_in + fan_out)).
fn dense(
    tape: &mut Tape,
    rng: &mut SplitMix64,
    x: Var,
    fan_in: usize,
    fan_out: usize,
    name: &str,
) -> Var {
    let product = linear(tape, rng, x, fan_in, fan_out, name);
    let b = tape.param(
        &format!("{name}.b"),
        Value::from_parts(vec![fan_out], rng.fill(fan_out, 0.1)),
    );
    tape.add(product, b)
}

/// A ReLU multilayer perceptron over `widths` (input first, classes last)
/// on a batch of `batch`, with a cross-entropy loss.
pub fn mlp(batch: usize, widths: &[usize], dtype: Dtype) -> TraceFile {
    let mut rng = SplitMix64::new(0x6d6c_7001);
    let mut tape = Tape::new("mlp step", dtype);
    tape.describe(
        "A ReLU perceptron on a batch of random inputs: the shape of a classifier's training step.",
    );
    let mut h = tape.input(
        "x",
        Value::from_parts(vec![batch, widths[0]], rng.fill(batch * widths[0], 1.0)),
    );
    let layers = widths.len() - 1;
    for (layer, pair) in widths.windows(2).enumerate() {
        h = tape.scoped(&format!("layer{}", layer + 1), |tape| {
            let pre = dense(
                tape,
                &mut rng,
                h,
                pair[0],
                pair[1],
                &format!("layer{}", layer + 1),
            );
            if layer + 1 < layers {
                tape.relu(pre)
            } else {
                pre
            }
        });
    }
    let classes = widths[layers];
    let targets: Vec<usize> = (0..batch)
        .map(|_| (rng.next_u64() % classes as u64) as usize)
        .collect();
    let loss = tape.cross_entropy(h, &targets);
    tape.finish(loss)
}

/// `depth` tanh layers of `width` units on a batch of `batch`, regressed onto
/// zero targets by mean squared error: the shape of a deep narrow tower.
pub fn deep_tanh(batch: usize, width: usize, depth: usize, dtype: Dtype) -> TraceFile {
    let mut rng = SplitMix64::new(0x7461_6e68);
    let mut tape = Tape::new("deep tanh tower step", dtype);
    tape.describe("A deep narrow tanh tower on a batch of random inputs.");
    let mut h = tape.input(
        "x",
        Value::from_parts(vec![batch, width], rng.fill(batch * width, 1.0)),
    );
    for layer in 0..depth {
        h = tape.scoped(&format!("layer{:02}", layer + 1), |tape| {
            let pre = dense(
                tape,
                &mut rng,
                h,
                width,
                width,
                &format!("layer{:02}", layer + 1),
            );
            tape.tanh(pre)
        });
    }
    let target = tape.input("target", Value::filled(&[batch, width], 0.0));
    let loss = tape.mse(h, target);
    tape.finish(loss)
}

/// The shape of [`cnn`]'s step.
#[derive(Debug, Clone, Copy)]
pub struct Images {
    /// Images per batch.
    pub batch: usize,
    /// Height and width of each 3-channel image (a multiple of 4).
    pub side: usize,
    /// Output channels of the two convolutions.
    pub channels: [usize; 2],
    /// Classes of the head.
    pub classes: usize,
}

/// A convolution's weight [out, in, k, k], uniform in ±√(6/(fan_in +
/// fan_out)) with the fans counted over the kernel's taps. No bias: batch
/// normalisation follows and subtracts each channel's mean, which cancels
/// a bias exactly, so its gradient is 0 up to rounding (Ioffe & Szegedy,
/// "Batch Normalization", ICML 2015, §3.2) and the diagnosis would rightly
/// call it vanishing; PyTorch's peer uses `bias=False` for the same reason.
fn conv_weight(
    tape: &mut Tape,
    rng: &mut SplitMix64,
    name: &str,
    (inputs, outputs): (usize, usize),
    kernel: usize,
) -> Var {
    let taps = kernel * kernel;
    let limit = glorot_limit(inputs * taps, outputs * taps);
    tape.param(
        &format!("{name}.w"),
        Value::from_parts(
            vec![outputs, inputs, kernel, kernel],
            rng.fill(outputs * inputs * taps, limit),
        ),
    )
}

/// A normalisation's weight (ones, slightly perturbed so that its gradient
/// check is not at a special point) and bias (small), each [width].
fn norm_params(tape: &mut Tape, rng: &mut SplitMix64, name: &str, width: usize) -> (Var, Var) {
    let ones: Vec<f64> = rng.fill(width, 0.1).iter().map(|v| 1.0 + v).collect();
    let w = tape.param(&format!("{name}.w"), Value::from_parts(vec![width], ones));
    let b = tape.param(
        &format!("{name}.b"),
        Value::from_parts(vec![width], rng.fill(width, 0.1)),
    );
    (w, b)
}

/// A small image classifier's training step on invented data (random
/// images, random labels): conv 3×3 (padding 1, no bias) → batch norm (training
/// mode) → ReLU → 2×2 max pool, twice; the remaining channels × (side/4)²
/// features flattened; a linear head; log-softmax and the mean nll_loss,
/// which together are cross-entropy.
pub fn cnn(shape: Images, dtype: Dtype) -> TraceFile {
    let Images {
        batch,
        side,
        channels,
        classes,
    } = shape;
    let mut rng = SplitMix64::new(0x636e_6e02);
    let mut tape = Tape::new("cnn step", dtype);
    tape.describe(
        "A small image classifier: two 3x3 convolutions with batch normalisation, ReLU and max pooling, and a linear head on the flattened features, on random images.",
    );
    let mut h = tape.input(
        "images",
        Value::from_parts(
            vec![batch, 3, side, side],
            rng.fill(batch * 3 * side * side, 1.0),
        ),
    );
    let mut width = 3;
    for (layer, &out) in channels.iter().enumerate() {
        let name = format!("conv{}", layer + 1);
        h = tape.scoped(&name, |tape| {
            let w = conv_weight(tape, &mut rng, &name, (width, out), 3);
            let y = tape.conv2d(h, w, None, 1, 1);
            let (gamma, beta) = norm_params(tape, &mut rng, &format!("{name}.bn"), out);
            let y = tape.batch_norm(y, Some(gamma), Some(beta), 1e-5);
            let y = tape.relu(y);
            tape.max_pool2d(y, 2, 2)
        });
        width = out;
    }
    let features = width * (side / 4) * (side / 4);
    let flat = tape.reshape(h, &[batch, features]);
    let logits = tape.scoped("head", |tape| {
        dense(tape, &mut rng, flat, features, classes, "head")
    });
    let log_probs = tape.log_softmax(logits, -1);
    let labels: Vec<f64> = (0..batch).map(|_| rng.below(classes) as f64).collect();
    let labels = tape.indices("labels", Value::from_parts(vec![batch], labels));
    let loss = tape.nll_loss(log_probs, labels);
    tape.finish(loss)
}

/// The shape of [`transformer_stack`]'s step.
#[derive(Debug, Clone, Copy)]
pub struct Blocks {
    /// Sequences per batch.
    pub batch: usize,
    /// Tokens per sequence.
    pub tokens: usize,
    /// Model width.
    pub width: usize,
    /// Attention heads (each `width / heads` wide).
    pub heads: usize,
    /// Width of the feed-forward layer.
    pub hidden: usize,
    /// Blocks.
    pub layers: usize,
    /// Classes of the head.
    pub classes: usize,
}

/// A layer normalisation over the last axis with its weight and bias.
fn normed(tape: &mut Tape, rng: &mut SplitMix64, x: Var, width: usize, name: &str) -> Var {
    let (w, b) = norm_params(tape, rng, name, width);
    tape.layer_norm(x, Some(w), Some(b), 1e-5)
}

/// Pre-norm transformer blocks classifying invented sequences (random token
/// vectors, random labels). Each block is x + attention(layer_norm(x)), then
/// x + ff(layer_norm(x)) with ff = linear → GELU (exact, x Φ(x)) → linear.
/// Attention is multi-head softmax(Q Kᵀ / √d_head + M) V with Q, K, V and
/// output projections, heads split by reshape and permute, and M the causal
/// mask: 0 on and below the diagonal, −inf above it (a token attends to
/// itself and the tokens before it), one constant broadcast over batch and
/// heads, as PyTorch's additive attention masks are. Softmax absorbs the
/// −inf (`sweep::masked`). After the blocks: a layer norm, the mean over the
/// sequence, a linear head and cross-entropy.
pub fn transformer_stack(shape: Blocks, dtype: Dtype) -> TraceFile {
    let Blocks {
        batch,
        tokens,
        width,
        heads,
        hidden,
        layers,
        classes,
    } = shape;
    let head = width / heads;
    let mut rng = SplitMix64::new(0x7472_616e_0002);
    let mut tape = Tape::new("transformer stack step", dtype);
    tape.describe(
        "Pre-norm transformer blocks (multi-head attention with a causal mask, a GELU feed-forward layer, layer norms, residuals) classifying random token sequences.",
    );
    let mut h = tape.input(
        "tokens",
        Value::from_parts(
            vec![batch, tokens, width],
            rng.fill(batch * tokens * width, 1.0),
        ),
    );
    let scale = tape.constant("scale", 1.0 / (head as f64).sqrt());
    let mask: Vec<f64> = (0..tokens * tokens)
        .map(|i| {
            if i % tokens <= i / tokens {
                0.0
            } else {
                f64::NEG_INFINITY
            }
        })
        .collect();
    let mask = tape.constant("causal_mask", Value::from_parts(vec![tokens, tokens], mask));
    for layer in 0..layers {
        let name = format!("block{}", layer + 1);
        h = tape.scoped(&name, |tape| {
            let a = normed(tape, &mut rng, h, width, &format!("{name}.ln1"));
            // The key projection has no bias: q·(k + b) adds the same q·b to
            // every score of a row, which softmax cancels, so a key bias
            // gets a gradient of 0 up to rounding (closed form; PyTorch's
            // peer leaves it out too).
            let mut split = |tape: &mut Tape, what: &str| {
                let id = format!("{name}.{what}");
                let projected = if what == "k" {
                    linear(tape, &mut rng, a, width, width, &id)
                } else {
                    dense(tape, &mut rng, a, width, width, &id)
                };
                let parted = tape.reshape(projected, &[batch, tokens, heads, head]);
                tape.permute(parted, &[0, 2, 1, 3])
            };
            let q = split(tape, "q");
            let k = split(tape, "k");
            let v = split(tape, "v");
            let kt = tape.transpose(k);
            let scores = tape.matmul(q, kt);
            let scores = tape.mul(scores, scale);
            let scores = tape.add(scores, mask);
            let weights = tape.softmax(scores, -1);
            let mixed = tape.matmul(weights, v);
            let joined = tape.permute(mixed, &[0, 2, 1, 3]);
            let joined = tape.reshape(joined, &[batch, tokens, width]);
            let attended = dense(tape, &mut rng, joined, width, width, &format!("{name}.o"));
            let h = tape.add(h, attended);
            let m = normed(tape, &mut rng, h, width, &format!("{name}.ln2"));
            let up = dense(tape, &mut rng, m, width, hidden, &format!("{name}.up"));
            let up = tape.gelu(up);
            let down = dense(tape, &mut rng, up, hidden, width, &format!("{name}.down"));
            tape.add(h, down)
        });
    }
    let logits = tape.scoped("head", |tape| {
        let normed = normed(tape, &mut rng, h, width, "head.ln");
        let pooled = tape.mean_axis(normed, 1, false);
        dense(tape, &mut rng, pooled, width, classes, "head")
    });
    let labels: Vec<usize> = (0..batch).map(|_| rng.below(classes)).collect();
    let loss = tape.cross_entropy(logits, &labels);
    tape.finish(loss)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::diagnose::check_forward;
    use crate::eval::reevaluate;
    use crate::sweep::{LedgerMode, Sweep};
    use crate::trace::Trace;

    #[test]
    fn small_networks_validate_with_the_shapes_asked_for() {
        let trace = Trace::try_from(mlp(4, &[6, 5, 3], Dtype::F32)).unwrap();
        let w = trace.find("layer1.w").unwrap();
        assert_eq!(trace.node(w).value.shape(), &[6, 5]);
        assert_eq!(trace.node(w).value.storage_dtype(), Dtype::F32);
        let trace = Trace::try_from(deep_tanh(2, 3, 4, Dtype::F64)).unwrap();
        assert_eq!(trace.params().count(), 8);
    }

    fn small_cnn(dtype: Dtype) -> TraceFile {
        let shape = Images {
            batch: 4,
            side: 8,
            channels: [3, 4],
            classes: 3,
        };
        cnn(shape, dtype)
    }

    fn small_stack(dtype: Dtype) -> TraceFile {
        let shape = Blocks {
            batch: 2,
            tokens: 5,
            width: 8,
            heads: 2,
            hidden: 16,
            layers: 2,
            classes: 3,
        };
        transformer_stack(shape, dtype)
    }

    /// The sweep raises no flag and every node's recorded value is what its
    /// forward rule gives.
    fn sweeps_cleanly(trace: &Trace) -> Sweep<'_> {
        let mut sweep = Sweep::new(trace, LedgerMode::Off);
        sweep.run_to_end();
        // The transformer's causal mask is −inf on purpose; softmax absorbs it.
        let masking = crate::sweep::Masking::of(&sweep);
        let unexplained = masking.unexplained(sweep.flags());
        assert!(unexplained.is_empty(), "flags: {unexplained:?}");
        let forward = check_forward(trace, 1.0);
        assert!(forward.checked > 0);
        assert!(forward.mismatches.is_empty(), "{:?}", forward.mismatches);
        sweep
    }

    /// Sampled entries of every parameter's adjoint against central
    /// differences of the loss, re-evaluated through the op table in f64.
    /// Step h = ε^(1/3)·max(|x|, 1), which balances truncation error O(h²)
    /// against rounding error O(ε/h) (Press, Teukolsky, Vetterling &
    /// Flannery, "Numerical Recipes", 3rd ed., 2007, §5.7, eq. 5.7.8);
    /// agreement to about ε^(2/3) is expected, 1e-7 allowed for curvature.
    fn gradients_match_central_differences(file: TraceFile) {
        let trace = Trace::try_from(file).unwrap();
        let sweep = sweeps_cleanly(&trace);
        let mut rng = SplitMix64::new(0xfd);
        let mut checked = 0;
        for param in trace.params() {
            let value = &trace.node(param).value;
            let adjoint = sweep.adjoint(param).expect("every parameter is reached");
            for _ in 0..4 {
                let k = rng.below(value.len());
                let x = value.get(k);
                let h = f64::EPSILON.cbrt() * x.abs().max(1.0);
                let loss = |shift: f64| {
                    let mut moved = value.clone();
                    moved.set(k, x + shift);
                    let values = reevaluate(&trace, &[(param, moved)], Dtype::F64).unwrap();
                    values[trace.output()].as_scalar().unwrap()
                };
                let central = (loss(h) - loss(-h)) / (2.0 * h);
                let reverse = adjoint.get(k);
                assert!(
                    (central - reverse).abs() <= 1e-7 * reverse.abs().max(1.0),
                    "{} entry {k}: reverse {reverse}, central difference {central}",
                    trace.node(param).id
                );
                assert!(reverse != 0.0 || central.abs() < 1e-9);
                checked += 1;
            }
        }
        assert!(checked >= 30, "only {checked} entries checked");
    }

    #[test]
    fn cnn_gradients_match_central_differences() {
        gradients_match_central_differences(small_cnn(Dtype::F64));
    }

    #[test]
    fn transformer_stack_gradients_match_central_differences() {
        gradients_match_central_differences(small_stack(Dtype::F64));
    }

    #[test]
    fn small_instances_sweep_cleanly_in_f32() {
        for file in [small_cnn(Dtype::F32), small_stack(Dtype::F32)] {
            let trace = Trace::try_from(file).unwrap();
            sweeps_cleanly(&trace);
        }
    }

    /// `ebb check` and `ebb verify` on the small instances: no rule fires
    /// (the causal mask is noted, not flagged) and every check agrees.
    #[test]
    fn small_instances_check_and_verify_clean() {
        use crate::diagnose::{Settings, diagnose};
        use crate::verify::{Verdict, VerifyOptions, verify};
        for (file, masks) in [(small_cnn(Dtype::F32), 0), (small_stack(Dtype::F32), 3)] {
            let trace = Trace::try_from(file).unwrap();
            let diagnosis = diagnose(&trace, &Settings::default());
            assert!(
                diagnosis.is_clean(),
                "{}: {} {:?}",
                trace.title(),
                diagnosis.headline,
                diagnosis.findings
            );
            // The mask constant, and the masked scores of each of the two blocks.
            assert_eq!(diagnosis.masked.len(), masks, "{}", trace.title());
            let verification = verify(&trace, &VerifyOptions::default());
            assert_eq!(
                verification.verdict(),
                Verdict::Agrees,
                "{}",
                verification.to_text(&trace)
            );
        }
    }

    #[test]
    fn the_benchmark_networks_have_the_sizes_asked_for() {
        let trace = Trace::try_from(Network::Cnn.record(Dtype::F32)).unwrap();
        let w = trace.find("conv2.w").unwrap();
        assert_eq!(trace.node(w).value.shape(), &[64, 32, 3, 3]);
        let images = trace.find("images").unwrap();
        assert_eq!(trace.node(images).value.shape(), &[64, 3, 32, 32]);
        let head = trace.find("head.w").unwrap();
        assert_eq!(trace.node(head).value.shape(), &[64 * 8 * 8, 10]);
        let trace = Trace::try_from(small_stack(Dtype::F32)).unwrap();
        // Per block: two norms (w, b), five dense layers (w, b) but for
        // the key projection's bias; then the final norm and the head.
        assert_eq!(trace.params().count(), 2 * (4 + 11) + 4);
    }
}
