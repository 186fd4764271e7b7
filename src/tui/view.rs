//! Drawing one frame: `impl Widget for &App` borrows the state and never
//! changes it. Panes in their frames, the status line, then any overlay.

use super::action::{Action, PaneId};
use super::app::{App, Overlay};
use super::keymap::Scope;
use super::layout::{self, MIN_HEIGHT, MIN_WIDTH, Screen};
use super::panes;
use super::prompt::{Prompt, PromptKind};
use super::symbols::{self, CURRENT, DONE, FLAG_KINDS, ORIGIN, PENDING};
use crate::verify::Band;
use ratatui::buffer::Buffer;
use ratatui::layout::{Constraint, Flex, Layout, Rect};
use ratatui::text::{Line, Span};
use ratatui::widgets::{Block, Clear, Paragraph, Widget, Wrap};

impl Widget for &App<'_> {
    fn render(self, area: Rect, buf: &mut Buffer) {
        let theme = self.theme();
        buf.set_style(area, theme.text);
        // The layout state's area is the one the app was last resized to; draw into this one.
        let mut state = self.layout().clone();
        state.area = area;
        let Screen::Panes { panes, status } = layout::arrange(&state) else {
            too_small(self, area, buf);
            return;
        };
        for (pane, pane_area) in panes {
            let tabs = layout::tabs(&state, pane);
            frame(self, pane, pane_area, &tabs, buf);
        }
        status_line(self, status, buf);
        match self.overlay() {
            Overlay::None => {}
            Overlay::Help(scroll) => help(self, *scroll, area, buf),
            Overlay::Prompt(prompt) => prompt_box(self, prompt, status, buf),
        }
    }
}

fn pane_number(pane: PaneId) -> usize {
    pane.number()
}

/// A pane in its border, the title naming it (or, in a shared slot, every
/// pane of the slot as tabs; the others by number alone when names do not fit).
fn frame(app: &App, pane: PaneId, area: Rect, tabs: &[PaneId], buf: &mut Buffer) {
    let theme = app.theme();
    let focused = app.focus() == pane;
    let border = if focused { theme.focus } else { theme.border };
    let title_style = if focused { theme.focus } else { theme.title };
    let mut title: Vec<Span> = Vec::new();
    if !tabs.is_empty() {
        let named_width: usize = tabs
            .iter()
            .map(|tab| tab.name().chars().count() + 4)
            .sum::<usize>()
            + tabs.len()
            - 1;
        let short = named_width > area.width.saturating_sub(2) as usize;
        for (at, &tab) in tabs.iter().enumerate() {
            if at > 0 {
                title.push(Span::styled("│", theme.border));
            }
            let style = if tab == pane {
                title_style
            } else {
                theme.muted
            };
            let text = if short && tab != pane {
                format!(" {} ", pane_number(tab))
            } else {
                format!(" {} {} ", pane_number(tab), tab.name())
            };
            title.push(Span::styled(text, style));
        }
    } else {
        title.push(Span::styled(
            format!(" {} {} ", pane_number(pane), pane.name()),
            title_style,
        ));
    }
    let shown = app.pane(pane);
    let mut ctx = app.ctx(pane);
    let detail = shown.title(&ctx);
    if !detail.is_empty() {
        title.push(Span::styled(format!("· {detail} "), theme.muted));
    }
    if app.layout().zoomed {
        let keys = app.keymap();
        title.push(Span::styled(
            format!(
                "(zoomed: {} or {} returns) ",
                keys.label_for("zoom", pane),
                keys.label_for("cancel", pane)
            ),
            theme.muted,
        ));
    }
    let block = Block::bordered()
        .border_style(border)
        .title(Line::from(title));
    let inner = block.inner(area);
    block.render(area, buf);
    ctx.rows = inner.height as usize;
    shown.draw(&ctx, inner, buf);
}

