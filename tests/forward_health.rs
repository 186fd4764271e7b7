//! Forward consistency and forward health: recorded values recomputed with
//! the op table under the precision model, numbers not representable in
//! their dtype, saturated sigmoid and tanh units, dead ReLU units and
//! activation norms by group — in the library, the report, its JSON, the
//! settings and the view's Flags.

mod common;

use common::checked;
use ebb::diagnose::{Rule, Settings, diagnose};
use ebb::dtype::Dtype;
use ebb::record::Tape;
use ebb::tensor::Value;
use ebb::trace::{Encoding, Trace, TraceFile, ValueRepr, to_text};
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn ebb(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_ebb"))
        .args(args)
        .output()
        .expect("the binary runs")
}

fn quick() -> Settings {
    Settings {
        replay: Vec::new(),
        ..Settings::default()
    }
}

fn write(dir: &Path, name: &str, file: &TraceFile) -> PathBuf {
    let path = dir.join(name);
    std::fs::write(&path, to_text(file, Encoding::Json)).unwrap();
    path
}

/// A two-row, three-class cross-entropy in f32.
fn cross_entropy_step() -> TraceFile {
    let mut tape = Tape::new("three classes", Dtype::F32);
    let logits = tape.param(
        "logits",
        Value::from_parts(vec![2, 3], vec![0.5, -1.0, 2.0, 1.5, 0.25, -0.75]),
    );
    let loss = tape.cross_entropy(logits, &[2, 0]);
    tape.finish(loss)
}

fn position(file: &TraceFile, id: &str) -> usize {
    file.nodes
        .iter()
        .position(|node| node.id.0 == id)
        .unwrap_or_else(|| panic!("no node {id}"))
}

// The mean cross-entropy of these logits is (ln(e^0.5 + e^-1 + e^2) − 2 +
// ln(e^1.5 + e^0.25 + e^-0.75) − 1.5) / 2 ≈ (0.2413 + 0.3307) / 2 ≈ 0.2860
// (logsumexp minus the target logit, row by row: common practice); 99.0 is
// no rounding of it.
#[test]
fn a_cross_entropy_recorded_as_99_is_found() {
    let mut file = cross_entropy_step();
    let at = file.nodes.len() - 1;
    file.nodes[at].value = ValueRepr::Scalar(99.0);
    let trace = checked(file.clone());
    let diagnosis = diagnose(&trace, &quick());
    let mismatch = diagnosis.forward.mismatches.first().expect("a mismatch");
    assert_eq!(mismatch.node, at);
    assert_eq!(mismatch.recorded, 99.0);
    assert!(
        (mismatch.recomputed - 0.2860).abs() < 1e-3,
        "{}",
        mismatch.recomputed
    );
    assert!(
        diagnosis
            .findings
            .iter()
            .any(|f| f.rule == Rule::ForwardMismatch && f.node == at)
    );
    assert!(
        diagnosis.headline.contains("forward value"),
        "{}",
        diagnosis.headline
    );

    let dir = tempfile::tempdir().unwrap();
    let path = write(dir.path(), "ce.json", &file);
    let output = ebb(&["check", path.to_str().unwrap()]);
    assert_eq!(output.status.code(), Some(1));
    let text = String::from_utf8(output.stdout).unwrap();
    assert!(
        text.lines()
            .any(|line| line.contains("recorded 99 where the op gives 0.2859")),
        "{text}"
    );
    let output = ebb(&["check", path.to_str().unwrap(), "--json"]);
    let json: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    let forward = &json["diagnosis"]["forward"];
    assert_eq!(forward["mismatches"][0]["recorded"], 99.0);
    assert_eq!(forward["checked"], 1);

    // The unchanged recording passes.
    let trace = checked(cross_entropy_step());
    assert!(diagnose(&trace, &quick()).forward.mismatches.is_empty());
}

