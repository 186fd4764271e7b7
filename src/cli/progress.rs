//! The progress bar of headless commands: drawn on stderr with indicatif for
//! traces over a few MB, and only when stderr is a terminal.

use ebb::trace::{Format, Progress, Silent, sidecar};
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use std::io::IsTerminal;
use std::path::Path;
use std::time::Duration;

/// Traces smaller than this load too fast for a bar to help.
const THRESHOLD_BYTES: u64 = 4 << 20;

/// A bar on stderr for a load or save.
struct Bar(ProgressBar);

impl Progress for Bar {
    fn stage(&mut self, name: &'static str, total: Option<u64>) {
        self.0.reset();
        self.0.set_message(name);
        match total {
            Some(total) => {
                self.0.disable_steady_tick();
                self.0.set_length(total);
                self.0.set_style(
                    ProgressStyle::with_template(
                        "{msg:>9} [{bar:30}] {bytes}/{total_bytes} {elapsed}",
                    )
                    .expect("a valid template")
                    .progress_chars("=> "),
                );
            }
            None => {
                self.0.set_style(
                    ProgressStyle::with_template("{msg:>9} {spinner} {elapsed}")
                        .expect("a valid template"),
                );
                self.0.enable_steady_tick(Duration::from_millis(100));
            }
        }
    }

    fn advance(&mut self, done: u64) {
        self.0.set_position(done);
    }

    fn finish(&mut self) {
        self.0.finish_and_clear();
    }
}

/// Bytes on disk of the trace at `path` (header and sidecar for a `.tape` trace).
fn size_on_disk(path: &Path) -> u64 {
    let files = match Format::from_path(path) {
        Some(Format::Tape) => vec![path.to_path_buf(), sidecar::sidecar_path(path)],
        _ => vec![path.to_path_buf()],
    };
    files
        .iter()
        .filter_map(|file| std::fs::metadata(file).ok())
        .map(|meta| meta.len())
        .sum()
}

/// A bar when the trace at `path` is big and stderr is a terminal; silence otherwise.
pub fn for_trace(path: &Path) -> Box<dyn Progress> {
    if size_on_disk(path) < THRESHOLD_BYTES || !std::io::stderr().is_terminal() {
        return Box::new(Silent);
    }
    Box::new(Bar(ProgressBar::with_draw_target(
        None,
        ProgressDrawTarget::stderr(),
    )))
}
