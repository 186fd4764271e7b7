//! Flags: every flag raised so far, in the order raised (a non-finite
//! adjoint with its origin's class), then the diagnosis's rows for the whole
//! sweep: each origin with its class, and each other rule's finding with its
//! value against the threshold. Enter (or a click) selects the node.

use super::{Ctx, Move, Pane, Spec, fit, scrolled};
use crate::format::readable;
use crate::sweep::FlagKind;
use crate::tui::action::{Action, PaneId};
use crate::tui::diagnosis::{Row, rule_label, value_against_threshold};
use crate::tui::ids::NodeIx;
use crate::tui::layout::Slot;
use crate::tui::message::{Msg, Outbox};
use crate::tui::symbols::{ORIGIN, finding_style, finding_symbol, flag_style, flag_symbol};
use crate::tui::work::Job;
use ratatui::buffer::Buffer;
use ratatui::layout::Rect;
use ratatui::text::{Line, Span};

/// The pane's registration.
pub const SPEC: Spec = Spec {
    id: PaneId::new("Flags"),
    slot: Slot::Flags,
    about: "flags as the sweep raises them, then the diagnosis's origins and findings",
    keys: &[("Enter", Action::Enter, "select its node")],
    make: || Box::new(FlagsPane::default()),
};

/// The flags pane: the highlighted row and the first row shown.
#[derive(Debug, Default)]
pub struct FlagsPane {
    cursor: usize,
    offset: usize,
}

/// Rows in Flags: the sweep's flags so far, then the diagnosis's rows.
fn row_count(ctx: &Ctx) -> usize {
    ctx.session.sweep().flags().len()
        + ctx
            .session
            .diagnosis()
            .map_or(0, |diagnosed| diagnosed.rows.len())
}

/// The node a row of the pane names, and what the status line says on opening it.
fn row_target(ctx: &Ctx, at: usize) -> Option<(usize, String)> {
    let session = ctx.session;
    let trace = session.trace();
    let flags = session.sweep().flags();
    if let Some(flag) = flags.get(at) {
        return Some((
            flag.node,
            format!("{} at '{}'", flag.kind.name(), trace.node(flag.node).id),
        ));
    }
    let diagnosed = session.diagnosis()?;
    let row = *diagnosed.rows.get(at - flags.len())?;
    Some((diagnosed.row_node(row), diagnosed.row_text(trace, row)))
}

impl FlagsPane {
    fn first(&self, rows: usize) -> usize {
        scrolled(self.offset, self.cursor, rows)
    }
}

impl Pane for FlagsPane {
    fn title(&self, ctx: &Ctx) -> String {
        let raised = format!("{} raised", ctx.session.sweep().flags().len());
        let diagnosing = ctx
            .work
            .is_some_and(|running| matches!(running.job, Job::Diagnose(_)));
        match ctx.session.diagnosis() {
            Some(diagnosed) => {
                let origins = diagnosed.diagnosis.origins.len();
                let findings = diagnosed.rows.len() - origins;
                format!(
                    "{raised} · {origins} {} · {findings} {}",
                    plural(origins, "origin"),
                    plural(findings, "finding")
                )
            }
            None if diagnosing => format!("{raised} · diagnosing …"),
            None => ctx.say(&format!("{raised} · {{key:diagnose}} diagnoses")),
        }
    }

