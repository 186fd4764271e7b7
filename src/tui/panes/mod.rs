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
mod trend;
mod verify;

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
    }
}

/// A value in at most `width` columns: exact when it fits, else six
/// significant digits; tensors by shape and norm.
pub fn value_text(value: &Value, width: usize) -> String {
    match value {
        Value::Scalar(x) => fit_number(*x, width),
        Value::Tensor(t) => format!("{} ‖·‖ {}", crate::format::shape(t.shape()), compact(value.l2_norm())),
    }
}

/// A number exactly when it fits in `width` columns, else in short form.
pub fn fit_number(x: f64, width: usize) -> String {
    let exact = number(x);
    if exact.chars().count() <= width { exact } else { compact(x) }
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
