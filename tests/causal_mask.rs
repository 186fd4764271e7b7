//! A causal attention mask holds −inf above the diagonal. Softmax absorbs it
//! (e^−inf = 0), so `ebb check` must not call it a fault and `ebb verify`
//! must judge the derivatives around it; a mask that leaks (a fully masked
//! row, −inf added after softmax) is still diagnosed, at the node where it
//! leaked.

use ebb::diagnose::{Diagnosis, OriginClass, Settings, diagnose};
use ebb::dtype::Dtype;
use ebb::record::{Tape, Var};
use ebb::report::Report;
use ebb::sweep::{LedgerMode, Sweep};
use ebb::tensor::Value;
use ebb::trace::{Trace, TraceFile};
use ebb::verify::{Verdict, VerifyOptions, verify};

const TOKENS: usize = 4;
const WIDTH: usize = 3;

/// How the mask is applied.
#[derive(Clone, Copy, PartialEq)]
enum Mask {
    /// scores + mask, the mask −inf above the diagonal (PyTorch's additive mask).
    Added,
    /// where(causal, scores, −inf) (PyTorch's masked_fill).
    Filled,
    /// scores + mask whose first row is −inf everywhere: that softmax row is 0/0.
    FullRow,
    /// softmax(scores) + mask: the −inf reaches the attention output.
    AfterSoftmax,
}

fn causal(row: usize, column: usize) -> bool {
    column <= row
}

/// One causal attention head on invented data, with a mean-squared-error loss.
fn head(mask: Mask, dtype: Dtype) -> TraceFile {
    let mut tape = Tape::new("causal head", dtype);
    let data = |scale: f64, n: usize| -> Vec<f64> {
        (0..n)
            .map(|i| ((i * 7 % 11) as f64 - 5.0) / 5.0 * scale)
            .collect()
    };
    let x = tape.input(
        "x",
        Value::from_parts(vec![TOKENS, WIDTH], data(1.0, TOKENS * WIDTH)),
    );
    let project = |tape: &mut Tape, name: &str, scale: f64| -> Var {
        let w = tape.param(
            name,
            Value::from_parts(vec![WIDTH, WIDTH], data(scale, WIDTH * WIDTH)),
        );
        tape.matmul(x, w)
    };
    let q = project(&mut tape, "wq", 0.7);
    let k = project(&mut tape, "wk", -0.4);
    let v = project(&mut tape, "wv", 0.9);
    let kt = tape.transpose(k);
    let scores = tape.matmul(q, kt);
    let additive = |full_row: bool| -> Value {
        let data = (0..TOKENS * TOKENS)
            .map(|i| {
                let (row, column) = (i / TOKENS, i % TOKENS);
                if causal(row, column) && !(full_row && row == 0) {
                    0.0
                } else {
                    f64::NEG_INFINITY
                }
            })
            .collect();
        Value::from_parts(vec![TOKENS, TOKENS], data)
    };
    let weights = match mask {
        Mask::Added | Mask::FullRow => {
            let m = tape.constant("mask", additive(mask == Mask::FullRow));
            let masked = tape.add(scores, m);
            let masked = tape.rename(masked, "masked");
            tape.softmax(masked, -1)
        }
        Mask::Filled => {
            let keep = (0..TOKENS * TOKENS)
                .map(|i| f64::from(u8::from(causal(i / TOKENS, i % TOKENS))))
                .collect();
            let keep = tape.constant("causal", Value::from_parts(vec![TOKENS, TOKENS], keep));
            let fill = tape.constant("fill", f64::NEG_INFINITY);
            let masked = tape.where_(keep, scores, fill);
            let masked = tape.rename(masked, "masked");
            tape.softmax(masked, -1)
        }
        Mask::AfterSoftmax => {
            let weights = tape.softmax(scores, -1);
            let m = tape.constant("mask", additive(false));
            let leaked = tape.add(weights, m);
            tape.rename(leaked, "leaked")
        }
    };
    let weights = tape.rename(weights, "weights");
    let out = tape.matmul(weights, v);
    let out = tape.rename(out, "out");
    let target = tape.input(
        "target",
        Value::from_parts(vec![TOKENS, WIDTH], data(0.5, TOKENS * WIDTH)),
    );
    let loss = tape.mse(out, target);
    tape.finish(loss)
}

fn diagnosed(trace: &Trace) -> Diagnosis {
    diagnose(trace, &Settings::default())
}

