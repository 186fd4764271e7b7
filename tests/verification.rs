//! `ebb::verify`: the tangent sweep against published dual-number examples,
//! finite differences against their known error terms, and the checks finding
//! an injected wrong partial.

mod common;

use common::{Rng, checked, random_tensor, swept};
use ebb::dtype::Dtype;
use ebb::eval::reevaluate;
use ebb::ops::{self, Attrs, Op, VjpArgs};
use ebb::record::Tape;
use ebb::tensor::Value;
use ebb::trace::{PartialRepr, TraceFile, ValueRepr};
use ebb::verify::{Band, Direction, Evidence, TangentSweep, VerifyOptions, verify};

#[test]
fn dual_number_product() {
    // (3 + 2ε)(5 + 7ε) = 15 + (3·7 + 2·5)ε = 15 + 31ε, since ε² = 0: the
    // product rule in dual numbers (common practice).
    let mut tape = Tape::new("dual product", Dtype::F64);
    let (a, b) = (tape.input("a", 3.0), tape.input("b", 5.0));
    let product = tape.mul(a, b);
    let trace = checked(tape.finish(product));
    let direction = Direction::Given(vec![(0, Value::Scalar(2.0)), (1, Value::Scalar(7.0))]);
    let mut tangent = TangentSweep::new(&trace, &direction);
    tangent.run_to_end();
    assert_eq!(trace.node(trace.output()).value, Value::Scalar(15.0));
    assert_eq!(tangent.directional_derivative(), Some(31.0));
}

#[test]
fn baydin_forward_mode_trace() {
    // Baydin, Pearlmutter, Radul & Siskind, "Automatic Differentiation in
    // Machine Learning: a Survey", JMLR 18 (2018), forward-mode evaluation
    // trace of f(x1, x2) = ln x1 + x1·x2 − sin x2 at (2, 5): seeding x1 gives
    // 11.652071455223084 + 5.5ε; seeding x2 gives the tangent 1.7163378145367738.
    let mut tape = Tape::new("Baydin forward mode", Dtype::F64);
    let (x1, x2) = (tape.input("x1", 2.0), tape.input("x2", 5.0));
    let v1 = tape.log(x1);
    let v2 = tape.mul(x1, x2);
    let v3 = tape.sin(x2);
    let v4 = tape.add(v1, v2);
    let v5 = tape.sub(v4, v3);
    let trace = checked(tape.finish(v5));
    assert_eq!(
        trace.node(trace.output()).value,
        Value::Scalar(11.652071455223084)
    );
    let mut tangent = TangentSweep::new(
        &trace,
        &Direction::Unit {
            node: 0,
            element: 0,
        },
    );
    // Step it node by node as a teacher would: x1's tangent is 1, x2's is 0 (zero tangents stay unset).
    tangent.step();
    assert_eq!(tangent.tangent(0), Some(&Value::Scalar(1.0)));
    tangent.step();
    assert_eq!(tangent.tangent(1), None);
    tangent.step();
    assert_eq!(
        tangent.tangent(2),
        Some(&Value::Scalar(0.5)),
        "v̇1 = ẋ1 / x1"
    );
    tangent.run_to_end();
    assert_eq!(tangent.directional_derivative(), Some(5.5));
    assert!(tangent.back());
    assert_eq!(tangent.directional_derivative(), None);

    let mut tangent = TangentSweep::new(
        &trace,
        &Direction::Unit {
            node: 1,
            element: 0,
        },
    );
    tangent.run_to_end();
    let derivative = tangent.directional_derivative().unwrap();
    assert!(
        (derivative - 1.7163378145367738).abs() < 1e-15,
        "{derivative}"
    );
    // The dot-product identity against the reverse sweep.
    let sweep = swept(&trace);
    assert!((tangent.reverse_counterpart(&sweep) - derivative).abs() < 1e-15);
}

