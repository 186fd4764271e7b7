//! Everything a user can ask of the view, as named actions: keys and mouse
//! events become these, and `App::update` is the only place that acts on
//! them. Panes are named by [`PaneId`], which the pane registry hands out.

use super::panes;

/// A pane, by the name its title shows. Only the registry in
/// `panes/mod.rs` makes them, so every `PaneId` names a registered pane.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct PaneId(&'static str);

impl PaneId {
    /// The id of the pane titled `name` (for the registry's entries).
    pub(super) const fn new(name: &'static str) -> PaneId {
        PaneId(name)
    }

    /// The pane's name as shown in its title, the help and README.
    pub fn name(self) -> &'static str {
        self.0
    }

    /// The registered pane with this name (any case), if any.
    pub fn named(name: &str) -> Option<PaneId> {
        panes::ids().find(|id| id.0.eq_ignore_ascii_case(name))
    }

    /// Every registered pane, in focus order.
    pub fn all() -> Vec<PaneId> {
        panes::ids().collect()
    }

    /// The pane's place in focus order, from 1 (its number key).
    pub fn number(self) -> usize {
        panes::ids()
            .position(|id| id == self)
            .expect("every PaneId is registered")
            + 1
    }

    /// The next pane in focus order (wrapping), or the previous one.
    pub fn cycle(self, forward: bool) -> PaneId {
        let all = PaneId::all();
        let at = self.number() - 1;
        let len = all.len();
        all[if forward {
            (at + 1) % len
        } else {
            (at + len - 1) % len
        }]
    }
}

/// A named action.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Action {
    /// Process the next node of the sweep.
    Step,
    /// Undo the last step exactly.
    Back,
    /// Step until a flag is raised or a step with a diagnosis finding is done.
    RunToFlag,
    /// Step to the end of the sweep.
    RunToEnd,
    /// Return to the start of the sweep.
    Restart,
    /// Select the node the next step processes, and keep following it.
    SelectCurrent,
    /// Open the prompt to jump to a node by id.
    OpenJump,
    /// Open the prompt to search by id, op or group.
    OpenSearch,
    /// Open the prompt to run the sweep until a condition holds.
    OpenWatch,
    /// Select the next match of the last search.
    SearchNext,
    /// Select the previous match of the last search.
    SearchPrevious,
    /// Move focus to the next pane.
    FocusNext,
    /// Move focus to the previous pane.
    FocusPrevious,
    /// Move focus to one pane.
    Focus(PaneId),
    /// Show the focused pane alone, or return to all panes.
    Zoom,
    /// Switch to the next theme.
    CycleTheme,
    /// Show or hide the list of keys.
    Help,
    /// Leave Ebb.
    Quit,
    /// Cancel the work under way, or close the prompt, the help or the zoom.
    Cancel,
    /// Move down one row in the focused pane.
    Down,
    /// Move up one row.
    Up,
    /// Move down one page.
    PageDown,
    /// Move up one page.
    PageUp,
    /// Go to the first row.
    Top,
    /// Go to the last row.
    Bottom,
    /// Open what the row names (what it does depends on the pane).
    Enter,
    /// Go back along the walk history.
    WalkBack,
    /// Prompt: type a character.
    Type(char),
    /// Prompt: delete the last character.
    Erase,
    /// Prompt: complete the id typed so far.
    Complete,
    /// Prompt: confirm.
    Submit,
    /// Mouse: a click on a row of a pane (0 = first row inside the border).
    Click(PaneId, u16),
    /// Mouse: scroll a pane by some rows (negative: up).
    Scroll(PaneId, i16),
    /// Run every verification check (again) and show the suspects.
    Verify,
    /// Switch between the reverse sweep and the tangent (forward-mode) sweep.
    ToggleForward,
    /// Forward mode: switch the direction between the selected leaf and a seeded random one.
    CycleDirection,
    /// Run the diagnosis now (or repeat what it found).
    Diagnose,
    /// Sweep in the next dtype: the recorded one, then f16, bf16, f32, f64.
    CyclePrecision,
    /// Select the origin of the selected node's non-finite adjoint, else the first origin.
    JumpToOrigin,
    /// Paths: select the next parameter with a dominant path.
    NextParameter,
    /// Paths: select the previous parameter with a dominant path.
    PreviousParameter,
}

/// Every action a key file may bind except focusing one pane (those are
/// `focus_` and the pane's name, see [`bindable`]), under the name it uses there.
const NAMED: &[(&str, Action)] = &[
    ("step", Action::Step),
    ("back", Action::Back),
    ("run_to_flag", Action::RunToFlag),
    ("run_to_end", Action::RunToEnd),
    ("restart", Action::Restart),
    ("select_current", Action::SelectCurrent),
    ("open_jump", Action::OpenJump),
    ("open_search", Action::OpenSearch),
    ("open_watch", Action::OpenWatch),
    ("search_next", Action::SearchNext),
    ("search_previous", Action::SearchPrevious),
    ("focus_next", Action::FocusNext),
    ("focus_previous", Action::FocusPrevious),
    ("zoom", Action::Zoom),
    ("cycle_theme", Action::CycleTheme),
    ("help", Action::Help),
    ("quit", Action::Quit),
    ("cancel", Action::Cancel),
    ("down", Action::Down),
    ("up", Action::Up),
    ("page_down", Action::PageDown),
    ("page_up", Action::PageUp),
    ("top", Action::Top),
    ("bottom", Action::Bottom),
    ("enter", Action::Enter),
    ("walk_back", Action::WalkBack),
    ("erase", Action::Erase),
    ("complete", Action::Complete),
    ("submit", Action::Submit),
    ("verify", Action::Verify),
    ("toggle_forward", Action::ToggleForward),
    ("cycle_direction", Action::CycleDirection),
    ("diagnose", Action::Diagnose),
    ("cycle_precision", Action::CyclePrecision),
    ("jump_to_origin", Action::JumpToOrigin),
    ("next_parameter", Action::NextParameter),
    ("previous_parameter", Action::PreviousParameter),
];

