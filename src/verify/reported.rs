//! The recorded-gradient check: compare the gradients the original framework
//! reported with Ebb's sweep, and walk from the first disagreeing parameter
//! towards the output to the node whose backward is the suspect.

use super::compare::Worst;
use crate::dtype::Dtype;
use crate::sweep::Sweep;
use crate::trace::Trace;
use serde::Serialize;

/// One node's reported gradient against the sweep's adjoint.
#[derive(Debug, Clone, Serialize)]
pub struct ReportedComparison {
    /// The node.
    pub node: usize,
    /// Sweep adjoint (`actual`) against the reported gradient (`expected`).
    pub worst: Worst,
    /// The relative error beyond which they disagree: the verify tolerance,
    /// or the trace's half-precision rounding floor where that is larger
    /// (see [`reported_tolerance`]).
    pub tolerance: f64,
}

impl ReportedComparison {
    /// Whether the adjoint and the reported gradient disagree.
    pub fn disagrees(&self) -> bool {
        self.worst.relative > self.tolerance
    }
}

/// The tolerance reported gradients are judged with: `tolerance`, raised in
/// a trace with f16 or bf16 nodes to four unit roundoffs of the narrowest
/// of them. Where a step computes in a half format, the framework's kernels
/// and Ebb's op table agree only to the last f32 bits, so an entry that
/// lands near a half-precision rounding boundary rounds one way in one and
/// the other way in the other: one unit roundoff (2⁻¹¹ for f16, 2⁻⁸ for
/// bf16) relative to the entry, carried on through the layers below. Four
/// leave room for that while any wrong backward (a sign, a missing factor)
/// stays far beyond it (common practice: compare at the precision the step
/// computed in).
pub fn reported_tolerance(trace: &Trace, tolerance: f64) -> f64 {
    let narrowest = trace
        .nodes()
        .iter()
        .map(|node| node.dtype.limits().precision)
        .min();
    match narrowest {
        Some(precision) if precision < Dtype::F32.limits().precision => {
            tolerance.max(4.0 * 2f64.powi(-precision))
        }
        _ => tolerance,
    }
}

/// The result of the walk.
#[derive(Debug, Clone, Serialize)]
pub struct Walk {
    /// The first parameter (recording order) whose gradient disagrees.
    pub param: usize,
    /// The nodes walked, from the parameter to the last one that disagrees.
    pub path: Vec<usize>,
    /// Consumers of the last disagreeing node that agree (or report nothing):
    /// one of their backwards sent the wrong contribution.
    pub suspects: Vec<usize>,
}

/// Compares every reported gradient with the sweep (which must have run to
/// the end) and walks from the first disagreeing parameter.
pub fn check_reported(sweep: &Sweep, tolerance: f64) -> (Vec<ReportedComparison>, Option<Walk>) {
    let trace = sweep.trace();
    let tolerance = reported_tolerance(trace, tolerance);
    let comparisons: Vec<ReportedComparison> = trace
        .nodes()
        .iter()
        .enumerate()
        .filter_map(|(node, recorded)| {
            let reported = recorded.reported.as_ref()?;
            let adjoint = sweep
                .adjoint(node)
                .map(std::borrow::Cow::into_owned)
                .unwrap_or_else(|| crate::tensor::Value::filled(reported.shape(), 0.0));
            Some(ReportedComparison {
                node,
                // Against the tensor's scale: the framework summed in
                // another order, so entries whose true value is 0 are noise.
                worst: Worst::of_scaled(&adjoint.to_f64(), &reported.to_f64())?,
                tolerance,
            })
        })
        .collect();
    let disagrees = |node: usize| comparisons.iter().any(|c| c.node == node && c.disagrees());
    let Some(param) = trace.params().find(|&p| disagrees(p)) else {
        return (comparisons, None);
    };
    // Walk towards the output while some consumer already disagrees: the
    // error entered below the last disagreeing node.
    let mut path = vec![param];
    let mut current = param;
    loop {
        let consumers: Vec<usize> = trace
            .consumers(current)
            .into_iter()
            .map(|(c, _)| c)
            .filter(|&c| trace.sweep_rank(c).is_some())
            .collect();
        match consumers
            .iter()
            .copied()
            .filter(|&c| disagrees(c))
            .min_by_key(|&c| trace.sweep_rank(c))
        {
            Some(next) => {
                path.push(next);
                current = next;
            }
            None => {
                let mut suspects = consumers;
                suspects.dedup();
                return (
                    comparisons,
                    Some(Walk {
                        param,
                        path,
                        suspects,
                    }),
                );
            }
        }
    }
}
