//! The step-by-step listing of a sweep (`ebb sweep`): each node, its adjoint,
//! and every contribution it sends, as plain text for handouts and tests.

use crate::format::{compact, number, shape as show};
use crate::sweep::Sweep;
use crate::tensor::Value;
use std::fmt::Write;

/// How a value is printed: scalars exactly, tensors by shape, norm and first entries.
pub fn describe_value(value: &Value) -> String {
    match value {
        Value::Scalar(x) => number(*x),
        Value::Tensor(t) => {
            let shown: Vec<String> = t.to_f64().iter().take(4).map(|&x| compact(x)).collect();
            let more = if t.len() > 4 { ", …" } else { "" };
            format!(
                "{} norm {} [{}{more}]",
                show(t.shape()),
                compact(value.l2_norm()),
                shown.join(", ")
            )
        }
    }
}

/// Takes up to `steps` steps of `sweep` (which must keep its ledger) and
/// writes each to the returned text.
pub fn list_steps(sweep: &mut Sweep, steps: usize) -> String {
    let mut out = String::new();
    let total = sweep.len();
    let trace = sweep.trace();
    for _ in 0..steps {
        let step = sweep.cursor();
        let Some(node) = sweep.step() else { break };
        let recorded = trace.node(node);
        let adjoint = sweep
            .adjoint(node)
            .map_or("none".to_string(), |adjoint| describe_value(&adjoint));
        let group = if recorded.group.is_empty() {
            String::new()
        } else {
            format!("  [{}]", recorded.group)
        };
        let _ = writeln!(
            out,
            "step {}/{total}  {} ({}){group}  adjoint {adjoint}",
            step + 1,
            recorded.id,
            recorded.op_name
        );
        let ledger = sweep.ledger().expect("the listing needs the ledger");
        for entry in ledger.step_entries(step) {
            let before = entry
                .before
                .as_ref()
                .map_or("none".to_string(), describe_value);
            let _ = writeln!(
                out,
                "    -> {} (input {})  contribution {}  adjoint {} -> {}",
                trace.node(entry.input).id,
                entry.slot,
                describe_value(&entry.value),
                before,
                describe_value(&entry.after)
            );
        }
        if recorded.inputs.is_empty() {
            let _ = writeln!(out, "    (leaf: its adjoint is final)");
        }
    }
    out
}
