//! The command-line layer: parses arguments, calls the library, prints.
//! Nothing here computes; exit codes are chosen in `main`.

mod args;
mod bus;
mod check;
mod convert;
mod gradients;
mod listing;
mod progress;

pub use args::{Cli, Command};

use anyhow::{Context, Result};
use clap::CommandFactory;
use ebb::control::Control;
use ebb::diagnose::Settings;
use ebb::ops::CATALOG;
use ebb::trace::{self, Encoding, LoadError, Trace};
use ebb::tui::{self, KeyMap, Theme, ViewError};
use ebb::verify::{Direction, VerifyOptions, verify_with};
use std::io::{IsTerminal, Write};
use std::path::Path;

/// The demo trace built into the binary.
pub const DEMO_NAME: &str = "(built-in demo: traces/teaching.ron)";
const DEMO_TEXT: &str = include_str!("../../traces/teaching.ron");

/// How a command ended, for the exit status.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Outcome {
    /// Nothing to report.
    Clean,
    /// Something was flagged.
    Flagged,
}

/// A failure with the input, reported in one line and exit status 2.
#[derive(Debug, thiserror::Error)]
#[error(transparent)]
pub struct BadInput(#[from] pub LoadError);

/// Runs a parsed command line, writing to `out`. Nothing written to `out`
/// counts if a sidecar the command read was changed meanwhile: the error
/// says so instead.
pub fn run(cli: Cli, out: &mut dyn Write) -> Result<Outcome> {
    let outcome = dispatch(cli, out)?;
    trace::check_sidecars_unchanged().map_err(BadInput)?;
    Ok(outcome)
}

fn dispatch(cli: Cli, out: &mut dyn Write) -> Result<Outcome> {
    match cli.command {
        None if std::io::stdout().is_terminal() => view(
            load_demo()?,
            DEMO_NAME,
            Look::of(cli.theme.as_deref(), cli.keys.as_deref())?,
            Settings::default(),
        ),
        None => check::check(
            DEMO_NAME,
            &load_demo()?,
            &check::CheckOptions::default(),
            &Settings::default(),
            out,
        ),
        Some(Command::Open {
            trace,
            theme,
            keys,
            rules,
            set,
            ledger_budget,
        }) => open(
            &trace,
            Look::of(theme.as_deref(), keys.as_deref())?,
            settings(rules.as_deref(), &set, ledger_budget)?,
        ),
        Some(Command::Check {
            trace,
            json,
            brief,
            fail_on,
            width,
            rules,
            set,
            ledger_budget,
        }) => {
            let settings = settings(rules.as_deref(), &set, ledger_budget)?;
            let options = check::CheckOptions {
                json,
                brief,
                fail_on: check::fail_on(&fail_on),
                width: check::width(width),
            };
            check::check(
                &trace.display().to_string(),
                &load(&trace)?,
                &options,
                &settings,
                out,
            )
        }
        Some(Command::Sweep {
            trace,
            steps,
            from,
            node,
            json,
            ledger_budget,
        }) => {
            let loaded = load(&trace)?;
            warn_rounded(&trace, &loaded);
            let options = listing::SweepOptions {
                steps,
                from: from.map(|step| step as usize),
                node,
                json,
                ledger_budget: ledger_budget.unwrap_or(ebb::sweep::DEFAULT_BUDGET),
            };
            listing::sweep(&loaded, &options, out)
        }
        Some(Command::Gradients { trace, output }) => {
            let loaded = load(&trace)?;
            warn_rounded(&trace, &loaded);
            gradients::gradients(&trace, &loaded, output.as_deref(), out)
        }
        Some(Command::Verify {
            trace,
            json,
            tolerance,
            samples,
            seed,
            direction,
        }) => {
            let loaded = load(&trace)?;
            warn_rounded(&trace, &loaded);
            let direction = direction
                .map(|text| parse_direction(&loaded, &text))
                .transpose()?;
            let options = VerifyOptions {
                tolerance,
                samples,
                seed,
                direction,
            };
            verify_command(&loaded, &options, json, out)
        }
        Some(Command::Ops) => ops(out),
        Some(Command::Convert { input, output }) => convert::convert(&input, &output, out),
        Some(Command::Completions { shell }) => {
            let mut command = Cli::command();
            clap_complete::generate(shell, &mut command, "ebb", out);
            Ok(Outcome::Clean)
        }
    }
}

/// Standard output is not a terminal, so the view cannot open.
#[derive(Debug, thiserror::Error)]
#[error(
    "`ebb open` needs a terminal, and standard output is not one (hint: use `ebb check {0}` for a report or `ebb sweep {0}` for a step-by-step listing)"
)]
pub struct NeedsTerminal(String);

/// How the view looks and which keys it takes, from `--theme` and `--keys`.
struct Look {
    themes: Vec<Theme>,
    keymap: KeyMap,
}

impl Look {
    fn of(theme: Option<&str>, keys: Option<&Path>) -> Result<Look> {
        let first = theme.map(Theme::resolve).transpose()?;
        Ok(Look {
            themes: Theme::cycle(first, tui::no_color_requested()),
            keymap: keys.map(KeyMap::load).transpose()?.unwrap_or_default(),
        })
    }
}

