//! Node: the selected node's op, attributes, group, call site, shape, forward
//! value (with a summary for tensors), the partial on each input edge, its
//! adjoint so far (and in the recorded dtype while the precision toggle is
//! on), the origin of a non-finite adjoint in one sentence with its chain to
//! the parameters it reached, its flags and findings, and a scrollable view
//! of a tensor's elements.

use super::{Move, Pane, chain_text, fit, fit_number, value_text, wrap};
use crate::diagnose::Rule;
use crate::format::{compact, number, shape};
use crate::ops::Attrs;
use crate::stats::Summary;
use crate::tui::action::PaneId;
use crate::tui::app::App;
use crate::tui::neighbours::Side;
use crate::tui::symbols::{self, CURRENT, DONE, PENDING};
use ratatui::buffer::Buffer;
use ratatui::layout::Rect;
use ratatui::style::Style;
use ratatui::text::{Line, Span};
use ratatui::widgets::{Paragraph, Widget};

/// The node detail pane.
pub struct NodePane;

const LABEL: usize = 9;

fn labelled<'a>(label: &str, value: String, label_style: Style, value_style: Style) -> Line<'a> {
    Line::from(vec![
        Span::styled(fit(label, LABEL), label_style),
        Span::styled(value, value_style),
    ])
}

fn attrs_text(attrs: &Attrs) -> String {
    let mut parts = Vec::new();
    if let Some(axis) = attrs.axis {
        parts.push(format!("axis={axis}"));
    }
    if attrs.keepdims {
        parts.push("keepdims".to_string());
    }
    if let Some(exponent) = attrs.exponent {
        parts.push(format!("exponent={}", number(exponent)));
    }
    if let Some(slope) = attrs.slope {
        parts.push(format!("slope={}", number(slope)));
    }
    if let Some(targets) = &attrs.targets {
        parts.push(format!("targets={targets:?}"));
    }
    if let Some(perm) = &attrs.perm {
        parts.push(format!("perm={perm:?}"));
    }
    if let Some(target) = &attrs.shape {
        parts.push(format!("shape={target:?}"));
    }
    if parts.is_empty() {
        "—".to_string()
    } else {
        parts.join(" ")
    }
}

fn summary_lines<'a>(label: &str, summary: &Summary, app: &App) -> [Line<'a>; 2] {
    let theme = app.theme();
    let first = format!(
        "‖·‖ {}  min {}  max {}  mean {}",
        compact(summary.norm),
        compact(summary.min),
        compact(summary.max),
        compact(summary.mean)
    );
    let second = format!(
        "NaN {}  +inf {}  −inf {}  zeros {}  subnormal {}  of {}",
        summary.nan,
        summary.pos_inf,
        summary.neg_inf,
        summary.zeros,
        summary.subnormal,
        summary.len
    );
    let counts_style = if summary.non_finite() > 0 {
        theme.flag_value
    } else {
        theme.text
    };
    [
        labelled(label, first, theme.muted, theme.text),
        labelled("", second, theme.muted, counts_style),
    ]
}

impl Pane for NodePane {
    fn id(&self) -> PaneId {
        PaneId::Node
    }

    fn title_detail(&self, app: &App) -> String {
        app.trace.node(app.selected).id.clone()
    }

