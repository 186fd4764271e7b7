//! Verify: the ranked suspects of `ebb::verify` with band, relative error and
//! evidence; Enter selects the suspect's node. For a recorded-partial suspect,
//! its recorded and recomputed partials side by side, differing elements
//! marked `≠`. When every check agrees it says so.

use super::{Ctx, Move, Pane, Spec, fit, fit_number};
use crate::format::compact;
use crate::tui::action::{Action, PaneId};
use crate::tui::checks::{EdgePair, pairs_for};
use crate::tui::ids::NodeIx;
use crate::tui::layout::Slot;
use crate::tui::message::{Msg, Outbox};
use crate::tui::symbols::{AGREES, DIFFERS, band_style, band_symbol};
use crate::tui::work::Job;
use crate::verify::{Evidence, Verification};
use ratatui::buffer::Buffer;
use ratatui::layout::Rect;
use ratatui::text::{Line, Span};
use ratatui::widgets::{Paragraph, Widget};

/// The pane's registration.
pub const SPEC: Spec = Spec {
    id: PaneId::new("Verify"),
    slot: Slot::Corner,
    about: "suspects of a wrong derivative, worst first; recorded against recomputed partials",
    keys: &[("Enter", Action::Enter, "select its node")],
    make: || Box::new(VerifyPane::default()),
};

/// The verification pane: the highlighted suspect, its side-by-side
/// partials, and whether it has asked for the checks.
#[derive(Debug, Default)]
pub struct VerifyPane {
    cursor: usize,
    pairs: Vec<EdgePair>,
    /// Which run the pairs were built from: (seconds it took, suspects), as an identity.
    built: Option<(u64, usize, usize)>,
    asked: bool,
}

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
fn list_rows(ctx: &Ctx, pairs: &[EdgePair], height: usize) -> usize {
    let suspects = ctx
        .session
        .verified()
        .map_or(0, |verified| verified.verification.suspects.len());
    let room = if pairs.is_empty() {
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

fn agreement_lines<'a>(ctx: &Ctx, verification: &Verification) -> Vec<Line<'a>> {
    let theme = ctx.theme;
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
    ctx: &Ctx,
    pair: &EdgePair,
    tolerance: f64,
    rows: usize,
    width: usize,
) -> Vec<Line<'a>> {
    let theme = ctx.theme;
    let trace = ctx.session.trace();
    let dtype = trace.node_dtype(pair.node);
    let shape = trace.node(pair.node).value.shape();
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
        pair.label(total.saturating_sub(1), shape)
            .chars()
            .count()
            .max(7)
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
            Span::styled(
                format!("{:>label_width$}  ", pair.label(at, shape)),
                theme.muted,
            ),
            Span::styled(
                fit(
                    &fit_number(pair.recorded[at], dtype, number_width),
                    number_width,
                ) + " ",
                recorded_style,
            ),
            Span::styled(
                fit_number(pair.recomputed[at], dtype, number_width),
                theme.text,
            ),
        ]));
    }
    lines
}

impl VerifyPane {
    /// Builds the highlighted suspect's side-by-side partials when the run or the highlight changed.
    fn rebuild(&mut self, ctx: &Ctx) {
        let Some(verified) = ctx.session.verified() else {
            (self.pairs, self.built) = (Vec::new(), None);
            return;
        };
        let suspects = verified.verification.suspects.len();
        self.cursor = self.cursor.min(suspects.saturating_sub(1));
        let key = (verified.seconds.to_bits(), suspects, self.cursor);
        if self.built != Some(key) {
            self.pairs = pairs_for(ctx.session.trace(), &verified.verification, self.cursor);
            self.built = Some(key);
        }
    }
}

impl Pane for VerifyPane {
    fn title(&self, ctx: &Ctx) -> String {
        match ctx.session.verified() {
            None if ctx
                .work
                .is_some_and(|running| matches!(running.job, Job::Verify(_))) =>
            {
                "verifying …".to_string()
            }
            None => "not run".to_string(),
            Some(verified) if verified.verification.agrees() => "all agree".to_string(),
            Some(verified) if verified.verification.suspects.is_empty() => {
                "cannot judge".to_string()
            }
            Some(verified) => format!("{} suspect(s)", verified.verification.suspects.len()),
        }
    }

