//! Saving traces and reading them back whole, in any of the three forms,
//! chosen by extension: `.ron`, `.json`, or `.tape` (a binary-backed trace:
//! a RON header and a `.bin` sidecar). Every write goes to a temporary file
//! in the target directory and is renamed into place, so a failed write
//! leaves no half-written trace.

use super::binary;
use super::error::{LoadError, SaveError};
use super::load::{Encoding, parse, syntax_error, to_text};
use super::progress::{self, Progress, Silent};
use super::schema::TraceFile;
use std::io::Write;
use std::path::{Path, PathBuf};

/// The three forms a trace can be stored in.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    /// RON text.
    Ron,
    /// JSON text.
    Json,
    /// A binary-backed trace: header `NAME.tape`, sidecar `NAME.bin`.
    Tape,
}

impl Format {
    /// The form named by a path's extension.
    pub fn from_path(path: &Path) -> Option<Format> {
        match path.extension()?.to_str()?.to_ascii_lowercase().as_str() {
            "ron" => Some(Format::Ron),
            "json" => Some(Format::Json),
            "tape" => Some(Format::Tape),
            _ => None,
        }
    }

    /// The files a trace of this form at `path` occupies: the path itself,
    /// plus the sidecar for a binary-backed trace.
    pub fn files(self, path: &Path) -> Vec<PathBuf> {
        match self {
            Format::Tape => vec![path.to_path_buf(), binary::sidecar_path(path)],
            Format::Ron | Format::Json => vec![path.to_path_buf()],
        }
    }
}

/// Writes `file` to `path` in the form its extension names.
pub fn save(file: &TraceFile, path: &Path) -> Result<(), SaveError> {
    save_with(file, path, &mut Silent)
}

/// [`save`], reporting progress.
pub fn save_with(
    file: &TraceFile,
    path: &Path,
    progress: &mut dyn Progress,
) -> Result<(), SaveError> {
    let result = match Format::from_path(path) {
        None => Err(SaveError::UnknownExtension {
            path: path.to_path_buf(),
        }),
        Some(Format::Tape) => binary::write(file, path, progress),
        Some(text @ (Format::Ron | Format::Json)) => {
            if let Some(node) = binary::first_stored(file) {
                return Err(SaveError::NotInline {
                    path: path.to_path_buf(),
                    node,
                });
            }
            let encoding = if text == Format::Ron {
                Encoding::Ron
            } else {
                Encoding::Json
            };
            progress.stage("writing", None);
            let text = to_text(file, encoding);
            write_atomically(path, |out| out.write_all(text.as_bytes()))
        }
    };
    progress.finish();
    result
}

/// Reads a trace in any form into the schema types with every tensor's data
/// inline (a binary-backed trace's sidecar is read in full). Not validated.
pub fn read_file(path: &Path, progress: &mut dyn Progress) -> Result<TraceFile, LoadError> {
    if Format::from_path(path) == Some(Format::Tape) {
        return binary::read_inline(path, progress);
    }
    let text =
        progress::read_text(path, progress).map_err(|error| LoadError::reading(path, error))?;
    let encoding = Encoding::from_path(path).unwrap_or_else(|| Encoding::sniff(&text));
    progress.stage("parsing", None);
    parse(&text, encoding).map_err(|error| syntax_error(path, error))
}

/// Writes through `write` into a temporary file beside `path`, then renames
/// it over `path`. On any error the temporary file is removed and `path` is
/// untouched.
pub(crate) fn write_atomically(
    path: &Path,
    write: impl FnOnce(&mut dyn Write) -> std::io::Result<()>,
) -> Result<(), SaveError> {
    let staged = stage(path, write)?;
    commit(staged, path)
}

/// A finished temporary file waiting to be renamed into place.
pub(crate) struct Staged(tempfile::NamedTempFile);

impl Staged {
    /// The staged file's length in bytes.
    pub(crate) fn len(&self) -> std::io::Result<u64> {
        self.0.as_file().metadata().map(|meta| meta.len())
    }
}

/// Writes a temporary file in `path`'s directory.
pub(crate) fn stage(
    path: &Path,
    write: impl FnOnce(&mut dyn Write) -> std::io::Result<()>,
) -> Result<Staged, SaveError> {
    let io = |error| SaveError::Io {
        path: path.to_path_buf(),
        error,
    };
    let dir = match path.parent() {
        Some(dir) if !dir.as_os_str().is_empty() => dir,
        _ => Path::new("."),
    };
    let mut builder = tempfile::Builder::new();
    builder.prefix(".ebb-").suffix(".tmp");
    // A temporary file is private by default; the finished trace gets the
    // usual permissions of a new file (subject to the umask).
    #[cfg(unix)]
    builder.permissions(std::os::unix::fs::PermissionsExt::from_mode(0o644));
    let temp = builder.tempfile_in(dir).map_err(io)?;
    let mut out = std::io::BufWriter::with_capacity(1 << 20, temp.as_file());
    write(&mut out).map_err(io)?;
    out.flush().map_err(io)?;
    drop(out);
    temp.as_file().sync_all().map_err(io)?;
    Ok(Staged(temp))
}

/// Renames a staged file over `path`.
pub(crate) fn commit(staged: Staged, path: &Path) -> Result<(), SaveError> {
    staged.0.persist(path).map_err(|error| SaveError::Io {
        path: path.to_path_buf(),
        error: error.error,
    })?;
    Ok(())
}
