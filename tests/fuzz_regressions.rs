//! Every input the fuzzers once failed on (tests/fuzz/regressions/TARGET/),
//! replayed on stable through the same harness the fuzz targets run, plus
//! the seed corpus (the demo traces in both encodings), so a fixed crash
//! stays fixed without nightly or cargo-fuzz.

#[path = "fuzz/harness.rs"]
mod harness;

use std::path::Path;

/// What a fuzz target does with one input.
type Target = fn(&[u8]);

/// The harness function of each fuzz target, by the target's name.
const TARGETS: [(&str, Target); 4] = [
    ("ron_load", harness::ron_load),
    ("json_load", harness::json_load),
    ("sidecar_load", harness::sidecar_load),
    ("pipeline", harness::pipeline),
];

/// Replays every file under `tests/fuzz/regressions/TARGET/`; returns how
/// many there were.
fn replay(target: &str, run: Target) -> usize {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/fuzz/regressions")
        .join(target);
    let Ok(entries) = std::fs::read_dir(&dir) else {
        return 0;
    };
    let mut count = 0;
    for entry in entries {
        let path = entry.expect("a directory entry").path();
        let data = std::fs::read(&path).expect("a regression input reads");
        let outcome = std::panic::catch_unwind(|| run(&data));
        assert!(
            outcome.is_ok(),
            "{target} fails again on {}",
            path.display()
        );
        count += 1;
    }
    count
}

#[test]
fn every_input_that_once_failed_passes() {
    let total: usize = TARGETS
        .iter()
        .map(|(target, run)| replay(target, *run))
        .sum();
    // One file per crash the fuzzers found (see tests/fuzz/regressions/README.md).
    assert!(total > 0, "the regression inputs are missing");
}

#[test]
fn the_seed_traces_pass_every_target() {
    let traces = Path::new(env!("CARGO_MANIFEST_DIR")).join("traces");
    let mut seeds = 0;
    for entry in std::fs::read_dir(traces).expect("traces/ lists") {
        let path = entry.expect("an entry").path();
        if path.extension().is_none_or(|extension| extension != "ron") {
            continue;
        }
        let ron = std::fs::read_to_string(&path).expect("a demo trace reads");
        let file = ebb::trace::parse(&ron, ebb::trace::Encoding::Ron).expect("a demo parses");
        let json = ebb::trace::to_text(&file, ebb::trace::Encoding::Json);
        harness::ron_load(ron.as_bytes());
        harness::json_load(json.as_bytes());
        harness::pipeline(ron.as_bytes());
        harness::pipeline(json.as_bytes());
        seeds += 1;
    }
    assert!(seeds >= 6, "{seeds} demo traces");
}

#[test]
fn the_sidecar_seed_passes_its_target() {
    // The sidecar of tests/fuzz/sidecar_seed.ron, written as `tests/fuzz/run`
    // writes the target's seed; it must load and go through the pipeline.
    let seed = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fuzz/sidecar_seed.ron");
    let file = ebb::trace::read_file(&seed, &mut ebb::trace::Silent).expect("the seed reads");
    let dir = tempfile::tempdir().expect("a temporary directory");
    ebb::trace::save(&file, &dir.path().join("seed.tape")).expect("the seed saves");
    let sidecar = std::fs::read(dir.path().join("seed.safetensors")).expect("its sidecar");
    let trace = harness::load_sidecar(&sidecar)
        .unwrap_or_else(|error| panic!("the seed loads with the harness's header: {error}"));
    assert_eq!(trace.nodes().len(), 4);
    harness::sidecar_load(&sidecar);
}
