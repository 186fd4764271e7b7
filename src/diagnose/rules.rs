//! The flag rules, run as an analysis over a finished sweep and its ledger, so
//! that `Sweep::step` stays as fast as before when no diagnosis is asked for.
//!
//! Each rule looks at forward values, partials, contributions and adjoints in
//! the sweep's dtype, and every finding records the node, the step, the
//! rule, the offending number and the threshold it crossed.

use super::origin::OriginClass;
use super::settings::Settings;
use crate::dtype::Dtype;
use crate::sweep::{FlagKind, Sweep};
use crate::tensor::scan::{self, PairTest};
use crate::tensor::{Elements, Survey, Value, l2_norm};
use serde::{Deserialize, Serialize};

/// A flag rule.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Rule {
    /// NaN, +inf or −inf in a value, a partial, a contribution or an adjoint.
    NonFinite,
    /// A magnitude beyond the dtype's largest finite value (or rounded to infinity from finite operands).
    Overflow,
    /// A finite magnitude within the warning band below the largest finite value.
    NearOverflow,
    /// A non-zero number that is subnormal in the dtype or was flushed to zero.
    Underflow,
    /// A parameter gradient norm below a threshold.
    Vanishing,
    /// A parameter gradient norm above a threshold.
    Exploding,
    /// A node whose contributions to non-leaf inputs are far larger or smaller than its adjoint.
    Gain,
    /// A recorded forward value that its op, recomputed from the recorded
    /// inputs under the precision model, does not give within tolerance.
    ForwardMismatch,
    /// A sigmoid or tanh node with too many units whose derivative is nearly 0.
    Saturated,
    /// A ReLU node with too many units that are 0 for every row of the batch.
    DeadRelu,
    /// Activations (forward values) that grow or shrink too much from the
    /// group nearest the inputs to another group.
    ActivationGrowth,
}

impl Rule {
    /// Every rule, in report order.
    pub const ALL: [Rule; 11] = [
        Rule::NonFinite,
        Rule::Overflow,
        Rule::NearOverflow,
        Rule::Underflow,
        Rule::Vanishing,
        Rule::Exploding,
        Rule::Gain,
        Rule::ForwardMismatch,
        Rule::Saturated,
        Rule::DeadRelu,
        Rule::ActivationGrowth,
    ];

    /// The rule's name in settings and JSON.
    pub fn name(self) -> &'static str {
        match self {
            Rule::NonFinite => "non_finite",
            Rule::Overflow => "overflow",
            Rule::NearOverflow => "near_overflow",
            Rule::Underflow => "underflow",
            Rule::Vanishing => "vanishing",
            Rule::Exploding => "exploding",
            Rule::Gain => "gain",
            Rule::ForwardMismatch => "forward_mismatch",
            Rule::Saturated => "saturated",
            Rule::DeadRelu => "dead_relu",
            Rule::ActivationGrowth => "activation_growth",
        }
    }

    /// The rule by its name in settings and JSON.
    pub fn from_name(name: &str) -> Option<Rule> {
        Rule::ALL.into_iter().find(|rule| rule.name() == name)
    }

    /// A short label for people: "non-finite", "dead ReLU", …
    pub fn label(self) -> &'static str {
        match self {
            Rule::NonFinite => "non-finite",
            Rule::Overflow => "overflow",
            Rule::NearOverflow => "near overflow",
            Rule::Underflow => "underflow",
            Rule::Vanishing => "vanishing",
            Rule::Exploding => "exploding",
            Rule::Gain => "gain",
            Rule::ForwardMismatch => "forward mismatch",
            Rule::Saturated => "saturated",
            Rule::DeadRelu => "dead ReLU",
            Rule::ActivationGrowth => "activation growth",
        }
    }

    /// True for the rules read from the forward values alone (no sweep).
    pub fn is_forward(self) -> bool {
        matches!(
            self,
            Rule::ForwardMismatch | Rule::Saturated | Rule::DeadRelu | Rule::ActivationGrowth
        )
    }
}

