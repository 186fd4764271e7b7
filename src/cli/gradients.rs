//! `ebb gradients`: every parameter's gradient in full, as JSON or safetensors.

use super::Outcome;
use anyhow::{Context, Result};
use ebb::report::Gradients;
use ebb::sweep::{LedgerMode, Sweep};
use ebb::trace::Trace;
use std::io::Write;
use std::path::Path;

/// Sweeps `trace` (read from `path`) and prints or writes its gradients.
pub fn gradients(
    path: &Path,
    trace: &Trace,
    output: Option<&Path>,
    out: &mut dyn Write,
) -> Result<Outcome> {
    if let Some(output) = output {
        // Ebb never writes to a trace it reads, nor to its sidecar.
        let sidecar = path.with_extension("safetensors");
        let same = |a: &Path, b: &Path| {
            a == b
                || matches!(
                    (a.canonicalize(), b.canonicalize()),
                    (Ok(a), Ok(b)) if a == b
                )
        };
        anyhow::ensure!(
            !same(output, path) && !same(output, &sidecar),
            "{}: refusing to write the gradients over the trace or its sidecar (hint: name another file)",
            output.display()
        );
    }
    let mut sweep = Sweep::new(trace, LedgerMode::Off);
    sweep.run_to_end();
    let gradients = Gradients::new(&path.display().to_string(), &sweep);
    match output {
        None => out
            .write_all((gradients.to_json() + "\n").as_bytes())
            .context("writing the gradients")?,
        Some(file) => match file.extension().and_then(|ext| ext.to_str()) {
            Some(ext) if ext.eq_ignore_ascii_case("safetensors") => {
                gradients.write_safetensors(file)?
            }
            Some(ext) if ext.eq_ignore_ascii_case("json") => gradients.write_json(file)?,
            _ => anyhow::bail!(
                "{}: unknown extension for the gradients (hint: use .safetensors or .json)",
                file.display()
            ),
        },
    }
    Ok(Outcome::Clean)
}
