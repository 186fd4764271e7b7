//! Where each pane goes: a pure function of the terminal size and the
//! focus/zoom state, used both to draw and to find what a mouse click hit.

use super::action::PaneId;
use super::app::App;
use ratatui::layout::{Constraint, Layout, Position, Rect};

/// Smallest terminal the panes fit in.
pub const MIN_WIDTH: u16 = 80;
/// Smallest terminal height the panes fit in.
pub const MIN_HEIGHT: u16 = 24;
/// From this width on, all six slots are shown at once.
pub const WIDE: u16 = 120;

/// The arrangement of one frame.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Screen {
    /// The terminal is below the minimum size.
    TooSmall,
    /// Panes with their areas (borders included) and the status line.
    Panes {
        /// Each shown pane and its area.
        panes: Vec<(PaneId, Rect)>,
        /// The status line.
        status: Rect,
    },
}

/// True for the panes that share one slot in the narrow layout.
pub fn shares_slot(pane: PaneId) -> bool {
    matches!(
        pane,
        PaneId::Inflow | PaneId::Edges | PaneId::Trend | PaneId::Verify | PaneId::Paths
    )
}

/// True for the panes that take turns in the Trend slot of the wide layout.
pub fn takes_corner(pane: PaneId) -> bool {
    matches!(pane, PaneId::Trend | PaneId::Verify | PaneId::Paths)
}

/// The panes taking turns in `pane`'s slot, named as tabs in its title
/// (empty when the slot is the pane's alone).
pub fn slot_tabs(pane: PaneId, narrow: bool) -> &'static [PaneId] {
    const NARROW: [PaneId; 5] = [
        PaneId::Inflow,
        PaneId::Edges,
        PaneId::Trend,
        PaneId::Verify,
        PaneId::Paths,
    ];
    const CORNER: [PaneId; 3] = [PaneId::Trend, PaneId::Verify, PaneId::Paths];
    match (narrow, shares_slot(pane), takes_corner(pane)) {
        (true, true, _) => &NARROW,
        (false, _, true) => &CORNER,
        _ => &[],
    }
}

/// The arrangement for `app`'s terminal size and state.
pub fn screen(app: &App) -> Screen {
    arrange(app.area, app.focus, app.side, app.corner, app.zoomed)
}

/// The arrangement of an `area` with `focus` focused, `side` in the shared
/// slot of the narrow layout, `corner` in the Trend slot of the wide one, the
/// focused pane alone when `zoomed`.
pub fn arrange(area: Rect, focus: PaneId, side: PaneId, corner: PaneId, zoomed: bool) -> Screen {
    if area.width < MIN_WIDTH || area.height < MIN_HEIGHT {
        return Screen::TooSmall;
    }
    let [body, status] = area.layout(&Layout::vertical([
        Constraint::Fill(1),
        Constraint::Length(1),
    ]));
    if zoomed {
        return Screen::Panes {
            panes: vec![(focus, body)],
            status,
        };
    }
    let panes = if area.width >= WIDE {
        let [left, middle, right] = body.layout(&Layout::horizontal([
            Constraint::Percentage(32),
            Constraint::Percentage(38),
            Constraint::Percentage(30),
        ]));
        let [order, flags] = left.layout(&Layout::vertical([
            Constraint::Percentage(72),
            Constraint::Percentage(28),
        ]));
        let [node, inflow] = middle.layout(&Layout::vertical([
            Constraint::Percentage(55),
            Constraint::Percentage(45),
        ]));
        let [edges, trend] = right.layout(&Layout::vertical([
            Constraint::Percentage(60),
            Constraint::Percentage(40),
        ]));
        vec![
            (PaneId::Order, order),
            (PaneId::Node, node),
            (PaneId::Inflow, inflow),
            (PaneId::Edges, edges),
            (corner, trend),
            (PaneId::Flags, flags),
        ]
    } else {
        let [left, right] = body.layout(&Layout::horizontal([
            Constraint::Percentage(48),
            Constraint::Percentage(52),
        ]));
        let [order, flags] = left.layout(&Layout::vertical([
            Constraint::Percentage(68),
            Constraint::Percentage(32),
        ]));
        let [node, slot] = right.layout(&Layout::vertical([
            Constraint::Percentage(50),
            Constraint::Percentage(50),
        ]));
        vec![
            (PaneId::Order, order),
            (PaneId::Node, node),
            (side, slot),
            (PaneId::Flags, flags),
        ]
    };
    Screen::Panes { panes, status }
}

