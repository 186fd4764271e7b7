//! Every op's derivative rule, broadcasting included, against central finite
//! differences of the forward rules on small tensor graphs; and every op's
//! tangent rule against its reverse rule.
//!
//! Step rule: h = ε^(1/3)·max(|x|, 1), the choice that balances truncation
//! error O(h²) against rounding error O(ε/h) for central differences (Press,
//! Teukolsky, Vetterling & Flannery, "Numerical Recipes", 3rd ed., CUP 2007,
//! §5.7, eq. 5.7.8). Expected agreement is then about ε^(2/3) ≈ 4e-11
//! relative; the tolerance below allows for curvature.

mod common;

use common::{Rng, checked, random_tensor, swept};
use ebb::dtype::Dtype;
use ebb::eval::reevaluate;
use ebb::ops::{Attrs, Op};
use ebb::record::{Tape, Var};
use ebb::tensor::Value;

/// Records `loss = Σ (out ⊙ weights)` for random weights, so every element of
/// the op's output gets a different adjoint.
fn weighted_loss(tape: &mut Tape, out: Var, rng: &mut Rng) -> Var {
    let shape = tape.value(out).shape().to_vec();
    let weights = tape.constant("weights", random_tensor(rng, &shape, -1.0, 1.0));
    let weighted = tape.mul(out, weights);
    tape.apply(Op::Sum, &[weighted], Attrs::default()).unwrap()
}

/// Compares every parameter entry's adjoint with a central difference.
fn check(name: &str, build: impl Fn(&mut Tape, &mut Rng) -> Var) {
    let mut rng = Rng::new(0x5EED_0000 ^ (name.len() as u64 * 7919));
    let mut tape = Tape::new(name, Dtype::F64);
    let out = build(&mut tape, &mut rng);
    let loss = if tape.value(out).shape().is_empty() {
        out
    } else {
        weighted_loss(&mut tape, out, &mut rng)
    };
    let trace = checked(tape.finish(loss));
    let sweep = swept(&trace);
    assert!(
        sweep.flags().is_empty(),
        "{name}: unexpected flags {:?}",
        sweep.flags()
    );
    let mut checked_entries = 0;
    for param in trace.params() {
        let value = &trace.node(param).value;
        let adjoint = sweep
            .adjoint(param)
            .unwrap_or_else(|| panic!("{name}: param without adjoint"));
        for k in 0..value.len() {
            let x = value.get(k);
            let h = f64::EPSILON.cbrt() * x.abs().max(1.0);
            let evaluate = |shift: f64| {
                let mut moved = value.clone();
                moved.set(k, x + shift);
                let values = reevaluate(&trace, &[(param, moved)], Dtype::F64).unwrap();
                values[trace.output()].as_scalar().unwrap()
            };
            let central = (evaluate(h) - evaluate(-h)) / (2.0 * h);
            let reverse = adjoint.get(k);
            let error = (central - reverse).abs() / reverse.abs().max(1.0);
            assert!(
                error < 1e-7,
                "{name}: {} entry {k}: reverse {reverse} vs central difference {central}",
                trace.node(param).id
            );
            checked_entries += 1;
        }
    }
    assert!(checked_entries > 0, "{name}: no parameter checked");

    // The op's tangent rule against its reverse rule: ⟨v, ∇f⟩ = ∂f/∂v for a
    // random direction v (the dot-product identity of forward and reverse mode).
    let mut tangent =
        ebb::verify::TangentSweep::new(&trace, &ebb::verify::Direction::Random { seed: 0x7A9 });
    tangent.run_to_end();
    let forward = tangent
        .directional_derivative()
        .expect("the output has a tangent");
    let reverse = tangent.reverse_counterpart(&sweep);
    assert!(
        (forward - reverse).abs() <= 1e-12 * reverse.abs().max(1.0),
        "{name}: tangent {forward} vs reverse {reverse}"
    );
}

fn param(tape: &mut Tape, rng: &mut Rng, name: &str, shape: &[usize], lo: f64, hi: f64) -> Var {
    let value = random_tensor(rng, shape, lo, hi);
    tape.param(name, value)
}

