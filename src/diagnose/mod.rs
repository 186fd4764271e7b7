//! Diagnosis of a reverse sweep: which rules fire, where each non-finite
//! adjoint was born and how it travelled, which paths carry the gradient to
//! each parameter, how the adjoint norm changes group by group, what the
//! same step does in f16, bf16, f32 and f64, and what to do about it.
//!
//! Everything here is an analysis over a finished sweep and its ledger, so
//! `Sweep::step` pays nothing when no diagnosis is asked for. Results refer
//! to nodes by index into the trace; nothing here knows about terminals.
//!
//! ```
//! use ebb::diagnose::{Settings, diagnose};
//! use ebb::dtype::Dtype;
//! use ebb::record::Tape;
//! use ebb::trace::Trace;
//!
//! let mut tape = Tape::new("log at zero", Dtype::F64);
//! let w = tape.param("w", 0.0);
//! let y = tape.log(w);
//! let trace = Trace::try_from(tape.finish(y)).unwrap();
//! let diagnosis = diagnose(&trace, &Settings::default());
//! let origin = diagnosis.first_origin().unwrap();
//! assert_eq!(trace.node(origin.node).id, "log_1");
//! ```

pub mod advice;
mod explain;
pub mod forward;
pub mod groups;
pub mod health;
pub mod origin;
pub mod paths;
pub mod repeat;
pub mod replay;
pub mod rules;
pub mod settings;

pub use advice::{Advice, ClipPreview, LossScale, Topic, loss_scale, loss_scale_of};
pub use forward::{ForwardCheck, Mismatch, check_forward};
pub use groups::{GroupNorm, group_norms};
pub use health::{DeadUnits, Saturation, activation_spread, dead_units, saturation};
pub use origin::{NanBirth, NanHow, Origin, OriginClass};
pub use paths::{DominantPath, Hop, dominant_paths, edge_gains};
pub use repeat::{Factor, Repeat, find_repeat};
pub use replay::{LostContribution, ReplayGradient, ReplayRun, replay};
pub use rules::{Finding, Measure, Measurement, Rule, Site};
pub use settings::{Settings, SettingsError};

use crate::control::{Cancelled, Control};
use crate::dtype::{Dtype, Subnormals};
use crate::format::compact;
use crate::sweep::{Masked, Masking, Sweep};
use crate::trace::Trace;
use origin::RootCauses;

/// Findings and root causes of one sweep.
struct SweepAnalysis {
    pub findings: Vec<Finding>,
    pub causes: RootCauses,
    /// Absorbed masks: −inf that is not a fault (`sweep::masked`).
    pub masking: Masking,
}

/// Runs the rules and the root-cause search over a finished sweep, and ties them together:
/// non-finite adjoint findings carry their origin's class, and a product that overflowed is an overflow.
fn analyse(sweep: &Sweep, reference: Option<&Sweep>, settings: &Settings) -> SweepAnalysis {
    let mut findings = rules::evaluate(&rules::RuleInput {
        sweep,
        reference,
        settings,
    });
    let masking = Masking::of(sweep);
    // A masked node's −inf value is a fact, not a fault: its value findings
    // go (an adjoint or partial finding at it would keep it unmasked).
    findings.retain(|finding| {
        !(matches!(finding.rule, Rule::NonFinite | Rule::Overflow)
            && masking.is_masked(finding.node)
            && finding
                .measures
                .iter()
                .all(|measured| measured.site == Site::Value))
    });
    let causes = origin::trace_back(sweep, &masking);
    for finding in &mut findings {
        if finding.rule == Rule::NonFinite
            && finding
                .measures
                .iter()
                .any(|measured| measured.site == Site::Adjoint)
        {
            finding.class = causes
                .origin_of(finding.node)
                .map(|index| causes.origins[index].class);
        }
    }
    if settings.is_on(Rule::Overflow) {
        let max = sweep.trace().dtype().limits().max_finite();
        for origin in causes
            .origins
            .iter()
            .filter(|origin| origin.class == OriginClass::ProductOverflow)
        {
            let Some((via, slot)) = origin.edge else {
                continue;
            };
            let site = Site::Contribution {
                slot,
                to: origin.first_adjoint,
            };
            let mut finding = Finding::single(
                Rule::Overflow,
                via,
                origin.step,
                site,
                Measure::Element,
                (0, origin.result, 1),
                max,
            );
            finding.class = Some(OriginClass::ProductOverflow);
            match findings
                .iter_mut()
                .find(|f| f.rule == Rule::Overflow && f.node == via)
            {
                Some(existing) if existing.measures.iter().any(|m| m.site == site) => {}
                Some(existing) => existing.measures.extend(finding.measures),
                None => findings.push(finding),
            }
        }
        findings.sort_by_key(|finding| (finding.step, finding.rule));
    }
    SweepAnalysis {
        findings,
        causes,
        masking,
    }
}

