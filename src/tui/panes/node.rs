//! Node: the selected node's op, group, state, call site, shape, forward
//! value (a summary for tensors), its adjoint so far, the op's derivative in
//! words with the numbers of this step, the partial on each input edge, the
//! diagnosis's account of it, its flags, and a scrollable table of a
//! tensor's elements by multi-index. In forward mode, its dual number and
//! how its tangent was formed.

use super::node_findings::{diagnosis_lines, precision_lines};
use super::{Ctx, Move, Pane, Spec, fit, fit_number, value_text, wrap};
use crate::format::{compact, multi_index, readable, shape};
use crate::ops::Attrs;
use crate::stats::Summary;
use crate::tensor::Value;
use crate::tui::action::{Action, PaneId};
use crate::tui::ids::NodeIx;
use crate::tui::layout::Slot;
use crate::tui::message::Outbox;
use crate::tui::neighbours::Side;
use crate::tui::symbols::{self, CURRENT, DONE, PENDING};
use crate::tui::teach;
use ratatui::buffer::Buffer;
use ratatui::layout::Rect;
use ratatui::style::{Modifier, Style};
use ratatui::text::{Line, Span};
use ratatui::widgets::{Paragraph, Widget};

/// The pane's registration.
pub const SPEC: Spec = Spec {
    id: PaneId::new("Node"),
    slot: Slot::Detail,
    about: "the selected node: value, adjoint, its derivative rule with this step's numbers, partials, findings",
    keys: &[],
    make: || Box::new(NodePane::default()),
};

/// The node detail pane: the element table's scroll, for the node it was scrolled on.
#[derive(Debug, Default)]
pub struct NodePane {
    scroll: usize,
    node: Option<NodeIx>,
}

/// Width of the label column.
const LABEL: usize = 9;

/// A line with a label in the label column.
pub fn labelled<'a>(
    label: &str,
    value: String,
    label_style: Style,
    value_style: Style,
) -> Line<'a> {
    Line::from(vec![
        Span::styled(fit(label, LABEL), label_style),
        Span::styled(value, value_style),
    ])
}

impl Pane for NodePane {
    fn title(&self, ctx: &Ctx) -> String {
        ctx.session.id(ctx.session.selected()).to_string()
    }

    fn draw(&self, ctx: &Ctx, area: Rect, buf: &mut Buffer) {
        let node = ctx.session.selected();
        let width = area.width as usize;
        let value_width = width.saturating_sub(LABEL);
        let mut lines = heading(ctx, node);
        if ctx.session.forward().is_some() {
            lines.extend(forward_lines(ctx, node, width));
        }
        lines.extend(place(ctx, node));
        lines.extend(value_and_adjoint(ctx, node, value_width));
        // What went wrong here first; how the adjoint passes on after.
        lines.extend(diagnosis_lines(ctx, node.index(), value_width));
        lines.extend(precision_lines(ctx, node.index(), value_width));
        lines.extend(derivative(ctx, node, value_width));
        lines.extend(flags(ctx, node));
        let scroll = if self.node == Some(node) {
            self.scroll
        } else {
            0
        };
        let room = (area.height as usize).saturating_sub(lines.len());
        lines.extend(elements(ctx, node, scroll, room));
        Paragraph::new(lines).render(area, buf);
    }

    fn handle(&mut self, action: Action, ctx: &Ctx, _out: &mut Outbox) {
        let node = ctx.session.selected();
        if self.node != Some(node) {
            (self.node, self.scroll) = (Some(node), 0);
        }
        if let Some(motion) = Move::of(action, ctx.rows) {
            let len = ctx.session.trace().node(node.index()).value.len();
            self.scroll = motion.apply(self.scroll, len);
        }
    }

    fn sync(&mut self, ctx: &Ctx, _out: &mut Outbox) {
        if self.node != Some(ctx.session.selected()) {
            (self.node, self.scroll) = (Some(ctx.session.selected()), 0);
        }
    }
}

