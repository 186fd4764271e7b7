//! Drawing one frame: `impl Widget for &App` borrows the state and never
//! changes it. Panes in their frames, the status line, then any overlay.

use super::action::{Action, PaneId};
use super::app::{App, Overlay};
use super::keymap::Scope;
use super::layout::{self, MIN_HEIGHT, MIN_WIDTH, Screen};
use super::panes;
use super::prompt::Prompt;
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
        let Screen::Panes { panes, status } =
            layout::arrange(area, self.focus, self.side, self.corner, self.zoomed)
        else {
            too_small(self, area, buf);
            return;
        };
        let narrow = area.width < layout::WIDE && !self.zoomed;
        for (pane, pane_area) in panes {
            let tabs = if self.zoomed {
                &[]
            } else {
                layout::slot_tabs(pane, narrow)
            };
            frame(self, pane, pane_area, tabs, buf);
        }
        status_line(self, status, buf);
        match &self.overlay {
            Overlay::None => {}
            Overlay::Help(scroll) => help(self, *scroll, area, buf),
            Overlay::Prompt(prompt) => prompt_box(self, prompt, status, buf),
        }
    }
}

fn pane_number(pane: PaneId) -> usize {
    PaneId::ALL
        .iter()
        .position(|&shown| shown == pane)
        .expect("listed")
        + 1
}

/// A pane in its border, the title naming it (or, in a shared slot, every
/// pane of the slot as tabs; the others by number alone when names do not fit).
fn frame(app: &App, pane: PaneId, area: Rect, tabs: &[PaneId], buf: &mut Buffer) {
    let theme = app.theme();
    let focused = app.focus == pane;
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
    let shown = panes::pane(pane);
    debug_assert_eq!(
        shown.id(),
        pane,
        "the pane registry maps each id to its pane"
    );
    let detail = shown.title_detail(app);
    if !detail.is_empty() {
        title.push(Span::styled(format!("· {detail} "), theme.muted));
    }
    if app.zoomed {
        title.push(Span::styled("(zoomed: z or Esc returns) ", theme.muted));
    }
    let block = Block::bordered()
        .border_style(border)
        .title(Line::from(title));
    let inner = block.inner(area);
    block.render(area, buf);
    shown.draw(app, inner, buf);
}

/// Title, dtype, step k of n, the current node, then a message or the focused pane's hints.
fn status_line(app: &App, area: Rect, buf: &mut Buffer) {
    let theme = app.theme();
    let sweep = &app.sweep;
    let next = match sweep.current() {
        Some(node) => format!(
            "next {} ({})",
            app.trace.node(node).id,
            app.trace.node(node).op_name
        ),
        None => "sweep done".to_string(),
    };
    // The title only where there is room: at 80 columns the hints matter more.
    let title = if area.width >= layout::WIDE {
        format!(" {} │", app.trace.title())
    } else {
        String::new()
    };
    let dtype = if app.trace.dtype() == app.recorded.dtype() {
        app.trace.dtype().to_string()
    } else {
        format!("{} (recorded {})", app.trace.dtype(), app.recorded.dtype())
    };
    let left = match &app.forward {
        Some(forward) => {
            let next = match forward.current() {
                Some(node) => format!(
                    "next {} ({})",
                    app.trace.node(node).id,
                    app.trace.node(node).op_name
                ),
                None => "tangent sweep done".to_string(),
            };
            let (cursor, len) = (forward.sweep.cursor(), forward.sweep.len());
            format!(" ebb │ FORWARD MODE │{title} {dtype} │ tangent step {cursor}/{len} │ {next} ")
        }
        None => format!(
            " ebb │{title} {dtype} │ step {}/{} │ {next} ",
            sweep.cursor(),
            sweep.len()
        ),
    };
    let mut spans = vec![Span::styled(left, theme.status)];
    match &app.message {
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
fn mode_hints(app: &App) -> Vec<(String, &'static str)> {
    let mut hints = app.keymap.hints(app.focus);
    let key = |action: Action| {
        app.keymap
            .keys_for(Scope::Global, action)
            .into_iter()
            .next()
    };
    if app.forward.is_some() {
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
    let keys = |action: Action| app.keymap.keys_for(Scope::Global, action).join("/");
    match &app.forward {
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
        Line::styled("q quits.", theme.muted),
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
    for (heading, rows) in app.keymap.help() {
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
        "  bar: log10 ‖adjoint‖, one cell per two decades from 1e-8 to 1e8",
        theme.muted,
    ));
    lines.push(Line::styled(
        "  Panes: 1 Order (sweep order)  2 Node (detail)  3 Inflow (contributions)  4 Edges (neighbours)  5 Trend (magnitudes)  6 Flags",
        theme.muted,
    ));
    lines.push(Line::styled(
        "  7 Verify (suspects of a wrong derivative, recorded against recomputed partials)",
        theme.muted,
    ));
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
    lines.push(Line::styled(
        "  8 Paths (dominant paths, group norms)",
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
            " Keys (? or Esc closes, j/k scroll) ",
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

/// The prompt above the status line, with completion candidates for a jump.
fn prompt_box(app: &App, prompt: &Prompt, status: Rect, buf: &mut Buffer) {
    let theme = app.theme();
    let height =
        3 + prompt.candidates.len() as u16 + u16::from(prompt.matches > prompt.candidates.len());
    let area = Rect::new(
        status.x,
        status.y.saturating_sub(height),
        status.width.min(72),
        height,
    );
    Clear.render(area, buf);
    let mut lines = vec![Line::from(vec![
        Span::styled(prompt.kind.label(), theme.muted),
        Span::styled(prompt.text.clone(), theme.text),
        Span::styled("▏", theme.focus),
    ])];
    for (at, &node) in prompt.candidates.iter().enumerate() {
        let recorded = app.trace.node(node);
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
    let title = " Enter goes · Tab completes · Esc cancels ";
    Paragraph::new(lines)
        .block(
            Block::bordered()
                .border_style(theme.focus)
                .title(Line::styled(title, theme.focus)),
        )
        .render(area, buf);
}