/// The whole diagnosis of one trace.
#[derive(Debug, Clone)]
pub struct Diagnosis {
    /// The settings it was made with.
    pub settings: Settings,
    /// The dtype of the diagnosed sweep (the trace's).
    pub dtype: Dtype,
    /// Every rule's findings in the trace's own dtype, in sweep order.
    pub findings: Vec<Finding>,
    /// Root causes of the non-finite adjoints, in the order they were born.
    pub origins: Vec<Origin>,
    /// The dominant path of every parameter with one.
    pub paths: Vec<DominantPath>,
    /// Per-group adjoint norms, shallowest first.
    pub groups: Vec<GroupNorm>,
    /// Each swept parameter's gradient norm in the trace's dtype, in recording order.
    pub gradient_norms: Vec<(usize, f64)>,
    /// One replay per dtype in the settings.
    pub replays: Vec<ReplayRun>,
    /// Loss-scale advice for f16, from the f64 reference adjoints.
    pub loss_scale: Option<LossScale>,
    /// The clipping preview of the parameter gradients.
    pub clipping: ClipPreview,
    /// What to do, most pressing first.
    pub advice: Vec<Advice>,
    /// Repeating structures along the dominant paths of the parameters
    /// flagged vanishing or exploding: the longest first.
    pub repeats: Vec<Repeat>,
    /// Forward consistency: recorded values against the op table's.
    pub forward: ForwardCheck,
    /// Sigmoid and tanh nodes with saturated units, in sweep order (flagged
    /// when the fraction reaches `saturated_fraction`).
    pub saturation: Vec<Saturation>,
    /// ReLU nodes with units dead for the whole batch, in sweep order
    /// (flagged when the fraction reaches `dead_fraction`).
    pub dead: Vec<DeadUnits>,
    /// Masks: nodes whose −inf values were recorded on purpose and absorbed
    /// (softmax of masked attention scores), in sweep order. They are noted,
    /// not flagged (`sweep::masked` has the policy).
    pub masked: Vec<Masked>,
    /// The group whose activation RMS is furthest from the input side's:
    /// (index into `groups`, ratio, index of the group nearest the inputs).
    pub activation_spread: Option<(usize, f64, usize)>,
    /// One line naming the cause: the first origin of a non-finite adjoint,
    /// the repeated gain behind a vanishing or exploding gradient, the flush
    /// to zero and the loss scale that prevents it, or what else fired.
    pub headline: String,
    causes: RootCauses,
}

impl Diagnosis {
    /// True when no rule fired in the trace's own dtype.
    pub fn is_clean(&self) -> bool {
        self.findings.is_empty()
    }

    /// The origin that spoiled the sweep first: the one whose first
    /// non-finite adjoint appeared earliest.
    pub fn first_origin(&self) -> Option<&Origin> {
        self.origins
            .iter()
            .min_by_key(|origin| (origin.first_adjoint_step, origin.step))
    }

    /// The flag (index into `flags`, the sweep's flags in order) that marks
    /// the first origin itself rather than a symptom downstream of it: the
    /// non-finite forward value (a), the partial (b), the adjoint made
    /// non-finite by its pull-back (c, e), at the branch point (d) or the seed.
    pub fn origin_flag(&self, flags: &[crate::sweep::Flag]) -> Option<usize> {
        use crate::sweep::FlagKind;
        let origin = self.first_origin()?;
        let slot = origin.edge.map(|(_, slot)| slot);
        flags.iter().position(|flag| match origin.class {
            OriginClass::NonFiniteValue => {
                flag.node == origin.node && flag.kind == FlagKind::NonFiniteValue
            }
            OriginClass::NonFinitePartial => {
                flag.node == origin.node
                    && flag.kind == FlagKind::NonFinitePartial
                    && (slot.is_none() || flag.slot == slot)
            }
            OriginClass::ProductOverflow | OriginClass::NanFromInfinity => {
                flag.kind == FlagKind::NonFiniteAdjoint && flag.from == Some(origin.node)
            }
            OriginClass::SumOverflow => {
                flag.kind == FlagKind::NonFiniteAdjoint && flag.node == origin.node
            }
            OriginClass::NonFiniteSeed => {
                flag.kind == FlagKind::NonFiniteAdjoint && flag.from.is_none()
            }
        })
    }

    /// The origin behind `node`'s non-finite adjoint, if it has one.
    pub fn origin_of(&self, node: usize) -> Option<&Origin> {
        self.causes
            .origin_of(node)
            .map(|index| &self.causes.origins[index])
    }

    /// The chain of nodes from the origin of `node`'s non-finite adjoint to
    /// `node`; empty when its adjoint is finite. Every consecutive pair is an
    /// edge of the graph: the first [`Diagnosis::forward_hops`] hops follow a
    /// non-finite forward value from its origin to the consumer that carried
    /// it into the sweep (each node an input of the next), the rest follow
    /// the non-finite adjoint through inputs (each node an input of the one before).
    pub fn chain_to(&self, node: usize) -> Vec<usize> {
        self.causes.chain(node)
    }

    /// How many of [`Diagnosis::chain_to`]'s first hops run forward.
    pub fn forward_hops(&self, node: usize) -> usize {
        self.causes.forward_hops(node)
    }

    /// Where infinite adjoints turned into NaN downstream of their origins, in sweep order.
    pub fn nan_births(&self) -> &[NanBirth] {
        &self.causes.nan_births
    }

