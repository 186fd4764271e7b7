//! The panes: one module each, all behind the small [`Pane`] trait, and the
//! one registry that lists them. A pane owns its cursor and scroll state,
//! draws from a read-only [`Ctx`] (never changing anything while drawing),
//! and answers actions by changing its own state and sending [`Msg`]s for
//! everything else. Adding a pane is its file and one line in [`REGISTRY`]:
//! its number key, its `focus_` action, its key-file scope, its place in
//! the layout and its keys in the help all come from its [`Spec`].

mod edges;
mod flags;
mod inflow;
mod node;
mod node_findings;
mod order;
mod order_forward;
mod paths;
mod trend;
mod verify;

use super::action::{Action, PaneId};
use super::keymap::KeyMap;
use super::layout::Slot;
use super::message::Outbox;
use super::session::Session;
use super::theme::Theme;
use super::work::Running;
use crate::dtype::Dtype;
use crate::format::{compact, readable};
use crate::tensor::Value;
use ratatui::buffer::Buffer;
use ratatui::layout::Rect;

/// Every pane, in focus order (which gives its number key). The one place a
/// new pane is registered.
static REGISTRY: [Spec; 8] = [
    order::SPEC,
    node::SPEC,
    inflow::SPEC,
    edges::SPEC,
    trend::SPEC,
    flags::SPEC,
    verify::SPEC,
    paths::SPEC,
];

/// What the view needs to know of a pane besides the pane itself.
pub struct Spec {
    /// Its id (its title's name).
    pub id: PaneId,
    /// Where the layout puts it.
    pub slot: Slot,
    /// What it shows, in a few words, for the help.
    pub about: &'static str,
    /// Its own keys: (key as a key file writes it, action, what it does here).
    pub keys: &'static [(&'static str, Action, &'static str)],
    /// A fresh pane.
    pub make: fn() -> Box<dyn Pane>,
}

/// Every registered pane's spec, in focus order.
pub fn specs() -> &'static [Spec] {
    &REGISTRY
}

/// Every registered pane's id, in focus order.
pub fn ids() -> impl Iterator<Item = PaneId> {
    REGISTRY.iter().map(|spec| spec.id)
}

/// The spec of `id`.
pub fn spec(id: PaneId) -> &'static Spec {
    REGISTRY
        .iter()
        .find(|spec| spec.id == id)
        .expect("every PaneId is registered")
}

/// What a pane sees of the view: read-only.
pub struct Ctx<'a, 't> {
    /// The session.
    pub session: &'a Session<'t>,
    /// The theme in use.
    pub theme: &'a Theme,
    /// The key map, for sentences that name keys.
    pub keys: &'a KeyMap,
    /// The pane this context is for.
    pub pane: PaneId,
    /// Whether it has focus.
    pub focused: bool,
    /// Rows inside its border at the last layout (0 when not shown).
    pub rows: usize,
    /// The work under way, if any.
    pub work: Option<&'a Running>,
}

impl Ctx<'_, '_> {
    /// `text` with its `{key:NAME}` placeholders filled from the key map (this pane's keys first).
    pub fn say(&self, text: &str) -> String {
        self.keys.fill(text, self.pane)
    }

    /// The dtype values of the trace on screen are stored in.
    pub fn dtype(&self) -> Dtype {
        self.session.trace().dtype()
    }
}

/// One pane.
pub trait Pane {
    /// What follows the pane's name in its title (counts, the node shown).
    fn title(&self, _ctx: &Ctx) -> String {
        String::new()
    }
    /// Draws the pane's content inside its border.
    fn draw(&self, ctx: &Ctx, area: Rect, buf: &mut Buffer);
    /// Answers an action aimed at the pane (movement, Enter, a click, a
    /// scroll, its own keys): changes its own state, asks the rest through `out`.
    fn handle(&mut self, action: Action, ctx: &Ctx, out: &mut Outbox);
    /// The session or the layout changed (a step, a new selection, new
    /// results, a resize): clamp or reset state, ask for what it needs.
    fn sync(&mut self, _ctx: &Ctx, _out: &mut Outbox) {}
}

