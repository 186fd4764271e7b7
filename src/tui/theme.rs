//! Themes: semantic roles (done, current, pending, each flag kind, borders,
//! focus, text, chart) read from RON files, the shipped ones built in.

use ratatui::style::{Color, Modifier, Style};
use serde::Deserialize;
use std::path::{Path, PathBuf};
use std::str::FromStr;

/// The themes shipped in themes/, built into the binary; the first is the default.
pub const SHIPPED: &[(&str, &str)] = &[
    ("dark", include_str!("../../themes/dark.ron")),
    ("light", include_str!("../../themes/light.ron")),
    ("contrast", include_str!("../../themes/contrast.ron")),
    ("colorblind", include_str!("../../themes/colorblind.ron")),
];

/// A colour as written in a theme file: a name (`"red"`, `"dark gray"`), an
/// index (`"42"`) or `"#rrggbb"`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
struct ThemeColor(Color);

impl<'de> Deserialize<'de> for ThemeColor {
    fn deserialize<D: serde::Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        let text = String::deserialize(deserializer)?;
        Color::from_str(&text).map(ThemeColor).map_err(|_| {
            serde::de::Error::custom(format!("`{text}` is not a colour (use a name like \"red\", an index like \"208\" or \"#rrggbb\")"))
        })
    }
}

/// One role as written: colours and modifiers.
#[derive(Debug, Clone, Copy, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RoleFile {
    #[serde(default)]
    fg: Option<ThemeColor>,
    #[serde(default)]
    bg: Option<ThemeColor>,
    #[serde(default)]
    bold: bool,
    #[serde(default)]
    reversed: bool,
    #[serde(default)]
    underlined: bool,
}

impl RoleFile {
    fn style(self) -> Style {
        let mut style = Style::new();
        if let Some(ThemeColor(fg)) = self.fg {
            style = style.fg(fg);
        }
        if let Some(ThemeColor(bg)) = self.bg {
            style = style.bg(bg);
        }
        let modifiers = [
            (self.bold, Modifier::BOLD),
            (self.reversed, Modifier::REVERSED),
            (self.underlined, Modifier::UNDERLINED),
        ];
        for (on, modifier) in modifiers {
            if on {
                style = style.add_modifier(modifier);
            }
        }
        style
    }
}

/// A theme file: every role must be present.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct ThemeFile {
    name: String,
    text: RoleFile,
    muted: RoleFile,
    title: RoleFile,
    border: RoleFile,
    focus: RoleFile,
    selection: RoleFile,
    done: RoleFile,
    current: RoleFile,
    pending: RoleFile,
    flag_value: RoleFile,
    flag_partial: RoleFile,
    flag_adjoint: RoleFile,
    flag_origin: RoleFile,
    flag_large: RoleFile,
    flag_small: RoleFile,
    chart: RoleFile,
    chart_group: RoleFile,
    status: RoleFile,
    key: RoleFile,
}

/// A loaded theme: one style per semantic role.
#[derive(Debug, Clone, PartialEq)]
pub struct Theme {
    /// The theme's name, shown in the status line.
    pub name: String,
    /// Ordinary text.
    pub text: Style,
    /// Labels and secondary text.
    pub muted: Style,
    /// Pane titles.
    pub title: Style,
    /// Borders of panes without focus.
    pub border: Style,
    /// The border and title of the focused pane.
    pub focus: Style,
    /// The selected row of a list.
    pub selection: Style,
    /// Nodes the sweep has processed.
    pub done: Style,
    /// The node the next step processes.
    pub current: Style,
    /// Nodes still to be processed.
    pub pending: Style,
    /// A non-finite forward value.
    pub flag_value: Style,
    /// A non-finite partial.
    pub flag_partial: Style,
    /// A non-finite adjoint.
    pub flag_adjoint: Style,
    /// Where a non-finite adjoint was born (a diagnosis origin).
    pub flag_origin: Style,
    /// A diagnosis finding of a number too large: overflow, near overflow, exploding, gain above 1.
    pub flag_large: Style,
    /// A diagnosis finding of a number too small: underflow, vanishing, gain below 1.
    pub flag_small: Style,
    /// The magnitude line.
    pub chart: Style,
    /// The per-group bars.
    pub chart_group: Style,
    /// The status line.
    pub status: Style,
    /// Key names in hints and help.
    pub key: Style,
}

