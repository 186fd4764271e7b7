//! The key map: the one place where keys become actions. The help overlay
//! and the status-line hints are generated from it, so they never go stale.

use super::action::{Action, PaneId};
use ratatui::crossterm::event::{KeyCode, KeyEvent, KeyModifiers};

/// Where a binding applies.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Scope {
    /// Everywhere, unless a narrower scope binds the same key.
    Global,
    /// Only while this pane has focus.
    Pane(PaneId),
    /// While the jump or search prompt is open.
    Prompt,
}

impl Scope {
    /// Every scope under the name a key file uses for it.
    pub fn named() -> Vec<(String, Scope)> {
        let mut scopes = vec![
            ("global".to_string(), Scope::Global),
            ("prompt".to_string(), Scope::Prompt),
        ];
        scopes.extend(
            PaneId::ALL
                .iter()
                .map(|&pane| (pane.name().to_lowercase(), Scope::Pane(pane))),
        );
        scopes
    }

    /// The name a key file uses for this scope.
    pub fn name(self) -> String {
        match self {
            Scope::Global => "global".to_string(),
            Scope::Prompt => "prompt".to_string(),
            Scope::Pane(pane) => pane.name().to_lowercase(),
        }
    }

    /// A heading for the help overlay.
    pub fn heading(self) -> String {
        match self {
            Scope::Global => "Everywhere".to_string(),
            Scope::Pane(pane) => format!("In {}", pane.name()),
            Scope::Prompt => "In the prompt".to_string(),
        }
    }
}

/// A key with its modifiers (Shift is implied by an upper-case character).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Key {
    /// The key.
    pub code: KeyCode,
    /// Control or Alt; Shift only for non-character keys.
    pub modifiers: KeyModifiers,
}

impl Key {
    const fn plain(code: KeyCode) -> Key {
        Key {
            code,
            modifiers: KeyModifiers::NONE,
        }
    }

    const fn char(c: char) -> Key {
        Key::plain(KeyCode::Char(c))
    }

    const fn ctrl(c: char) -> Key {
        Key {
            code: KeyCode::Char(c),
            modifiers: KeyModifiers::CONTROL,
        }
    }

    /// The key of a terminal event, normalised: Shift is dropped from
    /// characters (the character already says it) and from BackTab.
    pub fn from_event(event: &KeyEvent) -> Key {
        let mut modifiers =
            event.modifiers & (KeyModifiers::CONTROL | KeyModifiers::ALT | KeyModifiers::SHIFT);
        if matches!(event.code, KeyCode::Char(_) | KeyCode::BackTab) {
            modifiers.remove(KeyModifiers::SHIFT);
        }
        Key {
            code: event.code,
            modifiers,
        }
    }

    /// How the key is written in help and hints.
    pub fn label(&self) -> String {
        let base = match self.code {
            KeyCode::Char(' ') => "Space".to_string(),
            KeyCode::Char(c) => c.to_string(),
            KeyCode::Up => "↑".to_string(),
            KeyCode::Down => "↓".to_string(),
            KeyCode::Left => "←".to_string(),
            KeyCode::Right => "→".to_string(),
            KeyCode::PageUp => "PgUp".to_string(),
            KeyCode::PageDown => "PgDn".to_string(),
            KeyCode::Home => "Home".to_string(),
            KeyCode::End => "End".to_string(),
            KeyCode::Enter => "Enter".to_string(),
            KeyCode::Esc => "Esc".to_string(),
            KeyCode::Tab => "Tab".to_string(),
            KeyCode::BackTab => "S-Tab".to_string(),
            KeyCode::Backspace => "Bksp".to_string(),
            other => format!("{other:?}"),
        };
        if self.modifiers.contains(KeyModifiers::CONTROL) {
            format!("C-{base}")
        } else {
            base
        }
    }
}

/// Names of non-character keys, as written in help and key files
/// (characters are written as themselves; "C-" marks Control).
const KEY_NAMES: &[(&str, KeyCode)] = &[
    ("Space", KeyCode::Char(' ')),
    ("Up", KeyCode::Up),
    ("↑", KeyCode::Up),
    ("Down", KeyCode::Down),
    ("↓", KeyCode::Down),
    ("Left", KeyCode::Left),
    ("←", KeyCode::Left),
    ("Right", KeyCode::Right),
    ("→", KeyCode::Right),
    ("PgUp", KeyCode::PageUp),
    ("PgDn", KeyCode::PageDown),
    ("Home", KeyCode::Home),
    ("End", KeyCode::End),
    ("Enter", KeyCode::Enter),
    ("Esc", KeyCode::Esc),
    ("Tab", KeyCode::Tab),
    ("S-Tab", KeyCode::BackTab),
    ("Bksp", KeyCode::Backspace),
    ("Backspace", KeyCode::Backspace),
];

