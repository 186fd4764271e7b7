//! The diagnosis section of the check report: the library's index-based
//! results turned into node ids, 1-based steps and JSON-safe numbers, and
//! the text `ebb check` prints.
//!
//! JSON fields (additive to report schema 1): `diagnosis` {`clean`,
//! `settings`, `first_origin`, `origins` [{`class`, `letter`, `title`,
//! `node`, `op`, `step`, `first_adjoint`, `from`, `slot`, `operands`,
//! `result`, `explanation`, `reached` [{`param`, `chain`, `length`,
//! `omitted`}]}], `nan_births` [{`node`, `step`, `from`, `how`}], `findings` [{`rule`, `node`, `op`, `step`, `site`, `slot`,
//! `to`, `measure`, `value`, `threshold`, `element`, `count`, `class`}],
//! `dominant_paths` [{`param`, `log10_gain`, `length`, `omitted`, `hops`
//! [{`from`, `to`, `slot`, `gain`}]}], `groups` [{`group`, `depth`, `nodes`,
//! `adjoint_norm`, `param_norm`, `ratio`}], `replay` [{`dtype`,
//! `subnormals`, `findings`, `findings_total`, `first_overflow`, `first_underflow`,
//! `first_lost`, `lost_total`, `origins`, `gradients` [{`param`, `norm`,
//! `reference_norm`, `relative_error`}]}], `loss_scale` {`max_abs`,
//! `exponent`, `scale`, `nonzero`, `underflow_unscaled`,
//! `underflow_scaled`}, `clipping` {`norm`, `threshold`, `factor`, `clips`},
//! `advice` [{`topic`, `node`, `text`}]}.

use crate::diagnose::{
    Advice, Diagnosis, Finding, LostContribution, Measure, Origin, Rule, Settings, Site, Topic,
};
use crate::format::compact;
use crate::trace::{Num, Trace};
use serde::Serialize;
use std::fmt::Write;

/// Longest chain or path written out in full; longer ones keep both ends.
pub const CHAIN_LIMIT: usize = 64;

/// The diagnosis section.
#[derive(Debug, Clone, Serialize)]
pub struct DiagnosisReport {
    /// One line naming the cause (the report's first line after `diagnosis`).
    pub headline: String,
    /// Repeating structures behind vanishing or exploding gradients, longest first.
    pub repeats: Vec<RepeatEntry>,
    /// True when no rule fired in the trace's own dtype.
    pub clean: bool,
    /// The thresholds and options used.
    pub settings: Settings,
    /// The earliest origin of a non-finite adjoint.
    pub first_origin: Option<OriginEntry>,
    /// Every origin, in the order born.
    pub origins: Vec<OriginEntry>,
    /// Where infinite adjoints turned into NaN downstream of their origins.
    pub nan_births: Vec<NanBirthEntry>,
    /// Every rule's findings, in sweep order.
    pub findings: Vec<FindingEntry>,
    /// Each parameter's dominant path.
    pub dominant_paths: Vec<PathEntry>,
    /// Per-group adjoint norms, shallowest first.
    pub groups: Vec<GroupEntry>,
    /// Forward consistency: recorded values against the op table's.
    pub forward: ForwardEntry,
    /// Sigmoid and tanh nodes with saturated units.
    pub saturation: Vec<SaturationEntry>,
    /// ReLU nodes with units dead for the whole batch.
    pub dead_units: Vec<DeadEntry>,
    /// The group whose activations are furthest from the input side's.
    pub activation_spread: Option<SpreadEntry>,
    /// One entry per replay dtype.
    pub replay: Vec<ReplayEntry>,
    /// Loss-scale advice for f16.
    pub loss_scale: Option<crate::diagnose::LossScale>,
    /// The clipping preview.
    pub clipping: ClipEntry,
    /// What to do, most pressing first.
    pub advice: Vec<AdviceEntry>,
}

/// A structure repeated along a dominant path.
#[derive(Debug, Clone, Serialize)]
pub struct RepeatEntry {
    /// The parameter whose dominant path it is on.
    pub param: String,
    /// Hops per repeat.
    pub period: usize,
    /// Full repeats.
    pub repeats: usize,
    /// How many times the factor's hop occurs.
    pub count: usize,
    /// Gain per repeat (geometric mean).
    pub gain: Num,
    /// Gain of the whole run.
    pub total: Num,
    /// `activation`, `weight` or `op`.
    pub factor: &'static str,
    /// The op behind the factor (the activation, or the op of the hop).
    pub op: String,
    /// For a weight: the parameter.
    pub weight: Option<String>,
    /// For a weight: whether every repeat uses it (a recurrent weight).
    pub shared: bool,
    /// The factor's hop's median gain.
    pub factor_gain: Num,
    /// Where the factor first and last acts (nodes).
    pub from: String,
    /// Where it last acts.
    pub to: String,
    /// Their groups.
    pub from_group: String,
    /// The last one's group.
    pub to_group: String,
    /// "layer" or "step".
    pub unit: &'static str,
}

