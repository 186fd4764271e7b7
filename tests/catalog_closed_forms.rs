//! The network ops of the catalog against published values, closed forms,
//! an independent dual-number library and independently written reference
//! implementations. Each check names its source beside it.

mod common;

use common::{Rng, adjoint, assert_close, checked, random_tensor, swept};
use ebb::dtype::Dtype;
use ebb::ops::{self, Approximate, Attrs, Op, VjpArgs};
use ebb::record::Tape;
use ebb::tensor::Value;
use num_dual::{Dual64, DualNum};

/// The op's partial at scalar inputs, through the op table.
fn partial(op: Op, slot: usize, inputs: &[f64], attrs: &Attrs) -> f64 {
    let values: Vec<Value> = inputs.iter().map(|&x| Value::Scalar(x)).collect();
    let refs: Vec<&Value> = values.iter().collect();
    let output = ops::forward(op, &refs, attrs, Dtype::F64)
        .as_scalar()
        .unwrap();
    ops::scalar_partial(op, slot, inputs, output, attrs, Dtype::F64).unwrap()
}

fn value(op: Op, inputs: &[f64], attrs: &Attrs) -> f64 {
    let values: Vec<Value> = inputs.iter().map(|&x| Value::Scalar(x)).collect();
    let refs: Vec<&Value> = values.iter().collect();
    ops::forward(op, &refs, attrs, Dtype::F64)
        .as_scalar()
        .unwrap()
}

/// An op, its attributes, the same function in dual numbers and the range to sample.
type Oracle = (Op, Attrs, fn(Dual64) -> Dual64, f64, f64);

// num-dual (Rehner & Bauer, "Generalized Automatic Differentiation for Exact
// Derivatives", Frontiers in Chemical Engineering, 2021) as the oracle: each
// function written with its dual numbers, the derivative read off the dual part.
#[test]
fn scalar_functions_against_dual_numbers() {
    let none = Attrs::default();
    let oracle: Vec<Oracle> = vec![
        (Op::Square, none.clone(), |x| x * x, -3.0, 3.0),
        (Op::Reciprocal, none.clone(), |x| x.recip(), 0.3, 3.0),
        (Op::Rsqrt, none.clone(), |x| x.sqrt().recip(), 0.2, 4.0),
        (Op::Log1p, none.clone(), |x| x.ln_1p(), -0.9, 3.0),
        (Op::Expm1, none.clone(), |x| x.exp_m1(), -3.0, 3.0),
        (Op::Tan, none.clone(), |x| x.tan(), -1.4, 1.4),
        (
            Op::Silu,
            none.clone(),
            |x| x / ((-x).exp() + 1.0),
            -6.0,
            6.0,
        ),
        (
            Op::Softplus,
            none.clone(),
            |x| (x.exp() + 1.0).ln(),
            -5.0,
            5.0,
        ),
        (
            Op::Softplus,
            Attrs {
                beta: Some(2.5),
                ..none.clone()
            },
            |x| ((x * 2.5).exp() + 1.0).ln() / 2.5,
            -3.0,
            3.0,
        ),
        (
            Op::Gelu,
            Attrs {
                approximate: Some(Approximate::Tanh),
                ..none.clone()
            },
            |x| {
                let k = (2.0 / std::f64::consts::PI).sqrt();
                x * 0.5 * (((x + x * x * x * 0.044715) * k).tanh() + 1.0)
            },
            -4.0,
            4.0,
        ),
    ];
    let mut rng = Rng::new(0xD0A1);
    for (op, attrs, f, lo, hi) in &oracle {
        for _ in 0..25 {
            let x = rng.uniform(*lo, *hi);
            let dual = f(Dual64::new(x, 1.0));
            assert_close(value(*op, &[x], attrs), dual.re, 1e-14);
            assert_close(partial(*op, 0, &[x], attrs), dual.eps, 1e-13);
        }
    }
    // elu on each side of 0: x, or α(eˣ − 1), written in duals.
    for _ in 0..25 {
        let x = rng.uniform(-3.0, 3.0);
        let alpha = 0.7;
        let attrs = Attrs {
            alpha: Some(alpha),
            ..none.clone()
        };
        let d = Dual64::new(x, 1.0);
        let dual = if x > 0.0 { d } else { d.exp_m1() * alpha };
        assert_close(partial(Op::Elu, 0, &[x], &attrs), dual.eps, 1e-14);
    }
    // aᵇ with both a tensor base and exponent: powd differentiates in each.
    for _ in 0..25 {
        let (a, b) = (rng.uniform(0.2, 3.0), rng.uniform(-2.0, 2.0));
        let in_a = Dual64::new(a, 1.0).powd(Dual64::from_re(b));
        let in_b = Dual64::from_re(a).powd(Dual64::new(b, 1.0));
        assert_close(partial(Op::Powt, 0, &[a, b], &none), in_a.eps, 1e-13);
        assert_close(partial(Op::Powt, 1, &[a, b], &none), in_b.eps, 1e-13);
    }
}

