//! Malformed uses of the network ops: each is one line naming the file, the
//! node and what is wrong (traces/FORMAT.md, "What the validator checks").

use ebb::trace::{Encoding, load_str};
use std::path::Path;

/// Loads RON text labelled `bad.ron`; the error's lines.
fn problems(text: &str) -> Vec<String> {
    match load_str(text, Encoding::Ron, Path::new("bad.ron")) {
        Ok(_) => panic!("expected the trace to be rejected:\n{text}"),
        Err(error) => error.to_string().lines().map(str::to_string).collect(),
    }
}

/// A trace with the given nodes, ending at `out`.
fn trace(nodes: &str) -> String {
    format!("(format: 1, title: \"t\", dtype: f32, output: \"out\", nodes: [\n{nodes}\n])")
}

/// Exactly one problem, on one line, naming the file and node `out` and
/// containing every part.
#[track_caller]
fn assert_one_line(text: &str, parts: &[&str]) {
    let lines = problems(text);
    assert_eq!(lines.len(), 1, "one line expected:\n{}", lines.join("\n"));
    let line = &lines[0];
    assert!(line.starts_with("bad.ron:"), "{line}");
    assert!(line.contains("node 'out'"), "{line}");
    for part in parts {
        assert!(line.contains(part), "expected {part:?} in {line}");
    }
}

const TABLE: &str =
    "(id: \"table\", op: \"param\", value: (shape: [3, 2], data: [1, 2, 3, 4, 5, 6])),";

#[test]
fn an_index_out_of_range_names_its_element() {
    let text = trace(&format!(
        "{TABLE}\n(id: \"ids\", op: \"input\", value: [0, 3]),\n(id: \"out\", op: \"embedding\", inputs: [\"table\", \"ids\"], value: (shape: [2, 2], data: [1, 2, 5, 6])),"
    ));
    assert_one_line(
        &text,
        &["element [1] is 3, out of range 0..3", "whole numbers"],
    );
}

#[test]
fn a_non_integer_index_names_its_element() {
    let text = trace(
        "(id: \"data\", op: \"param\", value: (shape: [2, 3], data: [1, 2, 3, 4, 5, 6])),\n\
         (id: \"ids\", op: \"input\", value: (shape: [2, 1], data: [1, 0.5])),\n\
         (id: \"out\", op: \"gather\", inputs: [\"data\", \"ids\"], attrs: (axis: 1), value: (shape: [2, 1], data: [2, 4])),",
    );
    assert_one_line(&text, &["element [1, 0] is 0.5, not a whole number"]);
}

#[test]
fn a_target_out_of_range_names_its_element() {
    let text = trace(
        "(id: \"logp\", op: \"param\", value: (shape: [2, 3], data: [-1, -2, -3, -1, -2, -3])),\n\
         (id: \"t\", op: \"input\", value: [2, -1]),\n\
         (id: \"out\", op: \"nll_loss\", inputs: [\"logp\", \"t\"], value: 2.0),",
    );
    assert_one_line(&text, &["target element [1] is -1, out of range 0..3"]);
}

#[test]
fn a_condition_other_than_zero_or_one_names_its_element() {
    let text = trace(
        "(id: \"c\", op: \"const\", value: [1, 2]),\n\
         (id: \"a\", op: \"param\", value: [1, 2]),\n\
         (id: \"out\", op: \"where\", inputs: [\"c\", \"a\", \"a\"], value: [1, 2]),",
    );
    assert_one_line(&text, &["condition element [1] is 2, not 0 or 1"]);
}

#[test]
fn a_kernel_larger_than_the_padded_input() {
    let text = trace(
        "(id: \"x\", op: \"input\", value: (shape: [1, 1, 2, 2], data: [1, 2, 3, 4])),\n\
         (id: \"w\", op: \"param\", value: (shape: [1, 1, 5, 5], data: [0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0])),\n\
         (id: \"out\", op: \"conv2d\", inputs: [\"x\", \"w\"], attrs: (padding: [1]), value: 0.0),",
    );
    assert_one_line(
        &text,
        &["kernel 5", "larger than the padded input 4 on axis 2"],
    );
}

