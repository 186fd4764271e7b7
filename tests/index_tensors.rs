//! Index tensors keep their whole numbers in every precision: recorded in
//! f64 whatever the tape's dtype, never rounded by a precision replay, and
//! refused on load when a narrow dtype has already changed them
//! (traces/FORMAT.md, "Index tensors and conditions").

mod common;

use common::{adjoint, checked, swept};
use ebb::dtype::{Dtype, Subnormals};
use ebb::record::Tape;
use ebb::tensor::Value;
use ebb::trace::{Encoding, load_str};
use std::path::Path;

const ROWS: usize = 4000;

/// An f16 step looking up rows 3001 and 2049 of a 4000-row table: numbers
/// f16 cannot hold (it holds every whole number only up to 2048; IEEE
/// 754-2019, table 3.5, binary16 p = 11).
fn lookup() -> ebb::trace::Trace {
    let mut tape = Tape::new("rows beyond f16's whole numbers", Dtype::F16);
    let table = tape.param(
        "table",
        Value::from_parts(
            vec![ROWS, 2],
            (0..2 * ROWS).map(|i| (i % 7) as f64).collect(),
        ),
    );
    let ids = tape.indices("ids", Value::from_parts(vec![2], vec![3001.0, 2049.0]));
    let rows = tape.embedding(table, ids);
    assert_eq!(
        tape.dtype_of(rows),
        Dtype::F16,
        "the lookup keeps the table's dtype"
    );
    assert_eq!(tape.dtype_of(ids), Dtype::F64);
    let loss = tape.sum(rows);
    checked(tape.finish(loss))
}

#[test]
fn recorded_indices_stay_whole_and_replays_leave_them_alone() {
    let trace = lookup();
    let ids = trace.find("ids").unwrap();
    assert_eq!(
        trace.node(ids).value.to_f64().to_vec(),
        vec![3001.0, 2049.0]
    );
    for dtype in [Dtype::F16, Dtype::Bf16] {
        let replay = trace.retyped(dtype, Subnormals::Keep);
        assert_eq!(
            replay.node(ids).value.to_f64().to_vec(),
            vec![3001.0, 2049.0],
            "{dtype}"
        );
        let sweep = swept(&replay);
        let gradient = adjoint(&sweep, "table").to_f64().into_owned();
        let hit: Vec<usize> = (0..ROWS).filter(|&row| gradient[2 * row] != 0.0).collect();
        assert_eq!(hit, vec![2049, 3001], "{dtype}");
    }
}

#[test]
fn indices_a_narrow_dtype_rounded_on_load_are_refused() {
    let text = "(format: 2, title: \"t\", dtype: f16, output: \"out\", nodes: [\n\
        (id: \"table\", op: \"param\", value: (shape: [1, 1], data: [1])),\n\
        (id: \"t\", op: \"input\", value: [3001]),\n\
        (id: \"out\", op: \"nll_loss\", inputs: [\"table\", \"t\"], attrs: (reduction: sum), value: 0.0),\n\
        ])";
    let error = load_str(text, Encoding::Ron, Path::new("bad.ron"))
        .unwrap_err()
        .to_string();
    assert!(
        error.contains("node 'out': index input 't' was rounded into its dtype on load: element 0 was written 3001 but holds 3000"),
        "{error}"
    );
    // With a dtype that holds it, the same index is only out of range.
    let text = text.replace(
        "op: \"input\", value: [3001]",
        "op: \"input\", dtype: f32, value: [3001]",
    );
    let error = load_str(&text, Encoding::Ron, Path::new("bad.ron"))
        .unwrap_err()
        .to_string();
    assert!(
        error.contains("target element [0] is 3001, out of range 0..1"),
        "{error}"
    );
}
