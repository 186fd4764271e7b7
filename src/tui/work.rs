//! Work that runs off the input thread: diagnosing, sweeping in another
//! dtype, verifying, and summarising the forward values. The app queues a
//! [`Job`]; the event loop hands each [`Task`] to a worker thread and feeds
//! what it returns back to the app, while keys keep working. Progress and
//! cancellation go through the library's [`Control`]; a cancelled task's
//! result is dropped, whenever it arrives.

use super::diagnosis::Diagnosed;
use super::precision::Traces;
use crate::control::{Cancelled, Control};
use crate::diagnose::{Settings, diagnose_with};
use crate::dtype::Dtype;
use crate::trace::Trace;
use crate::verify::{Verification, VerifyOptions, verify_with};
use std::collections::HashMap;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Instant;

/// Work the view can ask for.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Job {
    /// Diagnose the trace in this dtype (with the precision replays when it is the recorded one).
    Diagnose(Dtype),
    /// Make the trace re-typed into this dtype, for the precision toggle.
    Retype(Dtype),
    /// Run every verification check on the trace in this dtype.
    Verify(Dtype),
    /// The norm of the forward values of each group, for Trend.
    Survey,
}

impl Job {
    /// What is under way, for the status line: "diagnosing in f32".
    pub fn describe(self) -> String {
        match self {
            Job::Diagnose(dtype) => format!("diagnosing in {dtype}"),
            Job::Retype(dtype) => format!("re-typing the trace into {dtype}"),
            Job::Verify(dtype) => format!("verifying in {dtype}"),
            Job::Survey => "summarising the forward values".to_string(),
        }
    }
}

/// The norm of the forward values of each group, keyed by group name.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Survey {
    /// √(Σ ‖value‖²) over the group's nodes.
    pub norms: HashMap<String, f64>,
}

impl Survey {
    /// Sums every node's squared value norm into its group (tensor norms
    /// come from the value's cached summary, which reads mapped data without
    /// widening it).
    pub fn of(trace: &Trace, control: &Control) -> Result<Survey, Cancelled> {
        let mut squares: HashMap<String, f64> = HashMap::new();
        let count = trace.nodes().len().max(1);
        for (index, node) in trace.nodes().iter().enumerate() {
            if index % 4096 == 0 {
                control.check()?;
                control.progress("forward values", index as f64 / count as f64);
            }
            let norm = match node.value.as_scalar() {
                Some(x) if node.value.shape().is_empty() => x.abs(),
                _ => node.value.summary(trace.node_dtype(index)).norm,
            };
            let group = if node.group.is_empty() {
                "(no group)"
            } else {
                node.group.as_str()
            };
            match squares.get_mut(group) {
                Some(sum) => *sum += norm * norm,
                None => {
                    squares.insert(group.to_string(), norm * norm);
                }
            }
        }
        Ok(Survey {
            norms: squares
                .into_iter()
                .map(|(group, sum)| (group, sum.sqrt()))
                .collect(),
        })
    }
}

/// A finished verification and how long it took.
#[derive(Debug, Clone)]
pub struct Verified {
    /// The checks' results.
    pub verification: Verification,
    /// The dtype of the trace they ran on.
    pub dtype: Dtype,
    /// Seconds the checks took.
    pub seconds: f64,
}

/// What a task produced.
#[derive(Debug)]
pub enum Outcome {
    /// A diagnosis.
    Diagnosed(Box<Diagnosed>),
    /// The re-typed trace exists now.
    Retyped(Dtype),
    /// A verification.
    Verified(Box<Verified>),
    /// Forward norms per group.
    Surveyed(Survey),
    /// The task stopped early when asked.
    Cancelled,
    /// The task failed (a bug): what it said.
    Failed(String),
}

/// A task's result, with the id of the task it answers.
#[derive(Debug)]
pub struct Finished {
    /// The task's id.
    pub id: u64,
    /// The job it ran.
    pub job: Job,
    /// What it produced.
    pub outcome: Outcome,
}

/// Progress of a running task, shared between its thread and the screen.
#[derive(Debug, Default)]
pub struct Progress {
    cancel: AtomicBool,
    state: Mutex<(String, f64)>,
}

impl Progress {
    /// Asks the task to stop.
    pub fn cancel(&self) {
        self.cancel.store(true, Ordering::Relaxed);
    }

