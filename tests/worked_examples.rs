//! The sweep against published worked examples and closed-form gradients.

mod common;

use common::{assert_close, finish, scalar_adjoint, swept};
use ebb::dtype::Dtype;
use ebb::ops::{Attrs, Op};
use ebb::record::Tape;
use ebb::sweep::{LedgerMode, Sweep};
use ebb::tensor::Value;

/// Baydin, Pearlmutter, Radul & Siskind, "Automatic Differentiation in Machine
/// Learning: a Survey", JMLR 18 (2018), the reverse-mode evaluation trace of
/// f(x1, x2) = ln x1 + x1·x2 − sin x2 at (2, 5), recorded with the paper's
/// variable names v−1 … v5.
fn baydin_trace() -> ebb::trace::Trace {
    let mut tape = Tape::new("Baydin et al. 2018 reverse-mode example", Dtype::F64);
    let x1 = tape.input("x1", 2.0);
    let x2 = tape.input("x2", 5.0);
    let v1 = tape.log(x1);
    tape.rename(v1, "v1");
    let v2 = tape.mul(x1, x2);
    tape.rename(v2, "v2");
    let v3 = tape.sin(x2);
    tape.rename(v3, "v3");
    let v4 = tape.add(v1, v2);
    tape.rename(v4, "v4");
    let v5 = tape.sub(v4, v3);
    tape.rename(v5, "v5");
    finish(tape, v5)
}

#[test]
fn baydin_reverse_trace_every_adjoint_and_order() {
    let trace = baydin_trace();
    let output = trace.find("v5").unwrap();
    // Forward value from the paper: f = 11.652071455223084.
    assert_eq!(trace.node(output).value, Value::Scalar(11.652071455223084));
    let sweep = swept(&trace);
    // Adjoints from the paper's reverse trace: v̄5 = 1, v̄4 = 1, v̄3 = −1, v̄1 = 1, v̄2 = 1.
    assert_eq!(scalar_adjoint(&sweep, "v5"), 1.0);
    assert_eq!(scalar_adjoint(&sweep, "v4"), 1.0);
    assert_eq!(scalar_adjoint(&sweep, "v3"), -1.0);
    assert_eq!(scalar_adjoint(&sweep, "v2"), 1.0);
    assert_eq!(scalar_adjoint(&sweep, "v1"), 1.0);
    // x̄1 = 5.5 and x̄2 = 2 − cos 5 = 1.7163378145367738.
    assert_eq!(scalar_adjoint(&sweep, "x1"), 5.5);
    assert_close(scalar_adjoint(&sweep, "x2"), 1.7163378145367738, 1e-16);

    // Order of arrival, as in the paper: v̄0 = v̄3·cos v0 first, then v̄0 += v̄2·v−1;
    // v̄−1 = v̄2·v0 first, then v̄−1 += v̄1 / v−1.
    let ledger = sweep.ledger().unwrap();
    let id = |node: usize| trace.node(node).id.as_str();
    // (consumer, contribution, adjoint after) in order of arrival.
    let arrivals = |name: &str| -> Vec<(&str, f64, f64)> {
        ledger
            .received(trace.find(name).unwrap())
            .iter()
            .map(|c| {
                (
                    id(c.consumer),
                    c.value.as_scalar().unwrap(),
                    c.after.as_scalar().unwrap(),
                )
            })
            .collect()
    };
    let x2 = arrivals("x2");
    assert_eq!(x2.len(), 2);
    assert_eq!(x2[0].0, "v3");
    assert_close(x2[0].1, -(5f64.cos()), 1e-16);
    assert_eq!((x2[1].0, x2[1].1), ("v2", 2.0));
    assert_close(x2[1].2, 1.7163378145367738, 1e-16);
    let x1 = arrivals("x1");
    assert_eq!(x1, vec![("v2", 5.0, 5.0), ("v1", 0.5, 5.5)]);
}

/// Speelpenning's product f = ∏ xᵢ (Griewank & Walther, "Evaluating
/// Derivatives", 2nd ed., SIAM 2008, the running example of ch. 3), recorded
/// as a chain of multiplies.
fn speelpenning(values: &[f64]) -> ebb::trace::Trace {
    let mut tape = Tape::new("Speelpenning's product", Dtype::F64);
    let inputs: Vec<_> = values
        .iter()
        .enumerate()
        .map(|(i, &x)| tape.param(&format!("x{}", i + 1), x))
        .collect();
    let mut product = inputs[0];
    for &input in &inputs[1..] {
        product = tape.mul(product, input);
    }
    finish(tape, product)
}