/// A chain of node ids, both ends kept when long.
#[derive(Debug, Clone, Serialize)]
pub struct ChainEntry {
    /// The parameter at its end.
    pub param: String,
    /// Node ids from the origin to the parameter.
    pub chain: Vec<String>,
    /// Nodes in the whole chain.
    pub length: usize,
    /// Nodes left out of `chain` in its middle.
    pub omitted: usize,
    /// How many of the chain's first hops follow the non-finite forward value
    /// (each node an input of the next) before the adjoint takes over (each
    /// node an input of the one before).
    pub forward: usize,
}

/// One origin.
#[derive(Debug, Clone, Serialize)]
pub struct OriginEntry {
    /// Class name.
    pub class: crate::diagnose::OriginClass,
    /// Class letter a–e (or `seed`).
    pub letter: &'static str,
    /// Class title.
    pub title: &'static str,
    /// Node id where it was born.
    pub node: String,
    /// That node's op.
    pub op: String,
    /// The origin node's own 1-based step.
    pub step: usize,
    /// The node whose adjoint became non-finite first.
    pub first_adjoint: String,
    /// The 1-based step at which that adjoint became non-finite.
    pub first_adjoint_step: usize,
    /// The node pulled back, for an edge.
    pub from: Option<String>,
    /// The edge's input slot.
    pub slot: Option<usize>,
    /// The numbers involved.
    pub operands: Vec<Num>,
    /// The offending result.
    pub result: Num,
    /// One sentence.
    pub explanation: String,
    /// Each parameter reached, with its chain.
    pub reached: Vec<ChainEntry>,
}

/// Where an infinite adjoint turned into NaN.
#[derive(Debug, Clone, Serialize)]
pub struct NanBirthEntry {
    /// The node whose adjoint became NaN.
    pub node: String,
    /// 1-based step.
    pub step: usize,
    /// The node whose contribution did it.
    pub from: String,
    /// Which operation made the NaN.
    pub how: crate::diagnose::NanHow,
}

/// One finding.
#[derive(Debug, Clone, Serialize)]
pub struct FindingEntry {
    /// The rule.
    pub rule: Rule,
    /// Node id.
    pub node: String,
    /// Its op.
    pub op: String,
    /// 1-based step.
    pub step: usize,
    /// `value`, `partial`, `contribution`, `adjoint` or `outgoing`.
    pub site: &'static str,
    /// Input slot, for a partial or contribution.
    pub slot: Option<usize>,
    /// Receiving node, for a contribution.
    pub to: Option<String>,
    /// What was measured.
    pub measure: Measure,
    /// The offending number.
    pub value: Num,
    /// The threshold.
    pub threshold: Num,
    /// First offending element.
    pub element: usize,
    /// Offending elements.
    pub count: usize,
    /// Root-cause class letter, for a non-finite adjoint.
    pub class: Option<&'static str>,
    /// Every measurement of this rule at this node (the finding's own first):
    /// there is one finding per node and rule.
    pub measures: Vec<MeasurementEntry>,
}

/// One measurement of a finding.
#[derive(Debug, Clone, Serialize)]
pub struct MeasurementEntry {
    /// `value`, `partial`, `contribution`, `adjoint` or `outgoing`.
    pub site: &'static str,
    /// Input slot, for a partial or contribution.
    pub slot: Option<usize>,
    /// Receiving node, for a contribution.
    pub to: Option<String>,
    /// What was measured.
    pub measure: Measure,
    /// The number.
    pub value: Num,
    /// The threshold.
    pub threshold: Num,
    /// First offending element.
    pub element: usize,
    /// Offending elements.
    pub count: usize,
    /// Whether it crossed the threshold.
    pub crossed: bool,
}

/// One hop of a dominant path.
#[derive(Debug, Clone, Serialize)]
pub struct HopEntry {
    /// Node pulled back.
    pub from: String,
    /// Node receiving.
    pub to: String,
    /// Input slot.
    pub slot: usize,
    /// The hop's gain.
    pub gain: Num,
}

/// One dominant path.
#[derive(Debug, Clone, Serialize)]
pub struct PathEntry {
    /// The parameter.
    pub param: String,
    /// log10 of the product of gains.
    pub log10_gain: Num,
    /// Hops in the whole path.
    pub length: usize,
    /// Hops left out in the middle.
    pub omitted: usize,
    /// The hops from the output, both ends kept when long.
    pub hops: Vec<HopEntry>,
}

/// One group's norms.
#[derive(Debug, Clone, Serialize)]
pub struct GroupEntry {
    /// Scope path.
    pub group: String,
    /// Fewest hops from the output.
    pub depth: usize,
    /// Swept nodes.
    pub nodes: usize,
    /// L2 norm of the group's adjoints.
    pub adjoint_norm: Num,
    /// L2 norm of its parameter gradients.
    pub param_norm: Option<Num>,
    /// Over the previous group's adjoint norm.
    pub ratio: Option<Num>,
    /// L2 norm of the group's activations (non-leaf forward values with more
    /// than one element, the output excepted).
    pub value_norm: Option<Num>,
    /// Their root mean square.
    pub value_rms: Option<Num>,
}