fn open(path: &Path, look: Look, settings: Settings) -> Result<Outcome> {
    if !std::io::stdout().is_terminal() {
        return Err(NeedsTerminal(path.display().to_string()).into());
    }
    tui::open(path, look.themes, look.keymap, settings).map_err(view_error)?;
    Ok(Outcome::Clean)
}

fn view(trace: Trace, label: &str, look: Look, settings: Settings) -> Result<Outcome> {
    tui::view(trace, label, look.themes, look.keymap, settings).map_err(view_error)?;
    Ok(Outcome::Clean)
}

fn view_error(error: ViewError) -> anyhow::Error {
    match error {
        ViewError::Load(error) => BadInput(error).into(),
        other => other.into(),
    }
}

fn load(path: &Path) -> Result<Trace> {
    bus::guard(path)?;
    trace::load_with(path, progress::for_trace(path).as_mut())
        .map_err(|error| BadInput(error).into())
}

/// Says once, on standard error, that numbers were rounded into their
/// dtype on load (`ebb check` lists them in its report instead).
fn warn_rounded(path: &Path, trace: &Trace) {
    let rounded = ebb::report::RoundingEntry::all(trace);
    if let Some(first) = rounded.first() {
        eprintln!(
            "warning: {}: {} {} numbers not representable in {} dtype, rounded on load; first {} (every sweep uses the stored values; `ebb check` lists them)",
            path.display(),
            rounded.len(),
            if rounded.len() == 1 {
                "node holds"
            } else {
                "nodes hold"
            },
            if rounded.len() == 1 { "its" } else { "their" },
            first.text()
        );
    }
}

/// Loads the demo embedded in the binary.
pub fn load_demo() -> Result<Trace> {
    trace::load_str(DEMO_TEXT, Encoding::Ron, Path::new("traces/teaching.ron"))
        .map_err(|error| BadInput(error).into())
}

/// The settings: defaults, then the file, then each `--set` in order, then
/// `--ledger-budget`.
fn settings(
    rules: Option<&Path>,
    set: &[String],
    ledger_budget: Option<usize>,
) -> Result<Settings> {
    let mut settings = match rules {
        Some(path) => Settings::load(path)?,
        None => Settings::default(),
    };
    for text in set {
        settings.apply(text)?;
    }
    if let Some(budget) = ledger_budget {
        settings.ledger_budget = budget;
    }
    Ok(settings)
}

/// `NODE` or `NODE:K`: the unit vector of one leaf element.
fn parse_direction(trace: &Trace, text: &str) -> Result<Direction> {
    let (id, element) = match text.rsplit_once(':') {
        Some((id, element)) => (
            id,
            element
                .parse::<usize>()
                .with_context(|| format!("--direction {text}: K must be an element index"))?,
        ),
        None => (text, 0),
    };
    let node = trace
        .find(id)
        .with_context(|| format!("--direction {text}: no node '{id}' in the trace"))?;
    let len = trace.node(node).value.len();
    anyhow::ensure!(
        trace.node(node).op.is_leaf(),
        "--direction {text}: '{id}' is not a leaf (input, param or const)"
    );
    anyhow::ensure!(
        element < len,
        "--direction {text}: '{id}' has {len} elements"
    );
    Ok(Direction::Unit { node, element })
}

fn verify_command(
    trace: &Trace,
    options: &VerifyOptions,
    json: bool,
    out: &mut dyn Write,
) -> Result<Outcome> {
    let verification = {
        let bar = progress::WorkBar::new();
        let report = |stage: &str, fraction: f64| bar.report(stage, fraction);
        verify_with(trace, options, &Control::new(Some(&report), None))
            .expect("nothing cancels the verification")
    };
    let text = if json {
        verification.to_json(trace) + "\n"
    } else {
        verification.to_text(trace)
    };
    out.write_all(text.as_bytes())
        .context("writing the verification")?;
    Ok(if verification.agrees() {
        Outcome::Clean
    } else {
        Outcome::Flagged
    })
}

fn ops(out: &mut dyn Write) -> Result<Outcome> {
    let mut text = String::from(
        "op               inputs     required       what it computes\n                 ∂ how the adjoint reaches the inputs\n",
    );
    for row in CATALOG {
        let required: Vec<&str> = row.required.iter().map(|attr| attr.as_str()).collect();
        text.push_str(&format!(
            "{:<16} {:<10} {:<14} {}\n{:<16} ∂ {}\n",
            row.name,
            row.arity
                .to_string()
                .replace(" inputs", "")
                .replace(" input", ""),
            required.join(", "),
            row.summary,
            "",
            row.derivative
        ));
    }
    text.push_str("any other name: a custom op; it must record a partial on every input edge\n");
    text.push_str("attributes, defaults and index tensors: traces/FORMAT.md, \"Ops\"\n");
    out.write_all(text.as_bytes())
        .context("writing the catalog")?;
    Ok(Outcome::Clean)
}
