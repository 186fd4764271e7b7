//! Where each pane goes: a pure function of the layout state alone (the
//! terminal's size, the focus, the zoom, which pane is in front in a shared
//! slot) and of the registry's slots, used both to draw and to find what a
//! mouse click hit.

use super::action::PaneId;
use super::panes;
use ratatui::layout::{Constraint, Layout, Position, Rect};

/// Smallest terminal the panes fit in.
pub const MIN_WIDTH: u16 = 80;
/// Smallest terminal height the panes fit in.
pub const MIN_HEIGHT: u16 = 24;
/// From this width on, all six slots are shown at once.
pub const WIDE: u16 = 120;

/// A place in the wide layout. Panes of one slot take turns in it; in the
/// narrow layout every pane outside the sweep, detail and flags slots shares one.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Slot {
    /// Left, top: the sweep order.
    Sweep,
    /// Left, bottom.
    Flags,
    /// Middle, top: the selected node.
    Detail,
    /// Middle, bottom.
    Below,
    /// Right, top.
    Side,
    /// Right, bottom.
    Corner,
}

impl Slot {
    /// Whether panes in this slot share the narrow layout's one spare slot.
    pub fn shared_when_narrow(self) -> bool {
        matches!(self, Slot::Below | Slot::Side | Slot::Corner)
    }
}

/// Everything the layout reads.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct LayoutState {
    /// The terminal's size at the last draw.
    pub area: Rect,
    /// The focused pane.
    pub focus: PaneId,
    /// Whether the focused pane fills the screen.
    pub zoomed: bool,
    /// The pane in front in each slot several panes share, in the wide layout.
    pub front: Vec<(Slot, PaneId)>,
    /// The pane in front in the narrow layout's shared slot.
    pub narrow_front: PaneId,
}

impl LayoutState {
    /// An 80×24 screen, the first pane focused, each slot's first pane in front.
    pub fn new() -> LayoutState {
        let first = PaneId::all()[0];
        let mut state = LayoutState {
            area: Rect::new(0, 0, MIN_WIDTH, MIN_HEIGHT),
            focus: first,
            zoomed: false,
            front: Vec::new(),
            narrow_front: first,
        };
        for spec in panes::specs().iter().rev() {
            state.bring_forward(spec.id);
        }
        state.focus = first;
        state
    }

    /// Focuses `pane`, bringing it to the front of its slot.
    pub fn focus(&mut self, pane: PaneId) {
        self.focus = pane;
        self.bring_forward(pane);
    }

    fn bring_forward(&mut self, pane: PaneId) {
        let slot = panes::spec(pane).slot;
        self.front.retain(|&(held, _)| held != slot);
        self.front.push((slot, pane));
        if slot.shared_when_narrow() {
            self.narrow_front = pane;
        }
    }

    /// The pane in front in `slot`.
    fn in_front(&self, slot: Slot) -> PaneId {
        self.front
            .iter()
            .find(|(held, _)| *held == slot)
            .map(|&(_, pane)| pane)
            .expect("every slot with a pane has one in front")
    }

    /// Whether the narrow layout is in use.
    pub fn narrow(&self) -> bool {
        self.area.width < WIDE && !self.zoomed
    }
}

impl Default for LayoutState {
    fn default() -> LayoutState {
        LayoutState::new()
    }
}

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

/// The panes taking turns in `pane`'s place, named as tabs in its title
/// (empty when the place is the pane's alone).
pub fn tabs(state: &LayoutState, pane: PaneId) -> Vec<PaneId> {
    if state.zoomed {
        return Vec::new();
    }
    let slot = panes::spec(pane).slot;
    let sharing: Vec<PaneId> = if state.narrow() {
        if !slot.shared_when_narrow() {
            return Vec::new();
        }
        panes::specs()
            .iter()
            .filter(|spec| spec.slot.shared_when_narrow())
            .map(|spec| spec.id)
            .collect()
    } else {
        panes::specs()
            .iter()
            .filter(|spec| spec.slot == slot)
            .map(|spec| spec.id)
            .collect()
    };
    if sharing.len() > 1 {
        sharing
    } else {
        Vec::new()
    }
}