/// The id, op and group; where the sweep stands with this node.
fn heading<'a>(ctx: &Ctx, node: NodeIx) -> Vec<Line<'a>> {
    let theme = ctx.theme;
    let session = ctx.session;
    let recorded = session.trace().node(node.index());
    let group = if recorded.group.is_empty() {
        "(no group)"
    } else {
        recorded.group.as_str()
    };
    let cursor = session.sweep().cursor();
    let (state, state_style) = match node.step(session.trace()) {
        None => (
            "does not reach the output: no adjoint".to_string(),
            theme.muted,
        ),
        Some(step) if step.position() < cursor => {
            (format!("{DONE} done at step {}", step.number()), theme.done)
        }
        Some(step) if step.position() == cursor => (
            format!("{CURRENT} current: step {} processes it", step.number()),
            theme.current,
        ),
        Some(step) => (
            format!("{PENDING} pending: step {}", step.number()),
            theme.pending,
        ),
    };
    vec![
        Line::from(vec![
            Span::styled(fit("node", LABEL), theme.muted),
            Span::styled(recorded.id.clone(), theme.title),
            Span::styled(format!("  {}  in {group}", recorded.op_name), theme.text),
        ]),
        labelled("state", state, theme.muted, state_style),
    ]
}

/// Call site, shape, dtype and attributes.
fn place<'a>(ctx: &Ctx, node: NodeIx) -> Vec<Line<'a>> {
    let theme = ctx.theme;
    let trace = ctx.session.trace();
    let recorded = trace.node(node.index());
    let shape_text = if recorded.value.shape().is_empty() {
        "scalar".to_string()
    } else {
        shape(recorded.value.shape())
    };
    vec![
        labelled(
            "site",
            recorded
                .site
                .as_deref()
                .unwrap_or("(not recorded)")
                .to_string(),
            theme.muted,
            theme.text,
        ),
        labelled(
            "shape",
            format!(
                "{shape_text} {}   attrs {}",
                trace.node_dtype(node.index()),
                attrs_text(&recorded.attrs)
            ),
            theme.muted,
            theme.text,
        ),
    ]
}

fn attrs_text(attrs: &Attrs) -> String {
    let mut parts = Vec::new();
    if let Some(axis) = attrs.axis {
        parts.push(format!("axis={axis}"));
    }
    if attrs.keepdims {
        parts.push("keepdims".to_string());
    }
    if let Some(exponent) = attrs.exponent {
        parts.push(format!(
            "exponent={}",
            readable(exponent, crate::dtype::Dtype::F64)
        ));
    }
    if let Some(slope) = attrs.slope {
        parts.push(format!(
            "slope={}",
            readable(slope, crate::dtype::Dtype::F64)
        ));
    }
    if let Some(targets) = &attrs.targets {
        parts.push(format!("targets={targets:?}"));
    }
    if let Some(perm) = &attrs.perm {
        parts.push(format!("perm={perm:?}"));
    }
    if let Some(target) = &attrs.shape {
        parts.push(format!("shape={target:?}"));
    }
    if parts.is_empty() {
        "—".to_string()
    } else {
        parts.join(" ")
    }
}

fn summary_lines<'a>(ctx: &Ctx, label: &str, summary: &Summary) -> [Line<'a>; 2] {
    let theme = ctx.theme;
    let first = format!(
        "‖·‖ {}  min {}  max {}  mean {}",
        compact(summary.norm),
        compact(summary.min),
        compact(summary.max),
        compact(summary.mean)
    );
    let second = format!(
        "NaN {}  +inf {}  −inf {}  zeros {}  subnormal {}  of {}",
        summary.nan,
        summary.pos_inf,
        summary.neg_inf,
        summary.zeros,
        summary.subnormal,
        summary.len
    );
    let counts_style = if summary.non_finite() > 0 {
        theme.flag_value
    } else {
        theme.text
    };
    [
        labelled(label, first, theme.muted, theme.text),
        labelled("", second, theme.muted, counts_style),
    ]
}

/// The forward value and the adjoint so far (summaries for tensors).
fn value_and_adjoint<'a>(ctx: &Ctx, node: NodeIx, width: usize) -> Vec<Line<'a>> {
    let theme = ctx.theme;
    let session = ctx.session;
    let trace = session.trace();
    let dtype = trace.node_dtype(node.index());
    let recorded = trace.node(node.index());
    let detail = session.detail();
    let mut lines = Vec::new();
    match &detail.value {
        Some(summary) => lines.extend(summary_lines(ctx, "value", summary)),
        None => lines.push(labelled(
            "value",
            value_text(&recorded.value, dtype, width),
            theme.muted,
            theme.text,
        )),
    }
    let pending = session.sweep().pending_consumers(node.index()).len();
    let adjoint = session.adjoint(node);
    let note = match (&adjoint, pending) {
        (None, _) if node.step(trace).is_none() => String::new(),
        (None, _) => "none yet".to_string(),
        (Some(_), 0) => "  (final)".to_string(),
        (Some(_), more) => format!("  (so far; {more} to come)"),
    };
    match (&detail.adjoint, adjoint.as_deref()) {
        (Some(summary), _) => {
            lines.extend(summary_lines(ctx, "adjoint", summary));
            lines.push(labelled(
                "",
                note.trim().to_string(),
                theme.muted,
                theme.muted,
            ));
        }
        (None, Some(value)) => {
            let text = value_text(value, dtype, width.saturating_sub(note.len()));
            let style = if value.is_finite() {
                theme.text
            } else {
                theme.flag_adjoint
            };
            lines.push(Line::from(vec![
                Span::styled(fit("adjoint", LABEL), theme.muted),
                Span::styled(text, style.add_modifier(Modifier::BOLD)),
                Span::styled(note, theme.muted),
            ]));
        }
        (None, None) => lines.push(labelled("adjoint", note, theme.muted, theme.muted)),
    }
    lines
}

