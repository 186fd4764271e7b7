//! Exact undo of the sweep, and traces at the million-node scale.

mod common;

use common::{Rng, checked, random_tensor};
use ebb::dtype::Dtype;
use ebb::ops::{Attrs, Op};
use ebb::record::Tape;
use ebb::sweep::{LedgerMode, Sweep};
use ebb::tensor::Value;
use ebb::trace::{Encoding, Trace, load_str, to_text};
use std::path::Path;

/// Every adjoint, flag and ledger entry as bits, so NaN compares equal to itself.
fn snapshot(sweep: &Sweep) -> String {
    let bits = |value: Option<&Value>| {
        value.map(|v| {
            (
                v.shape().to_vec(),
                v.to_f64().iter().map(|x| x.to_bits()).collect::<Vec<_>>(),
            )
        })
    };
    let adjoints: Vec<_> = (0..sweep.trace().nodes().len())
        .map(|node| bits(sweep.adjoint(node).as_deref()))
        .collect();
    let flags: Vec<_> = sweep
        .flags()
        .iter()
        .map(|f| {
            (
                f.step,
                f.node,
                f.kind,
                f.slot,
                f.from,
                f.element,
                f.value.to_bits(),
                f.count,
            )
        })
        .collect();
    let ledger: Vec<_> = sweep
        .ledger()
        .map(|ledger| {
            ledger
                .entries()
                .map(|c| {
                    (
                        c.step,
                        c.consumer,
                        c.input,
                        c.slot,
                        bits(Some(&c.value)),
                        bits(c.before.as_ref()),
                        bits(Some(&c.after)),
                    )
                })
                .collect()
        })
        .unwrap_or_default();
    let received: Vec<_> = match sweep.ledger() {
        Some(ledger) => (0..sweep.trace().nodes().len())
            .map(|node| ledger.received(node).len())
            .collect(),
        None => Vec::new(),
    };
    format!(
        "{} {adjoints:?} {flags:?} {ledger:?} {received:?}",
        sweep.cursor()
    )
}

/// A small network with tensors, broadcasting and a log of zero, so flags are raised mid-sweep.
fn tensor_trace(seed: u64) -> Trace {
    let mut rng = Rng::new(seed);
    let mut tape = Tape::new("undo network", Dtype::F32);
    let x = tape.input("x", random_tensor(&mut rng, &[3, 2], -1.0, 1.0));
    let w = tape.param("w", random_tensor(&mut rng, &[2, 4], -1.0, 1.0));
    let b = tape.param("b", random_tensor(&mut rng, &[4], -1.0, 1.0));
    let hidden = tape.matmul(x, w);
    let hidden = tape.add(hidden, b);
    let hidden = tape.relu(hidden);
    let mask = tape.constant("mask", Value::from_parts(vec![4], vec![1.0, 0.0, 1.0, 1.0]));
    let masked = tape.mul(hidden, mask);
    let probabilities = tape
        .apply(Op::Softmax, &[masked], Attrs::default())
        .unwrap();
    let zero = tape.constant(
        "zero_weight",
        Value::from_parts(vec![4], vec![1.0, 1.0, 0.0, 1.0]),
    );
    let scaled = tape.mul(probabilities, zero);
    let logs = tape.log(scaled);
    let loss = tape.apply(Op::Sum, &[logs], Attrs::default()).unwrap();
    checked(tape.finish(loss))
}

fn check_undo(trace: &Trace, mode: LedgerMode, rng: &mut Rng) {
    for _ in 0..20 {
        let mut sweep = Sweep::new(trace, mode);
        let start = rng.below(sweep.len() + 1);
        sweep.run_steps(start);
        let before = snapshot(&sweep);
        let k = rng.below(sweep.len() - start + 1);
        let taken = sweep.run_steps(k);
        assert_eq!(taken, k);
        for _ in 0..k {
            assert!(sweep.back());
        }
        assert_eq!(
            snapshot(&sweep),
            before,
            "step {k} from {start} then back {k} must restore everything ({mode:?})"
        );
    }
}

#[test]
fn step_then_back_restores_adjoints_flags_and_ledger_bit_exactly() {
    let mut rng = Rng::new(77);
    let demo = checked(ebb::demos::teaching());
    for seed in 1..=5 {
        let trace = tensor_trace(seed);
        for mode in [LedgerMode::On, LedgerMode::Off] {
            check_undo(&trace, mode, &mut rng);
            check_undo(&demo, mode, &mut rng);
        }
    }
    // The network really does raise flags mid-sweep, so their undo is exercised.
    let trace = tensor_trace(1);
    let mut sweep = Sweep::new(&trace, LedgerMode::On);
    sweep.run_to_end();
    assert!(!sweep.flags().is_empty());
    assert!(
        sweep.flags().iter().any(|flag| flag.step > 0),
        "{:?}",
        sweep.flags()
    );
}

