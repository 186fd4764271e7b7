//! The view's state and its one `update(Action)`: the sweep, what is
//! selected and focused, the overlays, and the caches panes read per frame.

use super::action::{Action, PaneId};
use super::checks::Checks;
use super::diagnosis::{AUTO_NODES, Diagnosed, Diagnoses, Work};
use super::forward::Forward;
use super::keymap::{Key, KeyMap};
use super::layers::Layers;
use super::layout;
use super::neighbours::{EdgeRow, edges};
use super::panes::{self, Move};
use super::precision::{Contrast, Retyped, next_dtype};
use super::prompt::{Prompt, PromptKind, matches, sorted_ids};
use super::tally::Tally;
use super::theme::Theme;
use crate::dtype::Dtype;
use crate::stats::Summary;
use crate::sweep::{LedgerMode, Sweep};
use crate::tensor::Value;
use crate::trace::Trace;
use ratatui::layout::Rect;
use std::collections::HashMap;

/// What covers the panes, if anything.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Overlay {
    /// Nothing: keys go to the panes.
    None,
    /// The list of keys, scrolled by some rows.
    Help(usize),
    /// The jump or search prompt.
    Prompt(Prompt),
}

/// Summaries of the selected node, computed when the selection or the sweep
/// changes, never per frame.
#[derive(Debug, Clone, Default)]
pub struct Selection {
    /// Summary of the forward value (tensors only).
    pub value: Option<Summary>,
    /// Summary of the adjoint so far (tensors only).
    pub adjoint: Option<Summary>,
    /// The node's input and consumer edges with their partials.
    pub edges: Vec<EdgeRow>,
    /// The node these describe.
    node: Option<usize>,
    /// The sweep position the adjoint summary is for.
    cursor: usize,
}

/// The state of the terminal view.
pub struct App<'t> {
    /// The trace on screen.
    pub trace: &'t Trace,
    /// The sweep being stepped (its ledger is on).
    pub sweep: Sweep<'t>,
    /// Where the trace came from, for the status line.
    pub label: String,
    /// Keys to actions.
    pub keymap: KeyMap,
    /// The themes `t` cycles through; `theme_at` is in use.
    pub themes: Vec<Theme>,
    /// Index of the theme in use.
    pub theme_at: usize,
    /// The focused pane.
    pub focus: PaneId,
    /// The pane shown in the shared slot of the narrow layout.
    pub side: PaneId,
    /// Whether the focused pane fills the screen.
    pub zoomed: bool,
    /// The help or the prompt, if open.
    pub overlay: Overlay,
    /// The node shown in Node, Inflow and Edges.
    pub selected: usize,
    /// Whether the selection follows the sweep's current node.
    pub follow: bool,
    /// First sweep step shown in Order.
    pub order_offset: usize,
    /// First element row shown in Node.
    pub node_scroll: usize,
    /// First row shown in Inflow.
    pub inflow_scroll: usize,
    /// Highlighted edge in Edges.
    pub edge_cursor: usize,
    /// Nodes walked from, most recent last.
    pub walk: Vec<usize>,
    /// Highlighted flag in Flags.
    pub flag_cursor: usize,
    /// The last search.
    pub search: Option<String>,
    /// A one-line message for the status line, until the next action.
    pub message: Option<String>,
    /// Set by the quit action.
    pub quit: bool,
    /// The terminal's size at the last draw.
    pub area: Rect,
    /// Per-node norms, group norms and flag marks.
    pub tally: Tally,
    /// Summaries and edges of the selected node.
    pub selection: Selection,
    /// The layered drawing, for small traces.
    pub layers: Option<Layers>,
    /// Summaries of forward values already computed (they never change).
    value_summaries: HashMap<usize, Summary>,
    /// Node indices sorted by id, built on the first jump.
    by_id: Option<Vec<usize>>,
    /// The pane in the Trend slot of the wide layout: Trend or Verify.
    pub corner: PaneId,
    /// The verification checks and the Verify pane's cursor.
    pub checks: Checks,
    /// Forward mode's tangent sweep, while it is on.
    pub forward: Option<Forward<'t>>,
    /// The trace as loaded; `trace` is a re-typed copy of it while the precision toggle is on.
    pub recorded: &'t Trace,
    /// The diagnosis of each dtype swept so far.
    pub diagnoses: Diagnoses,
    /// While the precision toggle is on: the sweep over the recorded trace, kept at the view sweep's cursor.
    pub compare: Option<Sweep<'t>>,
    /// Work queued for after the next frame, which says it is under way.
    pub work: Option<Work>,
    /// Highlighted row in Paths.
    pub paths_cursor: usize,
    /// The parameter Paths showed last, kept while the selection is not a parameter.
    pub paths_param: Option<usize>,
    /// While the precision toggle is on: the selected node's adjoint against the recorded dtype's.
    pub contrast: Option<Contrast>,
    /// The re-typed copies the precision toggle sweeps over (see [`App::with_copies`]).
    copies: Option<&'t Retyped<'t>>,
}

