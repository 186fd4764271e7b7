//! Edges: the selected node's inputs and consumers with the partial on each
//! edge (Enter walks along the highlighted one, and walking back returns),
//! and below them a layered drawing of the graph around it, arrows in the
//! direction the adjoint flows, the partial or the contribution written
//! beside the arrows of the selected node's edges. In forward mode the
//! words speak of tangents, which flow the other way.

use super::{Ctx, Move, Pane, Spec, fit};
use crate::format::compact;
use crate::tensor::Value;
use crate::tui::action::{Action, PaneId};
use crate::tui::graph::{Drawing, Extent};
use crate::tui::ids::NodeIx;
use crate::tui::layout::Slot;
use crate::tui::message::{Msg, Outbox};
use crate::tui::neighbours::Side;
use crate::tui::symbols::{self, CURRENT, DONE, PENDING};
use ratatui::buffer::Buffer;
use ratatui::layout::{Constraint, Layout, Rect};
use ratatui::style::Style;
use ratatui::text::{Line, Span};
use ratatui::widgets::{Paragraph, Widget};

/// The pane's registration.
pub const SPEC: Spec = Spec {
    id: PaneId::new("Edges"),
    slot: Slot::Side,
    about: "the selected node's edges with their partials, and the graph around it",
    keys: &[
        ("Enter", Action::Enter, "walk the edge"),
        ("l", Action::Enter, "walk the edge"),
        ("Right", Action::Enter, "walk the edge"),
        ("h", Action::WalkBack, "walk back"),
        ("Left", Action::WalkBack, "walk back"),
    ],
    make: || Box::new(EdgesPane::default()),
};

/// The neighbours pane: the highlighted edge, for the node it was moved on.
#[derive(Debug, Default)]
pub struct EdgesPane {
    cursor: usize,
    node: Option<NodeIx>,
}

/// One row of the list.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Row {
    Inputs,
    Consumers,
    Empty(&'static str),
    /// An edge, by index into the selection's edges.
    Edge(usize),
}

fn rows(ctx: &Ctx) -> Vec<Row> {
    let edges = &ctx.session.detail().edges;
    let side = |wanted: Side| {
        edges
            .iter()
            .enumerate()
            .filter(move |(_, edge)| edge.side == wanted)
            .map(|(at, _)| Row::Edge(at))
    };
    let mut rows = vec![Row::Inputs];
    rows.extend(side(Side::Input));
    if rows.len() == 1 {
        rows.push(Row::Empty("  none: a leaf"));
    }
    rows.push(Row::Consumers);
    let before = rows.len();
    rows.extend(side(Side::Consumer));
    if rows.len() == before {
        rows.push(Row::Empty("  none: this is the output"));
    }
    rows
}

/// The marker and style of a node's sweep state.
fn state(ctx: &Ctx, node: usize) -> (&'static str, Style) {
    let theme = ctx.theme;
    let session = ctx.session;
    if let Some(forward) = session.forward() {
        return match node.cmp(&forward.sweep.cursor()) {
            std::cmp::Ordering::Less => (DONE, theme.done),
            std::cmp::Ordering::Equal => (CURRENT, theme.current),
            std::cmp::Ordering::Greater => (PENDING, theme.pending),
        };
    }
    let flags = session.tally().flags_at(node);
    match session.trace().sweep_rank(node) {
        _ if !flags.is_empty() => (
            symbols::flag_symbol(flags[0]),
            symbols::flag_style(theme, flags[0]),
        ),
        Some(rank) if rank < session.sweep().cursor() => (DONE, theme.done),
        Some(rank) if rank == session.sweep().cursor() => (CURRENT, theme.current),
        Some(_) => (PENDING, theme.pending),
        None => (" ", theme.muted),
    }
}

impl EdgesPane {
    fn cursor(&self, ctx: &Ctx) -> usize {
        if self.node == Some(ctx.session.selected()) {
            self.cursor
        } else {
            0
        }
    }
}

impl Pane for EdgesPane {
    fn title(&self, ctx: &Ctx) -> String {
        ctx.session.id(ctx.session.selected()).to_string()
    }

    fn draw(&self, ctx: &Ctx, area: Rect, buf: &mut Buffer) {
        let rows = rows(ctx);
        let walk_row = usize::from(!ctx.session.walk().is_empty());
        let list_height = (rows.len() + walk_row) as u16;
        let draw_map = area.height >= list_height + 6;
        let [list_area, map_area] = if draw_map {
            area.layout(&Layout::vertical([
                Constraint::Length(list_height),
                Constraint::Fill(1),
            ]))
        } else {
            [area, Rect::default()]
        };
        Paragraph::new(list_lines(
            ctx,
            &rows,
            self.cursor(ctx),
            area.width as usize,
        ))
        .render(list_area, buf);
        if draw_map {
            draw_graph(ctx, map_area, buf);
        }
    }