/// Where in the sweep a finding was made.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "snake_case", tag = "at")]
pub enum Site {
    /// The node's recorded forward value.
    Value,
    /// The local partial on input edge `slot` of the node.
    Partial {
        /// Input slot.
        slot: usize,
    },
    /// The contribution the node sent along input edge `slot` to node `to`.
    Contribution {
        /// Input slot.
        slot: usize,
        /// The receiving node.
        to: usize,
    },
    /// The node's adjoint (for a parameter, its gradient).
    Adjoint,
    /// All contributions the node sent, against its adjoint.
    Outgoing,
}

/// What number a finding compares with its threshold.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Measure {
    /// One element's value.
    Element,
    /// One element that is subnormal in the dtype.
    Subnormal,
    /// One element that is zero here but non-zero in the f64 reference sweep (`value` holds the reference).
    FlushedToZero,
    /// An L2 norm.
    Norm,
    /// An L2 norm divided by the seed's norm.
    NormToSeed,
    /// An L2 norm divided by the median parameter gradient norm.
    NormToMedian,
    /// Outgoing contributions' norm divided by the adjoint's norm.
    Gain,
    /// |recorded − recomputed| forward value (`threshold`: that element's tolerance).
    ForwardError,
    /// The fraction of a node's units that are saturated.
    SaturatedFraction,
    /// The fraction of a ReLU node's units that are dead for the whole batch.
    DeadFraction,
    /// A group's activation RMS over that of the group nearest the inputs.
    RmsToDeepest,
}

/// One number a rule measured at a node: where, what, against which threshold.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Measurement {
    /// Where.
    pub site: Site,
    /// What was measured.
    pub measure: Measure,
    /// The number.
    pub value: f64,
    /// The threshold it is compared with (for a non-finite number, the
    /// dtype's largest finite value, for reference only).
    pub threshold: f64,
    /// Flat index of the first offending element.
    pub element: usize,
    /// Offending elements.
    pub count: usize,
    /// Whether it crossed its threshold. A gradient-norm finding carries all
    /// three measures (norm, over the seed's norm, over the median), crossed or not.
    pub crossed: bool,
}

/// One rule's finding at one node: the first measurement that crossed its
/// threshold (in `site` … `count`) and every measurement of that rule at that
/// node (in `measures`, the first one included). There is at most one
/// finding per node and rule.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Finding {
    /// The rule.
    pub rule: Rule,
    /// The node.
    pub node: usize,
    /// The sweep step (0-based) at which it happened.
    pub step: usize,
    /// Where.
    pub site: Site,
    /// What was measured.
    pub measure: Measure,
    /// The offending number.
    pub value: f64,
    /// The threshold it crossed (for non-finite numbers, the largest finite value).
    pub threshold: f64,
    /// Flat index of the first offending element.
    pub element: usize,
    /// Offending elements.
    pub count: usize,
    /// For a non-finite adjoint, the class of its root cause.
    pub class: Option<OriginClass>,
    /// Every measurement of this rule at this node, in the order made; the
    /// first crossed one is the finding's own.
    pub measures: Vec<Measurement>,
}

impl Finding {
    /// A finding made of one measurement.
    #[allow(clippy::too_many_arguments)]
    pub fn single(
        rule: Rule,
        node: usize,
        step: usize,
        site: Site,
        measure: Measure,
        (element, value, count): (usize, f64, usize),
        threshold: f64,
    ) -> Finding {
        Finding {
            rule,
            node,
            step,
            site,
            measure,
            value,
            threshold,
            element,
            count,
            class: None,
            measures: vec![Measurement {
                site,
                measure,
                value,
                threshold,
                element,
                count,
                crossed: true,
            }],
        }
    }

    /// Whether the threshold means anything for this finding: not for a
    /// non-finite number, whatever the rule that saw it.
    pub fn has_threshold(&self) -> bool {
        self.rule != Rule::NonFinite && self.value.is_finite()
    }

