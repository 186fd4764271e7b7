//! The app: the session, the panes, the layout state, the overlays, the key
//! map and the work queue, and its one `update(Action)`. Actions aimed at a
//! pane go to the pane; what panes ask for comes back as messages, drained
//! here in order; long work is queued for the worker.

use super::action::{Action, PaneId};
use super::diagnosis::AUTO_NODES;
use super::ids::NodeIx;
use super::keymap::{Key, KeyMap};
use super::layout::{self, LayoutState};
use super::message::{Msg, Outbox};
use super::panes::{self, Ctx, Pane};
use super::precision::{Traces, next_dtype};
use super::prompt::{Prompt, PromptKind};
use super::session::{Note, Session};
use super::theme::Theme;
use super::watch::Condition;
use super::work::{Finished, Job, Outcome, Progress, Running, Task};
use crate::diagnose::Settings;
use ratatui::layout::Rect;
use std::collections::VecDeque;
use std::sync::Arc;
use std::time::Instant;

/// What covers the panes, if anything.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Overlay {
    /// Nothing: keys go to the panes.
    None,
    /// The list of keys, scrolled by some rows.
    Help(usize),
    /// The jump, search or watch prompt.
    Prompt(Prompt),
}

/// The state of the terminal view.
pub struct App<'t> {
    session: Session<'t>,
    panes: Vec<Box<dyn Pane>>,
    layout: LayoutState,
    overlay: Overlay,
    keymap: KeyMap,
    themes: Vec<Theme>,
    theme_at: usize,
    label: String,
    message: Option<String>,
    quit: bool,
    settings: Settings,
    queue: VecDeque<Job>,
    running: Option<Running>,
    next_id: u64,
    outbox: Outbox,
    last_watch: String,
}

impl<'t> App<'t> {
    /// The view of a fresh sweep over `traces`' recorded trace, with
    /// `themes` to cycle (the first in use). Nothing costly runs here: the
    /// diagnosis (traces up to [`AUTO_NODES`] nodes) and the forward-value
    /// survey are queued for the worker.
    pub fn new(traces: &'t Arc<Traces>, label: &str, themes: Vec<Theme>) -> App<'t> {
        let session = Session::new(traces);
        let themes = if themes.is_empty() {
            vec![Theme::default_theme()]
        } else {
            themes
        };
        let nodes = session.trace().nodes().len();
        let mut app = App {
            panes: panes::specs().iter().map(|spec| (spec.make)()).collect(),
            session,
            layout: LayoutState::new(),
            overlay: Overlay::None,
            keymap: KeyMap::default(),
            themes,
            theme_at: 0,
            label: label.to_string(),
            message: None,
            quit: false,
            settings: Settings::default(),
            queue: VecDeque::new(),
            running: None,
            next_id: 0,
            outbox: Outbox::default(),
            last_watch: String::new(),
        };
        app.queue.push_back(Job::Survey);
        if nodes <= AUTO_NODES {
            app.queue
                .push_back(Job::Diagnose(app.session.trace().dtype()));
        } else {
            app.message = Some(app.keymap.fill(
                &format!("{nodes} nodes: {{key:diagnose}} runs the diagnosis (it sweeps the trace several times)"),
                app.layout.focus,
            ));
        }
        app.sync_panes();
        app
    }

    /// The view with `keymap` (`ebb open --keys`) in place of the default
    /// keys; help, hints and messages follow it.
    pub fn with_keymap(mut self, keymap: KeyMap) -> App<'t> {
        self.keymap = keymap;
        self
    }

