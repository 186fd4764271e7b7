//! Inputs from a bad-input and fault probe, each once rejected slowly, with
//! a crash or with a misleading message: now one clear error (or, where the
//! format allows it, a correct load).

use ebb::trace::{self, Encoding, LoadError, Trace, load_str};
use std::fmt::Write as _;
use std::path::Path;
use std::process::{Command, Output};

fn ebb(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_ebb"))
        .args(args)
        .output()
        .expect("the binary runs")
}

fn rejected(text: &str, encoding: Encoding) -> LoadError {
    match load_str(text, encoding, Path::new("bad.ron")) {
        Ok(_) => panic!("expected a rejection"),
        Err(error) => error,
    }
}

fn loaded(text: &str, encoding: Encoding) -> Trace {
    load_str(text, encoding, Path::new("good")).unwrap_or_else(|error| panic!("{error}"))
}

/// A RON trace of `count` nodes, each written by `node(k)`, one a line
/// after a one-line header, so node k is on line k + 2.
fn many_nodes(count: usize, node: impl Fn(usize) -> String) -> String {
    let mut text = String::from("(format: 1, title: \"t\", dtype: f64, output: \"n0\", nodes: [\n");
    for k in 0..count {
        let _ = writeln!(text, "  {},", node(k));
    }
    text.push_str("])\n");
    text
}

#[test]
fn a_hundred_thousand_duplicate_ids_give_twenty_lines_and_a_count() {
    // Every node after the first repeats the id "n0". Before: 99,999 lines,
    // found by rescanning the text from the start for each one (minutes).
    let text = many_nodes(100_000, |_| {
        "(id: \"n0\", op: \"input\", value: 1.0)".to_string()
    });
    let error = rejected(&text, Encoding::Ron);
    assert_eq!(error.problems().len(), 99_999);
    let message = error.to_string();
    let lines: Vec<&str> = message.lines().collect();
    assert_eq!(lines.len(), 21, "{message}");
    assert_eq!(
        lines[0],
        "bad.ron:3:4: node 'n0': duplicate id (node #1 repeats the id of node #0) (hint: give every node a unique id)"
    );
    // Duplicates are placed at their own declaration, not the first one.
    assert!(
        lines[19].starts_with("bad.ron:22:4: node 'n0': duplicate id (node #20 repeats"),
        "{}",
        lines[19]
    );
    assert!(
        lines[20].starts_with("bad.ron: and 99979 more problems: 99979 duplicate id (hint: "),
        "{}",
        lines[20]
    );
}

#[test]
fn unknown_and_forward_inputs_are_counted_by_kind() {
    // Node k reads an id that does not exist when k is odd, and node k + 1
    // (recorded later) when k is even.
    let text = many_nodes(20_000, |k| {
        let input = if k % 2 == 1 {
            format!("missing{k}")
        } else {
            format!("n{}", k + 1)
        };
        format!("(id: \"n{k}\", op: \"neg\", inputs: [\"{input}\"], value: 1.0)")
    });
    let error = rejected(&text, Encoding::Ron);
    let message = error.to_string();
    let lines: Vec<&str> = message.lines().collect();
    assert_eq!(lines.len(), 21, "{message}");
    assert!(
        lines[0].starts_with("bad.ron:2:4: node 'n0': input refers forward to 'n1'"),
        "{}",
        lines[0]
    );
    assert!(
        lines[1].starts_with("bad.ron:3:4: node 'n1': unknown input id 'missing1'"),
        "{}",
        lines[1]
    );
    // 10,000 of each kind: 20 shown, and the rest counted.
    assert!(
        lines[20].starts_with(
            "bad.ron: and 19980 more problems: 9990 forward input, 9990 unknown input id"
        ),
        "{}",
        lines[20]
    );
}

#[test]
fn problems_are_reported_in_file_order_with_the_json_positions() {
    let text = concat!(
        "{\"format\": 1, \"title\": \"t\", \"dtype\": \"f64\", \"output\": \"b\", \"nodes\": [\n",
        "  {\"id\": \"a\", \"op\": \"input\", \"value\": 1.0},\n",
        "  {\"id\": \"b\", \"op\": \"neg\", \"inputs\": [\"q\"], \"value\": 1.0},\n",
        "  {\"id\": \"a\", \"op\": \"input\", \"value\": 1.0}\n",
        "]}"
    );
    let error = rejected(text, Encoding::Json);
    let lines: Vec<String> = error.to_string().lines().map(str::to_string).collect();
    assert_eq!(lines.len(), 2, "{lines:#?}");
    assert!(lines[0].starts_with("bad.ron:3:4: node 'b': unknown input id 'q'"));
    assert!(lines[1].starts_with("bad.ron:4:4: node 'a': duplicate id (node #2"));
}