    fn draw(&self, app: &App, area: Rect, buf: &mut Buffer) {
        let theme = app.theme();
        let trace = app.trace;
        let node = app.selected;
        let recorded = trace.node(node);
        let width = area.width as usize;
        let value_width = width.saturating_sub(LABEL);
        let mut lines: Vec<Line> = Vec::new();
        let group = if recorded.group.is_empty() {
            "(no group)"
        } else {
            recorded.group.as_str()
        };
        lines.push(Line::from(vec![
            Span::styled(fit("node", LABEL), theme.muted),
            Span::styled(recorded.id.clone(), theme.title),
            Span::styled(format!("  {}  in {group}", recorded.op_name), theme.text),
        ]));
        let (state, state_style) = match trace.sweep_rank(node) {
            None => (
                "does not reach the output: no adjoint".to_string(),
                theme.muted,
            ),
            Some(rank) if rank < app.sweep.cursor() => {
                (format!("{DONE} done at step {}", rank + 1), theme.done)
            }
            Some(rank) if rank == app.sweep.cursor() => (
                format!("{CURRENT} current: step {} processes it", rank + 1),
                theme.current,
            ),
            Some(rank) => (
                format!("{PENDING} pending: step {}", rank + 1),
                theme.pending,
            ),
        };
        lines.push(labelled("state", state, theme.muted, state_style));
        if let Some(forward) = &app.forward {
            lines.extend(super::order_forward::node_lines(app, forward, node, width));
        }
        lines.push(labelled(
            "site",
            recorded
                .site
                .clone()
                .unwrap_or_else(|| "(not recorded)".to_string()),
            theme.muted,
            theme.text,
        ));
        let shape_text = if recorded.value.shape().is_empty() {
            "scalar".to_string()
        } else {
            shape(recorded.value.shape())
        };
        lines.push(labelled(
            "shape",
            format!(
                "{shape_text} {}   attrs {}",
                trace.dtype(),
                attrs_text(&recorded.attrs)
            ),
            theme.muted,
            theme.text,
        ));
        match &app.selection.value {
            Some(summary) => lines.extend(summary_lines("value", summary, app)),
            None => lines.push(labelled(
                "value",
                value_text(&recorded.value, value_width),
                theme.muted,
                theme.text,
            )),
        }
        let pending = app.sweep.pending_consumers(node).len();
        let adjoint = app.sweep.adjoint(node);
        let adjoint_note = match (&adjoint, pending) {
            (None, _) if trace.sweep_rank(node).is_none() => String::new(),
            (None, _) => "none yet".to_string(),
            (Some(_), 0) => "  (final)".to_string(),
            (Some(_), more) => format!("  (so far; {more} to come)"),
        };
        match (&app.selection.adjoint, adjoint.as_deref()) {
            (Some(summary), _) => {
                lines.extend(summary_lines("adjoint", summary, app));
                lines.push(labelled(
                    "",
                    adjoint_note.trim().to_string(),
                    theme.muted,
                    theme.muted,
                ));
            }
            (None, Some(value)) => {
                let text = value_text(value, value_width.saturating_sub(adjoint_note.len()));
                let style = if value.is_finite() {
                    theme.text
                } else {
                    theme.flag_adjoint
                };
                lines.push(Line::from(vec![
                    Span::styled(fit("adjoint", LABEL), theme.muted),
                    Span::styled(text, style.add_modifier(ratatui::style::Modifier::BOLD)),
                    Span::styled(adjoint_note, theme.muted),
                ]));
            }
            (None, None) => lines.push(labelled("adjoint", adjoint_note, theme.muted, theme.muted)),
        }
        lines.extend(precision_lines(app, node, value_width));
        lines.extend(diagnosis_lines(app, node, value_width));
        for edge in app
            .selection
            .edges
            .iter()
            .filter(|edge| edge.side == Side::Input)
        {
            let input = &trace.node(edge.node).id;
            lines.push(labelled(
                &format!("∂ in {}", edge.slot),
                format!("← {input}  {}", edge.partial),
                theme.muted,
                theme.text,
            ));
        }
        if recorded.inputs.is_empty() {
            lines.push(labelled(
                "∂",
                "a leaf: no input edges".to_string(),
                theme.muted,
                theme.muted,
            ));
        }
        let flags: Vec<&crate::sweep::Flag> = app
            .sweep
            .flags()
            .iter()
            .filter(|flag| flag.node == node)
            .collect();
        for flag in flags {
            let style = symbols::flag_style(theme, flag.kind);
            let text = format!(
                "{} {} {} at step {} ({} element(s))",
                symbols::flag_symbol(flag.kind),
                flag.kind.name(),
                number(flag.value),
                flag.step + 1,
                flag.count
            );
            lines.push(labelled("flag", text, theme.muted, style));
        }
        if let crate::tensor::Value::Tensor(tensor) = &recorded.value {
            // In forward mode the tangent takes the adjoint's column; while the precision
            // toggle is on, a third column holds the adjoint in the recorded dtype.
            let tangent = app.forward.as_ref().map(|forward| forward.tangent(node));
            let column = if tangent.is_some() {
                "tangent"
            } else {
                "adjoint"
            };
            let compared_adjoint = app
                .compare
                .as_ref()
                .filter(|_| tangent.is_none())
                .map(|compare| compare.adjoint(node));
            let compared = compared_adjoint
                .as_ref()
                .map(|adjoint| adjoint.as_deref().map(|value| value.to_f64()));
            let header = match compared {
                None => format!("{:>8}  {:<24}{}", "element", "value", column),
                Some(_) => format!(
                    "{:>8}  {:<24}{:<24}{}",
                    "element",
                    "value",
                    format!("adjoint {}", trace.dtype()),
                    app.recorded.dtype()
                ),
            };
            lines.push(Line::styled(header, theme.muted));
            let shown = (area.height as usize).saturating_sub(lines.len());
            let adjoint_data = match tangent {
                Some(tangent) => tangent.map(|tangent| {
                    tangent.map_or(std::borrow::Cow::Borrowed(&[][..]), |t| t.to_f64())
                }),
                None => adjoint.as_deref().map(|value| value.to_f64()),
            };
            for index in app.node_scroll..tensor.len().min(app.node_scroll + shown) {
                let value = fit(&number(tensor.get(index)), 23);
                let zero = matches!(tangent, Some(Some(None)));
                let adjoint = adjoint_data
                    .as_ref()
                    .and_then(|data| data.get(index))
                    .map_or(if zero { "0" } else { "—" }.to_string(), |&x| number(x));
                let row = match &compared {
                    None => format!("{index:>8}  {value} {adjoint}"),
                    Some(data) => {
                        let here = adjoint_data
                            .as_ref()
                            .and_then(|data| data.get(index))
                            .map_or("—".to_string(), |&x| fit_number(x, 23));
                        let there = data
                            .as_ref()
                            .and_then(|data| data.get(index))
                            .map_or("—".to_string(), |&x| fit_number(x, 23));
                        format!("{index:>8}  {value} {here:<23} {there}")
                    }
                };
                lines.push(Line::styled(row, theme.text));
            }
        }
        Paragraph::new(lines).render(area, buf);
    }