/// Title, dtype, step k of n, the current node, the work under way, then a
/// message or the focused pane's hints.
fn status_line(app: &App, area: Rect, buf: &mut Buffer) {
    let theme = app.theme();
    let session = app.session();
    let trace = session.trace();
    let sweep = session.sweep();
    let node_text = |node: usize| format!("{} ({})", trace.node(node).id, trace.node(node).op_name);
    // The title only where there is room: at 80 columns the hints matter more.
    let title = if area.width >= layout::WIDE {
        format!(" {} │", trace.title())
    } else {
        String::new()
    };
    let dtype = if trace.dtype() == session.recorded().dtype() {
        trace.dtype().to_string()
    } else {
        format!(
            "{}, sums in {} (recorded {})",
            trace.dtype(),
            trace.accumulate(),
            session.recorded().dtype()
        )
    };
    let left = match session.forward() {
        Some(forward) => {
            let next = forward
                .current()
                .map_or("tangent sweep done".to_string(), |node| {
                    format!("next {}", node_text(node))
                });
            let (cursor, len) = (forward.sweep.cursor(), forward.sweep.len());
            format!(" ebb │ FORWARD MODE │{title} {dtype} │ tangent step {cursor}/{len} │ {next} ")
        }
        None => {
            let next = sweep.current().map_or("sweep done".to_string(), |node| {
                format!("next {}", node_text(node))
            });
            format!(
                " ebb │{title} {dtype} │ step {}/{} │ {next} ",
                sweep.cursor(),
                sweep.len()
            )
        }
    };
    let mut spans = vec![Span::styled(left, theme.status)];
    if let Some(running) = app.running() {
        let (stage, fraction) = running.progress.read();
        let seconds = running.started.elapsed().as_secs_f64();
        let done = if fraction > 0.0 {
            format!(" {:.0}%", fraction * 100.0)
        } else {
            String::new()
        };
        let what = running.job.describe();
        // The stage, where it says more than the job does ("diagnosis" in
        // "diagnosing" does not).
        let same = |a: &str, b: &str| a.chars().take(6).eq(b.chars().take(6));
        let stage = if stage.is_empty() || same(&what, &stage) {
            String::new()
        } else {
            format!(" ({stage})")
        };
        spans.push(Span::styled(
            format!(
                " ⟳ {what}{stage}{done} {seconds:.1} s, {} cancels │",
                app.keymap().label_for("cancel", app.focus())
            ),
            theme.current,
        ));
    }
    match app.message() {
        Some(message) => spans.push(Span::styled(format!(" {message}"), theme.key)),
        None => {
            for (key, hint) in mode_hints(app) {
                spans.push(Span::styled(format!(" {key}"), theme.key));
                spans.push(Span::styled(format!(" {hint}"), theme.muted));
            }
        }
    }
    buf.set_line(area.x, area.y, &Line::from(spans), area.width);
}

/// The key map's hints, adjusted to the mode: forward mode has no flags to
/// run to, and its own keys for the direction and the way back.
pub fn mode_hints(app: &App) -> Vec<(String, &'static str)> {
    let keymap = app.keymap();
    let mut hints = keymap.hints(app.focus());
    let key = |action: Action| keymap.keys_for(Scope::Global, action).into_iter().next();
    if app.session().forward().is_some() {
        hints.retain(|(_, hint)| *hint != Action::RunToFlag.hint());
        let at = hints
            .iter()
            .position(|(_, hint)| *hint == Action::Back.hint())
            .map_or(0, |at| at + 1);
        let extra: Vec<(String, &'static str)> = [
            (Action::CycleDirection, "direction"),
            (Action::ToggleForward, "reverse mode"),
        ]
        .into_iter()
        .filter_map(|(action, hint)| key(action).map(|key| (key, hint)))
        .collect();
        hints.splice(at..at, extra);
    } else if let Some(toggle) = key(Action::ToggleForward) {
        hints.push((toggle, Action::ToggleForward.hint()));
    }
    hints
}