/// A cursor movement inside a pane.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Move {
    /// Down (positive) or up by some rows.
    By(isize),
    /// To the first row.
    Top,
    /// To the last row.
    Bottom,
}

impl Move {
    /// The movement an action asks for, with `page` rows to a page.
    pub fn of(action: Action, page: usize) -> Option<Move> {
        let page = page.max(1) as isize;
        match action {
            Action::Down => Some(Move::By(1)),
            Action::Up => Some(Move::By(-1)),
            Action::PageDown => Some(Move::By(page)),
            Action::PageUp => Some(Move::By(-page)),
            Action::Top => Some(Move::Top),
            Action::Bottom => Some(Move::Bottom),
            Action::Scroll(_, rows) => Some(Move::By(rows as isize)),
            _ => None,
        }
    }

    /// The new position of a cursor at `at` in a list of `len` rows.
    pub fn apply(self, at: usize, len: usize) -> usize {
        let last = len.saturating_sub(1);
        match self {
            Move::By(rows) => at.saturating_add_signed(rows).min(last),
            Move::Top => 0,
            Move::Bottom => last,
        }
    }
}

/// The first row to show so that `cursor` is in view with `rows` rows, kept
/// as close to `offset` as possible.
pub fn scrolled(offset: usize, cursor: usize, rows: usize) -> usize {
    let rows = rows.max(1);
    if cursor < offset {
        cursor
    } else if cursor >= offset + rows {
        cursor + 1 - rows
    } else {
        offset
    }
}

/// A value in at most `width` columns: at its dtype's precision when it
/// fits, else six significant digits; tensors by shape and norm.
pub fn value_text(value: &Value, dtype: Dtype, width: usize) -> String {
    match value {
        Value::Scalar(x) => fit_number(*x, dtype, width),
        Value::Tensor(t) => format!(
            "{} ‖·‖ {}",
            crate::format::shape(t.shape()),
            compact(value.l2_norm())
        ),
    }
}

/// A number at its dtype's precision ([`readable`]) when it fits in
/// `width` columns, else in short form.
pub fn fit_number(x: f64, dtype: Dtype, width: usize) -> String {
    let exact = readable(x, dtype);
    if exact.chars().count() <= width {
        exact
    } else {
        compact(x)
    }
}

/// `text` cut or padded to exactly `width` columns (cut text ends in `…`).
pub fn fit(text: &str, width: usize) -> String {
    let count = text.chars().count();
    if count <= width {
        format!("{text:<width$}")
    } else if width == 0 {
        String::new()
    } else {
        let cut: String = text.chars().take(width - 1).collect();
        format!("{cut}…")
    }
}

/// `text` broken at spaces into lines of at most `width` columns (a word
/// longer than that is cut), for sentences in a pane.
pub fn wrap(text: &str, width: usize) -> Vec<String> {
    let width = width.max(1);
    let mut lines: Vec<String> = Vec::new();
    let mut line = String::new();
    for word in text.split(' ').filter(|word| !word.is_empty()) {
        let (used, needed) = (line.chars().count(), word.chars().count());
        if used > 0 && used + 1 + needed > width {
            lines.push(std::mem::take(&mut line));
        }
        if !line.is_empty() {
            line.push(' ');
        }
        line.push_str(word);
        while line.chars().count() > width {
            let rest: String = line.chars().skip(width).collect();
            lines.push(line.chars().take(width).collect());
            line = rest;
        }
    }
    if !line.is_empty() {
        lines.push(line);
    }
    lines
}

