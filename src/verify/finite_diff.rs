//! The finite-difference check: perturb parameter entries, re-evaluate the
//! forward computation, and compare central differences with the sweep's
//! adjoints.
//!
//! Step rule: h = ε^(1/3)·max(|x|, 1) with ε the f64 machine epsilon (the
//! re-evaluation runs in f64 whatever the trace's dtype), the step that
//! balances truncation and rounding error for central differences (Press,
//! Teukolsky, Vetterling & Flannery, "Numerical Recipes", 3rd ed., CUP 2007,
//! §5.7). A step whose two evaluations lie on different sides of a kink is
//! retried at h/16 and h/256 (the rounding floor, 10·ε·|f|/h, grows to
//! match); when all three cross (a kink at the point itself), the first
//! step's difference is kept and the kink is listed.

use super::compare::{Band, relative_error};
use crate::control::{Cancelled, Control};
use crate::dtype::Dtype;
use crate::eval::reevaluate;
use crate::ops::{self, Op};
use crate::sweep::Sweep;
use crate::tensor::Value;
use crate::trace::Trace;
use serde::Serialize;

/// One checked entry of a parameter.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct DifferenceEntry {
    /// Flat index in the parameter.
    pub element: usize,
    /// The step h used.
    pub step: f64,
    /// (f(x + h) − f(x − h)) / 2h.
    pub central: f64,
    /// The sweep's adjoint.
    pub reverse: f64,
    /// Relative error of the two.
    pub relative: f64,
    /// The rounding-error floor of the difference, 10·ε·|f|/h (Press et al.
    /// 2007, §5.7): gradients this small cannot be resolved by the difference.
    pub floor: f64,
}

impl DifferenceEntry {
    /// True when the difference and the gradient are both finite numbers.
    pub fn is_finite(&self) -> bool {
        self.central.is_finite() && self.reverse.is_finite()
    }

    /// True when the difference can resolve the derivative: the gradient or
    /// the difference stands above the rounding floor. Below it the
    /// difference cannot tell the derivative from zero.
    pub fn resolved(&self) -> bool {
        self.central.abs() > self.floor || self.reverse.abs() > self.floor
    }

    /// True when the two agree to within the difference's rounding floor.
    pub fn within_floor(&self) -> bool {
        (self.reverse - self.central).abs() <= self.floor
    }

    /// The relative error that counts: NaN when both numbers are non-finite
    /// (nothing to judge), 0 for a resolved entry that agrees within the
    /// floor (rounding noise), else the relative error.
    pub fn counted(&self) -> f64 {
        if self.is_finite() && self.resolved() && self.within_floor() {
            0.0
        } else {
            self.relative
        }
    }

    /// How this entry judges the derivative: `NotFinite` when the numbers are
    /// not finite, `Unresolved` below the floor (never `Good`), else the band
    /// of the counted error.
    pub fn band(&self) -> Band {
        if !self.is_finite() {
            Band::of(self.relative)
        } else if !self.resolved() {
            Band::Unresolved
        } else {
            Band::of(self.counted())
        }
    }
}

/// The check of one parameter.
#[derive(Debug, Clone, Serialize)]
pub struct DifferenceCheck {
    /// The parameter node.
    pub param: usize,
    /// Every checked entry.
    pub entries: Vec<DifferenceEntry>,
    /// Nodes with a kink at the evaluated point or crossed by a step: the
    /// difference there is not a derivative, which explains a disagreement.
    pub kinks: Vec<usize>,
    /// Custom nodes on the way to the output, evaluated through their
    /// recorded partials (their partials are trusted, not tested, here).
    pub linearised: Vec<usize>,
}

impl DifferenceCheck {
    /// The most worrying entry: by band (not finite, then probably wrong, …,
    /// then unresolved), then by counted relative error.
    pub fn worst(&self) -> Option<&DifferenceEntry> {
        self.entries.iter().max_by(|a, b| {
            let counted = |e: &DifferenceEntry| {
                let c = e.counted();
                if c.is_nan() { f64::INFINITY } else { c }
            };
            a.band()
                .cmp(&b.band())
                .then(counted(a).total_cmp(&counted(b)))
                .then(b.element.cmp(&a.element))
        })
    }

    /// The band of the worst entry: `Unresolved` when no entry could be
    /// resolved, `Good` for a parameter with no entry.
    pub fn band(&self) -> Band {
        self.worst().map_or(Band::Good, DifferenceEntry::band)
    }

    /// Entries too small for the difference to resolve.
    pub fn unresolved(&self) -> usize {
        self.entries
            .iter()
            .filter(|entry| entry.band() == Band::Unresolved)
            .count()
    }

    /// Entries where the difference or the gradient is NaN or infinite.
    pub fn not_finite(&self) -> usize {
        self.entries
            .iter()
            .filter(|entry| !entry.is_finite())
            .count()
    }
}

/// A reproducible choice of `count` distinct entries out of `len`.
fn sample(len: usize, count: usize, seed: u64) -> Vec<usize> {
    if len <= count {
        return (0..len).collect();
    }
    let mut rng = crate::random::Rng::new(seed);
    let mut chosen = std::collections::BTreeSet::new();
    while chosen.len() < count {
        chosen.insert(rng.below(len));
    }
    chosen.into_iter().collect()
}

/// ⟨seed, output⟩: the scalar whose gradient the sweep computes.
fn objective(values: &[Value], trace: &Trace) -> f64 {
    let output = &values[trace.output()];
    output
        .to_f64()
        .iter()
        .zip(trace.seed().to_f64().iter())
        .map(|(&y, &s)| y * s)
        .sum()
}

