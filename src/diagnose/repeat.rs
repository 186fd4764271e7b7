//! The repeating factor along a dominant path: where a network multiplies
//! the adjoint by about the same gain again and again (a layer of a deep
//! tower, a time step of an unrolled recurrence), how many times, by how
//! much per repeat, and which op or parameter supplies the factor.
//!
//! A vanishing or exploding gradient is rarely one bad hop; it is a modest
//! gain raised to a high power (Pascanu, Mikolov & Bengio, "On the
//! difficulty of training recurrent neural networks", ICML 2013, §2; a
//! sigmoid's derivative is at most 1/4, Goodfellow, Bengio & Courville,
//! "Deep Learning", 2016, §6.3.2). The period is found from the ops along
//! the path: hop k and hop k + p join the same ops by the same input slot.

use super::paths::DominantPath;
use crate::ops::Op;
use crate::trace::Trace;

/// Longest period looked for, in hops.
const MAX_PERIOD: usize = 8;
/// Fewest full repeats that count as a repeating structure.
const MIN_REPEATS: usize = 3;

/// What supplies a repeat's factor.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Factor {
    /// An activation's derivative (sigmoid: at most 1/4; tanh: at most 1).
    Activation {
        /// The activation op.
        op: Op,
    },
    /// A multiplication by a parameter (a matmul's or product's other operand).
    Weight {
        /// The parameter at the first repeat.
        param: usize,
        /// True when every repeat multiplies by the same parameter: a
        /// recurrent weight, reused at every time step.
        shared: bool,
    },
    /// Any other op.
    Op {
        /// The op.
        op: Op,
    },
}

/// A structure repeated along one parameter's dominant path.
#[derive(Debug, Clone, PartialEq)]
pub struct Repeat {
    /// The parameter whose dominant path it was found on.
    pub param: usize,
    /// Hops per repeat.
    pub period: usize,
    /// Index in the path's hops of the run's first hop.
    pub start: usize,
    /// Hops the run covers (at least `period · repeats`).
    pub hops: usize,
    /// Full repeats in the run.
    pub repeats: usize,
    /// The gain of one repeat: the geometric mean, over the full repeats, of
    /// the product of their hops' gains.
    pub gain: f64,
    /// The offset within a period of the hop that supplies the factor: the
    /// one whose median gain is furthest from 1 in the direction of `gain`.
    pub offset: usize,
    /// That hop's median gain over the repeats.
    pub factor_gain: f64,
    /// How many times that hop occurs in the run.
    pub count: usize,
    /// What supplies the factor.
    pub factor: Factor,
    /// The node the run starts from (nearest the output).
    pub first: usize,
    /// The node the run ends at (nearest the parameter).
    pub last: usize,
    /// The `from` node of the factor's hop at its first and last occurrence.
    pub factor_nodes: (usize, usize),
}

impl Repeat {
    /// The gain of the whole run: `gain` to the power `repeats`.
    pub fn total(&self) -> f64 {
        self.gain.powf(self.repeats as f64)
    }

    /// "step" for a recurrence (a weight shared by every repeat), else "layer".
    pub fn unit(&self) -> &'static str {
        match self.factor {
            Factor::Weight { shared: true, .. } => "step",
            _ => "layer",
        }
    }
}

/// What a hop joins, for finding periods: the ops at both ends and the slot.
fn signature(trace: &Trace, from: usize, to: usize, slot: usize) -> (&str, &str, usize) {
    (
        trace.node(from).op_name.as_ref(),
        trace.node(to).op_name.as_ref(),
        slot,
    )
}

/// The factor behind the hop that pulls `from` back into input `slot`.
fn factor_of(trace: &Trace, from: usize, slot: usize) -> (Factor, Option<usize>) {
    let node = trace.node(from);
    match node.op {
        Op::Sigmoid | Op::Tanh => (Factor::Activation { op: node.op }, None),
        Op::Matmul | Op::Mul if node.inputs.len() == 2 => {
            let other = node.inputs[1 - slot.min(1)];
            if trace.node(other).op == Op::Param {
                (
                    Factor::Weight {
                        param: other,
                        shared: true,
                    },
                    Some(other),
                )
            } else {
                (Factor::Op { op: node.op }, None)
            }
        }
        op => (Factor::Op { op }, None),
    }
}

fn median(mut values: Vec<f64>) -> f64 {
    super::rules::median(std::mem::take(&mut values))
}