impl Key {
    /// A key as a key file writes it: one character (`s`, `?`), a name from
    /// the help (`Enter`, `PgDn`, `Space`, `↑` or `Up`, `S-Tab`), or either
    /// after `C-` for Control. `None` when it is none of these.
    pub fn parse(text: &str) -> Option<Key> {
        let (modifiers, base) = match text.strip_prefix("C-") {
            Some(rest) if !rest.is_empty() => (KeyModifiers::CONTROL, rest),
            _ => (KeyModifiers::NONE, text),
        };
        let named = KEY_NAMES.iter().find(|(name, _)| *name == base);
        let mut chars = base.chars();
        let code = match (named, chars.next(), chars.next()) {
            // Names first: "↑" is one character but names the arrow key.
            (Some((_, code)), _, _) => *code,
            (None, Some(c), None) => KeyCode::Char(c),
            _ => return None,
        };
        Some(Key { code, modifiers })
    }
}

/// One binding.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Binding {
    /// The key.
    pub key: Key,
    /// Where it applies.
    pub scope: Scope,
    /// What it does.
    pub action: Action,
}

/// All bindings, narrowest scope first when looked up.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct KeyMap {
    bindings: Vec<Binding>,
}

/// Actions shown in the status line whatever has focus.
const GLOBAL_HINTS: &[Action] = &[
    Action::Step,
    Action::Back,
    Action::RunToFlag,
    Action::OpenJump,
    Action::FocusNext,
    Action::Help,
    Action::Quit,
];

impl Default for KeyMap {
    fn default() -> KeyMap {
        use Action::*;
        use KeyCode as K;
        let global = [
            (Key::char('s'), Step),
            (Key::char(' '), Step),
            (Key::char('b'), Back),
            (Key::char('u'), Back),
            (Key::char('f'), RunToFlag),
            (Key::char('e'), RunToEnd),
            (Key::char('r'), Restart),
            (Key::char('c'), SelectCurrent),
            (Key::char(':'), OpenJump),
            (Key::char('/'), OpenSearch),
            (Key::char('n'), SearchNext),
            (Key::char('N'), SearchPrevious),
            (Key::plain(K::Tab), FocusNext),
            (Key::plain(K::BackTab), FocusPrevious),
            (Key::char('1'), Focus(PaneId::Order)),
            (Key::char('2'), Focus(PaneId::Node)),
            (Key::char('3'), Focus(PaneId::Inflow)),
            (Key::char('4'), Focus(PaneId::Edges)),
            (Key::char('5'), Focus(PaneId::Trend)),
            (Key::char('6'), Focus(PaneId::Flags)),
            (Key::char('7'), Focus(PaneId::Verify)),
            (Key::char('v'), Verify),
            (Key::char('m'), ToggleForward),
            (Key::char('d'), CycleDirection),
            (Key::char('8'), Focus(PaneId::Paths)),
            (Key::char('D'), Diagnose),
            (Key::char('p'), CyclePrecision),
            (Key::char('o'), JumpToOrigin),
            (Key::char('z'), Zoom),
            (Key::char('t'), CycleTheme),
            (Key::char('?'), Help),
            (Key::char('q'), Quit),
            (Key::ctrl('c'), Quit),
            (Key::plain(K::Esc), Cancel),
            (Key::char('j'), Down),
            (Key::plain(K::Down), Down),
            (Key::char('k'), Up),
            (Key::plain(K::Up), Up),
            (Key::plain(K::PageDown), PageDown),
            (Key::ctrl('d'), PageDown),
            (Key::plain(K::PageUp), PageUp),
            (Key::ctrl('u'), PageUp),
            (Key::char('g'), Top),
            (Key::plain(K::Home), Top),
            (Key::char('G'), Bottom),
            (Key::plain(K::End), Bottom),
            (Key::plain(K::Backspace), WalkBack),
        ];
        let edges = [
            (Key::plain(K::Enter), Enter),
            (Key::char('l'), Enter),
            (Key::plain(K::Right), Enter),
            (Key::char('h'), WalkBack),
            (Key::plain(K::Left), WalkBack),
        ];
        let prompt = [
            (Key::plain(K::Enter), Submit),
            (Key::plain(K::Tab), Complete),
            (Key::plain(K::Backspace), Erase),
            (Key::plain(K::Esc), Cancel),
            (Key::ctrl('c'), Quit),
            (Key::plain(K::Down), Down),
            (Key::plain(K::Up), Up),
        ];
        let mut bindings: Vec<Binding> = Vec::new();
        bindings.extend(prompt.map(|(key, action)| Binding {
            key,
            scope: Scope::Prompt,
            action,
        }));
        bindings.extend(edges.map(|(key, action)| Binding {
            key,
            scope: Scope::Pane(PaneId::Edges),
            action,
        }));
        bindings.push(Binding {
            key: Key::plain(K::Enter),
            scope: Scope::Pane(PaneId::Flags),
            action: Enter,
        });
        bindings.push(Binding {
            key: Key::plain(K::Enter),
            scope: Scope::Pane(PaneId::Order),
            action: Enter,
        });
        bindings.push(Binding {
            key: Key::plain(K::Enter),
            scope: Scope::Pane(PaneId::Verify),
            action: Enter,
        });
        let paths = [
            (Key::plain(K::Enter), Enter),
            (Key::char(']'), NextParameter),
            (Key::char('['), PreviousParameter),
        ];
        bindings.extend(paths.map(|(key, action)| Binding {
            key,
            scope: Scope::Pane(PaneId::Paths),
            action,
        }));
        bindings.extend(global.map(|(key, action)| Binding {
            key,
            scope: Scope::Global,
            action,
        }));
        KeyMap { bindings }
    }
}

