//! The diagnosis's shortcuts give the answers of the long way: a replay that
//! equals a sweep already made reuses it, the other replays run in parallel,
//! sweeps stop when cancelled, and a ledger budget changes memory, not
//! numbers.

use ebb::control::{Cancelled, Control};
use ebb::demos::networks::Network;
use ebb::diagnose::{Settings, diagnose, replay};
use ebb::dtype::{Dtype, Subnormals};
use ebb::sweep::{LedgerMode, Sweep};
use ebb::trace::{self, Trace};
use std::path::Path;
use std::process::Command;
use std::sync::atomic::AtomicBool;

fn shipped(name: &str) -> Trace {
    trace::load(
        &Path::new(env!("CARGO_MANIFEST_DIR"))
            .join("traces")
            .join(name),
    )
    .unwrap()
}

/// Every replay the diagnosis reports equals the one made from scratch:
/// re-typed, swept with a ledger, analysed, compared with the f64 sweep.
#[track_caller]
fn replays_match_the_long_way(trace: &Trace, settings: &Settings) {
    let diagnosis = diagnose(trace, settings);
    let reference_trace = trace.retyped(Dtype::F64, Subnormals::Keep);
    let mut reference = Sweep::new(&reference_trace, LedgerMode::On);
    reference.run_to_end();
    // The reference's own findings: its f64 replay (gradual underflow) against
    // nothing shared is exactly them.
    let keep = Settings {
        subnormals: Subnormals::Keep,
        ..settings.clone()
    };
    let shared = replay(trace, Dtype::F64, &keep, &reference, &[]).findings;
    assert_eq!(diagnosis.replays.len(), settings.replay.len());
    for (run, &dtype) in diagnosis.replays.iter().zip(&settings.replay) {
        let long = replay(trace, dtype, settings, &reference, &shared);
        // Compared in full through their printed form, where NaN equals NaN.
        assert_eq!(
            format!("{run:?}"),
            format!("{long:?}"),
            "the {dtype} replay of {}",
            trace.title()
        );
    }
}

#[test]
fn reused_and_parallel_replays_equal_the_long_way() {
    let every = Settings {
        replay: vec![Dtype::F16, Dtype::Bf16, Dtype::F32, Dtype::F64],
        ..Settings::default()
    };
    // An f64 trace (its own dtype is the reference), an f32 tensor trace (its
    // own dtype is the sweep just made) and an f16 one (nothing to reuse).
    replays_match_the_long_way(&shipped("nan_hunt.ron"), &every);
    replays_match_the_long_way(&shipped("underflow_f16.ron"), &every);
    let small = Network::DeepTanh.record(Dtype::F32);
    let small = Trace::try_from(small).unwrap();
    replays_match_the_long_way(&small, &every);
    let flushing = Settings {
        subnormals: Subnormals::Flush,
        ..every
    };
    replays_match_the_long_way(&shipped("underflow_f16.ron"), &flushing);
}

#[test]
fn a_trace_is_already_in_its_own_uniform_dtype_only() {
    let f32_net = Trace::try_from(Network::DeepTanh.record(Dtype::F32)).unwrap();
    assert!(f32_net.is_already(Dtype::F32, Subnormals::Keep));
    assert!(!f32_net.is_already(Dtype::F32, Subnormals::Flush));
    assert!(!f32_net.is_already(Dtype::F16, Subnormals::Keep));
    // A mixed-precision trace (f16 storage, one f32 node) is not uniform.
    let mut tape = ebb::record::Tape::new("mixed", Dtype::F16);
    let x = tape.input("x", ebb::tensor::Value::filled(&[4], 0.5));
    let w = tape.param_in("w", ebb::tensor::Value::filled(&[4], 0.25), Dtype::F32);
    let y = tape.mul(x, w);
    let loss = tape.sum(y);
    let mixed = Trace::try_from(tape.finish(loss)).unwrap();
    assert!(!mixed.is_already(Dtype::F16, Subnormals::Keep));
    assert!(!mixed.is_already(Dtype::F32, Subnormals::Keep));
}

#[test]
fn a_cancelled_sweep_stops_and_an_uncancelled_one_matches_run_to_end() {
    let trace = Trace::try_from(Network::DeepTanh.record(Dtype::F32)).unwrap();
    let cancel = AtomicBool::new(true);
    let mut stopped = Sweep::new(&trace, LedgerMode::Off);
    let result = stopped.run_to_end_with(&Control::new(None, Some(&cancel)), "sweep");
    assert_eq!(result, Err(Cancelled));
    assert_eq!(stopped.cursor(), 0);
    let fractions = std::sync::Mutex::new(Vec::new());
    let report = |_: &str, fraction: f64| fractions.lock().unwrap().push(fraction);
    let mut controlled = Sweep::new(&trace, LedgerMode::On);
    let steps = controlled
        .run_to_end_with(&Control::new(Some(&report), None), "sweep")
        .unwrap();
    let mut plain = Sweep::new(&trace, LedgerMode::On);
    assert_eq!(plain.run_to_end(), steps);
    for node in trace.params() {
        assert_eq!(
            controlled.adjoint(node).unwrap().to_f64(),
            plain.adjoint(node).unwrap().to_f64()
        );
    }
    let fractions = fractions.into_inner().unwrap();
    assert!(fractions.windows(2).all(|pair| pair[0] <= pair[1]));
    assert_eq!(fractions.last(), Some(&1.0));
}

fn ebb(args: &[&str]) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_ebb"))
        .args(args)
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .output()
        .unwrap()
}

#[test]
fn a_ledger_budget_changes_no_number_and_a_bad_one_is_refused() {
    let whole = ebb(&["check", "traces/medium.tape", "--json"]);
    let tight = ebb(&[
        "check",
        "traces/medium.tape",
        "--json",
        "--ledger-budget",
        "1K",
    ]);
    assert_eq!(whole.status.code(), tight.status.code());
    // The settings echoed in the JSON differ by the budget alone.
    let strip = |output: &std::process::Output| {
        let mut json: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
        if let Some(settings) = json.pointer_mut("/diagnosis/settings") {
            settings.as_object_mut().unwrap().remove("ledger_budget");
        }
        json
    };
    assert_eq!(strip(&whole), strip(&tight));
    let listed = ebb(&["sweep", "traces/medium.tape", "--steps", "40"]);
    let listed_tight = ebb(&[
        "sweep",
        "traces/medium.tape",
        "--steps",
        "40",
        "--ledger-budget",
        "0",
    ]);
    assert_eq!(listed.stdout, listed_tight.stdout);
    let bad = ebb(&["check", "traces/medium.tape", "--ledger-budget", "12X"]);
    assert_eq!(bad.status.code(), Some(2));
    let stderr = String::from_utf8_lossy(&bad.stderr);
    assert!(stderr.contains("`12X` is not a size"), "{stderr}");
    assert!(bad.stdout.is_empty());
}
