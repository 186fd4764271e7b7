//! The recorder's traces sweep to the gradients of the same computation
//! written out by hand, and recording in f32 keeps the f32 numbers.

use ebb::dtype::Dtype;
use ebb::record::Tape;
use ebb::sweep::{LedgerMode, Sweep};
use ebb::tensor::Value;
use ebb::trace::{self, Trace};

const X: [f64; 6] = [0.2, 0.9, 0.7, 0.4, 0.5, 0.5];
const T: [f64; 3] = [1.1, 1.6, 1.3];
const W1: [f64; 8] = [0.5, -0.3, 0.8, 0.1, -0.6, 0.4, 0.2, 0.7];
const B1: [f64; 4] = [0.1, 0.0, -0.1, 0.05];
const W2: [f64; 4] = [0.9, -0.4, 0.6, 0.3];

/// A 2-4-1 tanh network with mean squared error, recorded on a tape.
fn record(dtype: Dtype) -> Trace {
    let mut tape = Tape::new("2-4-1", dtype);
    let x = tape.input("x", Value::from_parts(vec![3, 2], X.to_vec()));
    let t = tape.input("t", Value::from_parts(vec![3, 1], T.to_vec()));
    let w1 = tape.param("w1", Value::from_parts(vec![2, 4], W1.to_vec()));
    let b1 = tape.param("b1", Value::from_parts(vec![4], B1.to_vec()));
    let w2 = tape.param("w2", Value::from_parts(vec![4, 1], W2.to_vec()));
    let xw = tape.matmul(x, w1);
    let pre = tape.add(xw, b1);
    let h = tape.tanh(pre);
    let y = tape.matmul(h, w2);
    let loss = tape.mse(y, t);
    trace::validate(tape.finish(loss)).expect("valid")
}

/// The same network's gradients by the backpropagation equations written out
/// by hand (Rumelhart, Hinton and Williams, "Learning representations by
/// back-propagating errors", Nature 323, 1986; d tanh u / du = 1 − tanh² u):
/// ∂L/∂y = 2(y − t)/N, ∂L/∂W2 = hᵀ ∂L/∂y, ∂L/∂pre = (∂L/∂y W2ᵀ) ⊙ (1 − h²),
/// ∂L/∂W1 = xᵀ ∂L/∂pre, ∂L/∂b1 = Σ_rows ∂L/∂pre.
fn by_hand() -> (Vec<f64>, Vec<f64>, Vec<f64>) {
    let mut h = [[0.0; 4]; 3];
    let mut dy = [0.0; 3];
    for n in 0..3 {
        for j in 0..4 {
            h[n][j] = (X[2 * n] * W1[j] + X[2 * n + 1] * W1[4 + j] + B1[j]).tanh();
        }
        let y: f64 = (0..4).map(|j| h[n][j] * W2[j]).sum();
        dy[n] = 2.0 * (y - T[n]) / 3.0;
    }
    let dw2: Vec<f64> = (0..4)
        .map(|j| (0..3).map(|n| h[n][j] * dy[n]).sum())
        .collect();
    let dpre: Vec<[f64; 4]> = (0..3)
        .map(|n| std::array::from_fn(|j| dy[n] * W2[j] * (1.0 - h[n][j] * h[n][j])))
        .collect();
    let dw1: Vec<f64> = (0..2)
        .flat_map(|i| (0..4).map(move |j| (i, j)))
        .map(|(i, j)| (0..3).map(|n| X[2 * n + i] * dpre[n][j]).sum())
        .collect();
    let db1: Vec<f64> = (0..4).map(|j| (0..3).map(|n| dpre[n][j]).sum()).collect();
    (dw1, db1, dw2)
}

fn gradient(trace: &Trace, sweep: &Sweep, id: &str) -> Vec<f64> {
    sweep
        .adjoint(trace.find(id).unwrap())
        .unwrap()
        .to_f64()
        .to_vec()
}

#[test]
fn recorded_network_sweeps_to_the_hand_written_gradients() {
    let trace = record(Dtype::F64);
    let mut sweep = Sweep::new(&trace, LedgerMode::On);
    sweep.run_to_end();
    let (dw1, db1, dw2) = by_hand();
    for (id, expected) in [("w1", dw1), ("b1", db1), ("w2", dw2)] {
        let got = gradient(&trace, &sweep, id);
        assert_eq!(got.len(), expected.len());
        for (g, e) in got.iter().zip(&expected) {
            // Summation order differs from the sweep's; a few ulps apart at most.
            assert!((g - e).abs() <= 1e-15 * (1.0 + e.abs()), "{id}: {g} vs {e}");
        }
    }
}