// f32 has 24 bits of precision (IEEE 754-2019 table 3.5): a change of one
// unit in the last place is rounding, a change of one part in a thousand is not.
#[test]
fn one_ulp_passes_and_a_thousandth_does_not() {
    let mut tape = Tape::new("layer", Dtype::F32);
    let x = tape.input(
        "x",
        Value::from_parts(vec![2, 3], vec![0.1, 0.2, 0.3, -0.4, 0.5, 0.6]),
    );
    let w = tape.param(
        "w",
        Value::from_parts(vec![3, 2], vec![0.7, -0.8, 0.9, 1.0, -1.1, 1.2]),
    );
    let y = tape.matmul(x, w);
    let z = tape.tanh(y);
    let file = tape.finish(z);
    let at = position(&file, &checked(file.clone()).node(3).id);
    let nudged = |factor: f64| {
        let mut file = file.clone();
        let trace = checked(file.clone());
        let mut data = trace.node(at).value.to_f64().into_owned();
        data[1] = if factor == 0.0 {
            // The next f32 up.
            f32::from_bits((data[1] as f32).to_bits() + 1) as f64
        } else {
            data[1] * factor
        };
        file.nodes[at].value = ValueRepr::Tensor {
            shape: trace.node(at).value.shape().to_vec(),
            data,
        };
        diagnose(&checked(file), &quick()).forward.mismatches
    };
    assert!(nudged(0.0).is_empty(), "one ulp is rounding");
    let mismatches = nudged(1.001);
    assert_eq!(mismatches.len(), 1);
    assert_eq!((mismatches[0].node, mismatches[0].element), (at, 1));
}

// 4.47e-8 lies between 0 and f16's smallest subnormal 2^-24 ≈ 5.96e-8, above
// half of it, so it rounds to 2^-24 (IEEE 754-2019 §4.3.1, round to nearest).
#[test]
fn an_unrepresentable_number_is_reported_once_and_every_sweep_uses_it_rounded() {
    let text = r#"{"format": 2, "title": "tiny f16", "dtype": "f16", "output": "y", "nodes": [
      {"id": "w", "op": "param", "value": [4.47e-8, 0.5]},
      {"id": "x", "op": "input", "value": [3.0, 2.0]},
      {"id": "y", "op": "mul", "inputs": ["w", "x"], "value": [1.788e-7, 1.0]}
    ]}"#;
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("tiny.json");
    std::fs::write(&path, text).unwrap();
    let trace = ebb::trace::load(&path).unwrap();
    let rounded = trace.rounded_on_load();
    assert_eq!(rounded[0].written, 4.47e-8);
    assert_eq!(rounded[0].stored, 2f64.powi(-24));
    let output = ebb(&["check", path.to_str().unwrap()]);
    let text = String::from_utf8(output.stdout).unwrap();
    assert!(
        text.contains("'w' (f16): 4.47e-8 is stored as 5.960464477539063e-8"),
        "{text}"
    );
    let output = ebb(&["check", path.to_str().unwrap(), "--json"]);
    let json: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    assert_eq!(json["rounded_on_load"][0]["node"], "w");
    assert_eq!(json["rounded_on_load"][0]["stored"], 2f64.powi(-24));
    // `ebb sweep` says so once, on standard error.
    let output = ebb(&["sweep", path.to_str().unwrap()]);
    let warning = String::from_utf8(output.stderr).unwrap();
    assert_eq!(warning.matches("not representable").count(), 1, "{warning}");
    // The f16 replay of the diagnosis sweeps the same rounded numbers as the
    // trace's own sweep: the same gradients, bit for bit.
    let diagnosis = diagnose(&trace, &Settings::default());
    let own = diagnosis
        .gradient_norms
        .iter()
        .find(|(node, _)| *node == 0)
        .unwrap()
        .1;
    let replayed = diagnosis.replay_in(Dtype::F16).unwrap().gradients[0].norm;
    assert_eq!(own.to_bits(), replayed.to_bits());
}

