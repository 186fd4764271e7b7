//! Teaching: how a node passes its adjoint on, in words from the op table
//! ("mul: each input receives adjoint × the other input"), then with the
//! numbers of this step ("1 × 1.5 = 1.5 to demand"); in forward mode, how
//! the tangent is formed from the inputs' tangents. Words come from
//! `ops::OpSpec::derivative`, numbers from the sweep's ledger and the
//! partials the op table gives: nothing here computes a derivative.

use super::ids::NodeIx;
use super::neighbours::Side;
use super::session::Session;
use crate::format::{compact, readable};
use crate::tensor::Value;

/// The op's derivative rule in words: `mul: each input receives adjoint × the other input`.
pub fn rule_text(session: &Session, node: NodeIx) -> String {
    let recorded = session.trace().node(node.index());
    format!("{}: {}", recorded.op_name, recorded.op.spec().derivative)
}

/// What the node's step sent along each input edge, with its numbers
/// (`1 × 1.5 = 1.5 to demand`), once that step is done; empty before.
pub fn sent(session: &Session, node: NodeIx) -> Vec<String> {
    let trace = session.trace();
    let Some(step) = node.step(trace) else {
        return Vec::new();
    };
    if session.sweep().cursor() <= step.position() {
        return Vec::new();
    }
    let Some(ledger) = session.sweep().ledger() else {
        return Vec::new();
    };
    let dtype = trace.node_dtype(node.index());
    let adjoint = session.adjoint(node);
    let partial = |slot: usize| {
        session
            .detail()
            .edges
            .iter()
            .find(|edge| edge.side == Side::Input && edge.slot == slot)
            .map(|edge| edge.partial.clone())
    };
    ledger
        .step_entries(step.position())
        .into_iter()
        .filter(|entry| entry.consumer == node.index())
        .map(|entry| {
            let to = &trace.node(entry.input).id;
            match (adjoint.as_deref(), &entry.value, partial(entry.slot)) {
                (Some(Value::Scalar(a)), Value::Scalar(c), Some(p)) => format!(
                    "{} × {p} = {} to {to}",
                    readable(*a, dtype),
                    readable(*c, trace.node_dtype(entry.input))
                ),
                (Some(a), c, _) => format!(
                    "‖adjoint‖ {} → ‖·‖ {} to {to}",
                    compact(a.l2_norm()),
                    compact(c.l2_norm())
                ),
                (None, c, _) => format!("‖·‖ {} to {to}", compact(c.l2_norm())),
            }
        })
        .collect()
}

/// Forward mode: how the node's tangent was formed from its inputs'
/// tangents, `0.5 × 0.2 (x) + 1 × 0 (b) = 0.1`, once the tangent sweep has
/// processed it (`None` before, or for a tensor node).
pub fn tangent_formed(session: &Session, node: NodeIx) -> Option<String> {
    let forward = session.forward()?;
    let trace = session.trace();
    let recorded = trace.node(node.index());
    let dtype = trace.node_dtype(node.index());
    let tangent = forward.tangent(node.index())?;
    let result = match tangent {
        None => 0.0,
        Some(Value::Scalar(t)) => *t,
        Some(_) => return None,
    };
    if recorded.inputs.is_empty() {
        return Some(format!(
            "a leaf: its tangent is v's entry here, {}",
            readable(result, dtype)
        ));
    }
    let mut terms = Vec::new();
    for (slot, &input) in recorded.inputs.iter().enumerate() {
        let partial = session
            .detail()
            .edges
            .iter()
            .find(|edge| edge.side == Side::Input && edge.slot == slot)?
            .partial
            .clone();
        let input_tangent = match forward.tangent(input)? {
            None => 0.0,
            Some(Value::Scalar(t)) => *t,
            Some(_) => return None,
        };
        terms.push(format!(
            "{partial} × {} ({})",
            readable(input_tangent, trace.node_dtype(input)),
            trace.node(input).id
        ));
    }
    Some(format!(
        "Σ ∂ × input tangent: {} = {}",
        terms.join(" + "),
        readable(result, dtype)
    ))
}