/// The forward consistency check.
#[derive(Debug, Clone, Serialize)]
pub struct ForwardEntry {
    /// Catalog nodes recomputed.
    pub checked: usize,
    /// Custom nodes (no forward rule).
    pub custom: usize,
    /// Nodes beyond tolerance.
    pub mismatches: Vec<MismatchEntry>,
}

/// One node whose recorded forward value disagrees with its op.
#[derive(Debug, Clone, Serialize)]
pub struct MismatchEntry {
    /// Node id.
    pub node: String,
    /// Its op.
    pub op: String,
    /// 1-based step.
    pub step: usize,
    /// The element furthest beyond tolerance.
    pub element: usize,
    /// Its recorded value.
    pub recorded: Num,
    /// The op table's value.
    pub recomputed: Num,
    /// Its tolerance.
    pub tolerance: Num,
    /// Elements beyond tolerance.
    pub count: usize,
}

/// A sigmoid or tanh node with saturated units.
#[derive(Debug, Clone, Serialize)]
pub struct SaturationEntry {
    /// Node id.
    pub node: String,
    /// Its op.
    pub op: String,
    /// 1-based step.
    pub step: usize,
    /// Saturated units.
    pub saturated: usize,
    /// All units.
    pub units: usize,
    /// The most saturated unit.
    pub element: usize,
    /// Its input.
    pub input: Num,
    /// Its derivative over the peak derivative.
    pub relative_derivative: Num,
}

/// A ReLU node with dead units.
#[derive(Debug, Clone, Serialize)]
pub struct DeadEntry {
    /// Node id.
    pub node: String,
    /// 1-based step.
    pub step: usize,
    /// Units 0 in every row.
    pub dead: usize,
    /// All units.
    pub units: usize,
    /// Rows of the batch.
    pub rows: usize,
    /// The first dead unit.
    pub first: usize,
}

/// The group whose activations are furthest from the input side's.
#[derive(Debug, Clone, Serialize)]
pub struct SpreadEntry {
    /// That group.
    pub group: String,
    /// Its activation RMS over the input side's.
    pub ratio: Num,
    /// The group nearest the inputs.
    pub deepest: String,
}

/// One lost contribution.
#[derive(Debug, Clone, Serialize)]
pub struct LostEntry {
    /// 1-based step.
    pub step: usize,
    /// Receiving node.
    pub node: String,
    /// Sending node.
    pub from: String,
    /// Element.
    pub element: usize,
    /// The contribution.
    pub contribution: Num,
    /// Adjoint before.
    pub before: Num,
    /// Adjoint after.
    pub after: Num,
    /// Fraction lost.
    pub lost: Num,
}

/// One parameter's gradient in a replay.
#[derive(Debug, Clone, Serialize)]
pub struct ReplayGradientEntry {
    /// The parameter.
    pub param: String,
    /// Norm in the replay dtype.
    pub norm: Num,
    /// Norm in f64.
    pub reference_norm: Num,
    /// Largest elementwise error relative to the largest reference entry.
    pub relative_error: Num,
}

/// One replay.
#[derive(Debug, Clone, Serialize)]
pub struct ReplayEntry {
    /// The dtype every value, partial and adjoint is stored in.
    pub dtype: crate::dtype::Dtype,
    /// The dtype matmul, convolution and reduction sums accumulate in.
    pub accumulate: crate::dtype::Dtype,
    /// Kept or flushed subnormals.
    pub subnormals: crate::dtype::Subnormals,
    /// Findings in this dtype that f64 does not have.
    pub findings: usize,
    /// All findings in this dtype.
    pub findings_total: usize,
    /// Where it first overflows.
    pub first_overflow: Option<FindingEntry>,
    /// Where it first underflows.
    pub first_underflow: Option<FindingEntry>,
    /// Where it first loses a contribution.
    pub first_lost: Option<LostEntry>,
    /// Contributions lost in all.
    pub lost_total: usize,
    /// Root causes in this dtype.
    pub origins: Vec<OriginEntry>,
    /// Parameter gradients side by side with f64.
    pub gradients: Vec<ReplayGradientEntry>,
}

/// The clipping preview.
#[derive(Debug, Clone, Serialize)]
pub struct ClipEntry {
    /// Global gradient norm.
    pub norm: Num,
    /// Threshold.
    pub threshold: Num,
    /// Factor clipping applies.
    pub factor: Num,
    /// Whether it clips.
    pub clips: bool,
}

/// One piece of advice.
#[derive(Debug, Clone, Serialize)]
pub struct AdviceEntry {
    /// What it is about.
    pub topic: Topic,
    /// The node it points at.
    pub node: Option<String>,
    /// What to do.
    pub text: String,
}

/// Keeps both ends of a long list.
fn ends<T: Clone>(items: &[T]) -> (Vec<T>, usize) {
    if items.len() <= CHAIN_LIMIT {
        return (items.to_vec(), 0);
    }
    let head = CHAIN_LIMIT / 2;
    let tail = CHAIN_LIMIT - head;
    let mut kept = items[..head].to_vec();
    kept.extend_from_slice(&items[items.len() - tail..]);
    (kept, items.len() - CHAIN_LIMIT)
}

