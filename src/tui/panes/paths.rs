//! Paths: the dominant path from the output to one parameter (the selected
//! node when it is one, else the one the advice names), hop by hop with each
//! hop's gain and the product so far; then the adjoint norm of every group
//! by depth as log-scale bars, with the ratio to the group above.

use super::{Ctx, Move, Pane, Spec, fit, scrolled};
use crate::diagnose::{DominantPath, GroupNorm};
use crate::format::compact;
use crate::ops::Op;
use crate::tui::action::{Action, PaneId};
use crate::tui::ids::NodeIx;
use crate::tui::layout::Slot;
use crate::tui::message::{Msg, Outbox};
use crate::tui::symbols::magnitude_bar;
use crate::tui::work::Job;
use ratatui::buffer::Buffer;
use ratatui::layout::Rect;
use ratatui::style::Style;
use ratatui::text::{Line, Span};

/// The pane's registration.
pub const SPEC: Spec = Spec {
    id: PaneId::new("Paths"),
    slot: Slot::Corner,
    about: "the dominant path to a parameter hop by hop, and each group's adjoint norm by depth",
    keys: &[
        ("Enter", Action::Enter, "select its node"),
        ("]", Action::NextParameter, "next parameter"),
        ("[", Action::PreviousParameter, "previous parameter"),
    ],
    make: || Box::new(PathsPane::default()),
};

/// The dominant-path and group-norm pane: the highlighted row, the first
/// row shown, and the parameter shown last.
#[derive(Debug, Default)]
pub struct PathsPane {
    cursor: usize,
    offset: usize,
    param: Option<usize>,
}

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
/// with a path, else the one shown last, else the diagnosis's headline parameter.
fn shown_param(ctx: &Ctx, last: Option<usize>) -> Option<usize> {
    let diagnosed = ctx.session.diagnosis()?;
    let trace = ctx.session.trace();
    let has_path = |node: usize| {
        trace.node(node).op == Op::Param && diagnosed.diagnosis.path_to(node).is_some()
    };
    let selected = ctx.session.selected().index();
    if has_path(selected) {
        return Some(selected);
    }
    last.filter(|&param| has_path(param))
        .or_else(|| diagnosed.headline_param())
}

fn shown_path<'a>(ctx: &'a Ctx, last: Option<usize>) -> Option<&'a DominantPath> {
    shown_param(ctx, last).and_then(|param| ctx.session.diagnosis()?.diagnosis.path_to(param))
}