fn report(trace: &Trace, diagnosis: &Diagnosis) -> Report {
    let mut sweep = Sweep::new(trace, LedgerMode::Off);
    sweep.run_to_end();
    Report::new("causal.json", &sweep).with_diagnosis(trace, diagnosis)
}

fn ids(trace: &Trace, nodes: impl IntoIterator<Item = usize>) -> Vec<String> {
    nodes
        .into_iter()
        .map(|node| trace.node(node).id.clone())
        .collect()
}

#[test]
fn a_causal_mask_checks_clean_added_or_filled() {
    for (mask, masked) in [
        (Mask::Added, ["masked", "mask"]),
        (Mask::Filled, ["masked", "fill"]),
    ] {
        for dtype in [Dtype::F32, Dtype::F64] {
            let trace = Trace::try_from(head(mask, dtype)).unwrap();
            let diagnosis = diagnosed(&trace);
            assert!(
                diagnosis.is_clean(),
                "{dtype}: {:?} ({})",
                diagnosis.findings,
                diagnosis.headline
            );
            assert!(diagnosis.origins.is_empty());
            let noted = ids(&trace, diagnosis.masked.iter().map(|m| m.node));
            assert_eq!(noted, masked, "{dtype}");
            // Softmax is where the −inf ends.
            for note in &diagnosis.masked {
                assert_eq!(ids(&trace, note.absorbed_by.iter().copied()), ["weights"]);
            }
            // Six places above the diagonal of a 4×4 mask: 4·3/2 (closed form).
            assert_eq!(diagnosis.masked[0].count, 6);
            assert!(
                diagnosis.headline.contains("masked"),
                "{}",
                diagnosis.headline
            );
            let report = report(&trace, &diagnosis);
            assert!(report.clean && !report.failed, "{}", report.to_text());
            assert!(
                report
                    .to_text()
                    .contains("masked   'masked' holds −inf in 6 elements")
            );
        }
    }
}

#[test]
fn a_causal_mask_verifies_clean() {
    for mask in [Mask::Added, Mask::Filled] {
        for dtype in [Dtype::F32, Dtype::F64] {
            let trace = Trace::try_from(head(mask, dtype)).unwrap();
            let verification = verify(&trace, &VerifyOptions::default());
            let text = verification.to_text(&trace);
            assert_eq!(verification.verdict(), Verdict::Agrees, "{text}");
            assert_eq!(verification.sweep_flags, 0);
            assert_eq!(verification.masked.len(), 2);
            // Every parameter was judged by central differences, none skipped.
            assert_eq!(verification.differences.len(), 3);
            for check in &verification.differences {
                assert_eq!(check.not_finite(), 0);
                assert_eq!(check.entries.len(), 8);
            }
            assert!(verification.tangent.is_some_and(|t| t.relative < 1e-8));
            assert!(text.contains("masked   'masked'"), "{text}");
        }
    }
}

// The masked places get weight 0 and pass back nothing. Closed form:
// softmax(0.5, −inf, 1) = (1/(1 + e^0.5), 0, e^0.5/(1 + e^0.5)), and its
// vector-Jacobian product with ḡ = (1, 2, 3) is yₖ(ḡₖ − Σⱼ ḡⱼyⱼ) =
// (−0.4700, 0, 0.4700). PyTorch 2.15 (torch.softmax and its backward, run on
// this machine on 2026-12-02) prints the same: [0.3775, 0.0000, 0.6225] and
// [−0.4700, −0.0000, 0.4700]; a row that is all −inf gives NaN in both.
#[test]
fn softmax_of_a_masked_row_matches_the_closed_form_and_pytorch() {
    let mut tape = Tape::new("softmax row", Dtype::F64);
    let x = tape.input(
        "x",
        Value::from_parts(
            vec![2, 3],
            vec![
                0.5,
                f64::NEG_INFINITY,
                1.0,
                f64::NEG_INFINITY,
                f64::NEG_INFINITY,
                f64::NEG_INFINITY,
            ],
        ),
    );
    let y = tape.softmax(x, -1);
    let file = tape.finish_seeded(
        y,
        Value::from_parts(vec![2, 3], vec![1.0, 2.0, 3.0, 0.0, 0.0, 0.0]),
    );
    let trace = Trace::try_from(file).unwrap();
    let value = trace.node(trace.output()).value.to_f64().to_vec();
    let e = 0.5f64.exp();
    assert!((value[0] - 1.0 / (1.0 + e)).abs() < 1e-15);
    assert_eq!(value[1], 0.0);
    assert!((value[2] - e / (1.0 + e)).abs() < 1e-15);
    assert!(value[3..].iter().all(|y| y.is_nan()));
    let mut sweep = Sweep::new(&trace, LedgerMode::Off);
    sweep.run_to_end();
    let x = trace.find("x").unwrap();
    let adjoint = sweep.adjoint(x).unwrap().to_f64().to_vec();
    let weighted = value[0] + 3.0 * value[2];
    assert!((adjoint[0] - value[0] * (1.0 - weighted)).abs() < 1e-15);
    assert!((adjoint[0] + 0.4700).abs() < 5e-5);
    assert_eq!(adjoint[1], 0.0);
    assert!((adjoint[2] - 0.4700).abs() < 5e-5);
}

