//! Order in forward mode: every node in recording order with its state in
//! the tangent sweep and its dual number (value, tangent), and at the foot
//! the directional derivative beside the reverse sweep's ⟨v, ∇f⟩.

use super::{Ctx, fit, fit_number, value_text};
use crate::format::readable;
use crate::tui::forward::Forward;
use crate::tui::symbols::{AGREES, CURRENT, DIFFERS, DONE, PENDING};
use crate::verify::VerifyOptions;
use ratatui::buffer::Buffer;
use ratatui::layout::Rect;
use ratatui::text::{Line, Span};

/// Rows of Order's foot in forward mode.
pub const FOOT: usize = 3;

/// The foot: what the tangent sweep is computing, or at the end the
/// directional derivative beside the reverse sweep's ⟨v, ∇f⟩ and whether they agree.
pub fn foot<'a>(ctx: &Ctx, forward: &Forward, width: usize) -> [Line<'a>; FOOT] {
    let theme = ctx.theme;
    let number_width = width.saturating_sub(17).max(8);
    match forward.comparison() {
        Some(comparison) => {
            let agrees = comparison.agrees(VerifyOptions::default().tolerance);
            let (mark, verdict, style) = if agrees {
                (AGREES, "agree", theme.done)
            } else {
                (DIFFERS, "DISAGREE", theme.flag_value)
            };
            let number = |label: &str, x: f64, by: &str| {
                Line::from(vec![
                    Span::styled(label.to_string(), theme.muted),
                    Span::styled(
                        fit_number(x, crate::dtype::Dtype::F64, number_width),
                        theme.text,
                    ),
                    Span::styled(format!("  {by}"), theme.muted),
                ])
            };
            [
                number("∂f/∂v   ", comparison.tangent, "tangent"),
                number("⟨v, ∇f⟩ ", comparison.reverse, "reverse"),
                Line::from(vec![
                    Span::styled(format!("{mark} {verdict}"), style),
                    Span::styled(
                        format!(
                            " (relative error {})",
                            crate::format::compact(comparison.relative)
                        ),
                        theme.muted,
                    ),
                ]),
            ]
        }
        None => [
            Line::styled(forward.description.clone(), theme.muted),
            Line::styled("∂f/∂v and ⟨v, ∇f⟩ appear once", theme.muted),
            Line::styled("the output has its tangent", theme.muted),
        ],
    }
}

/// The Node pane's lines in forward mode: the dual number, the node's state in
/// the tangent sweep, and the direction's component on a leaf.
pub fn node_lines<'a>(ctx: &Ctx, forward: &Forward, node: usize, width: usize) -> Vec<Line<'a>> {
    let theme = ctx.theme;
    let dtype = ctx.session.trace().node_dtype(node);
    let label = |text: &str| Span::styled(fit(text, 9), theme.muted);
    let cursor = forward.sweep.cursor();
    let (state, style) = match node.cmp(&cursor) {
        std::cmp::Ordering::Less => (
            format!("{DONE} tangent known (forward step {})", node + 1),
            theme.done,
        ),
        std::cmp::Ordering::Equal => (
            format!(
                "{CURRENT} current: forward step {} computes its tangent",
                node + 1
            ),
            theme.current,
        ),
        std::cmp::Ordering::Greater => (
            format!("{PENDING} pending: forward step {}", node + 1),
            theme.pending,
        ),
    };
    let mut lines = vec![
        Line::from(vec![label("forward"), Span::styled(state, style)]),
        Line::from(vec![
            label("dual"),
            Span::styled(
                forward.dual_text(node),
                theme.text.add_modifier(ratatui::style::Modifier::BOLD),
            ),
        ]),
    ];
    if let Some(direction) = forward.sweep.direction(node) {
        let text = match direction.as_scalar() {
            Some(v) if direction.shape().is_empty() => format!("v here: {}", readable(v, dtype)),
            _ => format!(
                "v here: {} ‖·‖ {}",
                crate::format::shape(direction.shape()),
                crate::format::compact(direction.l2_norm())
            ),
        };
        lines.push(Line::from(vec![
            label("seed"),
            Span::styled(text, theme.muted),
        ]));
    }
    if node == ctx.session.trace().output() {
        lines.extend(foot(ctx, forward, width));
    }
    lines
}

/// Draws Order's rows from `first`, `rows` of them, with the foot on the last line.
pub fn draw(ctx: &Ctx, forward: &Forward, first: usize, area: Rect, buf: &mut Buffer) {
    let theme = ctx.theme;
    let trace = ctx.session.trace();
    let nodes = trace.nodes();
    let width = area.width as usize;
    let step_width = nodes.len().to_string().len();
    // Ids stay readable first; the two numbers share what is left, exact when there is room.
    let op_width = if width >= 56 { 7 } else { 0 };
    let rest = width.saturating_sub(2 + step_width + 1 + op_width + 1);
    let number_width = (rest.saturating_sub(14) / 2).saturating_sub(1).clamp(8, 21);
    let id_width = rest.saturating_sub(2 * (number_width + 1)).max(4);
    let header = format!(
        "  {:>step_width$} {} {} {} {}",
        "#",
        fit("node", id_width),
        fit("op", op_width),
        fit("value", number_width),
        "tangent"
    );
    buf.set_stringn(area.x, area.y, header, width, theme.muted);
    let rows = (area.height as usize).saturating_sub(FOOT + 1);
    let cursor = forward.sweep.cursor();
    for (line, node) in (first..nodes.len().min(first + rows)).enumerate() {
        let recorded = &nodes[node];
        let (marker, marker_style) = match node.cmp(&cursor) {
            std::cmp::Ordering::Less => (DONE, theme.done),
            std::cmp::Ordering::Equal => (CURRENT, theme.current),
            std::cmp::Ordering::Greater => (PENDING, theme.pending),
        };
        let id_style = if node == cursor {
            theme.current
        } else {
            theme.text
        };
        let spans = vec![
            Span::styled(format!("{marker} "), marker_style),
            Span::styled(format!("{:>step_width$} ", node + 1), theme.muted),
            Span::styled(fit(&recorded.id, id_width) + " ", id_style),
            Span::styled(
                fit(&recorded.op_name, op_width) + if op_width > 0 { " " } else { "" },
                theme.muted,
            ),
            Span::styled(
                fit(
                    &value_text(&recorded.value, trace.node_dtype(node), number_width),
                    number_width,
                ) + " ",
                theme.text,
            ),
            Span::styled(
                forward.tangent_text(node, number_width),
                if node < cursor {
                    theme.text
                } else {
                    theme.muted
                },
            ),
        ];
        let y = area.y + 1 + line as u16;
        buf.set_line(area.x, y, &Line::from(spans), area.width);
        if node == ctx.session.selected().index() {
            buf.set_style(Rect::new(area.x, y, area.width, 1), theme.selection);
        }
    }
    if area.height as usize > FOOT + 1 {
        for (at, line) in foot(ctx, forward, width).iter().enumerate() {
            buf.set_line(
                area.x,
                area.y + area.height - FOOT as u16 + at as u16,
                line,
                area.width,
            );
        }
    }
}