fn unary(op: Op, lo: f64, hi: f64, attrs: Attrs) -> impl Fn(&mut Tape, &mut Rng) -> Var {
    move |tape, rng| {
        let x = param(tape, rng, "x", &[2, 3], lo, hi);
        tape.apply(op, &[x], attrs.clone()).unwrap()
    }
}

fn binary(
    op: Op,
    a: &'static [usize],
    b: &'static [usize],
    lo: f64,
    hi: f64,
) -> impl Fn(&mut Tape, &mut Rng) -> Var {
    move |tape, rng| {
        let x = param(tape, rng, "a", a, -2.0, 2.0);
        let y = param(tape, rng, "b", b, lo, hi);
        tape.apply(op, &[x, y], Attrs::default()).unwrap()
    }
}

fn axis(axis: i64) -> Attrs {
    Attrs {
        axis: Some(axis),
        ..Attrs::default()
    }
}

#[test]
fn elementwise_binary_ops_with_broadcasting() {
    check("add [2,3]+[3]", binary(Op::Add, &[2, 3], &[3], -2.0, 2.0));
    check(
        "add [2,1]+[1,3]",
        binary(Op::Add, &[2, 1], &[1, 3], -2.0, 2.0),
    );
    check(
        "sub [2,3]-[2,1]",
        binary(Op::Sub, &[2, 3], &[2, 1], -2.0, 2.0),
    );
    check("mul [3]*[2,3]", binary(Op::Mul, &[3], &[2, 3], -2.0, 2.0));
    check("mul scalar*[2,3]", binary(Op::Mul, &[], &[2, 3], -2.0, 2.0));
    check("div [2,3]/[3]", binary(Op::Div, &[2, 3], &[3], 0.5, 2.0));
    check(
        "div [2,1,2]/[3,1]",
        binary(Op::Div, &[2, 1, 2], &[3, 1], 0.5, 2.0),
    );
}

#[test]
fn elementwise_unary_ops() {
    let none = Attrs::default;
    check("neg", unary(Op::Neg, -2.0, 2.0, none()));
    check("exp", unary(Op::Exp, -2.0, 2.0, none()));
    check("log", unary(Op::Log, 0.5, 3.0, none()));
    check("sqrt", unary(Op::Sqrt, 0.5, 3.0, none()));
    check("sin", unary(Op::Sin, -3.0, 3.0, none()));
    check("cos", unary(Op::Cos, -3.0, 3.0, none()));
    check("tanh", unary(Op::Tanh, -2.0, 2.0, none()));
    check("sigmoid", unary(Op::Sigmoid, -4.0, 4.0, none()));
    check(
        "pow 2.5",
        unary(
            Op::Pow,
            0.5,
            2.0,
            Attrs {
                exponent: Some(2.5),
                ..none()
            },
        ),
    );
    check(
        "pow 3",
        unary(
            Op::Pow,
            -2.0,
            2.0,
            Attrs {
                exponent: Some(3.0),
                ..none()
            },
        ),
    );
    check(
        "pow -1",
        unary(
            Op::Pow,
            0.5,
            2.0,
            Attrs {
                exponent: Some(-1.0),
                ..none()
            },
        ),
    );
    // Kinked ops away from their kinks.
    check("abs", unary(Op::Abs, 0.2, 1.0, none()));
    check("abs negative", unary(Op::Abs, -1.0, -0.2, none()));
    check("relu", unary(Op::Relu, -1.0, -0.2, none()));
    check("relu positive", unary(Op::Relu, 0.2, 1.0, none()));
    check(
        "leaky_relu",
        unary(
            Op::LeakyRelu,
            -1.0,
            -0.2,
            Attrs {
                slope: Some(0.1),
                ..none()
            },
        ),
    );
}