    /// One line for a flags pane: what was found where, against which
    /// threshold, in `dtype` (the dtype of the sweep that raised it).
    pub fn describe(&self, trace: &crate::trace::Trace, dtype: Dtype) -> String {
        use crate::format::compact;
        let node = trace.node(self.node);
        let place = match self.site {
            Site::Value => "the forward value".to_string(),
            Site::Partial { slot } => format!("the partial on input {slot}"),
            Site::Contribution { to, .. } => format!("the contribution to '{}'", trace.node(to).id),
            Site::Adjoint if node.op == crate::ops::Op::Param => "the gradient".to_string(),
            Site::Adjoint => "the adjoint".to_string(),
            Site::Outgoing => "what it passes on".to_string(),
        };
        let (value, threshold) = (compact(self.value), compact(self.threshold));
        let what = match (self.rule, self.measure) {
            (Rule::NonFinite, _) => format!("{place} is {value}"),
            (Rule::Overflow, _) if !self.value.is_finite() => {
                format!("{place} overflowed {dtype}'s largest finite value {threshold}")
            }
            (Rule::Overflow, _) => {
                format!("{place} {value} is beyond {dtype}'s largest finite value {threshold}")
            }
            (Rule::NearOverflow, _) => {
                format!("{place} {value} is within the warning band, above {threshold}")
            }
            (Rule::Underflow, Measure::FlushedToZero) => {
                format!("{place} is 0 in {dtype} where f64 gives {value}")
            }
            (Rule::Underflow, _) => {
                format!("{place} {value} is subnormal in {dtype} (below {threshold})")
            }
            (Rule::Vanishing | Rule::Exploding, measure) => {
                let direction = if self.rule == Rule::Vanishing {
                    "below"
                } else {
                    "above"
                };
                let of = match measure {
                    Measure::NormToSeed => "norm over the seed's norm",
                    Measure::NormToMedian => "norm over the median parameter gradient norm",
                    _ => "norm",
                };
                format!("{place}'s {of} {value} is {direction} {threshold}")
            }
            (Rule::Gain, _) => {
                format!("passes on {value} times its adjoint's norm (threshold {threshold})")
            }
            (Rule::ForwardMismatch, _) => {
                format!("{place} is off by {value} from what its op gives (tolerance {threshold})")
            }
            (Rule::Saturated, _) => {
                format!("a fraction {value} of its units is saturated (threshold {threshold})")
            }
            (Rule::DeadRelu, _) => {
                format!("a fraction {value} of its units is 0 in every row (threshold {threshold})")
            }
            (Rule::ActivationGrowth, _) => format!(
                "its group's activation RMS is {value} times the input side's (threshold {threshold})"
            ),
        };
        let many = if self.count > 1 {
            format!(" ({} elements, first at {})", self.count, self.element)
        } else {
            String::new()
        };
        let class = self.class.map_or(String::new(), |class| {
            format!("; origin ({}) {}", class.letter(), class.title())
        });
        format!("{}: {what}{many}{class}", self.rule.name())
    }
}

/// What the rules read: the sweep and the f64 reference it is compared with.
pub(super) struct RuleInput<'a, 's> {
    pub sweep: &'a Sweep<'s>,
    /// The same trace swept in f64 with gradual underflow; `None` when the sweep is that reference.
    pub reference: Option<&'a Sweep<'s>>,
    pub settings: &'a Settings,
}

/// Collects findings for one sweep, one per node and rule.
pub(super) struct Collector<'a> {
    pub settings: &'a Settings,
    pub dtype: Dtype,
    pub findings: Vec<Finding>,
    /// Where the finding of each (rule, node) is in `findings`.
    at: std::collections::HashMap<(Rule, usize), usize>,
}

