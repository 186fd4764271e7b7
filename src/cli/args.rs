//! Command-line arguments: one clap definition drives parsing, help and
//! shell completions.

use clap::{Parser, Subcommand};
use std::path::PathBuf;

/// Every trace form a command reads, for each command's help.
pub const TRACE_FORMS: &str = "The trace: .ron or .json (text, tensors inline or in the .safetensors sidecar its header names), or .tape (a RON header whose tensors live in NAME.safetensors beside it).";

/// A rule name for `--fail-on`, or `any` / `none`.
/// A size in bytes: a whole number with an optional K, M or G (powers of 1024).
fn byte_size(text: &str) -> Result<usize, String> {
    let text = text.trim();
    let (digits, shift) = match text.char_indices().last() {
        Some((at, 'K' | 'k')) => (&text[..at], 10),
        Some((at, 'M' | 'm')) => (&text[..at], 20),
        Some((at, 'G' | 'g')) => (&text[..at], 30),
        _ => (text, 0),
    };
    digits
        .parse::<usize>()
        .ok()
        .and_then(|n| n.checked_mul(1usize << shift))
        .ok_or_else(|| {
            format!("`{text}` is not a size (write bytes, or a number with K, M or G, e.g. 256M)")
        })
}

fn rule_name(text: &str) -> Result<String, String> {
    let text = text.trim();
    if text == "any" || text == "none" || ebb::diagnose::Rule::from_name(text).is_some() {
        Ok(text.to_string())
    } else {
        let names: Vec<&str> = ebb::diagnose::Rule::ALL
            .iter()
            .map(|rule| rule.name())
            .collect();
        Err(format!(
            "no rule is called `{text}` (rules: {}; or any, none)",
            names.join(", ")
        ))
    }
}

/// Step the reverse sweep of a recorded trace and find where a bad gradient was born.
#[derive(Debug, Parser)]
#[command(name = "ebb", version, about, long_about = None, after_help = "Examples:\n  ebb                           step the built-in demo trace in the view (its report when not a terminal)\n  ebb open traces/teaching.ron  step a trace in the full-screen view\n  ebb check traces/teaching.ron report gradients and flags\n  ebb sweep traces/teaching.ron list every step of the sweep")]
pub struct Cli {
    /// What to do; without one, Ebb works on its built-in demo trace.
    #[command(subcommand)]
    pub command: Option<Command>,
    /// Theme of the view on the built-in demo: a shipped name (dark, light, contrast, colorblind) or a path to a .ron theme.
    #[arg(long, value_name = "NAME|PATH")]
    pub theme: Option<String>,
    /// Keys of the view on the built-in demo, from a RON key file (as for `ebb open --keys`).
    #[arg(long, value_name = "FILE")]
    pub keys: Option<PathBuf>,
}

