//! Everything a user can ask of the view, as named actions: keys and mouse
//! events become these, and `App::update` is the only place that acts on them.

/// The panes, which are also what can hold focus.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum PaneId {
    /// The sweep order: every node that reaches the output.
    Order,
    /// The selected node: op, value, summary, partials, adjoint.
    Node,
    /// The contributions the selected node has received and those still to come.
    Inflow,
    /// The selected node's inputs and consumers, and a drawing of small graphs.
    Edges,
    /// log10 of the adjoint norm along the sweep and per group.
    Trend,
    /// The flags raised so far.
    Flags,
    /// The suspects of `ebb verify`, and recorded against recomputed partials.
    Verify,
    /// The dominant path to a parameter, hop by hop, and the adjoint norm per group.
    Paths,
}

impl PaneId {
    /// Every pane in focus order.
    pub const ALL: [PaneId; 8] = [
        PaneId::Order,
        PaneId::Node,
        PaneId::Inflow,
        PaneId::Edges,
        PaneId::Trend,
        PaneId::Flags,
        PaneId::Verify,
        PaneId::Paths,
    ];

    /// The pane's name as shown in its title, the help and README.
    pub fn name(self) -> &'static str {
        match self {
            PaneId::Order => "Order",
            PaneId::Node => "Node",
            PaneId::Inflow => "Inflow",
            PaneId::Edges => "Edges",
            PaneId::Trend => "Trend",
            PaneId::Flags => "Flags",
            PaneId::Verify => "Verify",
            PaneId::Paths => "Paths",
        }
    }

    /// The next pane in focus order (wrapping), or the previous one.
    pub fn cycle(self, forward: bool) -> PaneId {
        let at = PaneId::ALL
            .iter()
            .position(|&pane| pane == self)
            .expect("every pane is listed");
        let len = PaneId::ALL.len();
        PaneId::ALL[if forward {
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
    /// Step until a new flag is raised.
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
    /// Close the prompt, the help or the zoom.
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
    /// Open what the row names: follow an edge, jump to a flag, select a node.
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

/// Every action a key file may bind, under the name it uses there.
pub const BINDABLE: &[(&str, Action)] = &[
    ("step", Action::Step),
    ("back", Action::Back),
    ("run_to_flag", Action::RunToFlag),
    ("run_to_end", Action::RunToEnd),
    ("restart", Action::Restart),
    ("select_current", Action::SelectCurrent),
    ("open_jump", Action::OpenJump),
    ("open_search", Action::OpenSearch),
    ("search_next", Action::SearchNext),
    ("search_previous", Action::SearchPrevious),
    ("focus_next", Action::FocusNext),
    ("focus_previous", Action::FocusPrevious),
    ("focus_order", Action::Focus(PaneId::Order)),
    ("focus_node", Action::Focus(PaneId::Node)),
    ("focus_inflow", Action::Focus(PaneId::Inflow)),
    ("focus_edges", Action::Focus(PaneId::Edges)),
    ("focus_trend", Action::Focus(PaneId::Trend)),
    ("focus_flags", Action::Focus(PaneId::Flags)),
    ("focus_verify", Action::Focus(PaneId::Verify)),
    ("focus_paths", Action::Focus(PaneId::Paths)),
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

impl Action {
    /// The name a key file uses for this action (`None` for typed
    /// characters and mouse events, which no key file binds).
    pub fn name(self) -> Option<&'static str> {
        BINDABLE
            .iter()
            .find(|(_, action)| *action == self)
            .map(|(name, _)| *name)
    }

    /// What the action does, for the help overlay.
    pub fn describe(self) -> &'static str {
        match self {
            Action::Step => "step: process the next node",
            Action::Back => "step back (exact undo)",
            Action::RunToFlag => "run to the next flag",
            Action::RunToEnd => "run to the end of the sweep",
            Action::Restart => "restart the sweep",
            Action::SelectCurrent => "select the current node and follow the sweep",
            Action::OpenJump => "jump to a node by id (Tab completes)",
            Action::OpenSearch => "search by id, op or group",
            Action::SearchNext => "next search match",
            Action::SearchPrevious => "previous search match",
            Action::FocusNext => "focus the next pane",
            Action::FocusPrevious => "focus the previous pane",
            Action::Focus(_) => "focus a pane by number",
            Action::Zoom => "zoom the focused pane / unzoom",
            Action::CycleTheme => "next theme",
            Action::Help => "show / hide this help",
            Action::Quit => "quit",
            Action::Cancel => "close prompt, help or zoom",
            Action::Down => "down one row",
            Action::Up => "up one row",
            Action::PageDown => "down one page",
            Action::PageUp => "up one page",
            Action::Top => "first row",
            Action::Bottom => "last row",
            Action::Enter => "open the row: follow edge / jump to flag",
            Action::WalkBack => "walk back to the previous node",
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

    /// A one-word name for the status-line hints.
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
            Action::SearchNext => "next match",
            Action::SearchPrevious => "prev match",
            Action::FocusNext => "pane",
            Action::FocusPrevious => "prev pane",
            Action::Focus(_) => "pane n",
            Action::Zoom => "zoom",
            Action::CycleTheme => "theme",
            Action::Help => "help",
            Action::Quit => "quit",
            Action::Cancel => "close",
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
