//! Opening a sidecar file so that nothing another program does to it can
//! crash Ebb, hang it or silently change what it reports.
//!
//! - The sidecar must be a regular file, opened without following a
//!   symbolic link and without blocking: a link, a directory, a FIFO or a
//!   device is refused at once (a FIFO can never hang the open).
//! - A file with holes (a sparse file: bytes its length declares were never
//!   written) of more than [`HOLE_LIMIT`] bytes is refused, so a file that
//!   takes a few kilobytes on disk cannot pose as tens of gigabytes.
//! - A sidecar up to the copy limit (64 MiB, or `EBB_SIDECAR_COPY_LIMIT`
//!   bytes) is read into memory of its own, checking that its length and
//!   modification time did not change while it was read: what Ebb reports
//!   is then what the file held, whatever happens to it afterwards.
//! - A bigger one is memory-mapped, used in place. Its identity (device,
//!   inode, length, modification and change times) is kept, and
//!   [`check_unchanged`] tells whether it was changed in place since; the
//!   command line checks it before it prints anything. A mapped file cut
//!   short while Ebb reads it raises SIGBUS, which the command line and the
//!   terminal view turn into one line and exit status 2.

use super::error::LoadError;
use memmap2::{Mmap, MmapMut};
use std::fs::{File, Metadata};
use std::os::unix::fs::{FileExt, MetadataExt, OpenOptionsExt};
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex, PoisonError, Weak};

/// Sidecars up to this many bytes are copied into memory when opened.
pub const COPY_LIMIT: u64 = 64 << 20;

/// The most bytes of holes a sidecar may have.
pub const HOLE_LIMIT: u64 = 64 << 20;

/// What identifies a file's content without reading it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
struct Identity {
    dev: u64,
    ino: u64,
    len: u64,
    modified: (i64, i64),
    changed: (i64, i64),
}

impl Identity {
    fn of(meta: &Metadata) -> Identity {
        Identity {
            dev: meta.dev(),
            ino: meta.ino(),
            len: meta.len(),
            modified: (meta.mtime(), meta.mtime_nsec()),
            changed: (meta.ctime(), meta.ctime_nsec()),
        }
    }
}

/// A mapped sidecar whose file must not change while it is in use.
struct Watched {
    /// The trace whose sidecar it is, for messages.
    trace: PathBuf,
    /// The sidecar, for messages.
    path: PathBuf,
    file: File,
    identity: Identity,
    /// The mapping; once every value using it is gone, the watch is
    /// forgotten when the next sidecar is mapped.
    map: Weak<Mmap>,
}

/// The sidecars this process has mapped (rather than copied).
static WATCHED: Mutex<Vec<Watched>> = Mutex::new(Vec::new());

/// The sidecar bytes: copied, or mapped and watched.
pub(crate) fn open(trace: &Path, path: &Path) -> Result<Arc<Mmap>, LoadError> {
    let fail = |message: String, hint: &str| LoadError::Sidecar {
        path: trace.to_path_buf(),
        node: None,
        message,
        hint: hint.to_string(),
    };
    let shown = path.display();
    let file = std::fs::OpenOptions::new()
        .read(true)
        .custom_flags(libc::O_NOFOLLOW | libc::O_NONBLOCK)
        .open(path)
        .map_err(|error| match error.raw_os_error() {
            Some(libc::ELOOP) => fail(
                format!("its sidecar {shown} is a symbolic link, which Ebb does not follow"),
                "copy the sidecar beside its trace instead of linking to it",
            ),
            _ => fail(
                format!("cannot open its sidecar {shown}: {error}"),
                "keep the .safetensors sidecar beside its trace",
            ),
        })?;
    let meta = file.metadata().map_err(|error| {
        fail(
            format!("cannot read its sidecar {shown}: {error}"),
            "check the file is readable",
        )
    })?;
    if !meta.is_file() {
        return Err(fail(
            format!("its sidecar {shown} is {}, not a regular file", kind(&meta)),
            "the sidecar must be the .safetensors file written with the trace",
        ));
    }
    let holes = holes(&file, meta.len());
    if holes > HOLE_LIMIT {
        return Err(fail(
            format!(
                "its sidecar {shown} is a sparse file: {} of its {} bytes were never written",
                holes,
                meta.len()
            ),
            "regenerate the sidecar, or copy it without holes (cp --sparse=never)",
        ));
    }
    let identity = Identity::of(&meta);
    let changed = || {
        fail(
            format!("its sidecar {shown} changed while Ebb read it"),
            "let the program writing the trace finish, then run ebb again",
        )
    };
    if identity.len <= copy_limit() {
        let map = copy(&file, identity.len).map_err(|error| match error.kind() {
            std::io::ErrorKind::UnexpectedEof => changed(),
            _ => fail(
                format!("cannot read its sidecar {shown}: {error}"),
                "check the file is readable",
            ),
        })?;
        match file.metadata() {
            Ok(after) if Identity::of(&after) == identity => Ok(Arc::new(map)),
            _ => Err(changed()),
        }
    } else {
        // SAFETY: the file is opened read-only and the mapping is never
        // written. Another program truncating the file while it is mapped
        // raises SIGBUS (handled by the binary); changing it in place is
        // caught by `check_unchanged` before anything is reported.
        let map = unsafe { Mmap::map(&file) }.map_err(|error| {
            fail(
                format!("cannot map its sidecar {shown}: {error}"),
                "check the file is readable",
            )
        })?;
        let map = Arc::new(map);
        let mut watched = WATCHED.lock().unwrap_or_else(PoisonError::into_inner);
        watched.retain(|sidecar| sidecar.map.strong_count() > 0);
        watched.push(Watched {
            trace: trace.to_path_buf(),
            path: path.to_path_buf(),
            file,
            identity,
            map: Arc::downgrade(&map),
        });
        Ok(map)
    }
}