#[test]
fn matrix_products_and_shape_ops() {
    check(
        "matmul [2,3]@[3,4]",
        binary(Op::Matmul, &[2, 3], &[3, 4], -1.0, 1.0),
    );
    check(
        "matmul batched [2,2,3]@[3,2]",
        binary(Op::Matmul, &[2, 2, 3], &[3, 2], -1.0, 1.0),
    );
    check(
        "matmul broadcast [1,2,3]@[2,3,2]",
        binary(Op::Matmul, &[1, 2, 3], &[2, 3, 2], -1.0, 1.0),
    );
    check(
        "transpose",
        unary(Op::Transpose, -1.0, 1.0, Attrs::default()),
    );
    check("transpose perm", |tape, rng| {
        let x = param(tape, rng, "x", &[2, 3, 4], -1.0, 1.0);
        tape.apply(
            Op::Transpose,
            &[x],
            Attrs {
                perm: Some(vec![1, 2, 0]),
                ..Attrs::default()
            },
        )
        .unwrap()
    });
    check(
        "reshape",
        unary(
            Op::Reshape,
            -1.0,
            1.0,
            Attrs {
                shape: Some(vec![3, 2]),
                ..Attrs::default()
            },
        ),
    );
}

#[test]
fn reductions_and_normalisations() {
    check("sum all", unary(Op::Sum, -1.0, 1.0, Attrs::default()));
    check("sum axis 1", unary(Op::Sum, -1.0, 1.0, axis(1)));
    check(
        "sum axis 0 keepdims",
        unary(
            Op::Sum,
            -1.0,
            1.0,
            Attrs {
                axis: Some(0),
                keepdims: true,
                ..Attrs::default()
            },
        ),
    );
    check("mean all", unary(Op::Mean, -1.0, 1.0, Attrs::default()));
    check("mean axis -1", unary(Op::Mean, -1.0, 1.0, axis(-1)));
    check("max axis 1", |tape, _| {
        // Distinct entries, so the maximum is not at a tie.
        let x = tape.param(
            "x",
            Value::from_parts(vec![2, 3], vec![0.3, -0.5, 0.9, 1.2, 0.1, -0.7]),
        );
        tape.apply(Op::Max, &[x], axis(1)).unwrap()
    });
    check("softmax", unary(Op::Softmax, -2.0, 2.0, Attrs::default()));
    check("softmax axis 0", unary(Op::Softmax, -2.0, 2.0, axis(0)));
    check(
        "log_softmax",
        unary(Op::LogSoftmax, -2.0, 2.0, Attrs::default()),
    );
    check(
        "logsumexp all",
        unary(Op::Logsumexp, -2.0, 2.0, Attrs::default()),
    );
    check(
        "logsumexp axis 1 keepdims",
        unary(
            Op::Logsumexp,
            -2.0,
            2.0,
            Attrs {
                axis: Some(1),
                keepdims: true,
                ..Attrs::default()
            },
        ),
    );
}

#[test]
fn losses() {
    check("cross_entropy", |tape, rng| {
        let logits = param(tape, rng, "logits", &[4, 3], -2.0, 2.0);
        tape.apply(
            Op::CrossEntropy,
            &[logits],
            Attrs {
                targets: Some(vec![0, 2, 1, 2]),
                ..Attrs::default()
            },
        )
        .unwrap()
    });
    check("mse", |tape, rng| {
        let prediction = param(tape, rng, "prediction", &[2, 3], -2.0, 2.0);
        let target = param(tape, rng, "target", &[2, 3], -2.0, 2.0);
        tape.mse(prediction, target)
    });
}