impl KeyMap {
    /// Gives `action` exactly `keys` in `scope`, in place of the keys it had
    /// there. Fails, naming both actions, when a key is already bound to
    /// another action in the same scope.
    pub fn rebind(&mut self, scope: Scope, action: Action, keys: &[Key]) -> Result<(), String> {
        let at = self
            .bindings
            .iter()
            .position(|binding| binding.scope == scope && binding.action == action);
        self.bindings
            .retain(|binding| !(binding.scope == scope && binding.action == action));
        for &key in keys {
            if let Some(taken) = self
                .bindings
                .iter()
                .find(|binding| binding.scope == scope && binding.key == key)
            {
                return Err(format!(
                    "key '{}' is already bound to '{}' in {}",
                    key.label(),
                    taken.action.name().unwrap_or("another action"),
                    scope.name()
                ));
            }
        }
        // Where the action's first key was, so the help keeps its order.
        let at = at.unwrap_or(self.bindings.len()).min(self.bindings.len());
        let new = keys.iter().map(|&key| Binding { key, scope, action });
        self.bindings.splice(at..at, new);
        Ok(())
    }

    /// Every binding.
    pub fn bindings(&self) -> &[Binding] {
        &self.bindings
    }

    /// The action for `key` with `focus` focused, the prompt open or not.
    /// In the prompt, an unbound character is typed.
    pub fn lookup(&self, key: Key, focus: PaneId, prompt: bool) -> Option<Action> {
        if prompt {
            let bound = self
                .bindings
                .iter()
                .find(|binding| binding.scope == Scope::Prompt && binding.key == key);
            return match (bound, key.code) {
                (Some(binding), _) => Some(binding.action),
                (None, KeyCode::Char(c)) if !key.modifiers.contains(KeyModifiers::CONTROL) => {
                    Some(Action::Type(c))
                }
                _ => None,
            };
        }
        let pane = self
            .bindings
            .iter()
            .find(|binding| binding.scope == Scope::Pane(focus) && binding.key == key);
        let global = || {
            self.bindings
                .iter()
                .find(|binding| binding.scope == Scope::Global && binding.key == key)
        };
        pane.or_else(global).map(|binding| binding.action)
    }

    /// The keys bound to `action` in `scope`, as written in help.
    pub fn keys_for(&self, scope: Scope, action: Action) -> Vec<String> {
        self.bindings
            .iter()
            .filter(|binding| binding.scope == scope && binding.action == action)
            .map(|binding| binding.key.label())
            .collect()
    }