    fn handle(&mut self, action: Action, ctx: &Ctx, out: &mut Outbox) {
        self.cursor = self.cursor(ctx);
        self.node = Some(ctx.session.selected());
        let edges = &ctx.session.detail().edges;
        if let Some(motion) = Move::of(action, ctx.rows) {
            self.cursor = motion.apply(self.cursor, edges.len());
            return;
        }
        match action {
            Action::Enter => {
                if let Some(edge) = edges.get(self.cursor) {
                    out.send(Msg::Jump(NodeIx::new(edge.node)));
                }
            }
            Action::WalkBack => match ctx.session.walk().last() {
                Some(&node) => out.send(Msg::Select(node)),
                None => out.send(Msg::Status(
                    "the walk history is empty ({key:enter} on an edge walks along it)".to_string(),
                )),
            },
            Action::Click(_, row) => {
                if let Some(Row::Edge(at)) = rows(ctx).get(row as usize) {
                    self.cursor = *at;
                }
            }
            _ => {}
        }
    }

    fn sync(&mut self, ctx: &Ctx, _out: &mut Outbox) {
        if self.node != Some(ctx.session.selected()) {
            (self.node, self.cursor) = (Some(ctx.session.selected()), 0);
        }
    }
}

/// The list of inputs and consumers with their partials, and the walk so far.
fn list_lines<'a>(ctx: &Ctx, rows: &[Row], cursor: usize, width: usize) -> Vec<Line<'a>> {
    let theme = ctx.theme;
    let session = ctx.session;
    let trace = session.trace();
    let selected = session.id(session.selected());
    let edges = &session.detail().edges;
    let forward = session.forward().is_some();
    let id_width = edges
        .iter()
        .map(|edge| trace.node(edge.node).id.chars().count())
        .max()
        .unwrap_or(4)
        .clamp(4, (width / 3).max(4));
    let op_width = edges
        .iter()
        .map(|edge| trace.node(edge.node).op_name.chars().count())
        .max()
        .unwrap_or(2);
    let mut lines: Vec<Line> = Vec::new();
    for row in rows {
        match *row {
            Row::Inputs => lines.push(Line::styled(
                if forward {
                    format!("inputs → their tangents × ∂ flow into {selected}")
                } else {
                    format!("inputs ← each receives {selected}'s adjoint × ∂")
                },
                theme.muted,
            )),
            Row::Consumers => lines.push(Line::styled(
                if forward {
                    format!("consumers ← {selected}'s tangent × ∂ flows on to each")
                } else {
                    format!("consumers → each sends its adjoint × ∂ to {selected}")
                },
                theme.muted,
            )),
            Row::Empty(text) => lines.push(Line::styled(text, theme.muted)),
            Row::Edge(at) => {
                let edge = &edges[at];
                let other = trace.node(edge.node);
                let (marker, style) = state(ctx, edge.node);
                let pointer = if at == cursor { "›" } else { " " };
                let mut line = Line::from(vec![
                    Span::styled(format!("{pointer}{marker} "), style),
                    Span::styled(fit(&other.id, id_width) + " ", theme.text),
                    Span::styled(fit(&other.op_name, op_width), theme.muted),
                    Span::styled(format!(" slot {} ", edge.slot), theme.muted),
                    Span::styled(format!("∂ {}", edge.partial), theme.text),
                ]);
                if at == cursor && ctx.focused {
                    line = line.patch_style(theme.selection);
                }
                lines.push(line);
            }
        }
    }
    let walk: Vec<&str> = session
        .walk()
        .iter()
        .rev()
        .take(6)
        .rev()
        .map(|&node| session.id(node))
        .collect();
    if !walk.is_empty() {
        lines.push(Line::styled(
            ctx.say(&format!(
                "walk: {} › {selected}  ({{key:walk_back}} goes back)",
                walk.join(" › ")
            )),
            theme.muted,
        ));
    }
    lines
}

