//! Stepping 10,000 times forward and back on a generated 1,000,000-node trace
//! restores every adjoint bit for bit (engine only, no rendering).

use ebb::dtype::Dtype;
use ebb::record::Tape;
use ebb::sweep::{LedgerMode, Sweep};
use ebb::trace::validate;

/// A chain of blocks x' = tanh(x)·cos(x): x feeds two nodes in every block
/// (a branch point), and the values stay well inside f64's range for a
/// million nodes, so every adjoint is a non-trivial number.
fn chain(nodes: usize) -> ebb::trace::Trace {
    let mut tape = Tape::new("tanh-cos chain", Dtype::F64);
    let mut x = tape.param("x0", 0.9);
    while tape.len() + 3 <= nodes {
        let squashed = tape.tanh(x);
        let damped = tape.cos(x);
        x = tape.mul(squashed, damped);
    }
    validate(tape.finish(x)).unwrap()
}

fn adjoint_bits(sweep: &Sweep) -> Vec<Option<Vec<u64>>> {
    (0..sweep.trace().nodes().len())
        .map(|node| {
            sweep
                .adjoint(node)
                .map(|value| value.to_f64().iter().map(|x| x.to_bits()).collect())
        })
        .collect()
}

#[test]
fn ten_thousand_steps_forward_and_back_restore_every_adjoint() {
    let trace = chain(1_000_000);
    assert!(trace.nodes().len() > 999_990);
    let mut sweep = Sweep::new(&trace, LedgerMode::On);
    let start = adjoint_bits(&sweep);
    let checkpoints = [2_500, 5_000, 7_500];
    let mut saved = Vec::new();
    for target in checkpoints.iter().copied().chain([10_000]) {
        sweep.run_steps(target - sweep.cursor());
        saved.push(adjoint_bits(&sweep));
    }
    assert_eq!(sweep.cursor(), 10_000);
    assert_ne!(
        saved[3], start,
        "stepping must change adjoints, or the check below proves nothing"
    );
    // Each checkpoint is reached again going back, and matches an independent
    // sweep run forward to the same point without a ledger.
    for (at, &target) in checkpoints.iter().enumerate().rev() {
        while sweep.cursor() > target {
            assert!(sweep.back());
        }
        assert!(
            adjoint_bits(&sweep) == saved[at],
            "adjoints differ after stepping back to {target}"
        );
        let mut fresh = Sweep::new(&trace, LedgerMode::Off);
        fresh.run_steps(target);
        assert!(
            adjoint_bits(&fresh) == saved[at],
            "a fresh sweep to {target} disagrees"
        );
    }
    while sweep.back() {}
    assert_eq!(sweep.cursor(), 0);
    assert!(
        adjoint_bits(&sweep) == start,
        "after 10,000 steps back the adjoints differ from the start"
    );
    assert!(sweep.ledger().unwrap().is_empty());
}
