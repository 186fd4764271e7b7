//! Opening the terminal view in tests, as `ebb open` does: an app over a
//! trace, with the work queued on open (diagnosis, forward-value survey)
//! done, and short ways to select nodes and name panes.

use ebb::trace::Trace;
use ebb::tui::{App, Msg, NodeIx, PaneId, Theme, Traces};
use std::sync::Arc;

/// The view over `trace` with `themes`, its queued work done.
pub fn open_with(trace: &Trace, themes: Vec<Theme>) -> App<'static> {
    // A test's traces live as long as the test process.
    let traces: &'static Arc<Traces> = Box::leak(Box::new(Traces::new(trace.clone())));
    let mut app = App::new(traces, "test", themes);
    app.work();
    app
}

/// The view over `trace` in the default and light themes, its queued work done.
pub fn open(trace: &Trace) -> App<'static> {
    open_with(
        trace,
        vec![Theme::default_theme(), Theme::shipped("light").unwrap()],
    )
}

/// The registered pane `name`.
pub fn pane(name: &str) -> PaneId {
    PaneId::named(name).unwrap_or_else(|| panic!("no pane is named {name}"))
}

/// Selects `node`, as a click in Order does.
pub fn select(app: &mut App, node: usize) {
    app.apply(Msg::Select(NodeIx::new(node)));
}

/// Jumps to `node`, as the jump prompt does (onto the walk history).
pub fn jump(app: &mut App, node: usize) {
    app.apply(Msg::Jump(NodeIx::new(node)));
}

/// The selected node.
pub fn selected(app: &App) -> usize {
    app.session().selected().index()
}
