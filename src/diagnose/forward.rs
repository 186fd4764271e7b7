//! Forward consistency: every catalog node's forward value recomputed from
//! its recorded inputs with the op table, under the precision model (the
//! node's dtype and the trace's accumulation dtype), and compared with what
//! was recorded. A broken exporter, a corrupted file or a hand-edited value
//! shows up here; ordinary rounding differences do not.
//!
//! The tolerance of element i, with u = 2^-p the unit roundoff of the node's
//! dtype (p its precision: 11 for f16, 8 for bf16, 24 for f32, 53 for f64)
//! and u_acc that of the accumulation dtype:
//!
//! ```text
//! tol_i = slack · (8 · u · |y_i| + 4 · n · u_acc · T) + the dtype's smallest subnormal
//! ```
//!
//! The first term allows a few units in the last place for an elementwise
//! op computed by another faithful library, or rounded twice (computed in
//! f32, then rounded into f16). The second bounds the error of a sum of n
//! terms whose magnitudes add up to at most T, whatever order the exporter
//! summed them in: |fl(Σ) − Σ| ≤ γ_n Σ|terms| with γ_n ≈ n·u (Higham,
//! "Accuracy and Stability of Numerical Algorithms", 2nd ed., SIAM 2002,
//! §3.1). n is the inner dimension of a matmul and the number of elements
//! summed per output element for reductions (0 for elementwise ops); T is
//! n·max|a|·max|b| for a matmul, n·max|x| for a sum, max|x| for a mean and
//! max over inputs and output for the other structured ops (softmax,
//! logsumexp, cross-entropy, mean squared error, …). Add and subtract count
//! as n = 1 with T the sum of their inputs' largest magnitudes, because an
//! exporter may have fused them into the product before (one rounding of
//! a·b + c where the trace records round(a·b) and its sum with c: the two
//! differ by up to an ulp of a·b, however small a·b + c is). The bound is loose on
//! purpose: it passes every legitimate reordering and catches values that
//! are wrong, not merely rounded differently. `slack` is the `forward_slack`
//! setting.

use crate::ops::{self, Op};
use crate::tensor::{Value, scan};
use crate::trace::Trace;
use serde::Serialize;

/// A node whose recorded forward value disagrees with its recomputation.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Mismatch {
    /// The node.
    pub node: usize,
    /// Its sweep step (0-based).
    pub step: usize,
    /// Flat index of the element furthest beyond its tolerance.
    pub element: usize,
    /// The recorded element.
    pub recorded: f64,
    /// The op table's element.
    pub recomputed: f64,
    /// That element's tolerance.
    pub tolerance: f64,
    /// Elements beyond their tolerance.
    pub count: usize,
}

impl Mismatch {
    /// |recorded − recomputed| (inf when exactly one is not finite, or they differ in kind).
    pub fn error(&self) -> f64 {
        if self.recorded.is_finite() && self.recomputed.is_finite() {
            (self.recorded - self.recomputed).abs()
        } else {
            f64::INFINITY
        }
    }
}

/// The forward consistency check of one trace.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct ForwardCheck {
    /// Catalog nodes recomputed.
    pub checked: usize,
    /// Custom nodes, which have no forward rule to recompute with.
    pub custom: usize,
    /// Nodes beyond tolerance, in sweep order.
    pub mismatches: Vec<Mismatch>,
}

/// Terms summed per output element, and a bound on the sum of their magnitudes.
fn sum_size(op: Op, inputs: &[&Value], output: &Value) -> (f64, f64) {
    // The largest finite magnitude, from one vectorised pass in the value's own dtype.
    let max_abs = |value: &Value| value.survey().max_abs;
    if matches!(op, Op::Add | Op::Sub) {
        // An exporter may fuse the add into the product before it (PyTorch's
        // addmm adds the bias in the GEMM's accumulator and rounds once):
        // the recorded sum then differs from the sum of the recorded, rounded
        // product by up to an ulp of the product, which cancellation can
        // make far larger than an ulp of the sum. One term of the inputs'
        // size covers it (common practice for fused multiply-add).
        return (1.0, inputs.iter().map(|input| max_abs(input)).sum());
    }
    if op.is_elementwise() {
        return (0.0, 0.0);
    }
    let out = output.len().max(1) as f64;
    match op {
        Op::Matmul => {
            let inner = *inputs[0].shape().last().unwrap_or(&1) as f64;
            (inner, inner * max_abs(inputs[0]) * max_abs(inputs[1]))
        }
        Op::Sum => {
            let n = (inputs[0].len() as f64 / out).max(1.0);
            (n, n * max_abs(inputs[0]))
        }
        Op::Mean => {
            let n = (inputs[0].len() as f64 / out).max(1.0);
            (n, max_abs(inputs[0]))
        }
        _ => {
            let largest = inputs.iter().map(|input| input.len()).max().unwrap_or(1) as f64;
            let n = (largest / out).max(1.0);
            let magnitude = inputs
                .iter()
                .map(|input| max_abs(input))
                .fold(max_abs(output), f64::max);
            (n, magnitude.max(1.0))
        }
    }
}

