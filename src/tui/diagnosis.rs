//! The view's diagnosis: `diagnose` run once per dtype the view sweeps in —
//! on open for traces up to [`AUTO_NODES`] nodes, on demand above — and never
//! per frame; with the rows it adds to the Flags pane.

use crate::diagnose::{Diagnosis, Finding, Origin, Rule, Settings, diagnose};
use crate::dtype::Dtype;
use crate::trace::Trace;

/// Traces up to this many nodes are diagnosed as soon as the view opens;
/// larger ones when asked (a diagnosis sweeps the trace several times with
/// its ledger: about 0.3 s per 10⁵ nodes in a release build, README "Performance").
pub const AUTO_NODES: usize = 100_000;

/// Costly work the view does after drawing a frame that says it is under way.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Work {
    /// Diagnose the trace in the dtype the view sweeps in.
    Diagnose,
    /// Sweep the trace re-typed into this dtype.
    Retype(Dtype),
}

/// One row the diagnosis adds to the Flags pane.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Row {
    /// An origin of a non-finite adjoint, by index into `Diagnosis::origins`.
    Origin(usize),
    /// A finding of a rule other than non-finite (the sweep's own flags show
    /// those as they are raised), by index into `Diagnosis::findings`.
    Finding(usize),
}

/// A diagnosis with its rows for the Flags pane, in sweep order.
#[derive(Debug, Clone)]
pub struct Diagnosed {
    /// The diagnosis.
    pub diagnosis: Diagnosis,
    /// Origins and findings, by step (an origin before a finding at the same step).
    pub rows: Vec<Row>,
}

impl Diagnosed {
    fn new(diagnosis: Diagnosis) -> Diagnosed {
        let origins = diagnosis
            .origins
            .iter()
            .enumerate()
            .map(|(at, origin)| (origin.step, 0, Row::Origin(at)));
        let findings = diagnosis
            .findings
            .iter()
            .enumerate()
            .filter(|(_, finding)| finding.rule != Rule::NonFinite)
            .map(|(at, finding)| (finding.step, 1, Row::Finding(at)));
        let mut keyed: Vec<(usize, u8, Row)> = origins.chain(findings).collect();
        keyed.sort_by_key(|&(step, kind, _)| (step, kind));
        Diagnosed {
            rows: keyed.into_iter().map(|(_, _, row)| row).collect(),
            diagnosis,
        }
    }

    /// The origin at `at`.
    pub fn origin(&self, at: usize) -> &Origin {
        &self.diagnosis.origins[at]
    }

    /// The finding at `at`.
    pub fn finding(&self, at: usize) -> &Finding {
        &self.diagnosis.findings[at]
    }

    /// The node a row names.
    pub fn row_node(&self, row: Row) -> usize {
        match row {
            Row::Origin(at) => self.origin(at).node,
            Row::Finding(at) => self.finding(at).node,
        }
    }

    /// The origins born at `node`.
    pub fn origins_at(&self, node: usize) -> impl Iterator<Item = &Origin> + '_ {
        self.diagnosis
            .origins
            .iter()
            .filter(move |origin| origin.node == node)
    }

    /// One sentence on the origin behind `node`: `explain` for a node whose
    /// adjoint is non-finite, the origin's own account for the node where it was born.
    pub fn sentence(&self, trace: &Trace, node: usize) -> Option<String> {
        self.diagnosis.explain(trace, node).or_else(|| {
            self.origins_at(node).next().map(|origin| {
                format!(
                    "Origin ({}): {}.",
                    origin.class.letter(),
                    origin.explanation
                )
            })
        })
    }

    /// The origin whose chain `node` is on, or which was born at `node`.
    pub fn origin_for(&self, node: usize) -> Option<&Origin> {
        self.diagnosis
            .origin_of(node)
            .or_else(|| self.origins_at(node).next())
    }

    /// The parameter the Paths pane shows when the selection is not one: the
    /// one the advice names (exploding or vanishing), else the first with a path.
    pub fn headline_param(&self) -> Option<usize> {
        let advised = self
            .diagnosis
            .advice
            .iter()
            .filter_map(|advice| advice.node)
            .find(|&node| self.diagnosis.path_to(node).is_some());
        advised.or_else(|| self.diagnosis.paths.first().map(|path| path.param))
    }
}

/// The diagnoses made so far, one per dtype.
#[derive(Debug, Clone, Default)]
pub struct Diagnoses {
    settings: Settings,
    done: Vec<Diagnosed>,
}