#[test]
fn central_differences_of_a_cube_have_error_h_squared() {
    // f(x) = x³ at 1 (common practice, exact arithmetic): the central difference
    // is 3 + h², so its error is h² (1e-4 at h = 1e-2); the forward difference
    // errs by 3h + h².
    let mut tape = Tape::new("cube", Dtype::F64);
    let x = tape.param("x", 1.0);
    let cube = tape
        .apply(
            Op::Pow,
            &[x],
            Attrs {
                exponent: Some(3.0),
                ..Attrs::default()
            },
        )
        .unwrap();
    let trace = checked(tape.finish(cube));
    let at = |x: f64| {
        reevaluate(&trace, &[(0, Value::Scalar(x))], Dtype::F64).unwrap()[1]
            .as_scalar()
            .unwrap()
    };
    let h = 1e-2;
    let central = (at(1.0 + h) - at(1.0 - h)) / (2.0 * h);
    assert!(
        (central - 3.0 - h * h).abs() < 1e-12,
        "central error {}",
        central - 3.0
    );
    let forward = (at(1.0 + h) - at(1.0)) / h;
    assert!(
        (forward - 3.0 - (3.0 * h + h * h)).abs() < 1e-12,
        "forward error {}",
        forward - 3.0
    );
}

/// Records every edge's partial from the op table, as a framework with
/// hand-written backward passes would, so that one can then be corrupted.
fn with_recorded_partials(file: TraceFile) -> TraceFile {
    let trace = checked(file.clone());
    let mut file = file;
    for (index, node) in trace.nodes().iter().enumerate() {
        if node.op.is_leaf() {
            continue;
        }
        let inputs: Vec<&Value> = node.inputs.iter().map(|&i| &trace.node(i).value).collect();
        let partials = (0..inputs.len())
            .map(|slot| {
                match ops::elementwise_partial(
                    node.op,
                    slot,
                    &inputs,
                    &node.value,
                    &node.attrs,
                    trace.dtype(),
                ) {
                    Some(diagonal) => PartialRepr::Diagonal(diagonal.to_f64().to_vec()),
                    None => {
                        let rows = (0..node.value.len())
                            .map(|row| {
                                let mut unit = Value::filled(node.value.shape(), 0.0);
                                unit.set(row, 1.0);
                                let args = VjpArgs {
                                    slot,
                                    inputs: &inputs,
                                    output: &node.value,
                                    adjoint: &unit,
                                    attrs: &node.attrs,
                                    precision: trace.dtype().into(),
                                };
                                ops::vjp(node.op, &args).to_f64().to_vec()
                            })
                            .collect();
                        PartialRepr::Jacobian(rows)
                    }
                }
            })
            .collect();
        file.nodes[index].partials = partials;
    }
    file
}

/// A small random network of tensor ops.
fn random_network(seed: u64) -> TraceFile {
    let mut rng = Rng::new(seed);
    let mut tape = Tape::new("random network", Dtype::F64);
    let x = tape.input("x", random_tensor(&mut rng, &[2, 3], -1.0, 1.0));
    let w = tape.param("w", random_tensor(&mut rng, &[3, 3], -1.0, 1.0));
    let b = tape.param("b", random_tensor(&mut rng, &[3], -0.5, 0.5));
    let hidden = tape.matmul(x, w);
    let hidden = tape.add(hidden, b);
    let activation = [Op::Tanh, Op::Sigmoid, Op::Sin, Op::Exp][rng.below(4)];
    let hidden = tape.apply(activation, &[hidden], Attrs::default()).unwrap();
    let scaled = tape.mul(hidden, b);
    let probabilities = tape
        .apply(Op::Softmax, &[scaled], Attrs::default())
        .unwrap();
    let target = tape.constant("target", random_tensor(&mut rng, &[2, 3], 0.0, 1.0));
    let loss = tape.mse(probabilities, target);
    tape.finish(loss)
}