fn site_name(site: Site) -> (&'static str, Option<usize>, Option<usize>) {
    match site {
        Site::Value => ("value", None, None),
        Site::Partial { slot } => ("partial", Some(slot), None),
        Site::Contribution { slot, to } => ("contribution", Some(slot), Some(to)),
        Site::Adjoint => ("adjoint", None, None),
        Site::Outgoing => ("outgoing", None, None),
    }
}

fn finding_entry(trace: &Trace, finding: &Finding) -> FindingEntry {
    let node = trace.node(finding.node);
    let (site, slot, to) = site_name(finding.site);
    FindingEntry {
        rule: finding.rule,
        node: node.id.clone(),
        op: node.op_name.to_string(),
        step: finding.step + 1,
        site,
        slot,
        to: to.map(|to| trace.node(to).id.clone()),
        measure: finding.measure,
        value: Num(finding.value),
        threshold: Num(finding.threshold),
        element: finding.element,
        count: finding.count,
        class: finding.class.map(|class| class.letter()),
        measures: finding
            .measures
            .iter()
            .map(|measured| {
                let (site, slot, to) = site_name(measured.site);
                MeasurementEntry {
                    site,
                    slot,
                    to: to.map(|to| trace.node(to).id.clone()),
                    measure: measured.measure,
                    value: Num(measured.value),
                    threshold: Num(measured.threshold),
                    element: measured.element,
                    count: measured.count,
                    crossed: measured.crossed,
                }
            })
            .collect(),
    }
}

fn origin_entry(
    trace: &Trace,
    origin: &Origin,
    chain_of: &dyn Fn(usize) -> (Vec<usize>, usize),
) -> OriginEntry {
    let id = |node: usize| trace.node(node).id.clone();
    OriginEntry {
        class: origin.class,
        letter: origin.class.letter(),
        title: origin.class.title(),
        node: id(origin.node),
        op: trace.node(origin.node).op_name.to_string(),
        step: origin.step + 1,
        first_adjoint: id(origin.first_adjoint),
        first_adjoint_step: origin.first_adjoint_step + 1,
        from: origin.edge.map(|(from, _)| id(from)),
        slot: origin.edge.map(|(_, slot)| slot),
        operands: origin.operands.iter().map(|&x| Num(x)).collect(),
        result: Num(origin.result),
        explanation: origin.explanation.clone(),
        reached: origin
            .reached
            .iter()
            .map(|&param| {
                let (chain, forward) = chain_of(param);
                let (kept, omitted) = ends(&chain);
                ChainEntry {
                    param: id(param),
                    chain: kept.into_iter().map(id).collect(),
                    length: chain.len(),
                    omitted,
                    forward,
                }
            })
            .collect(),
    }
}

fn lost_entry(trace: &Trace, lost: &LostContribution) -> LostEntry {
    LostEntry {
        step: lost.step + 1,
        node: trace.node(lost.node).id.clone(),
        from: trace.node(lost.from).id.clone(),
        element: lost.element,
        contribution: Num(lost.contribution),
        before: Num(lost.before),
        after: Num(lost.after),
        lost: Num(lost.lost),
    }
}

fn advice_entry(trace: &Trace, advice: &Advice) -> AdviceEntry {
    AdviceEntry {
        topic: advice.topic,
        node: advice.node.map(|node| trace.node(node).id.clone()),
        text: advice.text.clone(),
    }
}

