//! Flags: every flag raised so far, in the order raised; Enter (or a click)
//! selects the flagged node.

use super::{Move, Pane, fit};
use crate::format::number;
use crate::tui::action::PaneId;
use crate::tui::app::App;
use crate::tui::symbols::{flag_style, flag_symbol};
use ratatui::buffer::Buffer;
use ratatui::layout::Rect;
use ratatui::text::{Line, Span};

/// The flags pane.
pub struct FlagsPane;

fn first_shown(app: &App, rows: usize) -> usize {
    app.flag_cursor.saturating_sub(rows.saturating_sub(1))
}

impl Pane for FlagsPane {
    fn id(&self) -> PaneId {
        PaneId::Flags
    }

    fn title_detail(&self, app: &App) -> String {
        format!("{} raised", app.sweep.flags().len())
    }

    fn draw(&self, app: &App, area: Rect, buf: &mut Buffer) {
        let theme = app.theme();
        let flags = app.sweep.flags();
        if flags.is_empty() {
            let text = if app.sweep.is_done() {
                "none: every value, partial and adjoint is finite"
            } else {
                "none so far (f runs to the next flag)"
            };
            buf.set_stringn(area.x, area.y, text, area.width as usize, theme.muted);
            return;
        }
        let rows = area.height as usize;
        let first = first_shown(app, rows);
        let id_width = (area.width as usize / 4).clamp(6, 20);
        for (line, at) in (first..flags.len().min(first + rows)).enumerate() {
            let flag = &flags[at];
            let style = flag_style(theme, flag.kind);
            let spans = vec![
                Span::styled(format!("{} ", flag_symbol(flag.kind)), style),
                Span::styled(format!("step {:<5} ", flag.step + 1), theme.muted),
                Span::styled(fit(&app.trace.node(flag.node).id, id_width) + " ", theme.text),
                Span::styled(format!("{} ", flag.kind.name()), style),
                Span::styled(number(flag.value), theme.text),
            ];
            let y = area.y + line as u16;
            buf.set_line(area.x, y, &Line::from(spans), area.width);
            if at == app.flag_cursor && app.focus == PaneId::Flags {
                buf.set_style(Rect::new(area.x, y, area.width, 1), theme.selection);
            }
        }
    }

    fn move_cursor(&self, app: &mut App, motion: Move) {
        app.flag_cursor = motion.apply(app.flag_cursor, app.sweep.flags().len());
    }

    fn enter(&self, app: &mut App) {
        if let Some(flag) = app.sweep.flags().get(app.flag_cursor) {
            let (node, name) = (flag.node, flag.kind.name());
            app.jump(node);
            app.message = Some(format!("{name} at {}", app.trace.node(node).id));
        }
    }

    fn click(&self, app: &mut App, row: usize) {
        let rows = crate::tui::layout::pane_area(app, PaneId::Flags).map_or(1, |area| area.height.saturating_sub(2) as usize);
        let at = first_shown(app, rows) + row;
        if at < app.sweep.flags().len() {
            app.flag_cursor = at;
            self.enter(app);
        }
    }
}