#[test]
fn random_small_networks() {
    // Seeded two-layer networks with a random activation and loss.
    for seed in 1..=12u64 {
        check(&format!("network {seed}"), move |tape, _| {
            let mut rng = Rng::new(seed * 0x9E37_79B9);
            let batch = 1 + rng.below(3);
            let (width_in, width_hidden, classes) =
                (1 + rng.below(3), 2 + rng.below(3), 2 + rng.below(2));
            let x = tape.input("x", random_tensor(&mut rng, &[batch, width_in], -1.0, 1.0));
            let w1 = param(tape, &mut rng, "w1", &[width_in, width_hidden], -1.0, 1.0);
            let b1 = param(tape, &mut rng, "b1", &[width_hidden], -0.5, 0.5);
            let w2 = param(tape, &mut rng, "w2", &[width_hidden, classes], -1.0, 1.0);
            let hidden = tape.matmul(x, w1);
            let hidden = tape.add(hidden, b1);
            let activation = [Op::Tanh, Op::Sigmoid, Op::Sin][rng.below(3)];
            let hidden = tape.apply(activation, &[hidden], Attrs::default()).unwrap();
            let logits = tape.matmul(hidden, w2);
            if rng.below(2) == 0 {
                let targets = (0..batch).map(|_| rng.below(classes)).collect();
                tape.apply(
                    Op::CrossEntropy,
                    &[logits],
                    Attrs {
                        targets: Some(targets),
                        ..Attrs::default()
                    },
                )
                .unwrap()
            } else {
                let probabilities = tape
                    .apply(Op::Softmax, &[logits], Attrs::default())
                    .unwrap();
                let target = tape.constant(
                    "target",
                    random_tensor(&mut rng, &[batch, classes], 0.0, 1.0),
                );
                tape.mse(probabilities, target)
            }
        });
    }
}

/// A random shape of rank 1 to `max_rank`, each axis 1 to 4 long.
fn random_shape(rng: &mut Rng, max_rank: usize) -> Vec<usize> {
    (0..1 + rng.below(max_rank))
        .map(|_| 1 + rng.below(4))
        .collect()
}

/// `shape` with some axes set to 1 and some leading axes dropped, so that it
/// broadcasts back to `shape`.
fn broadcastable(rng: &mut Rng, shape: &[usize]) -> Vec<usize> {
    let drop = rng.below(shape.len() + 1);
    shape[drop..]
        .iter()
        .map(|&d| if rng.below(2) == 0 { 1 } else { d })
        .collect()
}

/// Entries in [lo, hi) at least `gap` apart from one another, so that no
/// maximum, minimum or window is tied and no difference steps across one.
fn distinct(rng: &mut Rng, shape: &[usize], lo: f64, hi: f64) -> Value {
    let n: usize = shape.iter().product();
    let mut order: Vec<usize> = (0..n).collect();
    for k in (1..n).rev() {
        order.swap(k, rng.below(k + 1));
    }
    let step = (hi - lo) / n as f64;
    let data = order
        .iter()
        .map(|&rank| lo + step * (rank as f64 + 0.25 + 0.5 * rng.uniform(0.0, 1.0)))
        .collect();
    Value::from_parts(shape.to_vec(), data)
}

#[test]
fn network_activations_with_random_shapes() {
    let none = Attrs::default;
    let cases: Vec<(&str, Op, f64, f64, Attrs)> = vec![
        ("square", Op::Square, -2.0, 2.0, none()),
        ("reciprocal", Op::Reciprocal, 0.5, 2.0, none()),
        ("rsqrt", Op::Rsqrt, 0.5, 3.0, none()),
        ("log1p", Op::Log1p, -0.5, 3.0, none()),
        ("expm1", Op::Expm1, -2.0, 2.0, none()),
        ("erf", Op::Erf, -2.0, 2.0, none()),
        ("tan", Op::Tan, -1.2, 1.2, none()),
        ("gelu", Op::Gelu, -3.0, 3.0, none()),
        (
            "gelu tanh",
            Op::Gelu,
            -3.0,
            3.0,
            Attrs {
                approximate: Some(ebb::ops::Approximate::Tanh),
                ..none()
            },
        ),
        ("silu", Op::Silu, -4.0, 4.0, none()),
        ("softplus", Op::Softplus, -4.0, 4.0, none()),
        (
            "softplus beta 3 threshold 5",
            Op::Softplus,
            -1.0,
            1.5,
            Attrs {
                beta: Some(3.0),
                threshold: Some(5.0),
                ..none()
            },
        ),
        ("elu positive", Op::Elu, 0.1, 2.0, none()),
        (
            "elu negative",
            Op::Elu,
            -2.0,
            -0.1,
            Attrs {
                alpha: Some(0.5),
                ..none()
            },
        ),
        (
            "clamp inside",
            Op::Clamp,
            -0.9,
            0.9,
            Attrs {
                min: Some(-1.0),
                max: Some(1.0),
                ..none()
            },
        ),
        (
            "clamp outside",
            Op::Clamp,
            1.1,
            2.0,
            Attrs {
                max: Some(1.0),
                ..none()
            },
        ),
    ];
    for (name, op, lo, hi, attrs) in cases {
        check(name, move |tape, rng| {
            let shape = random_shape(rng, 3);
            let x = param(tape, rng, "x", &shape, lo, hi);
            tape.apply(op, &[x], attrs.clone()).unwrap()
        });
    }
}