    /// The findings at `node`.
    pub fn findings_at(&self, node: usize) -> impl Iterator<Item = &Finding> + '_ {
        self.findings
            .iter()
            .filter(move |finding| finding.node == node)
    }

    /// The dominant path to parameter `param`.
    pub fn path_to(&self, param: usize) -> Option<&DominantPath> {
        self.paths.iter().find(|path| path.param == param)
    }

    /// The replay in `dtype`, if it was run.
    pub fn replay_in(&self, dtype: Dtype) -> Option<&ReplayRun> {
        self.replays.iter().find(|run| run.dtype == dtype)
    }

    /// One sentence on why `node`'s adjoint is non-finite, for a node detail pane.
    pub fn explain(&self, trace: &Trace, node: usize) -> Option<String> {
        let origin = self.origin_of(node)?;
        let chain = self.chain_to(node);
        let hops = chain.len().saturating_sub(1);
        let turned = self
            .causes
            .nan_births
            .iter()
            .find(|birth| chain.contains(&birth.node))
            .map_or(String::new(), |birth| {
                format!(
                    " It turned into NaN at '{}' ({}, from '{}').",
                    trace.node(birth.node).id,
                    birth.how.phrase(),
                    trace.node(birth.from).id
                )
            });
        if origin.node == node || hops == 0 {
            return Some(format!(
                "Origin ({}): {}.{turned}",
                origin.class.letter(),
                origin.explanation
            ));
        }
        Some(format!(
            "Non-finite because of '{}' {hops} {} up the sweep ({}): {}.{turned}",
            trace.node(origin.node).id,
            if hops == 1 { "hop" } else { "hops" },
            origin.class.letter(),
            origin.explanation
        ))
    }
}

/// Diagnoses `trace`: sweeps it in its own dtype, in f64 as the reference and
/// in every replay dtype, and analyses the results.
pub fn diagnose(trace: &Trace, settings: &Settings) -> Diagnosis {
    diagnose_with(trace, settings, &Control::NONE).expect("Control::NONE never cancels")
}

/// [`diagnose`], reporting each stage to `control` and returning
/// `Err(Cancelled)` between sweeps, replays and passes once it is cancelled.
pub fn diagnose_with(
    trace: &Trace,
    settings: &Settings,
    control: &Control,
) -> Result<Diagnosis, Cancelled> {
    let stages = 5.0;
    let progress = |done: f64| control.progress("diagnosis", done / stages);
    progress(0.0);
    let own = settings.swept_trace(trace);
    let mut sweep = Sweep::with_budget(&own, settings.ledger_budget);
    // A sub-stage's fraction of the sweep, as a fraction of the whole.
    let within = |stage: f64| {
        move |_: &str, done: f64| control.progress("diagnosis", (stage + done) / stages)
    };
    let own_progress = within(0.0);
    sweep.run_to_end_with(
        &Control::new(Some(&own_progress), control.cancel()),
        "sweep",
    )?;
    progress(1.0);
    let is_reference = trace.dtype() == Dtype::F64 && settings.subnormals == Subnormals::Keep;
    let reference_trace;
    let mut reference_sweep = None;
    if !is_reference {
        reference_trace = trace.retyped(Dtype::F64, Subnormals::Keep);
        let mut reference = Sweep::with_budget(&reference_trace, settings.ledger_budget);
        let reference_progress = within(1.0);
        reference.run_to_end_with(
            &Control::new(Some(&reference_progress), control.cancel()),
            "sweep",
        )?;
        reference_sweep = Some(reference);
    }
    progress(2.0);
    let reference = reference_sweep.as_ref().unwrap_or(&sweep);
    // The two analyses are independent: one on each core.
    let (own_analysis, reference_analysis) = match &reference_sweep {
        Some(reference) => {
            let (own, theirs) = rayon::join(
                || analyse(&sweep, Some(reference), settings),
                || analyse(reference, None, settings),
            );
            (own, Some(theirs))
        }
        None => (analyse(&sweep, None, settings), None),
    };
    let reference_analysis = reference_analysis.as_ref().unwrap_or(&own_analysis);
    control.check()?;
    progress(3.0);
    let gains = edge_gains(&sweep);
    let paths = dominant_paths(&sweep, &gains);
    let groups = group_norms(&sweep);
    control.check()?;
    progress(4.0);
    // The forward check recomputes every node: it runs beside the replays,
    // whose two sweeps of unequal length leave a core idle otherwise.
    let (health, replays) = rayon::join(
        || forward_health(trace, settings, &groups),
        || {
            replays(
                trace,
                settings,
                (&sweep, &own_analysis),
                (reference, reference_analysis),
                &Control::new(Some(&within(4.0)), control.cancel()),
            )
        },
    );
    let replays = replays?;
    control.check()?;
    // Moved, not copied: on a long chain the causes hold arrays per node.
    let SweepAnalysis {
        mut findings,
        causes,
        masking,
    } = own_analysis;
    findings.extend(health.findings);
    findings.sort_by_key(|finding| (finding.step, finding.rule));
    // Scalar adjoints gathered into one array (a million-node chain must not
    // cost a million small vectors); tensor adjoints read in place.
    let (mut scalars, mut tensors) = (Vec::new(), Vec::new());
    for adjoint in trace
        .sweep_order()
        .iter()
        .filter_map(|&node| reference.adjoint(node))
    {
        match adjoint.as_ref() {
            crate::tensor::Value::Scalar(x) => scalars.push(*x),
            crate::tensor::Value::Tensor(_) => tensors.push(adjoint),
        }
    }
    let widened: Vec<_> = tensors.iter().map(|adjoint| adjoint.to_f64()).collect();
    let entries: Vec<&[f64]> = std::iter::once(&scalars[..])
        .chain(widened.iter().map(|entries| &entries[..]))
        .collect();
    let loss_scale = loss_scale_of(&entries, settings.subnormals);
    let gradient_values: Vec<_> = trace
        .params()
        .filter_map(|param| sweep.adjoint(param))
        .collect();
    let gradient_data: Vec<_> = gradient_values
        .iter()
        .map(|adjoint| adjoint.to_f64())
        .collect();
    let gradients: Vec<&[f64]> = gradient_data.iter().map(|data| &data[..]).collect();
    let clipping = ClipPreview::new(&gradients, settings.clip_norm);
    let gradient_norms = trace
        .params()
        .filter_map(|param| {
            sweep
                .adjoint(param)
                .map(|adjoint| (param, adjoint.l2_norm()))
        })
        .collect();
    let mut diagnosis = Diagnosis {
        settings: settings.clone(),
        dtype: trace.dtype(),
        findings,
        origins: causes.origins.clone(),
        paths,
        groups,
        gradient_norms,
        replays,
        loss_scale,
        clipping,
        advice: Vec::new(),
        repeats: Vec::new(),
        forward: health.forward,
        saturation: health.saturation,
        dead: health.dead,
        activation_spread: health.spread,
        masked: masking.masked,
        headline: String::new(),
        causes,
    };
    diagnosis.repeats = repeats(trace, &diagnosis);
    diagnosis.advice = advise(trace, &diagnosis);
    diagnosis.headline = headline(trace, &diagnosis);
    control.progress("diagnosis", 1.0);
    Ok(diagnosis)
}