#[test]
fn on_random_networks_every_check_agrees() {
    for seed in 1..=6 {
        let file = with_recorded_partials(random_network(seed));
        let trace = checked(file);
        let verification = verify(&trace, &VerifyOptions::default());
        assert!(
            verification.agrees(),
            "seed {seed}: {}",
            verification.to_text(&trace)
        );
        assert!(!verification.partials.is_empty());
        for check in &verification.partials {
            assert!(
                check.worst.relative < 1e-12,
                "recorded partials came from the same rule"
            );
        }
        for check in &verification.differences {
            assert!(
                check.band() <= Band::Acceptable,
                "seed {seed}: {:?}",
                check.worst()
            );
        }
        assert!(verification.tangent.unwrap().relative < 1e-12);
    }
}

#[test]
fn an_injected_sign_flip_is_found_at_its_node() {
    for seed in 1..=6 {
        let file = with_recorded_partials(random_network(seed));
        let candidates: Vec<usize> = (0..file.nodes.len())
            .filter(|&k| !file.nodes[k].partials.is_empty())
            .collect();
        for &flipped in &candidates {
            let mut corrupted = file.clone();
            let partial = &mut corrupted.nodes[flipped].partials[0];
            *partial = match partial.clone() {
                PartialRepr::Diagonal(d) => PartialRepr::Diagonal(d.iter().map(|x| -x).collect()),
                PartialRepr::Jacobian(rows) => PartialRepr::Jacobian(
                    rows.iter()
                        .map(|r| r.iter().map(|x| -x).collect())
                        .collect(),
                ),
                other => other,
            };
            let trace = checked(corrupted);
            let verification = verify(&trace, &VerifyOptions::default());
            let partial_suspects: Vec<usize> = verification
                .suspects
                .iter()
                .filter(|s| s.evidence == Evidence::RecordedPartial)
                .map(|s| s.node)
                .collect();
            if trace.node(flipped).partials[0]
                .as_ref()
                .is_some_and(|p| matches!(p, ebb::trace::Partial::Diagonal(d) if d.to_f64().iter().all(|&x| x == 0.0)))
            {
                continue;
            }
            assert_eq!(
                partial_suspects,
                vec![flipped],
                "seed {seed}: flipped {}:\n{}",
                file.nodes[flipped].id,
                verification.to_text(&trace)
            );
            assert_eq!(verification.suspects[0].band, Band::ProbablyWrong);
        }
    }
}

#[test]
fn reported_gradients_lead_to_the_node_with_the_wrong_backward() {
    // A custom op y = x² recorded with the partial −2x (a sign error). The
    // framework's reported gradients are the true ones; the walk from the
    // parameter ends at the custom node.
    let mut tape = Tape::new("reported", Dtype::F64);
    let w = tape.param("w", Value::from_parts(vec![3], vec![0.5, -1.0, 2.0]));
    let scale = tape.constant("scale", 3.0);
    let h = tape.mul(w, scale);
    let h_value = tape.value(h).to_f64().to_vec();
    let squared: Vec<f64> = h_value.iter().map(|x| x * x).collect();
    let wrong: Vec<f64> = h_value.iter().map(|x| -2.0 * x).collect();
    let custom = tape
        .custom(
            "square_custom",
            &[h],
            Value::from_parts(vec![3], squared),
            vec![PartialRepr::Diagonal(wrong)],
        )
        .unwrap();
    let loss = tape.apply(Op::Sum, &[custom], Attrs::default()).unwrap();
    let mut file = tape.finish(loss);
    // True gradients: ∂L/∂y = 1, ∂L/∂h = 2h, ∂L/∂w = 3·2h.
    let true_h: Vec<f64> = h_value.iter().map(|x| 2.0 * x).collect();
    let true_w: Vec<f64> = true_h.iter().map(|g| 3.0 * g).collect();
    file.nodes[0].reported = Some(ValueRepr::Tensor {
        shape: vec![3],
        data: true_w,
    });
    file.nodes[2].reported = Some(ValueRepr::Tensor {
        shape: vec![3],
        data: true_h,
    });
    file.nodes[3].reported = Some(ValueRepr::Tensor {
        shape: vec![3],
        data: vec![1.0; 3],
    });
    let trace = checked(file);
    let verification = verify(&trace, &VerifyOptions::default());
    assert_eq!(
        verification.suspects.len(),
        1,
        "{}",
        verification.to_text(&trace)
    );
    let suspect = &verification.suspects[0];
    assert_eq!(trace.node(suspect.node).id, trace.node(3).id);
    assert_eq!(suspect.evidence, Evidence::ReportedGradient);
    assert_eq!(suspect.band, Band::ProbablyWrong);
    let walk = verification.walk.as_ref().unwrap();
    assert_eq!(walk.path, vec![0, 2]);
}