fn rows(ctx: &Ctx, last: Option<usize>) -> Vec<Row> {
    let Some(diagnosed) = ctx.session.diagnosis() else {
        return Vec::new();
    };
    let mut rows = Vec::new();
    match shown_path(ctx, last) {
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

/// The first node of `group` in sweep order.
fn first_of_group(ctx: &Ctx, group: &GroupNorm) -> Option<usize> {
    let trace = ctx.session.trace();
    trace
        .sweep_order()
        .iter()
        .copied()
        .find(|&node| trace.node(node).group == group.group)
}

impl Pane for PathsPane {
    fn title(&self, ctx: &Ctx) -> String {
        match (ctx.session.diagnosis(), shown_path(ctx, self.param)) {
            (None, _) => String::new(),
            (Some(_), None) => "no path".to_string(),
            (Some(_), Some(path)) => {
                format!(
                    "{}: gain 1e{:.1} over {} hops",
                    ctx.session.trace().node(path.param).id,
                    path.log10_gain,
                    path.hops.len()
                )
            }
        }
    }

    fn draw(&self, ctx: &Ctx, area: Rect, buf: &mut Buffer) {
        let theme = ctx.theme;
        let Some(diagnosed) = ctx.session.diagnosis() else {
            let diagnosing = ctx
                .work
                .is_some_and(|running| matches!(running.job, Job::Diagnose(_)));
            let text = if diagnosing {
                "diagnosing …".to_string()
            } else {
                ctx.say("no diagnosis yet: {key:diagnose} runs it")
            };
            buf.set_stringn(area.x, area.y, text, area.width as usize, theme.muted);
            return;
        };
        let diagnosis = &diagnosed.diagnosis;
        let logs: Vec<f64> = diagnosis
            .groups
            .iter()
            .map(|group| group.adjoint_norm)
            .filter(|norm| norm.is_finite() && *norm > 0.0)
            .map(f64::log10)
            .collect();
        let group_range = if logs.is_empty() {
            (-1, 1)
        } else {
            let low = logs.iter().copied().fold(f64::INFINITY, f64::min).floor() as i32;
            let high = logs
                .iter()
                .copied()
                .fold(f64::NEG_INFINITY, f64::max)
                .ceil() as i32;
            (low, high.max(low + 1))
        };
        let all = rows(ctx, self.param);
        let height = area.height as usize;
        let first = scrolled(self.offset, self.cursor, height);
        let width = area.width as usize;
        let path = shown_path(ctx, self.param);
        let trace = ctx.session.trace();
        let id_width = path
            .map(|path| {
                path.hops
                    .iter()
                    .map(|hop| {
                        trace
                            .node(hop.from)
                            .id
                            .chars()
                            .count()
                            .max(trace.node(hop.to).id.chars().count())
                    })
                    .max()
                    .unwrap_or(4)
            })
            .unwrap_or(4)
            .clamp(4, (width / 4).max(4));
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
        let id = |node: usize| trace.node(node).id.as_str();
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
                            ctx.say(&format!(
                                "  {} hops, product 1e{:.2}, median hop ×{}   {{key:next_parameter}} {{key:previous_parameter}} other params",
                                path.hops.len(),
                                path.log10_gain,
                                compact(path.median_gain())
                            )),
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
                            gain_style(ctx, hop.gain),
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
                    format!(
                        "groups by depth: ‖adjoint‖ (bar: 1e{} … 1e{}), ratio to the group above",
                        group_range.0, group_range.1
                    ),
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
                            magnitude_bar(Some(group.adjoint_norm), 10, group_range) + " ",
                            theme.chart_group,
                        ),
                        Span::styled(format!("{:<11}", compact(group.adjoint_norm)), theme.text),
                        ratio,
                    ]
                }
            };
            let y = area.y + line as u16;
            buf.set_line(area.x, y, &Line::from(spans), area.width);
            if first + line == self.cursor && ctx.focused {
                buf.set_style(Rect::new(area.x, y, area.width, 1), theme.selection);
            }
        }
    }

    fn handle(&mut self, action: Action, ctx: &Ctx, out: &mut Outbox) {
        let all = rows(ctx, self.param);
        if let Some(motion) = Move::of(action, ctx.rows) {
            self.cursor = motion.apply(self.cursor, all.len());
            self.offset = scrolled(self.offset, self.cursor, ctx.rows);
            return;
        }
        match action {
            Action::Enter => {
                let target = match all.get(self.cursor) {
                    Some(Row::Hop(at)) => shown_path(ctx, self.param).map(|path| path.hops[*at].to),
                    Some(Row::Path) => shown_param(ctx, self.param),
                    Some(Row::Group(at)) => ctx.session.diagnosis().and_then(|diagnosed| {
                        first_of_group(ctx, &diagnosed.diagnosis.groups[*at])
                    }),
                    _ => None,
                };
                if let Some(node) = target {
                    out.send(Msg::Jump(NodeIx::new(node)));
                }
            }
            Action::Click(_, row) => {
                let at = scrolled(self.offset, self.cursor, ctx.rows) + row as usize;
                if at < all.len() {
                    self.cursor = at;
                }
            }
            Action::NextParameter | Action::PreviousParameter => {
                let Some(diagnosed) = ctx.session.diagnosis() else {
                    out.send(Msg::Status(
                        "no diagnosis yet: {key:diagnose} runs it".to_string(),
                    ));
                    return;
                };
                let params: Vec<usize> = diagnosed
                    .diagnosis
                    .paths
                    .iter()
                    .map(|path| path.param)
                    .collect();
                if params.is_empty() {
                    out.send(Msg::Status(
                        "no parameter reaches the output through edges of known gain".to_string(),
                    ));
                    return;
                }
                let shown = shown_param(ctx, self.param);
                let at = shown.and_then(|param| params.iter().position(|&listed| listed == param));
                let len = params.len();
                let next = match at {
                    Some(at) if action == Action::NextParameter => (at + 1) % len,
                    Some(at) => (at + len - 1) % len,
                    None => 0,
                };
                self.param = Some(params[next]);
                self.cursor = 0;
                out.send(Msg::Jump(NodeIx::new(params[next])));
            }
            _ => {}
        }
    }

    fn sync(&mut self, ctx: &Ctx, _out: &mut Outbox) {
        let param = shown_param(ctx, self.param);
        if param != self.param {
            (self.param, self.cursor, self.offset) = (param, 0, 0);
        }
        self.cursor = self
            .cursor
            .min(rows(ctx, self.param).len().saturating_sub(1));
    }
}

/// A gain far from 1 is where growth or decay happens.
fn gain_style(ctx: &Ctx, gain: f64) -> Style {
    let theme = ctx.theme;
    if gain > 2.0 {
        theme.flag_large
    } else if gain < 0.5 {
        theme.flag_small
    } else {
        theme.text
    }
}
