//! Inflow: the contributions the selected node has received so far, in
//! order, each with its consumer, the value added and the running adjoint,
//! then the consumers still to come, so a branch point is seen filling up.
//! In forward mode: the tangents flowing in from its inputs, each with the
//! partial it is multiplied by, and where its own tangent goes next.

use super::{Ctx, Move, Pane, Spec, fit, value_text};
use crate::format::readable;
use crate::tensor::Value;
use crate::tui::action::{Action, PaneId};
use crate::tui::ids::NodeIx;
use crate::tui::layout::Slot;
use crate::tui::message::Outbox;
use crate::tui::neighbours::Side;
use ratatui::buffer::Buffer;
use ratatui::layout::Rect;
use ratatui::style::Modifier;
use ratatui::text::{Line, Span};
use ratatui::widgets::{Paragraph, Widget};

/// The pane's registration.
pub const SPEC: Spec = Spec {
    id: PaneId::new("Inflow"),
    slot: Slot::Below,
    about: "the contributions the selected node has received, and those to come",
    keys: &[],
    make: || Box::new(InflowPane::default()),
};

/// The accumulation pane: its scroll, for the node it was scrolled on.
#[derive(Debug, Default)]
pub struct InflowPane {
    scroll: usize,
    node: Option<NodeIx>,
}

impl Pane for InflowPane {
    fn title(&self, ctx: &Ctx) -> String {
        ctx.session.id(ctx.session.selected()).to_string()
    }

    fn draw(&self, ctx: &Ctx, area: Rect, buf: &mut Buffer) {
        let node = ctx.session.selected();
        let scroll = if self.node == Some(node) {
            self.scroll
        } else {
            0
        };
        let lines = if ctx.session.forward().is_some() {
            tangent_lines(ctx, node, area.width as usize)
        } else {
            adjoint_lines(ctx, node, scroll, area)
        };
        Paragraph::new(lines).render(area, buf);
    }

    fn handle(&mut self, action: Action, ctx: &Ctx, _out: &mut Outbox) {
        let node = ctx.session.selected();
        if self.node != Some(node) {
            (self.node, self.scroll) = (Some(node), 0);
        }
        if let Some(motion) = Move::of(action, ctx.rows) {
            let len = ctx
                .session
                .sweep()
                .ledger()
                .map_or(0, |ledger| ledger.received(node.index()).len());
            self.scroll = motion.apply(self.scroll, len);
        }
    }

    fn sync(&mut self, ctx: &Ctx, _out: &mut Outbox) {
        if self.node != Some(ctx.session.selected()) {
            (self.node, self.scroll) = (Some(ctx.session.selected()), 0);
        }
    }
}

/// Reverse mode: the seed, what was received, what is still to come.
fn adjoint_lines<'a>(ctx: &Ctx, node: NodeIx, scroll: usize, area: Rect) -> Vec<Line<'a>> {
    let theme = ctx.theme;
    let session = ctx.session;
    let trace = session.trace();
    let dtype = trace.node_dtype(node.index());
    let width = area.width as usize;
    let received = session
        .sweep()
        .ledger()
        .map(|ledger| ledger.received(node.index()))
        .unwrap_or_default();
    let pending = session.sweep().pending_consumers(node.index());
    // Exact numbers where two of them fit beside the ids, else six digits.
    let room = width.saturating_sub(4 + 1 + 14 + 1 + 3 + 1 + 1) / 2;
    let text = |value: &Value| value_text(value, dtype, room.max(12));
    let values: Vec<(String, String)> = received
        .iter()
        .map(|entry| (text(&entry.value), text(&entry.after)))
        .collect();
    // Columns as wide as the longest id and number shown.
    let from_width = received
        .iter()
        .map(|entry| trace.node(entry.consumer).id.chars().count())
        .chain(
            pending
                .iter()
                .map(|(consumer, _)| trace.node(*consumer).id.chars().count()),
        )
        .max()
        .unwrap_or(4)
        .clamp(4, (width / 3).max(4));
    let number_width = values
        .iter()
        .map(|(value, _)| value.chars().count())
        .max()
        .unwrap_or(0)
        .max("contribution".len());
    let mut lines: Vec<Line> = Vec::new();
    if node.index() == trace.output() {
        lines.push(Line::from(vec![
            Span::styled("seed     ", theme.muted),
            Span::styled(value_text(trace.seed(), dtype, 24), theme.text),
            Span::styled("  (the output's adjoint to start from)", theme.muted),
        ]));
    }
    if node.step(trace).is_none() {
        lines.push(Line::styled(
            "this node does not reach the output: it receives nothing",
            theme.muted,
        ));
    } else if received.is_empty() && node.index() != trace.output() {
        lines.push(Line::styled("nothing received yet", theme.muted));
    }
    if !received.is_empty() {
        lines.push(Line::styled(
            format!(
                "{:>4} {} {:>3} {} {}",
                "step",
                fit("from", from_width),
                "in",
                fit("contribution", number_width),
                "adjoint after"
            ),
            theme.muted,
        ));
    }
    for (entry, (value, after)) in received.iter().zip(&values).skip(scroll) {
        lines.push(Line::from(vec![
            Span::styled(format!("{:>4} ", entry.step + 1), theme.muted),
            Span::styled(
                fit(&trace.node(entry.consumer).id, from_width) + " ",
                theme.done,
            ),
            Span::styled(format!("{:>3} ", entry.slot), theme.muted),
            Span::styled(fit(value, number_width) + " ", theme.text),
            Span::styled(after.clone(), theme.text.add_modifier(Modifier::BOLD)),
        ]));
    }
    if node.step(trace).is_some() {
        if pending.is_empty() && received.is_empty() && node.index() == trace.output() {
            lines.push(Line::styled(
                "complete: the seed is its whole adjoint",
                theme.done,
            ));
        } else if pending.is_empty() {
            lines.push(Line::styled(
                format!(
                    "complete: {} contribution(s), the adjoint is final",
                    received.len()
                ),
                theme.done,
            ));
        } else {
            lines.push(Line::styled(
                format!("to come ({}):", pending.len()),
                theme.muted,
            ));
            for (consumer, slot) in pending.iter().take(area.height as usize) {
                let rank = trace.sweep_rank(*consumer).map_or(0, |rank| rank + 1);
                lines.push(Line::from(vec![
                    Span::styled(format!("{rank:>4} "), theme.muted),
                    Span::styled(
                        fit(&trace.node(*consumer).id, from_width) + " ",
                        theme.pending,
                    ),
                    Span::styled(format!("{slot:>3}"), theme.muted),
                ]));
            }
        }
    }
    lines
}

