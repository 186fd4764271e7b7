//! Node's lines from the diagnosis: the origin behind the node in one
//! sentence with its chains to the parameters, the other rules' findings,
//! and while the precision toggle is on the adjoint in the recorded dtype.

use super::node::labelled;
use super::{Ctx, chain_text, fit, value_text, wrap};
use crate::diagnose::Rule;
use crate::format::{compact, readable};
use crate::tui::symbols;
use ratatui::text::Line;

/// While the precision toggle is on: the adjoint in the recorded dtype, which
/// entries became zero or non-finite, and what the replay against f64 found here.
pub fn precision_lines<'a>(ctx: &Ctx, node: usize, width: usize) -> Vec<Line<'a>> {
    let theme = ctx.theme;
    let session = ctx.session;
    let Some(compare) = session.compare() else {
        return Vec::new();
    };
    let (dtype, recorded) = (session.trace().dtype(), session.recorded().dtype());
    let mut lines = Vec::new();
    let (here, there) = (session.sweep().adjoint(node), compare.adjoint(node));
    match (
        here.as_deref(),
        there.as_deref(),
        &session.detail().contrast,
    ) {
        (
            Some(crate::tensor::Value::Scalar(here)),
            Some(crate::tensor::Value::Scalar(there)),
            _,
        ) => {
            let changed = if here == there { theme.text } else { theme.key };
            let text = format!(
                "{} (recorded) vs {} in {dtype}",
                readable(*there, recorded),
                readable(*here, dtype)
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
                value.map_or("none yet".to_string(), |value| value_text(value, dtype, 24))
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
    let replay = session
        .diagnosis_in(recorded)
        .and_then(|diagnosed| diagnosed.diagnosis.replay_in(dtype));
    if let Some(run) = replay {
        for finding in run.at_node(node).take(2) {
            let text = format!(
                "{} {}",
                symbols::finding_symbol(finding),
                finding.describe(session.trace(), dtype)
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
                readable(lost.contribution, dtype),
                session.trace().node(lost.from).id,
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
pub fn diagnosis_lines<'a>(ctx: &Ctx, node: usize, width: usize) -> Vec<Line<'a>> {
    let theme = ctx.theme;
    let Some(diagnosed) = ctx.session.diagnosis() else {
        return Vec::new();
    };
    let trace = ctx.session.trace();
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
