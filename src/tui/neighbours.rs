//! The neighbourhood of one node: its input edges and its consumer edges,
//! each with the local partial it carries, computed once per selection.

use crate::format::{compact, readable};
use crate::ops;
use crate::tensor::Value;
use crate::trace::{Partial, Trace};

/// Which side of the selected node an edge is on.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Side {
    /// The edge comes from an input of the selected node.
    Input,
    /// The edge goes to a consumer of the selected node.
    Consumer,
}

/// One edge of the selected node.
#[derive(Debug, Clone, PartialEq)]
pub struct EdgeRow {
    /// Input or consumer.
    pub side: Side,
    /// The node at the other end.
    pub node: usize,
    /// The input slot of the edge at its consumer.
    pub slot: usize,
    /// The partial ∂consumer/∂input on the edge, as text.
    pub partial: String,
}

/// The edges of `node`: inputs in argument order, then consumers in recording order.
pub fn edges(trace: &Trace, node: usize) -> Vec<EdgeRow> {
    let recorded = trace.node(node);
    let inputs = recorded
        .inputs
        .iter()
        .enumerate()
        .map(|(slot, &input)| EdgeRow {
            side: Side::Input,
            node: input,
            slot,
            partial: partial_text(trace, node, slot),
        });
    let consumers = trace
        .consumers(node)
        .into_iter()
        .map(|(consumer, slot)| EdgeRow {
            side: Side::Consumer,
            node: consumer,
            slot,
            partial: partial_text(trace, consumer, slot),
        });
    inputs.chain(consumers).collect()
}

/// The partial on input edge `slot` of `consumer`: the recorded one, else the
/// op table's rule (never a derivative written here).
pub fn partial_text(trace: &Trace, consumer: usize, slot: usize) -> String {
    let recorded = trace.node(consumer);
    let dtype = trace.node_dtype(consumer);
    match recorded.partial(slot) {
        Some(Partial::Scalar(s)) => return readable(*s, dtype),
        Some(Partial::Diagonal(diagonal)) => return value_text(diagonal, dtype, "diagonal"),
        Some(Partial::Jacobian { rows, cols, data }) => {
            return format!(
                "Jacobian {rows}×{cols}, ‖·‖ {}",
                compact(crate::tensor::l2_norm(data))
            );
        }
        None => {}
    }
    let inputs: Vec<&Value> = recorded
        .inputs
        .iter()
        .map(|&input| &trace.node(input).value)
        .collect();
    if let (Some(scalars), Value::Scalar(y)) = (
        inputs
            .iter()
            .map(|value| value.as_scalar())
            .collect::<Option<Vec<f64>>>(),
        &recorded.value,
    ) && inputs.iter().all(|value| matches!(value, Value::Scalar(_)))
        && let Some(partial) =
            ops::scalar_partial(recorded.op, slot, &scalars, *y, &recorded.attrs, dtype)
    {
        return readable(partial, dtype);
    }
    match ops::elementwise_partial(
        recorded.op,
        slot,
        &inputs,
        &recorded.value,
        &recorded.attrs,
        dtype,
    ) {
        Some(partial) => value_text(&partial, dtype, "diagonal"),
        None => format!("{} rule (vector-Jacobian product)", recorded.op_name),
    }
}

fn value_text(value: &Value, dtype: crate::dtype::Dtype, what: &str) -> String {
    match value.as_scalar() {
        Some(x) if matches!(value, Value::Scalar(_)) => readable(x, dtype),
        _ => format!(
            "{what} {}, ‖·‖ {}",
            crate::format::shape(value.shape()),
            compact(value.l2_norm())
        ),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::trace::validate;

    #[test]
    fn partials_of_the_teaching_trace_match_the_chain_rule() {
        let trace = validate(crate::demos::teaching()).unwrap();
        let demand = trace.find("demand").unwrap();
        let rows = edges(&trace, demand);
        // d/dx exp(x) = exp(x) (closed form); demand = exp(-1) at p = 2.5, s = 0.4.
        assert_eq!(rows[0].side, Side::Input);
        assert_eq!(rows[0].partial.parse::<f64>().unwrap(), (-1f64).exp());
        // ∂(a·b)/∂b = a: gross = margin·demand, margin = p − c = 1.5 (closed form).
        let gross = rows
            .iter()
            .find(|row| row.node == trace.find("gross").unwrap())
            .unwrap();
        assert_eq!(
            (gross.side, gross.slot, gross.partial.as_str()),
            (Side::Consumer, 1, "1.5")
        );
        // demand_sq = demand·demand: one edge per slot, both with partial demand.
        let square = trace.find("demand_sq").unwrap();
        let slots: Vec<usize> = rows
            .iter()
            .filter(|row| row.node == square)
            .map(|row| row.slot)
            .collect();
        assert_eq!(slots, [0, 1]);
    }
}