/// Why a theme could not be used.
#[derive(Debug, thiserror::Error)]
pub enum ThemeError {
    /// The file could not be read.
    #[error("{}: cannot read the theme: {error} (hint: give a shipped theme name ({}) or a path to a .ron file)", path.display(), shipped_names())]
    Io {
        /// The file.
        path: PathBuf,
        /// The I/O error (in the message, not as a source: the message is the one line).
        error: std::io::Error,
    },
    /// The file is not a valid theme.
    #[error("{}:{line}:{column}: {message} (hint: copy themes/dark.ron and change the colours)", path.display())]
    Syntax {
        /// The file.
        path: PathBuf,
        /// 1-based line.
        line: usize,
        /// 1-based column.
        column: usize,
        /// What the parser said.
        message: String,
    },
}

fn shipped_names() -> String {
    SHIPPED
        .iter()
        .map(|(name, _)| *name)
        .collect::<Vec<_>>()
        .join(", ")
}

impl Theme {
    /// Parses theme text; `path` only labels errors.
    pub fn parse(text: &str, path: &Path) -> Result<Theme, ThemeError> {
        let options = ron::Options::default()
            .with_default_extension(ron::extensions::Extensions::IMPLICIT_SOME);
        let file: ThemeFile = options.from_str(text).map_err(|error| ThemeError::Syntax {
            path: path.to_path_buf(),
            line: error.span.start.line,
            column: error.span.start.col,
            message: error.code.to_string(),
        })?;
        Ok(Theme {
            name: file.name,
            text: file.text.style(),
            muted: file.muted.style(),
            title: file.title.style(),
            border: file.border.style(),
            focus: file.focus.style(),
            selection: file.selection.style(),
            done: file.done.style(),
            current: file.current.style(),
            pending: file.pending.style(),
            flag_value: file.flag_value.style(),
            flag_partial: file.flag_partial.style(),
            flag_adjoint: file.flag_adjoint.style(),
            flag_origin: file.flag_origin.style(),
            flag_large: file.flag_large.style(),
            flag_small: file.flag_small.style(),
            chart: file.chart.style(),
            chart_group: file.chart_group.style(),
            status: file.status.style(),
            key: file.key.style(),
        })
    }

    /// A shipped theme by name.
    pub fn shipped(name: &str) -> Option<Theme> {
        let (name, text) = SHIPPED.iter().find(|(shipped, _)| *shipped == name)?;
        let path = PathBuf::from(format!("themes/{name}.ron"));
        Some(Theme::parse(text, &path).expect("shipped themes parse (tested)"))
    }

    /// The default theme (dark).
    pub fn default_theme() -> Theme {
        Theme::shipped(SHIPPED[0].0).expect("the default theme is shipped")
    }

    /// A shipped theme's name, or else a path to a theme file.
    pub fn resolve(name_or_path: &str) -> Result<Theme, ThemeError> {
        if let Some(theme) = Theme::shipped(name_or_path) {
            return Ok(theme);
        }
        let path = Path::new(name_or_path);
        let text = std::fs::read_to_string(path).map_err(|error| ThemeError::Io {
            path: path.to_path_buf(),
            error,
        })?;
        Theme::parse(&text, path)
    }