/// The arrangement for a layout state.
pub fn arrange(state: &LayoutState) -> Screen {
    let area = state.area;
    if area.width < MIN_WIDTH || area.height < MIN_HEIGHT {
        return Screen::TooSmall;
    }
    let [body, status] = area.layout(&Layout::vertical([
        Constraint::Fill(1),
        Constraint::Length(1),
    ]));
    if state.zoomed {
        return Screen::Panes {
            panes: vec![(state.focus, body)],
            status,
        };
    }
    let panes = if area.width >= WIDE {
        let [left, middle, right] = body.layout(&Layout::horizontal([
            Constraint::Percentage(32),
            Constraint::Percentage(38),
            Constraint::Percentage(30),
        ]));
        let [sweep, flags] = left.layout(&Layout::vertical([
            Constraint::Percentage(72),
            Constraint::Percentage(28),
        ]));
        let [detail, below] = middle.layout(&Layout::vertical([
            Constraint::Percentage(55),
            Constraint::Percentage(45),
        ]));
        let [side, corner] = right.layout(&Layout::vertical([
            Constraint::Percentage(60),
            Constraint::Percentage(40),
        ]));
        [
            (Slot::Sweep, sweep),
            (Slot::Detail, detail),
            (Slot::Below, below),
            (Slot::Side, side),
            (Slot::Corner, corner),
            (Slot::Flags, flags),
        ]
        .into_iter()
        .map(|(slot, area)| (state.in_front(slot), area))
        .collect()
    } else {
        let [left, right] = body.layout(&Layout::horizontal([
            Constraint::Percentage(48),
            Constraint::Percentage(52),
        ]));
        let [sweep, flags] = left.layout(&Layout::vertical([
            Constraint::Percentage(68),
            Constraint::Percentage(32),
        ]));
        let [detail, shared] = right.layout(&Layout::vertical([
            Constraint::Percentage(50),
            Constraint::Percentage(50),
        ]));
        vec![
            (state.in_front(Slot::Sweep), sweep),
            (state.in_front(Slot::Detail), detail),
            (state.narrow_front, shared),
            (state.in_front(Slot::Flags), flags),
        ]
    };
    Screen::Panes { panes, status }
}

/// The area of `pane` in the arrangement, if shown.
pub fn pane_area(state: &LayoutState, pane: PaneId) -> Option<Rect> {
    match arrange(state) {
        Screen::Panes { panes, .. } => panes
            .into_iter()
            .find(|&(shown, _)| shown == pane)
            .map(|(_, area)| area),
        Screen::TooSmall => None,
    }
}

/// The pane under a terminal cell and the row inside its border (0 = first
/// row inside), if any.
pub fn hit(state: &LayoutState, column: u16, row: u16) -> Option<(PaneId, u16)> {
    let Screen::Panes { panes, .. } = arrange(state) else {
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

    fn pane(name: &str) -> PaneId {
        PaneId::named(name).unwrap()
    }

    fn shown(state: &LayoutState) -> Vec<&'static str> {
        match arrange(state) {
            Screen::Panes { panes, .. } => panes.iter().map(|(pane, _)| pane.name()).collect(),
            Screen::TooSmall => Vec::new(),
        }
    }

    #[test]
    fn narrow_terminals_share_one_slot_and_small_ones_get_none() {
        let mut state = LayoutState::new();
        state.area = Rect::new(0, 0, 79, 24);
        assert_eq!(arrange(&state), Screen::TooSmall);
        state.area = Rect::new(0, 0, 80, 23);
        assert_eq!(arrange(&state), Screen::TooSmall);
        state.area = Rect::new(0, 0, 80, 24);
        state.focus(pane("Edges"));
        state.focus(pane("Order"));
        assert_eq!(shown(&state), ["Order", "Node", "Edges", "Flags"]);
        let Screen::Panes { status, .. } = arrange(&state) else {
            panic!()
        };
        assert_eq!(status, Rect::new(0, 23, 80, 1));
        state.area = Rect::new(0, 0, 200, 50);
        let Screen::Panes { panes, .. } = arrange(&state) else {
            panic!()
        };
        assert_eq!(panes.len(), 6);
        // Panes tile the body without overlapping.
        let cells: u32 = panes.iter().map(|(_, area)| area.area()).sum();
        assert_eq!(cells, 200 * 49);
        state.focus(pane("Trend"));
        state.zoomed = true;
        assert_eq!(
            arrange(&state),
            Screen::Panes {
                panes: vec![(pane("Trend"), Rect::new(0, 0, 200, 49))],
                status: Rect::new(0, 49, 200, 1)
            }
        );
        // Verify takes Trend's place in the wide layout, and the shared slot in the narrow one.
        state.zoomed = false;
        state.focus(pane("Verify"));
        let wide = shown(&state);
        assert!(wide.contains(&"Verify") && !wide.contains(&"Trend") && wide.len() == 6);
        state.area = Rect::new(0, 0, 80, 24);
        assert_eq!(shown(&state)[2], "Verify");
        assert_eq!(
            tabs(&state, pane("Verify")).len(),
            5,
            "Inflow, Edges, Trend, Verify and Paths share it"
        );
        state.area = Rect::new(0, 0, 200, 50);
        assert_eq!(tabs(&state, pane("Verify")).len(), 3);
        assert!(tabs(&state, pane("Order")).is_empty());
    }
}