// erf at 0.5, 1 and 2: Abramowitz & Stegun, "Handbook of Mathematical
// Functions" (1964), Table 7.1, to the table's 10 decimals.
#[test]
fn erf_matches_abramowitz_and_stegun_table_7_1() {
    let none = Attrs::default();
    for (x, tabulated) in [
        (0.5, 0.520_499_877_8),
        (1.0, 0.842_700_792_9),
        (2.0, 0.995_322_265_0),
    ] {
        assert!(
            (value(Op::Erf, &[x], &none) - tabulated).abs() < 1e-10,
            "erf({x})"
        );
        // d/dx erf x = (2/√π) e^(−x²), from erf's definition (A&S §7.1).
        let expected = 2.0 / std::f64::consts::PI.sqrt() * (-x * x).exp();
        assert_close(partial(Op::Erf, 0, &[x], &none), expected, 1e-15);
    }
}

// GELU(x) = x Φ(x), and its tanh form 0.5x(1 + tanh(√(2/π)(x + 0.044715x³)))
// (Hendrycks & Gimpel, "Gaussian Error Linear Units (GELUs)", 2016, §2).
// Φ(1) = 0.8413447460685429 and Φ(−1) = 0.15865525393145707 (the standard
// normal distribution, A&S Table 26.1; the digits beyond the table's from
// memory).
#[test]
fn gelu_is_x_times_the_normal_cdf_and_its_tanh_form_is_close() {
    let exact = Attrs::default();
    let tanh = Attrs {
        approximate: Some(Approximate::Tanh),
        ..Attrs::default()
    };
    assert_close(
        value(Op::Gelu, &[1.0], &exact),
        0.841_344_746_068_542_9,
        1e-15,
    );
    assert_close(
        value(Op::Gelu, &[-1.0], &exact),
        -0.158_655_253_931_457_07,
        1e-15,
    );
    // d/dx xΦ(x) = Φ(x) + xφ(x): at 1, 0.8413447 + 0.2419707 = 1.0833155.
    let phi1 = (-0.5f64).exp() / (2.0 * std::f64::consts::PI).sqrt();
    assert_close(
        partial(Op::Gelu, 0, &[1.0], &exact),
        0.841_344_746_068_542_9 + phi1,
        1e-14,
    );
    // The approximation stays within 1e-3 of the exact form on [−6, 6]
    // (H&G 2016 offer it as a close, faster approximation).
    let mut x = -6.0;
    while x <= 6.0 {
        let gap = (value(Op::Gelu, &[x], &exact) - value(Op::Gelu, &[x], &tanh)).abs();
        assert!(gap < 1e-3, "gelu tanh form at {x} is {gap} away");
        x += 0.01;
    }
}

// SiLU(x) = x σ(x) with derivative σ(x)(1 + x(1 − σ(x))) (Elfwing, Uchibe &
// Doya, "Sigmoid-Weighted Linear Units for Neural Network Function
// Approximation in Reinforcement Learning", Neural Networks, 2018).
#[test]
fn silu_derivative_is_elfwing_uchibe_and_doya_s() {
    let none = Attrs::default();
    for x in [-8.0, -2.5, -0.5, 0.0, 0.3, 1.0, 4.0, 20.0] {
        let s = 1.0 / (1.0 + f64::exp(-x));
        assert_close(value(Op::Silu, &[x], &none), x * s, 1e-15);
        assert_close(
            partial(Op::Silu, 0, &[x], &none),
            s * (1.0 + x * (1.0 - s)),
            1e-15,
        );
    }
}