/// The precision replays the settings ask for, in their order. A replay
/// that equals a sweep already made takes it and its analysis: the f64 one
/// with gradual underflow is the reference, and the trace's own dtype, when
/// every node already has it, is the sweep just made. The others run in
/// parallel, one per core.
fn replays(
    trace: &Trace,
    settings: &Settings,
    (own, own_analysis): (&Sweep, &SweepAnalysis),
    (reference, reference_analysis): (&Sweep, &SweepAnalysis),
    control: &Control,
) -> Result<Vec<ReplayRun>, Cancelled> {
    use rayon::prelude::*;
    let reuses = |dtype: Dtype| {
        if dtype == Dtype::F64 && settings.subnormals == Subnormals::Keep {
            Some((reference, reference_analysis))
        } else if own.trace().is_already(dtype, settings.subnormals) {
            Some((own, own_analysis))
        } else {
            None
        }
    };
    let total = settings.replay.len().max(1) as f64;
    // Reported under the lock, so fractions from two threads arrive in order.
    let done = std::sync::Mutex::new(0usize);
    let finished = || {
        let mut count = done
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner);
        *count += 1;
        control.progress("replay", *count as f64 / total);
    };
    let one = |&dtype: &Dtype| -> Result<ReplayRun, Cancelled> {
        control.check()?;
        let run = match reuses(dtype) {
            Some((sweep, analysis)) => replay::compared(
                trace,
                dtype,
                settings,
                sweep,
                analysis,
                reference,
                &reference_analysis.findings,
            ),
            // Only cancellation: two sweeps at once have no one fraction to report.
            None => replay::swept_anew(
                trace,
                dtype,
                settings,
                (reference, &reference_analysis.findings),
                &Control::new(None, control.cancel()),
            )?,
        };
        finished();
        Ok(run)
    };
    // Each replay sweeps a re-typed copy of the trace: two at once double
    // that memory, which on a long chain is most of the peak. Big traces
    // replay one at a time.
    if trace.nodes().len() <= PARALLEL_REPLAY_NODES {
        settings.replay.par_iter().map(one).collect()
    } else {
        settings.replay.iter().map(one).collect()
    }
}

/// Traces up to this many nodes replay in parallel.
const PARALLEL_REPLAY_NODES: usize = 100_000;

/// The forward checks and the findings of their rules.
struct ForwardHealth {
    forward: ForwardCheck,
    saturation: Vec<Saturation>,
    dead: Vec<DeadUnits>,
    spread: Option<(usize, f64, usize)>,
    findings: Vec<Finding>,
}