    fn move_cursor(&self, app: &mut App, motion: Move) {
        let len = app.trace.node(app.selected).value.len();
        app.node_scroll = motion.apply(app.node_scroll, len);
    }
}

/// While the precision toggle is on: the adjoint in the recorded dtype, which
/// entries became zero or non-finite, and what the replay against f64 found here.
fn precision_lines<'a>(app: &App, node: usize, width: usize) -> Vec<Line<'a>> {
    let theme = app.theme();
    let Some(compare) = &app.compare else {
        return Vec::new();
    };
    let (dtype, recorded) = (app.trace.dtype(), app.recorded.dtype());
    let mut lines = Vec::new();
    let (here, there) = (app.sweep.adjoint(node), compare.adjoint(node));
    match (here.as_deref(), there.as_deref(), &app.contrast) {
        (
            Some(crate::tensor::Value::Scalar(here)),
            Some(crate::tensor::Value::Scalar(there)),
            _,
        ) => {
            let changed = if here == there { theme.text } else { theme.key };
            let text = format!(
                "{} (recorded) vs {} in {dtype}",
                number(*there),
                number(*here)
            );
            lines.push(labelled(
                &format!("in {recorded}"),
                fit(&text, width),
                theme.muted,
                changed,
            ));
        }
        (Some(_), Some(_), Some(contrast)) => {
            let text = format!(
                "‖·‖ {} (recorded) vs {} in {dtype}",
                compact(contrast.recorded_norm),
                compact(contrast.norm)
            );
            lines.push(labelled(
                &format!("in {recorded}"),
                fit(&text, width),
                theme.muted,
                theme.text,
            ));
            let counts = [
                (
                    contrast.zero_here_only,
                    format!("zero in {dtype}, non-zero in {recorded}"),
                ),
                (
                    contrast.zero_recorded_only,
                    format!("zero in {recorded}, non-zero in {dtype}"),
                ),
                (
                    contrast.finiteness_differs,
                    "finite in one dtype only".to_string(),
                ),
            ];
            for (count, what) in counts.into_iter().filter(|(count, _)| *count > 0) {
                lines.push(labelled(
                    "",
                    fit(
                        &format!("{count} of {} entries {what}", contrast.len),
                        width,
                    ),
                    theme.muted,
                    theme.key,
                ));
            }
        }
        (None, None, _) => {}
        (here, there, _) => {
            let show = |value: Option<&crate::tensor::Value>| {
                value.map_or("none yet".to_string(), |value| value_text(value, 24))
            };
            let text = format!("{} (recorded) vs {} in {dtype}", show(there), show(here));
            lines.push(labelled(
                &format!("in {recorded}"),
                fit(&text, width),
                theme.muted,
                theme.text,
            ));
        }
    }
    let replay = app
        .diagnoses
        .get(recorded)
        .and_then(|diagnosed| diagnosed.diagnosis.replay_in(dtype));
    if let Some(run) = replay {
        for finding in run.at_node(node).take(2) {
            let text = format!(
                "{} {}",
                symbols::finding_symbol(finding),
                finding.describe(app.trace, dtype)
            );
            for (at, part) in wrap(&text, width).into_iter().enumerate() {
                lines.push(labelled(
                    if at == 0 { "vs f64" } else { "" },
                    part,
                    theme.muted,
                    symbols::finding_style(theme, finding),
                ));
            }
        }
        if let Some(lost) = run.lost.iter().find(|lost| lost.node == node) {
            let text = format!(
                "{} from '{}' lost {:.0}% at step {}: {} + {} gave {}",
                number(lost.contribution),
                app.trace.node(lost.from).id,
                100.0 * lost.lost,
                lost.step + 1,
                compact(lost.before),
                compact(lost.contribution),
                compact(lost.after)
            );
            for (at, part) in wrap(&text, width).into_iter().enumerate() {
                lines.push(labelled(
                    if at == 0 { "lost" } else { "" },
                    part,
                    theme.muted,
                    theme.flag_small,
                ));
            }
        }
    }
    lines
}

