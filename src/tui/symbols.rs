//! The symbols that carry meaning without colour: sweep states, flag kinds
//! and the diagnosis's origins and rules.

use super::theme::Theme;
use crate::diagnose::{Finding, Measure, Rule};
use crate::sweep::FlagKind;
use crate::verify::Band;
use ratatui::style::Style;

/// Marker of a processed node.
pub const DONE: &str = "✓";
/// Marker of the node the next step processes.
pub const CURRENT: &str = "▶";
/// Marker of a node still to come.
pub const PENDING: &str = "·";

/// Each flag kind's symbol: different shapes, so no meaning rests on colour.
pub fn flag_symbol(kind: FlagKind) -> &'static str {
    match kind {
        FlagKind::NonFiniteValue => "✗",
        FlagKind::NonFinitePartial => "∂",
        FlagKind::NonFiniteAdjoint => "!",
    }
}

/// Each flag kind's theme role.
pub fn flag_style(theme: &Theme, kind: FlagKind) -> Style {
    match kind {
        FlagKind::NonFiniteValue => theme.flag_value,
        FlagKind::NonFinitePartial => theme.flag_partial,
        FlagKind::NonFiniteAdjoint => theme.flag_adjoint,
    }
}

/// Marker of a recorded partial's element that differs from the op rule's.
pub const DIFFERS: &str = "≠";
/// Marker of an element that agrees.
pub const AGREES: &str = "=";

/// Each verification band's symbol: a shape per band, so no meaning rests on colour.
pub fn band_symbol(band: Band) -> &'static str {
    match band {
        Band::ProbablyWrong => "▲",
        Band::Doubtful => "△",
        Band::Acceptable => "≈",
        Band::Good => "=",
        Band::Unresolved => "?",
        Band::NotFinite => "⊘",
    }
}

/// Each verification band's theme role.
pub fn band_style(theme: &Theme, band: Band) -> Style {
    match band {
        Band::ProbablyWrong => theme.flag_value,
        Band::Doubtful => theme.current,
        Band::Acceptable => theme.muted,
        Band::Good => theme.done,
        Band::Unresolved => theme.muted,
        Band::NotFinite => theme.flag_value,
    }
}

/// Every flag kind, for the legend in the help.
pub const FLAG_KINDS: [FlagKind; 3] = [
    FlagKind::NonFiniteValue,
    FlagKind::NonFinitePartial,
    FlagKind::NonFiniteAdjoint,
];

/// Marker of the origin of a non-finite adjoint.
pub const ORIGIN: &str = "◆";

/// Whether a finding is about a number too large (else too small, or non-finite).
fn is_large(finding: &Finding) -> bool {
    match finding.rule {
        Rule::Overflow | Rule::NearOverflow | Rule::Exploding | Rule::ForwardMismatch => true,
        Rule::Gain => finding.measure == Measure::Gain && finding.value >= finding.threshold,
        Rule::ActivationGrowth => finding.value >= 1.0,
        Rule::NonFinite | Rule::Underflow | Rule::Vanishing | Rule::Saturated | Rule::DeadRelu => {
            false
        }
    }
}

/// Each diagnosis finding's symbol: one shape per rule (a gain by its
/// direction), none of them a sweep-state marker or a flag symbol.
pub fn finding_symbol(finding: &Finding) -> &'static str {
    match finding.rule {
        Rule::NonFinite => "!",
        Rule::Overflow => "⇑",
        Rule::NearOverflow => "↗",
        Rule::Underflow => "⇓",
        Rule::Vanishing => "↓",
        Rule::Exploding => "↑",
        Rule::Gain if is_large(finding) => "≫",
        Rule::Gain => "≪",
        Rule::ForwardMismatch => "≉",
        Rule::Saturated => "⊓",
        Rule::DeadRelu => "∅",
        Rule::ActivationGrowth => "⇕",
    }
}

/// Each diagnosis finding's theme role: too large, too small, or non-finite.
pub fn finding_style(theme: &Theme, finding: &Finding) -> Style {
    match finding.rule {
        Rule::NonFinite => theme.flag_adjoint,
        _ if is_large(finding) => theme.flag_large,
        _ => theme.flag_small,
    }
}

