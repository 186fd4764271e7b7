//! The diagnoses of the shipped demo traces. Each expectation follows from
//! the story its generator in src/demos/ tells.

use ebb::diagnose::{Diagnosis, NanHow, OriginClass, Rule, Settings, Topic, diagnose};
use ebb::dtype::Dtype;
use ebb::trace::Trace;
use std::path::Path;

fn load(name: &str) -> (Trace, Diagnosis) {
    let path = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("traces")
        .join(name);
    let trace = ebb::trace::load(&path).unwrap_or_else(|error| panic!("{error}"));
    let diagnosis = diagnose(&trace, &Settings::default());
    (trace, diagnosis)
}

fn node(trace: &Trace, id: &str) -> usize {
    trace.find(id).unwrap_or_else(|| panic!("no node '{id}'"))
}

#[test]
fn teaching_is_clean() {
    let (_, diagnosis) = load("teaching.ron");
    assert!(diagnosis.is_clean());
    assert!(diagnosis.advice.is_empty());
}

// ln 0 = −inf (IEEE 754-2019 §9.2.1); the sigmoid's partial p(1 − p) is 0 at
// p = 0, and 0 × inf is NaN (§7.2).
#[test]
fn nan_hunt_names_the_log_and_the_zero_times_infinity() {
    let (trace, diagnosis) = load("nan_hunt.ron");
    let origin = diagnosis.first_origin().expect("a non-finite gradient");
    assert_eq!(
        (trace.node(origin.node).id.as_str(), origin.class),
        ("ln_p", OriginClass::NonFiniteValue)
    );
    for param in ["hidden.w", "out.w"] {
        assert!(
            origin.reached.contains(&node(&trace, param)),
            "{param} is reached"
        );
    }
    let birth = diagnosis
        .nan_births()
        .iter()
        .find(|birth| birth.node == node(&trace, "out.pre"))
        .expect("NaN is born at out.pre");
    assert_eq!(birth.how, NanHow::ZeroTimesInf);
    assert_eq!(diagnosis.advice[0].topic, Topic::Origin);
}

// A tower of sigmoids multiplies gains of at most 1/4 per layer (σ' ≤ 1/4;
// Goodfellow, Bengio & Courville, "Deep Learning", 2016, §6.3.2).
#[test]
fn vanishing_points_at_the_deepest_layer() {
    let (trace, diagnosis) = load("vanishing.ron");
    let bottom = node(&trace, "layer01.b");
    assert!(
        diagnosis
            .findings
            .iter()
            .any(|f| f.rule == Rule::Vanishing && f.node == bottom)
    );
    let advice = diagnosis
        .advice
        .iter()
        .find(|a| a.topic == Topic::Vanishing)
        .expect("vanishing advice");
    assert_eq!(advice.node, Some(bottom));
    let path = diagnosis.path_to(bottom).unwrap();
    let sigmoid_hops: Vec<f64> = path
        .hops
        .iter()
        .filter(|hop| trace.node(hop.from).op == ebb::ops::Op::Sigmoid)
        .map(|hop| hop.gain)
        .collect();
    assert_eq!(
        sigmoid_hops.len(),
        16,
        "the path crosses every layer's sigmoid"
    );
    assert!(
        sigmoid_hops.iter().all(|&gain| gain <= 0.25 * (1.0 + 1e-6)),
        "{sigmoid_hops:?}"
    );
}

// Gain 1.2 per step over 50 steps: 1.2^50 ≈ 9100 (Pascanu, Mikolov & Bengio,
// ICML 2013, §2.3); f16 cannot hold what f32 does.
#[test]
fn exploding_advises_clipping_and_overflows_f16() {
    let (trace, diagnosis) = load("exploding.ron");
    assert!(
        diagnosis
            .findings
            .iter()
            .any(|f| f.rule == Rule::Exploding && f.node == node(&trace, "cell.w"))
    );
    assert!(
        diagnosis
            .advice
            .iter()
            .any(|a| a.topic == Topic::Exploding && a.text.contains("Clipping"))
    );
    assert!(
        diagnosis
            .replay_in(Dtype::F16)
            .unwrap()
            .first_overflow()
            .is_some()
    );
    assert!(
        diagnosis
            .replay_in(Dtype::F32)
            .unwrap()
            .first_overflow()
            .is_none()
    );
}

// Micikevicius et al., "Mixed Precision Training", ICLR 2018, §3.2: with the
// largest adjoint 1 (the seed), S = 2^15 keeps S · 1 below 65504.
#[test]
fn underflow_in_f16_gets_loss_scale_advice() {
    let (_, diagnosis) = load("underflow_f16.ron");
    assert_eq!(diagnosis.dtype, Dtype::F16);
    assert!(diagnosis.findings.iter().any(|f| f.rule == Rule::Underflow));
    let scale = diagnosis.loss_scale.expect("loss-scale advice");
    assert_eq!(scale.exponent, 15);
    assert!(scale.underflow_scaled < scale.underflow_unscaled);
    assert!(diagnosis.advice.iter().any(|a| a.topic == Topic::LossScale));
}