/// Parameters' chains listed in full before the rest are counted.
const CHAINS_SHOWN: usize = 3;
/// Findings listed in full before the rest are counted.
const FINDINGS_SHOWN: usize = 4;

/// The origin behind the node in one sentence, the chain from it to each
/// parameter it reached, and the other rules' findings at the node.
fn diagnosis_lines<'a>(app: &App, node: usize, width: usize) -> Vec<Line<'a>> {
    let theme = app.theme();
    let Some(diagnosed) = app.diagnosis() else {
        return Vec::new();
    };
    let trace = app.trace;
    let mut lines = Vec::new();
    if let Some(sentence) = diagnosed.sentence(trace, node) {
        for (at, part) in wrap(&sentence, width).into_iter().enumerate() {
            lines.push(labelled(
                if at == 0 { "origin" } else { "" },
                part,
                theme.muted,
                theme.flag_origin,
            ));
        }
    }
    if let Some(origin) = diagnosed.origin_for(node) {
        for (at, &param) in origin.reached.iter().take(CHAINS_SHOWN).enumerate() {
            let chain = diagnosed.diagnosis.chain_to(param);
            let ids: Vec<&str> = chain
                .iter()
                .map(|&link| trace.node(link).id.as_str())
                .collect();
            let hops = chain.len().saturating_sub(1);
            let head = format!(
                "{hops} {} to {}: ",
                if hops == 1 { "hop" } else { "hops" },
                trace.node(param).id
            );
            let text = head.clone() + &chain_text(&ids, width.saturating_sub(head.chars().count()));
            lines.push(labelled(
                if at == 0 { "chain" } else { "" },
                text,
                theme.muted,
                theme.text,
            ));
        }
        match origin.reached.len() {
            0 => lines.push(labelled(
                "chain",
                "reaches no parameter".to_string(),
                theme.muted,
                theme.muted,
            )),
            count if count > CHAINS_SHOWN => {
                let more = count - CHAINS_SHOWN;
                let text = format!(
                    "… and {more} more {}",
                    if more == 1 { "parameter" } else { "parameters" }
                );
                lines.push(labelled("", text, theme.muted, theme.muted))
            }
            _ => {}
        }
    }
    let findings: Vec<_> = diagnosed
        .diagnosis
        .findings_at(node)
        .filter(|finding| finding.rule != Rule::NonFinite)
        .collect();
    for finding in findings.iter().take(FINDINGS_SHOWN) {
        let text = format!(
            "{} {}",
            symbols::finding_symbol(finding),
            finding.describe(trace, trace.dtype())
        );
        for (at, part) in wrap(&text, width).into_iter().enumerate() {
            lines.push(labelled(
                if at == 0 { "finding" } else { "" },
                part,
                theme.muted,
                symbols::finding_style(theme, finding),
            ));
        }
    }
    if findings.len() > FINDINGS_SHOWN {
        lines.push(labelled(
            "",
            format!(
                "… and {} more (Flags lists them)",
                findings.len() - FINDINGS_SHOWN
            ),
            theme.muted,
            theme.muted,
        ));
    }
    lines
}
