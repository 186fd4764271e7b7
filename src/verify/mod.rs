//! Verification: find the node whose derivative is wrong. Four checks — the
//! recorded partials against the op table, central finite differences, the
//! framework's reported gradients, and the tangent sweep's dot-product
//! identity — and a ranked list of suspects with their evidence.

mod compare;
mod finite_diff;
mod partials;
mod render;
mod reported;
mod tangent;

pub use compare::{Band, Worst, relative_error};
pub use finite_diff::{DifferenceCheck, DifferenceEntry, check_finite_differences};
pub use partials::{MAX_DENSE_ENTRIES, PartialCheck, Unchecked, check_partials, partial_pair};
pub use reported::{ReportedComparison, Walk, check_reported};
pub use tangent::{Direction, TangentSweep};

use crate::dtype::{Dtype, Subnormals};
use crate::sweep::{LedgerMode, Sweep};
use crate::trace::Trace;
use serde::Serialize;

/// What to check and how strictly.
#[derive(Debug, Clone)]
pub struct VerifyOptions {
    /// Relative error above which a check counts as a mismatch.
    pub tolerance: f64,
    /// Entries of each parameter checked by finite differences.
    pub samples: usize,
    /// Seed of the sampled entries and of the random tangent direction.
    pub seed: u64,
    /// Direction of the tangent sweep; `None` for a seeded random one.
    pub direction: Option<Direction>,
}

impl Default for VerifyOptions {
    fn default() -> Self {
        VerifyOptions {
            tolerance: 1e-4,
            samples: 8,
            seed: 0xEBB,
            direction: None,
        }
    }
}

/// The tangent sweep against the reverse sweep.
#[derive(Debug, Clone, Copy, Serialize)]
pub struct TangentCheck {
    /// ∂f/∂v from the tangent sweep.
    pub tangent: f64,
    /// ⟨v, ∇f⟩ from the reverse sweep.
    pub reverse: f64,
    /// Their relative error.
    pub relative: f64,
}

/// Which check pointed at a suspect.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Evidence {
    /// A recorded partial differs from the op table's.
    RecordedPartial,
    /// Finite differences disagree with the parameter's gradient.
    FiniteDifference,
    /// The reported gradients point at this node's backward.
    ReportedGradient,
    /// Tangent and reverse sweeps disagree.
    TangentIdentity,
}

/// A node suspected of a wrong derivative.
#[derive(Debug, Clone, Serialize)]
pub struct Suspect {
    /// Node index.
    pub node: usize,
    /// Which check.
    pub evidence: Evidence,
    /// The relative error behind it.
    pub relative: f64,
    /// Its band.
    pub band: Band,
    /// One sentence for people.
    pub detail: String,
}

/// Everything `ebb verify` found.
#[derive(Debug, Clone)]
pub struct Verification {
    /// The options used.
    pub tolerance: f64,
    /// Recorded partials of catalog ops, checked.
    pub partials: Vec<PartialCheck>,
    /// Recorded partials that could not be checked.
    pub unchecked: Vec<Unchecked>,
    /// Finite differences per parameter.
    pub differences: Vec<DifferenceCheck>,
    /// Reported gradients against the sweep.
    pub reported: Vec<ReportedComparison>,
    /// The walk from the first disagreeing parameter.
    pub walk: Option<Walk>,
    /// The tangent sweep against the reverse sweep.
    pub tangent: Option<TangentCheck>,
    /// Ranked suspects, worst first.
    pub suspects: Vec<Suspect>,
    /// Flags the reverse sweep raised: where values are NaN or infinite, the
    /// checks compare non-finite numbers and cannot judge a derivative.
    pub sweep_flags: usize,
    /// The dtype finite differences and the tangent sweep ran in.
    pub derivatives_in: Dtype,
}

impl Verification {
    /// True when every check agrees within the tolerance.
    pub fn agrees(&self) -> bool {
        self.suspects.is_empty()
    }
}

