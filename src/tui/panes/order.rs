//! Order: every node that reaches the output in sweep order, with its state
//! marker, op, group, adjoint (a scalar with its sign, a tensor's norm), a
//! log-scale bar over the range the sweep has met, and its flags. Only the
//! visible window is built, so a million rows cost what fifty do; columns
//! are as wide as the longest id and number on screen.

use super::{Ctx, Move, Pane, Spec, fit, scrolled};
use crate::format::{compact, readable};
use crate::tui::action::{Action, PaneId};
use crate::tui::layout::Slot;
use crate::tui::message::{Msg, Outbox};
use crate::tui::symbols::{self, CURRENT, DONE, PENDING, magnitude_bar};
use ratatui::buffer::Buffer;
use ratatui::layout::Rect;
use ratatui::text::{Line, Span};

/// The pane's registration.
pub const SPEC: Spec = Spec {
    id: PaneId::new("Order"),
    slot: Slot::Sweep,
    about: "every node in sweep order, its adjoint with a magnitude bar and its flags",
    keys: &[("Enter", Action::Enter, "run the sweep to here")],
    make: || Box::new(OrderPane::default()),
};

/// The sweep order pane: its scroll position.
#[derive(Debug, Default)]
pub struct OrderPane {
    /// First row shown.
    offset: usize,
}

impl OrderPane {
    /// The first row shown with `rows` list rows, the selection in view.
    fn first(&self, ctx: &Ctx, rows: usize) -> usize {
        let session = ctx.session;
        let len = session.order_len();
        // Never past the last full page, so a longer pane shows more rows.
        let offset = self.offset.min(len.saturating_sub(rows));
        match session.order_row(session.selected()) {
            Some(row) => scrolled(offset, row, rows),
            None => offset,
        }
    }

    /// List rows (without the header, and without forward mode's foot).
    fn list_rows(ctx: &Ctx, height: usize) -> usize {
        let foot = if ctx.session.forward().is_some() {
            super::order_forward::FOOT
        } else {
            0
        };
        height.saturating_sub(1 + foot).max(1)
    }
}

impl Pane for OrderPane {
    fn title(&self, ctx: &Ctx) -> String {
        match ctx.session.forward() {
            Some(forward) => format!(
                "forward · tangent step {}/{}",
                forward.sweep.cursor(),
                forward.sweep.len()
            ),
            None => format!(
                "step {}/{}",
                ctx.session.sweep().cursor(),
                ctx.session.sweep().len()
            ),
        }
    }

    fn draw(&self, ctx: &Ctx, area: Rect, buf: &mut Buffer) {
        if area.height < 2 || area.width < 20 {
            return;
        }
        let first = self.first(ctx, Self::list_rows(ctx, area.height as usize));
        if let Some(forward) = ctx.session.forward() {
            super::order_forward::draw(ctx, forward, first, area, buf);
            return;
        }
        draw_reverse(ctx, first, area, buf);
    }

    fn handle(&mut self, action: Action, ctx: &Ctx, out: &mut Outbox) {
        let session = ctx.session;
        let len = session.order_len();
        let rows = Self::list_rows(ctx, ctx.rows);
        let at = session
            .order_row(session.selected())
            .unwrap_or(session.sweep().cursor().min(len.saturating_sub(1)));
        if let Some(motion) = Move::of(action, rows) {
            out.send(Msg::Select(session.order_node(motion.apply(at, len))));
            return;
        }
        match action {
            Action::Enter => {
                let node = session.selected();
                if session.forward().is_some() {
                    out.send(Msg::SeekTangent(node));
                } else if let Some(step) = node.step(session.trace()) {
                    out.send(Msg::Seek(step));
                }
            }
            Action::Click(_, row) if row > 0 => {
                let row = self.first(ctx, rows) + row as usize - 1;
                if row < len {
                    out.send(Msg::Select(session.order_node(row)));
                }
            }
            _ => {}
        }
    }

    fn sync(&mut self, ctx: &Ctx, _out: &mut Outbox) {
        // A pane out of sight keeps its place.
        if ctx.rows > 0 {
            let rows = Self::list_rows(ctx, ctx.rows);
            self.offset = self.first(ctx, rows);
        }
    }
}

