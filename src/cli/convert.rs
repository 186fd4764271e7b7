//! `ebb convert IN OUT`: rewrite a trace in another form, chosen by OUT's
//! extension. Never writes over its input; the library writes through a
//! temporary file and a rename, and a signal removes the temporary files
//! before the process ends.

use super::{BadInput, Outcome, progress};
use anyhow::{Context, Result, bail};
use ebb::trace::{self, Format, LoadError};
use signal_hook::consts::{SIGHUP, SIGINT, SIGTERM};
use signal_hook::iterator::Signals;
use std::io::Write;
use std::path::{Path, PathBuf};

/// The absolute form of a path that may not exist yet (its directory must).
fn resolved(path: &Path) -> Option<PathBuf> {
    if let Ok(path) = path.canonicalize() {
        return Some(path);
    }
    let dir = match path.parent() {
        Some(dir) if !dir.as_os_str().is_empty() => dir,
        _ => Path::new("."),
    };
    Some(dir.canonicalize().ok()?.join(path.file_name()?))
}

fn name(format: Option<Format>) -> &'static str {
    match format {
        Some(Format::Ron) => "RON",
        Some(Format::Json) => "JSON",
        Some(Format::Tape) => "with a safetensors sidecar",
        None => "text",
    }
}

/// From now on SIGINT, SIGTERM and SIGHUP remove the temporary files the
/// conversion is writing, then end the process as the signal would have (a
/// shell sees 128 + its number). A handler thread does the work, outside
/// signal context, so it may take the lock the saves take.
fn remove_temporaries_on_signals() -> Result<()> {
    let mut signals = Signals::new([SIGINT, SIGTERM, SIGHUP])
        .context("installing the handler that removes temporary files on a signal")?;
    std::thread::spawn(move || {
        if let Some(signal) = signals.forever().next() {
            trace::abandon_saves();
            let _ = signal_hook::low_level::emulate_default_handler(signal);
            std::process::exit(128 + signal);
        }
    });
    Ok(())
}

/// An error if any file to be written is one that is read.
fn refuse_overwriting(reads: &[PathBuf], writes: &[PathBuf]) -> Result<()> {
    for written in writes {
        let clash = reads
            .iter()
            .find(|read| resolved(read).is_some_and(|read| Some(read) == resolved(written)));
        if let Some(read) = clash {
            let what = if read == &reads[0] { "" } else { "'s sidecar" };
            bail!(
                "{}: would overwrite the input{what} {} (hint: ebb never writes to a trace it reads; choose another output name)",
                written.display(),
                read.display()
            );
        }
    }
    Ok(())
}

/// Runs the conversion and reports it on `out`.
pub fn convert(input: &Path, output: &Path, out: &mut dyn Write) -> Result<Outcome> {
    let Some(target) = Format::from_path(output) else {
        bail!(
            "{}: unknown trace extension (hint: use .ron, .json, or .tape for a trace with a safetensors sidecar)",
            output.display()
        );
    };
    let source = Format::from_path(input);
    // Refused early by name; the files the input's header names are known
    // only once it is read, and are checked again then.
    let reads = source.map_or_else(|| vec![input.to_path_buf()], |format| format.files(input));
    refuse_overwriting(&reads, &target.files(output))?;
    remove_temporaries_on_signals()?;
    super::bus::guard(input)?;
    let (file, reads) =
        trace::read_file_from(input, progress::for_trace(input).as_mut()).map_err(BadInput)?;
    refuse_overwriting(&reads, &target.files(output))?;
    let nodes = file.nodes.len();
    trace::validate(file.clone()).map_err(|problems| {
        BadInput(LoadError::Invalid {
            path: input.to_path_buf(),
            problems,
        })
    })?;
    // A mapped sidecar changed while it was read would give a mixed output.
    trace::check_sidecars_unchanged().map_err(BadInput)?;
    trace::save_with(&file, output, progress::for_trace(input).as_mut())?;
    let written: Vec<String> = target
        .files(output)
        .iter()
        .map(|path| path.display().to_string())
        .collect();
    writeln!(
        out,
        "converted {} ({}) to {} ({}), {nodes} nodes",
        input.display(),
        name(source),
        written.join(" + "),
        name(Some(target))
    )
    .context("writing the summary")?;
    Ok(Outcome::Clean)
}