fn vjp_of(op: Op, slot: usize, inputs: &[&Value], attrs: &Attrs, adjoint: &Value) -> Value {
    let output = ops::forward(op, inputs, attrs, Dtype::F64);
    ops::vjp(
        op,
        &VjpArgs {
            slot,
            inputs,
            output: &output,
            adjoint,
            attrs,
            precision: Dtype::F64.into(),
        },
    )
}

// Layer normalisation (Ba, Kiros & Hinton, "Layer Normalization", 2016): the
// output is invariant to shifting and scaling its row, so the gradient with
// respect to the row sums to zero and is orthogonal to the normalised input
// (with ε = 0, exactly).
#[test]
fn layer_norm_gradient_sums_to_zero_and_is_orthogonal_to_the_normalised_input() {
    let mut rng = Rng::new(0x1A7E);
    let attrs = Attrs {
        eps: Some(0.0),
        axis: Some(-2),
        ..Attrs::default()
    };
    let x = random_tensor(&mut rng, &[3, 4, 5], -2.0, 2.0);
    let g = random_tensor(&mut rng, &[3, 4, 5], -1.0, 1.0);
    let y = ops::forward(Op::LayerNorm, &[&x], &attrs, Dtype::F64);
    let contribution = vjp_of(Op::LayerNorm, 0, &[&x], &attrs, &g);
    for row in 0..3 {
        let range = row * 20..(row + 1) * 20;
        let dx = &contribution.to_f64()[range.clone()];
        let hat = &y.to_f64()[range];
        let total: f64 = dx.iter().sum();
        let dot: f64 = dx.iter().zip(hat).map(|(a, b)| a * b).sum();
        let scale: f64 = dx.iter().map(|v| v.abs()).sum();
        assert!(total.abs() < 1e-13 * scale, "row {row}: Σ x̄ = {total}");
        assert!(dot.abs() < 1e-13 * scale, "row {row}: ⟨x̄, x̂⟩ = {dot}");
    }
}

// Batch normalisation's backward equations, written out from Ioffe &
// Szegedy, "Batch Normalization: Accelerating Deep Network Training by
// Reducing Internal Covariate Shift", 2015, §3 (the chain rule list under
// Algorithm 1), per channel over a mini-batch of m values.
#[test]
fn batch_norm_backward_follows_ioffe_and_szegedy() {
    let mut rng = Rng::new(0xB47C);
    let (n, c, s) = (4, 3, 5);
    let eps = 1e-5;
    let x = random_tensor(&mut rng, &[n, c, s], -2.0, 2.0);
    let gamma = random_tensor(&mut rng, &[c], 0.5, 1.5);
    let beta = random_tensor(&mut rng, &[c], -0.5, 0.5);
    let g = random_tensor(&mut rng, &[n, c, s], -1.0, 1.0);
    let attrs = Attrs {
        eps: Some(eps),
        ..Attrs::default()
    };
    let inputs = [&x, &gamma, &beta];
    let dx = vjp_of(Op::BatchNorm, 0, &inputs, &attrs, &g)
        .to_f64()
        .into_owned();
    let dgamma = vjp_of(Op::BatchNorm, 1, &inputs, &attrs, &g)
        .to_f64()
        .into_owned();
    let dbeta = vjp_of(Op::BatchNorm, 2, &inputs, &attrs, &g)
        .to_f64()
        .into_owned();
    let (xs, gs) = (x.to_f64(), g.to_f64());
    let m = (n * s) as f64;
    for channel in 0..c {
        let at: Vec<usize> = (0..n)
            .flat_map(|i| (0..s).map(move |k| (i * c + channel) * s + k))
            .collect();
        let mu = at.iter().map(|&i| xs[i]).sum::<f64>() / m;
        let var = at.iter().map(|&i| (xs[i] - mu).powi(2)).sum::<f64>() / m;
        let hat = |i: usize| (xs[i] - mu) / (var + eps).sqrt();
        let dhat = |i: usize| gs[i] * gamma.get(channel);
        let dvar: f64 = at
            .iter()
            .map(|&i| dhat(i) * (xs[i] - mu) * -0.5 * (var + eps).powf(-1.5))
            .sum();
        let dmu: f64 = at
            .iter()
            .map(|&i| -dhat(i) / (var + eps).sqrt())
            .sum::<f64>()
            + dvar * at.iter().map(|&i| -2.0 * (xs[i] - mu)).sum::<f64>() / m;
        for &i in &at {
            let expected = dhat(i) / (var + eps).sqrt() + dvar * 2.0 * (xs[i] - mu) / m + dmu / m;
            assert_close(dx[i], expected, 1e-12);
        }
        assert_close(
            dgamma[channel],
            at.iter().map(|&i| gs[i] * hat(i)).sum(),
            1e-12,
        );
        assert_close(dbeta[channel], at.iter().map(|&i| gs[i]).sum(), 1e-12);
    }
}

