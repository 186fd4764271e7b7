//! Precision replay: the same recorded step swept again in another dtype and
//! compared, contribution by contribution, with a sweep in f64.

use super::rules::{Finding, Rule};
use super::settings::Settings;
use super::{SweepAnalysis, analyse};
use crate::control::{Cancelled, Control};
use crate::dtype::{Dtype, Subnormals};
use crate::sweep::Sweep;
use crate::tensor::{Value, scan};
use crate::trace::Trace;
use serde::Serialize;
use std::collections::HashSet;

/// A contribution that was small against the adjoint it was added to, and
/// lost at least the configured fraction of itself in the rounded sum.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct LostContribution {
    /// The sweep step (0-based).
    pub step: usize,
    /// The node whose adjoint received it.
    pub node: usize,
    /// The node that sent it.
    pub from: usize,
    /// Flat index of the first element that lost it.
    pub element: usize,
    /// The contribution's element.
    pub contribution: f64,
    /// The adjoint's element before.
    pub before: f64,
    /// The adjoint's element after.
    pub after: f64,
    /// The fraction of the contribution missing from the sum (1 when absorbed entirely).
    pub lost: f64,
}

/// One parameter's gradient in a replay, against the f64 reference.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ReplayGradient {
    /// The parameter.
    pub param: usize,
    /// L2 norm in this dtype.
    pub norm: f64,
    /// L2 norm in the f64 reference.
    pub reference_norm: f64,
    /// Largest elementwise |here − reference| / max(|reference|), over the gradient.
    pub relative_error: f64,
}

/// One dtype's replay.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ReplayRun {
    /// The dtype swept in: every value, partial and adjoint is stored in it.
    pub dtype: Dtype,
    /// The dtype matmul, convolution and reduction sums accumulate in before
    /// one rounding into `dtype` (the default for `dtype`; see FORMAT.md's
    /// precision model).
    pub accumulate: Dtype,
    /// Whether subnormal results were kept.
    pub subnormals: Subnormals,
    /// The rules' findings in this dtype that the f64 reference sweep does not
    /// have (what reduced precision changes), in sweep order.
    pub findings: Vec<Finding>,
    /// All findings in this dtype, shared ones included.
    pub findings_total: usize,
    /// Root causes of non-finite adjoints in this dtype.
    pub origins: Vec<super::origin::Origin>,
    /// The first lost contribution at each receiving node, in sweep order.
    pub lost: Vec<LostContribution>,
    /// How many contributions lost at least the configured fraction, over all nodes.
    pub lost_total: usize,
    /// Every parameter's gradient, in recording order.
    pub gradients: Vec<ReplayGradient>,
}

impl ReplayRun {
    /// The first finding of `rule` in this dtype.
    pub fn first(&self, rule: Rule) -> Option<&Finding> {
        self.findings.iter().find(|finding| finding.rule == rule)
    }

    /// Where this dtype first overflows where f64 does not: the first overflow,
    /// or the first non-finite number, whichever comes first.
    pub fn first_overflow(&self) -> Option<&Finding> {
        // At one step, the overflow (which knows the finite value that did
        // not fit) is preferred to the infinity it left.
        self.findings
            .iter()
            .filter(|finding| finding.rule == Rule::Overflow || finding.rule == Rule::NonFinite)
            .min_by_key(|finding| (finding.step, finding.rule != Rule::Overflow))
    }

    /// Where this dtype first underflows where f64 does not.
    pub fn first_underflow(&self) -> Option<&Finding> {
        self.first(Rule::Underflow)
    }

    /// Where this dtype first loses a contribution.
    pub fn first_lost(&self) -> Option<&LostContribution> {
        self.lost.first()
    }

    /// Everything this replay found at `node`.
    pub fn at_node(&self, node: usize) -> impl Iterator<Item = &Finding> + '_ {
        self.findings
            .iter()
            .filter(move |finding| finding.node == node)
    }
}

/// What makes two findings the same for the comparison with the reference:
/// one finding per rule and node.
fn key(finding: &Finding) -> (Rule, usize) {
    (finding.rule, finding.node)
}

/// Sweeps `trace` re-typed into `dtype` and compares it with the f64
/// `reference` sweep, whose own findings are `reference_findings`.
pub fn replay(
    trace: &Trace,
    dtype: Dtype,
    settings: &Settings,
    reference: &Sweep,
    reference_findings: &[Finding],
) -> ReplayRun {
    // The f64 replay with gradual underflow is the reference itself.
    if dtype == Dtype::F64 && settings.subnormals == Subnormals::Keep {
        let analysis = analyse(reference, Some(reference), settings);
        return compared(
            trace,
            dtype,
            settings,
            reference,
            &analysis,
            reference,
            reference_findings,
        );
    }
    swept_anew(
        trace,
        dtype,
        settings,
        (reference, reference_findings),
        &Control::NONE,
    )
    .expect("Control::NONE never cancels")
}

