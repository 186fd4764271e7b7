//! Edges: the selected node's inputs and consumers, each edge labelled with
//! its partial, a cursor to walk along an edge and a walk history; for small
//! traces, a layered drawing of the whole graph coloured by sweep state.

use super::{Move, Pane, fit};
use crate::tui::action::PaneId;
use crate::tui::app::App;
use crate::tui::neighbours::Side;
use crate::tui::symbols::{self, CURRENT, DONE, PENDING};
use ratatui::buffer::Buffer;
use ratatui::layout::{Constraint, Layout, Rect};
use ratatui::style::{Color, Style};
use ratatui::symbols::Marker;
use ratatui::text::{Line, Span};
use ratatui::widgets::canvas::{Canvas, Line as Segment};
use ratatui::widgets::{Paragraph, Widget};

/// The neighbourhood pane.
pub struct EdgesPane;

/// One displayed row of the list.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Row {
    /// The heading above the inputs.
    Inputs,
    /// The heading above the consumers.
    Consumers,
    /// A side without edges.
    Empty(&'static str),
    /// An edge, by index into the selection's edges.
    Edge(usize),
}

fn rows(app: &App) -> Vec<Row> {
    let edges = &app.selection.edges;
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
fn state(app: &App, node: usize) -> (&'static str, Style) {
    let theme = app.theme();
    match app.trace.sweep_rank(node) {
        _ if !app.tally.flags_at(node).is_empty() => {
            let kind = app.tally.flags_at(node)[0];
            (symbols::flag_symbol(kind), symbols::flag_style(theme, kind))
        }
        Some(rank) if rank < app.sweep.cursor() => (DONE, theme.done),
        Some(rank) if rank == app.sweep.cursor() => (CURRENT, theme.current),
        Some(_) => (PENDING, theme.pending),
        None => (" ", theme.muted),
    }
}

impl Pane for EdgesPane {
    fn id(&self) -> PaneId {
        PaneId::Edges
    }

    fn title_detail(&self, app: &App) -> String {
        app.trace.node(app.selected).id.clone()
    }

    fn draw(&self, app: &App, area: Rect, buf: &mut Buffer) {
        let theme = app.theme();
        let trace = app.trace;
        let selected = &trace.node(app.selected).id;
        let rows = rows(app);
        let list_height = (rows.len() + 1) as u16;
        let draw_map = app.layers.is_some() && area.height >= list_height + 8;
        let [list_area, map_area] = if draw_map {
            area.layout(&Layout::vertical([
                Constraint::Length(list_height),
                Constraint::Fill(1),
            ]))
        } else {
            [area, Rect::default()]
        };
        let width = area.width as usize;
        let id_width = (width / 4).clamp(6, 18);
        let mut lines: Vec<Line> = Vec::new();
        for row in &rows {
            match *row {
                Row::Inputs => lines.push(Line::styled(
                    format!("inputs ← each receives {selected}'s adjoint × ∂"),
                    theme.muted,
                )),
                Row::Consumers => lines.push(Line::styled(
                    format!("consumers → each sends its adjoint × ∂ to {selected}"),
                    theme.muted,
                )),
                Row::Empty(text) => lines.push(Line::styled(text, theme.muted)),
                Row::Edge(at) => {
                    let edge = &app.selection.edges[at];
                    let other = trace.node(edge.node);
                    let (marker, style) = state(app, edge.node);
                    let pointer = if at == app.edge_cursor { "›" } else { " " };
                    let mut line = Line::from(vec![
                        Span::styled(format!("{pointer}{marker} "), style),
                        Span::styled(fit(&other.id, id_width) + " ", theme.text),
                        Span::styled(fit(&other.op_name, 8), theme.muted),
                        Span::styled(format!(" slot {} ", edge.slot), theme.muted),
                        Span::styled(format!("∂ {}", edge.partial), theme.text),
                    ]);
                    if at == app.edge_cursor && app.focus == PaneId::Edges {
                        line = line.patch_style(theme.selection);
                    }
                    lines.push(line);
                }
            }
        }
        let walk: Vec<&str> = app
            .walk
            .iter()
            .rev()
            .take(6)
            .rev()
            .map(|&node| trace.node(node).id.as_str())
            .collect();
        if !walk.is_empty() {
            lines.push(Line::styled(
                format!("walk: {} › {selected}  (Bksp goes back)", walk.join(" › ")),
                theme.muted,
            ));
        }
        Paragraph::new(lines).render(list_area, buf);
        if draw_map {
            draw_graph(app, map_area, buf);
        }
    }

    fn move_cursor(&self, app: &mut App, motion: Move) {
        app.edge_cursor = motion.apply(app.edge_cursor, app.selection.edges.len());
    }

    /// Walks along the highlighted edge.
    fn enter(&self, app: &mut App) {
        if let Some(edge) = app.selection.edges.get(app.edge_cursor) {
            let node = edge.node;
            app.jump(node);
        }
    }

    fn click(&self, app: &mut App, row: usize) {
        if let Some(Row::Edge(at)) = rows(app).get(row) {
            app.edge_cursor = *at;
        }
    }
}

fn colour(style: Style) -> Color {
    style.fg.unwrap_or(Color::Reset)
}

/// The whole graph in layers, inputs on the left and the output on the right.
fn draw_graph(app: &App, area: Rect, buf: &mut Buffer) {
    let Some(layers) = &app.layers else { return };
    let theme = app.theme();
    let trace = app.trace;
    let depth = layers.depth().max(1) as f64;
    let tallest = layers.counts.iter().copied().max().unwrap_or(1).max(1) as f64;
    let position = |node: usize| {
        let count = layers.counts[layers.layer[node]] as f64;
        let x = layers.layer[node] as f64;
        // Spread each layer over the full height, centred.
        let y = tallest - (layers.row[node] as f64 + 0.5) * tallest / count;
        (x, y)
    };
    let label_width = ((area.width as f64 / depth) as usize)
        .saturating_sub(1)
        .clamp(3, 12);
    let selected = app.selected;
    let near = |node: usize| {
        trace.node(selected).inputs.contains(&node) || trace.node(node).inputs.contains(&selected)
    };
    Canvas::default()
        .marker(Marker::Braille)
        .x_bounds([-0.1, depth - 0.4])
        .y_bounds([0.0, tallest])
        .paint(|ctx| {
            for (consumer, node) in trace.nodes().iter().enumerate() {
                for &input in &node.inputs {
                    let (x1, y1) = position(input);
                    let (x2, y2) = position(consumer);
                    let lit = consumer == selected || input == selected;
                    let color = if lit {
                        colour(theme.focus)
                    } else {
                        colour(theme.border)
                    };
                    ctx.draw(&Segment {
                        x1: x1 + 0.3,
                        y1,
                        x2,
                        y2,
                        color,
                    });
                }
            }
            ctx.layer();
            for (index, node) in trace.nodes().iter().enumerate() {
                let (x, y) = position(index);
                let (marker, mut style) = state(app, index);
                if index == selected {
                    style = style.patch(theme.selection);
                } else if near(index) {
                    style = style.add_modifier(ratatui::style::Modifier::UNDERLINED);
                }
                let label: String = format!("{marker}{}", node.id)
                    .chars()
                    .take(label_width)
                    .collect();
                ctx.print(x, y, Line::styled(label, style));
            }
        })
        .render(area, buf);
}
