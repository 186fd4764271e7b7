//! The terminal's lifecycle and the event loop. The terminal is taken
//! through `ratatui::try_init` (raw mode, alternate screen, a panic hook that
//! restores both) with mouse capture on top, and given back on every way
//! out: return, error, panic, or a signal (`signals`). The loop draws, hands
//! queued work to worker threads, and waits for a key or a result, so keys
//! keep working while a diagnosis runs; the first frame of any trace is
//! drawn before it is even loaded.

use super::action::Action;
use super::app::App;
use super::keymap::{Key, KeyMap};
use super::layout;
use super::precision::Traces;
use super::theme::Theme;
use super::work::{Finished, Outcome, Task};
use crate::diagnose::Settings;
use crate::trace::{self, LoadError, Trace};
use ratatui::DefaultTerminal;
use ratatui::crossterm::event::{
    self, DisableMouseCapture, EnableMouseCapture, Event, KeyEventKind, MouseButton, MouseEventKind,
};
use ratatui::crossterm::execute;
use ratatui::layout::{Constraint, Flex, Layout};
use ratatui::text::Line;
use ratatui::widgets::{Block, Gauge, Widget};
use std::io;
use std::path::Path;
use std::sync::mpsc::{self, Receiver, Sender};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

/// The name of worker threads: a panic there is reported in the view, not
/// by tearing the terminal down under it.
const WORKER: &str = "ebb-work";

/// How often the screen is redrawn while work is under way (its progress moves).
const TICK: Duration = Duration::from_millis(50);

/// Why the view could not run.
#[derive(Debug, thiserror::Error)]
pub enum ViewError {
    /// The trace could not be loaded.
    #[error(transparent)]
    Load(#[from] LoadError),
    /// The terminal failed.
    #[error(
        "terminal: {0} (hint: run in an interactive terminal, or use `ebb check` / `ebb sweep`)"
    )]
    Terminal(#[from] io::Error),
}

/// The terminal, held by the view until dropped (also on an early return or
/// an unwinding panic).
struct Held {
    terminal: DefaultTerminal,
}

/// What a worker thread's panic said, for the status line.
static WORKER_PANIC: Mutex<Option<String>> = Mutex::new(None);

impl Held {
    fn start() -> io::Result<Held> {
        // Signals restore the terminal from the moment it is changed.
        super::signals::arm()?;
        super::signals::entered();
        let terminal = match ratatui::try_init() {
            Ok(terminal) => terminal,
            Err(error) => {
                ratatui::restore();
                super::signals::left();
                return Err(error);
            }
        };
        // ratatui's hook restores raw mode and the screen; mouse capture is
        // ours to undo. A worker's panic leaves the terminal alone: the view
        // says what happened and carries on.
        let previous = std::panic::take_hook();
        std::panic::set_hook(Box::new(move |info| {
            if std::thread::current().name() == Some(WORKER) {
                let text = info
                    .payload()
                    .downcast_ref::<&str>()
                    .map(|text| text.to_string())
                    .or_else(|| info.payload().downcast_ref::<String>().cloned())
                    .unwrap_or_else(|| "a panic".to_string());
                let place = info.location().map_or(String::new(), |at| {
                    format!(" at {}:{}", at.file(), at.line())
                });
                *WORKER_PANIC.lock().unwrap_or_else(|p| p.into_inner()) = Some(text + &place);
                return;
            }
            let _ = execute!(io::stdout(), DisableMouseCapture);
            previous(info);
        }));
        if let Err(error) = execute!(io::stdout(), EnableMouseCapture) {
            ratatui::restore();
            super::signals::left();
            return Err(error);
        }
        Ok(Held { terminal })
    }
}

impl Drop for Held {
    fn drop(&mut self) {
        let _ = execute!(io::stdout(), DisableMouseCapture);
        ratatui::restore();
        super::signals::left();
    }
}

/// Opens the view on an already loaded trace; `settings` are the diagnosis's thresholds.
pub fn view(
    trace: Trace,
    label: &str,
    themes: Vec<Theme>,
    keymap: KeyMap,
    settings: Settings,
) -> Result<(), ViewError> {
    let mut held = Held::start()?;
    let traces = Traces::new(trace);
    let app = App::new(&traces, label, themes)
        .with_keymap(keymap)
        .with_settings(settings);
    run(&mut held.terminal, app)
}