/// Which nodes depend on `source`.
fn downstream(trace: &Trace, source: usize) -> Vec<bool> {
    let mut depends = vec![false; trace.nodes().len()];
    depends[source] = true;
    for (node, recorded) in trace.nodes().iter().enumerate().skip(source + 1) {
        depends[node] = recorded.inputs.iter().any(|&input| depends[input]);
    }
    depends
}

/// Checks up to `samples` entries of every parameter that reaches the output
/// against central differences. `sweep` must have run to the end.
pub fn check_finite_differences(sweep: &Sweep, samples: usize, seed: u64) -> Vec<DifferenceCheck> {
    check_finite_differences_with(sweep, samples, seed, &Control::NONE)
        .expect("Control::NONE never cancels")
}

/// [`check_finite_differences`], reporting progress per parameter to
/// `control` and stopping between parameters when it is cancelled.
pub fn check_finite_differences_with(
    sweep: &Sweep,
    samples: usize,
    seed: u64,
    control: &Control,
) -> Result<Vec<DifferenceCheck>, Cancelled> {
    let trace = sweep.trace();
    let mut checks = Vec::new();
    let params: Vec<usize> = trace.params().collect();
    for (done, &param) in params.iter().enumerate() {
        control.check()?;
        control.progress("finite differences", done as f64 / params.len() as f64);
        let Some(adjoint) = sweep.adjoint(param) else {
            continue;
        };
        let depends = downstream(trace, param);
        let on_path: Vec<usize> = (0..trace.nodes().len())
            .filter(|&n| depends[n] && trace.sweep_rank(n).is_some())
            .collect();
        let linearised = on_path
            .iter()
            .copied()
            .filter(|&n| trace.node(n).op == Op::Custom)
            .collect();
        let mut kinks: Vec<usize> = on_path
            .iter()
            .copied()
            .filter(|&n| kink_at(trace, n))
            .collect();
        let value = &trace.node(param).value;
        let mut entries = Vec::new();
        for element in sample(
            value.len(),
            samples,
            seed ^ (param as u64).wrapping_mul(0x9E37_79B9_7F4A_7C15),
        ) {
            let x = value.get(element);
            let evaluate = |shift: f64| {
                let mut moved = value.clone();
                moved.set(element, x + shift);
                reevaluate(trace, &[(param, moved)], Dtype::F64)
                    .expect("a parameter keeps its shape")
            };
            // A step that crosses a kink (a ReLU unit or a max-pool winner
            // changing sides) differences two pieces of the function, not a
            // derivative. In a large network some unit is near its kink, and
            // the number crossed shrinks with the step, so a crossing step is
            // retried 16 and 256 times shorter before the kink is blamed.
            // A kink at the point itself is crossed by every step: then the
            // first step's difference, the least rounded, is the one reported.
            let base = f64::EPSILON.cbrt() * x.abs().max(1.0);
            let mut first = None;
            let mut chosen = None;
            for step in [base, base / 16.0, base / 256.0] {
                let (plus, minus) = (evaluate(step), evaluate(-step));
                let crossed: Vec<usize> = on_path
                    .iter()
                    .copied()
                    .filter(|&node| crossed_kink(trace, node, &plus, &minus))
                    .collect();
                if crossed.is_empty() {
                    chosen = Some((step, plus, minus));
                    break;
                }
                if first.is_none() {
                    first = Some((step, plus, minus, crossed));
                }
            }
            let (step, plus, minus) = match chosen {
                Some(chosen) => chosen,
                None => {
                    let (step, plus, minus, crossed) = first.expect("a step was tried");
                    for node in crossed {
                        if !kinks.contains(&node) {
                            kinks.push(node);
                        }
                    }
                    (step, plus, minus)
                }
            };
            let (above, below) = (objective(&plus, trace), objective(&minus, trace));
            let central = (above - below) / (2.0 * step);
            let floor = 10.0 * f64::EPSILON * above.abs().max(below.abs()) / step;
            let reverse = adjoint.get(element);
            entries.push(DifferenceEntry {
                element,
                step,
                central,
                reverse,
                relative: relative_error(reverse, central),
                floor,
            });
        }
        kinks.sort_unstable();
        checks.push(DifferenceCheck {
            param,
            entries,
            kinks,
            linearised,
        });
    }
    Ok(checks)
}

fn kink_state<'v>(
    trace: &Trace,
    node: usize,
    value_of: impl Fn(usize) -> &'v Value,
) -> Option<Vec<i64>> {
    let recorded = trace.node(node);
    if !ops::has_kinks(recorded.op) {
        return None;
    }
    let inputs: Vec<&Value> = recorded
        .inputs
        .iter()
        .map(|&input| value_of(input))
        .collect();
    ops::kink_state(recorded.op, &inputs, &recorded.attrs)
}

/// A kink exactly at the recorded point.
fn kink_at(trace: &Trace, node: usize) -> bool {
    kink_state(trace, node, |input| &trace.node(input).value)
        .is_some_and(|state| ops::on_kink(&state))
}

/// The two evaluations lie on different sides of a kink.
fn crossed_kink(trace: &Trace, node: usize, plus: &[Value], minus: &[Value]) -> bool {
    match (
        kink_state(trace, node, |input| &plus[input]),
        kink_state(trace, node, |input| &minus[input]),
    ) {
        (Some(a), Some(b)) => a != b,
        _ => false,
    }
}