/// Forward consistency and forward health, read from the recorded values.
fn forward_health(trace: &Trace, settings: &Settings, groups: &[GroupNorm]) -> ForwardHealth {
    let mut collector = rules::Collector::new(settings, trace.dtype());
    let forward = if settings.is_on(Rule::ForwardMismatch) {
        check_forward(trace, settings.forward_slack)
    } else {
        ForwardCheck::default()
    };
    for mismatch in &forward.mismatches {
        collector.push(
            Rule::ForwardMismatch,
            mismatch.node,
            mismatch.step,
            Site::Value,
            Measure::ForwardError,
            (mismatch.element, mismatch.error(), mismatch.count),
            mismatch.tolerance,
        );
    }
    let saturation = saturation(trace, settings.saturated_below);
    for found in saturation
        .iter()
        .filter(|found| found.fraction() >= settings.saturated_fraction)
    {
        collector.push(
            Rule::Saturated,
            found.node,
            found.step,
            Site::Value,
            Measure::SaturatedFraction,
            (found.element, found.fraction(), found.saturated),
            settings.saturated_fraction,
        );
    }
    let dead = dead_units(trace);
    for found in dead
        .iter()
        .filter(|found| found.fraction() >= settings.dead_fraction)
    {
        collector.push(
            Rule::DeadRelu,
            found.node,
            found.step,
            Site::Value,
            Measure::DeadFraction,
            (found.first, found.fraction(), found.dead),
            settings.dead_fraction,
        );
    }
    let spread = activation_spread(groups);
    if let Some((at, ratio, _)) = spread {
        let growth = settings.activation_growth;
        let crossed = if ratio > growth {
            Some(growth)
        } else if ratio < 1.0 / growth {
            Some(1.0 / growth)
        } else {
            None
        };
        // The finding sits at the group's largest activation.
        let node = trace
            .sweep_order()
            .iter()
            .copied()
            .filter(|&node| {
                let recorded = trace.node(node);
                recorded.group == groups[at].group && !recorded.op.is_leaf()
            })
            .max_by(|&a, &b| {
                trace
                    .node(a)
                    .value
                    .l2_norm()
                    .total_cmp(&trace.node(b).value.l2_norm())
            });
        if let (Some(threshold), Some(node)) = (crossed, node) {
            collector.push(
                Rule::ActivationGrowth,
                node,
                trace.sweep_rank(node).expect("a swept node"),
                Site::Value,
                Measure::RmsToDeepest,
                (0, ratio, 1),
                threshold,
            );
        }
    }
    ForwardHealth {
        forward,
        saturation,
        dead,
        spread,
        findings: collector.finish(),
    }
}

/// The repeating structure along the dominant path of every parameter
/// flagged vanishing or exploding, the longest first.
fn repeats(trace: &Trace, diagnosis: &Diagnosis) -> Vec<Repeat> {
    let mut found: Vec<Repeat> = diagnosis
        .findings
        .iter()
        .filter(|finding| matches!(finding.rule, Rule::Vanishing | Rule::Exploding))
        .filter_map(|finding| diagnosis.path_to(finding.node))
        .filter_map(|path| find_repeat(trace, path))
        .collect();
    found.sort_by_key(|repeat| std::cmp::Reverse((repeat.count, repeat.hops)));
    found
}

/// "'a' … 'b'": where a repeat's factor first and last acts, by group when
/// the groups tell the repeats apart, else by node.
fn repeat_span(trace: &Trace, repeat: &Repeat) -> String {
    let (first, last) = repeat.factor_nodes;
    let (a, b) = (&trace.node(first).group, &trace.node(last).group);
    if a != b && !a.is_empty() && !b.is_empty() {
        format!("'{a}' … '{b}'")
    } else {
        format!("'{}' … '{}'", trace.node(first).id, trace.node(last).id)
    }
}

/// The repeated gain in one phrase: "a recurrent gain of ×1.2 per step,
/// repeated 49 times ('unrolled/t50' … 'unrolled/t02'), ×7592 in all".
fn repeat_phrase(trace: &Trace, repeat: &Repeat) -> String {
    use crate::format::short;
    let span = repeat_span(trace, repeat);
    let total = short(repeat.total());
    match repeat.factor {
        Factor::Weight {
            param,
            shared: true,
        } => format!(
            "a recurrent gain of ×{} per step through '{}', repeated {} times ({span}), ×{total} in all",
            short(repeat.gain),
            trace.node(param).id,
            repeat.count
        ),
        Factor::Activation { op } => format!(
            "the {} layers ({span}, {} of them) multiply the adjoint by about ×{} per layer, ×{total} in all",
            op.name(),
            repeat.count,
            short(repeat.gain)
        ),
        _ => format!(
            "a gain of ×{} per {}, repeated {} times ({span}), ×{total} in all",
            short(repeat.gain),
            repeat.unit(),
            repeat.count
        ),
    }
}