impl DiagnosisReport {
    /// The section for `diagnosis` of `trace`.
    pub fn new(trace: &Trace, diagnosis: &Diagnosis) -> DiagnosisReport {
        let id = |node: usize| trace.node(node).id.clone();
        let chain_of = |node: usize| (diagnosis.chain_to(node), diagnosis.forward_hops(node));
        let origins: Vec<OriginEntry> = diagnosis
            .origins
            .iter()
            .map(|origin| origin_entry(trace, origin, &chain_of))
            .collect();
        let first_origin = diagnosis
            .first_origin()
            .map(|origin| origin_entry(trace, origin, &chain_of));
        let dominant_paths = diagnosis
            .paths
            .iter()
            .map(|path| {
                let (hops, omitted) = ends(&path.hops);
                PathEntry {
                    param: id(path.param),
                    log10_gain: Num(path.log10_gain),
                    length: path.hops.len(),
                    omitted,
                    hops: hops
                        .iter()
                        .map(|hop| HopEntry {
                            from: id(hop.from),
                            to: id(hop.to),
                            slot: hop.slot,
                            gain: Num(hop.gain),
                        })
                        .collect(),
                }
            })
            .collect();
        let groups = diagnosis
            .groups
            .iter()
            .map(|group| GroupEntry {
                group: group.group.clone(),
                depth: group.depth,
                nodes: group.nodes,
                adjoint_norm: Num(group.adjoint_norm),
                param_norm: group.param_norm.map(Num),
                ratio: group.ratio.map(Num),
                value_norm: group.value_norm.map(Num),
                value_rms: group.value_rms.map(Num),
            })
            .collect();
        let forward = ForwardEntry {
            checked: diagnosis.forward.checked,
            custom: diagnosis.forward.custom,
            mismatches: diagnosis
                .forward
                .mismatches
                .iter()
                .map(|m| MismatchEntry {
                    node: id(m.node),
                    op: trace.node(m.node).op_name.to_string(),
                    step: m.step + 1,
                    element: m.element,
                    recorded: Num(m.recorded),
                    recomputed: Num(m.recomputed),
                    tolerance: Num(m.tolerance),
                    count: m.count,
                })
                .collect(),
        };
        let saturation = diagnosis
            .saturation
            .iter()
            .map(|found| SaturationEntry {
                node: id(found.node),
                op: trace.node(found.node).op_name.to_string(),
                step: found.step + 1,
                saturated: found.saturated,
                units: found.units,
                element: found.element,
                input: Num(found.input),
                relative_derivative: Num(found.relative_derivative),
            })
            .collect();
        let dead_units = diagnosis
            .dead
            .iter()
            .map(|found| DeadEntry {
                node: id(found.node),
                step: found.step + 1,
                dead: found.dead,
                units: found.units,
                rows: found.rows,
                first: found.first,
            })
            .collect();
        let activation_spread =
            diagnosis
                .activation_spread
                .map(|(at, ratio, deepest)| SpreadEntry {
                    group: diagnosis.groups[at].group.clone(),
                    ratio: Num(ratio),
                    deepest: diagnosis.groups[deepest].group.clone(),
                });
        let replay = diagnosis
            .replays
            .iter()
            .map(|run| ReplayEntry {
                dtype: run.dtype,
                accumulate: run.accumulate,
                subnormals: run.subnormals,
                findings: run.findings.len(),
                findings_total: run.findings_total,
                first_overflow: run
                    .first_overflow()
                    .map(|finding| finding_entry(trace, finding)),
                first_underflow: run
                    .first_underflow()
                    .map(|finding| finding_entry(trace, finding)),
                first_lost: run.first_lost().map(|lost| lost_entry(trace, lost)),
                lost_total: run.lost_total,
                // Chains are the main sweep's business; a replay names its origins only.
                origins: run
                    .origins
                    .iter()
                    .map(|origin| origin_entry(trace, origin, &|_| (Vec::new(), 0)))
                    .collect(),
                gradients: run
                    .gradients
                    .iter()
                    .map(|g| ReplayGradientEntry {
                        param: id(g.param),
                        norm: Num(g.norm),
                        reference_norm: Num(g.reference_norm),
                        relative_error: Num(g.relative_error),
                    })
                    .collect(),
            })
            .collect();
        let clip = &diagnosis.clipping;
        let repeats = diagnosis
            .repeats
            .iter()
            .map(|repeat| {
                use crate::diagnose::Factor;
                let (factor, op, weight, shared) = match repeat.factor {
                    Factor::Activation { op } => ("activation", op.name().to_string(), None, false),
                    Factor::Weight { param, shared } => (
                        "weight",
                        trace.node(repeat.factor_nodes.0).op_name.to_string(),
                        Some(id(param)),
                        shared,
                    ),
                    Factor::Op { op } => ("op", op.name().to_string(), None, false),
                };
                let (from, to) = repeat.factor_nodes;
                RepeatEntry {
                    param: id(repeat.param),
                    period: repeat.period,
                    repeats: repeat.repeats,
                    count: repeat.count,
                    gain: Num(repeat.gain),
                    total: Num(repeat.total()),
                    factor,
                    op,
                    weight,
                    shared,
                    factor_gain: Num(repeat.factor_gain),
                    from: id(from),
                    to: id(to),
                    from_group: trace.node(from).group.clone(),
                    to_group: trace.node(to).group.clone(),
                    unit: repeat.unit(),
                }
            })
            .collect();
        DiagnosisReport {
            headline: diagnosis.headline.clone(),
            repeats,
            clean: diagnosis.is_clean(),
            settings: diagnosis.settings.clone(),
            first_origin,
            origins,
            nan_births: diagnosis
                .nan_births()
                .iter()
                .map(|birth| NanBirthEntry {
                    node: id(birth.node),
                    step: birth.step + 1,
                    from: id(birth.from),
                    how: birth.how,
                })
                .collect(),
            findings: diagnosis
                .findings
                .iter()
                .map(|finding| finding_entry(trace, finding))
                .collect(),
            dominant_paths,
            groups,
            forward,
            saturation,
            dead_units,
            activation_spread,
            replay,
            loss_scale: diagnosis.loss_scale,
            clipping: ClipEntry {
                norm: Num(clip.norm),
                threshold: Num(clip.threshold),
                factor: Num(clip.factor),
                clips: clip.clips,
            },
            advice: diagnosis
                .advice
                .iter()
                .map(|advice| advice_entry(trace, advice))
                .collect(),
        }
    }

    /// The short diagnosis printed before everything else: the headline
    /// naming the cause, the origin's chains, the advice.
    pub fn summary_text(&self, dtype: &str) -> String {
        let _ = dtype;
        self.summary_text_fit(None)
    }

