//! Every trace shipped in traces/ loads, and the examples in traces/FORMAT.md
//! load and agree with each other.

use ebb::trace::{Encoding, Format, load, load_str};
use std::path::Path;

#[test]
fn every_shipped_trace_loads() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("traces");
    let mut loaded = 0;
    for entry in std::fs::read_dir(&dir).unwrap() {
        let path = entry.unwrap().path();
        if Format::from_path(&path).is_some() {
            load(&path).unwrap_or_else(|error| panic!("{error}"));
            loaded += 1;
        }
    }
    assert!(loaded >= 1, "traces/ holds no trace");
}

/// The fenced code blocks of one language in a Markdown file.
fn blocks<'a>(text: &'a str, language: &str) -> Vec<&'a str> {
    let fence = format!("```{language}\n");
    text.split(fence.as_str())
        .skip(1)
        .map(|rest| rest.split("```").next().unwrap())
        .collect()
}

#[test]
fn format_examples_load_and_match() {
    let text =
        std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("traces/FORMAT.md"))
            .unwrap();
    let ron = blocks(&text, "ron");
    let json = blocks(&text, "json");
    assert_eq!((ron.len(), json.len()), (1, 1));
    let from_ron = load_str(ron[0], Encoding::Ron, Path::new("FORMAT.md (RON)"))
        .unwrap_or_else(|e| panic!("{e}"));
    let from_json = load_str(json[0], Encoding::Json, Path::new("FORMAT.md (JSON)"))
        .unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(from_ron.nodes().len(), from_json.nodes().len());
    for (a, b) in from_ron.nodes().iter().zip(from_json.nodes()) {
        assert_eq!(
            (&a.id, &a.op_name, &a.inputs, &a.value),
            (&b.id, &b.op_name, &b.inputs, &b.value)
        );
    }
    // f = sin(a)·b + a: ∂f/∂a = b·cos(a) + 1 at a = 0.5, b = 2 (closed form).
    let mut sweep = ebb::sweep::Sweep::new(&from_ron, ebb::sweep::LedgerMode::Off);
    sweep.run_to_end();
    let gradient = sweep
        .adjoint(from_ron.find("a").unwrap())
        .unwrap()
        .as_scalar()
        .unwrap();
    assert!((gradient - (2.0 * 0.5f64.cos() + 1.0)).abs() < 1e-15);
}
