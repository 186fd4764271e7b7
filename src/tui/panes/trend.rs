//! Trend: log10 of the adjoint norm of each processed node along the sweep,
//! then per group the norm of its forward values beside the norm of its
//! adjoints so far, so a collapse or a blow-up in either direction shows at
//! a glance.

use super::{Ctx, Pane, Spec, fit};
use crate::format::compact;
use crate::tui::action::{Action, PaneId};
use crate::tui::layout::Slot;
use crate::tui::message::Outbox;
use crate::tui::symbols::magnitude_bar;
use ratatui::buffer::Buffer;
use ratatui::layout::{Constraint, Layout, Rect};
use ratatui::symbols::Marker;
use ratatui::text::{Line, Span};
use ratatui::widgets::{Axis, Chart, Dataset, GraphType, Paragraph, Widget};

/// The pane's registration.
pub const SPEC: Spec = Spec {
    id: PaneId::new("Trend"),
    slot: Slot::Corner,
    about: "log10 ‖adjoint‖ along the sweep; per group ‖forward value‖ beside ‖adjoint‖",
    keys: &[],
    make: || Box::new(TrendPane),
};

/// The magnitude chart pane (no state of its own).
pub struct TrendPane;

/// Points of log10 ‖adjoint‖ for steps done, at most two per column: the
/// lowest and highest of each bucket, so neither a dip nor a spike is lost.
pub fn series(ctx: &Ctx, columns: usize) -> Vec<(f64, f64)> {
    let order = ctx.session.trace().sweep_order();
    let done = ctx.session.sweep().cursor();
    let tally = ctx.session.tally();
    let bucket = done.div_ceil(columns.max(1)).max(1);
    let mut points = Vec::new();
    for start in (0..done).step_by(bucket) {
        let mut low: Option<(f64, f64)> = None;
        let mut high: Option<(f64, f64)> = None;
        let end = (start + bucket).min(done);
        for (step, &node) in order.iter().enumerate().take(end).skip(start) {
            let Some(norm) = tally.norm(node) else {
                continue;
            };
            if !(norm.is_finite() && norm > 0.0) {
                continue;
            }
            let point = ((step + 1) as f64, norm.log10());
            low = Some(low.map_or(point, |l: (f64, f64)| if point.1 < l.1 { point } else { l }));
            high = Some(high.map_or(point, |h: (f64, f64)| if point.1 > h.1 { point } else { h }));
        }
        let mut pair: Vec<(f64, f64)> = low.into_iter().chain(high).collect();
        pair.sort_by(|a, b| a.0.total_cmp(&b.0));
        pair.dedup();
        points.extend(pair);
    }
    points
}

impl Pane for TrendPane {
    fn title(&self, _ctx: &Ctx) -> String {
        "log10 ‖adjoint‖ · groups".to_string()
    }

    fn draw(&self, ctx: &Ctx, area: Rect, buf: &mut Buffer) {
        let theme = ctx.theme;
        let tally = ctx.session.tally();
        let groups: Vec<(&str, Option<f64>)> = tally.group_norms().collect();
        let group_rows = (groups.len() as u16 + 1).min(area.height / 2);
        let [chart_area, group_area] = area.layout(&Layout::vertical([
            Constraint::Fill(1),
            Constraint::Length(group_rows),
        ]));
        let points = series(ctx, chart_area.width as usize);
        if points.is_empty() {
            Paragraph::new(Line::styled(
                ctx.say("no step done yet: {key:step} steps the sweep"),
                theme.muted,
            ))
            .render(chart_area, buf);
        } else {
            let low = points
                .iter()
                .map(|p| p.1)
                .fold(f64::INFINITY, f64::min)
                .floor();
            let high = points
                .iter()
                .map(|p| p.1)
                .fold(f64::NEG_INFINITY, f64::max)
                .ceil()
                .max(low + 1.0);
            let done = ctx.session.sweep().cursor();
            let dataset = Dataset::default()
                .marker(Marker::Braille)
                .graph_type(GraphType::Line)
                .style(theme.chart)
                .data(&points);
            let x_axis = Axis::default()
                .style(theme.muted)
                .bounds([1.0, (done.max(1) as f64).max(2.0)])
                .labels(["1".to_string(), format!("step {done}")]);
            let y_axis = Axis::default()
                .style(theme.muted)
                .bounds([low, high])
                .labels([format!("1e{low}"), format!("1e{high}")]);
            Chart::new(vec![dataset])
                .x_axis(x_axis)
                .y_axis(y_axis)
                .style(theme.text)
                .render(chart_area, buf);
        }
        Paragraph::new(group_lines(ctx, &groups, group_area)).render(group_area, buf);
    }

    fn handle(&mut self, _action: Action, _ctx: &Ctx, _out: &mut Outbox) {}
}

/// Per group: ‖forward value‖ and ‖adjoint‖ so far, each with a bar over
/// the range its column spans.
fn group_lines<'a>(ctx: &Ctx, groups: &[(&str, Option<f64>)], area: Rect) -> Vec<Line<'a>> {
    let theme = ctx.theme;
    let width = area.width as usize;
    let survey = ctx.session.survey();
    let values: Vec<Option<f64>> = groups
        .iter()
        .map(|(name, _)| survey.and_then(|survey| survey.norms.get(*name).copied()))
        .collect();
    let decades = |column: &mut dyn Iterator<Item = f64>| {
        let logs: Vec<f64> = column
            .filter(|x| x.is_finite() && *x > 0.0)
            .map(f64::log10)
            .collect();
        let low = logs.iter().copied().fold(f64::INFINITY, f64::min);
        let high = logs.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        if logs.is_empty() {
            (-1, 1)
        } else {
            (
                low.floor() as i32,
                (high.ceil() as i32).max(low.floor() as i32 + 1),
            )
        }
    };
    let value_range = decades(&mut values.iter().flatten().copied());
    let adjoint_range = decades(&mut groups.iter().filter_map(|(_, norm)| *norm));
    let name_width = groups
        .iter()
        .map(|(name, _)| name.chars().count())
        .max()
        .unwrap_or(5)
        .clamp(5, (width / 3).max(5));
    let bar = if width >= 60 { 8 } else { 4 };
    let number = 10;
    let value_header = if survey.is_some() {
        "‖forward value‖"
    } else {
        "‖forward value‖ (summing…)"
    };
    let mut lines = vec![Line::styled(
        format!(
            "{} {:<w$} {}",
            fit("group", name_width),
            value_header,
            "‖adjoint‖ of processed nodes",
            w = bar + number + 1
        ),
        theme.muted,
    )];
    for ((name, norm), value) in groups
        .iter()
        .zip(&values)
        .take((area.height as usize).saturating_sub(1))
    {
        lines.push(Line::from(vec![
            Span::styled(fit(name, name_width) + " ", theme.text),
            Span::styled(magnitude_bar(*value, bar, value_range) + " ", theme.chart),
            Span::styled(
                format!("{:<number$} ", value.map_or("—".to_string(), compact)),
                theme.text,
            ),
            Span::styled(
                magnitude_bar(*norm, bar, adjoint_range) + " ",
                theme.chart_group,
            ),
            Span::styled(norm.map_or("—".to_string(), compact), theme.text),
        ]));
    }
    lines
}
