//! The loops behind the op rules, over typed storage: matrix products through
//! a GEMM crate (`gemm`), elementwise maps and broadcast sums split over
//! output elements across threads (`map`).
//!
//! Every kernel gives the same bits on one thread and on many: work is split
//! over output elements, never along a sum (the ledger, undo and the replays
//! compare sweeps bit for bit).

pub mod arith;
pub mod gemm;
pub mod im2col;
pub mod map;

/// Elements below which work stays on the calling thread: splitting costs
/// more than it gains on small tensors (measured; see benches/network.rs).
pub const PARALLEL_THRESHOLD: usize = 1 << 15;

/// Elements handled per task and per widening buffer.
pub const CHUNK: usize = 1 << 12;

#[cfg(test)]
mod tests {
    use crate::dtype::Dtype;
    use crate::ops::{self, Attrs, Op, Precision, VjpArgs};
    use crate::tensor::Value;

    /// Forward values and every input's contribution of the structured ops
    /// that split work over threads (convolution, the normalisations,
    /// pooling), as bytes.
    fn every_result(cases: &[(Op, Vec<Value>, Attrs)], precision: Precision) -> Vec<Vec<u8>> {
        let mut out = Vec::new();
        for (op, inputs, attrs) in cases {
            let inputs: Vec<&Value> = inputs.iter().collect();
            let y = ops::forward(*op, &inputs, attrs, precision);
            let g = Value::from_parts(
                y.shape().to_vec(),
                (0..y.len())
                    .map(|i| ((i * 37 % 101) as f64 - 50.0) / 25.0)
                    .collect(),
            )
            .stored_as(precision.dtype);
            out.push(format!("{:?}", y.to_f64()).into_bytes());
            for slot in 0..inputs.len() {
                let args = VjpArgs {
                    slot,
                    inputs: &inputs,
                    output: &y,
                    adjoint: &g,
                    attrs,
                    precision,
                };
                let contribution = ops::vjp(*op, &args);
                let bits: Vec<u64> = contribution.to_f64().iter().map(|v| v.to_bits()).collect();
                out.push(format!("{bits:?}").into_bytes());
            }
        }
        out
    }

    // The module's promise: the same bits on one thread and on several.
    #[test]
    fn structured_ops_give_the_same_bits_on_any_thread_count() {
        let filled = |shape: &[usize], dtype: Dtype| {
            let count = shape.iter().product();
            let data = (0..count)
                .map(|i| ((i * 7919 % 1009) as f64 - 504.0) / 300.0)
                .collect();
            Value::from_parts(shape.to_vec(), data).stored_as(dtype)
        };
        for (dtype, accumulate) in [
            (Dtype::F32, Dtype::F32),
            (Dtype::F16, Dtype::F32),
            (Dtype::Bf16, Dtype::Bf16),
        ] {
            let precision = Precision::new(dtype, accumulate);
            let v = |shape: &[usize]| filled(shape, dtype);
            let padded = Attrs {
                padding: Some(vec![1]),
                ..Attrs::default()
            };
            let pool = Attrs {
                kernel: Some(vec![3]),
                stride: Some(vec![2]),
                ..Attrs::default()
            };
            let groups = Attrs {
                groups: Some(4),
                ..Attrs::default()
            };
            let cases = vec![
                (
                    Op::Conv2d,
                    vec![v(&[6, 8, 20, 20]), v(&[16, 8, 3, 3]), v(&[16])],
                    padded,
                ),
                (
                    Op::BatchNorm,
                    vec![v(&[6, 16, 20, 20]), v(&[16]), v(&[16])],
                    Attrs::default(),
                ),
                (
                    Op::GroupNorm,
                    vec![v(&[6, 16, 20, 20]), v(&[16]), v(&[16])],
                    groups,
                ),
                (
                    Op::LayerNorm,
                    vec![v(&[64, 512]), v(&[512]), v(&[512])],
                    Attrs::default(),
                ),
                (
                    Op::RmsNorm,
                    vec![v(&[64, 512]), v(&[512])],
                    Attrs::default(),
                ),
                (Op::MaxPool2d, vec![v(&[6, 16, 21, 21])], pool),
            ];
            let on = |threads: usize| {
                let pool = rayon::ThreadPoolBuilder::new()
                    .num_threads(threads)
                    .build()
                    .unwrap();
                pool.install(|| every_result(&cases, precision))
            };
            let one = on(1);
            assert_eq!(one, on(3), "{dtype:?} accumulated in {accumulate:?}");
            assert_eq!(one, on(4), "{dtype:?} accumulated in {accumulate:?}");
        }
    }
}
