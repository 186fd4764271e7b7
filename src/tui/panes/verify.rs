//! Verify: the ranked suspects of `ebb::verify` with band, relative error and
//! evidence; Enter selects the suspect's node. For a recorded-partial suspect,
//! its recorded and recomputed partials side by side, differing elements
//! marked `≠`. When every check agrees it says so.

use super::{Move, Pane, fit, fit_number};
use crate::format::compact;
use crate::tui::action::PaneId;
use crate::tui::app::App;
use crate::tui::checks::EdgePair;
use crate::tui::symbols::{AGREES, DIFFERS, band_style, band_symbol};
use crate::verify::{Evidence, Verification};
use ratatui::buffer::Buffer;
use ratatui::layout::Rect;
use ratatui::text::{Line, Span};
use ratatui::widgets::{Paragraph, Widget};

/// The verification pane.
pub struct VerifyPane;

/// What a check is called in the list.
pub fn evidence_name(evidence: Evidence) -> &'static str {
    match evidence {
        Evidence::RecordedPartial => "recorded partial",
        Evidence::FiniteDifference => "finite differences",
        Evidence::ReportedGradient => "reported gradient",
        Evidence::TangentIdentity => "tangent identity",
    }
}

/// Rows given to the suspect list: all of them unless partials are shown below.
fn list_rows(app: &App, height: usize) -> usize {
    let suspects = app
        .checks
        .verification
        .as_ref()
        .map_or(0, |v| v.suspects.len());
    let room = if app.checks.pairs.is_empty() {
        height.saturating_sub(3)
    } else {
        (height / 3).max(3)
    };
    suspects.min(room.max(1))
}

/// The first suspect shown, so the cursor is in view.
fn first_shown(cursor: usize, rows: usize) -> usize {
    cursor.saturating_sub(rows.saturating_sub(1))
}

fn agreement_lines<'a>(app: &App, verification: &Verification) -> Vec<Line<'a>> {
    let theme = app.theme();
    let mut lines = vec![Line::styled(
        format!(
            "{AGREES} every check agrees within {:e}: no suspect",
            verification.tolerance
        ),
        theme.done,
    )];
    lines.push(Line::styled(
        match verification.partials.len() {
            0 => "  no recorded partials of catalog ops to check".to_string(),
            count => format!("  {count} recorded partial(s) of catalog ops match the op table"),
        },
        theme.text,
    ));
    lines.push(Line::styled(
        format!(
            "  {} parameter(s) agree with central differences",
            verification.differences.len()
        ),
        theme.text,
    ));
    if !verification.reported.is_empty() {
        lines.push(Line::styled(
            format!(
                "  {} reported gradient(s) match the sweep",
                verification.reported.len()
            ),
            theme.text,
        ));
    }
    if let Some(tangent) = verification.tangent {
        lines.push(Line::styled(
            format!(
                "  tangent ∂f/∂v {} = ⟨v, ∇f⟩ {}",
                compact(tangent.tangent),
                compact(tangent.reverse)
            ),
            theme.text,
        ));
    }
    if !verification.unchecked.is_empty() {
        lines.push(Line::styled(
            format!(
                "  {} recorded partial(s) too large to check",
                verification.unchecked.len()
            ),
            theme.muted,
        ));
    }
    lines
}

/// One edge's recorded and recomputed partials, the rows around the worst element.
fn pair_lines<'a>(
    app: &App,
    pair: &EdgePair,
    tolerance: f64,
    rows: usize,
    width: usize,
) -> Vec<Line<'a>> {
    let theme = app.theme();
    let trace = app.trace;
    let consumer = trace.node(pair.node);
    let input = &trace.node(consumer.inputs[pair.slot]).id;
    let total = pair.recorded.len();
    let mut lines = vec![Line::from(vec![
        Span::styled(
            format!("{} ∂ in {} ← {input}: ", consumer.id, pair.slot),
            theme.title,
        ),
        Span::styled(
            format!(
                "recorded vs {}'s rule · {} of {total} differ",
                consumer.op_name, pair.differing
            ),
            theme.muted,
        ),
    ])];
    let label_width = if pair.columns == 1 {
        total.to_string().len().max(7)
    } else {
        12
    };
    let number_width = (width.saturating_sub(2 + label_width + 2) / 2)
        .saturating_sub(1)
        .max(8);
    lines.push(Line::styled(
        format!(
            "  {:>label_width$}  {} {}",
            "element",
            fit("recorded", number_width),
            "recomputed"
        ),
        theme.muted,
    ));
    let shown = rows.saturating_sub(2).max(1);
    let first = pair
        .worst
        .saturating_sub(2)
        .min(total.saturating_sub(shown));
    for at in first..total.min(first + shown) {
        let differs = pair.differs(at, tolerance);
        let (mark, style) = if differs {
            (DIFFERS, theme.flag_value)
        } else {
            (AGREES, theme.done)
        };
        let recorded_style = if differs {
            theme.flag_value
        } else {
            theme.text
        };
        lines.push(Line::from(vec![
            Span::styled(format!("{mark} "), style),
            Span::styled(format!("{:>label_width$}  ", pair.label(at)), theme.muted),
            Span::styled(
                fit(&fit_number(pair.recorded[at], number_width), number_width) + " ",
                recorded_style,
            ),
            Span::styled(fit_number(pair.recomputed[at], number_width), theme.text),
        ]));
    }
    lines
}

impl Pane for VerifyPane {
    fn id(&self) -> PaneId {
        PaneId::Verify
    }