#[test]
fn kinks_are_named_when_a_step_crosses_them() {
    // relu at exactly 0: the central difference straddles the kink.
    let mut tape = Tape::new("kink", Dtype::F64);
    let w = tape.param("w", Value::from_parts(vec![2], vec![0.0, 1.0]));
    let r = tape.relu(w);
    let loss = tape.apply(Op::Sum, &[r], Attrs::default()).unwrap();
    let trace = checked(tape.finish(loss));
    let verification = verify(&trace, &VerifyOptions::default());
    let check = &verification.differences[0];
    assert_eq!(check.kinks, vec![1], "the relu node is named");
    let at_kink = check.entries.iter().find(|e| e.element == 0).unwrap();
    assert_eq!(at_kink.reverse, 0.0, "the subgradient at the kink is 0");
    assert!(
        (at_kink.central - 0.5).abs() < 1e-9,
        "the difference averages both sides"
    );
    let suspect = verification
        .suspects
        .iter()
        .find(|s| s.evidence == Evidence::FiniteDifference)
        .unwrap();
    assert!(suspect.detail.contains("kinks at"), "{}", suspect.detail);
}

// A ReLU unit 2e-6 below its kink: the step h = ε^(1/3) ≈ 6.06e-6 crosses
// it, and the difference picks up (h − 2e-6)/(2h) ≈ 0.33 of the other
// piece; h/16 ≈ 3.8e-7 stays on one side. f(w) = w² + relu(w − 1 − 2e-6)
// has f'(1) = 2 (closed form).
#[test]
fn a_step_that_crosses_a_kink_near_the_point_is_retried_shorter() {
    let mut tape = Tape::new("near a kink", Dtype::F64);
    let w = tape.param("w", 1.0);
    let square = tape.mul(w, w);
    let shift = tape.constant("shift", 1.0 + 2e-6);
    let pre = tape.sub(w, shift);
    let unit = tape.relu(pre);
    let loss = tape.add(square, unit);
    let trace = checked(tape.finish(loss));
    let verification = verify(&trace, &VerifyOptions::default());
    let check = &verification.differences[0];
    let entry = check.entries[0];
    assert!(
        entry.step < 1e-6,
        "the shorter step was used: {}",
        entry.step
    );
    assert!((entry.central - 2.0).abs() < 1e-6, "{}", entry.central);
    assert!(check.kinks.is_empty());
    assert!(verification.agrees(), "{}", verification.to_text(&trace));
}

#[test]
fn the_wrong_partial_demo_names_exactly_its_custom_node() {
    let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("traces/wrong_partial.ron");
    let trace = ebb::trace::load(&path).unwrap();
    let verification = verify(&trace, &VerifyOptions::default());
    let named: Vec<&str> = verification
        .suspects
        .iter()
        .map(|s| trace.node(s.node).id.as_str())
        .collect();
    assert_eq!(named, vec!["gated"], "{}", verification.to_text(&trace));
    let suspect = &verification.suspects[0];
    assert_eq!(suspect.band, Band::ProbablyWrong);
    assert!(suspect.relative > 1e-2);
    assert_eq!(trace.node(suspect.node).op, Op::Custom);
    // The finite differences go through the custom op's own (wrong) partials, so they cannot see it.
    assert!(
        verification
            .differences
            .iter()
            .all(|check| check.band() <= Band::Acceptable)
    );
}

