//! Reading a trace's text: bounded in length, and refusing at the first bad
//! byte what is not text (a binary file, `/dev/zero`), so a wrong file gets a
//! clear error before it can exhaust memory.

use super::error::LoadError;
use super::progress::Progress;
use std::io::{self, Read};
use std::path::Path;

/// The most bytes Ebb reads as a text trace (4 GiB). A text trace of a
/// million scalar nodes is about 200 MB; anything near this limit should
/// keep its tensors in a safetensors sidecar. Endless inputs (devices, pipes
/// that keep writing) stop here instead of exhausting memory.
pub const TEXT_LIMIT: u64 = 1 << 32;

/// Why a file's bytes are not a text trace. Travels inside an
/// [`io::Error`] of kind `InvalidData` so callers that only know I/O errors
/// still stop on it; [`LoadError::reading`] turns it into its own variant.
#[derive(Debug)]
pub(crate) enum NotText {
    /// A NUL byte or bytes that are not UTF-8, at a byte offset.
    Bytes {
        byte: u64,
        line: usize,
        column: usize,
        what: String,
    },
    /// More than this many bytes ([`TEXT_LIMIT`]).
    TooLong(u64),
}

impl std::fmt::Display for NotText {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            NotText::Bytes { what, byte, .. } => write!(f, "not text: {what} at byte {byte}"),
            NotText::TooLong(limit) => write!(f, "longer than {limit} bytes"),
        }
    }
}

impl std::error::Error for NotText {}

impl LoadError {
    /// The error of reading `path`: [`LoadError::NotText`] or
    /// [`LoadError::TooLong`] for bytes that are not a text trace,
    /// [`LoadError::Io`] otherwise.
    pub(crate) fn reading(path: &Path, error: io::Error) -> LoadError {
        let path = path.to_path_buf();
        match error
            .get_ref()
            .and_then(|inner| inner.downcast_ref::<NotText>())
        {
            Some(NotText::Bytes {
                byte,
                line,
                column,
                what,
            }) => LoadError::NotText {
                path,
                line: *line,
                column: *column,
                byte: *byte,
                what: what.clone(),
            },
            Some(NotText::TooLong(limit)) => LoadError::TooLong {
                path,
                limit: *limit,
            },
            None => LoadError::Io { path, error },
        }
    }
}

/// Reads a whole file as UTF-8 text in chunks, reporting bytes read. Stops
/// at the first NUL byte, at the first byte that cannot be UTF-8, and past
/// [`TEXT_LIMIT`] bytes.
pub(crate) fn read_text(path: &Path, progress: &mut dyn Progress) -> io::Result<String> {
    read_text_within(path, TEXT_LIMIT, progress)
}

/// [`read_text`] with another limit. Memory is allocated as the bytes
/// arrive (up to the length the file claims, never past `limit`), so an
/// endless input costs at most `limit` bytes.
fn read_text_within(path: &Path, limit: u64, progress: &mut dyn Progress) -> io::Result<String> {
    let mut file = std::fs::File::open(path)?;
    let meta = file.metadata()?;
    if meta.is_dir() {
        return Err(io::Error::from(io::ErrorKind::IsADirectory));
    }
    let total = meta.len();
    progress.stage("reading", Some(total));
    let mut bytes = Vec::with_capacity(usize::try_from(total.min(limit)).unwrap_or(0));
    // Chunks of up to 1 MiB, no bigger than the file needs: a small file
    // (the fuzzers read millions) does not pay for zeroing a large buffer.
    let chunk_len = match total {
        0 => 1 << 16,
        total => usize::try_from(total + 1).map_or(1 << 20, |len| len.clamp(1 << 12, 1 << 20)),
    };
    let mut chunk = vec![0u8; chunk_len];
    // Bytes before this offset are known to be UTF-8 without NUL.
    let mut checked = 0;
    loop {
        let read = match file.read(&mut chunk) {
            Ok(0) => break,
            Ok(read) => read,
            Err(error) if error.kind() == io::ErrorKind::Interrupted => continue,
            Err(error) => return Err(error),
        };
        if (bytes.len() + read) as u64 > limit {
            return Err(io::Error::new(
                io::ErrorKind::InvalidData,
                NotText::TooLong(limit),
            ));
        }
        bytes.extend_from_slice(&chunk[..read]);
        checked = check_text(&bytes, checked, false)?;
        progress.advance(bytes.len() as u64);
    }
    check_text(&bytes, checked, true)?;
    String::from_utf8(bytes).map_err(|error| io::Error::new(io::ErrorKind::InvalidData, error))
}

