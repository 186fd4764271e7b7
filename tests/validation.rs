//! Every validation error: a malformed trace and the message a user sees.

use ebb::trace::{Encoding, LoadError, load_str};
use std::path::Path;

/// Loads RON text labelled `bad.ron` and returns the one-line messages.
fn problems(text: &str) -> Vec<String> {
    match load_str(text, Encoding::Ron, Path::new("bad.ron")) {
        Ok(_) => panic!("expected the trace to be rejected:\n{text}"),
        Err(error) => error.to_string().lines().map(str::to_string).collect(),
    }
}

/// A trace with the given nodes and output around a fixed header.
fn trace(output: &str, nodes: &str) -> String {
    format!("(format: 1, title: \"t\", dtype: f64, output: \"{output}\", nodes: [\n{nodes}\n])")
}

#[track_caller]
fn assert_one(text: &str, expected: &[&str]) {
    let lines = problems(text);
    let line = lines.join("\n");
    for part in expected {
        assert!(line.contains(part), "expected {part:?} in:\n{line}");
    }
    assert!(
        lines.iter().all(|line| line.starts_with("bad.ron")),
        "every line names the file:\n{line}"
    );
}

#[test]
fn unsupported_format_version() {
    let text = "(format: 7, title: \"t\", dtype: f64, output: \"x\", nodes: [(id: \"x\", op: \"input\", value: 1.0)])";
    assert_one(
        text,
        &["unsupported format version 7", "reads versions [1, 2]"],
    );
}

#[test]
fn duplicate_id() {
    let text = trace(
        "x",
        "(id: \"x\", op: \"input\", value: 1.0),\n(id: \"x\", op: \"input\", value: 2.0),",
    );
    assert_one(
        text.as_str(),
        &[
            "bad.ron:3:2: node 'x': duplicate id (node #1 repeats the id of node #0)",
            "unique id",
        ],
    );
}

#[test]
fn unknown_input_id() {
    let text = trace(
        "y",
        "(id: \"x\", op: \"input\", value: 1.0),\n(id: \"y\", op: \"neg\", inputs: [\"q\"], value: -1.0),",
    );
    assert_one(&text, &["node 'y': unknown input id 'q'"]);
}

#[test]
fn input_referring_forward() {
    let text = trace(
        "y",
        "(id: \"y\", op: \"neg\", inputs: [\"x\"], value: -1.0),\n(id: \"x\", op: \"input\", value: 1.0),",
    );
    assert_one(
        &text,
        &[
            "node 'y': input refers forward to 'x', recorded later (node #1)",
            "recording order",
        ],
    );
}

#[test]
fn cycle_is_named() {
    let text = trace(
        "a",
        "(id: \"a\", op: \"neg\", inputs: [\"b\"], value: 1.0),\n(id: \"b\", op: \"neg\", inputs: [\"a\"], value: -1.0),",
    );
    assert_one(&text, &["cycle through 'a', 'b'"]);
    let text = trace(
        "a",
        "(id: \"a\", op: \"neg\", inputs: [\"a\"], value: 1.0),",
    );
    assert_one(
        &text,
        &["input refers forward to itself", "cycle through 'a'"],
    );
}

#[test]
fn wrong_arity() {
    let text = trace(
        "y",
        "(id: \"x\", op: \"input\", value: 1.0),\n(id: \"y\", op: \"add\", inputs: [\"x\"], value: 1.0),",
    );
    assert_one(&text, &["node 'y': add takes 2 inputs, got 1"]);
}

#[test]
fn data_length_not_matching_shape() {
    let text = trace(
        "x",
        "(id: \"x\", op: \"input\", value: (shape: [2, 3], data: [1, 2, 3, 4, 5])),",
    );
    assert_one(
        &text,
        &["node 'x': value: data has 5 elements but shape [2, 3] needs 6"],
    );
}

#[test]
fn matmul_inner_dimensions() {
    let text = trace(
        "y",
        "(id: \"a\", op: \"input\", value: (shape: [2, 3], data: [1, 2, 3, 4, 5, 6])),\n\
         (id: \"b\", op: \"param\", value: (shape: [2, 2], data: [1, 2, 3, 4])),\n\
         (id: \"y\", op: \"matmul\", inputs: [\"a\", \"b\"], value: (shape: [2, 2], data: [0, 0, 0, 0])),",
    );
    assert_one(
        &text,
        &["node 'y': matmul inner dimensions differ: [2, 3] @ [2, 2] (3 vs 2)"],
    );
}

#[test]
fn shapes_that_do_not_broadcast() {
    let text = trace(
        "y",
        "(id: \"a\", op: \"input\", value: [1, 2, 3]),\n(id: \"b\", op: \"input\", value: [1, 2]),\n\
         (id: \"y\", op: \"add\", inputs: [\"a\", \"b\"], value: [0, 0, 0]),",
    );
    assert_one(&text, &["node 'y': shapes [3] and [2] do not broadcast"]);
}

#[test]
fn recorded_value_with_the_wrong_shape() {
    let text = trace(
        "y",
        "(id: \"a\", op: \"input\", value: [1, 2, 3]),\n(id: \"y\", op: \"exp\", inputs: [\"a\"], value: [0, 0]),",
    );
    assert_one(
        &text,
        &["node 'y': recorded value has shape [2] but exp of these inputs gives [3]"],
    );
}