/// Node ids joined by arrows, both ends kept and the middle elided to fit `width` columns.
pub fn chain_text(ids: &[&str], width: usize) -> String {
    let full = ids.join(" → ");
    if full.chars().count() <= width || ids.len() <= 2 {
        return fit(&full, width).trim_end().to_string();
    }
    // Keep as many nodes from each end as fit around the elision mark.
    let (mut head, mut tail) = (1, 1);
    let text = |head: usize, tail: usize| {
        let omitted = ids.len() - head - tail;
        format!(
            "{} → … {omitted} … → {}",
            ids[..head].join(" → "),
            ids[ids.len() - tail..].join(" → ")
        )
    };
    loop {
        let grown = if head <= tail {
            (head + 1, tail)
        } else {
            (head, tail + 1)
        };
        if grown.0 + grown.1 >= ids.len() || text(grown.0, grown.1).chars().count() > width {
            break;
        }
        (head, tail) = grown;
    }
    fit(&text(head, tail), width).trim_end().to_string()
}

#[cfg(test)]
mod text_tests {
    use super::*;

    #[test]
    fn wrapping_keeps_words_and_width() {
        assert_eq!(wrap("log of 0 is −inf", 8), ["log of 0", "is −inf"]);
        assert_eq!(wrap("abcdefghij", 4), ["abcd", "efgh", "ij"]);
        assert!(wrap("", 5).is_empty());
    }

    #[test]
    fn long_chains_keep_both_ends() {
        let ids = ["a", "b", "c", "d", "e", "f", "g"];
        assert_eq!(chain_text(&ids, 80), "a → b → c → d → e → f → g");
        let short = chain_text(&ids, 20);
        assert!(
            short.starts_with("a → ") && short.ends_with(" → g"),
            "{short}"
        );
        assert!(
            short.contains('…') && short.chars().count() <= 20,
            "{short}"
        );
    }
}

/// What pane tests share: an app over a trace, and a pane rendered alone
/// into a buffer, compared with `Buffer::with_lines` as ratatui's own widget
/// tests do.
#[cfg(test)]
pub(crate) mod tests {
    use super::{Pane, PaneId};
    use crate::trace::{TraceFile, validate};
    use crate::tui::app::App;
    use crate::tui::precision::Traces;
    use crate::tui::theme::Theme;
    use ratatui::buffer::Buffer;
    use ratatui::layout::Rect;
    use ratatui::style::Style;
    use std::sync::Arc;

    /// An app over one trace, its queued work done.
    pub struct Fixture {
        /// The app.
        pub app: App<'static>,
    }

    impl Fixture {
        /// The app over `file`, diagnosed and surveyed.
        pub fn new(file: TraceFile) -> Fixture {
            // A test's traces live as long as the test process.
            let traces: &'static Arc<Traces> = Box::leak(Box::new(Traces::new(
                validate(file).expect("a valid trace"),
            )));
            let mut app = App::new(traces, "test", vec![Theme::default_theme()]);
            app.work();
            Fixture { app }
        }

        /// `pane` drawn alone into a `width`×`height` buffer, as pane `id`.
        pub fn render(&self, pane: &dyn Pane, id: PaneId, width: u16, height: u16) -> Buffer {
            let mut buffer = Buffer::empty(Rect::new(0, 0, width, height));
            let mut ctx = self.app.ctx(id);
            ctx.rows = height as usize;
            pane.draw(&ctx, buffer.area, &mut buffer);
            buffer
        }

        /// The app's own pane `name`, drawn alone.
        pub fn render_own(&self, name: &str, width: u16, height: u16) -> Buffer {
            let id = PaneId::named(name).expect("a registered pane");
            self.render(self.app.pane(id), id, width, height)
        }
    }

    /// The buffer's text equals `lines` (styles are checked elsewhere).
    #[track_caller]
    pub fn assert_lines<'a>(buffer: &Buffer, lines: impl IntoIterator<Item = &'a str>) {
        let mut plain = buffer.clone();
        plain.set_style(plain.area, Style::reset());
        let expected = Buffer::with_lines(lines);
        if plain != expected {
            let shown: Vec<String> = (0..plain.area.height)
                .map(|y| {
                    (0..plain.area.width)
                        .map(|x| plain[(x, y)].symbol().to_string())
                        .collect()
                })
                .collect();
            panic!("the pane drew:\n{}", shown.join("\n"));
        }
    }
}