impl Diagnoses {
    /// No diagnosis yet; the ones to come use `settings`.
    pub fn with_settings(settings: Settings) -> Diagnoses {
        Diagnoses {
            settings,
            done: Vec::new(),
        }
    }

    /// The diagnosis of the sweep in `dtype`, if made.
    pub fn get(&self, dtype: Dtype) -> Option<&Diagnosed> {
        self.done
            .iter()
            .find(|diagnosed| diagnosed.diagnosis.dtype == dtype)
    }

    /// Diagnoses `trace` in its own dtype unless that is done already. The
    /// recorded trace gets the full diagnosis with its replays; a re-typed
    /// copy (`replays` false) only its own rules, origins, paths and groups.
    pub fn run(&mut self, trace: &Trace, replays: bool) -> &Diagnosed {
        if let Some(at) = self
            .done
            .iter()
            .position(|diagnosed| diagnosed.diagnosis.dtype == trace.dtype())
        {
            return &self.done[at];
        }
        let mut settings = self.settings.clone();
        if !replays {
            settings.replay.clear();
        }
        self.done.push(Diagnosed::new(diagnose(trace, &settings)));
        self.done.last().expect("pushed")
    }
}

/// A rule's name as the Flags pane writes it.
pub fn rule_label(rule: Rule) -> &'static str {
    match rule {
        Rule::NonFinite => "non-finite",
        Rule::Overflow => "overflow",
        Rule::NearOverflow => "near overflow",
        Rule::Underflow => "underflow",
        Rule::Vanishing => "vanishing",
        Rule::Exploding => "exploding",
        Rule::Gain => "gain",
    }
}

/// A finding's number against its threshold, short: `‖·‖ 2.24e8 > 1e4`.
pub fn value_against_threshold(finding: &Finding) -> String {
    use crate::diagnose::Measure;
    use crate::format::compact;
    let measure = match finding.measure {
        Measure::Element => "",
        Measure::Subnormal => "subnormal ",
        Measure::FlushedToZero => "flushed, was ",
        Measure::Norm => "‖·‖ ",
        Measure::NormToSeed => "‖·‖/seed ",
        Measure::NormToMedian => "‖·‖/median ",
        Measure::Gain => "",
    };
    let small = match finding.rule {
        Rule::Underflow | Rule::Vanishing => true,
        Rule::Gain => finding.value.abs() < finding.threshold,
        _ => false,
    };
    let comparison = if small { "<" } else { ">" };
    // Overflow thresholds bound a magnitude; a negative value says so.
    let magnitude =
        matches!(finding.rule, Rule::Overflow | Rule::NearOverflow) && finding.value < 0.0;
    let bound = if magnitude {
        format!("|·| {comparison}")
    } else {
        comparison.to_string()
    };
    format!(
        "{measure}{} {bound} {}",
        compact(finding.value),
        compact(finding.threshold)
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::record::Tape;

    #[test]
    fn rows_hold_origins_and_findings_by_step_without_non_finite_ones() {
        let mut tape = Tape::new("log at zero", Dtype::F64);
        let w = tape.param("w", 0.0);
        let y = tape.log(w);
        let trace = Trace::try_from(tape.finish(y)).unwrap();
        let mut diagnoses = Diagnoses::default();
        let diagnosed = diagnoses.run(&trace, true);
        assert!(
            diagnosed
                .diagnosis
                .findings
                .iter()
                .any(|finding| finding.rule == Rule::NonFinite)
        );
        // ln 0 = −inf (IEEE 754-2019 §9.2.1): one origin of class (a), at the log.
        assert_eq!(diagnosed.rows.first(), Some(&Row::Origin(0)));
        assert_eq!(
            trace.node(diagnosed.row_node(diagnosed.rows[0])).id,
            "log_1"
        );
        assert!(diagnosed.rows.iter().all(|&row| match row {
            Row::Finding(at) => diagnosed.finding(at).rule != Rule::NonFinite,
            Row::Origin(_) => true,
        }));
        let steps: Vec<usize> = diagnosed
            .rows
            .iter()
            .map(|&row| match row {
                Row::Origin(at) => diagnosed.origin(at).step,
                Row::Finding(at) => diagnosed.finding(at).step,
            })
            .collect();
        assert!(steps.windows(2).all(|pair| pair[0] <= pair[1]), "{steps:?}");
        let sentence = diagnosed
            .sentence(&trace, trace.find("log_1").unwrap())
            .unwrap();
        assert!(sentence.starts_with("Origin (a): "), "{sentence}");
        assert_eq!(
            diagnoses.get(Dtype::F64).map(|d| d.rows.len()),
            Some(steps.len()),
            "made once, then looked up"
        );
    }
}
