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

pub(crate) use super::text::read_text;