/// Runs every check on `trace`.
///
/// Finite differences and the tangent sweep judge derivatives, not rounding:
/// for a trace recorded in f16, bf16 or f32 they run on a copy whose forward
/// pass is recomputed in f64 from the recorded leaves, so the sweep and the
/// differences see one function at one point (the rounding of the narrower
/// dtype is what `ebb check`'s precision replay reports). Recorded partials
/// and reported gradients are compared in the trace's own dtype, the one they
/// were produced in.
pub fn verify(trace: &Trace, options: &VerifyOptions) -> Verification {
    let mut sweep = Sweep::new(trace, LedgerMode::Off);
    sweep.run_to_end();
    let (partials, unchecked) = check_partials(trace);
    let (reported, walk) = check_reported(&sweep, options.tolerance);
    let wide = (trace.dtype() != Dtype::F64).then(|| {
        let retyped = trace.retyped(Dtype::F64, Subnormals::Keep);
        let values = crate::eval::forward_pass(&retyped, Dtype::F64);
        retyped.with_values(values)
    });
    let exact = wide.as_ref().unwrap_or(trace);
    let mut exact_sweep = Sweep::new(exact, LedgerMode::Off);
    exact_sweep.run_to_end();
    let differences = check_finite_differences(&exact_sweep, options.samples, options.seed);
    let direction = options
        .direction
        .clone()
        .unwrap_or(Direction::Random { seed: options.seed });
    let mut tangent_sweep = TangentSweep::new(exact, &direction);
    tangent_sweep.run_to_end();
    let tangent = tangent_sweep.directional_derivative().map(|tangent| {
        let reverse = tangent_sweep.reverse_counterpart(&exact_sweep);
        TangentCheck {
            tangent,
            reverse,
            relative: relative_error(tangent, reverse),
        }
    });
    let sweep_flags = sweep.flags().len();
    let mut verification = Verification {
        tolerance: options.tolerance,
        partials,
        unchecked,
        differences,
        reported,
        walk,
        tangent,
        suspects: Vec::new(),
        sweep_flags,
        derivatives_in: exact.dtype(),
    };
    verification.suspects = rank(trace, &verification);
    verification
}

/// Collects the suspects of every check, worst first.
fn rank(trace: &Trace, found: &Verification) -> Vec<Suspect> {
    let tolerance = found.tolerance;
    let id = |node: usize| trace.node(node).id.as_str();
    let mut suspects = Vec::new();
    for check in found
        .partials
        .iter()
        .filter(|c| c.worst.relative > tolerance)
    {
        let input = trace.node(check.node).inputs[check.slot];
        suspects.push(Suspect {
            node: check.node,
            evidence: Evidence::RecordedPartial,
            relative: check.worst.relative,
            band: check.worst.band(),
            detail: format!(
                "recorded partial on edge {} (from '{}') is {} at element {} where {}'s rule gives {}",
                check.slot,
                id(input),
                check.worst.actual,
                check.worst.element,
                trace.node(check.node).op_name,
                check.worst.expected
            ),
        });
    }
    if let Some(walk) = &found.walk {
        let last = *walk.path.last().expect("a walk starts at its parameter");
        let relative = found
            .reported
            .iter()
            .find(|c| c.node == last)
            .map_or(1.0, |c| c.worst.relative);
        for &suspect in &walk.suspects {
            suspects.push(Suspect {
                node: suspect,
                evidence: Evidence::ReportedGradient,
                relative,
                band: Band::of(relative),
                detail: format!(
                    "'{}' is the last node on the way from '{}' whose adjoint disagrees with the reported gradient; its contribution came from '{}' ({}), whose own adjoint agrees",
                    id(last),
                    id(walk.param),
                    id(suspect),
                    trace.node(suspect).op_name
                ),
            });
        }
    }
    for check in &found.differences {
        let Some(worst) = check.worst() else { continue };
        if worst.counted() <= tolerance {
            continue;
        }
        let explained = if check.kinks.is_empty() {
            String::new()
        } else {
            let names: Vec<String> = check
                .kinks
                .iter()
                .map(|&n| format!("'{}'", id(n)))
                .collect();
            format!("; kinks at {} may explain it", names.join(", "))
        };
        suspects.push(Suspect {
            node: check.param,
            evidence: Evidence::FiniteDifference,
            relative: worst.counted(),
            band: Band::of(worst.counted()),
            detail: format!(
                "gradient entry {} is {} but central differences give {}{explained}",
                worst.element, worst.reverse, worst.central
            ),
        });
    }
    if let Some(tangent) = found.tangent.filter(|t| t.relative > tolerance) {
        suspects.push(Suspect {
            node: trace.output(),
            evidence: Evidence::TangentIdentity,
            relative: tangent.relative,
            band: Band::of(tangent.relative),
            detail: format!(
                "tangent sweep gives {} but ⟨v, ∇f⟩ from the reverse sweep is {}",
                tangent.tangent, tangent.reverse
            ),
        });
    }
    suspects.sort_by(|a, b| b.relative.total_cmp(&a.relative));
    suspects
}
