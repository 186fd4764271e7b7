//! The trace the view shows and the precision toggle's copies of it: the
//! recorded trace re-typed into each other dtype, each made once (on the
//! worker, when first asked for) and kept as long as the view. Shared with
//! the worker through an `Arc`, so work can outlive a key press.

use crate::dtype::Dtype;
use crate::tensor::Value;
use crate::trace::Trace;
use std::sync::{Arc, OnceLock};

/// The recorded trace and its re-typed copies, one per dtype, each made when first asked for.
pub struct Traces {
    recorded: Trace,
    copies: [OnceLock<Trace>; 4],
}

impl Traces {
    /// The recorded trace, with no copies yet, ready to share with the worker.
    pub fn new(recorded: Trace) -> Arc<Traces> {
        Arc::new(Traces {
            recorded,
            copies: Default::default(),
        })
    }

    /// The trace as recorded.
    pub fn recorded(&self) -> &Trace {
        &self.recorded
    }

    /// The trace in `dtype`: the recorded one in its own dtype, else a copy
    /// (values and partials rounded into `dtype`, subnormals as recorded),
    /// made on first call: a sweep over the whole trace, so the view asks the worker.
    pub fn get(&self, dtype: Dtype) -> &Trace {
        if dtype == self.recorded.dtype() {
            return &self.recorded;
        }
        self.copies[slot(dtype)]
            .get_or_init(|| self.recorded.retyped(dtype, self.recorded.subnormals()))
    }

    /// Whether the trace in `dtype` exists already (the recorded dtype always does).
    pub fn has(&self, dtype: Dtype) -> bool {
        dtype == self.recorded.dtype() || self.copies[slot(dtype)].get().is_some()
    }
}

fn slot(dtype: Dtype) -> usize {
    Dtype::ALL
        .iter()
        .position(|&listed| listed == dtype)
        .expect("every dtype is listed")
}

/// One node's adjoint in the view's dtype against the same sweep over the
/// recorded trace, at the same step.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Contrast {
    /// L2 norm in the view's dtype.
    pub norm: f64,
    /// L2 norm in the recorded dtype.
    pub recorded_norm: f64,
    /// Entries that are zero in the view's dtype and not in the recorded one.
    pub zero_here_only: usize,
    /// Entries that are zero in the recorded dtype and not in the view's.
    pub zero_recorded_only: usize,
    /// Entries finite in one dtype and not in the other.
    pub finiteness_differs: usize,
    /// Entries in all.
    pub len: usize,
}

impl Contrast {
    /// Compares two adjoints of one node entry by entry (a one-element value broadcasts).
    pub fn of(here: &Value, recorded: &Value) -> Contrast {
        let (a, b) = (here.to_f64(), recorded.to_f64());
        let len = a.len().max(b.len());
        let at = |data: &[f64], k: usize| if data.len() == 1 { data[0] } else { data[k] };
        let mut contrast = Contrast {
            norm: here.l2_norm(),
            recorded_norm: recorded.l2_norm(),
            zero_here_only: 0,
            zero_recorded_only: 0,
            finiteness_differs: 0,
            len,
        };
        for k in 0..len {
            let (x, y) = (at(&a, k), at(&b, k));
            contrast.zero_here_only += usize::from(x == 0.0 && y != 0.0);
            contrast.zero_recorded_only += usize::from(y == 0.0 && x != 0.0);
            contrast.finiteness_differs += usize::from(x.is_finite() != y.is_finite());
        }
        contrast
    }
}

/// The dtype after `current` in the toggle's cycle: the recorded dtype
/// first, then f16, bf16, f32 and f64 in that order, without repeating it.
pub fn next_dtype(recorded: Dtype, current: Dtype) -> Dtype {
    let cycle: Vec<Dtype> = std::iter::once(recorded)
        .chain(Dtype::ALL.into_iter().filter(|&dtype| dtype != recorded))
        .collect();
    let at = cycle
        .iter()
        .position(|&dtype| dtype == current)
        .unwrap_or(0);
    cycle[(at + 1) % cycle.len()]
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::record::Tape;

    #[test]
    fn the_cycle_starts_at_the_recorded_dtype_and_visits_each_once() {
        let mut seen = vec![Dtype::F32];
        while seen.len() < 5 {
            seen.push(next_dtype(Dtype::F32, *seen.last().unwrap()));
        }
        assert_eq!(
            seen,
            [Dtype::F32, Dtype::F16, Dtype::Bf16, Dtype::F64, Dtype::F32]
        );
        assert_eq!(next_dtype(Dtype::F16, Dtype::F16), Dtype::Bf16);
        assert_eq!(next_dtype(Dtype::F16, Dtype::F64), Dtype::F16);
    }

    #[test]
    fn copies_are_made_once_and_rounded() {
        let mut tape = Tape::new("copies", Dtype::F64);
        // 1 + 2^-11 is the midpoint between f16's 1 and its next value 1 + 2^-10: ties to even gives 1
        // (IEEE 754-2019 §4.3.1, roundTiesToEven; f16 has 10 fraction bits, §3.6 Table 3.5).
        let w = tape.param("w", 1.0 + 2f64.powi(-11));
        let y = tape.mul(w, w);
        let trace = Trace::try_from(tape.finish(y)).unwrap();
        let copies = Traces::new(trace);
        assert!(copies.has(Dtype::F64) && !copies.has(Dtype::F16));
        let half = copies.get(Dtype::F16);
        assert_eq!(half.dtype(), Dtype::F16);
        assert_eq!(
            half.node(half.find("w").unwrap()).value.as_scalar(),
            Some(1.0)
        );
        assert!(std::ptr::eq(half, copies.get(Dtype::F16)), "made once");
        assert!(
            std::ptr::eq(copies.get(Dtype::F64), copies.recorded()),
            "the recorded dtype is the trace itself"
        );
    }

    #[test]
    fn contrast_counts_entries_that_changed_kind() {
        let here = Value::from_parts(vec![4], vec![0.0, 1.0, f64::INFINITY, 0.0]);
        let recorded = Value::from_parts(vec![4], vec![2f64.powi(-30), 1.0, 3.0, 0.0]);
        let contrast = Contrast::of(&here, &recorded);
        assert_eq!(
            (
                contrast.zero_here_only,
                contrast.zero_recorded_only,
                contrast.finiteness_differs,
                contrast.len
            ),
            (1, 0, 1, 4)
        );
        assert_eq!(contrast.recorded_norm, (2f64.powi(-60) + 1.0 + 9.0).sqrt());
    }
}