/// Recomputes every swept catalog node from its recorded inputs and lists
/// those whose recorded value lies beyond the tolerance (module docs).
pub fn check_forward(trace: &Trace, slack: f64) -> ForwardCheck {
    let mut check = ForwardCheck::default();
    for (step, &node) in trace.sweep_order().iter().enumerate() {
        let recorded = trace.node(node);
        if recorded.op.is_leaf() {
            continue;
        }
        if recorded.op == Op::Custom {
            check.custom += 1;
            continue;
        }
        check.checked += 1;
        let inputs: Vec<&Value> = recorded
            .inputs
            .iter()
            .map(|&input| &trace.node(input).value)
            .collect();
        let precision = trace.precision(node);
        let recomputed = ops::forward(recorded.op, &inputs, &recorded.attrs, precision);
        let (n, terms) = sum_size(recorded.op, &inputs, &recomputed);
        let unit = |dtype: crate::dtype::Dtype| (-(dtype.limits().precision as f64)).exp2();
        let relative = 8.0 * unit(precision.dtype);
        let absolute = 4.0 * n * unit(precision.accumulate) * terms;
        let floor = precision.dtype.limits().min_subnormal();
        let mut worst: Option<(usize, f64, f64, f64)> = None;
        let mut count = 0;
        let mut compare = |element: usize, a: f64, b: f64| {
            let excess = if a.is_nan() && b.is_nan() || (a.is_infinite() && a == b) {
                return;
            } else if !(a.is_finite() && b.is_finite()) {
                f64::INFINITY
            } else {
                let tolerance = slack * (relative * b.abs() + absolute) + floor;
                let error = (a - b).abs();
                if error <= tolerance {
                    return;
                }
                error / tolerance
            };
            count += 1;
            if worst.is_none_or(|(_, most, _, _)| excess > most) {
                worst = Some((element, excess, a, b));
            }
        };
        let (got, want) = (recorded.value.elements(), recomputed.elements());
        if got.len() == want.len() {
            // In blocks, without a widened copy of either tensor.
            scan::scan_zip([got, want], |element, [a, b]| compare(element, a, b));
        } else {
            let (got, want) = (got.to_vec_f64(), want.to_vec_f64());
            for (element, (&a, &b)) in got.iter().zip(want.iter()).enumerate() {
                compare(element, a, b);
            }
        }
        if let Some((element, _, a, b)) = worst {
            check.mismatches.push(Mismatch {
                node,
                step,
                element,
                recorded: a,
                recomputed: b,
                tolerance: slack * (relative * b.abs() + absolute) + floor,
                count,
            });
        }
    }
    check
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::dtype::Dtype;
    use crate::record::Tape;

    #[test]
    fn every_demo_is_consistent_with_the_op_table() {
        for (name, file) in crate::demos::all() {
            let trace = Trace::try_from(file).unwrap();
            let check = check_forward(&trace, 1.0);
            assert!(
                check.mismatches.is_empty(),
                "{name}: {:?}",
                check.mismatches
            );
            assert!(check.checked > 0, "{name}");
        }
    }

    // A bias added inside the product's accumulator (one rounding of a·b + c,
    // here f64::mul_add, IEEE 754-2019 §5.4.1 fusedMultiplyAdd) against the
    // recorded, rounded product plus the bias: with a·b = 1 − 2^-54 (exact for
    // a = fl(1/3), b = 3) and c = −1, the fused result is −2^-54 while
    // fl(a·b) + c = 0. That must pass; a sum off by 1e-9 must not.
    #[test]
    fn an_add_fused_into_the_product_passes_and_a_wrong_one_does_not() {
        let (a, b, c) = (1.0f64 / 3.0, 3.0f64, -1.0f64);
        assert_eq!(a * b, 1.0);
        assert_eq!(a.mul_add(b, c), -(2f64.powi(-54)));
        let record = |sum: f64| {
            let mut tape = Tape::new("fused", Dtype::F64);
            let x = tape.input("x", Value::from_parts(vec![1, 1], vec![a]));
            let w = tape.param("w", Value::from_parts(vec![1, 1], vec![b]));
            let bias = tape.param("bias", Value::from_parts(vec![1, 1], vec![c]));
            let product = tape.matmul(x, w);
            let biased = tape.add(product, bias);
            let mut file = tape.finish(biased);
            file.nodes[4].value = crate::trace::ValueRepr::Tensor {
                shape: vec![1, 1],
                data: vec![sum],
            };
            Trace::try_from(file).unwrap()
        };
        assert!(
            check_forward(&record(a.mul_add(b, c)), 1.0)
                .mismatches
                .is_empty()
        );
        let wrong = check_forward(&record(1e-9), 1.0);
        assert_eq!(wrong.mismatches.len(), 1);
        assert_eq!(wrong.mismatches[0].node, 4);
    }

    // Summation order: the same f32 dot product summed forwards and
    // backwards differs by rounding only, which the tolerance must pass
    // (Higham 2002, §3.1: the error of either order is at most γ_n Σ|terms|).
    #[test]
    fn a_sum_taken_in_another_order_passes() {
        let n = 512;
        let a: Vec<f64> = (0..n)
            .map(|k| ((k * 37 % 101) as f64 - 50.0) / 7.0)
            .collect();
        let b: Vec<f64> = (0..n)
            .map(|k| ((k * 53 % 97) as f64 - 48.0) / 11.0)
            .collect();
        let mut tape = Tape::new("order", Dtype::F32);
        let x = tape.input("x", Value::from_parts(vec![1, n], a.clone()));
        let y = tape.input("y", Value::from_parts(vec![n, 1], b.clone()));
        let z = tape.matmul(x, y);
        let mut file = tape.finish(z);
        // The exporter summed the products backwards, in f32.
        let backwards = (0..n)
            .rev()
            .fold(0.0f32, |acc, k| acc + (a[k] as f32) * (b[k] as f32));
        file.nodes[2].value = crate::trace::ValueRepr::Tensor {
            shape: vec![1, 1],
            data: vec![backwards as f64],
        };
        let trace = Trace::try_from(file).unwrap();
        assert!(check_forward(&trace, 1.0).mismatches.is_empty());
    }
}