/// The one line naming the cause.
fn headline(trace: &Trace, diagnosis: &Diagnosis) -> String {
    let id = |node: usize| trace.node(node).id.as_str();
    if let Some(origin) = diagnosis.first_origin() {
        return format!(
            "origin ({}) {} at '{}' ({}), step {}",
            origin.class.letter(),
            origin.class.title(),
            id(origin.node),
            trace.node(origin.node).op_name,
            origin.step + 1
        );
    }
    if let Some(mismatch) = diagnosis.forward.mismatches.first() {
        let more = match diagnosis.forward.mismatches.len() {
            1 => String::new(),
            n => format!(" ({n} nodes disagree)"),
        };
        return format!(
            "forward value of '{}' ({}) is {} where its op gives {}: the trace disagrees with its own inputs{more}",
            id(mismatch.node),
            trace.node(mismatch.node).op_name,
            crate::format::short(mismatch.recorded),
            crate::format::short(mismatch.recomputed)
        );
    }
    let worst = |rule: Rule| {
        diagnosis
            .findings
            .iter()
            .filter(move |finding| finding.rule == rule)
            .map(|finding| finding.node)
    };
    if let Some(repeat) = diagnosis.repeats.first() {
        let direction = if repeat.gain > 1.0 {
            "exploding"
        } else {
            "vanishing"
        };
        // A shared weight is named in the phrase already; an activation's bound is worth a clause.
        let why = match repeat.factor {
            Factor::Weight { shared: true, .. } => String::new(),
            _ => format!("; {}", repeat::factor_text(trace, repeat)),
        };
        return format!(
            "{direction} gradients: {}{why}",
            repeat_phrase(trace, repeat)
        );
    }
    for rule in [Rule::Exploding, Rule::Vanishing] {
        if let Some(param) = worst(rule).next() {
            return format!(
                "{} gradient at '{}'{}",
                rule.name(),
                id(param),
                diagnosis
                    .gradient_norms
                    .iter()
                    .find(|(node, _)| *node == param)
                    .map_or(String::new(), |(_, norm)| format!(
                        " (norm {})",
                        compact(*norm)
                    ))
            );
        }
    }
    if diagnosis.dtype == Dtype::F16
        && let Some(scale) = &diagnosis.loss_scale
        && scale.underflow_unscaled > 0.0
    {
        let zeros = (scale.underflow_unscaled * scale.nonzero as f64).round();
        let first = diagnosis
            .findings
            .iter()
            .find(|finding| {
                finding.rule == Rule::Underflow
                    && finding
                        .measures
                        .iter()
                        .any(|m| m.measure == Measure::FlushedToZero)
            })
            .map_or(String::new(), |finding| {
                format!(
                    ", first at '{}' (step {})",
                    id(finding.node),
                    finding.step + 1
                )
            });
        let fix = if scale.underflow_scaled < scale.underflow_unscaled {
            format!(
                "scaling the loss by 2^{} = {} keeps {}",
                scale.exponent,
                compact(scale.scale),
                if scale.underflow_scaled == 0.0 {
                    "every one".to_string()
                } else {
                    format!("all but {}", crate::format::percent(scale.underflow_scaled))
                }
            )
        } else {
            "loss scaling cannot keep them: accumulate those adjoints in f32".to_string()
        };
        return format!(
            "underflow in f16: {zeros} of {} non-zero adjoint entries ({}) flush to zero{first}; {fix}",
            scale.nonzero,
            crate::format::percent(scale.underflow_unscaled)
        );
    }
    if diagnosis.findings.is_empty() {
        return match diagnosis.masked.len() {
            0 => format!("clean: no rule fired in {}", diagnosis.dtype),
            n => format!(
                "clean: no rule fired in {}; {n} masked {} hold −inf that later ops absorb (a mask)",
                diagnosis.dtype,
                if n == 1 { "node" } else { "nodes" }
            ),
        };
    }
    let rules: std::collections::BTreeSet<&str> = diagnosis
        .findings
        .iter()
        .map(|finding| finding.rule.name())
        .collect();
    format!(
        "every adjoint is finite; {} findings ({})",
        diagnosis.findings.len(),
        rules.into_iter().collect::<Vec<_>>().join(", ")
    )
}