    /// [`DiagnosisReport::summary_text`] with chains fitted into `width` columns.
    pub fn summary_text_fit(&self, width: Option<usize>) -> String {
        let mut out = String::new();
        let _ = writeln!(out, "diagnosis  {}", self.headline);
        match &self.first_origin {
            Some(origin) => {
                let _ = writeln!(out, "           {}", origin.explanation);
                for reached in origin.reached.iter().take(3) {
                    let _ = writeln!(
                        out,
                        "  chain    {}",
                        chain_text(reached, width.map(|w| w.saturating_sub(11)))
                    );
                    if let Some(birth) = self
                        .nan_births
                        .iter()
                        .find(|birth| reached.chain.contains(&birth.node))
                    {
                        let _ = writeln!(
                            out,
                            "           turned into NaN at '{}' (step {}, from '{}': {})",
                            birth.node,
                            birth.step,
                            birth.from,
                            birth.how.phrase()
                        );
                    }
                }
                if origin.reached.len() > 3 {
                    let more = origin.reached.len() - 3;
                    let _ = writeln!(
                        out,
                        "           … and {more} more {}",
                        if more == 1 { "parameter" } else { "parameters" }
                    );
                }
                if origin.reached.is_empty() {
                    let _ = writeln!(out, "  chain    reaches no parameter");
                }
                if self.origins.len() > 1 {
                    let _ = writeln!(
                        out,
                        "           {} origins in all (see below)",
                        self.origins.len()
                    );
                }
            }
            None if self.clean || self.headline.starts_with("every adjoint is finite") => {}
            None => {
                let rules: Vec<&str> = self
                    .findings
                    .iter()
                    .map(|finding| finding.rule_name())
                    .collect::<std::collections::BTreeSet<_>>()
                    .into_iter()
                    .collect();
                let _ = writeln!(
                    out,
                    "           every adjoint is finite; {} findings ({})",
                    self.findings.len(),
                    rules.join(", ")
                );
            }
        }
        for (k, advice) in self.advice.iter().enumerate() {
            let label = if k == 0 { "  advice" } else { "" };
            let _ = writeln!(out, "{label:<11}{}", advice.text);
        }
        out
    }

    /// The details printed after the gradients and flags.
    pub fn details_text(&self) -> String {
        self.details_text_fit(None)
    }

    /// [`DiagnosisReport::details_text`] with chains and paths fitted into `width` columns.
    pub fn details_text_fit(&self, width: Option<usize>) -> String {
        let mut out = String::new();
        out.push_str(&self.findings_text());
        if self.origins.len() > 1 {
            let _ = writeln!(out, "origins  {} in the order born", self.origins.len());
            for origin in &self.origins {
                let _ = writeln!(
                    out,
                    "  ({}) step {:<5} '{}' ({}): {}",
                    origin.letter, origin.step, origin.node, origin.op, origin.explanation
                );
                for reached in &origin.reached {
                    let _ = writeln!(
                        out,
                        "      {}",
                        chain_text(reached, width.map(|w| w.saturating_sub(6)))
                    );
                }
            }
        }
        out.push_str(&self.paths_text(width));
        out.push_str(&self.groups_text());
        out.push_str(&self.forward_text());
        out.push_str(&self.replay_text());
        if let Some(scale) = &self.loss_scale {
            let _ = writeln!(
                out,
                "loss scale (f16)  S = 2^{} = {}; max |adjoint| {}; {} of {} non-zero entries round to zero unscaled, {} at S",
                scale.exponent,
                compact(scale.scale),
                compact(scale.max_abs),
                crate::format::percent(scale.underflow_unscaled),
                scale.nonzero,
                crate::format::percent(scale.underflow_scaled)
            );
        }
        let clip = &self.clipping;
        let effect = if !clip.norm.0.is_finite() {
            "cannot help: the global norm is not finite".to_string()
        } else if clip.clips {
            format!("scales every gradient by {}", compact(clip.factor.0))
        } else {
            "leaves the gradient unchanged".to_string()
        };
        let _ = writeln!(
            out,
            "clipping  global norm {}; clipping at {} {effect}",
            compact(clip.norm.0),
            compact(clip.threshold.0)
        );
        out
    }

    fn findings_text(&self) -> String {
        if self.findings.is_empty() {
            return "findings none\n".to_string();
        }
        const SHOWN: usize = 40;
        let mut out = format!("findings {} in sweep order\n", self.findings.len());
        for finding in self.findings.iter().take(SHOWN) {
            let class = finding
                .class
                .map_or(String::new(), |letter| format!("  origin ({letter})"));
            let measures: Vec<String> = finding
                .measures
                .iter()
                .map(|measured| measurement_text(finding.rule, measured))
                .collect();
            let _ = writeln!(
                out,
                "  step {:<5} {:<12} {:<13} {}{class}",
                finding.step,
                format!("'{}'", finding.node),
                finding.rule_name(),
                measures.join("; ")
            );
        }
        if self.findings.len() > SHOWN {
            let _ = writeln!(
                out,
                "  … {} more (all of them in --json)",
                self.findings.len() - SHOWN
            );
        }
        out
    }

