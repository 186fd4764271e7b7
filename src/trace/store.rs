//! Saving traces and reading them back whole, in any of the three forms,
//! chosen by extension: `.ron`, `.json`, or `.tape` (a RON trace whose
//! tensors live in a safetensors sidecar beside it). Every write goes to a
//! temporary file in the target directory and is renamed into place, so a
//! failed write leaves no half-written trace.

use super::error::{LoadError, SaveError};
use super::load::{Encoding, parse, syntax_error, to_text};
use super::progress::{self, Progress, Silent};
use super::schema::TraceFile;
use super::sidecar;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::{Mutex, MutexGuard, PoisonError};

/// The three forms a trace can be stored in.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    /// RON text.
    Ron,
    /// JSON text.
    Json,
    /// A trace with a sidecar: header `NAME.tape`, tensors in `NAME.safetensors`.
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
    /// plus the sidecar of a `.tape` trace.
    pub fn files(self, path: &Path) -> Vec<PathBuf> {
        match self {
            Format::Tape => vec![path.to_path_buf(), sidecar::sidecar_path(path)],
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
        Some(Format::Tape) => {
            progress.stage("writing", None);
            sidecar::write(file, path)
        }
        Some(text @ (Format::Ron | Format::Json)) => {
            if let Some(node) = sidecar::first_in_sidecar(file) {
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
/// inline (a sidecar is read in full). Not validated.
pub fn read_file(path: &Path, progress: &mut dyn Progress) -> Result<TraceFile, LoadError> {
    read_file_from(path, progress).map(|(file, _)| file)
}

/// [`read_file`], also returning every file it read: the trace and the
/// sidecar its header names, if any (so a writer can refuse to replace one).
pub fn read_file_from(
    path: &Path,
    progress: &mut dyn Progress,
) -> Result<(TraceFile, Vec<PathBuf>), LoadError> {
    let text =
        progress::read_text(path, progress).map_err(|error| LoadError::reading(path, error))?;
    let encoding = Encoding::from_path(path).unwrap_or_else(|| Encoding::sniff(&text));
    progress.stage("parsing", None);
    let mut file = parse(&text, encoding).map_err(|error| syntax_error(path, error))?;
    drop(text);
    let mut sources = vec![path.to_path_buf()];
    if let Some(name) = &file.sidecar
        && let Ok(sidecar) = sidecar::resolve_name(path, name)
    {
        sources.push(sidecar);
    }
    progress.stage("reading sidecar", None);
    sidecar::inline(&mut file, path)?;
    Ok((file, sources))
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

/// The temporary files saves are writing in this process, so that a process
/// ending on a signal can remove them ([`abandon_saves`]). Creating,
/// renaming and abandoning hold the lock, so none happens halfway through
/// another.
static STAGED: Mutex<Vec<PathBuf>> = Mutex::new(Vec::new());

fn staged_files() -> MutexGuard<'static, Vec<PathBuf>> {
    STAGED.lock().unwrap_or_else(PoisonError::into_inner)
}

/// Removes every temporary file this process is writing a trace to, and
/// keeps any save from creating or renaming another: for a process about to
/// end on a signal (`ebb convert` on SIGINT or SIGTERM). Only files this
/// process created are removed; a stale `.ebb-*.tmp` left by another process
/// is not touched. Every save still running blocks for good.
pub fn abandon_saves() {
    let staged = staged_files();
    for path in staged.iter() {
        let _ = std::fs::remove_file(path);
    }
    std::mem::forget(staged);
}

/// A finished temporary file waiting to be renamed into place. Dropping it
/// removes the file.
pub(crate) struct Staged(Option<tempfile::NamedTempFile>);

impl Drop for Staged {
    fn drop(&mut self) {
        if let Some(file) = self.0.take() {
            let mut staged = staged_files();
            staged.retain(|path| path != file.path());
            drop(file);
        }
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
    let staged = {
        let mut registry = staged_files();
        let temp = builder.tempfile_in(dir).map_err(io)?;
        registry.push(temp.path().to_path_buf());
        Staged(Some(temp))
    };
    let temp = staged.0.as_ref().expect("just staged");
    let mut out = std::io::BufWriter::with_capacity(1 << 20, temp.as_file());
    write(&mut out).map_err(io)?;
    out.flush().map_err(io)?;
    drop(out);
    temp.as_file().sync_all().map_err(io)?;
    Ok(staged)
}

/// Lets `write` create a temporary file beside `path` by its path (for
/// writers that open the file themselves), then checks it was written.
pub(crate) fn stage_path(
    path: &Path,
    write: impl FnOnce(&Path) -> std::io::Result<()>,
) -> Result<Staged, SaveError> {
    stage_path_via(path, write, Path::new(PROC_FD))
}

/// Where Linux lists this process's open files, one link per descriptor.
const PROC_FD: &str = "/proc/self/fd";

/// [`stage_path`], looking for the descriptor links in `fd_dir` (tests
/// name a directory without them, as on a system without /proc).
fn stage_path_via(
    path: &Path,
    write: impl FnOnce(&Path) -> std::io::Result<()>,
    fd_dir: &Path,
) -> Result<Staged, SaveError> {
    let io = |error| SaveError::Io {
        path: path.to_path_buf(),
        error,
    };
    let staged = stage(path, |_| Ok(()))?;
    let file = staged.0.as_ref().expect("just staged");
    let target = writer_target(file, fd_dir);
    write(&target).map_err(io)?;
    file.as_file().sync_all().map_err(io)?;
    Ok(staged)
}

/// The path a writer opens to write the staged `file`.
///
/// If the writer opened it by the temporary file's own name, a signal
/// arriving between `abandon_saves` removing that name and the process
/// ending could see the writer create it again, left behind for good (seen
/// in tests/convert_signals.rs under load). So where it can, the writer
/// gets the open file's link in `/proc/self/fd`, which reaches the same
/// file while it has a name and can never give it one back. The link is
/// used only when it leads to this very file (same device and inode): when
/// /proc is not mounted or not readable (a minimal container, a chroot, a
/// hardened system), or on other systems, the writer gets the temporary
/// file's name, and a signal in that narrow window can leave one
/// `.ebb-*.tmp` file behind, which is never mistaken for output.
fn writer_target(file: &tempfile::NamedTempFile, fd_dir: &Path) -> PathBuf {
    #[cfg(target_os = "linux")]
    {
        use std::os::fd::AsRawFd;
        use std::os::unix::fs::MetadataExt;
        let link = fd_dir.join(file.as_file().as_raw_fd().to_string());
        let same =
            |a: &std::fs::Metadata, b: &std::fs::Metadata| a.dev() == b.dev() && a.ino() == b.ino();
        if let (Ok(through), Ok(own)) = (std::fs::metadata(&link), file.as_file().metadata())
            && same(&through, &own)
        {
            return link;
        }
    }
    #[cfg(not(target_os = "linux"))]
    let _ = fd_dir;
    file.path().to_path_buf()
}

/// Renames a staged file over `path`.
pub(crate) fn commit(mut staged: Staged, path: &Path) -> Result<(), SaveError> {
    let file = staged.0.take().expect("a staged file is committed once");
    let mut registry = staged_files();
    let temp = file.path().to_path_buf();
    // On failure the error holds the temporary file and removes it when dropped.
    let result = file.persist(path);
    registry.retain(|path| *path != temp);
    result.map_err(|error| SaveError::Io {
        path: path.to_path_buf(),
        error: error.error,
    })?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn temporaries(dir: &Path) -> Vec<String> {
        let mut names: Vec<String> = std::fs::read_dir(dir)
            .unwrap()
            .map(|entry| entry.unwrap().file_name().to_string_lossy().into_owned())
            .filter(|name| name.starts_with(".ebb-"))
            .collect();
        names.sort();
        names
    }

    #[cfg(target_os = "linux")]
    #[test]
    fn a_writer_by_name_cannot_bring_back_an_abandoned_temporary_file() {
        let dir = tempfile::tempdir().unwrap();
        let target = dir.path().join("t.safetensors");
        let staged = stage_path(&target, |path| {
            // What an abandon does between staging and the writer's open:
            // the temporary file's name (the link's target) is removed.
            let name = std::fs::read_link(path)?;
            assert!(name.starts_with(dir.path()), "{}", name.display());
            std::fs::remove_file(&name)?;
            std::fs::File::create(path)?.write_all(b"data")
        });
        assert!(staged.is_ok());
        assert!(temporaries(dir.path()).is_empty(), "no name came back");
        drop(staged);
        // Without an abandon the writer's bytes are what is committed.
        let staged = stage_path(&target, |path| std::fs::write(path, b"data")).unwrap();
        commit(staged, &target).unwrap();
        assert_eq!(std::fs::read(&target).unwrap(), b"data");
        assert!(temporaries(dir.path()).is_empty());
    }

    #[cfg(target_os = "linux")]
    #[test]
    fn without_proc_the_writer_gets_the_temporary_files_name() {
        let dir = tempfile::tempdir().unwrap();
        let target = dir.path().join("t.safetensors");
        // /proc not mounted: no descriptor links where they are looked for.
        let missing = dir.path().join("no-proc");
        let mut given = None;
        let staged = stage_path_via(
            &target,
            |path| {
                given = Some(path.to_path_buf());
                std::fs::write(path, b"data")
            },
            &missing,
        )
        .unwrap();
        let temp = staged.0.as_ref().unwrap().path().to_path_buf();
        assert_eq!(given.as_deref(), Some(temp.as_path()));
        commit(staged, &target).unwrap();
        assert_eq!(std::fs::read(&target).unwrap(), b"data");
        assert!(temporaries(dir.path()).is_empty());

        // A /proc whose link leads elsewhere (a stale or foreign mount) is
        // not trusted either: the writer must not write into another file.
        let fake = dir.path().join("fake-proc");
        std::fs::create_dir(&fake).unwrap();
        let other = dir.path().join("other");
        std::fs::write(&other, b"keep").unwrap();
        for fd in 0..1024 {
            std::os::unix::fs::symlink(&other, fake.join(fd.to_string())).unwrap();
        }
        let staged = stage_path_via(&target, |path| std::fs::write(path, b"new"), &fake).unwrap();
        commit(staged, &target).unwrap();
        assert_eq!(std::fs::read(&target).unwrap(), b"new");
        assert_eq!(std::fs::read(&other).unwrap(), b"keep");
    }

    #[test]
    fn staged_files_are_registered_until_committed_or_dropped() {
        let dir = tempfile::tempdir().unwrap();
        let target = dir.path().join("t.ron");
        let staged = stage(&target, |out| out.write_all(b"()")).unwrap();
        let temp = staged.0.as_ref().unwrap().path().to_path_buf();
        assert!(staged_files().contains(&temp));
        commit(staged, &target).unwrap();
        assert!(!staged_files().contains(&temp));
        assert_eq!(std::fs::read(&target).unwrap(), b"()");
        let staged = stage(&target, |out| out.write_all(b"(x)")).unwrap();
        let temp = staged.0.as_ref().unwrap().path().to_path_buf();
        drop(staged);
        assert!(!staged_files().contains(&temp));
        assert!(!temp.exists());
        assert!(temporaries(dir.path()).is_empty());
    }
}