    /// The themes the view cycles through: `first` (when given and not
    /// shipped) followed by every shipped theme, each without colour when
    /// `no_color` is set.
    pub fn cycle(first: Option<Theme>, no_color: bool) -> Vec<Theme> {
        let mut themes: Vec<Theme> = SHIPPED
            .iter()
            .filter_map(|(name, _)| Theme::shipped(name))
            .collect();
        if let Some(first) = first {
            match themes.iter().position(|theme| *theme == first) {
                Some(at) => themes.rotate_left(at),
                None => themes.insert(0, first),
            }
        }
        if no_color {
            themes = themes.iter().map(Theme::without_color).collect();
        }
        themes
    }

    /// The same theme with every colour removed: what NO_COLOR asks for.
    /// Modifiers stay, and the roles that carry state get one if they had
    /// none, so done, current and selected stay distinguishable.
    pub fn without_color(&self) -> Theme {
        let strip = |style: Style, fallback: Modifier| {
            let kept = Style::new().add_modifier(style.add_modifier);
            if style.add_modifier.is_empty() {
                kept.add_modifier(fallback)
            } else {
                kept
            }
        };
        let plain = |style: Style| Style::new().add_modifier(style.add_modifier);
        Theme {
            name: self.name.clone(),
            text: plain(self.text),
            muted: plain(self.muted),
            title: strip(self.title, Modifier::BOLD),
            border: plain(self.border),
            focus: strip(self.focus, Modifier::BOLD),
            selection: Style::new().add_modifier(Modifier::REVERSED),
            done: plain(self.done),
            current: strip(self.current, Modifier::BOLD),
            pending: plain(self.pending),
            flag_value: strip(self.flag_value, Modifier::BOLD),
            flag_partial: strip(self.flag_partial, Modifier::BOLD),
            flag_adjoint: strip(self.flag_adjoint, Modifier::BOLD),
            flag_origin: strip(self.flag_origin, Modifier::BOLD),
            flag_large: strip(self.flag_large, Modifier::BOLD),
            flag_small: strip(self.flag_small, Modifier::BOLD),
            chart: plain(self.chart),
            chart_group: plain(self.chart_group),
            status: strip(self.status, Modifier::REVERSED),
            key: strip(self.key, Modifier::BOLD),
        }
    }
}

/// True when the NO_COLOR convention asks for no colour: the variable is set
/// and not empty (no-color.org, "NO_COLOR", 2017).
pub fn no_color_requested() -> bool {
    std::env::var_os("NO_COLOR").is_some_and(|value| !value.is_empty())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_bad_colour_names_line_and_column() {
        let text = SHIPPED[0].1.replacen("fg: \"", "fg: \"no-such-", 1);
        let error = Theme::parse(&text, Path::new("mine.ron"))
            .unwrap_err()
            .to_string();
        assert!(error.starts_with("mine.ron:"), "{error}");
        let position: Vec<&str> = error.split(':').skip(1).take(2).collect();
        assert!(
            position.iter().all(|part| part.parse::<usize>().is_ok()),
            "line:column missing in {error}"
        );
        assert!(error.contains("is not a colour"), "{error}");
        assert_eq!(error.lines().count(), 1);
    }

    #[test]
    fn a_missing_role_is_named() {
        let error = Theme::parse("(name: \"x\", text: ())", Path::new("t.ron"))
            .unwrap_err()
            .to_string();
        assert!(error.contains("muted"), "{error}");
        assert!(error.starts_with("t.ron:1:"), "{error}");
    }

    #[test]
    fn without_color_keeps_state_visible() {
        let plain = Theme::default_theme().without_color();
        for style in [plain.text, plain.current, plain.selection, plain.flag_value] {
            assert_eq!((style.fg, style.bg), (None, None));
        }
        assert!(plain.selection.add_modifier.contains(Modifier::REVERSED));
        assert!(!plain.current.add_modifier.is_empty());
    }

    #[test]
    fn a_chosen_theme_comes_first_in_the_cycle() {
        let light = Theme::shipped("light").unwrap();
        let cycle = Theme::cycle(Some(light.clone()), false);
        assert_eq!(cycle[0], light);
        assert_eq!(cycle.len(), SHIPPED.len());
    }
}