#[test]
fn speelpenning_product_gradient() {
    // xᵢ = i/(i+1): f telescopes to 1/11 and ∂f/∂xᵢ = (1/11)(i+1)/i.
    let values: Vec<f64> = (1..=10).map(|i| i as f64 / (i as f64 + 1.0)).collect();
    let trace = speelpenning(&values);
    let output = trace.output();
    assert_close(
        trace.node(output).value.as_scalar().unwrap(),
        1.0 / 11.0,
        1e-15,
    );
    let sweep = swept(&trace);
    for i in 1..=10 {
        let expected = (1.0 / 11.0) * (i as f64 + 1.0) / i as f64;
        assert_close(scalar_adjoint(&sweep, &format!("x{i}")), expected, 1e-14);
    }
    assert!(sweep.flags().is_empty());
}

#[test]
fn speelpenning_at_a_zero_entry_is_finite() {
    // At x = (0, 2, 3, 4) only ∂f/∂x1 = 2·3·4 = 24 survives; no division, no flag.
    let trace = speelpenning(&[0.0, 2.0, 3.0, 4.0]);
    let sweep = swept(&trace);
    let gradient: Vec<f64> = (1..=4)
        .map(|i| scalar_adjoint(&sweep, &format!("x{i}")))
        .collect();
    assert_eq!(gradient, vec![24.0, 0.0, 0.0, 0.0]);
    assert!(sweep.flags().is_empty(), "{:?}", sweep.flags());
}

/// The Rosenbrock function (1 − x)² + 100(y − x²)² (Rosenbrock, "An automatic
/// method for finding the greatest or least value of a function", The Computer
/// Journal 3(3), 1960); gradient (−2(1 − x) − 400x(y − x²), 200(y − x²)).
fn rosenbrock_gradient(x: f64, y: f64) -> (f64, f64) {
    let mut tape = Tape::new("Rosenbrock", Dtype::F64);
    let (px, py) = (tape.param("x", x), tape.param("y", y));
    let one = tape.constant("one", 1.0);
    let hundred = tape.constant("hundred", 100.0);
    let a = tape.sub(one, px);
    let a_squared = tape
        .apply(
            Op::Pow,
            &[a],
            Attrs {
                exponent: Some(2.0),
                ..Attrs::default()
            },
        )
        .unwrap();
    let x_squared = tape.mul(px, px);
    let b = tape.sub(py, x_squared);
    let b_squared = tape.mul(b, b);
    let scaled = tape.mul(hundred, b_squared);
    let f = tape.add(a_squared, scaled);
    let trace = finish(tape, f);
    let sweep = swept(&trace);
    (scalar_adjoint(&sweep, "x"), scalar_adjoint(&sweep, "y"))
}

#[test]
fn rosenbrock_gradients_at_three_points() {
    // Closed form at the classic start (−1.2, 1): (−215.6, −88); at (2, 2): (1602, −400);
    // at the minimum (1, 1): (0, 0).
    let (gx, gy) = rosenbrock_gradient(-1.2, 1.0);
    assert_close(gx, -215.6, 1e-13);
    assert_close(gy, -88.0, 1e-13);
    assert_eq!(rosenbrock_gradient(2.0, 2.0), (1602.0, -400.0));
    assert_eq!(rosenbrock_gradient(1.0, 1.0), (0.0, 0.0));
}

#[test]
fn softmax_cross_entropy_gradient_is_softmax_minus_onehot() {
    // For z = (1, 2, 3) and class 2: loss = logsumexp(z) − 3 = 0.40760596444438063 and
    // ∂loss/∂z = softmax(z) − onehot(2) (e.g. Goodfellow, Bengio & Courville,
    // "Deep Learning", MIT Press 2016, §6.2.2.3); values computed in closed form.
    let expected = [0.0900305731703804, 0.2447284710547976, -0.3347590442251783];
    let mut tape = Tape::new("softmax cross-entropy", Dtype::F64);
    let z = tape.param("z", Value::from_parts(vec![3], vec![1.0, 2.0, 3.0]));
    let loss = tape
        .apply(
            Op::CrossEntropy,
            &[z],
            Attrs {
                targets: Some(vec![2]),
                ..Attrs::default()
            },
        )
        .unwrap();
    let trace = finish(tape, loss);
    assert_close(
        trace.node(trace.output()).value.as_scalar().unwrap(),
        0.40760596444438063,
        1e-15,
    );
    let sweep = swept(&trace);
    let gradient = common::adjoint(&sweep, "z").to_f64().to_vec();
    for (g, e) in gradient.iter().zip(expected) {
        assert_close(*g, e, 1e-15);
    }

    // The same loss written out as logsumexp(z) − Σ onehot·z reaches the same gradient.
    let mut tape = Tape::new("cross-entropy written out", Dtype::F64);
    let z = tape.param("z", Value::from_parts(vec![3], vec![1.0, 2.0, 3.0]));
    let onehot = tape.constant("onehot", Value::from_parts(vec![3], vec![0.0, 0.0, 1.0]));
    let normaliser = tape.apply(Op::Logsumexp, &[z], Attrs::default()).unwrap();
    let picked = tape.mul(onehot, z);
    let picked = tape.apply(Op::Sum, &[picked], Attrs::default()).unwrap();
    let loss = tape.sub(normaliser, picked);
    let trace = finish(tape, loss);
    let sweep = swept(&trace);
    for (g, e) in common::adjoint(&sweep, "z").to_f64().iter().zip(expected) {
        assert_close(*g, e, 1e-15);
    }
}