/// The reverse sweep's rows from `first`.
fn draw_reverse(ctx: &Ctx, first: usize, area: Rect, buf: &mut Buffer) {
    let theme = ctx.theme;
    let session = ctx.session;
    let trace = session.trace();
    let tally = session.tally();
    let order = trace.sweep_order();
    let width = area.width as usize;
    let rows = area.height as usize - 1;
    let shown: Vec<usize> = (first..order.len().min(first + rows)).collect();
    // Each adjoint exactly, and in six digits for when the exact one does not fit.
    let adjoint_text = |node: usize, exact: bool| {
        let value = tally.signed(node)?;
        Some(if !trace.node(node).value.shape().is_empty() {
            format!("‖·‖ {}", compact(value))
        } else if exact {
            readable(value, trace.node_dtype(node))
        } else {
            compact(value)
        })
    };
    let widest = |exact: bool| {
        shown
            .iter()
            .filter_map(|&rank| adjoint_text(order[rank], exact))
            .map(|text| text.chars().count())
            .max()
            .unwrap_or(1)
            .max("adjoint".len())
    };
    let longest =
        |of: &dyn Fn(usize) -> usize| shown.iter().map(|&rank| of(order[rank])).max().unwrap_or(0);
    // Columns as wide as what is on screen: the ids first, whole where they
    // fit; then the adjoints, exact where they fit, else in six digits; then
    // op and group with what is left.
    let step_width = order.len().to_string().len();
    let bar_width = if width >= 48 { 8 } else { 4 };
    let room = width.saturating_sub(2 + step_width + 1 + 1 + bar_width + 1 + 3);
    let (exact_width, short_width) = (widest(true), widest(false));
    let longest_id = longest(&|node| trace.node(node).id.chars().count()).max(4);
    let id_width = longest_id.min(room.saturating_sub(short_width + 1).max(4));
    let room = room.saturating_sub(id_width + 1);
    let exact = exact_width <= room;
    let number_width = if exact { exact_width } else { short_width };
    let texts: Vec<Option<String>> = shown
        .iter()
        .map(|&rank| adjoint_text(order[rank], exact))
        .collect();
    let room = room.saturating_sub(number_width);
    let op_width = longest(&|node| trace.node(node).op_name.chars().count()).max(2);
    let op_width = if room > op_width { op_width } else { 0 };
    let room = room.saturating_sub(op_width + usize::from(op_width > 0));
    let group_width = longest(&|node| trace.node(node).group.chars().count());
    let group_width = if room >= 8 {
        group_width.min(room - 1)
    } else {
        0
    };
    let (low, high) = tally.decades();
    let mut header = format!("  {:>step_width$} {} ", "#", fit("node", id_width));
    if op_width > 0 {
        header += &(fit("op", op_width) + " ");
    }
    if group_width > 0 {
        header += &(fit("group", group_width) + " ");
    }
    header += &format!("{:>number_width$} 1e{low}…1e{high}", "adjoint");
    buf.set_stringn(area.x, area.y, header, width, theme.muted);
    let current = session.sweep().cursor();
    for (line, (&rank, text)) in shown.iter().zip(&texts).enumerate() {
        let node = order[rank];
        let recorded = trace.node(node);
        let (marker, marker_style) = match rank.cmp(&current) {
            std::cmp::Ordering::Less => (DONE, theme.done),
            std::cmp::Ordering::Equal => (CURRENT, theme.current),
            std::cmp::Ordering::Greater => (PENDING, theme.pending),
        };
        let id_style = if rank == current {
            theme.current
        } else {
            theme.text
        };
        let mut spans = vec![
            Span::styled(format!("{marker} "), marker_style),
            Span::styled(format!("{:>step_width$} ", rank + 1), theme.muted),
            Span::styled(fit(&recorded.id, id_width) + " ", id_style),
        ];
        if op_width > 0 {
            spans.push(Span::styled(
                fit(&recorded.op_name, op_width) + " ",
                theme.muted,
            ));
        }
        if group_width > 0 {
            spans.push(Span::styled(
                fit(&recorded.group, group_width) + " ",
                theme.muted,
            ));
        }
        let norm = tally.norm(node);
        spans.push(Span::styled(
            format!("{:>number_width$} ", text.as_deref().unwrap_or("—")),
            theme.text,
        ));
        let bar_style = if norm.is_some_and(|n| !n.is_finite()) {
            theme.flag_adjoint
        } else {
            theme.chart
        };
        spans.push(Span::styled(
            magnitude_bar(norm, bar_width, (low, high)) + " ",
            bar_style,
        ));
        for &kind in tally.flags_at(node) {
            spans.push(Span::styled(
                symbols::flag_symbol(kind),
                symbols::flag_style(theme, kind),
            ));
        }
        let y = area.y + 1 + line as u16;
        buf.set_line(area.x, y, &Line::from(spans), area.width);
        if node == session.selected().index() {
            buf.set_style(Rect::new(area.x, y, area.width, 1), theme.selection);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::tui::panes::tests::{Fixture, assert_lines};

    #[test]
    fn rows_show_signed_adjoints_and_bars_over_the_range_met() {
        // f = −3·x at x = 2: the seed 1, then x's adjoint −3 (closed form: d(−3x)/dx = −3).
        let mut tape = crate::record::Tape::new("negative", crate::dtype::Dtype::F64);
        let x = tape.param("x", 2.0);
        let k = tape.constant("k", -3.0);
        let f = tape.mul(k, x);
        let f = tape.rename(f, "f");
        let mut fixture = Fixture::new(tape.finish(f));
        fixture.app.update(Action::RunToEnd);
        let pane = OrderPane::default();
        let buffer = fixture.render(&pane, PaneId::new("Order"), 40, 4);
        // Sweep order: f, then k and x; ∂f/∂k = x = 2 and ∂f/∂x = k = −3. The
        // bars span the decades met, 1e0 to 1e1: log10 2 · 32 eighths ≈ 10, log10 3 · 32 ≈ 15.
        assert_lines(
            &buffer,
            [
                "  # node op    adjoint 1e0…1e1          ",
                "✓ 1 f    mul         1 ▏                ",
                "✓ 2 k    const       2 █▎               ",
                "✓ 3 x    param      -3 █▉               ",
            ],
        );
    }
}