impl<'a> Collector<'a> {
    pub fn new(settings: &'a Settings, dtype: Dtype) -> Collector<'a> {
        Collector {
            settings,
            dtype,
            findings: Vec::new(),
            at: std::collections::HashMap::new(),
        }
    }

    /// Records a crossed measurement: a new finding, or one more measure of
    /// the finding this rule already has at this node.
    #[allow(clippy::too_many_arguments)]
    pub fn push(
        &mut self,
        rule: Rule,
        node: usize,
        step: usize,
        site: Site,
        measure: Measure,
        hit: (usize, f64, usize),
        threshold: f64,
    ) {
        if !self.settings.is_on(rule) {
            return;
        }
        let finding = Finding::single(rule, node, step, site, measure, hit, threshold);
        self.add(finding);
    }

    /// Adds a finding, merging it into the one this rule already has at its node.
    pub fn add(&mut self, finding: Finding) {
        if !self.settings.is_on(finding.rule) {
            return;
        }
        match self.at.get(&(finding.rule, finding.node)) {
            Some(&index) => self.findings[index].measures.extend(finding.measures),
            None => {
                self.at
                    .insert((finding.rule, finding.node), self.findings.len());
                self.findings.push(finding);
            }
        }
    }

    /// The findings, sorted by step then rule.
    pub fn finish(mut self) -> Vec<Finding> {
        self.findings
            .sort_by_key(|finding| (finding.step, finding.rule));
        self.findings
    }

    /// Magnitude rules for a value: overflow beyond the largest finite value,
    /// the warning band, and subnormals; non-finite numbers when `non_finite`.
    /// The survey says which rules can fire; only those scan element by element.
    fn magnitudes(
        &mut self,
        node: usize,
        step: usize,
        site: Site,
        value: &Value,
        survey: &Survey,
        non_finite: bool,
    ) {
        let limits = self.dtype.limits();
        let max = limits.max_finite();
        let band = max / self.settings.overflow_band;
        let scan_non_finite = non_finite && survey.non_finite > 0;
        let scan_large = survey.max_abs > band;
        let scan_subnormal = survey.min_abs < limits.min_normal();
        if !(scan_non_finite || scan_large || scan_subnormal) {
            return;
        }
        let elements = value.elements();
        if scan_non_finite && let Some(hit) = scan::first_where(elements, |_, x| !x.is_finite()) {
            self.push(
                Rule::NonFinite,
                node,
                step,
                site,
                Measure::Element,
                hit,
                max,
            );
        }
        if scan_large {
            if let Some(hit) = scan::first_where(elements, |_, x| x.is_finite() && x.abs() > max) {
                self.push(Rule::Overflow, node, step, site, Measure::Element, hit, max);
            }
            if let Some(hit) = scan::first_where(elements, |_, x| {
                x.is_finite() && x.abs() > band && x.abs() <= max
            }) {
                self.push(
                    Rule::NearOverflow,
                    node,
                    step,
                    site,
                    Measure::Element,
                    hit,
                    band,
                );
            }
        }
        if scan_subnormal && let Some(hit) = scan::first_subnormal(elements, self.dtype) {
            self.push(
                Rule::Underflow,
                node,
                step,
                site,
                Measure::Subnormal,
                hit,
                limits.min_normal(),
            );
        }
    }

    /// The comparisons with the reference sweep's number at the same site:
    /// elements flushed to zero here, and (when `overflow`) elements infinite
    /// here but finite there. Only a value with zeros or non-finite elements
    /// (as its survey says) can have either, so only those are scanned.
    #[allow(clippy::too_many_arguments)]
    fn against(
        &mut self,
        node: usize,
        step: usize,
        site: Site,
        value: &Value,
        survey: &Survey,
        reference: &Value,
        overflow: bool,
    ) {
        let scan_overflow = overflow && survey.non_finite > 0;
        if survey.zeros == 0 && !scan_overflow {
            return;
        }
        if value.len() != reference.len() {
            return;
        }
        let (data, reference) = (value.elements(), reference.elements());
        if survey.zeros > 0 {
            self.paired(node, step, site, (data, reference), PairTest::Flushed);
        }
        if scan_overflow {
            self.paired(node, step, site, (data, reference), PairTest::Overflowed);
        }
    }

    /// A comparison with the reference: elements zero here but not there (an
    /// underflow of this dtype), or infinite here but finite there (an overflow).
    fn paired(
        &mut self,
        node: usize,
        step: usize,
        site: Site,
        (data, reference): (Elements<'_>, Elements<'_>),
        test: PairTest,
    ) {
        let limits = self.dtype.limits();
        let (rule, measure, threshold) = match test {
            PairTest::Flushed => (
                Rule::Underflow,
                Measure::FlushedToZero,
                limits.min_subnormal(),
            ),
            PairTest::Overflowed => (Rule::Overflow, Measure::Element, limits.max_finite()),
        };
        if let Some(hit) = scan::first_pair(data, reference, test) {
            self.push(rule, node, step, site, measure, hit, threshold);
        }
    }
}

/// Runs every rule that is on over a finished sweep (with its ledger).
pub(super) fn evaluate(input: &RuleInput) -> Vec<Finding> {
    let sweep = input.sweep;
    let trace = sweep.trace();
    let ledger = sweep.ledger().expect("the rules read the ledger");
    let reference_ledger = input
        .reference
        .and_then(|reference| reference.ledger())
        .filter(|other| other.len() == ledger.len());
    let mut collector = Collector::new(input.settings, trace.dtype());
    let max = trace.dtype().limits().max_finite();
    // The sweep raises flags in step order, so one cursor walks them alongside the steps.
    let mut partial_flags = sweep
        .flags()
        .iter()
        .filter(|flag| flag.kind == FlagKind::NonFinitePartial)
        .peekable();
    let adjoint_norms: Vec<f64> = (0..trace.nodes().len())
        .map(|node| sweep.adjoint(node).map_or(0.0, |adjoint| adjoint.l2_norm()))
        .collect();
    let any_turned = sweep
        .flags()
        .iter()
        .any(|flag| flag.kind == FlagKind::NonFiniteAdjoint && flag.from.is_some());
    let mut entries = ledger.entries().peekable();
    let mut reference_entries = reference_ledger
        .as_ref()
        .map(|reference| reference.entries());
    for (step, &node) in trace.sweep_order().iter().enumerate() {
        let recorded = trace.node(node);
        let survey = recorded.value.survey();
        collector.magnitudes(node, step, Site::Value, &recorded.value, &survey, true);
        if let Some(reference) = input.reference {
            collector.against(
                node,
                step,
                Site::Value,
                &recorded.value,
                &survey,
                &reference.trace().node(node).value,
                true,
            );
        }
        while let Some(flag) = partial_flags.next_if(|flag| flag.step == step) {
            let hit = (flag.element, flag.value, flag.count);
            collector.push(
                Rule::NonFinite,
                node,
                step,
                Site::Partial {
                    slot: flag.slot.unwrap_or(0),
                },
                Measure::Element,
                hit,
                max,
            );
        }
        let adjoint_finite = sweep
            .adjoint(node)
            .is_some_and(|adjoint| adjoint.is_finite());
        let mut outgoing = Vec::new();
        while let Some(entry) = entries.next_if(|entry| entry.step == step) {
            // The reference ledger has the same edges in the same order: walk it in step.
            let reference_entry = reference_entries.as_mut().and_then(Iterator::next);
            let site = Site::Contribution {
                slot: entry.slot,
                to: entry.input,
            };
            let survey = entry.value.survey();
            // A non-finite contribution is flagged where it is born, not at every edge it passes on.
            collector.magnitudes(node, step, site, &entry.value, &survey, adjoint_finite);
            if let Some(reference_entry) = &reference_entry {
                collector.against(
                    node,
                    step,
                    site,
                    &entry.value,
                    &survey,
                    &reference_entry.value,
                    adjoint_finite,
                );
            }
            // The sweep flagged every sum that turned non-finite: without such a
            // flag no `after` needs a scan.
            let may_turn = any_turned && entry.before.as_ref().is_none_or(Value::is_finite);
            // The first non-finite element of a sum that was finite before: found once, used twice.
            let became_non_finite = may_turn
                .then(|| {
                    let (element, x) = entry.after.first_non_finite()?;
                    Some((element, x, entry.after.survey().non_finite))
                })
                .flatten();
            if let Some(hit) = became_non_finite
                && entry.value.is_finite()
            {
                // Finite contributions summing past the largest finite value at a branch.
                collector.push(
                    Rule::Overflow,
                    entry.input,
                    step,
                    Site::Adjoint,
                    Measure::Element,
                    hit,
                    max,
                );
            }
            if let Some(hit) = became_non_finite {
                collector.push(
                    Rule::NonFinite,
                    entry.input,
                    step,
                    Site::Adjoint,
                    Measure::Element,
                    hit,
                    max,
                );
            }
            // Contributions to leaves end there; the gain measures what the node passes on.
            if !trace.node(entry.input).op.is_leaf() {
                outgoing.push(entry.value.l2_norm());
            }
        }
        // Final adjoint of this node (it is final once the node is processed).
        if let Some(adjoint) = sweep.adjoint(node) {
            let survey = adjoint.survey();
            let limits = trace.dtype().limits();
            if survey.min_abs < limits.min_normal()
                && let Some(hit) = scan::first_subnormal(adjoint.elements(), trace.dtype())
            {
                collector.push(
                    Rule::Underflow,
                    node,
                    step,
                    Site::Adjoint,
                    Measure::Subnormal,
                    hit,
                    limits.min_normal(),
                );
            }
            if let Some(reference) = input
                .reference
                .and_then(|reference| reference.adjoint(node))
            {
                collector.against(
                    node,
                    step,
                    Site::Adjoint,
                    &adjoint,
                    &survey,
                    &reference,
                    false,
                );
            }
        }
        gain(&mut collector, node, step, adjoint_norms[node], &outgoing);
    }
    gradient_norms(&mut collector, sweep);
    collector.finish()
}

/// The gain rule: outgoing contributions' norm over the adjoint's norm.
fn gain(collector: &mut Collector, node: usize, step: usize, adjoint_norm: f64, outgoing: &[f64]) {
    if outgoing.is_empty() || !(adjoint_norm > 0.0 && adjoint_norm.is_finite()) {
        return;
    }
    let ratio = l2_norm(outgoing) / adjoint_norm;
    if !ratio.is_finite() {
        return;
    }
    let settings = collector.settings;
    let crossed = if ratio > settings.gain_above {
        Some(settings.gain_above)
    } else if ratio < settings.gain_below {
        Some(settings.gain_below)
    } else {
        None
    };
    if let Some(threshold) = crossed {
        collector.push(
            Rule::Gain,
            node,
            step,
            Site::Outgoing,
            Measure::Gain,
            (0, ratio, 1),
            threshold,
        );
    }
}

/// The vanishing and exploding rules on parameter gradients: one finding
/// per parameter carrying all three measures — the norm, the norm over the
/// seed's norm and over the median parameter gradient norm — each marked
/// crossed or not. A measure that contradicts an earlier one (absolute, then
/// seed, then median) does not count, and the median does not count when it
/// is itself vanishing or exploding: in a network whose lower layers vanish,
/// the healthy top looks huge against them, which is no explosion.
fn gradient_norms(collector: &mut Collector, sweep: &Sweep) {
    let trace = sweep.trace();
    let norms: Vec<(usize, f64)> = trace
        .params()
        .filter_map(|param| {
            sweep
                .adjoint(param)
                .map(|adjoint| (param, adjoint.l2_norm()))
        })
        .filter(|(_, norm)| norm.is_finite())
        .collect();
    let median = median(norms.iter().map(|&(_, norm)| norm).collect());
    let seed = trace.seed().l2_norm();
    let settings = collector.settings;
    let direction = |value: f64, below: f64, above: f64| {
        if !value.is_finite() {
            None
        } else if value < below {
            Some(Rule::Vanishing)
        } else if value > above {
            Some(Rule::Exploding)
        } else {
            None
        }
    };
    // The median's own verdict, by the absolute and the seed thresholds.
    let median_is = direction(median, settings.vanishing_below, settings.exploding_above).or((seed
        > 0.0)
        .then(|| {
            direction(
                median / seed,
                settings.vanishing_vs_seed,
                settings.exploding_vs_seed,
            )
        })
        .flatten());
    for &(param, norm) in &norms {
        let step = trace
            .sweep_rank(param)
            .expect("a param with an adjoint is swept");
        let mut measures: Vec<(Measure, f64, f64, f64)> = vec![(
            Measure::Norm,
            norm,
            settings.vanishing_below,
            settings.exploding_above,
        )];
        if seed > 0.0 {
            measures.push((
                Measure::NormToSeed,
                norm / seed,
                settings.vanishing_vs_seed,
                settings.exploding_vs_seed,
            ));
        }
        if norms.len() > 1 && median > 0.0 {
            measures.push((
                Measure::NormToMedian,
                norm / median,
                settings.vanishing_vs_median,
                settings.exploding_vs_median,
            ));
        }
        let mut rule = None;
        let mut readings = Vec::new();
        for (measure, value, below, above) in measures {
            let mut crossed = direction(value, below, above);
            if measure == Measure::NormToMedian && median_is.is_some() {
                crossed = None;
            }
            if let (Some(first), Some(this)) = (rule, crossed)
                && first != this
            {
                crossed = None;
            }
            rule = rule.or(crossed);
            readings.push((measure, value, below, above, crossed.is_some()));
        }
        let Some(rule) = rule else { continue };
        // Every measure is shown against the threshold of the finding's direction.
        let measures: Vec<Measurement> = readings
            .into_iter()
            .map(|(measure, value, below, above, crossed)| Measurement {
                site: Site::Adjoint,
                measure,
                value,
                threshold: if rule == Rule::Exploding {
                    above
                } else {
                    below
                },
                element: 0,
                count: 1,
                crossed,
            })
            .collect();
        let own = measures
            .iter()
            .find(|m| m.crossed)
            .copied()
            .expect("a crossed measure decided the rule");
        collector.add(Finding {
            rule,
            node: param,
            step,
            site: Site::Adjoint,
            measure: own.measure,
            value: own.value,
            threshold: own.threshold,
            element: 0,
            count: 1,
            class: None,
            measures,
        });
    }
}

/// The median of a list (mean of the middle two for an even count); 0 when empty.
pub fn median(mut values: Vec<f64>) -> f64 {
    if values.is_empty() {
        return 0.0;
    }
    values.sort_by(f64::total_cmp);
    let middle = values.len() / 2;
    if values.len() % 2 == 1 {
        values[middle]
    } else {
        (values[middle - 1] + values[middle]) / 2.0
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn median_of_odd_and_even_counts() {
        assert_eq!(median(vec![3.0, 1.0, 2.0]), 2.0);
        assert_eq!(median(vec![4.0, 1.0, 3.0, 2.0]), 2.5);
        assert_eq!(median(Vec::new()), 0.0);
    }

    // f16's largest finite value is 65504 (IEEE 754-2019 table 3.5).
    #[test]
    fn findings_describe_themselves_in_one_line() {
        use crate::record::Tape;
        let mut tape = Tape::new("describe", Dtype::F16);
        let w = tape.param("w", 60000.0);
        let two = tape.input("two", 2.0);
        let y = tape.mul(w, two);
        let trace = crate::trace::Trace::try_from(tape.finish(y)).unwrap();
        let diagnosis = crate::diagnose::diagnose(
            &trace,
            &Settings {
                replay: Vec::new(),
                ..Settings::default()
            },
        );
        let lines: Vec<String> = diagnosis
            .findings
            .iter()
            .map(|finding| finding.describe(&trace, Dtype::F16))
            .collect();
        assert!(
            lines
                .iter()
                .any(|line| line == "non_finite: the forward value is inf"),
            "{lines:?}"
        );
        assert!(
            lines.iter().any(|line| line
                .starts_with("near_overflow: the forward value 60000 is within the warning band")),
            "{lines:?}"
        );
    }

    #[test]
    fn rule_names_match_their_serde_names() {
        for rule in Rule::ALL {
            assert_eq!(
                serde_json::to_string(&rule).unwrap(),
                format!("\"{}\"", rule.name())
            );
        }
    }
}