/// The advice, most pressing first.
fn advise(trace: &Trace, diagnosis: &Diagnosis) -> Vec<Advice> {
    let id = |node: usize| trace.node(node).id.as_str();
    let mut advice = Vec::new();
    if let Some(origin) = diagnosis.first_origin() {
        advice.push(Advice {
            topic: Topic::Origin,
            node: Some(origin.node),
            text: origin_advice(trace, origin),
        });
    }
    let clip = &diagnosis.clipping;
    let norm_of = |param: usize| {
        diagnosis
            .gradient_norms
            .iter()
            .find(|(node, _)| *node == param)
            .map_or(f64::NAN, |&(_, norm)| norm)
    };
    // Exploding relative to the median alone is not advised on: in a network
    // whose lower layers vanish, the healthy top looks large against them.
    let exploding = diagnosis
        .findings
        .iter()
        .filter(|finding| {
            finding.rule == Rule::Exploding && finding.measure != Measure::NormToMedian
        })
        .map(|finding| finding.node)
        .max_by(|&a, &b| norm_of(a).total_cmp(&norm_of(b)));
    // The longest run tells the structure best, whichever parameter it ends at.
    let repeat_of = |_: usize| diagnosis.repeats.first();
    if let Some(param) = exploding {
        let clipping = format!(
            "Clipping the global norm {} at {} would scale every gradient by {}.",
            compact(clip.norm),
            compact(clip.threshold),
            compact(clip.factor)
        );
        let text = match repeat_of(param) {
            Some(repeat) => {
                let remedy = match repeat.factor {
                    Factor::Weight { shared: true, .. } => {
                        "Keep the recurrent weight's largest singular value at or below 1 (an orthogonal initialisation, or a gated cell), or shorten the unroll (truncated backpropagation through time)."
                    }
                    _ => {
                        "Keep each layer's gain near 1 (initialisation scaled to the layer's width, normalisation between layers)."
                    }
                };
                format!(
                    "The gradient of '{}' is exploding (norm {}): {}; {}. {remedy} {clipping}",
                    id(param),
                    compact(norm_of(param)),
                    repeat_phrase(trace, repeat),
                    repeat::factor_text(trace, repeat)
                )
            }
            None => {
                let along = diagnosis
                    .path_to(param)
                    .and_then(|path| path.strongest().map(|hop| (path, hop)))
                    .map_or(String::new(), |(path, hop)| {
                        along_path(path, hop, "largest", &id)
                    });
                format!(
                    "The gradient of '{}' is exploding (norm {}){along}. {clipping}",
                    id(param),
                    compact(norm_of(param))
                )
            }
        };
        advice.push(Advice {
            topic: Topic::Exploding,
            node: Some(param),
            text,
        });
    }
    let vanishing = diagnosis
        .findings
        .iter()
        .filter(|finding| finding.rule == Rule::Vanishing)
        .map(|finding| finding.node)
        .min_by(|&a, &b| norm_of(a).total_cmp(&norm_of(b)));
    if let Some(param) = vanishing {
        let text = match repeat_of(param) {
            Some(repeat) => {
                let remedy = match repeat.factor {
                    Factor::Activation { .. } => {
                        "Use an activation whose derivative stays near 1 where the units work (ReLU and its kin), add skip connections, or normalise between layers."
                    }
                    Factor::Weight { shared: true, .. } => {
                        "A recurrent weight with gain below 1 forgets: a gated cell (LSTM, GRU) or an orthogonal initialisation keeps the gain near 1."
                    }
                    _ => {
                        "Shorten that path (a skip connection), or initialise so that each layer's gain stays near 1."
                    }
                };
                format!(
                    "The gradient of '{}' is vanishing (norm {}): {}; {}. {remedy}",
                    id(param),
                    compact(norm_of(param)),
                    repeat_phrase(trace, repeat),
                    repeat::factor_text(trace, repeat)
                )
            }
            None => {
                let along = diagnosis
                    .path_to(param)
                    .and_then(|path| path.weakest().map(|hop| (path, hop)))
                    .map_or(String::new(), |(path, hop)| {
                        along_path(path, hop, "weakest", &id)
                    });
                let steepest = diagnosis
                    .groups
                    .windows(2)
                    .filter_map(|pair| pair[1].ratio.map(|ratio| (pair, ratio)))
                    .min_by(|a, b| a.1.total_cmp(&b.1));
                let groups = steepest.filter(|(_, ratio)| *ratio < 1.0).map_or(
                    String::new(),
                    |(pair, ratio)| {
                        format!(
                            " Group by group, the adjoint norm falls fastest from '{}' to '{}' (×{}).",
                            pair[0].group,
                            pair[1].group,
                            compact(ratio)
                        )
                    },
                );
                format!(
                    "The gradient of '{}' is vanishing (norm {}){along}.{groups} Shorten that path (a skip connection), or use an activation or initialisation whose gains stay near 1.",
                    id(param),
                    compact(norm_of(param))
                )
            }
        };
        advice.push(Advice {
            topic: Topic::Vanishing,
            node: Some(param),
            text,
        });
    }
    let half = diagnosis.replay_in(Dtype::F16);
    if let (Some(scale), Some(run)) = (&diagnosis.loss_scale, half)
        && (run.first_underflow().is_some() || diagnosis.dtype == Dtype::F16)
        && scale.underflow_unscaled > 0.0
    {
        advice.push(Advice {
            topic: Topic::LossScale,
            node: run.first_underflow().map(|finding| finding.node),
            text: loss_scale_advice(scale),
        });
    }
    for run in &diagnosis.replays {
        if run.dtype.limits().precision >= diagnosis.dtype.limits().precision
            && run.dtype != Dtype::F16
        {
            continue;
        }
        if let Some(finding) = run.first_overflow()
            && !diagnosis
                .findings
                .iter()
                .any(|own| own.rule == Rule::NonFinite || own.rule == Rule::Overflow)
        {
            advice.push(Advice {
                topic: Topic::Overflow,
                node: Some(finding.node),
                text: overflow_advice(trace, run.dtype, finding),
            });
        }
        if let Some(lost) = run.first_lost()
            && run.dtype != diagnosis.dtype
        {
            advice.push(Advice {
                topic: Topic::LostPrecision,
                node: Some(lost.node),
                text: format!(
                    "In {}, {} contributions are swamped by the adjoint they are added to, first at '{}' (step {}: {} + {} gave {}). Accumulate adjoints in f32.",
                    run.dtype,
                    run.lost_total,
                    id(lost.node),
                    lost.step + 1,
                    compact(lost.before),
                    compact(lost.contribution),
                    compact(lost.after)
                ),
            });
        }
    }
    advice
}

/// Loss-scale advice for entries that round to zero in f16 (only asked for
/// when some do): scale when the scale rescues them, else say why it cannot.
fn loss_scale_advice(scale: &LossScale) -> String {
    let head = format!(
        "In f16, {} of the non-zero adjoint entries ({} of {}) round to zero.",
        crate::format::percent(scale.underflow_unscaled),
        (scale.underflow_unscaled * scale.nonzero as f64).round(),
        scale.nonzero
    );
    if scale.underflow_scaled < scale.underflow_unscaled {
        format!(
            "{head} Scale the loss by S = 2^{} = {} (the largest power of two keeping max |adjoint| {} · S below 65504) and divide the gradients by S before the update: then {} round to zero.",
            scale.exponent,
            compact(scale.scale),
            compact(scale.max_abs),
            crate::format::percent(scale.underflow_scaled)
        )
    } else {
        format!(
            "{head} Loss scaling cannot rescue them: the largest adjoint {} leaves room for S = 2^{} only, and these entries are smaller than 2^-24 by more than that. Keep those adjoints in f32 or bf16.",
            compact(scale.max_abs),
            scale.exponent
        )
    }
}