/// A deeper network with branches (a residual add and a value used twice),
/// so its ledger holds tensor befores that a small budget cannot keep.
fn branching_trace(seed: u64) -> Trace {
    let mut rng = Rng::new(seed);
    let mut tape = Tape::new("budget network", Dtype::F32);
    let mut h = tape.input("x", random_tensor(&mut rng, &[4, 6], -1.0, 1.0));
    for layer in 0..6 {
        let w = tape.param(
            &format!("w{layer}"),
            random_tensor(&mut rng, &[6, 6], -0.8, 0.8),
        );
        let product = tape.matmul(h, w);
        let squashed = tape.tanh(product);
        let doubled = tape.mul(squashed, squashed);
        let residual = tape.add(h, doubled);
        h = tape.add(residual, squashed);
    }
    let loss = tape.apply(Op::Sum, &[h], Attrs::default()).unwrap();
    checked(tape.finish(loss))
}

// Beyond its memory budget the ledger keeps checkpoints and undo replays
// from them: random walks of steps and undos, and seeks, must give the same
// bits as a ledger with no bound at every point (common practice: a
// recompute-from-checkpoint scheme is exact when every step is deterministic).
#[test]
fn a_ledger_beyond_its_budget_undoes_to_the_same_bits() {
    let mut rng = Rng::new(2024);
    for seed in 1..=3 {
        let trace = branching_trace(seed);
        for budget in [0, 400, 2_000] {
            let mut bounded = Sweep::with_budget(&trace, budget);
            let mut unbounded = Sweep::with_budget(&trace, usize::MAX);
            for _ in 0..60 {
                match rng.below(4) {
                    0 | 1 => {
                        let k = rng.below(12);
                        bounded.run_steps(k);
                        unbounded.run_steps(k);
                    }
                    2 => {
                        for _ in 0..rng.below(10) {
                            assert_eq!(bounded.back(), unbounded.back());
                        }
                    }
                    _ => {
                        let to = rng.below(trace.sweep_order().len() + 1);
                        bounded.seek(to);
                        unbounded.seek(to);
                    }
                }
                assert_eq!(
                    snapshot(&bounded),
                    snapshot(&unbounded),
                    "seed {seed} budget {budget}"
                );
            }
            bounded.run_to_end();
            unbounded.run_to_end();
            assert_eq!(snapshot(&bounded), snapshot(&unbounded));
            let (spilled, _) = bounded.ledger_usage().unwrap();
            if budget == 0 {
                assert!(
                    spilled,
                    "a zero budget keeps checkpoints from the first tensor before"
                );
            }
            assert!(!unbounded.ledger_usage().unwrap().0);
        }
    }
}

#[test]
fn back_at_the_start_does_nothing() {
    let trace = checked(ebb::demos::teaching());
    let mut sweep = Sweep::new(&trace, LedgerMode::On);
    let before = snapshot(&sweep);
    assert!(!sweep.back());
    assert_eq!(snapshot(&sweep), before);
    sweep.run_to_end();
    sweep.restart();
    assert_eq!(snapshot(&sweep), before);
    sweep.seek(5);
    assert_eq!(sweep.cursor(), 5);
    sweep.seek(2);
    assert_eq!(sweep.cursor(), 2);
}

/// A chain x → neg → neg → … of `length` negations, built as schema values.
fn chain(length: usize) -> ebb::trace::TraceFile {
    let mut tape = Tape::new("long chain", Dtype::F64);
    let mut node = tape.param("x", 0.75);
    for _ in 0..length {
        node = tape.neg(node);
    }
    tape.finish(node)
}

#[test]
fn million_node_chain_loads_from_json_and_sweeps() {
    let length = 1_000_000;
    let text = to_text(&chain(length), Encoding::Json);
    let trace =
        load_str(&text, Encoding::Json, Path::new("chain.json")).expect("a long chain loads");
    drop(text);
    assert_eq!(trace.nodes().len(), length + 1);
    assert_eq!(trace.sweep_order().len(), length + 1);
    // d/dx of (−1)^n·x is (−1)^n; n is even.
    let mut sweep = Sweep::new(&trace, LedgerMode::Off);
    assert_eq!(sweep.run_to_end(), length + 1);
    assert_eq!(
        sweep.adjoint(trace.find("x").unwrap()).as_deref(),
        Some(&Value::Scalar(1.0))
    );
    assert!(sweep.flags().is_empty());

    let mut sweep = Sweep::new(&trace, LedgerMode::On);
    sweep.run_steps(length / 2 + 1);
    let middle = trace.sweep_order()[length / 2];
    let adjoint = sweep.adjoint(middle).map(|value| value.into_owned());
    for _ in 0..1000 {
        sweep.step();
    }
    for _ in 0..1000 {
        sweep.back();
    }
    assert_eq!(sweep.adjoint(middle).as_deref(), adjoint.as_ref());
    assert_eq!(sweep.cursor(), length / 2 + 1);
}
