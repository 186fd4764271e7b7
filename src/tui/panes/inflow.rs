//! Inflow: the contributions the selected node has received so far, in
//! order, each with its consumer, the value added and the running adjoint,
//! then the consumers still to come, so a branch point is seen filling up.

use super::{Move, Pane, fit, value_text};
use crate::tui::action::PaneId;
use crate::tui::app::App;
use ratatui::buffer::Buffer;
use ratatui::layout::Rect;
use ratatui::text::{Line, Span};
use ratatui::widgets::{Paragraph, Widget};

/// The accumulation pane.
pub struct InflowPane;

impl Pane for InflowPane {
    fn id(&self) -> PaneId {
        PaneId::Inflow
    }

    fn title_detail(&self, app: &App) -> String {
        app.trace.node(app.selected).id.clone()
    }

    fn draw(&self, app: &App, area: Rect, buf: &mut Buffer) {
        let theme = app.theme();
        let trace = app.trace;
        let node = app.selected;
        let width = area.width as usize;
        let received = app
            .sweep
            .ledger()
            .map(|ledger| ledger.received(node))
            .unwrap_or_default();
        let pending = app.sweep.pending_consumers(node);
        let from_width = (width / 5).clamp(6, 14);
        let number_width = width.saturating_sub(5 + from_width + 1 + 4 + 1) / 2;
        let mut lines: Vec<Line> = Vec::new();
        if node == trace.output() {
            lines.push(Line::from(vec![
                Span::styled("seed     ", theme.muted),
                Span::styled(value_text(trace.seed(), number_width), theme.text),
                Span::styled("  (the output's adjoint to start from)", theme.muted),
            ]));
        }
        if trace.sweep_rank(node).is_none() {
            lines.push(Line::styled(
                "this node does not reach the output: it receives nothing",
                theme.muted,
            ));
        } else if received.is_empty() && node != trace.output() {
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
        let body: Vec<Line> = received
            .iter()
            .map(|entry| {
                Line::from(vec![
                    Span::styled(format!("{:>4} ", entry.step + 1), theme.muted),
                    Span::styled(
                        fit(&trace.node(entry.consumer).id, from_width) + " ",
                        theme.done,
                    ),
                    Span::styled(format!("{:>3} ", entry.slot), theme.muted),
                    Span::styled(
                        fit(&value_text(&entry.value, number_width), number_width) + " ",
                        theme.text,
                    ),
                    Span::styled(
                        value_text(&entry.after, number_width),
                        theme.text.add_modifier(ratatui::style::Modifier::BOLD),
                    ),
                ])
            })
            .collect();
        lines.extend(body.into_iter().skip(app.inflow_scroll));
        if trace.sweep_rank(node).is_some() {
            if pending.is_empty() {
                let count = received.len();
                lines.push(Line::styled(
                    format!("complete: {count} contribution(s), the adjoint is final"),
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
        Paragraph::new(lines).render(area, buf);
    }

    fn move_cursor(&self, app: &mut App, motion: Move) {
        let len = app
            .sweep
            .ledger()
            .map_or(0, |ledger| ledger.received(app.selected).len());
        app.inflow_scroll = motion.apply(app.inflow_scroll, len);
    }
}