#[test]
fn a_fully_masked_row_is_diagnosed_at_its_softmax() {
    let trace = Trace::try_from(head(Mask::FullRow, Dtype::F32)).unwrap();
    let diagnosis = diagnosed(&trace);
    assert!(!diagnosis.is_clean());
    let origin = diagnosis.first_origin().expect("the NaN reaches the loss");
    assert_eq!(trace.node(origin.node).id, "weights");
    assert_eq!(origin.class, OriginClass::NonFiniteValue);
    assert!(origin.leak);
    assert!(origin.explanation.contains("row"), "{}", origin.explanation);
    assert!(
        diagnosis.headline.contains("'weights'"),
        "{}",
        diagnosis.headline
    );
    // The mask did not work here, so it is not noted as one.
    assert!(diagnosis.masked.is_empty());
    let report = report(&trace, &diagnosis);
    assert!(report.failed);
    let verification = verify(&trace, &VerifyOptions::default());
    assert_eq!(verification.verdict(), Verdict::CannotJudge);
}

#[test]
fn a_mask_added_after_softmax_is_diagnosed_where_it_leaks() {
    let trace = Trace::try_from(head(Mask::AfterSoftmax, Dtype::F32)).unwrap();
    let diagnosis = diagnosed(&trace);
    assert!(!diagnosis.is_clean());
    let origin = diagnosis.first_origin().expect("the −inf reaches the loss");
    // The matmul with the values turns −inf weights into ±inf and NaN.
    assert_eq!(trace.node(origin.node).id, "out");
    assert!(origin.leak);
    assert!(
        origin.explanation.contains("'mask'") && origin.explanation.contains("before softmax"),
        "{}",
        origin.explanation
    );
    assert!(diagnosis.masked.is_empty());
    let chain = diagnosis.chain_to(trace.find("wv").unwrap());
    assert!(ids(&trace, chain).contains(&"out".to_string()));
    let verification = verify(&trace, &VerifyOptions::default());
    assert_eq!(verification.verdict(), Verdict::CannotJudge);
}

// −inf born in the computation is never a mask, even where a later op
// absorbs its value: log(0) = −inf, exp(−inf) = 0, but log's partial 1/0 is
// infinite and the adjoint becomes NaN (0 × inf, IEEE 754 §7.2).
#[test]
fn minus_infinity_born_in_the_trace_is_not_a_mask() {
    let mut tape = Tape::new("log then exp", Dtype::F64);
    let w = tape.param("w", Value::from_parts(vec![2], vec![0.0, 2.0]));
    let l = tape.log(w);
    let e = tape.exp(l);
    let s = tape.sum(e);
    let trace = Trace::try_from(tape.finish(s)).unwrap();
    let diagnosis = diagnosed(&trace);
    assert!(diagnosis.masked.is_empty());
    let origin = diagnosis.first_origin().unwrap();
    assert_eq!(trace.node(origin.node).id, "log_1");
    assert!(!origin.leak);
}

// A recorded −inf that reaches the loss is not absorbed, and NaN is never a mask.
#[test]
fn recorded_non_finite_data_that_is_not_absorbed_is_flagged() {
    for bad in [f64::NEG_INFINITY, f64::NAN] {
        let mut tape = Tape::new("bad data", Dtype::F64);
        let x = tape.input("x", Value::from_parts(vec![3], vec![1.0, bad, 2.0]));
        let w = tape.param("w", Value::from_parts(vec![3], vec![0.5, 0.5, 0.5]));
        let y = tape.mul(x, w);
        let s = tape.sum(y);
        let trace = Trace::try_from(tape.finish(s)).unwrap();
        let diagnosis = diagnosed(&trace);
        assert!(!diagnosis.is_clean());
        assert!(diagnosis.masked.is_empty());
    }
}
