//! Trend: log10 of the adjoint norm of each processed node along the sweep,
//! and the norm of each group, so a collapse or a blow-up shows at a glance.

use super::{Pane, fit};
use crate::format::compact;
use crate::tui::action::PaneId;
use crate::tui::app::App;
use crate::tui::symbols::magnitude_bar;
use ratatui::buffer::Buffer;
use ratatui::layout::{Constraint, Layout, Rect};
use ratatui::symbols::Marker;
use ratatui::text::{Line, Span};
use ratatui::widgets::{Axis, Chart, Dataset, GraphType, Paragraph, Widget};

/// The magnitude chart pane.
pub struct TrendPane;

/// Points of log10 ‖adjoint‖ for steps done, at most two per column: the
/// lowest and highest of each bucket, so neither a dip nor a spike is lost.
pub fn series(app: &App, columns: usize) -> Vec<(f64, f64)> {
    let order = app.trace.sweep_order();
    let done = app.sweep.cursor();
    let bucket = done.div_ceil(columns.max(1)).max(1);
    let mut points = Vec::new();
    for start in (0..done).step_by(bucket) {
        let mut low: Option<(f64, f64)> = None;
        let mut high: Option<(f64, f64)> = None;
        let end = (start + bucket).min(done);
        for (step, &node) in order.iter().enumerate().take(end).skip(start) {
            let Some(norm) = app.tally.norm(node) else {
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
    fn id(&self) -> PaneId {
        PaneId::Trend
    }

    fn title_detail(&self, _app: &App) -> String {
        "log10 ‖adjoint‖".to_string()
    }

    fn draw(&self, app: &App, area: Rect, buf: &mut Buffer) {
        let theme = app.theme();
        let groups: Vec<(&str, Option<f64>)> = app.tally.group_norms().collect();
        let group_rows = (groups.len() as u16 + 1).min(area.height / 2);
        let [chart_area, group_area] = area.layout(&Layout::vertical([
            Constraint::Fill(1),
            Constraint::Length(group_rows),
        ]));
        let points = series(app, chart_area.width as usize);
        if points.is_empty() {
            Paragraph::new(Line::styled(
                "no step done yet: s steps the sweep",
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
            let steps = app.sweep.cursor().max(1) as f64;
            let dataset = Dataset::default()
                .marker(Marker::Braille)
                .graph_type(GraphType::Line)
                .style(theme.chart)
                .data(&points);
            let x_axis = Axis::default()
                .style(theme.muted)
                .bounds([1.0, steps.max(2.0)])
                .labels(["1".to_string(), format!("step {}", app.sweep.cursor())]);
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
        let width = group_area.width as usize;
        let name_width = (width / 3).clamp(6, 24);
        let mut lines = vec![Line::styled(
            "per group, ‖adjoint‖ of processed nodes (sweep order)",
            theme.muted,
        )];
        for (name, norm) in groups.iter().take(group_rows.saturating_sub(1) as usize) {
            lines.push(Line::from(vec![
                Span::styled(fit(name, name_width) + " ", theme.text),
                Span::styled(magnitude_bar(*norm, 10) + " ", theme.chart_group),
                Span::styled(norm.map_or("—".to_string(), compact), theme.text),
            ]));
        }
        Paragraph::new(lines).render(group_area, buf);
    }
}