#[test]
fn the_other_demos_verify_clean() {
    // underflow_f16 is an f16 trace: its derivatives are judged on the forward pass recomputed in f64.
    for name in [
        "teaching.ron",
        "vanishing.ron",
        "exploding.ron",
        "underflow_f16.ron",
        "medium.tape",
    ] {
        let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
            .join("traces")
            .join(name);
        let trace = ebb::trace::load(&path).unwrap();
        let verification = verify(&trace, &VerifyOptions::default());
        assert!(
            verification.agrees(),
            "{name}: {}",
            verification.to_text(&trace)
        );
    }
}

fn demo(name: &str) -> ebb::trace::Trace {
    let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("traces")
        .join(name);
    ebb::trace::load(&path).unwrap_or_else(|error| panic!("{error}"))
}

// NaN compares unordered with everything, itself included (IEEE 754-2019
// §5.11): a NaN gradient can never be shown to agree with a NaN difference.
#[test]
fn a_nan_run_cannot_be_judged_and_never_verifies() {
    let trace = demo("nan_hunt.ron");
    let verification = verify(&trace, &VerifyOptions::default());
    assert_eq!(verification.verdict(), ebb::verify::Verdict::CannotJudge);
    assert!(!verification.agrees());
    for check in &verification.differences {
        assert_eq!(check.band(), Band::NotFinite, "{:?}", check.worst());
    }
    let tangent = verification.tangent.unwrap();
    assert!(tangent.tangent.is_nan() && tangent.reverse.is_nan());
    assert!(tangent.relative.is_nan(), "NaN against NaN is no agreement");
    assert!(
        verification
            .not_finite
            .contains(&ebb::verify::NotFinite::Tangent)
    );
    let text = verification.to_text(&trace);
    assert!(text.starts_with("verdict  cannot judge"), "{text}");
    assert!(!text.contains("(good)"), "{text}");
    assert!(!text.contains("relative error 0)"), "{text}");
    assert!(text.contains("not finite: cannot judge"), "{text}");
}

// Press, Teukolsky, Vetterling & Flannery, "Numerical Recipes", 3rd ed.,
// 2007, §5.7: the central difference's rounding error is about ε·|f|/h, so a
// derivative of 1e-20 at |f| = 1 is far below what it can resolve.
#[test]
fn a_derivative_below_the_difference_resolution_is_unresolved_not_good() {
    let mut tape = Tape::new("tiny slope", Dtype::F64);
    let w = tape.param("w", 0.5);
    let slope = tape.constant("slope", 1e-20);
    let one = tape.constant("one", 1.0);
    let scaled = tape.mul(w, slope);
    let f = tape.add(scaled, one);
    let trace = checked(tape.finish(f));
    let verification = verify(&trace, &VerifyOptions::default());
    let check = &verification.differences[0];
    assert_eq!(check.entries[0].reverse, 1e-20);
    assert_eq!(check.entries[0].band(), Band::Unresolved);
    assert_eq!(check.band(), Band::Unresolved);
    assert_eq!(check.unresolved(), 1);
    assert!(verification.agrees(), "unresolved is no mismatch");
    let text = verification.to_text(&trace);
    assert!(text.contains("'w'  1 entry  unresolved"), "{text}");
    assert!(!text.contains("(good)"), "{text}");
}

#[test]
fn a_check_through_a_custom_op_says_it_cannot_judge_that_op() {
    let trace = demo("wrong_partial.ron");
    let verification = verify(&trace, &VerifyOptions::default());
    let gated = trace.find("gated").unwrap();
    assert_eq!(verification.custom, vec![gated]);
    let text = verification.to_text(&trace);
    let hidden = text
        .lines()
        .find(|line| line.starts_with("  'hidden.w'"))
        .unwrap();
    assert!(
        hidden.contains("through custom 'gated' by its recorded partials: cannot judge it"),
        "{hidden}"
    );
    assert!(
        text.lines()
            .any(|line| line.starts_with("custom   'gated' (smooth_gate)")
                && line.contains("cannot judge it")),
        "{text}"
    );
    let json: serde_json::Value = serde_json::from_str(&verification.to_json(&trace)).unwrap();
    assert_eq!(json["verdict"], "disagrees");
    assert_eq!(json["custom"][0]["node"], "gated");
    assert_eq!(json["custom"][0]["judged_by_reported"], true);
}

