//! Command-line arguments: one clap definition drives parsing, help and
//! shell completions.

use clap::{Parser, Subcommand};
use std::path::PathBuf;

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
        /// The trace file (.ron or .json).
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
    },
    /// Load a trace, sweep it to the end, report gradients and flags.
    ///
    /// Exit status: 0 when nothing is flagged, 1 when something is, 2 on bad input.
    #[command(
        after_help = "Examples:\n  ebb check traces/teaching.ron\n  ebb check run-1234.json --json | jq '.diagnosis.first_origin'\n  ebb check run.ron --rules rules.ron --set gain_above=50 --set 'replay=[f16, bf16]'"
    )]
    Check {
        /// The trace file (.ron, .json or .tape).
        trace: PathBuf,
        /// Print the report as JSON (stable field names, for CI scripts).
        #[arg(long)]
        json: bool,
        /// A RON settings file with rule thresholds and replay options, e.g. `(gain_above: 50.0, subnormals: flush)`.
        #[arg(long, value_name = "FILE")]
        rules: Option<PathBuf>,
        /// Override one setting, written as in a settings file; repeatable. Names: overflow_band,
        /// vanishing_below, exploding_above, vanishing_vs_seed, exploding_vs_seed, vanishing_vs_median,
        /// exploding_vs_median, gain_above, gain_below, subnormals, replay, lost_fraction, clip_norm,
        /// forward_slack, saturated_below, saturated_fraction, dead_fraction, activation_growth, off.
        #[arg(long = "set", value_name = "NAME=VALUE")]
        set: Vec<String>,
    },
    /// Print the sweep step by step: each node, its adjoint, each contribution.
    #[command(
        after_help = "Examples:\n  ebb sweep traces/teaching.ron\n  ebb sweep big.json --steps 20"
    )]
    Sweep {
        /// The trace file (.ron, .json or .tape).
        trace: PathBuf,
        /// Stop after this many steps.
        #[arg(long, value_name = "N")]
        steps: Option<usize>,
    },
    /// Look for a wrong derivative: recorded partials against the op table,
    /// finite differences, reported gradients and the tangent sweep.
    ///
    /// Exit status: 0 when every check agrees, 1 when a mismatch is found, 2 on bad input.
    #[command(
        after_help = "Examples:\n  ebb verify traces/teaching.ron\n  ebb verify layer.json --samples 32 --tolerance 1e-6 --json"
    )]
    Verify {
        /// The trace file (.ron or .json).
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
        /// The trace to read (.ron, .json or .tape).
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