/// One line on the mode in effect, its keys from the live key map.
fn mode_line(app: &App) -> String {
    let keys = |action: Action| app.keymap().keys_for(Scope::Global, action).join("/");
    match app.session().forward() {
        Some(forward) => format!(
            "Now: FORWARD MODE, {}. {} steps the tangent sweep in recording order, {} steps back, {} runs to the end, {} restarts; {} changes the direction; {} returns to the reverse sweep.",
            forward.description.clone(),
            keys(Action::Step),
            keys(Action::Back),
            keys(Action::RunToEnd),
            keys(Action::Restart),
            keys(Action::CycleDirection),
            keys(Action::ToggleForward)
        ),
        None => format!(
            "Now: the reverse sweep. {} steps it in sweep order; {} switches to forward mode (a tangent sweep of dual numbers).",
            keys(Action::Step),
            keys(Action::ToggleForward)
        ),
    }
}

fn too_small(app: &App, area: Rect, buf: &mut Buffer) {
    let theme = app.theme();
    let text = vec![
        Line::styled(
            format!(
                "Ebb needs a terminal of at least {MIN_WIDTH}×{MIN_HEIGHT}; this one is {}×{}.",
                area.width, area.height
            ),
            theme.title,
        ),
        Line::styled(
            "Enlarge the window, or use `ebb sweep TRACE` or `ebb check TRACE` for text output.",
            theme.text,
        ),
        Line::styled(
            format!("{} quits.", app.keymap().label_for("quit", app.focus())),
            theme.muted,
        ),
    ];
    let [middle] = area.layout(&Layout::vertical([Constraint::Length(4)]).flex(Flex::Center));
    Paragraph::new(text)
        .wrap(Wrap { trim: true })
        .centered()
        .render(middle, buf);
}

/// Every key from the live key map, and what the symbols mean.
fn help(app: &App, scroll: usize, area: Rect, buf: &mut Buffer) {
    let theme = app.theme();
    let mut lines: Vec<Line> = vec![Line::styled(mode_line(app), theme.current), Line::raw("")];
    for (heading, rows) in app.keymap().help() {
        lines.push(Line::styled(heading, theme.title));
        for (keys, what) in rows {
            lines.push(Line::from(vec![
                Span::styled(format!("  {keys:<18}"), theme.key),
                Span::styled(what, theme.text),
            ]));
        }
        lines.push(Line::raw(""));
    }
    lines.push(Line::styled("Symbols", theme.title));
    lines.push(Line::from(vec![
        Span::styled(format!("  {DONE} done  "), theme.done),
        Span::styled(format!("{CURRENT} current (next step)  "), theme.current),
        Span::styled(format!("{PENDING} pending"), theme.pending),
    ]));
    let mut flag_line = vec![Span::raw("  ")];
    for kind in FLAG_KINDS {
        flag_line.push(Span::styled(
            format!("{} {}  ", symbols::flag_symbol(kind), kind.name()),
            symbols::flag_style(theme, kind),
        ));
    }
    lines.push(Line::from(flag_line));
    lines.push(Line::from(vec![
        Span::styled(
            format!("  {ORIGIN} origin of a non-finite adjoint (a–e)  "),
            theme.flag_origin,
        ),
        Span::styled(
            "⇑ overflow  ↗ near overflow  ↑ exploding  ≫ gain above  ",
            theme.flag_large,
        ),
        Span::styled("⇓ underflow  ↓ vanishing  ≪ gain below", theme.flag_small),
    ]));
    lines.push(Line::styled(
        "  bar: log10 of |adjoint| (‖adjoint‖ for tensors) over the range the sweep has met, shown in Order's header",
        theme.muted,
    ));
    lines.push(Line::styled("Panes", theme.title));
    for spec in panes::specs() {
        lines.push(Line::styled(
            format!("  {} {}: {}", spec.id.number(), spec.id.name(), spec.about),
            theme.muted,
        ));
    }
    let mut band_line = vec![Span::raw("  ")];
    for band in [
        Band::ProbablyWrong,
        Band::Doubtful,
        Band::Acceptable,
        Band::Good,
    ] {
        band_line.push(Span::styled(
            format!("{} {}  ", symbols::band_symbol(band), band.name()),
            symbols::band_style(theme, band),
        ));
    }
    band_line.push(Span::styled(
        format!(
            "{} a recorded element that differs from the op rule",
            symbols::DIFFERS
        ),
        theme.flag_value,
    ));
    lines.push(Line::from(band_line));
    lines.push(Line::styled("Watch conditions", theme.title));
    lines.push(Line::styled(
        format!("  {}", super::watch::SYNTAX),
        theme.muted,
    ));
    let width = area.width.saturating_sub(4).min(100);
    let height = area.height.saturating_sub(2);
    let [popup] = area.layout(&Layout::horizontal([Constraint::Length(width)]).flex(Flex::Center));
    let [popup] = popup.layout(&Layout::vertical([Constraint::Length(height)]).flex(Flex::Center));
    Clear.render(popup, buf);
    let block = Block::bordered()
        .border_style(theme.focus)
        .title(Line::styled(
            format!(
                " Keys ({} or {} closes, {}/{} scroll) ",
                app.keymap().label_for("help", app.focus()),
                app.keymap().label_for("cancel", app.focus()),
                app.keymap().label_for("down", app.focus()),
                app.keymap().label_for("up", app.focus())
            ),
            theme.focus,
        ));
    let scroll = scroll.min(lines.len().saturating_sub(1)) as u16;
    Paragraph::new(lines)
        .style(theme.text)
        .block(block)
        .wrap(Wrap { trim: false })
        .scroll((scroll, 0))
        .render(popup, buf);
}