/// What the drawing writes beside the arrow of an edge of the selected
/// node: the contribution once sent, else the partial.
fn edge_label(ctx: &Ctx, consumer: usize, input: usize) -> Option<String> {
    let session = ctx.session;
    let selected = session.selected().index();
    if consumer != selected && input != selected {
        return None;
    }
    let trace = session.trace();
    let step = trace.sweep_rank(consumer)?;
    if session.forward().is_none()
        && step < session.sweep().cursor()
        && let Some(ledger) = session.sweep().ledger()
    {
        let sent: Vec<String> = ledger
            .step_entries(step)
            .iter()
            .filter(|entry| entry.input == input)
            .map(|entry| match &entry.value {
                Value::Scalar(x) => compact(*x),
                tensor => format!("‖·‖{}", compact(tensor.l2_norm())),
            })
            .collect();
        if !sent.is_empty() {
            return Some(format!("+{}", sent.join(" +")));
        }
    }
    let edge = session.detail().edges.iter().find(|edge| match edge.side {
        Side::Input => consumer == selected && edge.node == input,
        Side::Consumer => input == selected && edge.node == consumer,
    })?;
    // Short: a number in six digits, a long description cut.
    let partial = match edge.partial.parse::<f64>() {
        Ok(x) => compact(x),
        Err(_) if edge.partial.chars().count() <= 10 => edge.partial.clone(),
        Err(_) => "…".to_string(),
    };
    Some(format!("∂{partial}"))
}

/// The layered drawing with its legend line.
fn draw_graph(ctx: &Ctx, area: Rect, buf: &mut Buffer) {
    let theme = ctx.theme;
    let session = ctx.session;
    let trace = session.trace();
    let selected = session.selected().index();
    let [legend, canvas] = area.layout(&Layout::vertical([
        Constraint::Length(1),
        Constraint::Fill(1),
    ]));
    let label = |consumer: usize, input: usize| edge_label(ctx, consumer, input);
    let Some(drawing) = Drawing::of(
        trace,
        selected,
        canvas.width as usize,
        canvas.height as usize,
        &label,
    ) else {
        buf.set_stringn(
            legend.x,
            legend.y,
            "too many edges here to draw; the list above has them all",
            legend.width as usize,
            theme.muted,
        );
        return;
    };
    let flow = if session.forward().is_some() {
        "arrows: the adjoint's way (tangents flow up)"
    } else {
        "arrows: the adjoint flows down"
    };
    let extent = match drawing.extent {
        Extent::Whole => format!("the whole graph, {} nodes · {flow}", drawing.boxes.len()),
        Extent::Around(steps) => format!(
            "{steps} step(s) around {} · {} nodes not drawn · {flow}",
            session.id(session.selected()),
            drawing.hidden
        ),
    };
    buf.set_stringn(
        legend.x,
        legend.y,
        extent,
        legend.width as usize,
        theme.muted,
    );
    // Lines lit where they touch the selected node.
    let mut lit = vec![false; drawing.width * drawing.height];
    for arrow in &drawing.arrows {
        if arrow.consumer == selected || arrow.input == selected {
            for &(x, y) in &arrow.path {
                lit[y * drawing.width + x] = true;
            }
        }
    }
    let (x0, y0) = (canvas.x as usize, canvas.y as usize);
    for y in 0..drawing.height {
        for x in 0..drawing.width {
            if let Some(c) = drawing.char_at(x, y) {
                let style = if lit[y * drawing.width + x] {
                    theme.focus
                } else {
                    theme.border
                };
                buf[((x0 + x) as u16, (y0 + y) as u16)]
                    .set_char(c)
                    .set_style(style);
            }
        }
    }
    for arrow in &drawing.arrows {
        let &(x, y) = arrow.path.last().expect("an arrow has a head");
        let style = if arrow.consumer == selected || arrow.input == selected {
            theme.focus
        } else {
            theme.border
        };
        buf[((x0 + x) as u16, (y0 + y) as u16)]
            .set_char('▼')
            .set_style(style);
    }
    for (text, x, y) in &drawing.labels {
        buf.set_string((x0 + x) as u16, (y0 + y) as u16, text, theme.key);
    }
    for node_box in &drawing.boxes {
        let (marker, marker_style) = state(ctx, node_box.node);
        let mut style = theme.text;
        if node_box.node == selected {
            style = style.patch(theme.selection);
        }
        let (x, y) = ((x0 + node_box.x) as u16, (y0 + node_box.y) as u16);
        buf.set_string(x, y, "[", theme.muted);
        buf.set_string(x + 1, y, marker, marker_style);
        buf.set_string(x + 2, y, &node_box.label, style);
        buf.set_string(
            x + 2 + node_box.label.chars().count() as u16,
            y,
            "]",
            theme.muted,
        );
    }
}