impl<'t> App<'t> {
    /// The view of a fresh sweep over `trace`, with `themes` to cycle (the first in use).
    pub fn new(trace: &'t Trace, label: &str, themes: Vec<Theme>) -> App<'t> {
        let sweep = Sweep::new(trace, LedgerMode::On);
        let tally = Tally::new(&sweep);
        let themes = if themes.is_empty() {
            vec![Theme::default_theme()]
        } else {
            themes
        };
        let mut app = App {
            trace,
            label: label.to_string(),
            keymap: KeyMap::default(),
            themes,
            theme_at: 0,
            focus: PaneId::Order,
            side: PaneId::Inflow,
            zoomed: false,
            overlay: Overlay::None,
            selected: trace.output(),
            follow: true,
            order_offset: 0,
            node_scroll: 0,
            inflow_scroll: 0,
            edge_cursor: 0,
            walk: Vec::new(),
            flag_cursor: 0,
            search: None,
            message: None,
            quit: false,
            area: Rect::new(0, 0, 80, 24),
            tally,
            selection: Selection::default(),
            layers: Layers::of(trace),
            value_summaries: HashMap::new(),
            by_id: None,
            corner: PaneId::Trend,
            checks: Checks::default(),
            forward: None,
            sweep,
            recorded: trace,
            diagnoses: Diagnoses::default(),
            compare: None,
            work: None,
            paths_cursor: 0,
            paths_param: None,
            contrast: None,
            copies: None,
        };
        if trace.nodes().len() <= AUTO_NODES {
            app.work = Some(Work::Diagnose);
        } else {
            app.message = Some(format!(
                "{} nodes: D runs the diagnosis (it sweeps the trace several times)",
                trace.nodes().len()
            ));
        }
        app.refresh();
        app
    }

    /// Lets the precision toggle sweep re-typed copies of the trace; `copies`
    /// must be made from this app's trace.
    pub fn with_copies(mut self, copies: &'t Retyped<'t>) -> App<'t> {
        debug_assert!(
            std::ptr::eq(copies.recorded(), self.recorded),
            "copies of another trace"
        );
        self.copies = Some(copies);
        self
    }

