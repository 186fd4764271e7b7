//! Progress and cancellation for long library work (loading, sweeping to the
//! end, diagnosing, replaying in another dtype, verifying): the caller passes
//! a [`Control`], the work reports how far it is and stops early when asked.
//! The library draws nothing; the command line shows a bar, the view a gauge.

use std::sync::atomic::{AtomicBool, Ordering};

/// The work was cancelled before it finished; nothing it produced is kept.
#[derive(Debug, Clone, Copy, PartialEq, Eq, thiserror::Error)]
#[error("cancelled")]
pub struct Cancelled;

/// A progress callback: the stage's name and the fraction of it done, 0 to 1.
pub type Report<'a> = &'a (dyn Fn(&str, f64) + Sync);

/// What long work reports to and listens to. `Sync`, so work split over
/// threads can share one.
#[derive(Clone, Copy, Default)]
pub struct Control<'a> {
    report: Option<Report<'a>>,
    cancel: Option<&'a AtomicBool>,
}

impl<'a> Control<'a> {
    /// Reports nothing and is never cancelled.
    pub const NONE: Control<'static> = Control {
        report: None,
        cancel: None,
    };

    /// A control with a progress callback and a cancel flag, either optional.
    pub fn new(report: Option<Report<'a>>, cancel: Option<&'a AtomicBool>) -> Control<'a> {
        Control { report, cancel }
    }

    /// Reports that `fraction` (0 to 1) of `stage` is done.
    pub fn progress(&self, stage: &str, fraction: f64) {
        if let Some(report) = self.report {
            report(stage, fraction.clamp(0.0, 1.0));
        }
    }

    /// The cancel flag, for a control of sub-work that reports its own way.
    pub fn cancel(&self) -> Option<&'a AtomicBool> {
        self.cancel
    }

    /// True once cancellation has been asked for.
    pub fn is_cancelled(&self) -> bool {
        self.cancel.is_some_and(|flag| flag.load(Ordering::Relaxed))
    }

    /// `Err(Cancelled)` once cancellation has been asked for: call it between
    /// units of work and return early with `?`.
    pub fn check(&self) -> Result<(), Cancelled> {
        if self.is_cancelled() {
            Err(Cancelled)
        } else {
            Ok(())
        }
    }
}

impl std::fmt::Debug for Control<'_> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Control")
            .field("reports", &self.report.is_some())
            .field("cancelled", &self.is_cancelled())
            .finish()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::sync::Mutex;

    #[test]
    fn reports_clamped_fractions_and_sees_cancellation() {
        let seen = Mutex::new(Vec::new());
        let report =
            |stage: &str, fraction: f64| seen.lock().unwrap().push((stage.to_string(), fraction));
        let flag = AtomicBool::new(false);
        let control = Control::new(Some(&report), Some(&flag));
        control.progress("sweeping", 0.5);
        control.progress("sweeping", 1.5);
        assert_eq!(control.check(), Ok(()));
        flag.store(true, Ordering::Relaxed);
        assert_eq!(control.check(), Err(Cancelled));
        assert_eq!(
            *seen.lock().unwrap(),
            vec![("sweeping".to_string(), 0.5), ("sweeping".to_string(), 1.0)]
        );
        assert!(!Control::NONE.is_cancelled());
    }
}
