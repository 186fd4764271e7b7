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

pub use compare::{Band, Worst, differs, relative_error};
pub use finite_diff::{
    DifferenceCheck, DifferenceEntry, check_finite_differences, check_finite_differences_with,
};
pub use partials::{MAX_DENSE_ENTRIES, PartialCheck, Unchecked, check_partials, partial_pair};
pub use reported::{ReportedComparison, Walk, check_reported};
pub use tangent::{Direction, TangentSweep};

use crate::control::{Cancelled, Control};
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

/// A check that could not be made because the numbers it compares are NaN
/// or infinite. It is neither an agreement nor a suspect; `ebb verify` exits 1.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case", tag = "check")]
pub enum NotFinite {
    /// A recorded partial and the op table's are both non-finite somewhere.
    Partial {
        /// The node.
        node: usize,
        /// The input slot.
        slot: usize,
    },
    /// Central differences of a parameter where the difference and the gradient are not finite.
    FiniteDifference {
        /// The parameter.
        param: usize,
        /// Entries that could not be judged.
        entries: usize,
    },
    /// A reported gradient and the sweep's adjoint are both non-finite somewhere.
    Reported {
        /// The node.
        node: usize,
    },
    /// The tangent sweep's ∂f/∂v and the reverse sweep's ⟨v, ∇f⟩ are not finite.
    Tangent,
}

/// What `ebb verify` concludes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Verdict {
    /// Every check that could be made agrees within the tolerance, and every number is finite.
    Agrees,
    /// Some check disagrees: see the suspects.
    Disagrees,
    /// No suspect, but the sweep or some check is not finite: nothing can be
    /// said about the derivatives there (`ebb check` finds where it started).
    CannotJudge,
}

impl Verdict {
    /// The name used in JSON.
    pub fn name(self) -> &'static str {
        match self {
            Verdict::Agrees => "agrees",
            Verdict::Disagrees => "disagrees",
            Verdict::CannotJudge => "cannot_judge",
        }
    }
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
    /// checks compare non-finite numbers and cannot judge a derivative. A
    /// mask's absorbed −inf (`sweep::masked`) is not counted: the checks
    /// judge every derivative around it.
    pub sweep_flags: usize,
    /// Nodes whose −inf is an absorbed mask, in sweep order.
    pub masked: Vec<usize>,
    /// The dtype finite differences and the tangent sweep ran in.
    pub derivatives_in: Dtype,
    /// Checks that could not be made because their numbers are not finite.
    pub not_finite: Vec<NotFinite>,
    /// Custom ops that reach the output, in recording order. The op table has
    /// no rule for them, and finite differences and the tangent sweep go
    /// through their recorded partials, so only reported gradients can judge them.
    pub custom: Vec<usize>,
}

impl Verification {
    /// What the checks conclude: a suspect makes it `Disagrees`; otherwise a
    /// non-finite sweep or check makes it `CannotJudge`.
    pub fn verdict(&self) -> Verdict {
        if !self.suspects.is_empty() {
            Verdict::Disagrees
        } else if self.sweep_flags > 0 || !self.not_finite.is_empty() {
            Verdict::CannotJudge
        } else {
            Verdict::Agrees
        }
    }

    /// True when every check agrees within the tolerance and every number is
    /// finite: the only outcome `ebb verify` exits 0 on.
    pub fn agrees(&self) -> bool {
        self.verdict() == Verdict::Agrees
    }

    /// True when a reported gradient judges custom op `node`: the node or one
    /// of its inputs carries one.
    pub fn custom_judged_by_reported(&self, trace: &Trace, node: usize) -> bool {
        let carries = |n: usize| self.reported.iter().any(|c| c.node == n);
        carries(node) || trace.node(node).inputs.iter().any(|&input| carries(input))
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
    verify_with(trace, options, &Control::NONE).expect("Control::NONE never cancels")
}

/// [`verify`], reporting progress to `control` and returning `Err(Cancelled)`
/// between checks (and between parameters of the finite-difference check)
/// once it is cancelled.
pub fn verify_with(
    trace: &Trace,
    options: &VerifyOptions,
    control: &Control,
) -> Result<Verification, Cancelled> {
    control.progress("reverse sweep", 0.0);
    let mut sweep = Sweep::new(trace, LedgerMode::Off);
    sweep.run_to_end();
    control.check()?;
    control.progress("recorded partials", 0.0);
    let (partials, unchecked) = check_partials(trace);
    control.check()?;
    let (reported, walk) = check_reported(&sweep, options.tolerance);
    control.check()?;
    let wide = (trace.dtype() != Dtype::F64).then(|| {
        let retyped = trace.retyped(Dtype::F64, Subnormals::Keep);
        let values = crate::eval::forward_pass(&retyped, Dtype::F64);
        retyped.with_values(values)
    });
    let exact = wide.as_ref().unwrap_or(trace);
    let mut exact_sweep = Sweep::new(exact, LedgerMode::Off);
    exact_sweep.run_to_end();
    control.check()?;
    let differences =
        check_finite_differences_with(&exact_sweep, options.samples, options.seed, control)?;
    control.check()?;
    control.progress("tangent sweep", 0.0);
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
    let masking = crate::sweep::Masking::of(&sweep);
    let sweep_flags = masking.unexplained(sweep.flags()).len();
    let masked = masking.masked.iter().map(|masked| masked.node).collect();
    let not_finite = not_finite(&partials, &differences, &reported, tangent.as_ref());
    let custom = trace
        .sweep_order()
        .iter()
        .rev()
        .copied()
        .filter(|&node| trace.node(node).op == crate::ops::Op::Custom)
        .collect();
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
        masked,
        derivatives_in: exact.dtype(),
        not_finite,
        custom,
    };
    verification.suspects = rank(trace, &verification);
    control.progress("verification", 1.0);
    Ok(verification)
}

/// The checks whose numbers are not finite: neither agreements nor suspects.
fn not_finite(
    partials: &[PartialCheck],
    differences: &[DifferenceCheck],
    reported: &[ReportedComparison],
    tangent: Option<&TangentCheck>,
) -> Vec<NotFinite> {
    let mut found: Vec<NotFinite> = partials
        .iter()
        .filter(|check| check.worst.band() == Band::NotFinite)
        .map(|check| NotFinite::Partial {
            node: check.node,
            slot: check.slot,
        })
        .collect();
    found.extend(
        differences
            .iter()
            .filter(|check| check.not_finite() > 0)
            .map(|check| NotFinite::FiniteDifference {
                param: check.param,
                entries: check.not_finite(),
            }),
    );
    found.extend(
        reported
            .iter()
            .filter(|comparison| comparison.worst.band() == Band::NotFinite)
            .map(|comparison| NotFinite::Reported {
                node: comparison.node,
            }),
    );
    if tangent.is_some_and(|t| Band::of(t.relative) == Band::NotFinite) {
        found.push(NotFinite::Tangent);
    }
    found
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
        // Unresolved and non-finite entries judge nothing; a one-sided
        // non-finite entry (a NaN gradient where the difference is a number) does.
        if !worst.band().is_judgement() || worst.counted() <= tolerance {
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
            band: worst.band(),
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