/// An error if any sidecar this process mapped has been changed, cut short
/// or grown since it was opened: what was read from it may mix old and new
/// data, so nothing read from it should be reported.
pub fn check_unchanged() -> Result<(), LoadError> {
    // Sidecars no longer in use are checked too (the command line checks
    // after its trace is dropped); they are forgotten when another is mapped.
    let watched = WATCHED.lock().unwrap_or_else(PoisonError::into_inner);
    for sidecar in watched.iter() {
        let now = sidecar.file.metadata().map(|meta| Identity::of(&meta));
        if now.ok() != Some(sidecar.identity) {
            return Err(LoadError::Sidecar {
                path: sidecar.trace.clone(),
                node: None,
                message: format!(
                    "its sidecar {} changed while Ebb read it, so the results could mix old and new data",
                    sidecar.path.display()
                ),
                hint: "let the program writing the trace finish, then run ebb again".to_string(),
            });
        }
    }
    Ok(())
}

/// The copy limit: `EBB_SIDECAR_COPY_LIMIT` bytes when set, else [`COPY_LIMIT`].
fn copy_limit() -> u64 {
    std::env::var("EBB_SIDECAR_COPY_LIMIT")
        .ok()
        .and_then(|limit| limit.trim().parse().ok())
        .unwrap_or(COPY_LIMIT)
}

/// The whole file in anonymous memory, read-only, page-aligned like a
/// mapping (so tensors are used in place just the same).
fn copy(file: &File, len: u64) -> std::io::Result<Mmap> {
    let len = usize::try_from(len).map_err(std::io::Error::other)?;
    // An empty mapping cannot be made; one byte holds an empty file just as well.
    let mut memory = MmapMut::map_anon(len.max(1))?;
    file.read_exact_at(&mut memory[..len], 0)?;
    let mut more = [0u8; 1];
    if file.read_at(&mut more, len as u64)? != 0 {
        return Err(std::io::ErrorKind::UnexpectedEof.into());
    }
    let map = memory.make_read_only()?;
    Ok(map)
}

/// The bytes of `file` (of length `len`) that are holes, found with
/// `lseek(2)`'s SEEK_DATA and SEEK_HOLE (0 where the file system cannot
/// tell).
fn holes(file: &File, len: u64) -> u64 {
    use std::os::fd::AsRawFd;
    let fd = file.as_raw_fd();
    let mut holes = 0;
    let mut at: i64 = 0;
    let end = len as i64;
    while at < end {
        // SAFETY: lseek on a descriptor we own; it moves only our offset,
        // and every read here uses an explicit offset.
        let data = unsafe { libc::lseek(fd, at, libc::SEEK_DATA) };
        if data < 0 {
            // ENXIO: no data from `at` to the end, a hole; anything else:
            // the file system cannot tell.
            if std::io::Error::last_os_error().raw_os_error() == Some(libc::ENXIO) {
                holes += (end - at) as u64;
            }
            break;
        }
        holes += (data - at) as u64;
        // SAFETY: as above.
        let hole = unsafe { libc::lseek(fd, data, libc::SEEK_HOLE) };
        if hole < 0 || hole <= data {
            break;
        }
        at = hole;
    }
    holes
}

/// What a file that is not regular is, in words.
fn kind(meta: &Metadata) -> &'static str {
    use std::os::unix::fs::FileTypeExt;
    let kind = meta.file_type();
    if kind.is_dir() {
        "a directory"
    } else if kind.is_fifo() {
        "a FIFO"
    } else if kind.is_char_device() {
        "a character device"
    } else if kind.is_block_device() {
        "a block device"
    } else if kind.is_socket() {
        "a socket"
    } else {
        "a special file"
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn holes_are_counted() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("s");
        let file = File::create(&path).unwrap();
        file.write_all_at(b"header", 0).unwrap();
        file.set_len(1 << 30).unwrap();
        file.sync_all().unwrap();
        let file = File::open(&path).unwrap();
        // Most of a gigabyte never written (file systems allocate in blocks).
        assert!(holes(&file, 1 << 30) > (1 << 30) - (1 << 20));
        std::fs::write(&path, vec![7u8; 1 << 16]).unwrap();
        let file = File::open(&path).unwrap();
        assert_eq!(holes(&file, 1 << 16), 0);
    }

    #[test]
    fn a_copy_holds_the_file() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("s");
        std::fs::write(&path, b"0123456789").unwrap();
        let file = File::open(&path).unwrap();
        assert_eq!(&copy(&file, 10).unwrap()[..], b"0123456789");
        // The file is longer than its length said: it grew while read.
        assert_eq!(
            copy(&file, 4).unwrap_err().kind(),
            std::io::ErrorKind::UnexpectedEof
        );
        assert_eq!(
            copy(&file, 12).unwrap_err().kind(),
            std::io::ErrorKind::UnexpectedEof
        );
    }
}