#[test]
fn groups_that_do_not_divide_the_channels() {
    let text = trace(
        "(id: \"x\", op: \"input\", value: (shape: [1, 3, 2, 2], data: [1, 2, 3, 4, 1, 2, 3, 4, 1, 2, 3, 4])),\n\
         (id: \"w\", op: \"param\", value: (shape: [2, 1, 1, 1], data: [1, 1])),\n\
         (id: \"out\", op: \"conv2d\", inputs: [\"x\", \"w\"], attrs: (groups: 2), value: 0.0),",
    );
    assert_one_line(&text, &["groups 2 do not divide the 3 input channels"]);
}

#[test]
fn a_concat_whose_shapes_disagree_off_its_axis() {
    let text = trace(
        "(id: \"a\", op: \"param\", value: (shape: [2, 3], data: [1, 2, 3, 4, 5, 6])),\n\
         (id: \"b\", op: \"param\", value: (shape: [3, 3], data: [1, 2, 3, 4, 5, 6, 7, 8, 9])),\n\
         (id: \"out\", op: \"concat\", inputs: [\"a\", \"b\"], attrs: (axis: 1), value: 0.0),",
    );
    assert_one_line(
        &text,
        &[
            "concat input 1 has shape [3, 3] but input 0 has [2, 3]",
            "every axis but 1",
        ],
    );
}

#[test]
fn a_group_norm_whose_groups_do_not_divide_the_channels() {
    let text = trace(
        "(id: \"x\", op: \"input\", value: (shape: [1, 4, 2], data: [1, 2, 3, 4, 5, 6, 7, 8])),\n\
         (id: \"out\", op: \"group_norm\", inputs: [\"x\"], attrs: (groups: 3), value: 0.0),",
    );
    assert_one_line(&text, &["groups 3 do not divide the 4 channels"]);
}

#[test]
fn optional_inputs_beyond_the_op_s_count() {
    let text = trace(
        "(id: \"x\", op: \"input\", value: [1, 2]),\n\
         (id: \"out\", op: \"layer_norm\", inputs: [\"x\", \"x\", \"x\", \"x\"], value: [1, 2]),",
    );
    assert_one_line(&text, &["layer_norm takes 1 to 3 inputs, got 4"]);
}

#[test]
fn a_clamp_without_bounds() {
    let text = trace(
        "(id: \"x\", op: \"input\", value: [1, 2]),\n\
         (id: \"out\", op: \"clamp\", inputs: [\"x\"], value: [1, 2]),",
    );
    assert_one_line(&text, &["clamp needs min, max or both"]);
}

#[test]
fn a_slice_with_step_zero_and_a_select_out_of_range() {
    let text = trace(
        "(id: \"x\", op: \"input\", value: [1, 2, 3]),\n\
         (id: \"out\", op: \"slice\", inputs: [\"x\"], attrs: (axis: 0, step: 0), value: [1]),",
    );
    assert_one_line(&text, &["slice step must not be 0"]);
    let text = trace(
        "(id: \"x\", op: \"input\", value: [1, 2, 3]),\n\
         (id: \"out\", op: \"select\", inputs: [\"x\"], attrs: (axis: 0, index: -4), value: 1.0),",
    );
    assert_one_line(
        &text,
        &["select index -4 is out of range for axis 0 of length 3"],
    );
}

#[test]
fn the_ops_attributes_read_in_json_too() {
    // Enumerations are strings in JSON; the trace loads and the loss sums.
    let text = r#"{"format": 1, "title": "t", "dtype": "f64", "output": "out", "nodes": [
        {"id": "p", "op": "param", "value": [1, 2]},
        {"id": "t", "op": "input", "value": [0, 4]},
        {"id": "out", "op": "l1_loss", "inputs": ["p", "t"], "attrs": {"reduction": "sum"}, "value": 3.0},
        {"id": "g", "op": "gelu", "inputs": ["p"], "attrs": {"approximate": "tanh"}, "value": [0.8411919906082768, 1.954597694087775]}
    ]}"#;
    let trace =
        load_str(text, Encoding::Json, Path::new("ok.json")).unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(trace.node(trace.output()).value.as_scalar(), Some(3.0));
}