    fn paths_text(&self, width: Option<usize>) -> String {
        if self.dominant_paths.is_empty() {
            return String::new();
        }
        let mut out = String::from("dominant paths  (product of per-hop gains, output first)\n");
        for path in &self.dominant_paths {
            let head = format!(
                "  {:<12} gain {:<10} ",
                path.param,
                crate::format::power_of_ten(path.log10_gain.0)
            );
            let room = width.map(|w| w.saturating_sub(head.chars().count()));
            let _ = writeln!(out, "{head}{}", hops_text(path, room));
        }
        out
    }

    fn groups_text(&self) -> String {
        if self.groups.len() < 2 {
            return String::new();
        }
        let mut out = String::from("groups  by depth from the output\n");
        let _ = writeln!(
            out,
            "  {:<24} {:>5} {:>6} {:>13} {:>13} {:>11} {:>14}",
            "group", "depth", "nodes", "adjoint norm", "param norm", "ratio", "activation rms"
        );
        for group in &self.groups {
            let name = if group.group.is_empty() {
                "(no group)"
            } else {
                group.group.as_str()
            };
            let _ = writeln!(
                out,
                "  {:<24} {:>5} {:>6} {:>13} {:>13} {:>11} {:>14}",
                name,
                group.depth,
                group.nodes,
                compact(group.adjoint_norm.0),
                group
                    .param_norm
                    .map_or("—".to_string(), |norm| compact(norm.0)),
                group
                    .ratio
                    .map_or("—".to_string(), |ratio| compact(ratio.0)),
                group
                    .value_rms
                    .map_or("—".to_string(), |rms| compact(rms.0))
            );
        }
        out
    }

    /// Forward consistency and forward health.
    fn forward_text(&self) -> String {
        let mut out = String::new();
        let forward = &self.forward;
        let custom = if forward.custom > 0 {
            format!(
                "; {} custom {} not recomputed (no forward rule)",
                forward.custom,
                if forward.custom == 1 { "node" } else { "nodes" }
            )
        } else {
            String::new()
        };
        let _ = writeln!(
            out,
            "forward  {} catalog nodes recomputed from their recorded inputs under the precision model{custom}: {}",
            forward.checked,
            match forward.mismatches.len() {
                0 => "every value agrees within its dtype's tolerance".to_string(),
                n => format!("{n} disagree"),
            }
        );
        for m in &forward.mismatches {
            let many = if m.count > 1 {
                format!(", {} elements beyond tolerance", m.count)
            } else {
                String::new()
            };
            let _ = writeln!(
                out,
                "  step {:<5} '{}' ({}) recorded {} where the op gives {} (element {}; tolerance {}{many})",
                m.step,
                m.node,
                m.op,
                crate::format::number(m.recorded.0),
                crate::format::number(m.recomputed.0),
                m.element,
                compact(m.tolerance.0)
            );
        }
        for found in &self.saturation {
            let _ = writeln!(
                out,
                "  saturated  '{}' ({}): {} of {} units, the most at element {} (input {}, derivative {} of its peak)",
                found.node,
                found.op,
                found.saturated,
                found.units,
                found.element,
                compact(found.input.0),
                compact(found.relative_derivative.0)
            );
        }
        for found in &self.dead_units {
            let _ = writeln!(
                out,
                "  dead ReLU  '{}': {} of {} units are 0 in all {} rows (first unit {})",
                found.node, found.dead, found.units, found.rows, found.first
            );
        }
        if let Some(spread) = &self.activation_spread {
            let _ = writeln!(
                out,
                "  activations  '{}' has {} times the activation RMS of '{}', the group nearest the inputs",
                spread.group,
                compact(spread.ratio.0),
                spread.deepest
            );
        }
        out
    }

    fn replay_text(&self) -> String {
        if self.replay.is_empty() {
            return String::new();
        }
        let mut out = String::from(
            "precision replay  (the same step stored in each dtype, its sums accumulated in the second, against f64)\n",
        );
        let first = |finding: &Option<FindingEntry>| {
            finding.as_ref().map_or("—".to_string(), |f| {
                format!("'{}' step {}", f.node, f.step)
            })
        };
        let _ = writeln!(
            out,
            "  {:<10} {:<26} {:<26} {:<26} gradient norms",
            "dtypes", "first overflow", "first underflow", "first lost contribution"
        );
        for run in &self.replay {
            let lost = run.first_lost.as_ref().map_or("—".to_string(), |lost| {
                format!(
                    "'{}' step {} ({} in all)",
                    lost.node, lost.step, run.lost_total
                )
            });
            let gradients: Vec<String> = run
                .gradients
                .iter()
                .take(4)
                .map(|g| format!("{} {}", g.param, compact(g.norm.0)))
                .collect();
            let more = if run.gradients.len() > 4 { ", …" } else { "" };
            let _ = writeln!(
                out,
                "  {:<10} {:<26} {:<26} {:<26} {}{more}",
                format!("{}/{}", run.dtype.name(), run.accumulate.name()),
                first(&run.first_overflow),
                first(&run.first_underflow),
                lost,
                gradients.join(", ")
            );
        }
        out
    }
}