/// conv2d written independently: im2col by the definition of a
/// cross-correlation, then a plain triple-loop matrix product.
fn reference_conv2d(
    x: &Value,
    w: &Value,
    bias: Option<&Value>,
    stride: usize,
    padding: usize,
    dilation: usize,
    groups: usize,
) -> Value {
    let (n, c, h, wd) = (x.shape()[0], x.shape()[1], x.shape()[2], x.shape()[3]);
    let (o, cg, kh, kw) = (w.shape()[0], w.shape()[1], w.shape()[2], w.shape()[3]);
    // Dumoulin & Visin 2016, relationship 15: o = ⌊(i + 2p − k − (k − 1)(d − 1))/s⌋ + 1.
    let oh = (h + 2 * padding - kh - (kh - 1) * (dilation - 1)) / stride + 1;
    let ow = (wd + 2 * padding - kw - (kw - 1) * (dilation - 1)) / stride + 1;
    let og = o / groups;
    let mut out = vec![0.0; n * o * oh * ow];
    for image in 0..n {
        for group in 0..groups {
            // Columns: rows (channel, i, j), columns (oy, ox).
            let rows = cg * kh * kw;
            let mut col = vec![0.0; rows * oh * ow];
            for ch in 0..cg {
                for i in 0..kh {
                    for j in 0..kw {
                        for oy in 0..oh {
                            for ox in 0..ow {
                                let y = (oy * stride + i * dilation) as i64 - padding as i64;
                                let xx = (ox * stride + j * dilation) as i64 - padding as i64;
                                let inside =
                                    y >= 0 && xx >= 0 && (y as usize) < h && (xx as usize) < wd;
                                col[((ch * kh + i) * kw + j) * oh * ow + oy * ow + ox] = if inside {
                                    x.get(
                                        ((image * c + group * cg + ch) * h + y as usize) * wd
                                            + xx as usize,
                                    )
                                } else {
                                    0.0
                                };
                            }
                        }
                    }
                }
            }
            for oc in 0..og {
                for p in 0..oh * ow {
                    let mut sum = bias.map_or(0.0, |b| b.get(group * og + oc));
                    for r in 0..rows {
                        sum += w.get((group * og + oc) * rows + r) * col[r * oh * ow + p];
                    }
                    out[((image * o) + group * og + oc) * oh * ow + p] = sum;
                }
            }
        }
    }
    Value::from_parts(vec![n, o, oh, ow], out)
}

// conv2d against the independent im2col matmul above, over strides,
// padding, dilation and groups.
#[test]
fn conv2d_equals_an_independent_im2col_matmul() {
    let mut rng = Rng::new(0xC0FF);
    for &(n, c, h, wd, o, k, stride, padding, dilation, groups) in &[
        (2, 3, 7, 6, 4, 3, 1, 1, 1, 1),
        (1, 4, 9, 9, 6, 3, 2, 1, 1, 2),
        (2, 2, 8, 7, 2, 2, 1, 0, 2, 1),
        (1, 6, 5, 5, 6, 3, 1, 2, 2, 3),
        (3, 1, 4, 4, 2, 1, 1, 0, 1, 1),
    ] {
        let x = random_tensor(&mut rng, &[n, c, h, wd], -1.0, 1.0);
        let w = random_tensor(&mut rng, &[o, c / groups, k, k], -1.0, 1.0);
        let b = random_tensor(&mut rng, &[o], -1.0, 1.0);
        let attrs = Attrs {
            stride: Some(vec![stride]),
            padding: Some(vec![padding]),
            dilation: Some(vec![dilation]),
            groups: Some(groups),
            ..Attrs::default()
        };
        let y = ops::forward(Op::Conv2d, &[&x, &w, &b], &attrs, Dtype::F64);
        let expected = reference_conv2d(&x, &w, Some(&b), stride, padding, dilation, groups);
        assert_eq!(y.shape(), expected.shape());
        for (a, e) in y.to_f64().iter().zip(expected.to_f64().iter()) {
            assert_close(*a, *e, 1e-13);
        }
    }
}