#[test]
fn maximum_minimum_powt_and_where_with_broadcasting() {
    for (name, op, lo, hi) in [
        ("maximum", Op::Maximum, -2.0, 2.0),
        ("minimum", Op::Minimum, -2.0, 2.0),
        ("powt", Op::Powt, 0.5, 2.0),
    ] {
        for round in 0..3 {
            check(&format!("{name} {round}"), move |tape, rng| {
                let shape = random_shape(rng, 3);
                let other = broadcastable(rng, &shape);
                // Distinct values on both sides keep maximum and minimum off their ties.
                let a = tape.param("a", distinct(rng, &shape, lo, hi));
                let b = tape.param("b", distinct(rng, &other, lo + 0.013, hi - 0.011));
                let (a, b) = if round == 1 { (b, a) } else { (a, b) };
                tape.apply(op, &[a, b], Attrs::default()).unwrap()
            });
        }
    }
    for round in 0..3 {
        check(&format!("where {round}"), move |tape, rng| {
            let shape = random_shape(rng, 3);
            let (left, right) = (broadcastable(rng, &shape), broadcastable(rng, &shape));
            let condition_shape = broadcastable(rng, &shape);
            let n: usize = condition_shape.iter().product();
            let condition = tape.constant(
                "condition",
                Value::from_parts(
                    condition_shape,
                    (0..n).map(|_| rng.below(2) as f64).collect(),
                ),
            );
            let a = param(tape, rng, "a", &left, -1.0, 1.0);
            let b = param(tape, rng, "b", &right, -1.0, 1.0);
            let full = param(tape, rng, "full", &shape, -1.0, 1.0);
            let chosen = tape.where_(condition, a, b);
            // Added to a full-shape parameter, so the output has the whole shape.
            tape.add(chosen, full)
        });
    }
}

#[test]
fn joining_cutting_and_padding() {
    for round in 0..4u64 {
        check(&format!("concat {round}"), move |tape, rng| {
            let mut shape = random_shape(rng, 3);
            let axis = rng.below(shape.len());
            let parts: Vec<Var> = (0..1 + rng.below(3))
                .map(|k| {
                    shape[axis] = 1 + rng.below(3);
                    param(tape, rng, &format!("x{k}"), &shape, -1.0, 1.0)
                })
                .collect();
            tape.concat(
                &parts,
                axis as i64
                    - if round % 2 == 0 {
                        shape.len() as i64
                    } else {
                        0
                    },
            )
        });
        check(&format!("stack {round}"), move |tape, rng| {
            let shape = random_shape(rng, 2);
            let parts: Vec<Var> = (0..2 + rng.below(2))
                .map(|k| param(tape, rng, &format!("x{k}"), &shape, -1.0, 1.0))
                .collect();
            let axis = rng.below(shape.len() + 1) as i64;
            tape.stack(&parts, axis)
        });
        check(&format!("slice {round}"), move |tape, rng| {
            let mut shape = random_shape(rng, 3);
            let axis = rng.below(shape.len());
            shape[axis] = 3 + rng.below(4);
            let x = param(tape, rng, "x", &shape, -1.0, 1.0);
            let n = shape[axis] as i64;
            let (start, end, step) = match round {
                0 => (Some(1), None, 1),
                1 => (None, Some(-1), 2),
                2 => (Some(-1), None, -1),
                _ => (Some(n - 2), Some(-n - 5), -2),
            };
            tape.slice(x, axis as i64, start, end, step)
        });
        check(&format!("select {round}"), move |tape, rng| {
            let shape: Vec<usize> = (0..2 + rng.below(2)).map(|_| 2 + rng.below(3)).collect();
            let axis = rng.below(shape.len());
            let x = param(tape, rng, "x", &shape, -1.0, 1.0);
            tape.select(x, axis as i64, -1 - rng.below(2) as i64)
        });
        check(&format!("broadcast_to {round}"), move |tape, rng| {
            let shape = random_shape(rng, 3);
            let from = broadcastable(rng, &shape);
            let x = param(tape, rng, "x", &from, -1.0, 1.0);
            tape.broadcast_to(x, &shape)
        });
        check(&format!("pad {round}"), move |tape, rng| {
            let shape: Vec<usize> = (0..1 + rng.below(3)).map(|_| 2 + rng.below(3)).collect();
            let rank = shape.len();
            // Up to 2 added on each side, or one cropped at the start.
            let pads: Vec<i64> = (0..2 * rank)
                .map(|k| rng.below(3) as i64 - i64::from(k < rank && rng.below(2) == 0))
                .collect();
            let x = param(tape, rng, "x", &shape, -1.0, 1.0);
            tape.pad(x, &pads, 0.5)
        });
    }
}