fn rules_at(diagnosis: &Diagnosis, node: usize) -> Vec<Rule> {
    diagnosis.findings_at(node).map(|f| f.rule).collect()
}

// The healthy top of a vanishing tower is large only against a median that
// vanishes itself: no "exploding" there, and one finding per node and rule.
#[test]
fn vanishing_has_no_exploding_top_and_one_finding_per_node_and_rule() {
    let (trace, diagnosis) = load("vanishing.ron");
    assert!(
        !diagnosis.findings.iter().any(|f| f.rule == Rule::Exploding),
        "{:?}",
        diagnosis
            .findings
            .iter()
            .filter(|f| f.rule == Rule::Exploding)
            .map(|f| &trace.node(f.node).id)
            .collect::<Vec<_>>()
    );
    let mut seen = std::collections::HashSet::new();
    for finding in &diagnosis.findings {
        assert!(
            seen.insert((finding.rule, finding.node)),
            "two {:?} findings at '{}'",
            finding.rule,
            trace.node(finding.node).id
        );
    }
    let bottom = node(&trace, "layer01.b");
    assert_eq!(rules_at(&diagnosis, bottom), vec![Rule::Vanishing]);
    let finding = diagnosis.findings_at(bottom).next().unwrap();
    let measures: Vec<(ebb::diagnose::Measure, bool)> = finding
        .measures
        .iter()
        .map(|m| (m.measure, m.crossed))
        .collect();
    use ebb::diagnose::Measure;
    assert_eq!(
        measures,
        vec![
            (Measure::Norm, true),
            (Measure::NormToSeed, true),
            (Measure::NormToMedian, false)
        ],
        "every measure is carried; the median vanishes itself, so it does not count"
    );
}

// Micikevicius et al. 2018, §3.2: loss scaling exists to keep small
// gradients from rounding to zero; where none does, there is nothing to advise.
#[test]
fn a_clean_f16_trace_gets_no_loss_scale_advice() {
    let mut tape = ebb::record::Tape::new("clean f16", Dtype::F16);
    let w = tape.param("w", 0.5);
    let x = tape.input("x", 3.0);
    let y = tape.mul(w, x);
    let trace = Trace::try_from(tape.finish(y)).unwrap();
    let diagnosis = diagnose(&trace, &Settings::default());
    assert_eq!(diagnosis.loss_scale.unwrap().underflow_unscaled, 0.0);
    assert!(
        !diagnosis.advice.iter().any(|a| a.topic == Topic::LossScale),
        "{:?}",
        diagnosis.advice
    );
}

// The exploding river model's loss is about 1e6 in f32, beyond f16's largest
// finite value 65504 (IEEE 754-2019 table 3.5): the forward value overflows
// in f16 before any adjoint does.
#[test]
fn the_f16_overflow_advice_names_the_forward_value() {
    let (trace, diagnosis) = load("exploding.ron");
    let run = diagnosis.replay_in(Dtype::F16).unwrap();
    let first = run.first_overflow().unwrap();
    assert_eq!(trace.node(first.node).id, "loss");
    assert_eq!(first.site, ebb::diagnose::Site::Value);
    let advice = diagnosis
        .advice
        .iter()
        .find(|a| a.topic == Topic::Overflow)
        .expect("f16 overflow advice");
    assert!(
        advice.text.contains("the forward value of 'loss'"),
        "{}",
        advice.text
    );
    assert!(!advice.text.contains("adjoint"), "{}", advice.text);
}

#[test]
fn the_diagnosis_reports_progress_and_stops_when_cancelled() {
    use ebb::control::{Cancelled, Control};
    use std::sync::Mutex;
    use std::sync::atomic::AtomicBool;
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("traces/exploding.ron");
    let trace = ebb::trace::load(&path).unwrap();
    let fractions = Mutex::new(Vec::new());
    let report = |_: &str, fraction: f64| fractions.lock().unwrap().push(fraction);
    let diagnosis = ebb::diagnose::diagnose_with(
        &trace,
        &Settings::default(),
        &Control::new(Some(&report), None),
    )
    .unwrap();
    assert_eq!(
        diagnosis.headline,
        diagnose(&trace, &Settings::default()).headline
    );
    let fractions = fractions.into_inner().unwrap();
    assert!(
        fractions.windows(2).all(|pair| pair[0] <= pair[1]),
        "{fractions:?}"
    );
    assert_eq!(fractions.last(), Some(&1.0));
    let cancel = AtomicBool::new(true);
    let cancelled = ebb::diagnose::diagnose_with(
        &trace,
        &Settings::default(),
        &Control::new(None, Some(&cancel)),
    );
    assert_eq!(cancelled.err(), Some(Cancelled));
}