#[test]
fn recorded_gradients_agree_with_central_differences() {
    // Central differences (common practice; truncation error O(h²)).
    let loss = |w2: [f64; 4]| {
        (0..3)
            .map(|n| {
                let y: f64 = (0..4)
                    .map(|j| (X[2 * n] * W1[j] + X[2 * n + 1] * W1[4 + j] + B1[j]).tanh() * w2[j])
                    .sum();
                (y - T[n]).powi(2)
            })
            .sum::<f64>()
            / 3.0
    };
    let trace = record(Dtype::F64);
    let mut sweep = Sweep::new(&trace, LedgerMode::Off);
    sweep.run_to_end();
    let got = gradient(&trace, &sweep, "w2");
    let h = 1e-6;
    for j in 0..4 {
        let (mut up, mut down) = (W2, W2);
        up[j] += h;
        down[j] -= h;
        let numeric = (loss(up) - loss(down)) / (2.0 * h);
        assert!(
            (got[j] - numeric).abs() < 1e-8,
            "w2[{j}]: {} vs {numeric}",
            got[j]
        );
    }
}

#[test]
fn an_f32_recording_holds_the_f32_results_of_the_computation() {
    // x @ w1 + b1 computed in f32. The matmul's dot products are carried in
    // f32 by a GEMM kernel, which may use the fused multiply-add (one
    // rounding for a·b + c, IEEE 754-2019 §5.4.1) or a multiply then an add
    // (one rounding each, §5.4); either way every result is an f32 of that
    // computation. The bias add is one correctly rounded f32 addition.
    let trace = record(Dtype::F32);
    let pre = trace.node(trace.find("add_6").expect("the add is node 6"));
    let got = pre.value.to_f64();
    for n in 0..3 {
        for j in 0..4 {
            let (x0, x1) = (X[2 * n] as f32, X[2 * n + 1] as f32);
            let (w0, w1) = (W1[j] as f32, W1[4 + j] as f32);
            let separate = x0 * w0 + x1 * w1;
            let fused = x1.mul_add(w1, x0 * w0);
            let value = got[4 * n + j];
            assert!(
                value == (separate + B1[j] as f32) as f64 || value == (fused + B1[j] as f32) as f64,
                "element ({n}, {j}): {value} is neither f32 result"
            );
        }
    }
    assert!(
        trace
            .nodes()
            .iter()
            .all(|node| node.value.to_f64().iter().all(|&v| v == v as f32 as f64)),
        "every value is an f32"
    );
}

#[test]
fn scopes_sites_reports_and_seeds_are_recorded() {
    let mut tape = Tape::new("bits", Dtype::F64);
    let a = tape.param("a", 3.0);
    let (b, line) = tape.scoped("outer", |tape| {
        tape.scoped("inner", |tape| (tape.mul(a, a), line!()))
    });
    tape.report(b, 6.5);
    let file = tape.finish_seeded(b, 2.0);
    assert_eq!(file.nodes[1].group, "outer/inner");
    assert_eq!(
        file.nodes[1].site.as_deref(),
        Some(format!("tests/recorder.rs:{line}").as_str())
    );
    let trace = trace::validate(file).unwrap();
    assert_eq!(trace.seed(), &Value::Scalar(2.0));
    assert_eq!(trace.node(1).reported, Some(Value::Scalar(6.5)));
    let mut sweep = Sweep::new(&trace, LedgerMode::Off);
    sweep.run_to_end();
    // d(a²)/da = 2a = 6, times the seed 2 (closed form).
    assert_eq!(sweep.adjoint(0).as_deref(), Some(&Value::Scalar(12.0)));
}

#[test]
fn custom_ops_must_carry_every_partial() {
    let mut tape = Tape::new("custom", Dtype::F64);
    let a = tape.param("a", 1.0);
    assert!(tape.custom("twice", &[a], 2.0, vec![]).is_err());
    assert!(
        tape.custom("mul", &[a], 2.0, vec![ebb::trace::PartialRepr::Scalar(2.0)])
            .is_err(),
        "a catalog name is refused"
    );
    assert!(
        tape.custom(
            "twice",
            &[a],
            2.0,
            vec![ebb::trace::PartialRepr::Scalar(2.0)]
        )
        .is_ok()
    );
}