/// Every action a key file may bind, under the name it uses there: the named
/// ones, then `focus_order`, `focus_node`, … for each registered pane.
pub fn bindable() -> Vec<(String, Action)> {
    let mut all: Vec<(String, Action)> = NAMED
        .iter()
        .map(|(name, action)| (name.to_string(), *action))
        .collect();
    all.extend(PaneId::all().into_iter().map(|pane| {
        (
            format!("focus_{}", pane.name().to_lowercase()),
            Action::Focus(pane),
        )
    }));
    all
}

impl Action {
    /// The name a key file uses for this action (`None` for typed
    /// characters and mouse events, which no key file binds).
    pub fn name(self) -> Option<String> {
        match self {
            Action::Focus(pane) => Some(format!("focus_{}", pane.name().to_lowercase())),
            _ => NAMED
                .iter()
                .find(|(_, action)| *action == self)
                .map(|(name, _)| name.to_string()),
        }
    }

    /// The action a key file or a `{key:NAME}` placeholder names.
    pub fn named(name: &str) -> Option<Action> {
        bindable()
            .into_iter()
            .find(|(listed, _)| listed == name)
            .map(|(_, action)| action)
    }

    /// What the action does wherever no pane gives it a meaning of its own,
    /// for the help and the status line.
    pub fn describe(self) -> &'static str {
        match self {
            Action::Step => "step: process the next node",
            Action::Back => "step back (exact undo)",
            Action::RunToFlag => "run to the next flag or diagnosis finding",
            Action::RunToEnd => "run to the end of the sweep",
            Action::Restart => "restart the sweep",
            Action::SelectCurrent => "select the current node and follow the sweep",
            Action::OpenJump => "jump to a node by id (the prompt completes ids)",
            Action::OpenSearch => "search by id, op or group",
            Action::OpenWatch => "watch: run the sweep until a condition holds",
            Action::SearchNext => "next search match",
            Action::SearchPrevious => "previous search match",
            Action::FocusNext => "focus the next pane",
            Action::FocusPrevious => "focus the previous pane",
            Action::Focus(_) => "focus a pane by number",
            Action::Zoom => "zoom the focused pane / unzoom",
            Action::CycleTheme => "next theme",
            Action::Help => "show / hide this help",
            Action::Quit => "quit",
            Action::Cancel => "cancel the work under way; close prompt, help or zoom",
            Action::Down => "down one row",
            Action::Up => "up one row",
            Action::PageDown => "down one page",
            Action::PageUp => "up one page",
            Action::Top => "first row",
            Action::Bottom => "last row",
            Action::Enter => "open the row",
            Action::WalkBack => "walk back to the node selected before",
            Action::Type(_) => "type",
            Action::Erase => "delete a character",
            Action::Complete => "complete the node id",
            Action::Submit => "confirm",
            Action::Click(..) => "select a row",
            Action::Scroll(..) => "scroll",
            Action::Verify => "verify: run every check and list the suspects",
            Action::ToggleForward => {
                "switch between the reverse sweep and forward mode (tangent sweep)"
            }
            Action::CycleDirection => {
                "forward mode: direction along the selected leaf / seeded random"
            }
            Action::Diagnose => "diagnose the sweep (on open for small traces)",
            Action::CyclePrecision => "sweep in the next dtype (recorded, f16, bf16, f32, f64)",
            Action::JumpToOrigin => "jump to the origin of a non-finite adjoint",
            Action::NextParameter => "next parameter's dominant path",
            Action::PreviousParameter => "previous parameter's dominant path",
        }
    }

    /// A few words for the status-line hints, where no pane gives its own.
    pub fn hint(self) -> &'static str {
        match self {
            Action::Step => "step",
            Action::Back => "back",
            Action::RunToFlag => "to flag",
            Action::RunToEnd => "to end",
            Action::Restart => "restart",
            Action::SelectCurrent => "current",
            Action::OpenJump => "jump",
            Action::OpenSearch => "search",
            Action::OpenWatch => "watch",
            Action::SearchNext => "next match",
            Action::SearchPrevious => "prev match",
            Action::FocusNext => "pane",
            Action::FocusPrevious => "prev pane",
            Action::Focus(_) => "pane n",
            Action::Zoom => "zoom",
            Action::CycleTheme => "theme",
            Action::Help => "help",
            Action::Quit => "quit",
            Action::Cancel => "cancel",
            Action::Down | Action::Up => "move",
            Action::PageDown | Action::PageUp => "page",
            Action::Top | Action::Bottom => "ends",
            Action::Enter => "open",
            Action::WalkBack => "walk back",
            Action::Type(_) => "type",
            Action::Erase => "erase",
            Action::Complete => "complete",
            Action::Submit => "go",
            Action::Click(..) => "select",
            Action::Scroll(..) => "scroll",
            Action::Verify => "verify",
            Action::ToggleForward => "forward mode",
            Action::CycleDirection => "direction",
            Action::Diagnose => "diagnose",
            Action::CyclePrecision => "dtype",
            Action::JumpToOrigin => "origin",
            Action::NextParameter => "next param",
            Action::PreviousParameter => "prev param",
        }
    }
}