/// The replay in `dtype` from a sweep of its own: `trace` re-typed, swept
/// with a ledger (stopping when `control` is cancelled), analysed and
/// compared with the f64 `reference` and its findings.
pub(super) fn swept_anew(
    trace: &Trace,
    dtype: Dtype,
    settings: &Settings,
    (reference, reference_findings): (&Sweep, &[Finding]),
    control: &Control,
) -> Result<ReplayRun, Cancelled> {
    let retyped = trace.retyped(dtype, settings.subnormals);
    let mut sweep = Sweep::with_budget(&retyped, settings.ledger_budget);
    sweep.run_to_end_with(control, "replay")?;
    let analysis = analyse(&sweep, Some(reference), settings);
    Ok(compared(
        trace,
        dtype,
        settings,
        &sweep,
        &analysis,
        reference,
        reference_findings,
    ))
}

/// The replay in `dtype` from its finished `sweep` and that sweep's
/// `analysis` against the f64 `reference`.
pub(super) fn compared(
    trace: &Trace,
    dtype: Dtype,
    settings: &Settings,
    sweep: &Sweep,
    analysis: &SweepAnalysis,
    reference: &Sweep,
    reference_findings: &[Finding],
) -> ReplayRun {
    let shared: HashSet<_> = reference_findings.iter().map(key).collect();
    let findings_total = analysis.findings.len();
    let findings: Vec<Finding> = analysis
        .findings
        .iter()
        .filter(|finding| !shared.contains(&key(finding)))
        .cloned()
        .collect();
    let (lost, lost_total) = lost_contributions(sweep, settings.lost_fraction);
    let gradients = trace
        .params()
        .filter_map(|param| {
            let here = sweep.adjoint(param)?;
            let there = reference.adjoint(param)?;
            // Pairwise in blocks: a widened copy of each gradient cost more than the comparison.
            let (mut scale, mut error) = (0.0f64, 0.0f64);
            if here.len() == there.len() {
                scan::scan_zip([here.elements(), there.elements()], |_, [a, b]| {
                    scale = scale.max(b.abs());
                    error = error.max((a - b).abs());
                });
            }
            let relative_error = if scale > 0.0 { error / scale } else { error };
            Some(ReplayGradient {
                param,
                norm: here.l2_norm(),
                reference_norm: there.l2_norm(),
                relative_error,
            })
        })
        .collect();
    ReplayRun {
        dtype,
        accumulate: dtype.default_accumulate(),
        subnormals: settings.subnormals,
        findings,
        findings_total,
        origins: analysis.causes.origins.clone(),
        lost,
        lost_total,
        gradients,
    }
}

/// Contributions at least `fraction` of which went missing from the rounded sum.
pub fn lost_contributions(sweep: &Sweep, fraction: f64) -> (Vec<LostContribution>, usize) {
    let ledger = sweep.ledger().expect("the replay keeps the ledger");
    let mut seen = HashSet::new();
    let mut first = Vec::new();
    let mut total = 0;
    for entry in ledger.entries() {
        let Some(before) = entry.before.as_ref() else {
            continue;
        };
        let hit = lost_element(before, &entry.value, &entry.after, fraction);
        if let Some((element, lost)) = hit {
            total += 1;
            if seen.insert(entry.input) {
                let at = |value: &Value| {
                    if value.len() == 1 {
                        value.get(0)
                    } else {
                        value.get(element)
                    }
                };
                first.push(LostContribution {
                    step: entry.step,
                    node: entry.input,
                    from: entry.consumer,
                    element,
                    contribution: at(&entry.value),
                    before: at(before),
                    after: at(&entry.after),
                    lost,
                });
            }
        }
    }
    (first, total)
}

/// The first element where the sum `after = before + contribution` is missing
/// at least `fraction` of a non-zero finite contribution.
fn lost_element(
    before: &Value,
    contribution: &Value,
    after: &Value,
    fraction: f64,
) -> Option<(usize, f64)> {
    let loss = |b: f64, c: f64, a: f64| {
        if c == 0.0 || !(b.is_finite() && c.is_finite() && a.is_finite()) {
            return None;
        }
        let lost = ((a - b) - c).abs() / c.abs();
        (lost >= fraction).then_some(lost.min(1.0))
    };
    if before.len() == after.len() && contribution.len() == after.len() {
        // The common case, in blocks: no widened copy of three tensors per entry.
        let mut first = None;
        scan::scan_zip(
            [before.elements(), contribution.elements(), after.elements()],
            |k, [b, c, a]| {
                if first.is_none() {
                    first = loss(b, c, a).map(|lost| (k, lost));
                }
            },
        );
        return first;
    }
    // A one-element sum or contribution against a tensor: index it as one.
    let (b, c, a) = (before.to_f64(), contribution.to_f64(), after.to_f64());
    (0..a.len()).find_map(|k| {
        loss(b[k.min(b.len() - 1)], c[k.min(c.len() - 1)], a[k]).map(|lost| (k, lost))
    })
}