/// A log-scale bar of `width` cells for a magnitude: empty at 10^`low` and
/// below (and for zero), full at 10^`high`, with eighth-cell steps; any
/// non-zero magnitude gets at least an eighth. Non-finite magnitudes fill
/// the bar with `!`.
pub fn magnitude_bar(magnitude: Option<f64>, width: usize, (low, high): (i32, i32)) -> String {
    const EIGHTHS: [&str; 8] = ["", "▏", "▎", "▍", "▌", "▋", "▊", "▉"];
    let Some(magnitude) = magnitude.map(f64::abs) else {
        return " ".repeat(width);
    };
    if !magnitude.is_finite() {
        return "!".repeat(width);
    }
    let eighths = if magnitude > 0.0 {
        let span = f64::from(high - low).max(1.0);
        let fraction = ((magnitude.log10() - f64::from(low)) / span).clamp(0.0, 1.0);
        ((fraction * (width * 8) as f64).round() as usize).max(1)
    } else {
        0
    };
    let mut bar = "█".repeat(eighths / 8);
    bar.push_str(EIGHTHS[eighths % 8]);
    let used = eighths / 8 + usize::from(!eighths.is_multiple_of(8));
    bar.push_str(&" ".repeat(width - used));
    bar
}

#[cfg(test)]
mod tests {
    use super::*;
    use ratatui::text::Span;

    #[test]
    fn bars_follow_the_range_they_are_given() {
        let wide = (-8, 8);
        assert_eq!(magnitude_bar(Some(1.0), 8, wide), "████    ");
        assert_eq!(magnitude_bar(Some(-1e8), 8, wide), "████████");
        assert_eq!(magnitude_bar(Some(0.0), 8, wide), "        ");
        assert_eq!(magnitude_bar(Some(10.0), 8, wide), "████▌   ");
        assert_eq!(magnitude_bar(Some(f64::NAN), 4, wide), "!!!!");
        // A range that reaches down to 1e-10 gives 3.3e-10 a bar.
        let deep = (-10, 2);
        assert_ne!(magnitude_bar(Some(3.3e-10), 8, deep).trim(), "");
        assert_eq!(magnitude_bar(Some(100.0), 8, deep), "████████");
        // Below the range, still an eighth: not zero.
        assert_eq!(magnitude_bar(Some(1e-30), 8, deep), "▏       ");
        for norm in [1e-9, 3e-3, 0.5, 7.0, 2e5] {
            assert_eq!(Span::raw(magnitude_bar(Some(norm), 8, wide)).width(), 8);
        }
    }

    #[test]
    fn flag_symbols_differ() {
        let symbols: Vec<&str> = FLAG_KINDS.iter().map(|&kind| flag_symbol(kind)).collect();
        let mut unique = symbols.clone();
        unique.dedup();
        assert_eq!(unique.len(), symbols.len());
        assert!(
            ![DONE, CURRENT, PENDING]
                .iter()
                .any(|marker| symbols.contains(marker))
        );
        let bands: Vec<&str> = [
            Band::ProbablyWrong,
            Band::Doubtful,
            Band::Acceptable,
            Band::Good,
            Band::Unresolved,
            Band::NotFinite,
        ]
        .map(band_symbol)
        .to_vec();
        assert!(
            bands
                .iter()
                .enumerate()
                .all(|(at, band)| !bands[at + 1..].contains(band) && !symbols.contains(band))
        );
        assert_ne!(DIFFERS, AGREES);
    }

    #[test]
    fn finding_symbols_differ_from_each_other_and_from_flags() {
        use crate::diagnose::Site;
        let finding = |rule, value| {
            Finding::single(
                rule,
                0,
                0,
                Site::Outgoing,
                Measure::Gain,
                (0, value, 1),
                100.0,
            )
        };
        let mut findings: Vec<Finding> = Rule::ALL.iter().map(|&rule| finding(rule, 1e3)).collect();
        findings.push(finding(Rule::Gain, 1e-3));
        let mut symbols: Vec<&str> = findings
            .iter()
            .filter(|f| f.rule != Rule::NonFinite)
            .map(finding_symbol)
            .collect();
        symbols.push(ORIGIN);
        let count = symbols.len();
        symbols.sort();
        symbols.dedup();
        assert_eq!(symbols.len(), count, "{symbols:?}");
        let bands = [
            Band::ProbablyWrong,
            Band::Doubtful,
            Band::Acceptable,
            Band::Good,
        ]
        .map(band_symbol);
        let taken: Vec<&str> = FLAG_KINDS
            .iter()
            .map(|&kind| flag_symbol(kind))
            .chain([DONE, CURRENT, PENDING, DIFFERS, AGREES])
            .chain(bands)
            .collect();
        assert!(
            !symbols.iter().any(|symbol| taken.contains(symbol)),
            "{symbols:?}"
        );
        assert_eq!(
            Span::raw(symbols.concat()).width(),
            symbols.len(),
            "one column each"
        );
    }
}
