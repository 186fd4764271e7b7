//! Dominant paths: for each parameter, the path from the output along which
//! the product of per-edge gains is largest. That is a longest path in log
//! space over the DAG, found in one pass over the ledger in sweep order (a
//! node's best path is final once all its consumers are swept, which the
//! sweep order guarantees), so it is iterative and linear in the edges.

use crate::sweep::Sweep;
use serde::Serialize;

/// One hop of a path: the adjoint of `from` pulled back into `to`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Hop {
    /// The node pulled back.
    pub from: usize,
    /// The input that received the contribution.
    pub to: usize,
    /// The input slot of the edge.
    pub slot: usize,
    /// ‖contribution‖ / ‖adjoint of `from`‖ (for a scalar edge, |partial|).
    pub gain: f64,
}

/// The dominant path from the output to one parameter.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DominantPath {
    /// The parameter.
    pub param: usize,
    /// Hops from the output down to the parameter.
    pub hops: Vec<Hop>,
    /// log10 of the product of the hops' gains (−inf when a hop's gain is 0).
    pub log10_gain: f64,
}

impl DominantPath {
    /// The product of the hops' gains (may overflow to inf where the log does not).
    pub fn gain(&self) -> f64 {
        10f64.powf(self.log10_gain)
    }

    /// The median of the hops' gains: the typical factor per hop (0 for an empty path).
    pub fn median_gain(&self) -> f64 {
        super::rules::median(self.hops.iter().map(|hop| hop.gain).collect())
    }

    /// The hop with the smallest gain: where a collapse happens.
    pub fn weakest(&self) -> Option<&Hop> {
        self.hops.iter().min_by(|a, b| a.gain.total_cmp(&b.gain))
    }

    /// The hop with the largest gain: where an explosion happens.
    pub fn strongest(&self) -> Option<&Hop> {
        self.hops.iter().max_by(|a, b| a.gain.total_cmp(&b.gain))
    }
}

/// The gain of every ledger entry: ‖contribution‖ / ‖adjoint of the consumer‖,
/// `None` where the adjoint is zero or either norm is not finite.
pub fn edge_gains(sweep: &Sweep) -> Vec<Option<f64>> {
    let trace = sweep.trace();
    let adjoint_norms: Vec<f64> = (0..trace.nodes().len())
        .map(|node| sweep.adjoint(node).map_or(0.0, |adjoint| adjoint.l2_norm()))
        .collect();
    let ledger = sweep.ledger().expect("gains need the ledger");
    ledger
        .entries()
        .map(|entry| {
            let adjoint = adjoint_norms[entry.consumer];
            let contribution = entry.value.l2_norm();
            (adjoint > 0.0 && adjoint.is_finite() && contribution.is_finite())
                .then(|| contribution / adjoint)
        })
        .collect()
}

/// The dominant path of every parameter that reaches the output through edges of known gain.
pub fn dominant_paths(sweep: &Sweep, gains: &[Option<f64>]) -> Vec<DominantPath> {
    let trace = sweep.trace();
    let ledger = sweep.ledger().expect("paths need the ledger");
    let mut best: Vec<Option<f64>> = vec![None; trace.nodes().len()];
    let mut via: Vec<Option<usize>> = vec![None; trace.nodes().len()];
    best[trace.output()] = Some(0.0);
    for (index, entry) in ledger.entries().enumerate() {
        let (Some(from), Some(gain)) = (best[entry.consumer], gains[index]) else {
            continue;
        };
        let candidate = from + gain.ln();
        if best[entry.input].is_none_or(|current| candidate > current) {
            best[entry.input] = Some(candidate);
            via[entry.input] = Some(index);
        }
    }
    trace
        .params()
        .filter_map(|param| {
            let total = best[param]?;
            let mut hops = Vec::new();
            let mut cursor = param;
            while let Some(index) = via[cursor] {
                let entry = ledger.entry(index).expect("a path runs through done edges");
                hops.push(Hop {
                    from: entry.consumer,
                    to: entry.input,
                    slot: entry.slot,
                    gain: gains[index].unwrap_or(f64::NAN),
                });
                cursor = entry.consumer;
            }
            hops.reverse();
            Some(DominantPath {
                param,
                hops,
                log10_gain: total / std::f64::consts::LN_10,
            })
        })
        .collect()
}
