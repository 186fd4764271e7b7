//! The panes: one module each, all behind the small [`Pane`] trait. A pane
//! draws from the app's state and never changes it while drawing; moving a
//! cursor or opening a row goes through `App::update`, which calls the
//! focused pane's `move_cursor`, `enter` or `click`.

mod edges;
mod flags;
mod inflow;
mod node;
mod order;
mod order_forward;
mod paths;
mod trend;
mod verify;

pub use paths::shown_param as paths_param;

use super::action::PaneId;
use super::app::App;
use crate::format::{compact, number};
use crate::tensor::Value;
use ratatui::buffer::Buffer;
use ratatui::layout::Rect;

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

/// One pane.
pub trait Pane {
    /// Which pane this is.
    fn id(&self) -> PaneId;
    /// What follows the pane's name in its title (counts, the node shown).
    fn title_detail(&self, _app: &App) -> String {
        String::new()
    }
    /// Draws the pane's content inside its border.
    fn draw(&self, app: &App, area: Rect, buf: &mut Buffer);
    /// Moves the pane's cursor or scroll position.
    fn move_cursor(&self, _app: &mut App, _motion: Move) {}
    /// Opens the highlighted row (Enter).
    fn enter(&self, _app: &mut App) {}
    /// A mouse click on row `row` inside the border.
    fn click(&self, _app: &mut App, _row: usize) {}
}

/// The pane with a given id.
pub fn pane(id: PaneId) -> &'static dyn Pane {
    match id {
        PaneId::Order => &order::OrderPane,
        PaneId::Node => &node::NodePane,
        PaneId::Inflow => &inflow::InflowPane,
        PaneId::Edges => &edges::EdgesPane,
        PaneId::Trend => &trend::TrendPane,
        PaneId::Flags => &flags::FlagsPane,
        PaneId::Verify => &verify::VerifyPane,
        PaneId::Paths => &paths::PathsPane,
    }
}

/// A value in at most `width` columns: exact when it fits, else six
/// significant digits; tensors by shape and norm.
pub fn value_text(value: &Value, width: usize) -> String {
    match value {
        Value::Scalar(x) => fit_number(*x, width),
        Value::Tensor(t) => format!(
            "{} ‖·‖ {}",
            crate::format::shape(t.shape()),
            compact(value.l2_norm())
        ),
    }
}

/// A number exactly when it fits in `width` columns, else in short form.
pub fn fit_number(x: f64, width: usize) -> String {
    let exact = number(x);
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
mod tests {
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
