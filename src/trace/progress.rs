//! Progress of long loads and saves, reported through a small trait so the
//! library stays free of terminal code: the command line draws a bar, the
//! terminal view a gauge, tests nothing.

/// Receives progress of a load or save in stages.
pub trait Progress {
    /// A new stage starts (`"reading"`, `"parsing"`, `"checking"`, `"writing"`);
    /// `total` is its size in bytes when known.
    fn stage(&mut self, name: &'static str, total: Option<u64>) {
        let _ = (name, total);
    }

    /// `done` bytes of the current stage are finished.
    fn advance(&mut self, done: u64) {
        let _ = done;
    }

    /// Everything is finished.
    fn finish(&mut self) {}
}

/// Progress that reports nothing.
#[derive(Debug, Clone, Copy, Default)]
pub struct Silent;

impl Progress for Silent {}

/// Reads a whole file as text in chunks, reporting bytes read.
pub(crate) fn read_text(
    path: &std::path::Path,
    progress: &mut dyn Progress,
) -> std::io::Result<String> {
    use std::io::Read;
    let mut file = std::fs::File::open(path)?;
    let total = file.metadata()?.len();
    progress.stage("reading", Some(total));
    let mut bytes = Vec::with_capacity(usize::try_from(total).unwrap_or(0));
    let mut chunk = vec![0u8; 1 << 20];
    loop {
        let read = file.read(&mut chunk)?;
        if read == 0 {
            break;
        }
        bytes.extend_from_slice(&chunk[..read]);
        progress.advance(bytes.len() as u64);
    }
    String::from_utf8(bytes)
        .map_err(|error| std::io::Error::new(std::io::ErrorKind::InvalidData, error))
}