// Facts of the trade (common practice): the rules every reverse sweep obeys.

#[test]
fn output_adjoint_is_the_seed() {
    let mut tape = Tape::new("seed", Dtype::F64);
    let x = tape.param("x", 3.0);
    let y = tape.sin(x);
    let mut file = tape.finish(y);
    file.seed = Some(ebb::trace::ValueRepr::Scalar(2.5));
    let trace = common::checked(file);
    let sweep = Sweep::new(&trace, LedgerMode::On);
    assert_eq!(
        sweep.adjoint(trace.output()).as_deref(),
        Some(&Value::Scalar(2.5))
    );
    let sweep = swept(&trace);
    assert_eq!(scalar_adjoint(&sweep, "x"), 2.5 * 3f64.cos());
}

#[test]
fn add_passes_adjoint_and_mul_sends_the_other_input() {
    let mut tape = Tape::new("add and mul", Dtype::F64);
    let (a, b, c) = (
        tape.param("a", 3.0),
        tape.param("b", 4.0),
        tape.param("c", -2.0),
    );
    let sum = tape.add(a, b);
    tape.rename(sum, "sum");
    let product = tape.mul(sum, c);
    let mut file = tape.finish(product);
    file.seed = Some(ebb::trace::ValueRepr::Scalar(0.5));
    let trace = common::checked(file);
    let sweep = swept(&trace);
    // mul: each input gets the adjoint times the other input.
    assert_eq!(scalar_adjoint(&sweep, "sum"), 0.5 * -2.0);
    assert_eq!(scalar_adjoint(&sweep, "c"), 0.5 * 7.0);
    // add: both inputs get the adjoint unchanged.
    assert_eq!(scalar_adjoint(&sweep, "a"), -1.0);
    assert_eq!(scalar_adjoint(&sweep, "b"), -1.0);
}

#[test]
fn branch_point_receives_the_sum_of_its_consumers_contributions() {
    let mut tape = Tape::new("branch", Dtype::F64);
    let x = tape.param("x", 0.7);
    let (s, c, e) = (tape.sin(x), tape.cos(x), tape.exp(x));
    let partial = tape.add(s, c);
    let total = tape.add(partial, e);
    let trace = finish(tape, total);
    let sweep = swept(&trace);
    let received = sweep.ledger().unwrap().received(trace.find("x").unwrap());
    let contributions: Vec<f64> = received
        .iter()
        .map(|c| c.value.as_scalar().unwrap())
        .collect();
    // Reverse recording order: exp, then cos, then sin.
    assert_eq!(
        contributions,
        vec![0.7f64.exp(), -(0.7f64.sin()), 0.7f64.cos()]
    );
    let expected = (0.7f64.exp() + -(0.7f64.sin())) + 0.7f64.cos();
    assert_eq!(scalar_adjoint(&sweep, "x"), expected);
    assert_eq!(received.last().unwrap().after.as_scalar(), Some(expected));
    assert!(received[0].before.is_none());
}

#[test]
fn f32_trace_accumulates_in_f32() {
    // Contributions 1 and 2^-24 added in f32 round back to 1 (ties to even);
    // in f64 they would not. IEEE 754-2019 §4.3.1.
    let tiny = 2f64.powi(-24);
    for (dtype, expected) in [(Dtype::F32, 1.0), (Dtype::F64, 1.0 + tiny)] {
        let mut tape = Tape::new("f32 accumulation", dtype);
        let x = tape.param("x", 1.0);
        let small = tape.constant("small", tiny);
        let scaled = tape.mul(x, small);
        let total = tape.add(x, scaled);
        let trace = finish(tape, total);
        let sweep = swept(&trace);
        assert_eq!(scalar_adjoint(&sweep, "x"), expected, "{dtype}");
    }
}
