//! Key bindings read from a RON file: each entry gives one action its keys in
//! one scope, in place of the defaults there; every other binding stays.
//!
//! ```ron
//! [
//!     (action: "step", keys: ["s", "Right"]),
//!     (action: "back", keys: ["b", "Left"]),
//!     (action: "enter", scope: "edges", keys: ["Enter", "l"]),
//! ]
//! ```

use super::action::{Action, bindable};
use super::keymap::{Key, KeyMap, Scope};
use serde::Deserialize;
use serde::de::{self, Deserializer, SeqAccess, Visitor};
use std::fmt;
use std::path::{Path, PathBuf};

/// Why a key file could not be used.
#[derive(Debug, thiserror::Error)]
pub enum KeyFileError {
    /// The file could not be read.
    #[error("{}: cannot read the key file: {error} (hint: give the path to a .ron key file; README shows one)", path.display())]
    Io {
        /// The file.
        path: PathBuf,
        /// The I/O error (in the message, not as a source: the message is the one line).
        error: std::io::Error,
    },
    /// The file is not a valid key file.
    #[error("{}:{line}:{column}: {message} (hint: entries look like (action: \"step\", keys: [\"s\", \"Right\"]); ? in the view lists every action)", path.display())]
    Invalid {
        /// The file.
        path: PathBuf,
        /// 1-based line.
        line: usize,
        /// 1-based column.
        column: usize,
        /// What is wrong.
        message: String,
    },
}

impl KeyMap {
    /// The default key map with a key file's entries applied; `path` only
    /// labels errors.
    pub fn parse(text: &str, path: &Path) -> Result<KeyMap, KeyFileError> {
        ron::Options::default()
            .with_default_extension(ron::extensions::Extensions::IMPLICIT_SOME)
            .from_str::<Rebound>(text)
            .map(|rebound| rebound.0)
            .map_err(|error| KeyFileError::Invalid {
                path: path.to_path_buf(),
                line: error.span.start.line,
                column: error.span.start.col,
                message: error.code.to_string(),
            })
    }

    /// The default key map with the key file at `path` applied.
    pub fn load(path: &Path) -> Result<KeyMap, KeyFileError> {
        let text = std::fs::read_to_string(path).map_err(|error| KeyFileError::Io {
            path: path.to_path_buf(),
            error,
        })?;
        KeyMap::parse(&text, path)
    }
}

/// One entry as written.
#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct Entry {
    action: String,
    #[serde(default)]
    scope: Option<String>,
    keys: Vec<String>,
}

/// The default map with every entry applied, each checked as it is read so
/// that an error carries the entry's place in the file.
struct Rebound(KeyMap);

impl<'de> Deserialize<'de> for Rebound {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Rebound, D::Error> {
        deserializer.deserialize_seq(EntriesVisitor)
    }
}

struct EntriesVisitor;

impl<'de> Visitor<'de> for EntriesVisitor {
    type Value = Rebound;

    fn expecting(&self, formatter: &mut fmt::Formatter) -> fmt::Result {
        formatter.write_str("a list of (action: ..., keys: [...]) entries")
    }

    fn visit_seq<A: SeqAccess<'de>>(self, mut entries: A) -> Result<Rebound, A::Error> {
        let mut map = KeyMap::default();
        let mut seen: Vec<(Scope, String)> = Vec::new();
        while let Some(entry) = entries.next_element::<Entry>()? {
            let action = Action::named(&entry.action).ok_or_else(|| {
                let all = bindable();
                let names = all.iter().map(|(name, _)| name.as_str());
                de::Error::custom(match crate::closest::closest(&entry.action, names) {
                    Some(near) => {
                        format!("unknown action '{}' (did you mean '{near}'?)", entry.action)
                    }
                    None => format!("unknown action '{}'", entry.action),
                })
            })?;
            let scope_name = entry.scope.as_deref().unwrap_or("global");
            let scope = Scope::named()
                .into_iter()
                .find(|(name, _)| name == scope_name)
                .map(|(_, scope)| scope)
                .ok_or_else(|| {
                    let names: Vec<String> =
                        Scope::named().into_iter().map(|(name, _)| name).collect();
                    de::Error::custom(format!(
                        "unknown scope '{scope_name}' (one of: {})",
                        names.join(", ")
                    ))
                })?;
            if seen.contains(&(scope, entry.action.clone())) {
                return Err(de::Error::custom(format!(
                    "'{}' is given keys twice in {scope_name}",
                    entry.action
                )));
            }
            seen.push((scope, entry.action.clone()));
            if entry.keys.is_empty() {
                return Err(de::Error::custom(format!(
                    "'{}' needs at least one key",
                    entry.action
                )));
            }
            let keys = entry
                .keys
                .iter()
                .map(|text| {
                    Key::parse(text).ok_or_else(|| {
                        de::Error::custom(format!(
                            "unknown key '{text}' (a character, C- and a character, or a name such as Enter, Esc, Tab, Space, Up, PgDn, Home)"
                        ))
                    })
                })
                .collect::<Result<Vec<Key>, A::Error>>()?;
            // Ctrl-C quits whatever a key file says: a way out is never lost.
            let escape = Key::parse("C-c").expect("a key name");
            let mut keys = keys;
            if keys.contains(&escape) && action != Action::Quit {
                return Err(de::Error::custom(format!(
                    "C-c always quits and cannot be given to '{}'",
                    entry.action
                )));
            }
            if action == Action::Quit && !keys.contains(&escape) {
                keys.push(escape);
            }
            map.rebind(scope, action, &keys).map_err(|conflict| {
                de::Error::custom(format!("{conflict}: give it to one action"))
            })?;
        }
        Ok(Rebound(map))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::tui::PaneId;
    use ratatui::crossterm::event::{KeyCode, KeyModifiers};