    /// The stage the task reported last and the fraction of it done.
    pub fn read(&self) -> (String, f64) {
        self.state
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner())
            .clone()
    }

    fn report(&self, stage: &str, fraction: f64) {
        let mut state = self
            .state
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner());
        if state.0 != stage {
            state.0 = stage.to_string();
        }
        state.1 = fraction;
    }
}

/// One job with everything it needs, ready to run on any thread.
pub struct Task {
    /// Its id: results of other tasks are told apart by it.
    pub id: u64,
    /// The job.
    pub job: Job,
    /// The traces it reads.
    pub traces: Arc<Traces>,
    /// The diagnosis's thresholds.
    pub settings: Settings,
    /// Where it reports progress and hears of cancellation.
    pub progress: Arc<Progress>,
}

impl Task {
    /// Runs the job to the end, or until cancelled.
    pub fn run(self) -> Finished {
        let progress = self.progress.clone();
        let report = move |stage: &str, fraction: f64| progress.report(stage, fraction);
        let control = Control::new(Some(&report), Some(&self.progress.cancel));
        let outcome = match self.work(&control) {
            Ok(outcome) => outcome,
            Err(Cancelled) => Outcome::Cancelled,
        };
        Finished {
            id: self.id,
            job: self.job,
            outcome,
        }
    }

    fn work(&self, control: &Control) -> Result<Outcome, Cancelled> {
        control.check()?;
        let traces = &self.traces;
        let outcome = match self.job {
            Job::Diagnose(dtype) => {
                control.progress("diagnosing", 0.0);
                let trace = traces.get(dtype);
                let mut settings = self.settings.clone();
                if dtype != traces.recorded().dtype() {
                    // A re-typed copy gets its own rules, origins and paths; the
                    // replays belong to the recorded trace's diagnosis.
                    settings.replay.clear();
                }
                let diagnosis = diagnose_with(trace, &settings, control)?;
                Outcome::Diagnosed(Box::new(Diagnosed::new(diagnosis)))
            }
            Job::Retype(dtype) => {
                control.progress("re-typing", 0.0);
                traces.get(dtype);
                Outcome::Retyped(dtype)
            }
            Job::Verify(dtype) => {
                control.progress("verifying", 0.0);
                let started = Instant::now();
                let verification =
                    verify_with(traces.get(dtype), &VerifyOptions::default(), control)?;
                Outcome::Verified(Box::new(Verified {
                    verification,
                    dtype,
                    seconds: started.elapsed().as_secs_f64(),
                }))
            }
            Job::Survey => Outcome::Surveyed(Survey::of(traces.recorded(), control)?),
        };
        // A cancel that comes after the last check inside still drops the result.
        control.check()?;
        Ok(outcome)
    }
}

/// The job under way, as the app keeps it.
#[derive(Debug, Clone)]
pub struct Running {
    /// Its task's id.
    pub id: u64,
    /// The job.
    pub job: Job,
    /// Its progress.
    pub progress: Arc<Progress>,
    /// When it started.
    pub started: Instant,
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::trace::validate;

    #[test]
    fn a_survey_sums_squared_norms_per_group_and_stops_when_cancelled() {
        let trace = validate(crate::demos::teaching()).unwrap();
        let survey = Survey::of(&trace, &Control::NONE).unwrap();
        // inputs: price 2.5, unit_cost 1, sensitivity 0.4, storage_rate 0.1, fee_rate 0.05
        // (common practice: the L2 norm of the group's values taken together).
        let inputs = (2.5f64 * 2.5 + 1.0 + 0.4 * 0.4 + 0.1 * 0.1 + 0.05 * 0.05).sqrt();
        assert!((survey.norms["inputs"] - inputs).abs() < 1e-15);
        assert_eq!(survey.norms.len(), trace.groups().len());
        let stop = AtomicBool::new(true);
        assert_eq!(
            Survey::of(&trace, &Control::new(None, Some(&stop))),
            Err(Cancelled)
        );
    }

    #[test]
    fn a_cancelled_task_says_so() {
        let trace = validate(crate::demos::teaching()).unwrap();
        let progress = Arc::new(Progress::default());
        progress.cancel();
        let task = Task {
            id: 7,
            job: Job::Diagnose(trace.dtype()),
            traces: Traces::new(trace),
            settings: Settings::default(),
            progress,
        };
        let finished = task.run();
        assert_eq!(finished.id, 7);
        assert!(matches!(finished.outcome, Outcome::Cancelled));
    }
}
