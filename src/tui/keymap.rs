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
            PaneId::all()
                .into_iter()
                .map(|pane| (pane.name().to_lowercase(), Scope::Pane(pane))),
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
    /// What it does there, in a few words (a pane's own text, else the action's).
    pub hint: &'static str,
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
            (Key::char('w'), OpenWatch),
            (Key::char('n'), SearchNext),
            (Key::char('N'), SearchPrevious),
            (Key::plain(K::Tab), FocusNext),
            (Key::plain(K::BackTab), FocusPrevious),
            (Key::char('v'), Verify),
            (Key::char('m'), ToggleForward),
            (Key::char('d'), CycleDirection),
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
            hint: action.hint(),
        }));
        // Each pane's own keys, with what they do there, from the pane registry.
        for spec in super::panes::specs() {
            for &(key, action, hint) in spec.keys {
                bindings.push(Binding {
                    key: Key::parse(key).expect("the registry writes keys as key files do"),
                    scope: Scope::Pane(spec.id),
                    action,
                    hint,
                });
            }
        }
        for (key, action) in global {
            bindings.push(Binding {
                key,
                scope: Scope::Global,
                action,
                hint: action.hint(),
            });
            // Number keys focus the panes in registry order, listed after the focus keys.
            if action == FocusPrevious {
                for pane in PaneId::all().into_iter().take(9) {
                    let digit = char::from_digit(pane.number() as u32, 10).expect("at most nine");
                    bindings.push(Binding {
                        key: Key::char(digit),
                        scope: Scope::Global,
                        action: Action::Focus(pane),
                        hint: Action::Focus(pane).hint(),
                    });
                }
            }
        }
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
        // What the action does there stays what it did.
        let hint = at.map_or(action.hint(), |at| self.bindings[at].hint);
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
                    taken.action.name().unwrap_or("another action".to_string()),
                    scope.name()
                ));
            }
        }
        // Where the action's first key was, so the help keeps its order.
        let at = at.unwrap_or(self.bindings.len()).min(self.bindings.len());
        let new = keys.iter().map(|&key| Binding {
            key,
            scope,
            action,
            hint,
        });
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
                        Action::Focus(_) => Action::Focus(PaneId::all()[0]),
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
                    let what = match scope {
                        Scope::Pane(_) => binding.hint,
                        _ => action.describe(),
                    };
                    rows.push((keys, what));
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
                hints.push((binding.key.label(), binding.hint));
            }
        }
        for &action in GLOBAL_HINTS {
            if let Some(binding) = self
                .bindings
                .iter()
                .find(|binding| binding.scope == Scope::Global && binding.action == action)
            {
                // A pane that gives the key its own meaning has listed it already.
                if !hints.iter().any(|(key, _)| *key == binding.key.label()) {
                    hints.push((binding.key.label(), binding.hint));
                }
            }
        }
        hints
    }

    /// `text` with every `{key:NAME}` replaced by the first key bound to the
    /// action NAME (a key-file name) in `focus`'s pane, else everywhere: the
    /// view's sentences name keys only this way, so they follow `--keys`.
    pub fn fill(&self, text: &str, focus: PaneId) -> String {
        let mut out = String::with_capacity(text.len());
        let mut rest = text;
        while let Some(at) = rest.find("{key:") {
            out.push_str(&rest[..at]);
            let after = &rest[at + 5..];
            let Some(end) = after.find('}') else {
                out.push_str(&rest[at..]);
                return out;
            };
            let name = &after[..end];
            out.push_str(&self.label_for(name, focus));
            rest = &after[end + 1..];
        }
        out.push_str(rest);
        out
    }

    /// The first key bound to the action named `name` in `focus`'s pane,
    /// else everywhere; `(unbound)` when no key is.
    pub fn label_for(&self, name: &str, focus: PaneId) -> String {
        let Some(action) = Action::named(name) else {
            debug_assert!(false, "no action is named {name}");
            return format!("({name})");
        };
        let find = |scope: Scope| {
            self.bindings
                .iter()
                .find(|binding| binding.scope == scope && binding.action == action)
        };
        find(Scope::Pane(focus))
            .or_else(|| find(Scope::Global))
            .or_else(|| {
                self.bindings
                    .iter()
                    .find(|binding| binding.action == action)
            })
            .map_or("(unbound)".to_string(), |binding| binding.key.label())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn pane(name: &str) -> PaneId {
        PaneId::named(name).expect("a registered pane")
    }

    fn press(code: KeyCode, modifiers: KeyModifiers) -> Key {
        Key::from_event(&KeyEvent::new(code, modifiers))
    }

    #[test]
    fn pane_bindings_win_over_global_ones() {
        let map = KeyMap::default();
        let backspace = press(KeyCode::Backspace, KeyModifiers::NONE);
        assert_eq!(
            map.lookup(backspace, pane("Order"), false),
            Some(Action::WalkBack)
        );
        assert_eq!(
            map.lookup(backspace, pane("Order"), true),
            Some(Action::Erase)
        );
        assert_eq!(
            map.lookup(
                press(KeyCode::Enter, KeyModifiers::NONE),
                pane("Edges"),
                false
            ),
            Some(Action::Enter)
        );
        assert_eq!(
            map.lookup(
                press(KeyCode::Char('G'), KeyModifiers::SHIFT),
                pane("Order"),
                false
            ),
            Some(Action::Bottom)
        );
        assert_eq!(
            map.lookup(
                press(KeyCode::Char('s'), KeyModifiers::NONE),
                pane("Order"),
                true
            ),
            Some(Action::Type('s'))
        );
        assert_eq!(
            map.lookup(
                press(KeyCode::Char('c'), KeyModifiers::CONTROL),
                pane("Trend"),
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
        let hints = map.hints(pane("Edges"));
        assert_eq!(hints[0], ("Enter".to_string(), "walk the edge"));
        assert!(hints.contains(&("h".to_string(), "walk back")));
        assert!(hints.contains(&("?".to_string(), "help")));
    }

    #[test]
    fn every_hint_names_a_key_bound_to_what_it_says() {
        let map = KeyMap::default();
        for pane in PaneId::all() {
            let hints = map.hints(pane);
            assert!(!hints.is_empty());
            for (label, hint) in hints {
                let key = Key::parse(&label)
                    .unwrap_or_else(|| panic!("hint key {label:?} is not a key name"));
                let action = map
                    .lookup(key, pane, false)
                    .unwrap_or_else(|| panic!("{label} ({hint}) is not bound in {}", pane.name()));
                let binding = map
                    .bindings()
                    .iter()
                    .find(|binding| {
                        binding.key == key
                            && binding.action == action
                            && (binding.scope == Scope::Pane(pane)
                                || binding.scope == Scope::Global)
                    })
                    .expect("the binding the lookup found");
                assert_eq!(binding.hint, hint, "{label} in {}", pane.name());
            }
        }
    }

    /// Every `{key:NAME}` the view's sentences use names an action a key can be bound to.
    #[test]
    fn every_key_placeholder_names_a_bound_action() {
        let map = KeyMap::default();
        let root = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("src/tui");
        let mut files = vec![root.clone()];
        let mut seen = 0;
        while let Some(path) = files.pop() {
            if path.is_dir() {
                files.extend(
                    std::fs::read_dir(&path)
                        .unwrap()
                        .map(|entry| entry.unwrap().path()),
                );
                continue;
            }
            let text = std::fs::read_to_string(&path).unwrap();
            for piece in text.split("{key:").skip(1) {
                let name = piece.split('}').next().unwrap();
                // Only sentences: the code that reads the syntax, and its docs, are not.
                if name.is_empty() || !name.chars().all(|c| c.is_ascii_lowercase() || c == '_') {
                    continue;
                }
                seen += 1;
                let action = Action::named(name)
                    .unwrap_or_else(|| panic!("{}: no action is named {name}", path.display()));
                assert!(
                    map.bindings()
                        .iter()
                        .any(|binding| binding.action == action),
                    "{name} has no key"
                );
            }
        }
        assert!(
            seen > 20,
            "the view's sentences name keys this way ({seen} found)"
        );
    }

    #[test]
    fn sentences_follow_a_rebound_key() {
        let mut map = KeyMap::default();
        map.rebind(Scope::Global, Action::Diagnose, &[Key::parse("Z").unwrap()])
            .unwrap();
        assert_eq!(
            map.fill("no diagnosis yet: {key:diagnose} runs it", pane("Order")),
            "no diagnosis yet: Z runs it"
        );
        // A pane's own key comes first where the sentence is about that pane.
        assert_eq!(
            map.fill("{key:walk_back} goes back", pane("Edges")),
            "h goes back"
        );
        assert_eq!(
            map.fill("{key:walk_back} goes back", pane("Order")),
            "Bksp goes back"
        );
    }
}
