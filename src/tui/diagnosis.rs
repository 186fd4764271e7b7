//! The view's diagnosis: `diagnose` run on the worker once per dtype the
//! view sweeps in — on open for traces up to [`AUTO_NODES`] nodes, on demand
//! above — and never per frame; with the rows it adds to the Flags pane.

use crate::diagnose::{Diagnosis, Finding, Origin, Rule};
use crate::dtype::Dtype;
use crate::trace::Trace;

/// Traces up to this many nodes are diagnosed as soon as the view opens;
/// larger ones when asked (a diagnosis sweeps the trace several times with
/// its ledger: about 0.3 s per 10⁵ nodes in a release build, README "Performance").
pub const AUTO_NODES: usize = 100_000;

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
    /// The diagnosis with its rows.
    pub fn new(diagnosis: Diagnosis) -> Diagnosed {
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

    /// The step (0-based) a row names.
    pub fn row_step(&self, row: Row) -> usize {
        match row {
            Row::Origin(at) => self.origin(at).step,
            Row::Finding(at) => self.finding(at).step,
        }
    }

    /// A row in one sentence: the origin's account, or the finding described
    /// against its threshold in `trace`'s dtype.
    pub fn row_text(&self, trace: &Trace, row: Row) -> String {
        match row {
            Row::Origin(at) => {
                let origin = self.origin(at);
                format!(
                    "origin ({}) at '{}': {}",
                    origin.class.letter(),
                    trace.node(origin.node).id,
                    origin.explanation
                )
            }
            Row::Finding(at) => self.finding(at).describe(trace, trace.dtype()),
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
    done: Vec<Diagnosed>,
}

impl Diagnoses {
    /// The diagnosis of the sweep in `dtype`, if made.
    pub fn get(&self, dtype: Dtype) -> Option<&Diagnosed> {
        self.done
            .iter()
            .find(|diagnosed| diagnosed.diagnosis.dtype == dtype)
    }

    /// Keeps a diagnosis, in place of an earlier one in the same dtype.
    pub fn insert(&mut self, diagnosed: Diagnosed) {
        let dtype = diagnosed.diagnosis.dtype;
        self.done.retain(|kept| kept.diagnosis.dtype != dtype);
        self.done.push(diagnosed);
    }
}

/// A rule's name as the Flags pane writes it.
pub fn rule_label(rule: Rule) -> &'static str {
    rule.label()
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
        Measure::ForwardError => "|recorded − op| ",
        Measure::SaturatedFraction => "saturated ",
        Measure::DeadFraction => "dead ",
        Measure::RmsToDeepest => "rms/inputs' ",
    };
    let small = match finding.rule {
        Rule::Underflow | Rule::Vanishing => true,
        Rule::ActivationGrowth => finding.value < 1.0,
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
    use crate::diagnose::{Settings, diagnose};
    use crate::record::Tape;

    #[test]
    fn rows_hold_origins_and_findings_by_step_without_non_finite_ones() {
        let mut tape = Tape::new("log at zero", Dtype::F64);
        let w = tape.param("w", 0.0);
        let y = tape.log(w);
        let trace = Trace::try_from(tape.finish(y)).unwrap();
        let mut diagnoses = Diagnoses::default();
        diagnoses.insert(Diagnosed::new(diagnose(&trace, &Settings::default())));
        let diagnosed = diagnoses.get(Dtype::F64).unwrap();
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
            .map(|&row| diagnosed.row_step(row))
            .collect();
        assert!(steps.windows(2).all(|pair| pair[0] <= pair[1]), "{steps:?}");
        let sentence = diagnosed
            .sentence(&trace, trace.find("log_1").unwrap())
            .unwrap();
        assert!(sentence.starts_with("Origin (a): "), "{sentence}");
        assert!(diagnoses.get(Dtype::F32).is_none());
    }
}
