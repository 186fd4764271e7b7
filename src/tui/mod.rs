//! The full-screen terminal view: the only part of Ebb that knows about
//! terminals. A [`Session`] holds what is looked at (trace, sweeps,
//! results, selection) and knows no keys or screen areas; each pane owns its
//! cursor and scroll behind one small trait and sends messages to the one
//! queue the [`App`] drains; keys become [`Action`]s through one
//! [`KeyMap`]; long work runs on worker threads; drawing is
//! `impl Widget for &App`, a pure function of that state.

mod action;
mod app;
mod checks;
mod diagnosis;
mod forward;
mod graph;
mod ids;
mod keyfile;
mod keymap;
mod layout;
mod message;
mod neighbours;
mod panes;
mod precision;
mod prompt;
mod session;
mod signals;
mod symbols;
mod tally;
mod teach;
mod terminal;
mod theme;
mod view;
mod watch;
mod work;

pub use action::{Action, PaneId, bindable};
pub use app::{App, Overlay};
pub use diagnosis::AUTO_NODES;
pub use ids::{NodeIx, StepIx};
pub use keyfile::KeyFileError;
pub use keymap::{Binding, Key, KeyMap, Scope};
pub use layout::{LayoutState, MIN_HEIGHT, MIN_WIDTH, Slot};
pub use message::Msg;
pub use panes::{Ctx, Pane, Spec, specs};
pub use precision::Traces;
pub use session::Session;
pub use symbols::flag_symbol;
pub use terminal::{ViewError, open, view};
pub use theme::{SHIPPED, Theme, ThemeError, no_color_requested};
pub use view::mode_hints;
pub use watch::{Condition, SYNTAX as WATCH_SYNTAX};
pub use work::{Finished, Job, Outcome, Task};