// The output-size relation of Dumoulin & Visin, "A guide to convolution
// arithmetic for deep learning" (2016): relationship 6 (padding and stride)
// and 15 (dilation), for convolution and pooling alike.
#[test]
fn output_sizes_follow_dumoulin_and_visin() {
    let shape = |op: Op, inputs: &[&[usize]], attrs: &Attrs| {
        ops::infer_shape(op, inputs, attrs).unwrap().unwrap()
    };
    for &(i, k, s, p, d) in &[
        (5, 3, 2, 1, 1),
        (7, 3, 1, 0, 2),
        (6, 4, 3, 2, 1),
        (32, 3, 1, 1, 1),
    ] {
        let expected = (i + 2 * p - k - (k - 1) * (d - 1)) / s + 1;
        let attrs = Attrs {
            stride: Some(vec![s]),
            padding: Some(vec![p]),
            dilation: Some(vec![d]),
            ..Attrs::default()
        };
        assert_eq!(
            shape(Op::Conv2d, &[&[1, 2, i, i], &[3, 2, k, k]], &attrs),
            vec![1, 3, expected, expected]
        );
        assert_eq!(
            shape(Op::Conv1d, &[&[1, 2, i], &[3, 2, k]], &attrs),
            vec![1, 3, expected]
        );
        if 2 * p <= k {
            let pool = Attrs {
                kernel: Some(vec![k]),
                ..attrs.clone()
            };
            assert_eq!(
                shape(Op::MaxPool2d, &[&[1, 2, i, i]], &pool),
                vec![1, 2, expected, expected]
            );
        }
    }
}

// Speelpenning's product y = Π xᵢ (Griewank & Walther, "Evaluating
// Derivatives", 2nd ed., SIAM 2008) at x = (2, 3, 0, 5): the gradient
// Πⱼ≠ᵢ xⱼ is (0, 0, 30, 0) (by hand), which division-based adjoints miss.
#[test]
fn speelpenning_with_a_zero_through_the_sweep() {
    let mut tape = Tape::new("speelpenning", Dtype::F64);
    let x = tape.param("x", Value::from_parts(vec![4], vec![2.0, 3.0, 0.0, 5.0]));
    let y = tape.prod(x);
    let trace = checked(tape.finish(y));
    let sweep = swept(&trace);
    assert_eq!(
        adjoint(&sweep, "x"),
        Value::from_parts(vec![4], vec![0.0, 0.0, 30.0, 0.0])
    );
    assert!(sweep.flags().is_empty());
}

// Softmax followed by the negative log-likelihood of the target is the
// cross-entropy of the logits (common practice; by definition, −log of the
// softmax is logsumexp(z) − z[t]): same value and same logit gradient, and
// the same through log_softmax.
#[test]
fn softmax_then_nll_loss_is_cross_entropy() {
    let mut rng = Rng::new(0x5E1F);
    let targets = [2usize, 0, 3, 1, 3];
    let logits = random_tensor(&mut rng, &[5, 4], -3.0, 3.0);
    let record = |path: u8| {
        let mut tape = Tape::new("cross-entropy three ways", Dtype::F64);
        let z = tape.param("z", logits.clone());
        let loss = match path {
            0 => tape.cross_entropy(z, &targets),
            _ => {
                let t = tape.indices(
                    "t",
                    Value::from_parts(vec![5], targets.iter().map(|&t| t as f64).collect()),
                );
                let log_probs = if path == 1 {
                    let p = tape.softmax(z, -1);
                    tape.log(p)
                } else {
                    tape.log_softmax(z, -1)
                };
                tape.nll_loss(log_probs, t)
            }
        };
        let trace = checked(tape.finish(loss));
        let sweep = swept(&trace);
        let value = trace.node(trace.output()).value.as_scalar().unwrap();
        (value, adjoint(&sweep, "z").to_f64().into_owned())
    };
    let (reference, gradient) = record(0);
    for path in [1, 2] {
        let (value, other) = record(path);
        assert_close(value, reference, 1e-14);
        for (a, b) in other.iter().zip(&gradient) {
            assert!((a - b).abs() < 1e-14, "path {path}: {a} vs {b}");
        }
    }
}

