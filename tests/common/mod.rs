//! Helpers shared by the integration tests: recording, validating and sweeping.
#![allow(dead_code)]

pub mod pty;
pub mod screen;
pub mod view;

use ebb::record::Tape;
use ebb::sweep::{LedgerMode, Sweep};
use ebb::tensor::Value;
use ebb::trace::{Trace, TraceFile};

/// Validates a recorded trace file, panicking with every problem.
pub fn checked(file: TraceFile) -> Trace {
    Trace::try_from(file).unwrap_or_else(|problems| panic!("invalid trace: {problems:?}"))
}

/// Finishes a tape at `output` and validates it.
pub fn finish(tape: Tape, output: ebb::record::Var) -> Trace {
    checked(tape.finish(output))
}

/// Sweeps a trace to the end with the ledger on.
pub fn swept(trace: &Trace) -> Sweep<'_> {
    let mut sweep = Sweep::new(trace, LedgerMode::On);
    sweep.run_to_end();
    sweep
}

/// The adjoint of node `id` in a sweep.
pub fn adjoint(sweep: &Sweep, id: &str) -> Value {
    let node = sweep
        .trace()
        .find(id)
        .unwrap_or_else(|| panic!("no node {id}"));
    sweep
        .adjoint(node)
        .unwrap_or_else(|| panic!("node {id} has no adjoint"))
        .into_owned()
}

/// The scalar adjoint of node `id`.
pub fn scalar_adjoint(sweep: &Sweep, id: &str) -> f64 {
    adjoint(sweep, id).as_scalar().expect("a scalar adjoint")
}

/// Asserts `actual` is within `tolerance` relative error of `expected`.
#[track_caller]
pub fn assert_close(actual: f64, expected: f64, tolerance: f64) {
    let scale = expected.abs().max(1e-300);
    assert!(
        (actual - expected).abs() <= tolerance * scale.max(1.0),
        "got {actual}, expected {expected} (tolerance {tolerance})"
    );
}

pub use ebb::random::Rng;

/// A tensor of entries uniform in [lo, hi).
pub fn random_tensor(rng: &mut Rng, shape: &[usize], lo: f64, hi: f64) -> Value {
    let n = shape.iter().product();
    Value::from_parts(
        shape.to_vec(),
        (0..n).map(|_| rng.uniform(lo, hi)).collect(),
    )
}