#[test]
fn gather_and_embedding_with_repeated_indices() {
    for round in 0..3 {
        check(&format!("gather {round}"), move |tape, rng| {
            let shape: Vec<usize> = (0..1 + rng.below(3)).map(|_| 1 + rng.below(3)).collect();
            let axis = rng.below(shape.len());
            let mut picks = shape.clone();
            picks[axis] = 1 + rng.below(5); // more picks than entries: repeats
            let n: usize = picks.iter().product();
            let indices = tape.indices(
                "indices",
                Value::from_parts(
                    picks,
                    (0..n).map(|_| rng.below(shape[axis]) as f64).collect(),
                ),
            );
            let data = param(tape, rng, "data", &shape, -1.0, 1.0);
            tape.gather(data, indices, axis as i64)
        });
        check(&format!("embedding {round}"), move |tape, rng| {
            let (rows, width) = (2 + rng.below(4), 1 + rng.below(3));
            let table = param(tape, rng, "table", &[rows, width], -1.0, 1.0);
            let picks = random_shape(rng, 2);
            let n: usize = picks.iter().product();
            // With padding_idx 0, row 0 is never looked up: its zero gradient is
            // a convention, not a derivative (see the kink test in verification.rs).
            let first = usize::from(round == 1);
            let indices = tape.indices(
                "indices",
                Value::from_parts(
                    picks,
                    (0..n)
                        .map(|_| (first + rng.below(rows - first)) as f64)
                        .collect(),
                ),
            );
            if round == 1 {
                let attrs = Attrs {
                    padding_idx: Some(0),
                    ..Attrs::default()
                };
                tape.apply(Op::Embedding, &[table, indices], attrs).unwrap()
            } else {
                tape.embedding(table, indices)
            }
        });
    }
}

#[test]
fn products_extremes_moments_and_running_sums() {
    for round in 0..3 {
        check(&format!("prod {round}"), move |tape, rng| {
            let shape = random_shape(rng, 3);
            let x = param(tape, rng, "x", &shape, 0.5, 1.5);
            if round == 0 {
                tape.prod(x)
            } else {
                tape.prod_axis(x, rng.below(shape.len()) as i64, round == 2)
            }
        });
        check(&format!("min {round}"), move |tape, rng| {
            let shape = random_shape(rng, 3);
            let x = tape.param("x", distinct(rng, &shape, -1.0, 1.0));
            tape.min_axis(x, rng.below(shape.len()) as i64, round == 1)
        });
        check(&format!("var {round}"), move |tape, rng| {
            let mut shape = random_shape(rng, 3);
            let axis = rng.below(shape.len());
            shape[axis] += 2;
            let x = param(tape, rng, "x", &shape, -1.0, 1.0);
            let axis = (round != 0).then_some(axis as i64);
            tape.var(x, axis, round as f64 % 2.0, round == 2)
        });
        check(&format!("std {round}"), move |tape, rng| {
            let mut shape = random_shape(rng, 3);
            let axis = rng.below(shape.len());
            shape[axis] += 2;
            let x = param(tape, rng, "x", &shape, -1.0, 1.0);
            let axis = (round != 1).then_some(axis as i64);
            tape.std(x, axis, 1.0, round == 0)
        });
        check(&format!("cumsum {round}"), move |tape, rng| {
            let shape = random_shape(rng, 3);
            let x = param(tape, rng, "x", &shape, -1.0, 1.0);
            tape.cumsum(x, -1 - rng.below(shape.len()) as i64)
        });
    }
}