/// The prompt above the status line, with completion candidates for a jump
/// and the syntax (or what is wrong) for a watch.
fn prompt_box(app: &App, prompt: &Prompt, status: Rect, buf: &mut Buffer) {
    let theme = app.theme();
    let trace = app.session().trace();
    let mut lines = vec![Line::from(vec![
        Span::styled(prompt.kind.label(), theme.muted),
        Span::styled(prompt.text.clone(), theme.text),
        Span::styled("▏", theme.focus),
    ])];
    for (at, &node) in prompt.candidates.iter().enumerate() {
        let recorded = trace.node(node);
        let line = Line::from(vec![
            Span::styled(format!("  {}", recorded.id), theme.text),
            Span::styled(
                format!("  {} {}", recorded.op_name, recorded.group),
                theme.muted,
            ),
        ]);
        lines.push(if at == prompt.pick {
            line.patch_style(theme.selection)
        } else {
            line
        });
    }
    if prompt.matches > prompt.candidates.len() {
        lines.push(Line::styled(
            format!("  … {} more", prompt.matches - prompt.candidates.len()),
            theme.muted,
        ));
    }
    if prompt.kind == PromptKind::Watch {
        match &prompt.error {
            Some(error) => lines.push(Line::styled(format!("  {error}"), theme.flag_value)),
            None => lines.push(Line::styled(
                format!("  {}", super::watch::SYNTAX),
                theme.muted,
            )),
        }
    }
    let width = status.width.min(if prompt.kind == PromptKind::Watch {
        100
    } else {
        72
    });
    let height = lines.len() as u16 + 2;
    let area = Rect::new(status.x, status.y.saturating_sub(height), width, height);
    Clear.render(area, buf);
    let keys = app.keymap();
    let focus = app.focus();
    let mut title = format!(
        " {} goes · {} cancels ",
        keys.label_for("submit", focus),
        keys.label_for("cancel", focus)
    );
    if prompt.kind == PromptKind::Jump {
        title = format!(
            " {} goes · {} completes · {} cancels ",
            keys.label_for("submit", focus),
            keys.label_for("complete", focus),
            keys.label_for("cancel", focus)
        );
    }
    Paragraph::new(lines)
        .block(
            Block::bordered()
                .border_style(theme.focus)
                .title(Line::styled(title, theme.focus)),
        )
        .render(area, buf);
}