/// The subcommands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Step a trace's reverse sweep in the full-screen terminal view.
    ///
    /// Needs a terminal; `ebb check` and `ebb sweep` give text output. NO_COLOR is honoured.
    #[command(
        after_help = "Examples:\n  ebb open traces/teaching.ron\n  ebb open run.json --theme colorblind\n  ebb open run.json --theme my-theme.ron\n  ebb open run.json --keys my-keys.ron\n\nKeys: ? in the view lists them all."
    )]
    Open {
        #[arg(help = TRACE_FORMS)]
        trace: PathBuf,
        /// A shipped theme (dark, light, contrast, colorblind) or a path to a .ron theme.
        #[arg(long, value_name = "NAME|PATH")]
        theme: Option<String>,
        /// A RON key file giving actions other keys, e.g. `[(action: "step", keys: ["Right"])]`.
        #[arg(long, value_name = "FILE")]
        keys: Option<PathBuf>,
        /// A RON settings file with the diagnosis's thresholds, as for `ebb check --rules`.
        #[arg(long, value_name = "FILE")]
        rules: Option<PathBuf>,
        /// Override one diagnosis setting, as for `ebb check --set`; repeatable.
        #[arg(long = "set", value_name = "NAME=VALUE")]
        set: Vec<String>,
        /// Bytes of tensor contributions each sweep's ledger keeps for stepping back, e.g. 256M
        /// or 4G (default 512M). Beyond them it keeps checkpoints every 16 steps and steps back by
        /// replaying from the nearest one: the same numbers, more time.
        #[arg(long, value_name = "SIZE", value_parser = byte_size)]
        ledger_budget: Option<usize>,
    },
    /// Load a trace, sweep it to the end, report gradients and flags.
    ///
    /// Exit status: 0 when nothing is flagged, 1 when something is (with --fail-on: when a
    /// finding of one of those rules is), 2 on bad input.
    #[command(
        after_help = "Examples:\n  ebb check traces/teaching.ron\n  ebb check run-1234.json --json | jq '.diagnosis.first_origin'\n  ebb check run.ron --rules rules.ron --set gain_above=50 --set 'replay=[f16, bf16]'\n  ebb check run.tape --brief --fail-on non_finite,overflow,exploding"
    )]
    Check {
        #[arg(help = TRACE_FORMS)]
        trace: PathBuf,
        /// Print the report as JSON (stable field names, for CI scripts).
        #[arg(long)]
        json: bool,
        /// Print only the diagnosis and the gradient table.
        #[arg(long)]
        brief: bool,
        /// Rules whose findings make the exit status 1, comma-separated (default: any rule or
        /// flag; `none`: never). A sweep flag counts as non_finite.
        #[arg(long, value_name = "RULE,…", value_delimiter = ',', value_parser = rule_name)]
        fail_on: Vec<String>,
        /// Fit chains and paths into this many columns, keeping both ends (default: the
        /// terminal's width, or $COLUMNS; 0: no limit).
        #[arg(long, value_name = "N")]
        width: Option<usize>,
        /// A RON settings file with rule thresholds and replay options, e.g. `(gain_above: 50.0, subnormals: flush)`.
        #[arg(long, value_name = "FILE")]
        rules: Option<PathBuf>,
        /// Override one setting, written as in a settings file; repeatable. Names: overflow_band,
        /// vanishing_below, exploding_above, vanishing_vs_seed, exploding_vs_seed, vanishing_vs_median,
        /// exploding_vs_median, gain_above, gain_below, subnormals, replay, lost_fraction, clip_norm,
        /// forward_slack, saturated_below, saturated_fraction, dead_fraction, activation_growth,
        /// ledger_budget, off.
        #[arg(long = "set", value_name = "NAME=VALUE")]
        set: Vec<String>,
        /// Bytes of tensor contributions each sweep's ledger keeps for stepping back, e.g. 256M
        /// or 4G (default 512M). Beyond them it keeps checkpoints every 16 steps and steps back by
        /// replaying from the nearest one: the same numbers, more time.
        #[arg(long, value_name = "SIZE", value_parser = byte_size)]
        ledger_budget: Option<usize>,
    },
    /// Print the sweep step by step: each node, its adjoint, each contribution.
    ///
    /// Tensors show their shape, norm and four entries: the first four, or those around the
    /// first NaN or infinity, which is named with its index. Exit status: 0 when the sweep
    /// raises no flag, 1 when it does, 2 on bad input.
    #[command(
        after_help = "Examples:\n  ebb sweep traces/teaching.ron\n  ebb sweep big.json --steps 20\n  ebb sweep run.tape --from 120 --steps 5\n  ebb sweep run.tape --node layer3.w --json"
    )]
    Sweep {
        #[arg(help = TRACE_FORMS)]
        trace: PathBuf,
        /// List at most this many steps.
        #[arg(long, value_name = "N")]
        steps: Option<usize>,
        /// Start listing at this step (1-based); the steps before it run unlisted.
        #[arg(long, value_name = "STEP", value_parser = clap::value_parser!(u64).range(1..))]
        from: Option<u64>,
        /// List only the steps that process node ID or send it a contribution.
        #[arg(long, value_name = "ID")]
        node: Option<String>,
        /// Print the steps as JSON.
        #[arg(long)]
        json: bool,
        /// Bytes of tensor contributions each sweep's ledger keeps for stepping back, e.g. 256M
        /// or 4G (default 512M). Beyond them it keeps checkpoints every 16 steps and steps back by
        /// replaying from the nearest one: the same numbers, more time.
        #[arg(long, value_name = "SIZE", value_parser = byte_size)]
        ledger_budget: Option<usize>,
    },
    /// Print every parameter's gradient in full precision, as JSON or into a safetensors file.
    ///
    /// Each gradient is the parameter's adjoint after the whole sweep, in the parameter's dtype;
    /// a parameter that does not reach the output gets zeros. Exit status: 0, or 2 on bad input.
    #[command(
        after_help = "Examples:\n  ebb gradients traces/teaching.ron\n  ebb gradients run.tape -o grads.safetensors\n  ebb gradients run.json | jq '.params[] | select(.id == \"fc1.weight\") | .data[:4]'"
    )]
    Gradients {
        #[arg(help = TRACE_FORMS)]
        trace: PathBuf,
        /// Write them to FILE instead: .safetensors (one tensor per parameter, named by its id,
        /// in its dtype) or .json. Written to a temporary file first, then renamed.
        #[arg(short = 'o', long = "output", value_name = "FILE")]
        output: Option<PathBuf>,
    },
    /// Look for a wrong derivative: recorded partials against the op table,
    /// finite differences, reported gradients and the tangent sweep.
    ///
    /// Exit status: 0 when every check agrees and every number is finite, 1 when a mismatch
    /// is found or a check cannot judge (NaN or infinite numbers), 2 on bad input.
    #[command(
        after_help = "Examples:\n  ebb verify traces/teaching.ron\n  ebb verify layer.json --samples 32 --tolerance 1e-6 --json"
    )]
    Verify {
        #[arg(help = TRACE_FORMS)]
        trace: PathBuf,
        /// Print the result as JSON.
        #[arg(long)]
        json: bool,
        /// Relative error above which a check counts as a mismatch.
        #[arg(long, value_name = "X", default_value_t = 1e-4)]
        tolerance: f64,
        /// Entries of each parameter checked by finite differences.
        #[arg(long, value_name = "N", default_value_t = 8)]
        samples: usize,
        /// Seed of the sampled entries and of the random tangent direction.
        #[arg(long, value_name = "S", default_value_t = 0xEBB)]
        seed: u64,
        /// Tangent direction: the unit vector of NODE's element K (default: a seeded random direction over all params).
        #[arg(long, value_name = "NODE[:K]")]
        direction: Option<String>,
    },
    /// Rewrite a trace in another form: .ron, .json, or .tape (a RON header
    /// with its tensors in a .safetensors sidecar), chosen by OUT's extension.
    ///
    /// Never writes over its input; writes a temporary file and renames it.
    #[command(
        after_help = "Examples:\n  ebb convert run.json run.tape    run.tape + run.safetensors\n  ebb convert run.tape run.ron     back to text"
    )]
    Convert {
        #[arg(help = TRACE_FORMS)]
        input: PathBuf,
        /// Where to write; the extension picks the form.
        output: PathBuf,
    },
    /// List the op catalog: names, inputs, required attributes.
    #[command(after_help = "Example:\n  ebb ops")]
    Ops,
    /// Print a shell completion script.
    #[command(
        after_help = "Example:\n  ebb completions bash > ~/.local/share/bash-completion/completions/ebb"
    )]
    Completions {
        /// The shell.
        shell: clap_complete::Shell,
    },
}