/// Opens the view and loads `path` on a worker thread behind a gauge (the
/// first frame appears at once); the quit key abandons the load.
pub fn open(
    path: &Path,
    themes: Vec<Theme>,
    keymap: KeyMap,
    settings: Settings,
) -> Result<(), ViewError> {
    let size = std::fs::metadata(path).map(|meta| meta.len()).unwrap_or(0);
    let label = path.display().to_string();
    let mut held = Held::start()?;
    let owned = path.to_path_buf();
    let progress = SharedProgress::default();
    let mut reporter = progress.clone();
    let loader = std::thread::Builder::new()
        .name("ebb-load".to_string())
        .spawn(move || trace::load_with(&owned, &mut reporter))?;
    let started = Instant::now();
    while !loader.is_finished() {
        let elapsed = started.elapsed().as_secs_f64();
        let (stage, fraction) = progress.read();
        let quit = keymap.label_for("quit", super::action::PaneId::all()[0]);
        held.terminal.draw(|frame| {
            let area = frame.area();
            let [middle] =
                area.layout(&Layout::vertical([Constraint::Length(3)]).flex(Flex::Center));
            // Stages that know their size fill the gauge; the others sweep it to show the load is alive.
            let ratio = fraction.unwrap_or((elapsed / 2.0).fract());
            let text = format!(
                "{stage} {label} ({:.1} MB) … {elapsed:.1} s   {quit} cancels",
                size as f64 / 1e6
            );
            Gauge::default()
                .block(Block::bordered().title(Line::raw(" Ebb ")))
                .ratio(ratio)
                .label(text)
                .render(middle, frame.buffer_mut());
        })?;
        if event::poll(Duration::from_millis(50))?
            && let Event::Key(key) = event::read()?
            && key.kind == KeyEventKind::Press
            && matches!(
                keymap.lookup(
                    Key::from_event(&key),
                    super::action::PaneId::all()[0],
                    false
                ),
                Some(Action::Quit)
            )
        {
            return Ok(());
        }
    }
    let trace = loader
        .join()
        .map_err(|_| io::Error::other("the loader thread panicked"))??;
    let traces = Traces::new(trace);
    let app = App::new(&traces, &label, themes)
        .with_keymap(keymap)
        .with_settings(settings);
    run(&mut held.terminal, app)
}

/// The loader's progress, shared between the loading thread and the gauge.
#[derive(Debug, Clone, Default)]
struct SharedProgress {
    state: Arc<Mutex<(&'static str, Option<u64>, u64)>>,
}

impl SharedProgress {
    /// The current stage and the fraction of it done, when its size is known.
    fn read(&self) -> (&'static str, Option<f64>) {
        let (stage, total, done) = *self
            .state
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner());
        let stage = if stage.is_empty() { "loading" } else { stage };
        (
            stage,
            total
                .filter(|&t| t > 0)
                .map(|t| (done as f64 / t as f64).min(1.0)),
        )
    }
}

impl trace::Progress for SharedProgress {
    fn stage(&mut self, name: &'static str, total: Option<u64>) {
        *self
            .state
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner()) = (name, total, 0);
    }

    fn advance(&mut self, done: u64) {
        self.state
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner())
            .2 = done;
    }
}

/// Hands `task` to a worker thread; what it produces arrives on `results`.
/// The thread is detached: quitting never waits for it.
fn spawn(task: Task, results: &Sender<Finished>) -> io::Result<()> {
    let results = results.clone();
    let (id, job) = (task.id, task.job);
    std::thread::Builder::new()
        .name(WORKER.to_string())
        .spawn(move || {
            let finished = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| task.run()))
                .unwrap_or_else(|_| Finished {
                    id,
                    job,
                    outcome: Outcome::Failed(
                        WORKER_PANIC
                            .lock()
                            .unwrap_or_else(|p| p.into_inner())
                            .take()
                            .unwrap_or_else(|| "a panic".to_string()),
                    ),
                });
            // The view may have quit already; then nobody listens.
            let _ = results.send(finished);
        })?;
    Ok(())
}

