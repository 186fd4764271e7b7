//! Order: every node that reaches the output in sweep order, with its state
//! marker, op, group, adjoint norm, log-scale bar and flags. Only the visible
//! window is built, so a million rows cost what fifty do.

use super::{Move, Pane, fit};
use crate::format::compact;
use crate::tui::action::PaneId;
use crate::tui::app::App;
use crate::tui::symbols::{self, CURRENT, DONE, PENDING, magnitude_bar};
use ratatui::buffer::Buffer;
use ratatui::layout::Rect;
use ratatui::text::{Line, Span};

/// The sweep order pane.
pub struct OrderPane;

/// The first step shown, so that the selection is in view with `rows` rows.
fn offset(app: &App, rows: usize) -> usize {
    let len = app.order_len();
    let mut offset = app.order_offset.min(len.saturating_sub(1));
    if let Some(rank) = app.order_rank(app.selected) {
        if rank < offset {
            offset = rank;
        } else if rank >= offset + rows {
            offset = rank + 1 - rows;
        }
    }
    offset
}

impl Pane for OrderPane {
    fn id(&self) -> PaneId {
        PaneId::Order
    }

    fn title_detail(&self, app: &App) -> String {
        match &app.forward {
            Some(forward) => format!(
                "forward · tangent step {}/{}",
                forward.sweep.cursor(),
                forward.sweep.len()
            ),
            None => format!("step {}/{}", app.sweep.cursor(), app.sweep.len()),
        }
    }

    fn draw(&self, app: &App, area: Rect, buf: &mut Buffer) {
        if area.height < 2 || area.width < 20 {
            return;
        }
        if let Some(forward) = &app.forward {
            // Fewer rows: the foot compares the two modes.
            let first = offset(
                app,
                (area.height as usize)
                    .saturating_sub(super::order_forward::FOOT + 1)
                    .max(1),
            );
            super::order_forward::draw(app, forward, first, area, buf);
            return;
        }
        let theme = app.theme();
        let order = app.trace.sweep_order();
        let width = area.width as usize;
        let step_width = order.len().to_string().len();
        // Narrow panes keep the id readable: a shorter bar and no op column.
        let bar_width = if width >= 48 { 8 } else { 4 };
        let fixed = 2 + step_width + 1 + 10 + 1 + bar_width + 1 + 3;
        let op_width = if width >= 52 { 9 } else { 0 };
        let rest = width.saturating_sub(fixed + op_width + 1);
        let group_width = if width >= 64 { rest * 2 / 5 } else { 0 };
        let id_width = rest - group_width;
        let header = format!(
            "  {:>step_width$} {} {}{}{:>10} {}",
            "#",
            fit("node", id_width),
            fit("op", op_width),
            if group_width > 0 {
                fit("group", group_width) + " "
            } else {
                String::new()
            },
            "‖adjoint‖",
            "log10"
        );
        buf.set_stringn(area.x, area.y, header, width, theme.muted);
        let rows = area.height as usize - 1;
        let first = offset(app, rows);
        let current = app.sweep.cursor();
        for (line, rank) in (first..order.len().min(first + rows)).enumerate() {
            let node = order[rank];
            let recorded = app.trace.node(node);
            let (marker, marker_style) = match rank.cmp(&current) {
                std::cmp::Ordering::Less => (DONE, theme.done),
                std::cmp::Ordering::Equal => (CURRENT, theme.current),
                std::cmp::Ordering::Greater => (PENDING, theme.pending),
            };
            let norm = app.tally.norm(node);
            let norm_text = norm.map_or("—".to_string(), compact);
            let id_style = if rank == current {
                theme.current
            } else {
                theme.text
            };
            let mut spans = vec![
                Span::styled(format!("{marker} "), marker_style),
                Span::styled(format!("{:>step_width$} ", rank + 1), theme.muted),
                Span::styled(fit(&recorded.id, id_width) + " ", id_style),
                Span::styled(fit(&recorded.op_name, op_width), theme.muted),
            ];
            if group_width > 0 {
                spans.push(Span::styled(
                    fit(&recorded.group, group_width) + " ",
                    theme.muted,
                ));
            }
            spans.push(Span::styled(format!("{norm_text:>10} "), theme.text));
            let bar_style = if norm.is_some_and(|n| !n.is_finite()) {
                theme.flag_adjoint
            } else {
                theme.chart
            };
            spans.push(Span::styled(
                magnitude_bar(norm, bar_width) + " ",
                bar_style,
            ));
            for &kind in app.tally.flags_at(node) {
                spans.push(Span::styled(
                    symbols::flag_symbol(kind),
                    symbols::flag_style(theme, kind),
                ));
            }
            let y = area.y + 1 + line as u16;
            buf.set_line(area.x, y, &Line::from(spans), area.width);
            if node == app.selected {
                buf.set_style(Rect::new(area.x, y, area.width, 1), theme.selection);
            }
        }
    }

    fn move_cursor(&self, app: &mut App, motion: Move) {
        let len = app.order_len();
        let at = app
            .order_rank(app.selected)
            .unwrap_or(app.sweep.cursor().min(len - 1));
        let rank = motion.apply(at, len);
        app.select(app.order_node(rank));
    }

    /// Runs (or steps back) the sweep until the selected node is the current one.
    fn enter(&self, app: &mut App) {
        if let Some(forward) = app.forward.as_mut() {
            let node = app.selected;
            forward.seek(node);
            app.select(node);
            return;
        }
        if let Some(rank) = app.trace.sweep_rank(app.selected) {
            let node = app.selected;
            app.seek(rank);
            app.select(node);
        }
    }

    fn click(&self, app: &mut App, row: usize) {
        if row == 0 {
            return;
        }
        let rows = crate::tui::layout::pane_area(app, PaneId::Order)
            .map_or(1, |area| area.height.saturating_sub(3) as usize);
        let rows = if app.forward.is_some() {
            rows.saturating_sub(super::order_forward::FOOT).max(1)
        } else {
            rows
        };
        let rank = offset(app, rows) + row - 1;
        if rank < app.order_len() {
            app.select(app.order_node(rank));
        }
    }
}