/// The area of `pane` in `app`'s current arrangement, if shown.
pub fn pane_area(app: &App, pane: PaneId) -> Option<Rect> {
    match screen(app) {
        Screen::Panes { panes, .. } => panes
            .into_iter()
            .find(|&(shown, _)| shown == pane)
            .map(|(_, area)| area),
        Screen::TooSmall => None,
    }
}

/// The pane under a terminal cell and the row inside its border (0 = first
/// row inside), if any.
pub fn hit(app: &App, column: u16, row: u16) -> Option<(PaneId, u16)> {
    let Screen::Panes { panes, .. } = screen(app) else {
        return None;
    };
    let (pane, area) = panes
        .into_iter()
        .find(|(_, area)| area.contains(Position::new(column, row)))?;
    Some((pane, row.saturating_sub(area.y + 1)))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn narrow_terminals_share_one_slot_and_small_ones_get_none() {
        assert_eq!(
            arrange(
                Rect::new(0, 0, 79, 24),
                PaneId::Order,
                PaneId::Inflow,
                PaneId::Trend,
                false
            ),
            Screen::TooSmall
        );
        assert_eq!(
            arrange(
                Rect::new(0, 0, 80, 23),
                PaneId::Order,
                PaneId::Inflow,
                PaneId::Trend,
                false
            ),
            Screen::TooSmall
        );
        let Screen::Panes { panes, status } = arrange(
            Rect::new(0, 0, 80, 24),
            PaneId::Order,
            PaneId::Edges,
            PaneId::Trend,
            false,
        ) else {
            panic!()
        };
        let shown: Vec<PaneId> = panes.iter().map(|(pane, _)| *pane).collect();
        assert_eq!(
            shown,
            [PaneId::Order, PaneId::Node, PaneId::Edges, PaneId::Flags]
        );
        assert_eq!(status, Rect::new(0, 23, 80, 1));
        let Screen::Panes { panes, .. } = arrange(
            Rect::new(0, 0, 200, 50),
            PaneId::Trend,
            PaneId::Inflow,
            PaneId::Trend,
            false,
        ) else {
            panic!()
        };
        assert_eq!(panes.len(), 6);
        // Panes tile the body without overlapping.
        let cells: u32 = panes.iter().map(|(_, area)| area.area()).sum();
        assert_eq!(cells, 200 * 49);
        let Screen::Panes { panes, .. } = arrange(
            Rect::new(0, 0, 200, 50),
            PaneId::Trend,
            PaneId::Inflow,
            PaneId::Trend,
            true,
        ) else {
            panic!()
        };
        assert_eq!(panes, [(PaneId::Trend, Rect::new(0, 0, 200, 49))]);
        // Verify takes Trend's place in the wide layout, and joins the shared slot in the narrow one.
        let Screen::Panes { panes, .. } = arrange(
            Rect::new(0, 0, 200, 50),
            PaneId::Verify,
            PaneId::Inflow,
            PaneId::Verify,
            false,
        ) else {
            panic!()
        };
        let shown: Vec<PaneId> = panes.iter().map(|(pane, _)| *pane).collect();
        assert!(
            shown.contains(&PaneId::Verify) && !shown.contains(&PaneId::Trend) && shown.len() == 6
        );
        let Screen::Panes { panes, .. } = arrange(
            Rect::new(0, 0, 80, 24),
            PaneId::Verify,
            PaneId::Verify,
            PaneId::Trend,
            false,
        ) else {
            panic!()
        };
        assert_eq!(panes[2].0, PaneId::Verify);
        // So does Paths.
        let Screen::Panes { panes, .. } = arrange(
            Rect::new(0, 0, 200, 50),
            PaneId::Paths,
            PaneId::Inflow,
            PaneId::Paths,
            false,
        ) else {
            panic!()
        };
        assert!(panes.iter().any(|(pane, _)| *pane == PaneId::Paths) && panes.len() == 6);
    }
}
