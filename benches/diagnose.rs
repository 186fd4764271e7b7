//! Diagnosis cost against a plain sweep: a long scalar chain (the shape of a
//! recurrence unrolled over many steps) and a small tensor network.

use ebb::diagnose::{Settings, diagnose};
use ebb::dtype::Dtype;
use ebb::record::Tape;
use ebb::sweep::{LedgerMode, Sweep};
use ebb::tensor::Value;
use ebb::trace::Trace;

fn main() {
    divan::main();
}

/// x_t = w · x_{t−1}, `length` steps.
fn chain(length: usize) -> Trace {
    let mut tape = Tape::new("chain", Dtype::F64);
    let w = tape.param("w", 0.999);
    let mut x = tape.input("x0", 1.0);
    for _ in 0..length {
        x = tape.mul(w, x);
    }
    Trace::try_from(tape.finish(x)).unwrap()
}

/// Four tanh layers of width 64 on a batch of 16.
fn network() -> Trace {
    let mut tape = Tape::new("network", Dtype::F32);
    let mut h = tape.input(
        "x",
        Value::from_parts(
            vec![16, 64],
            (0..1024).map(|k| ((k % 17) as f64 - 8.0) / 8.0).collect(),
        ),
    );
    for layer in 0..4 {
        let weights = tape.param(
            &format!("w{layer}"),
            Value::from_parts(
                vec![64, 64],
                (0..4096).map(|k| ((k % 13) as f64 - 6.0) / 48.0).collect(),
            ),
        );
        let product = tape.matmul(h, weights);
        h = tape.tanh(product);
    }
    let target = tape.input("target", Value::from_parts(vec![16, 64], vec![0.0; 1024]));
    let loss = tape.mse(h, target);
    Trace::try_from(tape.finish(loss)).unwrap()
}

#[divan::bench(args = [10_000, 100_000])]
fn sweep_chain(bencher: divan::Bencher, length: usize) {
    let trace = chain(length);
    bencher.bench(|| {
        let mut sweep = Sweep::new(&trace, LedgerMode::Off);
        sweep.run_to_end()
    });
}

#[divan::bench(args = [10_000, 100_000])]
fn diagnose_chain(bencher: divan::Bencher, length: usize) {
    let trace = chain(length);
    let settings = Settings::default();
    bencher.bench(|| diagnose(&trace, &settings).findings.len());
}

#[divan::bench]
fn diagnose_network(bencher: divan::Bencher) {
    let trace = network();
    let settings = Settings::default();
    bencher.bench(|| diagnose(&trace, &settings).findings.len());
}

/// The forward consistency check alone: every node recomputed with the op table.
#[divan::bench(args = [10_000, 100_000])]
fn forward_check_chain(bencher: divan::Bencher, length: usize) {
    let trace = chain(length);
    bencher.bench(|| ebb::diagnose::check_forward(&trace, 1.0).checked);
}

#[divan::bench]
fn forward_check_network(bencher: divan::Bencher) {
    let trace = network();
    bencher.bench(|| ebb::diagnose::check_forward(&trace, 1.0).checked);
}