#[test]
fn verification_reports_progress_and_stops_when_cancelled() {
    use ebb::control::{Cancelled, Control};
    use std::sync::Mutex;
    use std::sync::atomic::AtomicBool;
    let trace = demo("teaching.ron");
    let stages = Mutex::new(Vec::new());
    let report = |stage: &str, _: f64| stages.lock().unwrap().push(stage.to_string());
    let verification = ebb::verify::verify_with(
        &trace,
        &VerifyOptions::default(),
        &Control::new(Some(&report), None),
    )
    .unwrap();
    assert!(verification.agrees());
    let stages = stages.into_inner().unwrap();
    assert!(
        stages.iter().any(|stage| stage == "finite differences"),
        "{stages:?}"
    );
    let cancel = AtomicBool::new(true);
    let result = ebb::verify::verify_with(
        &trace,
        &VerifyOptions::default(),
        &Control::new(None, Some(&cancel)),
    );
    assert_eq!(result.err(), Some(Cancelled));
}

/// L = Σ w·c in `dtype`, so ∂L/∂w = c exactly; the framework reports
/// `reported` for w.
fn weighted_sum_reporting(dtype: Dtype, reported: Vec<f64>) -> ebb::trace::Trace {
    let mut tape = Tape::new("reported in a half format", dtype);
    let w = tape.param("w", Value::from_parts(vec![3], vec![0.25, 0.5, -1.0]));
    let c = tape.constant("c", Value::from_parts(vec![3], vec![1.5, -0.75, 2.0]));
    let product = tape.mul(w, c);
    let loss = tape.apply(Op::Sum, &[product], Attrs::default()).unwrap();
    let mut file = tape.finish(loss);
    file.nodes[0].reported = Some(ValueRepr::Tensor {
        shape: vec![3],
        data: reported,
    });
    checked(file)
}

#[test]
fn reported_gradients_in_a_half_format_are_judged_at_its_rounding() {
    // One entry a bfloat16 unit in the last place off (1.5 + 2⁻⁷, the next
    // bfloat16 above 1.5: 8 significand bits, Intel, "BFLOAT16 – Hardware
    // Numerics Definition", 2018): a framework's kernel rounding the other
    // way. Relative to the tensor's scale that is 2⁻⁷ / 3.0078 ≈ 2.6e-3,
    // below four bf16 unit roundoffs (4·2⁻⁸ ≈ 1.6e-2) but far above the
    // default 1e-4.
    let one_ulp_off = vec![1.5 + 2f64.powi(-7), -0.75, 2.0];
    let half = weighted_sum_reporting(Dtype::Bf16, one_ulp_off.clone());
    let verification = verify(&half, &VerifyOptions::default());
    assert!(
        verification.suspects.is_empty(),
        "{}",
        verification.to_text(&half)
    );
    let compared = &verification.reported[0];
    assert_eq!(compared.tolerance, 4.0 * 2f64.powi(-8));
    assert!((compared.worst.relative - 2f64.powi(-7) / (3.0 + 2f64.powi(-7))).abs() < 1e-12);
    assert!(verification.to_text(&half).contains("0 disagree (within"));
    // The same numbers in an f32 trace disagree: f32 rounds 2¹⁶ times finer.
    let single = weighted_sum_reporting(Dtype::F32, one_ulp_off);
    let verification = verify(&single, &VerifyOptions::default());
    assert_eq!(verification.reported[0].tolerance, 1e-4);
    assert_eq!(verification.walk.as_ref().map(|w| w.param), Some(0));
    // A wrong sign is far beyond the half format's rounding.
    let wrong = weighted_sum_reporting(Dtype::Bf16, vec![-1.5, 0.75, -2.0]);
    let verification = verify(&wrong, &VerifyOptions::default());
    assert_eq!(verification.walk.as_ref().map(|w| w.param), Some(0));
    assert!(!verification.suspects.is_empty());
}
