//! The sweep's hot loop: runs of scalar steps over the trace's sweep-order
//! edge arrays, with the rounding chosen once per run rather than per edge.

use super::{Flag, FlagKind, Sweep};
use crate::dtype::{Dtype, Subnormals};
use crate::tensor::Value;
use crate::trace::{StepKind, Trace};

/// How every stored result of a trace's arithmetic is rounded.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(super) enum Rounding {
    /// f64, subnormals kept: no rounding beyond f64's own.
    Exact,
    /// f32, subnormals kept: one conversion (exact by the double-rounding argument).
    Single,
    /// Any dtype, with or without flushing subnormal results to zero.
    Format { dtype: Dtype, flush: bool },
}

impl Rounding {
    pub(super) fn of(trace: &Trace) -> Rounding {
        match (trace.dtype(), trace.subnormals()) {
            (Dtype::F64, Subnormals::Keep) => Rounding::Exact,
            (Dtype::F32, Subnormals::Keep) => Rounding::Single,
            (dtype, subnormals) => Rounding::Format {
                dtype,
                flush: subnormals == Subnormals::Flush,
            },
        }
    }

    /// `x` rounded into the trace's dtype (and flushed, when it flushes).
    #[inline]
    pub(super) fn apply(self, x: f64) -> f64 {
        match self {
            Rounding::Exact => x,
            Rounding::Single => x as f32 as f64,
            Rounding::Format { dtype, flush } => {
                let rounded = dtype.round(x);
                if flush { dtype.flush(rounded) } else { rounded }
            }
        }
    }
}

/// A rounding known at compile time, so the hot loop carries no dispatch.
trait Round: Copy {
    fn round(self, x: f64) -> f64;
}

#[derive(Clone, Copy)]
struct ExactRound;

impl Round for ExactRound {
    #[inline(always)]
    fn round(self, x: f64) -> f64 {
        x
    }
}

#[derive(Clone, Copy)]
struct SingleRound;

impl Round for SingleRound {
    #[inline(always)]
    fn round(self, x: f64) -> f64 {
        x as f32 as f64
    }
}

impl Round for Rounding {
    #[inline(always)]
    fn round(self, x: f64) -> f64 {
        self.apply(x)
    }
}

impl Sweep<'_> {
    /// Runs scalar steps (`Plain` or `Scalar`) from the cursor until `end`
    /// steps are done or a general step is next.
    pub(super) fn run_scalar_steps(&mut self, end: usize) {
        let logged = self.ledger.is_some();
        match (Rounding::of(self.trace), logged) {
            (Rounding::Exact, false) => self.run_scalar_with::<_, false>(ExactRound, end),
            (Rounding::Exact, true) => self.run_scalar_with::<_, true>(ExactRound, end),
            (Rounding::Single, false) => self.run_scalar_with::<_, false>(SingleRound, end),
            (Rounding::Single, true) => self.run_scalar_with::<_, true>(SingleRound, end),
            (format, false) => self.run_scalar_with::<_, false>(format, end),
            (format, true) => self.run_scalar_with::<_, true>(format, end),
        }
    }

    /// The loop itself, built once per rounding and ledger mode. `LOGGED`
    /// says the ledger is on: each edge then logs the adjoint its input held.
    #[inline(never)]
    fn run_scalar_with<R: Round, const LOGGED: bool>(&mut self, rounding: R, end: usize) {
        let trace = self.trace;
        let (compact, start) = (trace.compact(), self.cursor);
        // Plain slices, so the loop keeps their pointers in registers.
        let adjoints = &mut self.scalar_adjoints[..];
        let flags = &mut self.flags;
        // The log gets one slot per edge; sized for the whole run up front so
        // the loop writes by index (edge `e` logs at `e`), then cut back to
        // the steps actually done.
        let mut unlogged = Vec::new();
        let held_log = match &mut self.ledger {
            Some(store) if LOGGED => &mut store.held,
            _ => &mut unlogged,
        };
        if LOGGED {
            held_log.resize(compact.edge_start[end] as usize, f64::NAN);
        }
        let log = &mut held_log[..];
        let steps = trace.sweep_order()[start..end]
            .iter()
            .zip(&compact.kind[start..end])
            .zip(compact.edge_start[start..=end].windows(2));
        let mut step = start;
        for ((&node, &kind), bounds) in steps {
            let edges = bounds[0] as usize..bounds[1] as usize;
            let step_edges = StepEdges {
                step,
                node,
                first_edge: edges.start,
                adjoint: adjoints[node],
                inputs: &compact.edge_input[edges.clone()],
                partials: &compact.edge_partial[edges],
            };
            match kind {
                StepKind::Plain => {
                    step_edges.add::<R, false, LOGGED>(rounding, adjoints, flags, log);
                }
                StepKind::Scalar => {
                    let value = Value::Scalar(compact.scalars[node]);
                    flags.extend(Flag::for_value(
                        step,
                        node,
                        FlagKind::NonFiniteValue,
                        &value,
                    ));
                    step_edges.add::<R, true, LOGGED>(rounding, adjoints, flags, log);
                }
                StepKind::General => break,
            }
            step += 1;
        }
        if LOGGED {
            held_log.truncate(compact.edge_start[step] as usize);
        }
        self.cursor = step;
    }
}

/// One scalar step's edges: the node's adjoint and, per input slot, the
/// input and the partial.
struct StepEdges<'a> {
    step: usize,
    node: usize,
    /// The index of the step's first edge in the trace's edge arrays.
    first_edge: usize,
    adjoint: f64,
    inputs: &'a [u32],
    partials: &'a [f64],
}

impl StepEdges<'_> {
    /// Adds each edge's contribution to its input's adjoint. `CHECKED` flags
    /// non-finite partials (only `Scalar` steps have them); `LOGGED` logs what
    /// each input held.
    #[inline(always)]
    fn add<R: Round, const CHECKED: bool, const LOGGED: bool>(
        &self,
        rounding: R,
        adjoints: &mut [f64],
        flags: &mut Vec<Flag>,
        log: &mut [f64],
    ) {
        for (slot, (&input, &partial)) in self.inputs.iter().zip(self.partials).enumerate() {
            let contribution = rounding.round(self.adjoint * partial);
            if CHECKED && !partial.is_finite() {
                flags.push(Flag::partial(self.step, self.node, slot, partial));
            }
            let input = input as usize;
            // Before the first contribution `held` is −0.0, and −0.0 + c = c exactly.
            let held = adjoints[input];
            let after = rounding.round(held + contribution);
            adjoints[input] = after;
            if LOGGED {
                log[self.first_edge + slot] = held;
            }
            if !after.is_finite() && held.is_finite() {
                flag_adjoint(flags, self.step, self.node, slot, input, after);
            }
        }
    }
}

/// Kept out of the hot loop: an adjoint becoming non-finite is rare.
#[cold]
#[inline(never)]
fn flag_adjoint(
    flags: &mut Vec<Flag>,
    step: usize,
    consumer: usize,
    slot: usize,
    input: usize,
    after: f64,
) {
    flags.extend(Flag::adjoint(
        step,
        consumer,
        slot,
        input,
        &Value::Scalar(after),
    ));
}