/// Advice for the first overflow of a narrower dtype, by where it happened:
/// a forward value is out of that dtype's range before any adjoint is.
fn overflow_advice(trace: &Trace, dtype: Dtype, finding: &Finding) -> String {
    let id = &trace.node(finding.node).id;
    let step = finding.step + 1;
    let max = compact(dtype.limits().max_finite());
    match finding.site {
        Site::Value => format!(
            "In {dtype}, the forward value of '{id}' (step {step}) overflows: {} is beyond {dtype}'s largest finite value {max}. Compute '{id}' in f32 (or bf16, which has f32's exponent range), or rescale what feeds it.",
            compact(finding.value)
        ),
        Site::Partial { slot } => format!(
            "In {dtype}, the partial of '{id}' on input {slot} (step {step}) overflows {dtype}'s largest finite value {max}. Keep its inputs in range, or compute it in f32 or bf16."
        ),
        Site::Contribution { to, .. } => format!(
            "In {dtype}, the contribution '{id}' sends to '{}' (step {step}) overflows {dtype}'s largest finite value {max}. Keep that adjoint in range: a smaller loss scale, clipping, or bf16, which has f32's exponent range.",
            trace.node(to).id
        ),
        Site::Adjoint | Site::Outgoing => format!(
            "In {dtype}, the adjoint of '{id}' (step {step}) overflows {dtype}'s largest finite value {max}. Keep it in range: a smaller loss scale, clipping, or bf16, which has f32's exponent range."
        ),
    }
}

/// The advice for the first origin, by class and op.
fn origin_advice(trace: &Trace, origin: &Origin) -> String {
    use crate::ops::Op;
    let node = trace.node(origin.node);
    let id = &node.id;
    let x = origin.operands.first().copied().unwrap_or(f64::NAN);
    match origin.class {
        OriginClass::NonFiniteValue if origin.leak => match node.op {
            Op::Softmax | Op::LogSoftmax => format!(
                "A row of '{id}' is masked entirely: leave at least one place of every row unmasked (the diagonal of a causal mask), or fill with a large finite negative number instead of −inf."
            ),
            _ => format!(
                "A mask's −inf reaches '{id}', which does not absorb it: add the mask to the scores before softmax, not after."
            ),
        },
        OriginClass::NonFiniteValue => match node.op {
            Op::Input | Op::Param | Op::Const => {
                format!(
                    "'{id}' holds a non-finite number as recorded: check the data or the parameter update that produced it."
                )
            }
            Op::Log => {
                format!(
                    "Keep the argument of '{id}' away from 0 (log(max(x, ε))), or compute log-probabilities directly with log_softmax."
                )
            }
            Op::Sqrt => format!(
                "The input of '{id}' went negative: clamp it at 0, or find why (a variance computed as E[x²] − E[x]² can dip below 0 by rounding)."
            ),
            Op::Div if x == 0.0 => format!(
                "Guard the division at '{id}': add ε to the denominator or mask the 0/0 case."
            ),
            Op::Div => format!("Guard the division at '{id}': add ε to the denominator."),
            Op::Exp => format!(
                "Shift the argument of '{id}' by its maximum before exp (the log-sum-exp shift), or clamp it."
            ),
            _ => format!(
                "Guard the inputs of '{id}' ({}) so that it stays finite.",
                node.op_name
            ),
        },
        OriginClass::NonFinitePartial => format!(
            "The value of '{id}' is fine but its derivative is infinite there: add ε inside ({}(x + ε)) or keep its input away from that point.",
            node.op_name
        ),
        OriginClass::ProductOverflow => format!(
            "The adjoint overflowed while being pulled back through '{id}': clip the gradient, rescale the inputs of '{id}', or in f16 lower the loss scale."
        ),
        OriginClass::SumOverflow => format!(
            "Each contribution to '{id}' is finite but their sum is not: rescale, clip, or accumulate the adjoints in a wider dtype."
        ),
        OriginClass::NanFromInfinity if origin.operands.first() == Some(&0.0) => format!(
            "Make the input of '{id}' safe before the op (e.g. replace it by 1 where the branch is masked out) instead of masking the output: a zero adjoint times an infinite partial is NaN."
        ),
        OriginClass::NanFromInfinity => {
            format!(
                "Terms overflowed before they cancelled at '{id}': rescale its inputs or accumulate in a wider dtype."
            )
        }
        OriginClass::NonFiniteSeed => "Seed the output with a finite adjoint.".to_string(),
    }
}

/// "; along its dominant path of N hops the gains multiply to G (median hop
/// gain M), the {which} being H at 'a' → 'b'": the sentence the vanishing and
/// exploding advice share.
fn along_path<'t>(
    path: &DominantPath,
    hop: &Hop,
    which: &str,
    id: &impl Fn(usize) -> &'t str,
) -> String {
    format!(
        "; along its dominant path of {} hops the gains multiply to {} (median hop gain {}), the {which} being {} at '{}' → '{}'",
        path.hops.len(),
        crate::format::power_of_ten(path.log10_gain),
        compact(path.median_gain()),
        compact(hop.gain),
        id(hop.from),
        id(hop.to)
    )
}