// σ(−827) is exactly 0 in f32 and σ'(x) = σ(1 − σ) is 0 there: one saturated
// unit of six in the humidity model's output.
#[test]
fn a_saturated_sigmoid_is_a_finding_with_its_threshold_from_the_settings() {
    let trace = checked(ebb::demos::nan_hunt());
    let diagnosis = diagnose(&trace, &quick());
    let predicted = trace.find("predicted").unwrap();
    let finding = diagnosis
        .findings_at(predicted)
        .find(|f| f.rule == Rule::Saturated)
        .expect("a saturation finding");
    assert!((finding.value - 1.0 / 6.0).abs() < 1e-12);
    assert_eq!(finding.threshold, 0.1);
    let mut settings = quick();
    settings.apply("saturated_fraction=0.5").unwrap();
    let diagnosis = diagnose(&trace, &settings);
    assert!(!diagnosis.findings.iter().any(|f| f.rule == Rule::Saturated));
    assert_eq!(diagnosis.saturation.len(), 1, "still listed, not flagged");
}

#[test]
fn a_relu_unit_dead_for_the_whole_batch_is_a_finding() {
    let mut tape = Tape::new("dead unit", Dtype::F64);
    let x = tape.input(
        "x",
        Value::from_parts(vec![4, 2], vec![0.5, 1.0, 1.5, -0.5, 0.25, 2.0, 1.0, 0.75]),
    );
    // The second unit's weights make its pre-activation negative for every row.
    let w = tape.param(
        "w",
        Value::from_parts(vec![2, 2], vec![1.0, -2.0, 0.5, -3.0]),
    );
    let h = tape.matmul(x, w);
    let r = tape.relu(h);
    let r = tape.rename(r, "r");
    let loss = tape
        .apply(ebb::ops::Op::Sum, &[r], Default::default())
        .unwrap();
    let trace = checked(tape.finish(loss));
    let diagnosis = diagnose(&trace, &quick());
    let r = trace.find("r").unwrap();
    let dead = diagnosis.dead.iter().find(|d| d.node == r).unwrap();
    assert_eq!((dead.dead, dead.units, dead.rows, dead.first), (1, 2, 4, 1));
    let finding = diagnosis
        .findings_at(r)
        .find(|f| f.rule == Rule::DeadRelu)
        .unwrap();
    assert_eq!(finding.value, 0.5);
}

// The river model's state grows like 1.2^t going forward too
// (h_t = h_{t−1}W + x_tU with ‖hW‖ = 1.2‖h‖): the activations explode
// beside the adjoints.
#[test]
fn exploding_forward_values_are_seen_beside_the_adjoints() {
    let trace = checked(ebb::demos::exploding());
    let diagnosis = diagnose(&trace, &quick());
    let (at, ratio, deepest) = diagnosis.activation_spread.unwrap();
    assert_eq!(diagnosis.groups[at].group, "unrolled/t50");
    assert_eq!(diagnosis.groups[deepest].group, "unrolled/t01");
    assert!(ratio > 1e3, "{ratio}");
    assert!(
        diagnosis
            .findings
            .iter()
            .any(|f| f.rule == Rule::ActivationGrowth)
    );
    for name in ["teaching.ron", "vanishing.ron", "wrong_partial.ron"] {
        let trace = checked(
            ebb::demos::all()
                .into_iter()
                .find(|(n, _)| *n == name)
                .unwrap()
                .1,
        );
        let diagnosis = diagnose(&trace, &quick());
        assert!(
            !diagnosis.findings.iter().any(|f| f.rule.is_forward()),
            "{name}: {:?}",
            diagnosis
                .findings
                .iter()
                .filter(|f| f.rule.is_forward())
                .collect::<Vec<_>>()
        );
    }
}

#[test]
fn the_new_rules_can_be_turned_off_and_are_named_in_the_help() {
    let trace: Trace = checked(ebb::demos::nan_hunt());
    let mut settings = quick();
    settings
        .apply("off=[saturated, forward_mismatch, dead_relu, activation_growth]")
        .unwrap();
    let diagnosis = diagnose(&trace, &settings);
    assert!(!diagnosis.findings.iter().any(|f| f.rule.is_forward()));
    let help = String::from_utf8(ebb(&["check", "--help"]).stdout).unwrap();
    for name in [
        "forward_slack",
        "saturated_below",
        "saturated_fraction",
        "dead_fraction",
        "activation_growth",
    ] {
        assert!(help.contains(name), "{name} in the help");
    }
}