    fn title_detail(&self, app: &App) -> String {
        match &app.checks.verification {
            None => "not run".to_string(),
            Some(verification) if verification.agrees() => "all agree".to_string(),
            Some(verification) if verification.suspects.is_empty() => "cannot judge".to_string(),
            Some(verification) => format!("{} suspect(s)", verification.suspects.len()),
        }
    }

    fn draw(&self, app: &App, area: Rect, buf: &mut Buffer) {
        let theme = app.theme();
        let trace = app.trace;
        let width = area.width as usize;
        let Some(verification) = &app.checks.verification else {
            let text = if app.checks.requested {
                "verifying… the view resumes when the checks finish"
            } else {
                "not run yet: v runs every check (recorded partials, finite differences, reported gradients, tangent sweep)"
            };
            Paragraph::new(Line::styled(text, theme.muted))
                .wrap(ratatui::widgets::Wrap { trim: true })
                .render(area, buf);
            return;
        };
        if verification.agrees() {
            Paragraph::new(agreement_lines(app, verification)).render(area, buf);
            return;
        }
        if verification.suspects.is_empty() {
            // No suspect, yet no agreement: the numbers are not finite.
            let text = format!(
                "{} cannot judge: {} check(s) compare NaN or infinite numbers and the sweep raised {} flag(s); NaN never agrees with anything. The Flags pane shows where it started.",
                band_symbol(crate::verify::Band::NotFinite),
                verification.not_finite.len(),
                verification.sweep_flags
            );
            Paragraph::new(Line::styled(
                text,
                band_style(theme, crate::verify::Band::NotFinite),
            ))
            .wrap(ratatui::widgets::Wrap { trim: true })
            .render(area, buf);
            return;
        }
        let mut lines = vec![Line::styled(
            format!(
                "{} suspect(s), worst first · tolerance {:e} · Enter selects · v reruns",
                verification.suspects.len(),
                verification.tolerance
            ),
            theme.muted,
        )];
        let rows = list_rows(app, area.height as usize);
        let first = first_shown(app.checks.cursor, rows);
        let id_width = (width / 5).clamp(6, 20);
        for (at, suspect) in verification
            .suspects
            .iter()
            .enumerate()
            .skip(first)
            .take(rows)
        {
            let node = trace.node(suspect.node);
            let style = band_style(theme, suspect.band);
            let pointer = if at == app.checks.cursor { "›" } else { " " };
            let mut line = Line::from(vec![
                Span::styled(format!("{pointer}{} ", band_symbol(suspect.band)), style),
                Span::styled(fit(&node.id, id_width) + " ", theme.text),
                Span::styled(fit(suspect.band.name(), 14) + " ", style),
                Span::styled(format!("rel {:<7} ", compact(suspect.relative)), theme.text),
                Span::styled(
                    format!("{} · {}", evidence_name(suspect.evidence), node.op_name),
                    theme.muted,
                ),
            ]);
            if at == app.checks.cursor && app.focus == PaneId::Verify {
                line = line.patch_style(theme.selection);
            }
            lines.push(line);
        }
        if let Some(suspect) = verification.suspects.get(app.checks.cursor) {
            // The evidence in words, over at most two lines.
            let chars: Vec<char> = suspect.detail.chars().collect();
            for (at, chunk) in chars.chunks(width.max(1)).take(2).enumerate() {
                let text: String = chunk.iter().collect();
                let text = if at == 1 && chars.len() > 2 * width {
                    fit(&(text + "…"), width)
                } else {
                    text
                };
                lines.push(Line::styled(text, theme.muted));
            }
        }
        let left = (area.height as usize).saturating_sub(lines.len());
        let per_pair = left / app.checks.pairs.len().max(1);
        for pair in &app.checks.pairs {
            lines.extend(pair_lines(
                app,
                pair,
                verification.tolerance,
                per_pair,
                width,
            ));
        }
        Paragraph::new(lines).render(area, buf);
    }

    fn move_cursor(&self, app: &mut App, motion: Move) {
        let len = app
            .checks
            .verification
            .as_ref()
            .map_or(0, |v| v.suspects.len());
        let at = motion.apply(app.checks.cursor, len);
        let trace = app.trace;
        app.checks.highlight(trace, at);
    }

    /// Selects the highlighted suspect's node in Order, Node, Inflow and Edges.
    fn enter(&self, app: &mut App) {
        let Some(suspect) = app
            .checks
            .verification
            .as_ref()
            .and_then(|v| v.suspects.get(app.checks.cursor))
        else {
            if app.checks.verification.is_none() {
                app.message = Some("the checks have not run: v runs them".to_string());
            }
            return;
        };
        let (node, band, evidence) = (suspect.node, suspect.band, suspect.evidence);
        app.jump(node);
        app.message = Some(format!(
            "{} {}: {} ({})",
            band_symbol(band),
            app.trace.node(node).id,
            band.name(),
            evidence_name(evidence)
        ));
    }

    fn click(&self, app: &mut App, row: usize) {
        let Some(len) = app.checks.verification.as_ref().map(|v| v.suspects.len()) else {
            return;
        };
        let height = crate::tui::layout::pane_area(app, PaneId::Verify)
            .map_or(3, |area| area.height.saturating_sub(2) as usize);
        let rows = list_rows(app, height);
        if row == 0 || row > rows {
            return;
        }
        let at = first_shown(app.checks.cursor, rows) + row - 1;
        if at < len {
            let trace = app.trace;
            app.checks.highlight(trace, at);
            self.enter(app);
        }
    }
}