// Huber's loss (Huber 1964) is ½d² inside ±δ and δ(|d| − ½δ) outside; L1's
// subgradient at a tie is 0 (common practice); binary cross-entropy from
// logits is −[t ln σ(z) + (1 − t) ln(1 − σ(z))] (by definition).
#[test]
fn pointwise_losses_by_definition() {
    let p = Value::from_parts(vec![4], vec![0.5, 3.0, -2.0, 1.0]);
    let t = Value::from_parts(vec![4], vec![0.0, 0.0, 0.0, 1.0]);
    let huber = Attrs {
        delta: Some(1.5),
        ..Attrs::default()
    };
    // terms: 0.125, 1.5(3 − 0.75) = 3.375, 1.5(2 − 0.75) = 1.875, 0.
    let y = ops::forward(Op::Huber, &[&p, &t], &huber, Dtype::F64);
    assert_close(y.as_scalar().unwrap(), (0.125 + 3.375 + 1.875) / 4.0, 1e-15);
    let g = Value::Scalar(4.0);
    let dp = vjp_of(Op::Huber, 0, &[&p, &t], &huber, &g);
    assert_eq!(dp, Value::from_parts(vec![4], vec![0.5, 1.5, -1.5, 0.0]));
    let dl1 = vjp_of(Op::L1Loss, 0, &[&p, &t], &Attrs::default(), &g);
    assert_eq!(dl1, Value::from_parts(vec![4], vec![1.0, 1.0, -1.0, 0.0]));
    let z = Value::from_parts(vec![3], vec![-2.0, 0.5, 4.0]);
    let labels = Value::from_parts(vec![3], vec![1.0, 0.0, 0.3]);
    let sigma = |v: f64| 1.0 / (1.0 + (-v).exp());
    let expected: f64 = z
        .to_f64()
        .iter()
        .zip(labels.to_f64().iter())
        .map(|(&v, &l)| -(l * sigma(v).ln() + (1.0 - l) * (1.0 - sigma(v)).ln()))
        .sum::<f64>()
        / 3.0;
    let bce = ops::forward(
        Op::BceWithLogits,
        &[&z, &labels],
        &Attrs::default(),
        Dtype::F64,
    );
    assert_close(bce.as_scalar().unwrap(), expected, 1e-14);
}

// embedding's padding row receives no gradient (PyTorch's convention, common
// practice), although the output reads it: a finite-difference check through
// a lookup of it must disagree there and name the node as a kink, and agree
// on the other rows.
#[test]
fn the_padding_row_is_a_named_kink_of_the_difference_check() {
    let mut tape = Tape::new("padding row", Dtype::F64);
    let table = tape.param(
        "table",
        Value::from_parts(vec![3, 2], vec![0.5, -1.0, 2.0, 0.25, 1.5, -0.5]),
    );
    let ids = tape.indices("ids", Value::from_parts(vec![3], vec![0.0, 2.0, 0.0]));
    let attrs = Attrs {
        padding_idx: Some(0),
        ..Attrs::default()
    };
    let rows = tape.apply(Op::Embedding, &[table, ids], attrs).unwrap();
    let rows = tape.rename(rows, "rows");
    let loss = tape.sum(rows);
    let trace = checked(tape.finish(loss));
    let sweep = swept(&trace);
    assert_eq!(
        adjoint(&sweep, "table"),
        Value::from_parts(vec![3, 2], vec![0.0, 0.0, 0.0, 0.0, 1.0, 1.0])
    );
    let checks = ebb::verify::check_finite_differences(&sweep, 100, 7);
    let check = &checks[0];
    assert_eq!(check.kinks, vec![trace.find("rows").unwrap()]);
    for entry in &check.entries {
        let expected = [2.0, 2.0, 0.0, 0.0, 1.0, 1.0][entry.element];
        assert_close(entry.central, expected, 1e-9);
    }
}
