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
