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

/// Work shorter than this finishes before a bar would help; longer work
/// shows one from here on.
const SHOW_AFTER: Duration = Duration::from_secs(1);

/// A bar for long library work (a diagnosis, a verification), fed by a
/// [`ebb::control::Control`]'s progress callback: drawn on stderr only when
/// it is a terminal, and only once the work has run for [`SHOW_AFTER`].
pub struct WorkBar {
    bar: ProgressBar,
    start: std::time::Instant,
    terminal: bool,
    shown: std::sync::atomic::AtomicBool,
}

impl WorkBar {
    /// A bar, hidden until the work has run for a second.
    pub fn new() -> WorkBar {
        let bar = ProgressBar::with_draw_target(Some(1000), ProgressDrawTarget::hidden());
        bar.set_style(
            ProgressStyle::with_template("{msg:>14} [{bar:30}] {percent:>3}% {elapsed}")
                .expect("a valid template")
                .progress_chars("=> "),
        );
        WorkBar {
            bar,
            start: std::time::Instant::now(),
            terminal: std::io::stderr().is_terminal(),
            shown: std::sync::atomic::AtomicBool::new(false),
        }
    }

    /// The progress callback: `fraction` (0 to 1) of `stage` done.
    pub fn report(&self, stage: &str, fraction: f64) {
        use std::sync::atomic::Ordering;
        if self.terminal
            && !self.shown.load(Ordering::Relaxed)
            && self.start.elapsed() >= SHOW_AFTER
            && !self.shown.swap(true, Ordering::Relaxed)
        {
            self.bar.set_draw_target(ProgressDrawTarget::stderr());
        }
        self.bar.set_message(stage.to_string());
        self.bar
            .set_position((fraction.clamp(0.0, 1.0) * 1000.0) as u64);
    }
}

impl Drop for WorkBar {
    /// Nothing of the bar stays on the terminal once the work is done.
    fn drop(&mut self) {
        self.bar.finish_and_clear();
    }
}