    /// Diagnoses with these thresholds (`ebb open --rules/--set`) instead of the defaults.
    pub fn with_settings(mut self, settings: Settings) -> App<'t> {
        self.session.set_ledger_budget(settings.ledger_budget);
        self.settings = settings;
        self
    }

    /// The session.
    pub fn session(&self) -> &Session<'t> {
        &self.session
    }

    /// The layout state.
    pub fn layout(&self) -> &LayoutState {
        &self.layout
    }

    /// The focused pane.
    pub fn focus(&self) -> PaneId {
        self.layout.focus
    }

    /// The key map.
    pub fn keymap(&self) -> &KeyMap {
        &self.keymap
    }

    /// The overlay, if any.
    pub fn overlay(&self) -> &Overlay {
        &self.overlay
    }

    /// The status line's message, until the next action.
    pub fn message(&self) -> Option<&str> {
        self.message.as_deref()
    }

    /// Where the trace came from.
    pub fn label(&self) -> &str {
        &self.label
    }

    /// Set once the user quits.
    pub fn has_quit(&self) -> bool {
        self.quit
    }

    /// The theme in use.
    pub fn theme(&self) -> &Theme {
        &self.themes[self.theme_at]
    }

    /// The work under way, if any.
    pub fn running(&self) -> Option<&Running> {
        self.running.as_ref()
    }

    /// Whether work is under way or waiting.
    pub fn is_working(&self) -> bool {
        self.running.is_some() || !self.queue.is_empty()
    }

    /// Records the terminal size (before each draw and on resize).
    pub fn resize(&mut self, area: Rect) {
        if self.layout.area != area {
            self.layout.area = area;
            self.sync_panes();
        }
    }

    /// Handles one key press: looks it up in the key map and updates.
    pub fn key(&mut self, key: Key) {
        let prompt = matches!(self.overlay, Overlay::Prompt(_));
        if let Some(action) = self.keymap.lookup(key, self.layout.focus, prompt) {
            self.update(action);
        }
    }

    /// A pane's context, its rows left at 0 for the caller that knows them (drawing does).
    pub(super) fn ctx(&self, pane: PaneId) -> Ctx<'_, 't> {
        ctx_of(
            &self.session,
            &self.themes[self.theme_at],
            &self.keymap,
            &self.layout,
            self.running.as_ref(),
            pane,
            0,
        )
    }

    /// The pane with id `id`.
    pub(super) fn pane(&self, id: PaneId) -> &dyn Pane {
        self.panes[id.number() - 1].as_ref()
    }

    /// Applies one action. The only place state changes on a key.
    pub fn update(&mut self, action: Action) {
        self.message = None;
        match std::mem::replace(&mut self.overlay, Overlay::None) {
            Overlay::Prompt(prompt) => self.prompt_action(prompt, action),
            Overlay::Help(scroll) => match action {
                Action::Help | Action::Cancel => {}
                Action::Quit => self.quit = true,
                Action::Down | Action::Scroll(_, 1..) => self.overlay = Overlay::Help(scroll + 1),
                Action::Up | Action::Scroll(..) => {
                    self.overlay = Overlay::Help(scroll.saturating_sub(1))
                }
                Action::PageDown => self.overlay = Overlay::Help(scroll + 10),
                Action::PageUp => self.overlay = Overlay::Help(scroll.saturating_sub(10)),
                _ => self.overlay = Overlay::Help(scroll),
            },
            Overlay::None => self.act(action),
        }
        self.drain();
    }

    fn act(&mut self, action: Action) {
        let session = &mut self.session;
        let note: Note = match action {
            Action::Step => session.step(),
            Action::Back => session.back(),
            Action::RunToFlag => session.run_to_flag(),
            Action::RunToEnd => session.run_to_end(),
            Action::Restart => {
                session.restart();
                None
            }
            Action::SelectCurrent => {
                session.follow_current();
                None
            }
            Action::OpenJump => self.open_prompt(PromptKind::Jump),
            Action::OpenSearch => self.open_prompt(PromptKind::Search),
            Action::OpenWatch => self.open_prompt(PromptKind::Watch),
            Action::SearchNext => session.search(None, true),
            Action::SearchPrevious => session.search(None, false),
            Action::FocusNext => self.set_focus(self.layout.focus.cycle(true)),
            Action::FocusPrevious => self.set_focus(self.layout.focus.cycle(false)),
            Action::Focus(pane) => self.set_focus(pane),
            Action::Zoom => {
                self.layout.zoomed = !self.layout.zoomed;
                None
            }
            Action::Cancel => self.cancel(),
            Action::CycleTheme => {
                self.theme_at = (self.theme_at + 1) % self.themes.len();
                Some(format!("theme: {}", self.theme().name))
            }
            Action::Help => {
                self.overlay = Overlay::Help(0);
                None
            }
            Action::Quit => {
                self.quit = true;
                None
            }
            Action::WalkBack => session.walk_back(),
            Action::Diagnose => self.ask_diagnosis(),
            Action::CyclePrecision => self.cycle_precision(),
            Action::JumpToOrigin => session.jump_to_origin(),
            Action::ToggleForward => session.toggle_forward(),
            Action::CycleDirection => session.cycle_direction(),
            Action::Verify => {
                let verify = PaneId::named("Verify").expect("the Verify pane is registered");
                let rerun = self.session.verified().is_some();
                let note = self.set_focus(verify);
                if rerun {
                    self.request(Job::Verify(self.session.trace().dtype()));
                }
                note
            }
            Action::Click(pane, _) => {
                let note = self.set_focus(pane);
                self.send_to_pane(pane, action);
                note
            }
            Action::Scroll(pane, _) => {
                self.send_to_pane(pane, action);
                None
            }
            Action::Type(_) | Action::Erase | Action::Complete | Action::Submit => None,
            // Movement, Enter and the panes' own keys go to the focused pane.
            _ => {
                self.send_to_pane(self.layout.focus, action);
                None
            }
        };
        if let Some(note) = note {
            self.say(&note);
        }
    }

    /// Hands `action` to pane `pane`; its messages wait in the outbox.
    fn send_to_pane(&mut self, pane: PaneId, action: Action) {
        let at = pane.number() - 1;
        let rows = layout::pane_area(&self.layout, pane)
            .map_or(0, |area| area.height.saturating_sub(2) as usize);
        let ctx = ctx_of(
            &self.session,
            &self.themes[self.theme_at],
            &self.keymap,
            &self.layout,
            self.running.as_ref(),
            pane,
            rows,
        );
        self.panes[at].handle(action, &ctx, &mut self.outbox);
    }

    /// Applies one message, as a pane would send it.
    pub fn apply(&mut self, message: Msg) {
        self.outbox.send(message);
        self.drain();
    }

    /// Applies every queued message, then lets each pane catch up with the
    /// session (which may queue more: bounded, a pane asks once).
    fn drain(&mut self) {
        for _ in 0..8 {
            for message in self.outbox.drain() {
                self.receive(message);
            }
            self.sync_panes();
            if self.outbox.is_empty() {
                return;
            }
        }
    }

    fn receive(&mut self, message: Msg) {
        let note = match message {
            Msg::Select(node) => {
                self.session.select(node);
                None
            }
            Msg::Jump(node) => {
                self.session.jump(node);
                None
            }
            Msg::Seek(step) => {
                let keep = self.session.selected();
                self.session.seek(step);
                self.session.select(keep);
                None
            }
            Msg::SeekTangent(node) => {
                self.session.seek_tangent(node);
                None
            }
            Msg::Status(text) => Some(text),
            Msg::Request(job) => {
                self.request(job);
                None
            }
            Msg::Focus(pane) => self.set_focus(pane),
        };
        if let Some(note) = note {
            self.say(&note);
        }
    }

    /// Lets every pane catch up with the session and the layout.
    fn sync_panes(&mut self) {
        // One arrangement for all panes: each pane's rows inside its border, 0 when not shown.
        let shown = match layout::arrange(&self.layout) {
            layout::Screen::Panes { panes, .. } => panes,
            layout::Screen::TooSmall => Vec::new(),
        };
        for (at, spec) in panes::specs().iter().enumerate() {
            let rows = shown
                .iter()
                .find(|(pane, _)| *pane == spec.id)
                .map_or(0, |(_, area)| area.height.saturating_sub(2) as usize);
            let ctx = ctx_of(
                &self.session,
                &self.themes[self.theme_at],
                &self.keymap,
                &self.layout,
                self.running.as_ref(),
                spec.id,
                rows,
            );
            self.panes[at].sync(&ctx, &mut self.outbox);
        }
    }

    /// Shows `text` in the status line, its `{key:NAME}`s filled in.
    fn say(&mut self, text: &str) {
        self.message = Some(self.keymap.fill(text, self.layout.focus));
    }

    fn set_focus(&mut self, pane: PaneId) -> Note {
        self.layout.focus(pane);
        None
    }

    fn open_prompt(&mut self, kind: PromptKind) -> Note {
        let mut prompt = Prompt::new(kind);
        if kind == PromptKind::Watch {
            prompt.text = self.last_watch.clone();
        }
        prompt.refresh(self.session.trace(), self.session.by_id());
        self.overlay = Overlay::Prompt(prompt);
        None
    }

    fn prompt_action(&mut self, mut prompt: Prompt, action: Action) {
        let trace = self.session.trace();
        match action {
            Action::Type(c) => {
                prompt.text.push(c);
                prompt.refresh(trace, self.session.by_id());
            }
            Action::Erase => {
                prompt.text.pop();
                prompt.refresh(trace, self.session.by_id());
            }
            Action::Complete => prompt.complete(trace, self.session.by_id()),
            Action::Down if !prompt.candidates.is_empty() => {
                prompt.pick = (prompt.pick + 1) % prompt.candidates.len()
            }
            Action::Up if !prompt.candidates.is_empty() => {
                prompt.pick = (prompt.pick + prompt.candidates.len() - 1) % prompt.candidates.len();
            }
            Action::Cancel => return,
            Action::Quit => {
                self.quit = true;
                return;
            }
            Action::Submit => {
                let note = match prompt.kind {
                    PromptKind::Jump => match prompt.target(trace) {
                        Some(node) => {
                            self.session.jump(NodeIx::new(node));
                            None
                        }
                        None => self.session.jump_to_id(&prompt.text),
                    },
                    PromptKind::Search => self.session.search(Some(&prompt.text), true),
                    PromptKind::Watch => match Condition::parse(&prompt.text, trace) {
                        Ok(condition) => {
                            self.last_watch = prompt.text.clone();
                            self.session.run_until(&condition, &prompt.text)
                        }
                        Err(error) => {
                            prompt.error = Some(error);
                            self.overlay = Overlay::Prompt(prompt);
                            return;
                        }
                    },
                };
                if let Some(note) = note {
                    self.say(&note);
                }
                return;
            }
            _ => {}
        }
        prompt.error = None;
        self.overlay = Overlay::Prompt(prompt);
    }

    // ----- work -----

    /// Queues `job` unless it is queued or running already.
    fn request(&mut self, job: Job) {
        let running = self
            .running
            .as_ref()
            .is_some_and(|running| running.job == job);
        if !running && !self.queue.contains(&job) {
            self.queue.push_back(job);
        }
    }

    fn ask_diagnosis(&mut self) -> Note {
        let dtype = self.session.trace().dtype();
        if let Some(diagnosed) = self.session.diagnosis() {
            return Some(super::session::diagnosis_message(
                self.session.trace(),
                diagnosed,
            ));
        }
        self.request(Job::Diagnose(dtype));
        None
    }

    fn cycle_precision(&mut self) -> Note {
        let recorded = self.session.recorded().dtype();
        let dtype = next_dtype(recorded, self.session.trace().dtype());
        if !self.session.has_dtype(dtype) {
            self.request(Job::Retype(dtype));
            return Some(format!(
                "making the trace in {dtype} (the view switches when it is ready)"
            ));
        }
        self.switch_dtype(dtype)
    }

    fn switch_dtype(&mut self, dtype: crate::dtype::Dtype) -> Note {
        let note = self.session.switch_dtype(dtype);
        let recorded = self.session.recorded().dtype();
        if self.session.diagnosis_in(recorded).is_some() && self.session.diagnosis().is_none() {
            self.request(Job::Diagnose(dtype));
        }
        note
    }

    /// Esc: stops the work under way (and what waits), else closes the zoom.
    fn cancel(&mut self) -> Note {
        if let Some(running) = self.running.take() {
            running.progress.cancel();
            self.queue.clear();
            return Some(format!(
                "cancelled: {} (the view carries on without it)",
                running.job.describe()
            ));
        }
        if !self.queue.is_empty() {
            self.queue.clear();
            return Some("cancelled the waiting work".to_string());
        }
        self.layout.zoomed = false;
        None
    }

    /// The next task for the worker, when none runs; the event loop hands it
    /// to a thread and returns what it produced through [`App::finish`].
    pub fn next_task(&mut self) -> Option<Task> {
        if self.running.is_some() {
            return None;
        }
        let job = self.queue.pop_front()?;
        self.next_id += 1;
        let progress = Arc::new(Progress::default());
        self.running = Some(Running {
            id: self.next_id,
            job,
            progress: progress.clone(),
            started: Instant::now(),
        });
        self.sync_panes();
        Some(Task {
            id: self.next_id,
            job,
            traces: self.session.traces().clone(),
            settings: self.settings.clone(),
            progress,
        })
    }

    /// Takes in what a task produced; results of cancelled tasks are dropped.
    pub fn finish(&mut self, finished: Finished) {
        if self.running.as_ref().map(|running| running.id) != Some(finished.id) {
            return;
        }
        self.running = None;
        let note = match finished.outcome {
            Outcome::Diagnosed(diagnosed) => self.session.diagnosed(*diagnosed),
            Outcome::Retyped(dtype) => self.switch_dtype(dtype),
            Outcome::Verified(verified) => self.session.keep_verification(*verified),
            Outcome::Surveyed(survey) => {
                self.session.surveyed(survey);
                None
            }
            Outcome::Cancelled => Some(format!("cancelled: {}", finished.job.describe())),
            Outcome::Failed(why) => Some(format!(
                "{} failed: {why} (a bug in Ebb: please report it)",
                finished.job.describe()
            )),
        };
        // Results arriving do not wipe what a key just said.
        if let Some(note) = note {
            self.say(&note);
        }
        self.drain();
    }

    /// Runs every queued task here and now, one after another (tests and
    /// benchmarks; the terminal runs them on a worker thread).
    pub fn work(&mut self) {
        while let Some(task) = self.next_task() {
            let finished = task.run();
            self.finish(finished);
        }
    }
}

/// A pane's context, from the app's fields (so a pane can be borrowed mutably beside it).
fn ctx_of<'a, 't>(
    session: &'a Session<'t>,
    theme: &'a Theme,
    keys: &'a KeyMap,
    layout: &'a LayoutState,
    work: Option<&'a Running>,
    pane: PaneId,
    rows: usize,
) -> Ctx<'a, 't> {
    Ctx {
        session,
        theme,
        keys,
        pane,
        focused: layout.focus == pane,
        rows,
        work,
    }
}