#[test]
fn partial_that_does_not_fit_its_edge() {
    let text = trace(
        "y",
        "(id: \"a\", op: \"input\", value: [1, 2, 3]),\n\
         (id: \"y\", op: \"soft_clip\", inputs: [\"a\"], value: [0, 0, 0], partials: [(diag: [1, 2])]),",
    );
    assert_one(
        &text,
        &["node 'y': partial on edge 0 (from 'a'): a diagonal partial needs 3 entries"],
    );
    let text = trace(
        "y",
        "(id: \"a\", op: \"input\", value: [1, 2, 3]),\n\
         (id: \"y\", op: \"soft_clip\", inputs: [\"a\"], value: [0, 0], partials: [(jacobian: [[1, 2, 3], [1, 2]])]),",
    );
    assert_one(
        &text,
        &["jacobian row 1 has 2 entries but the input has 3 elements"],
    );
}

#[test]
fn missing_and_unknown_output() {
    let text = trace("", "(id: \"x\", op: \"input\", value: 1.0),");
    assert_one(&text, &["bad.ron: the header names no output node"]);
    let text = trace("loss", "(id: \"x\", op: \"input\", value: 1.0),");
    assert_one(&text, &["output node 'loss' is not in the trace"]);
}

#[test]
fn custom_op_without_partials() {
    let text = trace(
        "y",
        "(id: \"x\", op: \"input\", value: 1.0),\n(id: \"y\", op: \"mull\", inputs: [\"x\", \"x\"], value: 1.0),",
    );
    assert_one(
        &text,
        &[
            "'mull' is not a catalog op",
            "no recorded partial on edge 0, 1",
            "did you mean the catalog op 'mul'?",
        ],
    );
}

#[test]
fn missing_required_attribute() {
    let text = trace(
        "y",
        "(id: \"x\", op: \"input\", value: 1.0),\n(id: \"y\", op: \"pow\", inputs: [\"x\"], value: 1.0),",
    );
    assert_one(&text, &["node 'y': pow needs the attribute `exponent`"]);
}

#[test]
fn syntax_errors_carry_line_and_column() {
    let text = "(format: 1, title: \"t\",\n  dtype: f99, output: \"x\", nodes: [])";
    let line = problems(text).join("\n");
    assert!(line.starts_with("bad.ron:2:"), "{line}");
    let error = load_str(
        "{\"format\": 1,\n \"title\": }",
        Encoding::Json,
        Path::new("bad.json"),
    )
    .unwrap_err();
    assert!(
        matches!(error, LoadError::Syntax { line: 2, .. }),
        "{error}"
    );
    assert!(error.to_string().starts_with("bad.json:2:"), "{error}");
}

#[test]
fn every_problem_is_reported_not_just_the_first() {
    let text = trace(
        "nowhere",
        "(id: \"x\", op: \"input\", value: 1.0),\n(id: \"x\", op: \"input\", value: 1.0),\n\
         (id: \"y\", op: \"pow\", inputs: [\"x\"], value: 1.0),\n(id: \"z\", op: \"neg\", inputs: [\"q\"], value: 1.0),",
    );
    let lines = problems(&text);
    assert_eq!(lines.len(), 4, "{lines:#?}");
}

#[test]
fn nodes_that_do_not_reach_the_output_are_kept() {
    let text = trace(
        "y",
        "(id: \"x\", op: \"input\", value: 1.0),\n(id: \"stray\", op: \"exp\", inputs: [\"x\"], value: 2.718281828459045),\n(id: \"y\", op: \"neg\", inputs: [\"x\"], value: -1.0),",
    );
    let trace = load_str(&text, Encoding::Ron, Path::new("ok.ron"))
        .expect("unreached nodes are not an error");
    let stray = trace.find("stray").unwrap();
    assert_eq!(trace.sweep_rank(stray), None);
    assert_eq!(trace.unreached().collect::<Vec<_>>(), vec![stray]);
    assert_eq!(trace.sweep_order().len(), 2);
}

/// Cuts a valid trace at every byte and flips characters: the loader must
/// return an error or a trace, never panic.
#[test]
fn malformed_input_never_panics() {
    let valid =
        std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("traces/teaching.ron"))
            .unwrap();
    let json = ebb::trace::to_text(&ebb::demos::teaching(), Encoding::Json);
    for (text, encoding) in [
        (valid.as_str(), Encoding::Ron),
        (json.as_str(), Encoding::Json),
    ] {
        assert!(
            load_str(text, encoding, Path::new("whole")).is_ok(),
            "the uncut text loads"
        );
        for cut in (0..text.len()).step_by(7) {
            if text.is_char_boundary(cut) {
                // Every proper prefix is incomplete: an error, never a panic or a trace.
                assert!(
                    load_str(&text[..cut], encoding, Path::new("cut")).is_err(),
                    "a prefix of {cut} bytes loaded"
                );
            }
        }
        let replacements = [
            "",
            "-",
            "1e999",
            "NaN",
            "[",
            "]",
            "\"",
            ")",
            "(",
            "99999999999999999999",
            "-1",
            "{}",
        ];
        let mut state = 12345u64;
        for _ in 0..400 {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            let at = (state >> 33) as usize % text.len();
            if !text.is_char_boundary(at) {
                continue;
            }
            let mut mutated = text.to_string();
            let end = (at + 1 + (state as usize % 4)).min(text.len());
            if !text.is_char_boundary(end) {
                continue;
            }
            mutated.replace_range(
                at..end,
                replacements[(state >> 20) as usize % replacements.len()],
            );
            let _ = load_str(&mutated, encoding, Path::new("mutated"));
        }
    }
}
