//! Flags: every flag raised so far, in the order raised (a non-finite
//! adjoint with its origin's class), then the diagnosis's rows for the whole
//! sweep: each origin with its class, and each other rule's finding with its
//! value against the threshold. Enter (or a click) selects the node.

use super::{Move, Pane, fit};
use crate::format::number;
use crate::sweep::FlagKind;
use crate::tui::action::PaneId;
use crate::tui::app::App;
use crate::tui::diagnosis::{Row, rule_label, value_against_threshold};
use crate::tui::symbols::{ORIGIN, finding_style, finding_symbol, flag_style, flag_symbol};
use ratatui::buffer::Buffer;
use ratatui::layout::Rect;
use ratatui::text::{Line, Span};

/// The flags pane.
pub struct FlagsPane;

fn first_shown(app: &App, rows: usize) -> usize {
    app.flag_cursor.saturating_sub(rows.saturating_sub(1))
}

/// The node a row of the pane names, and what the status line says on opening it.
fn row_target(app: &App, at: usize) -> Option<(usize, String)> {
    let flags = app.sweep.flags();
    if let Some(flag) = flags.get(at) {
        return Some((
            flag.node,
            format!("{} at {}", flag.kind.name(), app.trace.node(flag.node).id),
        ));
    }
    let diagnosed = app.diagnosis()?;
    let row = *diagnosed.rows.get(at - flags.len())?;
    let node = diagnosed.row_node(row);
    let text = match row {
        Row::Origin(index) => {
            let origin = diagnosed.origin(index);
            format!(
                "origin ({}) at '{}': {}",
                origin.class.letter(),
                app.trace.node(node).id,
                origin.explanation
            )
        }
        Row::Finding(index) => diagnosed
            .finding(index)
            .describe(app.trace, app.trace.dtype()),
    };
    Some((node, text))
}

impl Pane for FlagsPane {
    fn id(&self) -> PaneId {
        PaneId::Flags
    }

    fn title_detail(&self, app: &App) -> String {
        let raised = format!("{} raised", app.sweep.flags().len());
        match app.diagnosis() {
            Some(diagnosed) => {
                let origins = diagnosed.diagnosis.origins.len();
                let findings = diagnosed.rows.len() - origins;
                format!(
                    "{raised} · {origins} {} · {findings} {}",
                    plural(origins, "origin"),
                    plural(findings, "finding")
                )
            }
            None if app.has_work() => format!("{raised} · diagnosing …"),
            None => format!("{raised} · D diagnoses"),
        }
    }

    fn draw(&self, app: &App, area: Rect, buf: &mut Buffer) {
        let theme = app.theme();
        let flags = app.sweep.flags();
        let total = app.flag_rows();
        if total == 0 {
            let text = match app.diagnosis() {
                Some(_) if app.sweep.is_done() => {
                    "none: every value, partial and adjoint is finite, and no rule fired"
                }
                Some(_) => "none so far, and no rule fires on the whole sweep",
                None if app.sweep.is_done() => "none: every value, partial and adjoint is finite",
                None => "none so far (f runs to the next flag)",
            };
            buf.set_stringn(area.x, area.y, text, area.width as usize, theme.muted);
            return;
        }
        let rows = area.height as usize;
        let first = first_shown(app, rows);
        let id_width = (area.width as usize / 4).clamp(6, 20);
        let diagnosed = app.diagnosis();
        for (line, at) in (first..total.min(first + rows)).enumerate() {
            let id = |node: usize| fit(&app.trace.node(node).id, id_width) + " ";
            let spans = match (flags.get(at), diagnosed) {
                (Some(flag), _) => {
                    let style = flag_style(theme, flag.kind);
                    let class = diagnosed
                        .filter(|_| flag.kind == FlagKind::NonFiniteAdjoint)
                        .and_then(|diagnosed| diagnosed.diagnosis.origin_of(flag.node))
                        .map_or(String::new(), |origin| {
                            format!(" ({})", origin.class.letter())
                        });
                    vec![
                        Span::styled(format!("{} ", flag_symbol(flag.kind)), style),
                        Span::styled(format!("step {:<5} ", flag.step + 1), theme.muted),
                        Span::styled(id(flag.node), theme.text),
                        Span::styled(format!("{} ", flag.kind.name()), style),
                        Span::styled(number(flag.value), theme.text),
                        Span::styled(class, style),
                    ]
                }
                (None, Some(diagnosed)) => match diagnosed.rows[at - flags.len()] {
                    Row::Origin(index) => {
                        let origin = diagnosed.origin(index);
                        vec![
                            Span::styled(format!("{ORIGIN} "), theme.flag_origin),
                            Span::styled(format!("step {:<5} ", origin.step + 1), theme.muted),
                            Span::styled(id(origin.node), theme.text),
                            Span::styled(
                                format!("origin ({}) ", origin.class.letter()),
                                theme.flag_origin,
                            ),
                            Span::styled(origin.class.title(), theme.text),
                        ]
                    }
                    Row::Finding(index) => {
                        let finding = diagnosed.finding(index);
                        let style = finding_style(theme, finding);
                        let class = finding
                            .class
                            .map_or(String::new(), |class| format!(" ({})", class.letter()));
                        vec![
                            Span::styled(format!("{} ", finding_symbol(finding)), style),
                            Span::styled(format!("step {:<5} ", finding.step + 1), theme.muted),
                            Span::styled(id(finding.node), theme.text),
                            Span::styled(format!("{}{class} ", rule_label(finding.rule)), style),
                            Span::styled(value_against_threshold(finding), theme.text),
                        ]
                    }
                },
                (None, None) => continue,
            };
            let y = area.y + line as u16;
            buf.set_line(area.x, y, &Line::from(spans), area.width);
            if at == app.flag_cursor && app.focus == PaneId::Flags {
                buf.set_style(Rect::new(area.x, y, area.width, 1), theme.selection);
            }
        }
    }

    fn move_cursor(&self, app: &mut App, motion: Move) {
        app.flag_cursor = motion.apply(app.flag_cursor, app.flag_rows());
    }

    fn enter(&self, app: &mut App) {
        if let Some((node, text)) = row_target(app, app.flag_cursor) {
            app.jump(node);
            app.message = Some(text);
        }
    }

    fn click(&self, app: &mut App, row: usize) {
        let rows = crate::tui::layout::pane_area(app, PaneId::Flags)
            .map_or(1, |area| area.height.saturating_sub(2) as usize);
        let at = first_shown(app, rows) + row;
        if at < app.flag_rows() {
            app.flag_cursor = at;
            self.enter(app);
        }
    }
}

fn plural(count: usize, word: &str) -> String {
    if count == 1 {
        word.to_string()
    } else {
        format!("{word}s")
    }
}