impl FindingEntry {
    fn rule_name(&self) -> &'static str {
        self.rule.name()
    }
}

/// One measurement as `site: measure value (threshold t)`, without the
/// threshold for non-finite numbers and marked when it did not cross.
fn measurement_text(rule: Rule, measured: &MeasurementEntry) -> String {
    let place = match (&measured.to, measured.slot) {
        (Some(to), Some(slot)) => format!("{} to '{to}' (input {slot})", measured.site),
        (None, Some(slot)) => format!("{} on input {slot}", measured.site),
        _ => measured.site.to_string(),
    };
    let many = if measured.count > 1 {
        format!(" ({} elements)", measured.count)
    } else {
        String::new()
    };
    let value = compact(measured.value.0);
    if rule == Rule::NonFinite || !measured.value.0.is_finite() {
        return format!("{place}: {} {value}{many}", measure_name(measured.measure));
    }
    let against = if measured.crossed {
        format!("threshold {}", compact(measured.threshold.0))
    } else {
        format!("threshold {}: not crossed", compact(measured.threshold.0))
    };
    format!(
        "{place}: {} {value} ({against}){many}",
        measure_name(measured.measure)
    )
}

fn measure_name(measure: Measure) -> &'static str {
    match measure {
        Measure::Element => "element",
        Measure::Subnormal => "subnormal",
        Measure::FlushedToZero => "flushed to zero, was",
        Measure::Norm => "norm",
        Measure::NormToSeed => "norm/seed",
        Measure::NormToMedian => "norm/median",
        Measure::Gain => "gain",
        Measure::ForwardError => "|recorded − recomputed|",
        Measure::SaturatedFraction => "saturated fraction",
        Measure::DeadFraction => "dead fraction",
        Measure::RmsToDeepest => "activation RMS / the input side's",
    }
}

/// A path as `out → a ×g → b ×g …`, with runs of three or more hops of
/// the same gain folded into one, fitted into `width` characters.
fn hops_text(path: &PathEntry, width: Option<usize>) -> String {
    let mut pieces: Vec<(String, usize)> = path
        .hops
        .first()
        .map(|hop| vec![(hop.from.clone(), 0)])
        .unwrap_or_default();
    let mut k = 0;
    while k < path.hops.len() {
        if path.omitted > 0 && k == CHAIN_LIMIT / 2 {
            pieces.push((format!(" → … {} hops …", path.omitted), path.omitted));
        }
        let gain = compact(path.hops[k].gain.0);
        // A run may not span the gap where hops were left out.
        let limit = if path.omitted > 0 && k < CHAIN_LIMIT / 2 {
            CHAIN_LIMIT / 2 - k
        } else {
            usize::MAX
        };
        let run = path.hops[k..]
            .iter()
            .take_while(|hop| compact(hop.gain.0) == gain)
            .count()
            .min(limit)
            .max(1);
        if run >= 3 {
            pieces.push((
                format!(
                    " → {} … {} ({run} hops ×{gain} each)",
                    path.hops[k].to,
                    path.hops[k + run - 1].to
                ),
                run,
            ));
        } else {
            pieces.extend(
                path.hops[k..k + run]
                    .iter()
                    .map(|hop| (format!(" → {} ×{}", hop.to, compact(hop.gain.0)), 1)),
            );
        }
        k += run;
    }
    super::fit::fit(&pieces, width, |hops| format!(" → … {hops} hops …"))
}

/// A chain as `'a' ⇒ 'b' → 'c' → 'd'`: `⇒` where the non-finite forward
/// value feeds a consumer, `→` where the adjoint flows to an input; fitted
/// into `width` characters with its note.
fn chain_text(reached: &ChainEntry, width: Option<usize>) -> String {
    let mut pieces: Vec<(String, usize)> = Vec::new();
    for (k, id) in reached.chain.iter().enumerate() {
        if reached.omitted > 0 && k == CHAIN_LIMIT / 2 {
            pieces.push((format!(" → … {} nodes …", reached.omitted), reached.omitted));
        }
        // Position in the whole chain of the hop that ends at this node.
        let hop = if reached.omitted > 0 && k >= CHAIN_LIMIT / 2 {
            k + reached.omitted
        } else {
            k
        };
        let arrow = match k {
            0 => "",
            _ if hop <= reached.forward => " ⇒ ",
            _ => " → ",
        };
        pieces.push((format!("{arrow}'{id}'"), 1));
    }
    let hops = reached.length.saturating_sub(1);
    let forward = if reached.forward > 0 {
        format!(
            "; the value feeds ⇒ for {}, then the adjoint flows →",
            if reached.forward == 1 {
                "1 hop".to_string()
            } else {
                format!("{} hops", reached.forward)
            }
        )
    } else {
        String::new()
    };
    let note = format!(
        "  ({hops} {} to '{}'{forward})",
        if hops == 1 { "hop" } else { "hops" },
        reached.param
    );
    let room = width.map(|width| width.saturating_sub(note.chars().count()));
    let out = super::fit::fit(&pieces, room, |nodes| format!(" → … {nodes} nodes …"));
    format!("{out}{note}")
}