#[test]
fn a_parameter_id_of_65536_characters_is_reported() {
    // Before: `ebb check` panicked ("Formatting argument out of range") padding
    // the gradient table to the id's width, which a format width cannot hold.
    let dir = tempfile::tempdir().unwrap();
    let id = "w".repeat(65_536);
    let path = dir.path().join("long.ron");
    std::fs::write(
        &path,
        format!("(format: 1, title: \"t\", dtype: f64, output: \"{id}\", nodes: [(id: \"{id}\", op: \"param\", value: 1.5)])"),
    )
    .unwrap();
    let output = ebb(&["check", path.to_str().unwrap()]);
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert_eq!(output.status.code(), Some(0), "{stderr}");
    let stdout = String::from_utf8_lossy(&output.stdout);
    assert!(
        stdout.contains(&format!("  {id}  []")),
        "the id heads its row"
    );
}

#[test]
fn shapes_whose_sizes_overflow_are_rejected() {
    // Before: with overflow checks on (as in tests), multiplying these
    // dimensions panicked; release builds wrapped the number.
    let huge = 1usize << 40;
    let value = format!(
        "(format: 1, title: \"t\", dtype: f64, output: \"x\", nodes: [(id: \"x\", op: \"input\", value: (shape: [0, {huge}, {huge}], data: []))])"
    );
    let message = rejected(&value, Encoding::Ron).to_string();
    assert!(
        message.starts_with(&format!(
            "bad.ron:1:59: node 'x': value: shape [0, {huge}, {huge}] is too large: its dimensions multiply to more than"
        )),
        "{message}"
    );
    let reshape = format!(
        "(format: 1, title: \"t\", dtype: f64, output: \"y\", nodes: [\n(id: \"x\", op: \"input\", value: [1.0, 2.0]),\n(id: \"y\", op: \"reshape\", inputs: [\"x\"], attrs: (shape: [{huge}, {huge}, 0]), value: [1.0, 2.0])])"
    );
    let message = rejected(&reshape, Encoding::Ron).to_string();
    assert!(
        message.contains(&format!(
            "bad.ron:3:2: node 'y': attribute `shape`: shape [{huge}, {huge}, 0] is too large"
        )),
        "{message}"
    );
    // The op's own shape rule checks its arithmetic too (the recorder calls
    // it without the validator).
    let attrs = ebb::ops::Attrs {
        shape: Some(vec![huge, huge, huge]),
        ..Default::default()
    };
    let result = ebb::ops::infer_shape(ebb::ops::Op::Reshape, &[&[2]], &attrs);
    assert!(
        result.is_err_and(|message| message.contains("too large")),
        "reshape to an overflowing shape"
    );
}

#[test]
fn an_overflowing_literal_is_infinity_in_both_encodings() {
    // IEEE 754-2019, §7.4: a conversion that overflows rounds to ±inf. RON
    // read 1e400 so; JSON refused it ("number out of range").
    let ron = "(format: 1, title: \"t\", dtype: f64, output: \"x\", nodes: [(id: \"x\", op: \"input\", value: [1e400, -2e999, 1e-400])])";
    let json = r#"{"format": 1, "title": "t", "dtype": "f64", "output": "x", "nodes": [{"id": "x", "op": "input", "value": [1e400, -2e999, 1e-400]}]}"#;
    for (text, encoding) in [(ron, Encoding::Ron), (json, Encoding::Json)] {
        let trace = loaded(text, encoding);
        let value = trace.node(0).value.to_f64().to_vec();
        assert_eq!(
            value,
            vec![f64::INFINITY, f64::NEG_INFINITY, 0.0],
            "{encoding:?}"
        );
    }
    // Positions after the rewritten literal are unchanged.
    let json = "{\"format\": 1, \"title\": \"t\", \"dtype\": \"f64\", \"output\": \"x\",\n \"nodes\": [{\"id\": \"x\", \"op\": \"input\", \"value\": -1e400, \"oops\": 1}]}";
    let error = rejected(json, Encoding::Json);
    assert!(
        matches!(
            error,
            LoadError::Syntax {
                line: 2,
                column: 61,
                ..
            }
        ),
        "{error}"
    );
}

#[test]
fn json_strings_for_non_finite_attributes_are_read() {
    // FORMAT.md: the strings are accepted wherever a number may stand;
    // `"exponent": "NaN"` was refused.
    let json = r#"{"format": 1, "title": "t", "dtype": "f64", "output": "y", "nodes": [
        {"id": "x", "op": "param", "value": 2.0},
        {"id": "y", "op": "pow", "inputs": ["x"], "value": "NaN", "attrs": {"exponent": "NaN"}},
        {"id": "z", "op": "leaky_relu", "inputs": ["x"], "value": 2.0, "attrs": {"slope": "-inf"}}
    ]}"#;
    let trace = loaded(json, Encoding::Json);
    assert!(trace.node(1).attrs.exponent.is_some_and(f64::is_nan));
    assert_eq!(trace.node(2).attrs.slope, Some(f64::NEG_INFINITY));
}