    /// The help: one section per scope, one row per action with all its keys.
    pub fn help(&self) -> Vec<(String, Vec<(String, &'static str)>)> {
        let mut scopes: Vec<Scope> = Vec::new();
        for binding in &self.bindings {
            if !scopes.contains(&binding.scope) {
                scopes.push(binding.scope);
            }
        }
        // Everywhere first: it is what a new user needs.
        scopes.sort_by_key(|scope| !matches!(scope, Scope::Global));
        scopes
            .into_iter()
            .map(|scope| {
                let mut rows: Vec<(String, &'static str)> = Vec::new();
                let mut seen: Vec<Action> = Vec::new();
                for binding in self
                    .bindings
                    .iter()
                    .filter(|binding| binding.scope == scope)
                {
                    let action = match binding.action {
                        Action::Focus(_) => Action::Focus(PaneId::Order),
                        other => other,
                    };
                    if seen.contains(&action) {
                        continue;
                    }
                    seen.push(action);
                    let keys: Vec<String> = self
                        .bindings
                        .iter()
                        .filter(|other| {
                            other.scope == scope
                                && std::mem::discriminant(&other.action)
                                    == std::mem::discriminant(&action)
                        })
                        .map(|other| other.key.label())
                        .collect();
                    let keys = if matches!(action, Action::Focus(_)) {
                        format!("{}-{}", keys[0], keys[keys.len() - 1])
                    } else {
                        keys.join(" ")
                    };
                    rows.push((keys, action.describe()));
                }
                (scope.heading(), rows)
            })
            .collect()
    }

    /// Hints for the status line: the focused pane's own keys, then the
    /// global essentials, each as (first key, short name).
    pub fn hints(&self, focus: PaneId) -> Vec<(String, &'static str)> {
        let mut hints: Vec<(String, &'static str)> = Vec::new();
        let mut seen: Vec<Action> = Vec::new();
        for binding in self
            .bindings
            .iter()
            .filter(|binding| binding.scope == Scope::Pane(focus))
        {
            if !seen.contains(&binding.action) {
                seen.push(binding.action);
                hints.push((binding.key.label(), binding.action.hint()));
            }
        }
        for &action in GLOBAL_HINTS {
            if let Some(binding) = self
                .bindings
                .iter()
                .find(|binding| binding.scope == Scope::Global && binding.action == action)
            {
                hints.push((binding.key.label(), action.hint()));
            }
        }
        hints
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn press(code: KeyCode, modifiers: KeyModifiers) -> Key {
        Key::from_event(&KeyEvent::new(code, modifiers))
    }

    #[test]
    fn pane_bindings_win_over_global_ones() {
        let map = KeyMap::default();
        let backspace = press(KeyCode::Backspace, KeyModifiers::NONE);
        assert_eq!(
            map.lookup(backspace, PaneId::Order, false),
            Some(Action::WalkBack)
        );
        assert_eq!(
            map.lookup(backspace, PaneId::Order, true),
            Some(Action::Erase)
        );
        assert_eq!(
            map.lookup(
                press(KeyCode::Enter, KeyModifiers::NONE),
                PaneId::Edges,
                false
            ),
            Some(Action::Enter)
        );
        assert_eq!(
            map.lookup(
                press(KeyCode::Char('G'), KeyModifiers::SHIFT),
                PaneId::Order,
                false
            ),
            Some(Action::Bottom)
        );
        assert_eq!(
            map.lookup(
                press(KeyCode::Char('s'), KeyModifiers::NONE),
                PaneId::Order,
                true
            ),
            Some(Action::Type('s'))
        );
        assert_eq!(
            map.lookup(
                press(KeyCode::Char('c'), KeyModifiers::CONTROL),
                PaneId::Trend,
                false
            ),
            Some(Action::Quit)
        );
    }

    #[test]
    fn no_key_is_bound_twice_in_one_scope() {
        let map = KeyMap::default();
        for (at, binding) in map.bindings().iter().enumerate() {
            let clash = map.bindings()[at + 1..]
                .iter()
                .find(|other| other.scope == binding.scope && other.key == binding.key);
            assert!(
                clash.is_none(),
                "{} bound twice in {:?}",
                binding.key.label(),
                binding.scope
            );
        }
    }

    #[test]
    fn help_and_hints_come_from_the_map() {
        let map = KeyMap::default();
        let help = map.help();
        assert_eq!(help[0].0, "Everywhere");
        let step = help[0]
            .1
            .iter()
            .find(|(_, what)| *what == Action::Step.describe())
            .expect("step is listed");
        assert_eq!(step.0, "s Space");
        assert!(help.iter().any(|(heading, rows)| heading == "In Edges"
            && rows.iter().any(|(keys, _)| keys == "Enter l →")));
        let hints = map.hints(PaneId::Edges);
        assert_eq!(hints[0], ("Enter".to_string(), "open"));
        assert!(hints.contains(&("?".to_string(), "help")));
    }
}