    fn draw(&self, ctx: &Ctx, area: Rect, buf: &mut Buffer) {
        let theme = ctx.theme;
        let trace = ctx.session.trace();
        let width = area.width as usize;
        let Some(verified) = ctx.session.verified() else {
            let running = ctx
                .work
                .is_some_and(|running| matches!(running.job, Job::Verify(_)));
            let text = if running {
                ctx.say("verifying… keys keep working; {key:cancel} stops it")
            } else {
                ctx.say("not run yet: {key:verify} runs every check (recorded partials, finite differences, reported gradients, tangent sweep)")
            };
            Paragraph::new(Line::styled(text, theme.muted))
                .wrap(ratatui::widgets::Wrap { trim: true })
                .render(area, buf);
            return;
        };
        let verification = &verified.verification;
        if verification.agrees() {
            Paragraph::new(agreement_lines(ctx, verification)).render(area, buf);
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
            ctx.say(&format!(
                "{} suspect(s), worst first · tolerance {:e} · {{key:enter}} selects · {{key:verify}} reruns",
                verification.suspects.len(),
                verification.tolerance
            )),
            theme.muted,
        )];
        let rows = list_rows(ctx, &self.pairs, area.height as usize);
        let first = first_shown(self.cursor, rows);
        let id_width = verification
            .suspects
            .iter()
            .map(|suspect| trace.node(suspect.node).id.chars().count())
            .max()
            .unwrap_or(4)
            .clamp(4, (width / 4).max(4));
        for (at, suspect) in verification
            .suspects
            .iter()
            .enumerate()
            .skip(first)
            .take(rows)
        {
            let node = trace.node(suspect.node);
            let style = band_style(theme, suspect.band);
            let pointer = if at == self.cursor { "›" } else { " " };
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
            if at == self.cursor && ctx.focused {
                line = line.patch_style(theme.selection);
            }
            lines.push(line);
        }
        if let Some(suspect) = verification.suspects.get(self.cursor) {
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
        let per_pair = left / self.pairs.len().max(1);
        for pair in &self.pairs {
            lines.extend(pair_lines(
                ctx,
                pair,
                verification.tolerance,
                per_pair,
                width,
            ));
        }
        Paragraph::new(lines).render(area, buf);
    }

    fn handle(&mut self, action: Action, ctx: &Ctx, out: &mut Outbox) {
        let Some(verified) = ctx.session.verified() else {
            if matches!(action, Action::Enter | Action::Click(..)) {
                out.send(Msg::Status(
                    "the checks have not run: {key:verify} runs them".to_string(),
                ));
            }
            return;
        };
        let len = verified.verification.suspects.len();
        if let Some(motion) = Move::of(action, ctx.rows) {
            self.cursor = motion.apply(self.cursor, len);
            self.rebuild(ctx);
            return;
        }
        let open = match action {
            Action::Enter => true,
            Action::Click(_, row) => {
                let rows = list_rows(ctx, &self.pairs, ctx.rows);
                let row = row as usize;
                if row == 0 || row > rows {
                    return;
                }
                let at = first_shown(self.cursor, rows) + row - 1;
                if at < len {
                    self.cursor = at;
                    self.rebuild(ctx);
                }
                at < len
            }
            _ => false,
        };
        if let Some(suspect) = verified
            .verification
            .suspects
            .get(self.cursor)
            .filter(|_| open)
        {
            out.send(Msg::Jump(NodeIx::new(suspect.node)));
            out.send(Msg::Status(format!(
                "{} {}: {} ({})",
                band_symbol(suspect.band),
                ctx.session.trace().node(suspect.node).id,
                suspect.band.name(),
                evidence_name(suspect.evidence)
            )));
        }
    }

    fn sync(&mut self, ctx: &Ctx, out: &mut Outbox) {
        // The checks run once, when the pane is first shown with focus.
        if ctx.focused && !self.asked && ctx.session.verified().is_none() {
            self.asked = true;
            out.send(Msg::Request(Job::Verify(ctx.dtype())));
        }
        self.rebuild(ctx);
    }
}