    /// The view with `keymap` (`ebb open --keys`) in place of the default
    /// keys; help and hints follow it.
    pub fn with_keymap(mut self, keymap: KeyMap) -> App<'t> {
        self.keymap = keymap;
        self
    }

    /// Diagnoses with these thresholds (`ebb open --rules/--set`) instead of the defaults.
    pub fn with_settings(mut self, settings: crate::diagnose::Settings) -> App<'t> {
        self.diagnoses = Diagnoses::with_settings(settings);
        self
    }

    /// The diagnosis of the sweep on screen (in the view's dtype), once made.
    pub fn diagnosis(&self) -> Option<&Diagnosed> {
        self.diagnoses.get(self.trace.dtype())
    }

    /// Whether work is queued: the event loop draws a frame, then calls [`App::work`].
    pub fn has_work(&self) -> bool {
        self.work.is_some()
    }

    /// Does the queued work: a diagnosis, or the sweep in another dtype.
    pub fn work(&mut self) {
        match self.work.take() {
            None => return,
            Some(Work::Diagnose) => {
                let replays = self.trace.dtype() == self.recorded.dtype();
                let diagnosed = self.diagnoses.run(self.trace, replays);
                self.message = Some(diagnosis_message(self.trace, diagnosed));
            }
            Some(Work::Retype(dtype)) => self.retype(dtype),
        }
        self.refresh();
    }

    /// Sweeps the trace re-typed into `dtype` up to the same step, and diagnoses it if the recorded one was.
    fn retype(&mut self, dtype: Dtype) {
        let Some(copies) = self.copies else { return };
        // The tangent sweep runs over the trace it was started on: forward mode ends here.
        let left_forward = self.forward.take().is_some();
        let cursor = self.sweep.cursor();
        self.trace = copies.get(dtype);
        self.sweep = Sweep::new(self.trace, LedgerMode::On);
        self.tally = Tally::new(&self.sweep);
        self.value_summaries.clear();
        self.selection = Selection::default();
        self.seek(cursor);
        let recorded = self.recorded;
        self.compare = (dtype != recorded.dtype()).then(|| Sweep::new(recorded, LedgerMode::On));
        if self.diagnoses.get(recorded.dtype()).is_some() {
            self.diagnoses.run(self.trace, false);
        }
        let note = if left_forward {
            "; forward mode ended (m starts it again)"
        } else {
            ""
        };
        self.message = Some(precision_message(self) + note);
    }

    fn cycle_precision(&mut self) {
        if self.copies.is_none() {
            self.message = Some(
                "the precision toggle needs the trace's copies (App::with_copies)".to_string(),
            );
            return;
        }
        let dtype = next_dtype(self.recorded.dtype(), self.trace.dtype());
        self.work = Some(Work::Retype(dtype));
        self.message = Some(format!("sweeping in {dtype} …"));
    }

    fn ask_diagnosis(&mut self) {
        match self.diagnosis() {
            Some(diagnosed) => self.message = Some(diagnosis_message(self.trace, diagnosed)),
            None => {
                self.work = Some(Work::Diagnose);
                self.message = Some(format!(
                    "diagnosing {} nodes in {} …",
                    self.trace.nodes().len(),
                    self.trace.dtype()
                ));
            }
        }
    }

    /// Selects the origin behind the selected node, else the first origin.
    fn jump_to_origin(&mut self) {
        let Some(diagnosed) = self.diagnosis() else {
            self.message = Some("no diagnosis yet: D runs it".to_string());
            return;
        };
        let origin = diagnosed
            .origin_for(self.selected)
            .or(diagnosed.diagnosis.first_origin());
        match origin {
            Some(origin) => {
                let (node, letter) = (origin.node, origin.class.letter());
                let text = format!(
                    "origin ({letter}) at '{}': {}",
                    self.trace.node(node).id,
                    origin.explanation
                );
                self.jump(node);
                self.message = Some(text);
            }
            None => {
                self.message = Some(format!(
                    "every adjoint is finite in {}: no origin to trace back",
                    self.trace.dtype()
                ))
            }
        }
    }

    /// Selects the next (or previous) parameter that has a dominant path.
    fn step_parameter(&mut self, forward: bool) {
        let Some(diagnosed) = self.diagnosis() else {
            self.message = Some("no diagnosis yet: D runs it".to_string());
            return;
        };
        let params: Vec<usize> = diagnosed
            .diagnosis
            .paths
            .iter()
            .map(|path| path.param)
            .collect();
        if params.is_empty() {
            self.message =
                Some("no parameter reaches the output through edges of known gain".to_string());
            return;
        }
        let shown = panes::paths_param(self);
        let at = shown.and_then(|param| params.iter().position(|&listed| listed == param));
        let len = params.len();
        let next = match at {
            Some(at) if forward => (at + 1) % len,
            Some(at) => (at + len - 1) % len,
            None => 0,
        };
        self.jump(params[next]);
        self.paths_cursor = 0;
    }

    /// Rows in Flags: the sweep's flags so far, then the diagnosis's rows.
    pub fn flag_rows(&self) -> usize {
        self.sweep.flags().len() + self.diagnosis().map_or(0, |diagnosed| diagnosed.rows.len())
    }

    /// The theme in use.
    pub fn theme(&self) -> &Theme {
        &self.themes[self.theme_at]
    }

    /// Records the terminal size (before each draw and on resize).
    pub fn resize(&mut self, area: Rect) {
        self.area = area;
        self.keep_order_visible();
    }

    /// Handles one key press: looks it up in the key map and updates.
    pub fn key(&mut self, key: Key) {
        let prompt = matches!(self.overlay, Overlay::Prompt(_));
        if let Some(action) = self.keymap.lookup(key, self.focus, prompt) {
            self.update(action);
        }
    }

    /// Applies one action. The only place state changes.
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
                other => self.pane_action(other),
            },
            Overlay::None => self.pane_action(action),
        }
        self.refresh();
    }

    fn pane_action(&mut self, action: Action) {
        if self.forward_action(action) {
            return;
        }
        match action {
            Action::Step => {
                if !self.advance() {
                    self.message = Some(
                        "the sweep is done: every adjoint is final (b steps back, r restarts)"
                            .to_string(),
                    );
                }
            }
            Action::Back => {
                if !self.retreat() {
                    self.message = Some("at the start: only the output holds its seed".to_string());
                }
            }
            Action::RunToFlag => self.run_to_flag(),
            Action::RunToEnd => while self.advance() {},
            Action::Restart => {
                self.sweep.restart();
                self.tally.reset(&self.sweep);
                self.follow = true;
            }
            Action::SelectCurrent => self.follow = true,
            Action::OpenJump => {
                let by_id = self.by_id.get_or_insert_with(|| sorted_ids(self.trace));
                let mut prompt = Prompt::new(PromptKind::Jump);
                prompt.refresh(self.trace, by_id);
                self.overlay = Overlay::Prompt(prompt);
            }
            Action::OpenSearch => self.overlay = Overlay::Prompt(Prompt::new(PromptKind::Search)),
            Action::SearchNext => self.search_from(true),
            Action::SearchPrevious => self.search_from(false),
            Action::FocusNext => self.set_focus(self.focus.cycle(true)),
            Action::FocusPrevious => self.set_focus(self.focus.cycle(false)),
            Action::Focus(pane) => self.set_focus(pane),
            Action::Zoom => self.zoomed = !self.zoomed,
            Action::Cancel => self.zoomed = false,
            Action::CycleTheme => {
                self.theme_at = (self.theme_at + 1) % self.themes.len();
                self.message = Some(format!("theme: {}", self.theme().name));
            }
            Action::Help => self.overlay = Overlay::Help(0),
            Action::Quit => self.quit = true,
            Action::Down => self.move_focused(Move::By(1)),
            Action::Up => self.move_focused(Move::By(-1)),
            Action::PageDown => self.move_focused(Move::By(self.page() as isize)),
            Action::PageUp => self.move_focused(Move::By(-(self.page() as isize))),
            Action::Top => self.move_focused(Move::Top),
            Action::Bottom => self.move_focused(Move::Bottom),
            Action::Enter => panes::pane(self.focus).enter(self),
            Action::WalkBack => match self.walk.pop() {
                Some(node) => self.select(node),
                None => {
                    self.message = Some(
                        "the walk history is empty (Enter on an edge in Edges walks along it)"
                            .to_string(),
                    )
                }
            },
            Action::Click(pane, row) => {
                self.set_focus(pane);
                panes::pane(pane).click(self, row as usize);
            }
            Action::Scroll(pane, rows) => {
                panes::pane(pane).move_cursor(self, Move::By(rows as isize))
            }
            Action::Diagnose => self.ask_diagnosis(),
            Action::CyclePrecision => self.cycle_precision(),
            Action::JumpToOrigin => self.jump_to_origin(),
            Action::NextParameter => self.step_parameter(true),
            Action::PreviousParameter => self.step_parameter(false),
            Action::Type(_) | Action::Erase | Action::Complete | Action::Submit => {}
            Action::Verify => {
                // Focusing the pane runs the checks the first time; the key reruns them after that.
                let rerun = self.checks.verification.is_some();
                self.set_focus(PaneId::Verify);
                if rerun {
                    self.request_verification();
                }
            }
            Action::ToggleForward => self.toggle_forward(),
            Action::CycleDirection => self.cycle_direction(),
        }
    }

    fn prompt_action(&mut self, mut prompt: Prompt, action: Action) {
        let by_id = self.by_id.get_or_insert_with(|| sorted_ids(self.trace));
        match action {
            Action::Type(c) => {
                prompt.text.push(c);
                prompt.refresh(self.trace, by_id);
            }
            Action::Erase => {
                prompt.text.pop();
                prompt.refresh(self.trace, by_id);
            }
            Action::Complete => prompt.complete(self.trace, by_id),
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
                match prompt.kind {
                    PromptKind::Jump => match prompt.target(self.trace) {
                        Some(node) => self.jump(node),
                        None => {
                            self.message = Some(format!(
                                "no node has the id '{}' (Tab completes ids)",
                                prompt.text
                            ))
                        }
                    },
                    PromptKind::Search => {
                        self.search = (!prompt.text.is_empty()).then(|| prompt.text.clone());
                        self.search_from(true);
                    }
                }
                return;
            }
            _ => {}
        }
        self.overlay = Overlay::Prompt(prompt);
    }

    /// Takes one step, keeping the tally in line. False when done.
    pub fn advance(&mut self) -> bool {
        let step = self.sweep.cursor();
        if self.sweep.step().is_none() {
            return false;
        }
        self.tally.stepped(&self.sweep, step);
        true
    }

    /// Undoes one step, keeping the tally in line. False at the start.
    pub fn retreat(&mut self) -> bool {
        let Some(node) = self.sweep.last_done() else {
            return false;
        };
        let step = self.sweep.cursor() - 1;
        let receivers: Vec<usize> = self
            .sweep
            .ledger()
            .map(|ledger| {
                ledger
                    .step_entries(step)
                    .iter()
                    .map(|entry| entry.input)
                    .collect()
            })
            .unwrap_or_default();
        self.sweep.back();
        self.tally.stepped_back(&self.sweep, node, &receivers);
        true
    }

    fn run_to_flag(&mut self) {
        let seen = self.sweep.flags().len();
        while self.sweep.flags().len() == seen && self.advance() {}
        match self.sweep.flags().get(seen).cloned() {
            Some(flag) => {
                self.follow = false;
                self.select(flag.node);
                self.flag_cursor = seen;
                self.message = Some(format!(
                    "{} {} at {} (step {})",
                    super::symbols::flag_symbol(flag.kind),
                    flag.kind.name(),
                    self.trace.node(flag.node).id,
                    flag.step + 1
                ));
            }
            None => self.message = Some("no further flag: the sweep ran to the end".to_string()),
        }
    }

    /// Steps forward or back until the node at sweep position `rank` is the current one.
    pub fn seek(&mut self, rank: usize) {
        while self.sweep.cursor() > rank && self.retreat() {}
        while self.sweep.cursor() < rank && self.advance() {}
    }

    /// Selects `node` without walking; the selection stops following the sweep.
    pub fn select(&mut self, node: usize) {
        self.follow = false;
        self.selected = node;
    }

    /// Selects `node` from a jump, search or flag: the old selection goes onto the walk history.
    pub fn jump(&mut self, node: usize) {
        if node != self.selected {
            self.walk.push(self.selected);
        }
        self.select(node);
    }

    fn set_focus(&mut self, pane: PaneId) {
        self.focus = pane;
        if layout::shares_slot(pane) {
            self.side = pane;
        }
        if layout::takes_corner(pane) {
            self.corner = pane;
        }
        // The checks run once, when their pane is first shown.
        if pane == PaneId::Verify && self.checks.verification.is_none() && !self.checks.requested {
            self.request_verification();
        }
    }

    fn move_focused(&mut self, motion: Move) {
        panes::pane(self.focus).move_cursor(self, motion);
    }

    /// Rows inside the focused pane, for paging.
    fn page(&self) -> usize {
        layout::pane_area(self, self.focus)
            .map_or(10, |area| area.height.saturating_sub(3).max(1) as usize)
    }

    fn search_from(&mut self, forward: bool) {
        let Some(query) = self.search.clone() else {
            self.message = Some("no search yet: / starts one".to_string());
            return;
        };
        let order = self.trace.sweep_order();
        let start = self.trace.sweep_rank(self.selected).unwrap_or(0);
        let len = order.len();
        let found = (1..=len)
            .map(|offset| {
                if forward {
                    (start + offset) % len
                } else {
                    (start + len - offset) % len
                }
            })
            .find(|&rank| matches(self.trace, order[rank], &query));
        match found {
            Some(rank) => {
                self.jump(order[rank]);
                self.message = Some(format!("'{query}': step {} of {len}", rank + 1));
            }
            None => self.message = Some(format!("nothing in the sweep matches '{query}'")),
        }
    }

    /// Brings the selection in line with the sweep and recomputes what
    /// depends on the selected node or on the sweep's position.
    fn refresh(&mut self) {
        if self.follow {
            self.selected = match &self.forward {
                Some(forward) => forward.current().or(forward.last_done()),
                None => self.sweep.current().or(self.sweep.last_done()),
            }
            .unwrap_or(self.trace.output());
        }
        let node = self.selected;
        let cursor = self.sweep.cursor();
        if let Some(compare) = &mut self.compare {
            compare.seek(cursor);
        }
        if self.selection.node != Some(node) {
            let value = &self.trace.node(node).value;
            self.selection.value = match value {
                Value::Tensor(_) => Some(
                    *self
                        .value_summaries
                        .entry(node)
                        .or_insert_with(|| value.summary(self.trace.dtype())),
                ),
                Value::Scalar(_) => None,
            };
            self.selection.edges = edges(self.trace, node);
            (self.node_scroll, self.inflow_scroll, self.edge_cursor) = (0, 0, 0);
        }
        if self.selection.node != Some(node) || self.selection.cursor != cursor {
            self.selection.adjoint = match self.sweep.adjoint(node).as_deref() {
                Some(adjoint @ Value::Tensor(_)) => Some(adjoint.summary(self.trace.dtype())),
                _ => None,
            };
            self.contrast = match (
                self.sweep.adjoint(node),
                self.compare
                    .as_ref()
                    .and_then(|compare| compare.adjoint(node)),
            ) {
                (Some(here), Some(recorded)) => Some(Contrast::of(&here, &recorded)),
                _ => None,
            };
        }
        (self.selection.node, self.selection.cursor) = (Some(node), cursor);
        let param = panes::paths_param(self);
        if param != self.paths_param {
            (self.paths_param, self.paths_cursor) = (param, 0);
        }
        self.flag_cursor = self.flag_cursor.min(self.flag_rows().saturating_sub(1));
        self.keep_order_visible();
    }

    /// Scrolls Order so the selected node (or the current one) is in view.
    fn keep_order_visible(&mut self) {
        let rows = layout::pane_area(self, PaneId::Order)
            .map_or(10, |area| area.height.saturating_sub(3).max(1) as usize);
        let Some(rank) = self.order_rank(self.selected) else {
            return;
        };
        if rank < self.order_offset {
            self.order_offset = rank;
        } else if rank >= self.order_offset + rows {
            self.order_offset = rank + 1 - rows;
        }
    }
}