    fn draw(&self, ctx: &Ctx, area: Rect, buf: &mut Buffer) {
        let theme = ctx.theme;
        let session = ctx.session;
        let trace = session.trace();
        let flags = session.sweep().flags();
        let total = row_count(ctx);
        let done = session.sweep().is_done();
        if total == 0 {
            let text = match session.diagnosis() {
                Some(_) if done => {
                    "none: every value, partial and adjoint is finite, and no rule fired"
                }
                Some(_) => "none so far, and no rule fires on the whole sweep",
                None if done => "none: every value, partial and adjoint is finite",
                None => "none so far ({key:run_to_flag} runs to the next flag)",
            };
            buf.set_stringn(
                area.x,
                area.y,
                ctx.say(text),
                area.width as usize,
                theme.muted,
            );
            return;
        }
        let rows = area.height as usize;
        let first = self.first(rows);
        let shown: Vec<usize> = (first..total.min(first + rows)).collect();
        let id_width = shown
            .iter()
            .filter_map(|&at| row_target(ctx, at))
            .map(|(node, _)| trace.node(node).id.chars().count())
            .max()
            .unwrap_or(4)
            .clamp(4, (area.width as usize / 3).max(4));
        let step_width = session.sweep().len().to_string().len();
        let diagnosed = session.diagnosis();
        for (line, &at) in shown.iter().enumerate() {
            let id = |node: usize| fit(&trace.node(node).id, id_width) + " ";
            let step = |step: usize| format!("step {:<step_width$} ", step + 1);
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
                        Span::styled(step(flag.step), theme.muted),
                        Span::styled(id(flag.node), theme.text),
                        Span::styled(format!("{} ", flag.kind.name()), style),
                        Span::styled(
                            readable(flag.value, trace.node_dtype(flag.node)),
                            theme.text,
                        ),
                        Span::styled(class, style),
                    ]
                }
                (None, Some(diagnosed)) => match diagnosed.rows[at - flags.len()] {
                    Row::Origin(index) => {
                        let origin = diagnosed.origin(index);
                        vec![
                            Span::styled(format!("{ORIGIN} "), theme.flag_origin),
                            Span::styled(step(origin.step), theme.muted),
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
                            Span::styled(step(finding.step), theme.muted),
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
            if at == self.cursor && ctx.focused {
                buf.set_style(Rect::new(area.x, y, area.width, 1), theme.selection);
            }
        }
    }

    fn handle(&mut self, action: Action, ctx: &Ctx, out: &mut Outbox) {
        let total = row_count(ctx);
        if let Some(motion) = Move::of(action, ctx.rows) {
            self.cursor = motion.apply(self.cursor, total);
            self.offset = self.first(ctx.rows);
            return;
        }
        let open = match action {
            Action::Enter => true,
            Action::Click(_, row) => {
                let at = self.first(ctx.rows) + row as usize;
                if at < total {
                    self.cursor = at;
                }
                at < total
            }
            _ => false,
        };
        if open && let Some((node, text)) = row_target(ctx, self.cursor) {
            out.send(Msg::Jump(NodeIx::new(node)));
            out.send(Msg::Status(text));
        }
    }

    fn sync(&mut self, ctx: &Ctx, _out: &mut Outbox) {
        self.cursor = self.cursor.min(row_count(ctx).saturating_sub(1));
        self.offset = self.first(ctx.rows);
    }
}

fn plural(count: usize, word: &str) -> String {
    if count == 1 {
        word.to_string()
    } else {
        format!("{word}s")
    }
}

#[cfg(test)]
mod tests {
    use crate::dtype::Dtype;
    use crate::record::Tape;
    use crate::tui::action::Action;
    use crate::tui::panes::tests::{Fixture, assert_lines};

    #[test]
    fn flags_then_the_diagnosis_rows_in_sweep_order() {
        // ln 0 = −inf (IEEE 754-2019 §9.2.1), and its partial 1/0 = +inf (§7.3): all three
        // flags are raised while step 1 processes y, p's adjoint by y's contribution.
        let mut tape = Tape::new("log of zero", Dtype::F64);
        let p = tape.param("p", 0.0);
        let y = tape.log(p);
        let y = tape.rename(y, "y");
        let mut fixture = Fixture::new(tape.finish(y));
        fixture.app.update(Action::RunToEnd);
        assert_lines(
            &fixture.render_own("Flags", 60, 5),
            [
                "✗ step 1 y    non-finite value -inf                         ",
                "∂ step 1 y    non-finite partial inf                        ",
                "! step 1 p    non-finite adjoint inf (a)                    ",
                "◆ step 1 y    origin (a) non-finite forward value           ",
                "                                                            ",
            ],
        );
    }
}