#[test]
fn convolution_and_pooling() {
    // (batch, channels, out channels, size, kernel, stride, padding, dilation, groups)
    for (round, &(n, c, o, size, k, stride, padding, dilation, groups)) in [
        (2, 3, 4, 5, 3, 1, 1, 1, 1),
        (1, 4, 2, 6, 2, 2, 0, 1, 2),
        (2, 2, 3, 7, 3, 1, 2, 2, 1),
        (1, 6, 3, 5, 1, 1, 0, 1, 3),
    ]
    .iter()
    .enumerate()
    {
        let attrs = Attrs {
            stride: Some(vec![stride]),
            padding: Some(vec![padding]),
            dilation: Some(vec![dilation]),
            groups: Some(groups),
            ..Attrs::default()
        };
        let conv2d = attrs.clone();
        check(&format!("conv2d {round}"), move |tape, rng| {
            let x = param(tape, rng, "x", &[n, c, size, size + 1], -1.0, 1.0);
            let w = param(tape, rng, "w", &[o, c / groups, k, k], -1.0, 1.0);
            let mut inputs = vec![x, w];
            if round % 2 == 0 {
                inputs.push(param(tape, rng, "bias", &[o], -1.0, 1.0));
            }
            tape.apply(Op::Conv2d, &inputs, conv2d.clone()).unwrap()
        });
        check(&format!("conv1d {round}"), move |tape, rng| {
            let x = param(tape, rng, "x", &[n, c, size + 2], -1.0, 1.0);
            let w = param(tape, rng, "w", &[o, c / groups, k], -1.0, 1.0);
            let mut inputs = vec![x, w];
            if round % 2 == 1 {
                inputs.push(param(tape, rng, "bias", &[o], -1.0, 1.0));
            }
            tape.apply(Op::Conv1d, &inputs, attrs.clone()).unwrap()
        });
    }
    for round in 0..3 {
        check(&format!("max_pool2d {round}"), move |tape, rng| {
            let shape = [
                1 + rng.below(2),
                1 + rng.below(2),
                4 + rng.below(3),
                4 + rng.below(3),
            ];
            let x = tape.param("x", distinct(rng, &shape, -1.0, 1.0));
            let attrs = Attrs {
                kernel: Some(vec![2 + round % 2]),
                stride: Some(vec![1 + round % 2]),
                padding: Some(vec![round / 2]),
                dilation: Some(vec![1 + round / 2]),
                ..Attrs::default()
            };
            tape.apply(Op::MaxPool2d, &[x], attrs).unwrap()
        });
        check(&format!("avg_pool2d {round}"), move |tape, rng| {
            let shape = [
                1 + rng.below(2),
                1 + rng.below(2),
                4 + rng.below(3),
                4 + rng.below(3),
            ];
            let x = param(tape, rng, "x", &shape, -1.0, 1.0);
            let attrs = Attrs {
                kernel: Some(vec![2, 3]),
                stride: Some(vec![1 + round % 2]),
                padding: Some(vec![1]),
                count_include_pad: Some(round != 1),
                ..Attrs::default()
            };
            tape.apply(Op::AvgPool2d, &[x], attrs).unwrap()
        });
    }
}

