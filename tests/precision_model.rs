//! The precision model (traces/FORMAT.md, "Precision model") against IEEE
//! 754 arithmetic: half-precision storage with binary32 accumulation shows no
//! stall where hardware has none, a pure binary16 run does, and casts round
//! each contribution into their input's dtype.

use ebb::dtype::Dtype;
use ebb::record::Tape;
use ebb::sweep::{LedgerMode, Sweep};
use ebb::tensor::Value;
use ebb::trace::{self, Trace};

/// x · w for x = 4096 entries of 2⁻⁶ and w = 4096 entries of 2⁻⁶: 4096 products
/// of 2⁻¹², exactly 1.
fn dot_trace(accumulate: Option<Dtype>) -> Trace {
    let mut tape = Tape::new("dot of 4096 small products", Dtype::F16);
    if let Some(accumulate) = accumulate {
        tape.accumulate_in(accumulate);
    }
    let x = tape.input("x", Value::filled(&[1, 4096], 2f64.powi(-6)));
    let w = tape.param("w", Value::filled(&[4096, 1], 2f64.powi(-6)));
    let y = tape.matmul(x, w);
    let loss = tape.sum(y);
    Trace::try_from(tape.finish(loss)).unwrap()
}

// IEEE 754-2019 binary16 (table 3.5: p = 11) with roundTiesToEven (§4.3.1):
// carried in binary32 (p = 24) the sum of 4096 terms 2⁻¹² is exact, 1.0; a
// running binary16 sum reaches 0.5, where 2⁻¹² is half an ulp (2⁻¹¹ · 2⁻¹),
// a tie that rounds back to the even 0.5, and stays there.
#[test]
fn an_f16_matmul_accumulated_in_f32_does_not_stall() {
    let mixed = dot_trace(None);
    assert_eq!(mixed.accumulate(), Dtype::F32);
    assert_eq!(mixed.node(2).value.get(0), 1.0);
    let pure = dot_trace(Some(Dtype::F16));
    assert_eq!(pure.node(2).value.get(0), 0.5);
}

// The same arithmetic in the reverse sweep: the bias's adjoint sums 4096
// contributions of 2⁻¹² over the broadcast batch axis.
#[test]
fn a_broadcast_sum_in_the_sweep_accumulates_in_f32() {
    let run = |accumulate: Option<Dtype>| {
        let mut tape = Tape::new("bias over a batch of 4096", Dtype::F16);
        if let Some(accumulate) = accumulate {
            tape.accumulate_in(accumulate);
        }
        let x = tape.input("x", Value::filled(&[4096, 1], 0.0));
        let b = tape.param("b", Value::filled(&[1], 0.0));
        let y = tape.add(x, b);
        let scale = tape.constant("scale", 2f64.powi(-12));
        let scaled = tape.mul(y, scale);
        let loss = tape.sum(scaled);
        let trace = Trace::try_from(tape.finish(loss)).unwrap();
        let mut sweep = Sweep::new(&trace, LedgerMode::On);
        sweep.run_to_end();
        let adjoint = sweep.adjoint(b.index()).unwrap().into_owned();
        assert_eq!(adjoint.storage_dtype(), Dtype::F16);
        adjoint.get(0)
    };
    assert_eq!(run(None), 1.0);
    assert_eq!(run(Some(Dtype::F16)), 0.5);
}

// A cast's derivative is the identity; its contribution is rounded into the
// input's dtype. 1 + 2⁻¹¹ is exact in f32 but rounds (a tie, to even) to 1
// in f16; cast down the other way, an f16 contribution is exact in f32.
#[test]
fn casts_round_each_contribution_into_their_inputs_dtype() {
    let mut tape = Tape::new("cast both ways", Dtype::F32);
    let w = tape.param("w", Value::from_parts(vec![2], vec![1.0, 1.0]));
    let w16 = tape.cast(w, Dtype::F16);
    let c = tape.constant(
        "c",
        Value::from_parts(vec![2], vec![1.0 + 2f64.powi(-11), 3.0]),
    );
    let c16 = tape.cast(c, Dtype::F16);
    assert_eq!(*tape.value(c16).to_f64(), [1.0, 3.0]);
    let y = tape.mul(w16, c16);
    let y32 = tape.cast(y, Dtype::F32);
    let k = tape.constant(
        "k",
        Value::from_parts(vec![2], vec![1.0 + 2f64.powi(-11), 1.0]),
    );
    let z = tape.mul(y32, k);
    let loss = tape.sum(z);
    let file = tape.finish(loss);
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("casts.tape");
    trace::save(&file, &path).unwrap();
    let trace = trace::load(&path).unwrap();
    let mut sweep = Sweep::new(&trace, LedgerMode::On);
    sweep.run_to_end();
    let y32_adjoint = sweep.adjoint(trace.find("cast_5").unwrap()).unwrap();
    assert_eq!(y32_adjoint.storage_dtype(), Dtype::F32);
    assert_eq!(*y32_adjoint.to_f64(), [1.0 + 2f64.powi(-11), 1.0]);
    // Through the cast into f16: 1 + 2⁻¹¹ rounds to 1.
    let y_adjoint = sweep.adjoint(trace.find("mul_4").unwrap()).unwrap();
    assert_eq!(y_adjoint.storage_dtype(), Dtype::F16);
    assert_eq!(*y_adjoint.to_f64(), [1.0, 1.0]);
    // ∂/∂w = c16 · ȳ = [1, 3] in f16, exact in w's f32.
    let w_adjoint = sweep.adjoint(w.index()).unwrap();
    assert_eq!(w_adjoint.storage_dtype(), Dtype::F32);
    assert_eq!(*w_adjoint.to_f64(), [1.0, 3.0]);
}

// The precision replay of a mixed trace re-types every node and uses the
// replay dtype's default accumulation: an f16 replay of the dot product is
// 1, not a stalled 0.5.
#[test]
fn a_replay_in_f16_accumulates_in_f32() {
    let trace = dot_trace(None);
    let replay = trace.retyped(Dtype::F16, ebb::dtype::Subnormals::Keep);
    assert_eq!(replay.accumulate(), Dtype::F32);
    let mut sweep = Sweep::new(&replay, LedgerMode::Off);
    sweep.run_to_end();
    // ∂/∂w = xᵀ · 1 = 2⁻⁶ for every entry, stored in f16.
    let w = sweep.adjoint(1).unwrap();
    assert_eq!(w.storage_dtype(), Dtype::F16);
    assert!(w.to_f64().iter().all(|&g| g == 2f64.powi(-6)));
}