/// The op's rule in words, then each input edge's partial and what this
/// node's step sent along it.
fn derivative<'a>(ctx: &Ctx, node: NodeIx, width: usize) -> Vec<Line<'a>> {
    let theme = ctx.theme;
    let session = ctx.session;
    let trace = session.trace();
    let recorded = trace.node(node.index());
    let mut lines = Vec::new();
    if session.forward().is_none() {
        for (at, part) in wrap(&teach::rule_text(session, node), width)
            .into_iter()
            .enumerate()
        {
            lines.push(labelled(
                if at == 0 { "rule" } else { "" },
                part,
                theme.muted,
                theme.title,
            ));
        }
    }
    let sent = teach::sent(session, node);
    let inputs = session
        .detail()
        .edges
        .iter()
        .filter(|edge| edge.side == Side::Input);
    for (at, edge) in inputs.enumerate() {
        let input = &trace.node(edge.node).id;
        let partial = format!("← {input}  {}", edge.partial);
        let mut spans = vec![
            Span::styled(fit(&format!("∂ in {}", edge.slot), LABEL), theme.muted),
            Span::styled(partial.clone(), theme.text),
        ];
        match sent.get(at).filter(|_| session.forward().is_none()) {
            // What the step sent, beside the partial when it fits, else below it.
            Some(sent) if partial.chars().count() + 3 + sent.chars().count() <= width => {
                spans.push(Span::styled(format!("   {sent}"), theme.done));
                lines.push(Line::from(spans));
            }
            Some(sent) => {
                lines.push(Line::from(spans));
                lines.push(labelled("", format!("  {sent}"), theme.muted, theme.done));
            }
            None => lines.push(Line::from(spans)),
        }
    }
    if recorded.inputs.is_empty() {
        lines.push(labelled(
            "∂",
            "a leaf: no input edges".to_string(),
            theme.muted,
            theme.muted,
        ));
    } else if sent.is_empty()
        && session.forward().is_none()
        && let Some(step) = node.step(trace)
    {
        lines.push(labelled(
            "",
            format!("step {} sends adjoint × ∂ along each edge", step.number()),
            theme.muted,
            theme.muted,
        ));
    }
    lines
}

/// Forward mode: the node's place in the tangent sweep, its dual number,
/// the direction's entry on a leaf, how the tangent was formed, and at the
/// output the comparison with the reverse sweep.
fn forward_lines<'a>(ctx: &Ctx, node: NodeIx, width: usize) -> Vec<Line<'a>> {
    let Some(forward) = ctx.session.forward() else {
        return Vec::new();
    };
    let theme = ctx.theme;
    let mut lines = super::order_forward::node_lines(ctx, forward, node.index(), width);
    if let Some(formed) = teach::tangent_formed(ctx.session, node) {
        for (at, part) in wrap(&formed, width.saturating_sub(LABEL))
            .into_iter()
            .enumerate()
        {
            lines.push(labelled(
                if at == 0 { "tangent" } else { "" },
                part,
                theme.muted,
                theme.title,
            ));
        }
    }
    lines
}

/// The flags raised at the node so far.
fn flags<'a>(ctx: &Ctx, node: NodeIx) -> Vec<Line<'a>> {
    let theme = ctx.theme;
    ctx.session
        .sweep()
        .flags()
        .iter()
        .filter(|flag| flag.node == node.index())
        .map(|flag| {
            let text = format!(
                "{} {} {} at step {} ({} element(s))",
                symbols::flag_symbol(flag.kind),
                flag.kind.name(),
                readable(flag.value, ctx.dtype()),
                flag.step + 1,
                flag.count
            );
            labelled(
                "flag",
                text,
                theme.muted,
                symbols::flag_style(theme, flag.kind),
            )
        })
        .collect()
}

