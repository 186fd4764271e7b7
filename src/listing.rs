//! The step-by-step listing of a sweep (`ebb sweep`): each node, its adjoint,
//! and every contribution it sends, as plain text for handouts and tests or
//! as JSON for scripts; from a given step, and for one node's steps only.

use crate::format::{compact, number, shape as show};
use crate::stats::Summary;
use crate::sweep::Sweep;
use crate::tensor::Value;
use crate::trace::{Num, Trace};
use serde::Serialize;
use std::fmt::Write;

/// Elements a tensor preview shows.
const PREVIEW: usize = 4;

/// A flat index as a multi-index of `shape`: `[3, 17]`.
pub fn multi_index(shape: &[usize], mut flat: usize) -> Vec<usize> {
    let mut index = vec![0; shape.len()];
    for (axis, &extent) in shape.iter().enumerate().rev() {
        if extent > 0 {
            index[axis] = flat % extent;
            flat /= extent;
        }
    }
    index
}

/// The elements a preview shows: the first four, or when an element is not
/// finite, four starting just before the first such one.
fn preview_window(data: &[f64]) -> (usize, Option<usize>) {
    let first_bad = data.iter().position(|x| !x.is_finite());
    let start = match first_bad {
        Some(at) if at + 1 > PREVIEW => (at - 1).min(data.len().saturating_sub(PREVIEW)),
        _ => 0,
    };
    (start, first_bad)
}

/// How a value is printed: scalars exactly; tensors by shape, norm and four
/// entries — the first four, or those around the first non-finite element,
/// which is named with its index.
pub fn describe_value(value: &Value) -> String {
    ValueEntry::of(value, crate::dtype::Dtype::F64).text()
}

/// A value in the JSON listing: a scalar as its number; a tensor as its
/// shape, norm, extremes, non-finite counts, the previewed elements and the
/// first non-finite element.
#[derive(Debug, Clone, Serialize)]
#[serde(untagged)]
pub enum ValueEntry {
    /// A scalar, in full precision.
    Scalar(Num),
    /// A tensor, summarised.
    Tensor {
        /// Shape.
        shape: Vec<usize>,
        /// L2 norm.
        norm: Num,
        /// Smallest element that is not NaN.
        min: Num,
        /// Largest element that is not NaN.
        max: Num,
        /// NaN elements.
        nan: usize,
        /// +inf elements.
        pos_inf: usize,
        /// −inf elements.
        neg_inf: usize,
        /// Flat index of the first previewed element.
        preview_start: usize,
        /// The previewed elements, in full precision.
        preview: Vec<Num>,
        /// The first non-finite element, if any.
        first_non_finite: Option<NonFiniteEntry>,
    },
}

/// Where a tensor's first non-finite element is.
#[derive(Debug, Clone, Serialize)]
pub struct NonFiniteEntry {
    /// Its multi-index.
    pub index: Vec<usize>,
    /// Its flat index.
    pub element: usize,
    /// Its value.
    pub value: Num,
}

impl ValueEntry {
    /// The value as the text listing prints it.
    pub fn text(&self) -> String {
        match self {
            ValueEntry::Scalar(x) => number(x.0),
            ValueEntry::Tensor {
                shape,
                norm,
                preview_start,
                preview,
                first_non_finite,
                ..
            } => {
                let len: usize = shape.iter().product();
                let shown: Vec<String> = preview.iter().map(|x| compact(x.0)).collect();
                let before = if *preview_start > 0 { "…, " } else { "" };
                let after = if preview_start + preview.len() < len {
                    ", …"
                } else {
                    ""
                };
                let bad = first_non_finite.as_ref().map_or(String::new(), |bad| {
                    format!(
                        "; first non-finite {} at {}",
                        number(bad.value.0),
                        show(&bad.index)
                    )
                });
                format!(
                    "{} norm {} [{before}{}{after}]{bad}",
                    show(shape),
                    compact(norm.0),
                    shown.join(", ")
                )
            }
        }
    }

    /// The entry of `value`, summarised as a value of `dtype`.
    pub fn of(value: &Value, dtype: crate::dtype::Dtype) -> ValueEntry {
        match value {
            Value::Scalar(x) => ValueEntry::Scalar(Num(*x)),
            Value::Tensor(t) => {
                let data = t.to_f64();
                let summary = Summary::of(&data, dtype);
                let (start, first_bad) = preview_window(&data);
                let end = (start + PREVIEW).min(data.len());
                ValueEntry::Tensor {
                    shape: t.shape().to_vec(),
                    norm: Num(summary.norm),
                    min: Num(summary.min),
                    max: Num(summary.max),
                    nan: summary.nan,
                    pos_inf: summary.pos_inf,
                    neg_inf: summary.neg_inf,
                    preview_start: start,
                    preview: data[start..end].iter().map(|&x| Num(x)).collect(),
                    first_non_finite: first_bad.map(|at| NonFiniteEntry {
                        index: multi_index(t.shape(), at),
                        element: at,
                        value: Num(data[at]),
                    }),
                }
            }
        }
    }
}

/// What to list.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Selection {
    /// The first step listed (0-based); earlier steps run silently.
    pub from: usize,
    /// List only the steps that process this node or send it a contribution.
    pub node: Option<usize>,
    /// The most steps listed.
    pub steps: usize,
}

impl Default for Selection {
    fn default() -> Selection {
        Selection {
            from: 0,
            node: None,
            steps: usize::MAX,
        }
    }
}

/// One contribution of a listed step.
#[derive(Debug, Clone, Serialize)]
pub struct ContributionEntry {
    /// The receiving input.
    pub to: String,
    /// Its slot.
    pub slot: usize,
    /// The value added.
    pub value: ValueEntry,
    /// The receiver's adjoint before (`null`: its first contribution).
    pub before: Option<ValueEntry>,
    /// The receiver's adjoint after.
    pub after: ValueEntry,
}

