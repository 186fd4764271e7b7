//! Paths: the dominant path from the output to one parameter (the selected
//! node when it is one, else the one the advice names), hop by hop with each
//! hop's gain and the product so far; then the adjoint norm of every group
//! by depth as log-scale bars, with the ratio to the group above.

use super::{Move, Pane, fit};
use crate::diagnose::{DominantPath, GroupNorm};
use crate::format::compact;
use crate::ops::Op;
use crate::tui::action::PaneId;
use crate::tui::app::App;
use crate::tui::symbols::magnitude_bar;
use ratatui::buffer::Buffer;
use ratatui::layout::Rect;
use ratatui::style::Style;
use ratatui::text::{Line, Span};

/// The dominant-path and group-norm pane.
pub struct PathsPane;

/// One row of the pane's list.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Row {
    /// The path's heading.
    Path,
    /// One hop, by index into the path's hops.
    Hop(usize),
    /// The selected parameter has no path, or there is no parameter.
    NoPath,
    /// The heading above the groups.
    Groups,
    /// One group, by index into the diagnosis's groups.
    Group(usize),
}

/// The parameter whose path is shown: the selection when it is a parameter
/// with a path, else the last one shown, else the diagnosis's headline parameter.
pub fn shown_param(app: &App) -> Option<usize> {
    let diagnosed = app.diagnosis()?;
    let has_path = |node: usize| {
        app.trace.node(node).op == Op::Param && diagnosed.diagnosis.path_to(node).is_some()
    };
    if has_path(app.selected) {
        return Some(app.selected);
    }
    app.paths_param
        .filter(|&param| has_path(param))
        .or_else(|| diagnosed.headline_param())
}

fn shown_path<'a>(app: &'a App) -> Option<&'a DominantPath> {
    shown_param(app).and_then(|param| app.diagnosis()?.diagnosis.path_to(param))
}

fn rows(app: &App) -> Vec<Row> {
    let Some(diagnosed) = app.diagnosis() else {
        return Vec::new();
    };
    let mut rows = Vec::new();
    match shown_path(app) {
        Some(path) => {
            rows.push(Row::Path);
            rows.extend((0..path.hops.len()).map(Row::Hop));
        }
        None => rows.push(Row::NoPath),
    }
    rows.push(Row::Groups);
    rows.extend((0..diagnosed.diagnosis.groups.len()).map(Row::Group));
    rows
}

fn first_shown(app: &App, rows: usize) -> usize {
    app.paths_cursor.saturating_sub(rows.saturating_sub(1))
}

/// The first node of `group` in sweep order.
fn first_of_group(app: &App, group: &GroupNorm) -> Option<usize> {
    app.trace
        .sweep_order()
        .iter()
        .copied()
        .find(|&node| app.trace.node(node).group == group.group)
}

impl Pane for PathsPane {
    fn id(&self) -> PaneId {
        PaneId::Paths
    }

    fn title_detail(&self, app: &App) -> String {
        match (app.diagnosis(), shown_path(app)) {
            (None, _) => String::new(),
            (Some(_), None) => "no path".to_string(),
            (Some(_), Some(path)) => {
                format!(
                    "{}: gain 1e{:.1} over {} hops",
                    app.trace.node(path.param).id,
                    path.log10_gain,
                    path.hops.len()
                )
            }
        }
    }

