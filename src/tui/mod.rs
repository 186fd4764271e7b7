//! The full-screen terminal view: the only part of Ebb that knows about
//! terminals. State and its one `update` live in [`App`]; keys become
//! [`Action`]s through one [`KeyMap`]; each pane is a module behind one
//! trait; drawing is `impl Widget for &App`.

mod action;
mod app;
mod checks;
mod diagnosis;
mod forward;
mod keyfile;
mod keymap;
mod layers;
mod layout;
mod neighbours;
mod panes;
mod precision;
mod prompt;
mod signals;
mod symbols;
mod tally;
mod terminal;
mod theme;
mod view;

pub use action::{Action, PaneId};
pub use app::{App, Overlay};
pub use diagnosis::{AUTO_NODES, Work};
pub use keyfile::KeyFileError;
pub use keymap::{Binding, Key, KeyMap, Scope};
pub use layout::{MIN_HEIGHT, MIN_WIDTH};
pub use precision::Retyped;
pub use symbols::flag_symbol;
pub use terminal::{ViewError, open, view};
pub use theme::{SHIPPED, Theme, ThemeError, no_color_requested};