/// One listed step.
#[derive(Debug, Clone, Serialize)]
pub struct StepEntry {
    /// 1-based step.
    pub step: usize,
    /// The node processed.
    pub node: String,
    /// Its op.
    pub op: String,
    /// Its group.
    pub group: String,
    /// Its adjoint, final at this step (`null`: it received none).
    pub adjoint: Option<ValueEntry>,
    /// The contributions it sent, in slot order.
    pub contributions: Vec<ContributionEntry>,
    /// True for a leaf: its adjoint is final and it sends nothing.
    pub leaf: bool,
}

/// The listing of a sweep, for JSON.
#[derive(Debug, Clone, Serialize)]
pub struct Listing {
    /// Schema version of this listing (1).
    pub sweep: u32,
    /// Steps in the whole sweep.
    pub total: usize,
    /// The listed steps.
    pub steps: Vec<StepEntry>,
    /// Flags the sweep raised up to the last step it ran.
    pub flags: usize,
}

/// Runs `sweep` (which must keep its ledger) through the selected steps and
/// returns them, stopping after the last one listed.
pub fn select_steps(sweep: &mut Sweep, selection: &Selection) -> Listing {
    let trace: &Trace = sweep.trace();
    let total = sweep.len();
    let mut steps = Vec::new();
    let last_for_node = selection.node.and_then(|node| trace.sweep_rank(node));
    while steps.len() < selection.steps {
        let step = sweep.cursor();
        if last_for_node.is_some_and(|last| step > last) {
            break;
        }
        let Some(node) = sweep.step() else { break };
        if step < selection.from {
            continue;
        }
        let ledger = sweep.ledger().expect("the listing needs the ledger");
        let entries = ledger.step_entries(step);
        if let Some(wanted) = selection.node
            && node != wanted
            && !entries.iter().any(|entry| entry.input == wanted)
        {
            continue;
        }
        let recorded = trace.node(node);
        let dtype_of = |n: usize| trace.node_dtype(n);
        steps.push(StepEntry {
            step: step + 1,
            node: recorded.id.clone(),
            op: recorded.op_name.to_string(),
            group: recorded.group.clone(),
            adjoint: sweep
                .adjoint(node)
                .map(|adjoint| ValueEntry::of(&adjoint, dtype_of(node))),
            contributions: entries
                .iter()
                .map(|entry| ContributionEntry {
                    to: trace.node(entry.input).id.clone(),
                    slot: entry.slot,
                    value: ValueEntry::of(&entry.value, dtype_of(entry.input)),
                    before: entry
                        .before
                        .as_ref()
                        .map(|before| ValueEntry::of(before, dtype_of(entry.input))),
                    after: ValueEntry::of(&entry.after, dtype_of(entry.input)),
                })
                .collect(),
            leaf: recorded.inputs.is_empty(),
        });
    }
    Listing {
        sweep: 1,
        total,
        steps,
        flags: sweep.flags().len(),
    }
}

impl Listing {
    /// The listing as text: one line per step, one per contribution.
    pub fn to_text(&self) -> String {
        let mut out = String::new();
        for step in &self.steps {
            let group = if step.group.is_empty() {
                String::new()
            } else {
                format!("  [{}]", step.group)
            };
            let adjoint = step
                .adjoint
                .as_ref()
                .map_or("none".to_string(), ValueEntry::text);
            let _ = writeln!(
                out,
                "step {}/{}  {} ({}){group}  adjoint {adjoint}",
                step.step, self.total, step.node, step.op
            );
            for entry in &step.contributions {
                let before = entry
                    .before
                    .as_ref()
                    .map_or("none".to_string(), ValueEntry::text);
                let _ = writeln!(
                    out,
                    "    -> {} (input {})  contribution {}  adjoint {} -> {}",
                    entry.to,
                    entry.slot,
                    entry.value.text(),
                    before,
                    entry.after.text()
                );
            }
            if step.leaf {
                let _ = writeln!(out, "    (leaf: its adjoint is final)");
            }
        }
        out
    }
}

/// Lists the selected steps of `sweep` (which must keep its ledger) as text.
pub fn list_selected(sweep: &mut Sweep, selection: &Selection) -> String {
    select_steps(sweep, selection).to_text()
}

/// Takes up to `steps` steps of `sweep` (which must keep its ledger) and
/// writes each to the returned text.
pub fn list_steps(sweep: &mut Sweep, steps: usize) -> String {
    list_selected(
        sweep,
        &Selection {
            steps,
            ..Selection::default()
        },
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn multi_indices_are_row_major() {
        assert_eq!(multi_index(&[6, 4], 17), vec![4, 1]);
        assert_eq!(multi_index(&[2, 3, 4], 23), vec![1, 2, 3]);
        assert_eq!(multi_index(&[], 0), Vec::<usize>::new());
    }

    #[test]
    fn a_preview_shows_the_first_non_finite_element_and_its_index() {
        let mut data = vec![0.5; 24];
        data[17] = f64::NEG_INFINITY;
        let value = Value::from_parts(vec![6, 4], data);
        let text = describe_value(&value);
        assert!(text.contains("[…, 0.5, -inf, 0.5, 0.5, …]"), "{text}");
        assert!(
            text.ends_with("; first non-finite -inf at [4, 1]"),
            "{text}"
        );
        let clean = describe_value(&Value::from_parts(vec![5], vec![1.0, 2.0, 3.0, 4.0, 5.0]));
        assert_eq!(clean, "[5] norm 7.416198 [1, 2, 3, 4, …]");
    }
}
