//! `ebb sweep`: the sweep step by step, from a step, for one node, as text or JSON.

use super::Outcome;
use anyhow::{Context, Result};
use ebb::listing::{Selection, select_steps};
use ebb::sweep::Sweep;
use ebb::trace::Trace;
use std::io::Write;

/// What `ebb sweep` lists.
#[derive(Debug, Clone, Default)]
pub struct SweepOptions {
    /// The most steps listed.
    pub steps: Option<usize>,
    /// The first step listed, 1-based.
    pub from: Option<usize>,
    /// Only the steps of this node.
    pub node: Option<String>,
    /// JSON instead of text.
    pub json: bool,
    /// Bytes of tensor contributions the ledger keeps.
    pub ledger_budget: usize,
}

/// Lists the sweep of `trace`; flagged when the steps run raised a flag.
pub fn sweep(trace: &Trace, options: &SweepOptions, out: &mut dyn Write) -> Result<Outcome> {
    let node = match &options.node {
        Some(id) => Some(trace.find(id).with_context(|| {
            format!("--node {id}: no node '{id}' in the trace (hint: ids are listed by `ebb sweep` and `ebb check`)")
        })?),
        None => None,
    };
    if let Some(node) = node {
        anyhow::ensure!(
            trace.sweep_rank(node).is_some(),
            "--node {}: '{}' does not reach the output, so no step processes it",
            trace.node(node).id,
            trace.node(node).id
        );
    }
    let total = trace.sweep_order().len();
    if let Some(from) = options.from {
        anyhow::ensure!(from <= total, "--from {from}: the sweep has {total} steps");
    }
    let selection = Selection {
        from: options.from.map_or(0, |step| step - 1),
        node,
        steps: options.steps.unwrap_or(usize::MAX),
    };
    let mut sweep = Sweep::with_budget(trace, options.ledger_budget);
    let listing = select_steps(&mut sweep, &selection);
    let text = if options.json {
        serde_json::to_string_pretty(&listing).expect("a listing always serialises") + "\n"
    } else {
        listing.to_text()
    };
    out.write_all(text.as_bytes())
        .context("writing the sweep")?;
    Ok(if sweep.flags().is_empty() {
        Outcome::Clean
    } else {
        Outcome::Flagged
    })
}
