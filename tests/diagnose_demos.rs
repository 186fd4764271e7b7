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
