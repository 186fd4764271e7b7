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
}

impl Network {
    /// Every network, in the order the benchmark reports them.
    pub const ALL: [Network; 2] = [Network::Mlp, Network::DeepTanh];

    /// The name the benchmark and the peer script use.
    pub fn name(self) -> &'static str {
        match self {
            Network::Mlp => "mlp",
            Network::DeepTanh => "deep_tanh",
        }
    }

    /// The network's trace, recorded in `dtype`.
    pub fn record(self, dtype: Dtype) -> TraceFile {
        match self {
            Network::Mlp => mlp(256, &[784, 1024, 1024, 10], dtype),
            Network::DeepTanh => deep_tanh(64, 256, 32, dtype),
        }
    }
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
    let limit = glorot_limit(fan_in, fan_out);
    let w = tape.param(
        &format!("{name}.w"),
        Value::from_parts(vec![fan_in, fan_out], rng.fill(fan_in * fan_out, limit)),
    );
    let b = tape.param(
        &format!("{name}.b"),
        Value::from_parts(vec![fan_out], rng.fill(fan_out, 0.1)),
    );
    let product = tape.matmul(x, w);
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

#[cfg(test)]
mod tests {
    use super::*;
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
}