/// Forward mode: each input's tangent with the partial that weighs it, and
/// the consumers the node's own tangent flows on to.
fn tangent_lines<'a>(ctx: &Ctx, node: NodeIx, width: usize) -> Vec<Line<'a>> {
    let theme = ctx.theme;
    let session = ctx.session;
    let trace = session.trace();
    let Some(forward) = session.forward() else {
        return Vec::new();
    };
    let mut lines = Vec::new();
    let recorded = trace.node(node.index());
    if recorded.inputs.is_empty() {
        lines.push(Line::styled(
            "a leaf: its tangent is the direction's entry here, nothing flows in",
            theme.muted,
        ));
    } else {
        lines.push(Line::styled(
            "tangents flowing in: each input's tangent × the partial on its edge",
            theme.muted,
        ));
        let id_width = recorded
            .inputs
            .iter()
            .map(|&input| trace.node(input).id.chars().count())
            .max()
            .unwrap_or(4)
            .clamp(4, (width / 3).max(4));
        for edge in session
            .detail()
            .edges
            .iter()
            .filter(|edge| edge.side == Side::Input)
        {
            lines.push(Line::from(vec![
                Span::styled(format!("{:>3} ", edge.slot), theme.muted),
                Span::styled(fit(&trace.node(edge.node).id, id_width) + " ", theme.text),
                Span::styled(
                    format!("tangent {} ", forward.tangent_text(edge.node, 24)),
                    theme.text,
                ),
                Span::styled(format!("× ∂ {}", edge.partial), theme.muted),
            ]));
        }
    }
    let tangent = forward.tangent_text(node.index(), 24);
    let dtype = trace.node_dtype(node.index());
    let own = match forward.tangent(node.index()) {
        None => "pending: the tangent sweep has not reached it".to_string(),
        Some(Some(Value::Scalar(t))) => format!("its tangent: {}", readable(*t, dtype)),
        Some(_) => format!("its tangent: {tangent}"),
    };
    lines.push(Line::styled(own, theme.title));
    let consumers = trace.consumers(node.index());
    if !consumers.is_empty() {
        let ids: Vec<&str> = consumers
            .iter()
            .map(|&(consumer, _)| trace.node(consumer).id.as_str())
            .collect();
        lines.push(Line::styled(
            fit(&format!("flows on to: {}", ids.join(", ")), width),
            theme.muted,
        ));
    }
    lines
}

#[cfg(test)]
mod tests {
    use crate::dtype::Dtype;
    use crate::record::Tape;
    use crate::tui::action::Action;
    use crate::tui::message::Msg;
    use crate::tui::panes::tests::{Fixture, assert_lines};

    #[test]
    fn a_node_used_twice_by_one_multiply_fills_up_in_two_contributions() {
        // y = x·x at x = 3: ∂y/∂x = 2x = 6, in two contributions of 3 (closed form).
        let mut tape = Tape::new("square", Dtype::F64);
        let x = tape.param("x", 3.0);
        let y = tape.mul(x, x);
        let y = tape.rename(y, "y");
        let mut fixture = Fixture::new(tape.finish(y));
        let x = fixture.app.session().find("x").unwrap();
        fixture.app.apply(Msg::Select(x));
        assert_lines(
            &fixture.render_own("Inflow", 44, 4),
            [
                "nothing received yet                        ",
                "to come (2):                                ",
                "   1 y      0                               ",
                "   1 y      1                               ",
            ],
        );
        fixture.app.update(Action::Step);
        assert_lines(
            &fixture.render_own("Inflow", 44, 4),
            [
                "step from  in contribution adjoint after    ",
                "   1 y      0 3            3                ",
                "   1 y      1 3            6                ",
                "complete: 2 contribution(s), the adjoint is ",
            ],
        );
    }
}