#[test]
fn non_finite_attributes_survive_every_form() {
    // Before: JSON wrote them as `null`, and Ebb rejected its own output.
    let text = "(format: 1, title: \"t\", dtype: f64, output: \"y\", nodes: [\n(id: \"x\", op: \"param\", value: 2.0),\n(id: \"y\", op: \"pow\", inputs: [\"x\"], value: NaN, attrs: (exponent: NaN)),\n(id: \"z\", op: \"pow\", inputs: [\"x\"], value: inf, attrs: (exponent: inf)),\n(id: \"s\", op: \"leaky_relu\", inputs: [\"x\"], value: 2.0, attrs: (slope: -inf))])";
    let file = trace::parse(text, Encoding::Ron).unwrap();
    let dir = tempfile::tempdir().unwrap();
    for name in ["t.json", "t.ron", "t.tape"] {
        let path = dir.path().join(name);
        trace::save(&file, &path).unwrap();
        let again = trace::load(&path).unwrap_or_else(|error| panic!("{name}: {error}"));
        assert!(
            again.node(1).attrs.exponent.is_some_and(f64::is_nan),
            "{name}"
        );
        assert_eq!(again.node(2).attrs.exponent, Some(f64::INFINITY), "{name}");
        assert_eq!(again.node(3).attrs.slope, Some(f64::NEG_INFINITY), "{name}");
    }
    let json = std::fs::read_to_string(dir.path().join("t.json")).unwrap();
    assert!(json.contains("\"exponent\": \"NaN\""), "{json}");
    assert!(!json.contains("null"), "{json}");
}

#[test]
fn binary_garbage_is_not_text() {
    // Before: "invalid utf-8 sequence ... (hint: check the path and permissions)".
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("garbage.ron");
    let garbage: Vec<u8> = (0..4096u32)
        .map(|k| (k.wrapping_mul(2_654_435_761) >> 24) as u8)
        .collect();
    std::fs::write(&path, &garbage).unwrap();
    let output = ebb(&["check", path.to_str().unwrap()]);
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert_eq!(output.status.code(), Some(2));
    assert!(stderr.contains("garbage.ron:1:"), "{stderr}");
    assert!(stderr.contains(": not a text trace: "), "{stderr}");
    assert!(!stderr.contains("permissions"), "{stderr}");
    assert_eq!(stderr.lines().count(), 1, "{stderr}");
}

#[test]
fn an_endless_device_is_refused_at_once() {
    // Before: /dev/zero was read until an allocation of gigabytes aborted.
    let output = ebb(&["check", "/dev/zero"]);
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert_eq!(output.status.code(), Some(2), "{stderr}");
    assert!(
        stderr.starts_with("ebb: /dev/zero:1:1: not a text trace: a NUL byte at byte 0"),
        "{stderr}"
    );
}

#[test]
fn deep_nesting_is_explained_without_library_internals() {
    let some = "Some(".repeat(300) + "1.0" + &")".repeat(300);
    let ron = format!(
        "(format: 1, title: \"t\", dtype: f64, output: \"y\", nodes: [(id: \"x\", op: \"param\", value: 1.0), (id: \"y\", op: \"neg\", inputs: [\"x\"], value: -1.0, partials: [{some}])])"
    );
    // (JSON's schema types refuse a nested list by its type long before
    // serde_json's limit of 128 levels, so only RON reaches its limit.)
    let message = rejected(&ron, Encoding::Ron).to_string();
    assert!(message.starts_with("bad.ron:1:"), "{message}");
    assert!(
        message.contains(": nested more than 128 levels deep, which no trace needs"),
        "{message}"
    );
    for internal in ["ron::", "serde", "recursion_limit"] {
        assert!(!message.contains(internal), "{message}");
    }
}

#[test]
fn text_from_the_file_cannot_break_an_error_across_lines() {
    // Found by the JSON fuzzer: serde quoted an unknown key holding a
    // newline, and the one-line error became two. Ids are quoted too, and
    // an escape character would reach the terminal.
    let json = "{\"f\\n_x\": 1}";
    let message = rejected(json, Encoding::Json).to_string();
    assert_eq!(message.lines().count(), 1, "{message}");
    assert!(message.contains("unknown field `f\\n_x`"), "{message}");
    let ron = "(format: 1, title: \"t\", dtype: f64, output: \"a\", nodes: [(id: \"a\\n\\u{1b}[2J\", op: \"neg\", inputs: [\"q\"], value: 1.0)])";
    let message = rejected(ron, Encoding::Ron).to_string();
    assert_eq!(message.lines().count(), 2, "{message}");
    assert!(!message.contains('\u{1b}'), "{message}");
    assert!(
        message.contains("node 'a\\n\\u{1b}[2J': unknown input id 'q'"),
        "{message}"
    );
}
