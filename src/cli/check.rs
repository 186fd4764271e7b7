//! `ebb check`: sweep, diagnose, report; the report's layout and which
//! rules fail the check.

use super::Outcome;
use anyhow::{Context, Result};
use ebb::control::Control;
use ebb::diagnose::{Rule, Settings, diagnose_with};
use ebb::report::{Report, TextOptions};
use ebb::sweep::{LedgerMode, Sweep};
use ebb::trace::Trace;
use std::io::{IsTerminal, Write};

/// How `ebb check` reports.
#[derive(Debug, Clone, Default)]
pub struct CheckOptions {
    /// JSON instead of text.
    pub json: bool,
    /// Only the diagnosis and the gradient table.
    pub brief: bool,
    /// The rules that fail the check; `None` for any.
    pub fail_on: Option<Vec<Rule>>,
    /// Fit chains and paths into this many columns.
    pub width: Option<usize>,
}

/// The rules `--fail-on` names (already checked by the parser): `None` for
/// the default, any rule; `none` for no rule.
pub fn fail_on(names: &[String]) -> Option<Vec<Rule>> {
    if names.is_empty() || names.iter().any(|name| name == "any") {
        return None;
    }
    Some(
        names
            .iter()
            .filter_map(|name| Rule::from_name(name))
            .collect(),
    )
}

/// The width to fit chains and paths into: `--width` (0 for no limit), else
/// the terminal's, else `$COLUMNS`, else no limit.
pub fn width(given: Option<usize>) -> Option<usize> {
    match given {
        Some(0) => None,
        Some(width) => Some(width),
        None if std::io::stdout().is_terminal() => {
            terminal_size::terminal_size().map(|(width, _)| width.0 as usize)
        }
        None => std::env::var("COLUMNS")
            .ok()
            .and_then(|columns| columns.trim().parse().ok())
            .filter(|&columns: &usize| columns > 0),
    }
}

/// Sweeps and diagnoses `trace`, writes the report, says whether it fails.
pub fn check(
    path: &str,
    trace: &Trace,
    options: &CheckOptions,
    settings: &Settings,
    out: &mut dyn Write,
) -> Result<Outcome> {
    let own = settings.swept_trace(trace);
    let mut sweep = Sweep::new(&own, LedgerMode::Off);
    sweep.run_to_end();
    let diagnosis = {
        let bar = super::progress::WorkBar::new();
        let report = |stage: &str, fraction: f64| bar.report(stage, fraction);
        diagnose_with(trace, settings, &Control::new(Some(&report), None))
            .expect("nothing cancels the diagnosis")
    };
    let report = Report::new(path, &sweep)
        .with_diagnosis(trace, &diagnosis)
        .with_fail_on(options.fail_on.as_deref());
    let text = if options.json {
        report.to_json() + "\n"
    } else {
        report.to_text_with(&TextOptions {
            width: options.width,
            brief: options.brief,
        })
    };
    out.write_all(text.as_bytes())
        .context("writing the report")?;
    Ok(if report.failed {
        Outcome::Flagged
    } else {
        Outcome::Clean
    })
}