/// A tensor's elements from `scroll`, `room` rows: multi-index, value and
/// adjoint (the tangent in forward mode; beside it the recorded dtype's
/// adjoint while the precision toggle is on).
fn elements<'a>(ctx: &Ctx, node: NodeIx, scroll: usize, room: usize) -> Vec<Line<'a>> {
    let theme = ctx.theme;
    let session = ctx.session;
    let trace = session.trace();
    let dtype = trace.node_dtype(node.index());
    let Value::Tensor(tensor) = &trace.node(node.index()).value else {
        return Vec::new();
    };
    let tangent = session
        .forward()
        .map(|forward| forward.tangent(node.index()));
    let column = if tangent.is_some() {
        "tangent"
    } else {
        "adjoint"
    };
    let adjoint = session.adjoint(node);
    let compared_adjoint = session
        .compare()
        .filter(|_| tangent.is_none())
        .map(|compare| compare.adjoint(node.index()));
    // Only the rows shown are read, one element at a time: a tensor may be huge.
    let compared: Option<Option<&Value>> =
        compared_adjoint.as_ref().map(|adjoint| adjoint.as_deref());
    let element = |value: Option<&Value>, index: usize| {
        value
            .filter(|value| index < value.len())
            .map(|value| value.get(index))
    };
    let shape = tensor.shape();
    let len = tensor.len();
    let index_width = multi_index(len.saturating_sub(1), shape)
        .chars()
        .count()
        .max("element".len());
    let header = match compared {
        None => format!("{:>index_width$}  {:<24}{column}", "element", "value"),
        Some(_) => format!(
            "{:>index_width$}  {:<24}{:<24}{}",
            "element",
            "value",
            format!("adjoint {}", trace.dtype()),
            session.recorded().dtype()
        ),
    };
    let mut lines = vec![Line::styled(header, theme.muted)];
    let shown = room.saturating_sub(1);
    let here_value: Option<&Value> = match tangent {
        Some(tangent) => tangent.flatten(),
        None => adjoint.as_deref(),
    };
    let pending = match tangent {
        Some(tangent) => tangent.is_none(),
        None => adjoint.is_none(),
    };
    for index in scroll..len.min(scroll + shown) {
        let value = fit(&readable(tensor.get(index), dtype), 23);
        let here = match element(here_value, index) {
            Some(x) => fit_number(x, dtype, 23),
            // A tangent sweep that has passed the node without a tangent: it is zero.
            None if !pending => "0".to_string(),
            None => "—".to_string(),
        };
        let label = multi_index(index, shape);
        let row = match compared {
            None => format!("{label:>index_width$}  {value} {here}"),
            Some(there_value) => {
                let there = element(there_value, index).map_or("—".to_string(), |x| {
                    fit_number(x, session.recorded().dtype(), 23)
                });
                format!("{label:>index_width$}  {value} {here:<23} {there}")
            }
        };
        lines.push(Line::styled(row, theme.text));
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
    fn a_multiply_says_its_rule_then_what_it_sent() {
        // y = w·x at w = 3, x = 0.5: ∂y/∂w = x and ∂y/∂x = w (closed form).
        let mut tape = Tape::new("product", Dtype::F64);
        let w = tape.param("w", 3.0);
        let x = tape.input("x", 0.5);
        let y = tape.mul(w, x);
        let y = tape.rename(y, "y");
        let mut fixture = Fixture::new(tape.finish(y));
        fixture.app.update(Action::Step);
        let y = fixture.app.session().find("y").unwrap();
        fixture.app.apply(Msg::Select(y));
        let buffer = fixture.render_own("Node", 60, 10);
        let site = format!(
            "{:<60}",
            format!(
                "site     {}",
                fixture.app.session().trace().node(2).site.clone().unwrap()
            )
        );
        assert_lines(
            &buffer,
            [
                "node     y  mul  in (no group)                              ",
                "state    ✓ done at step 1                                   ",
                site.as_str(),
                "shape    scalar f64   attrs —                               ",
                "value    1.5                                                ",
                "adjoint  1  (final)                                         ",
                "rule     mul: each input receives adjoint × the other input ",
                "∂ in 0   ← w  0.5   1 × 0.5 = 0.5 to w                      ",
                "∂ in 1   ← x  3   1 × 3 = 3 to x                            ",
                "                                                            ",
            ],
        );
    }
}