    fn draw(&self, app: &App, area: Rect, buf: &mut Buffer) {
        let theme = app.theme();
        let Some(diagnosed) = app.diagnosis() else {
            let text = if app.has_work() {
                "diagnosing …"
            } else {
                "no diagnosis yet: D runs it"
            };
            buf.set_stringn(area.x, area.y, text, area.width as usize, theme.muted);
            return;
        };
        let diagnosis = &diagnosed.diagnosis;
        let all = rows(app);
        let height = area.height as usize;
        let first = first_shown(app, height);
        let width = area.width as usize;
        let id_width = (width / 4).clamp(6, 20);
        let path = shown_path(app);
        // Running log10 of the product of gains, for the hops shown.
        let mut product: f64 = match (path, all.get(first)) {
            (Some(path), Some(Row::Hop(at))) => {
                path.hops[..*at].iter().map(|hop| hop.gain.log10()).sum()
            }
            _ => 0.0,
        };
        let (weakest, strongest) = path.map_or((None, None), |path| {
            (path.weakest().copied(), path.strongest().copied())
        });
        let id = |node: usize| app.trace.node(node).id.as_str();
        for (line, &row) in all
            .iter()
            .enumerate()
            .skip(first)
            .take(height)
            .map(|(at, row)| (at - first, row))
        {
            let spans: Vec<Span> = match row {
                Row::Path => {
                    let path = path.expect("a Path row has a path");
                    vec![
                        Span::styled(format!("dominant path to {}", id(path.param)), theme.title),
                        Span::styled(
                            format!(
                                "  {} hops, product 1e{:.2}, median hop ×{}   ] [ other params",
                                path.hops.len(),
                                path.log10_gain,
                                compact(path.median_gain())
                            ),
                            theme.muted,
                        ),
                    ]
                }
                Row::Hop(at) => {
                    let hop = path.expect("a Hop row has a path").hops[at];
                    product += hop.gain.log10();
                    let mark = if Some(hop) == strongest && hop.gain > 1.0 {
                        Span::styled("  ← largest", theme.flag_large)
                    } else if Some(hop) == weakest && hop.gain < 1.0 {
                        Span::styled("  ← smallest", theme.flag_small)
                    } else {
                        Span::raw("")
                    };
                    vec![
                        Span::styled(format!("{:>4} ", at + 1), theme.muted),
                        Span::styled(fit(id(hop.from), id_width), theme.text),
                        Span::styled(" → ", theme.muted),
                        Span::styled(fit(id(hop.to), id_width), theme.text),
                        Span::styled(
                            format!(" ×{:<12}", compact(hop.gain)),
                            gain_style(app, hop.gain),
                        ),
                        Span::styled(format!(" ∏ 1e{product:.2}"), theme.muted),
                        mark,
                    ]
                }
                Row::NoPath => {
                    let text = if diagnosis.paths.is_empty() {
                        "no parameter reaches the output through edges of known gain"
                    } else {
                        "the selected parameter has no path of known gain"
                    };
                    vec![Span::styled(text, theme.muted)]
                }
                Row::Groups => vec![Span::styled(
                    "groups by depth: ‖adjoint‖ (bar: 1e-8 … 1e8), ratio to the group above",
                    theme.title,
                )],
                Row::Group(at) => {
                    let group = &diagnosis.groups[at];
                    let name = if group.group.is_empty() {
                        "(no group)"
                    } else {
                        group.group.as_str()
                    };
                    let ratio = match group.ratio {
                        None => Span::styled("", theme.muted),
                        Some(ratio) if !ratio.is_finite() => {
                            Span::styled(format!(" ×{}", compact(ratio)), theme.text)
                        }
                        Some(ratio) if ratio < 1.0 => {
                            Span::styled(format!(" ↓×{}", compact(ratio)), theme.flag_small)
                        }
                        Some(ratio) => {
                            Span::styled(format!(" ↑×{}", compact(ratio)), theme.flag_large)
                        }
                    };
                    vec![
                        Span::styled(fit(name, id_width + 4) + " ", theme.text),
                        Span::styled(format!("d{:<4}", group.depth), theme.muted),
                        Span::styled(
                            magnitude_bar(Some(group.adjoint_norm), 10) + " ",
                            theme.chart_group,
                        ),
                        Span::styled(format!("{:<11}", compact(group.adjoint_norm)), theme.text),
                        ratio,
                    ]
                }
            };
            let y = area.y + line as u16;
            buf.set_line(area.x, y, &Line::from(spans), area.width);
            if first + line == app.paths_cursor && app.focus == PaneId::Paths {
                buf.set_style(Rect::new(area.x, y, area.width, 1), theme.selection);
            }
        }
    }

    fn move_cursor(&self, app: &mut App, motion: Move) {
        app.paths_cursor = motion.apply(app.paths_cursor, rows(app).len());
    }

    fn enter(&self, app: &mut App) {
        let target = match rows(app).get(app.paths_cursor) {
            Some(Row::Hop(at)) => shown_path(app).map(|path| path.hops[*at].to),
            Some(Row::Path) => shown_param(app),
            Some(Row::Group(at)) => app
                .diagnosis()
                .and_then(|diagnosed| first_of_group(app, &diagnosed.diagnosis.groups[*at])),
            _ => None,
        };
        if let Some(node) = target {
            app.jump(node);
        }
    }

    fn click(&self, app: &mut App, row: usize) {
        let height = crate::tui::layout::pane_area(app, PaneId::Paths)
            .map_or(1, |area| area.height.saturating_sub(2) as usize);
        let at = first_shown(app, height) + row;
        if at < rows(app).len() {
            app.paths_cursor = at;
        }
    }
}

/// A gain far from 1 is where growth or decay happens.
fn gain_style(app: &App, gain: f64) -> Style {
    let theme = app.theme();
    if gain > 2.0 {
        theme.flag_large
    } else if gain < 0.5 {
        theme.flag_small
    } else {
        theme.text
    }
}