fn run(terminal: &mut DefaultTerminal, mut app: App) -> Result<(), ViewError> {
    let (results, finished): (Sender<Finished>, Receiver<Finished>) = mpsc::channel();
    loop {
        app.resize(terminal.size()?.into());
        terminal.draw(|frame| frame.render_widget(&app, frame.area()))?;
        if app.has_quit() {
            return Ok(());
        }
        if let Some(task) = app.next_task() {
            spawn(task, &results)?;
            continue;
        }
        // While work runs, wake up to move its progress and take its result.
        let wait = if app.running().is_some() {
            TICK
        } else {
            Duration::from_secs(1)
        };
        if event::poll(wait)? {
            handle(&mut app, event::read()?);
            // Keys typed ahead are answered before the next frame.
            while event::poll(Duration::ZERO)? && !app.has_quit() {
                handle(&mut app, event::read()?);
            }
        }
        while let Ok(result) = finished.try_recv() {
            app.finish(result);
        }
    }
}

/// One terminal event.
fn handle(app: &mut App, event: Event) {
    match event {
        Event::Key(key) if key.kind == KeyEventKind::Press => app.key(Key::from_event(&key)),
        Event::Mouse(mouse) => {
            let Some((pane, row)) = layout::hit(app.layout(), mouse.column, mouse.row) else {
                return;
            };
            match mouse.kind {
                MouseEventKind::Down(MouseButton::Left) => app.update(Action::Click(pane, row)),
                MouseEventKind::ScrollDown => app.update(Action::Scroll(pane, 3)),
                MouseEventKind::ScrollUp => app.update(Action::Scroll(pane, -3)),
                _ => {}
            }
        }
        // A resize redraws on the next turn of the loop.
        _ => {}
    }
}

#[cfg(test)]
mod tests {
    use super::Held;
    use portable_pty::{CommandBuilder, NativePtySystem, PtySize, PtySystem};
    use std::io::Read;
    use std::sync::{Arc, Mutex};
    use std::time::{Duration, Instant};

    /// Not a test: run by the one below inside a pseudo-terminal, it takes the
    /// terminal as the view does and then panics.
    #[test]
    #[ignore = "run inside a pseudo-terminal by a_panic_in_the_view_restores_the_terminal"]
    fn panicking_view() {
        let _session = Held::start().expect("inside a pseudo-terminal");
        panic!("a bug in the view");
    }

    #[test]
    fn a_panic_in_the_view_restores_the_terminal() {
        let pair = NativePtySystem::default()
            .openpty(PtySize {
                rows: 24,
                cols: 80,
                pixel_width: 0,
                pixel_height: 0,
            })
            .unwrap();
        let mut command = CommandBuilder::new(std::env::current_exe().unwrap());
        command.args([
            "--exact",
            "tui::terminal::tests::panicking_view",
            "--ignored",
            "--nocapture",
            "--test-threads=1",
        ]);
        command.env("TERM", "xterm-256color");
        let dir = tempfile::tempdir().unwrap();
        command.cwd(dir.path());
        let mut child = pair.slave.spawn_command(command).unwrap();
        drop(pair.slave);
        let parser = Arc::new(Mutex::new(vt100::Parser::new(
            24.try_into().unwrap(),
            80.try_into().unwrap(),
            0,
        )));
        let (sink, mut reader) = (parser.clone(), pair.master.try_clone_reader().unwrap());
        std::thread::spawn(move || {
            let mut buf = [0u8; 8192];
            while let Ok(n) = reader.read(&mut buf) {
                if n == 0 {
                    break;
                }
                sink.lock().unwrap().process(&buf[..n]);
            }
        });
        let deadline = Instant::now() + Duration::from_secs(60);
        let status = loop {
            if let Some(status) = child.try_wait().unwrap() {
                break status;
            }
            assert!(Instant::now() < deadline, "the child never ended");
            std::thread::sleep(Duration::from_millis(20));
        };
        std::thread::sleep(Duration::from_millis(200));
        // libtest's status for a failed (panicked) test.
        assert_eq!(status.exit_code(), 101, "{status:?}");
        let modes: libc::termios = pair.master.get_termios().unwrap().into();
        assert!(
            modes.c_lflag & libc::ECHO != 0 && modes.c_lflag & libc::ICANON != 0,
            "echo and canonical input are back"
        );
        let parser = parser.lock().unwrap();
        let screen = parser.screen();
        assert!(!screen.alternate_screen() && !screen.hide_cursor());
        assert!(
            screen.contents().contains("a bug in the view"),
            "{}",
            screen.contents()
        );
    }
}