/// What the diagnosis found, in one line for the status line.
fn diagnosis_message(trace: &Trace, diagnosed: &Diagnosed) -> String {
    let diagnosis = &diagnosed.diagnosis;
    if let Some(origin) = diagnosis.first_origin() {
        let more = diagnosis.origins.len() - 1;
        let more = if more > 0 {
            format!(" (+{more} more)")
        } else {
            String::new()
        };
        return format!(
            "diagnosis: origin ({}) {} at '{}'{more}; o jumps to it",
            origin.class.letter(),
            origin.class.title(),
            trace.node(origin.node).id
        );
    }
    if diagnosis.is_clean() {
        return format!("diagnosis: clean, no rule fired in {}", diagnosis.dtype);
    }
    let mut rules: Vec<&str> = diagnosis
        .findings
        .iter()
        .map(|finding| super::diagnosis::rule_label(finding.rule))
        .collect();
    rules.dedup();
    rules.sort();
    rules.dedup();
    format!(
        "diagnosis: every adjoint finite; {} findings ({}) in Flags, paths in 8",
        diagnosis.findings.len(),
        rules.join(", ")
    )
}

/// What changes in the view's dtype, from the recorded trace's replay against f64.
fn precision_message(app: &App) -> String {
    let (dtype, recorded) = (app.trace.dtype(), app.recorded.dtype());
    if dtype == recorded {
        return format!("back to the recorded dtype {dtype}");
    }
    let Some(run) = app
        .diagnoses
        .get(recorded)
        .and_then(|diagnosed| diagnosed.diagnosis.replay_in(dtype))
    else {
        return format!("swept in {dtype} (recorded {recorded}); D diagnoses it");
    };
    let id = |node: usize| app.trace.node(node).id.as_str();
    let at = |finding: Option<&crate::diagnose::Finding>| {
        finding.map_or("none".to_string(), |finding| {
            format!("'{}' step {}", id(finding.node), finding.step + 1)
        })
    };
    let lost = run.first_lost().map_or("none".to_string(), |lost| {
        format!("'{}' step {}", id(lost.node), lost.step + 1)
    });
    format!(
        "{dtype} vs f64: first overflow {} · underflow {} · lost contribution {lost}",
        at(run.first_overflow()),
        at(run.first_underflow())
    )
}
