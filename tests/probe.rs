use ebb::{dtype::Dtype, record::Tape, sweep::{Sweep, LedgerMode}, trace::validate};
#[test]
fn probe() {
    let t0 = std::time::Instant::now();
    let mut tape = Tape::new("chain", Dtype::F64);
    let mut x = tape.param("x", 0.9);
    while tape.len() + 3 <= 1_000_000 { let a = tape.tanh(x); let b = tape.cos(x); x = tape.mul(a, b); }
    let file = tape.finish(x);
    eprintln!("record {:?}", t0.elapsed());
    let trace = validate(file).unwrap();
    eprintln!("validate {:?}", t0.elapsed());
    let mut sweep = Sweep::new(&trace, LedgerMode::On);
    sweep.run_steps(10_000);
    while sweep.back() {}
    eprintln!("sweep {:?}", t0.elapsed());
}