/// Checks `bytes[from..]` for NUL and for UTF-8, returning how far it is
/// good. A sequence cut off at the end is only an error when `last`.
fn check_text(bytes: &[u8], from: usize, last: bool) -> io::Result<usize> {
    let fresh = &bytes[from..];
    let (good, bad) = match std::str::from_utf8(fresh) {
        Ok(_) => (fresh.len(), None),
        Err(error) => match error.error_len() {
            None if !last => (error.valid_up_to(), None),
            _ => (error.valid_up_to(), Some(from + error.valid_up_to())),
        },
    };
    if let Some(nul) = fresh[..good].iter().position(|&b| b == 0) {
        return Err(not_text(bytes, from + nul, "a NUL byte".to_string()));
    }
    match bad {
        None => Ok(from + good),
        Some(at) => Err(not_text(
            bytes,
            at,
            format!("byte 0x{:02X} is not UTF-8", bytes[at]),
        )),
    }
}

/// The error for a bad byte at `at`, with its line and column.
fn not_text(bytes: &[u8], at: usize, what: String) -> io::Error {
    let before = &bytes[..at];
    let line = before.iter().filter(|&&b| b == b'\n').count() + 1;
    let line_start = before
        .iter()
        .rposition(|&b| b == b'\n')
        .map_or(0, |newline| newline + 1);
    // Characters, not bytes: count the bytes that start a UTF-8 sequence.
    let column = before[line_start..]
        .iter()
        .filter(|&&b| b & 0xC0 != 0x80)
        .count()
        + 1;
    io::Error::new(
        io::ErrorKind::InvalidData,
        NotText::Bytes {
            byte: at as u64,
            line,
            column,
            what,
        },
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    fn error_of(bytes: &[u8]) -> String {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("t.ron");
        std::fs::write(&path, bytes).unwrap();
        let error = read_text(&path, &mut super::super::progress::Silent).unwrap_err();
        LoadError::reading(&path, error).to_string()
    }

    #[test]
    fn binary_bytes_are_not_text() {
        let message = error_of(b"(format: 1,\n  ti\xFFtle");
        assert!(
            message.ends_with(
                "t.ron:2:5: not a text trace: byte 0xFF is not UTF-8 at byte 16 (hint: a trace is RON or JSON text, or a .tape header beside its sidecar; see traces/FORMAT.md)"
            ),
            "{message}"
        );
        assert!(!message.contains("permissions"), "{message}");
        let message = error_of(b"(\xC3\xA9\0");
        assert!(
            message.contains(":1:3: not a text trace: a NUL byte at byte 3"),
            "{message}"
        );
        // A multi-byte character cut off at the end of the file.
        let message = error_of(b"(title: \"\xE2\x82");
        assert!(
            message.contains(":1:10: not a text trace: byte 0xE2 is not UTF-8 at byte 9"),
            "{message}"
        );
    }

    #[test]
    fn a_character_split_between_chunks_is_text() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("t.ron");
        // '€' is three bytes; put it across the 1 MiB chunk boundary.
        let mut text = "x".repeat((1 << 20) - 1);
        text.push('€');
        std::fs::write(&path, &text).unwrap();
        let read = read_text(&path, &mut super::super::progress::Silent).unwrap();
        assert_eq!(read, text);
    }

    #[cfg(unix)]
    #[test]
    fn an_endless_text_input_stops_at_the_limit() {
        // A pipe that never ends (a program printing for ever): refused once
        // the limit is passed, with the limit named, instead of reading
        // until memory runs out. The writer sees the pipe closed.
        let dir = tempfile::tempdir().unwrap();
        let fifo = dir.path().join("endless.ron");
        let name = std::ffi::CString::new(fifo.to_str().unwrap()).unwrap();
        // SAFETY: a valid C string naming a path in our temporary directory.
        assert_eq!(unsafe { libc::mkfifo(name.as_ptr(), 0o600) }, 0);
        let writer = {
            let fifo = fifo.clone();
            std::thread::spawn(move || {
                use std::io::Write;
                let mut pipe = std::fs::OpenOptions::new().write(true).open(fifo)?;
                let chunk = "(nodes: [".repeat(1 << 12);
                let mut written = 0u64;
                loop {
                    match pipe.write_all(chunk.as_bytes()) {
                        Ok(()) => written += chunk.len() as u64,
                        Err(error) => return Ok::<_, io::Error>((written, error.kind())),
                    }
                }
            })
        };
        let limit = 4 << 20;
        let error =
            read_text_within(&fifo, limit, &mut super::super::progress::Silent).unwrap_err();
        let message = LoadError::reading(&fifo, error).to_string();
        assert!(
            message.ends_with(&format!(
                "endless.ron: the trace is longer than {limit} bytes, the most Ebb reads as text (hint: is this the right file? store big tensors in a safetensors sidecar, see traces/FORMAT.md)"
            )),
            "{message}"
        );
        let (written, ended) = writer.join().unwrap().unwrap();
        assert_eq!(ended, io::ErrorKind::BrokenPipe);
        assert!(written >= limit, "{written} bytes written");
    }

    #[test]
    fn a_directory_is_named_as_one() {
        let dir = tempfile::tempdir().unwrap();
        let error = read_text(dir.path(), &mut super::super::progress::Silent).unwrap_err();
        assert_eq!(error.kind(), io::ErrorKind::IsADirectory);
    }
}