    fn pane(name: &str) -> PaneId {
        PaneId::named(name).expect("a registered pane")
    }

    fn parse(text: &str) -> Result<KeyMap, String> {
        KeyMap::parse(text, Path::new("keys.ron")).map_err(|error| error.to_string())
    }

    #[test]
    fn an_entry_replaces_the_actions_keys_and_only_them() {
        let map = parse(
            r#"[
                (action: "step", keys: ["Right", "C-n"]),
                (action: "enter", scope: "edges", keys: ["o"]),
            ]"#,
        )
        .unwrap();
        let right = Key::parse("Right").unwrap();
        assert_eq!(map.lookup(right, pane("Order"), false), Some(Action::Step));
        let ctrl_n = Key {
            code: KeyCode::Char('n'),
            modifiers: KeyModifiers::CONTROL,
        };
        assert_eq!(map.lookup(ctrl_n, pane("Order"), false), Some(Action::Step));
        // The defaults of step are gone; back keeps its own.
        assert_eq!(
            map.lookup(Key::parse("s").unwrap(), pane("Order"), false),
            None
        );
        assert_eq!(map.keys_for(Scope::Global, Action::Step), ["→", "C-n"]);
        assert_eq!(map.keys_for(Scope::Global, Action::Back), ["b", "u"]);
        assert_eq!(
            map.keys_for(Scope::Pane(pane("Edges")), Action::Enter),
            ["o"]
        );
        // Help and hints come from the same map.
        assert!(
            map.hints(pane("Order"))
                .contains(&("→".to_string(), "step"))
        );
    }

    #[test]
    fn control_c_still_quits_when_quit_gets_other_keys() {
        let map = parse(r#"[(action: "quit", keys: ["x"])]"#).unwrap();
        assert_eq!(map.keys_for(Scope::Global, Action::Quit), ["x", "C-c"]);
    }

    #[test]
    fn every_label_in_the_default_map_parses_back_to_its_key() {
        for binding in KeyMap::default().bindings() {
            assert_eq!(
                Key::parse(&binding.key.label()),
                Some(binding.key),
                "{binding:?}"
            );
        }
    }

    #[test]
    fn every_bindable_action_has_one_name_and_every_bound_action_is_bindable() {
        for (name, action) in bindable() {
            assert_eq!(action.name(), Some(name));
        }
        assert_eq!(Action::Type('x').name(), None);
        for binding in KeyMap::default().bindings() {
            assert!(binding.action.name().is_some(), "{binding:?} has no name");
        }
    }

    #[test]
    fn the_readme_key_file_example_applies() {
        let readme = include_str!(concat!(env!("CARGO_MANIFEST_DIR"), "/README.md"));
        let start = readme
            .find("```ron\n// Arrow keys step the sweep")
            .expect("README shows a key file");
        let body = &readme[start + "```ron\n".len()..];
        let example = &body[..body.find("```").expect("the block ends")];
        let map = parse(example).unwrap();
        assert_eq!(map.keys_for(Scope::Global, Action::Back), ["←", "b"]);
        assert_eq!(
            map.keys_for(Scope::Pane(pane("Edges")), Action::Enter),
            ["o"]
        );
    }

    #[test]
    fn mistakes_name_line_and_column_and_what_to_fix() {
        let cases = [
            (
                "[\n  (action: \"stpe\", keys: [\"s\"]),\n]",
                "keys.ron:2:",
                "unknown action 'stpe' (did you mean 'step'?)",
            ),
            (
                "[\n  (action: \"step\", keys: [\"Hyper-x\"]),\n]",
                "keys.ron:2:",
                "unknown key 'Hyper-x'",
            ),
            (
                "[\n  (action: \"step\", scope: \"sidebar\", keys: [\"s\"]),\n]",
                "keys.ron:2:",
                "unknown scope 'sidebar'",
            ),
            (
                "[\n  (action: \"step\", keys: [\"b\"]),\n]",
                "keys.ron:2:",
                "key 'b' is already bound to 'back' in global: give it to one action",
            ),
            (
                "[\n  (action: \"step\", keys: [\"x\"]),\n  (action: \"step\", keys: [\"y\"]),\n]",
                "keys.ron:3:",
                "'step' is given keys twice in global",
            ),
            (
                "[\n  (action: \"quit\", keys: []),\n]",
                "keys.ron:2:",
                "'quit' needs at least one key",
            ),
            (
                "[\n  (action: \"step\", keys: [\"C-c\"]),\n]",
                "keys.ron:2:",
                "C-c always quits and cannot be given to 'step'",
            ),
            (
                "[\n  (action: \"step\", key: [\"x\"]),\n]",
                "keys.ron:2:",
                "key",
            ),
            ("[ (action: \"step\", keys: [\"x\"] ", "keys.ron:1:", ""),
        ];
        for (text, place, message) in cases {
            let error = parse(text).expect_err(text);
            assert!(error.starts_with(place), "{error}");
            assert!(error.contains(message), "{error}");
            assert_eq!(error.lines().count(), 1, "{error}");
        }
    }

    #[test]
    fn a_missing_file_is_one_line_naming_it() {
        let error = KeyMap::load(Path::new("no/such/keys.ron"))
            .unwrap_err()
            .to_string();
        assert!(
            error.starts_with("no/such/keys.ron: cannot read the key file"),
            "{error}"
        );
        assert_eq!(error.lines().count(), 1);
    }
}