#[test]
fn normalisations_with_weight_and_bias() {
    for round in 0..3 {
        check(&format!("layer_norm {round}"), move |tape, rng| {
            let shape: Vec<usize> = (0..2 + rng.below(2)).map(|_| 2 + rng.below(3)).collect();
            let axis = -1 - rng.below(2) as i64;
            let tail = shape[(shape.len() as i64 + axis) as usize..].to_vec();
            let x = param(tape, rng, "x", &shape, -2.0, 2.0);
            let mut inputs = vec![x];
            if round > 0 {
                inputs.push(param(tape, rng, "weight", &tail, 0.5, 1.5));
            }
            if round > 1 {
                inputs.push(param(tape, rng, "bias", &tail, -0.5, 0.5));
            }
            let attrs = Attrs {
                axis: Some(axis),
                ..Attrs::default()
            };
            tape.apply(Op::LayerNorm, &inputs, attrs).unwrap()
        });
        check(&format!("rms_norm {round}"), move |tape, rng| {
            let shape: Vec<usize> = (0..1 + rng.below(3)).map(|_| 2 + rng.below(3)).collect();
            let x = param(tape, rng, "x", &shape, -2.0, 2.0);
            let weight = (round > 0)
                .then(|| param(tape, rng, "weight", &shape[shape.len() - 1..], 0.5, 1.5));
            tape.rms_norm(x, weight, 1e-6)
        });
        check(&format!("batch_norm {round}"), move |tape, rng| {
            let (n, c) = (2 + rng.below(3), 1 + rng.below(3));
            let mut shape = vec![n, c];
            shape.extend((0..round).map(|_| 1 + rng.below(3)));
            let x = param(tape, rng, "x", &shape, -2.0, 2.0);
            let weight = param(tape, rng, "weight", &[c], 0.5, 1.5);
            let bias = param(tape, rng, "bias", &[c], -0.5, 0.5);
            tape.batch_norm(x, Some(weight), Some(bias), 1e-5)
        });
        check(&format!("group_norm {round}"), move |tape, rng| {
            let groups = 1 + rng.below(3);
            let c = groups * (1 + rng.below(2));
            let shape = [1 + rng.below(2), c, 2 + rng.below(3)];
            let x = param(tape, rng, "x", &shape, -2.0, 2.0);
            let weight = (round > 0).then(|| param(tape, rng, "weight", &[c], 0.5, 1.5));
            let bias = (round > 1).then(|| param(tape, rng, "bias", &[c], -0.5, 0.5));
            tape.group_norm(x, groups, weight, bias, 1e-5)
        });
    }
}

#[test]
fn losses_with_reductions() {
    use ebb::ops::Reduction;
    for (round, reduction) in [Reduction::Mean, Reduction::Sum, Reduction::None]
        .into_iter()
        .enumerate()
    {
        check(&format!("nll_loss {round}"), move |tape, rng| {
            let (rows, classes) = (2 + rng.below(4), 2 + rng.below(3));
            let log_probs = param(tape, rng, "log_probs", &[rows, classes], -3.0, -0.1);
            // Every other round ignores one row.
            let targets: Vec<f64> = (0..rows)
                .map(|r| {
                    if round != 1 && r == 0 {
                        -100.0
                    } else {
                        rng.below(classes) as f64
                    }
                })
                .collect();
            let targets = tape.indices("targets", Value::from_parts(vec![rows], targets));
            let attrs = Attrs {
                reduction: Some(reduction),
                ..Attrs::default()
            };
            tape.apply(Op::NllLoss, &[log_probs, targets], attrs)
                .unwrap()
        });
        for (name, op, spread) in [
            ("bce_with_logits", Op::BceWithLogits, 3.0),
            ("huber", Op::Huber, 3.0),
            ("l1_loss", Op::L1Loss, 1.0),
        ] {
            check(&format!("{name} {round}"), move |tape, rng| {
                let shape = random_shape(rng, 2);
                let prediction = tape.param("prediction", distinct(rng, &shape, -spread, spread));
                let target = tape.param(
                    "target",
                    distinct(rng, &shape, -spread + 0.017, spread - 0.013),
                );
                let attrs = Attrs {
                    reduction: Some(reduction),
                    delta: (op == Op::Huber).then_some(1.0),
                    ..Attrs::default()
                };
                tape.apply(op, &[prediction, target], attrs).unwrap()
            });
        }
    }
}