/// The longest repeating structure along `path`, if one repeats at least
/// three times with known gains.
pub fn find_repeat(trace: &Trace, path: &DominantPath) -> Option<Repeat> {
    let hops = &path.hops;
    let signatures: Vec<_> = hops
        .iter()
        .map(|hop| signature(trace, hop.from, hop.to, hop.slot))
        .collect();
    // (covered hops, period, start); longer coverage wins, then shorter period.
    let mut best: Option<(usize, usize, usize)> = None;
    for period in 1..=MAX_PERIOD.min(hops.len() / MIN_REPEATS) {
        let mut k = 0;
        while k + period < hops.len() {
            if signatures[k] != signatures[k + period] {
                k += 1;
                continue;
            }
            let start = k;
            while k + period < hops.len() && signatures[k] == signatures[k + period] {
                k += 1;
            }
            let covered = k - start + period;
            if covered / period >= MIN_REPEATS && best.is_none_or(|(most, _, _)| covered > most) {
                best = Some((covered, period, start));
            }
        }
    }
    let (covered, period, start) = best?;
    let repeats = covered / period;
    let run = &hops[start..start + covered];
    if run.iter().any(|hop| !hop.gain.is_finite()) {
        return None;
    }
    let log_gain = (0..repeats)
        .map(|m| {
            run[m * period..(m + 1) * period]
                .iter()
                .map(|hop| hop.gain.ln())
                .sum::<f64>()
        })
        .sum::<f64>()
        / repeats as f64;
    let gain = log_gain.exp();
    let medians: Vec<f64> = (0..period)
        .map(|offset| {
            median(
                (0..repeats)
                    .map(|m| run[m * period + offset].gain)
                    .collect(),
            )
        })
        .collect();
    let offset = (0..period)
        .max_by(|&a, &b| {
            let pull = |k: usize| medians[k].ln() * log_gain.signum();
            pull(a).total_cmp(&pull(b))
        })
        .unwrap_or(0);
    let occurrences: Vec<_> = run.iter().skip(offset).step_by(period).collect();
    let (mut factor, weight) = factor_of(trace, occurrences[0].from, occurrences[0].slot);
    if let (Factor::Weight { shared, .. }, Some(first)) = (&mut factor, weight) {
        *shared = occurrences
            .iter()
            .all(|hop| factor_of(trace, hop.from, hop.slot).1 == Some(first));
    }
    Some(Repeat {
        param: path.param,
        period,
        start,
        hops: covered,
        repeats,
        gain,
        offset,
        factor_gain: medians[offset],
        count: occurrences.len(),
        factor,
        first: run[0].from,
        last: run[covered - 1].to,
        factor_nodes: (
            occurrences[0].from,
            occurrences.last().expect("at least three").from,
        ),
    })
}

/// One sentence on what supplies a repeat's factor, in the trade's words.
pub fn factor_text(trace: &Trace, repeat: &Repeat) -> String {
    use crate::format::short as compact;
    let per = repeat.unit();
    match repeat.factor {
        Factor::Activation { op: Op::Sigmoid } => format!(
            "a sigmoid's derivative σ(1 − σ) is at most 1/4 (×{} per {per} here)",
            compact(repeat.factor_gain)
        ),
        Factor::Activation { op } => format!(
            "{}'s derivative gives ×{} per {per} (tanh's is at most 1, less where it saturates)",
            op.name(),
            compact(repeat.factor_gain)
        ),
        Factor::Weight {
            param,
            shared: true,
        } => format!(
            "the recurrent weight '{}' is applied at every step and multiplies the adjoint by ×{} each time",
            trace.node(param).id,
            compact(repeat.factor_gain)
        ),
        Factor::Weight { param, .. } => format!(
            "the weights (first '{}') multiply the adjoint by ×{} per {per}",
            trace.node(param).id,
            compact(repeat.factor_gain)
        ),
        Factor::Op { op } => format!(
            "the {} hop gives ×{} per {per}",
            op.name(),
            compact(repeat.factor_gain)
        ),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::diagnose::{Settings, diagnose};

    fn repeat_of(trace: &Trace, param: &str) -> Repeat {
        let diagnosis = diagnose(
            trace,
            &Settings {
                replay: Vec::new(),
                ..Settings::default()
            },
        );
        let param = trace.find(param).unwrap();
        find_repeat(trace, diagnosis.path_to(param).unwrap()).expect("a repeat")
    }

    // The demo's recurrent weight is 1.2 times a rotation, so every step back
    // in time multiplies the adjoint's norm by exactly 1.2 (its singular
    // values are all 1.2); 50 steps give 49 multiplications from h50 to h01.
    #[test]
    fn the_recurrence_repeats_forty_nine_times_at_one_point_two() {
        let trace = Trace::try_from(crate::demos::exploding()).unwrap();
        let repeat = repeat_of(&trace, "cell.u");
        assert_eq!(repeat.period, 2);
        assert_eq!(repeat.count, 49);
        assert!((repeat.gain - 1.2).abs() < 1e-3, "{}", repeat.gain);
        assert!((repeat.factor_gain - 1.2).abs() < 1e-3);
        let w = trace.find("cell.w").unwrap();
        assert_eq!(
            repeat.factor,
            Factor::Weight {
                param: w,
                shared: true
            }
        );
        assert_eq!(repeat.unit(), "step");
    }

    // σ' ≤ 1/4 (Goodfellow, Bengio & Courville 2016, §6.3.2): sixteen
    // sigmoid layers, each multiplying by less than 1/4 through the sigmoid.
    #[test]
    fn the_sigmoid_tower_repeats_per_layer_through_the_sigmoid() {
        let trace = Trace::try_from(crate::demos::vanishing()).unwrap();
        let repeat = repeat_of(&trace, "layer01.b");
        assert_eq!(repeat.period, 3);
        assert_eq!(repeat.count, 16);
        assert_eq!(repeat.factor, Factor::Activation { op: Op::Sigmoid });
        assert!(repeat.factor_gain <= 0.25);
        assert!(repeat.gain < 0.25 && repeat.gain > 0.1, "{}", repeat.gain);
        assert_eq!(repeat.unit(), "layer");
    }
}
