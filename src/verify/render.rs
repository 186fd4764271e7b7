//! `ebb verify`'s report: text for people, JSON for scripts.

use super::{Band, NotFinite, Verdict, Verification};
use crate::format::compact;
use crate::trace::{Num, Trace};
use serde_json::json;

impl Verification {
    /// The report as text: the verdict and suspects first, then each check.
    pub fn to_text(&self, trace: &Trace) -> String {
        let id = |node: usize| trace.node(node).id.clone();
        let mut out = String::new();
        match self.verdict() {
            Verdict::Agrees => {
                let unresolved: usize = self.differences.iter().map(|c| c.unresolved()).sum();
                let note = if unresolved > 0 {
                    format!(
                        "; {unresolved} finite-difference {} below the difference's resolution (unresolved, not confirmed)",
                        if unresolved == 1 { "entry" } else { "entries" }
                    )
                } else {
                    String::new()
                };
                out.push_str(&format!(
                    "verdict  every check agrees within {}{note}\n",
                    self.tolerance
                ));
            }
            Verdict::CannotJudge => {
                let mut why = Vec::new();
                if self.sweep_flags > 0 {
                    why.push(format!(
                        "the reverse sweep is not finite ({} {})",
                        self.sweep_flags,
                        if self.sweep_flags == 1 {
                            "flag"
                        } else {
                            "flags"
                        }
                    ));
                }
                if !self.not_finite.is_empty() {
                    why.push(format!(
                        "{} {} could not be made on NaN or infinite numbers",
                        self.not_finite.len(),
                        if self.not_finite.len() == 1 {
                            "check"
                        } else {
                            "checks"
                        }
                    ));
                }
                out.push_str(&format!(
                    "verdict  cannot judge: {}; no mismatch beyond {} where the numbers are finite, but NaN never agrees with anything (`ebb check` finds where it started)\n",
                    why.join(" and "),
                    self.tolerance
                ));
            }
            Verdict::Disagrees => {
                out.push_str(&format!(
                    "suspects {} (worst first, tolerance {})\n",
                    self.suspects.len(),
                    self.tolerance
                ));
                for (rank, suspect) in self.suspects.iter().enumerate() {
                    out.push_str(&format!(
                        "  {}. '{}' ({})  {}  relative error {}: {}\n",
                        rank + 1,
                        id(suspect.node),
                        trace.node(suspect.node).op_name,
                        suspect.band.name(),
                        compact(suspect.relative),
                        suspect.detail
                    ));
                }
                if self.sweep_flags > 0 || !self.not_finite.is_empty() {
                    out.push_str(&format!(
                        "warning  {} more {} could not be made on NaN or infinite numbers ({} sweep flags)\n",
                        self.not_finite.len(),
                        if self.not_finite.len() == 1 { "check" } else { "checks" },
                        self.sweep_flags
                    ));
                }
            }
        }
        if !self.masked.is_empty() {
            let names: Vec<String> = self
                .masked
                .iter()
                .map(|&n| format!("'{}'", id(n)))
                .collect();
            out.push_str(&format!(
                "masked   {} hold −inf on purpose (a mask) that later ops absorb: every derivative around them is finite and judged\n",
                names.join(", ")
            ));
        }
        let cannot = self
            .partials
            .iter()
            .filter(|c| c.worst.band() == Band::NotFinite)
            .count();
        out.push_str(&format!(
            "partials {} recorded partials of catalog ops checked against the op table",
            self.partials.len()
        ));
        if cannot > 0 {
            out.push_str(&format!(
                ", {cannot} not finite on both sides (cannot judge)"
            ));
        }
        if !self.unchecked.is_empty() {
            out.push_str(&format!(", {} too large to check", self.unchecked.len()));
        }
        out.push('\n');
        out.push_str(&format!(
            "finite differences (central, h = ε^(1/3)·max(|x|, 1), in {}{})\n",
            self.derivatives_in,
            if self.derivatives_in == trace.dtype() {
                ""
            } else {
                ", forward pass recomputed from the recorded leaves; rounding is ebb check's precision replay"
            }
        ));
        for check in &self.differences {
            let Some(worst) = check.worst() else { continue };
            let count = format!(
                "{} {}",
                check.entries.len(),
                if check.entries.len() == 1 {
                    "entry"
                } else {
                    "entries"
                }
            );
            let verdict = match worst.band() {
                Band::NotFinite => format!(
                    "not finite: cannot judge (gradient {}, difference {})",
                    compact(worst.reverse),
                    compact(worst.central)
                ),
                Band::Unresolved => {
                    "unresolved: every entry is below the difference's resolution".to_string()
                }
                band if worst.counted() < worst.relative => format!(
                    "worst relative error {}, within the difference's rounding floor ({})",
                    compact(worst.relative),
                    band.name()
                ),
                band => format!(
                    "worst relative error {} ({})",
                    compact(worst.counted()),
                    band.name()
                ),
            };
            let mut line = format!("  '{}'  {count}  {verdict}", id(check.param));
            let unresolved = check.unresolved();
            if unresolved > 0 && worst.band() != Band::Unresolved {
                line.push_str(&format!(
                    "  {unresolved} unresolved (below the difference's resolution)"
                ));
            }
            if !check.kinks.is_empty() {
                let names: Vec<String> = check.kinks.iter().map(|&n| id(n)).collect();
                line.push_str(&format!("  kinks: {}", names.join(", ")));
            }
            if !check.linearised.is_empty() {
                let names: Vec<String> = check
                    .linearised
                    .iter()
                    .map(|&n| format!("'{}'", id(n)))
                    .collect();
                line.push_str(&format!(
                    "  through custom {} by {} recorded partials: cannot judge {}",
                    names.join(", "),
                    if names.len() == 1 { "its" } else { "their" },
                    if names.len() == 1 { "it" } else { "them" }
                ));
            }
            out.push_str(&line);
            out.push('\n');
        }
        if self.reported.is_empty() {
            out.push_str(
                "reported no node carries a gradient reported by the original framework\n",
            );
        } else {
            let disagreeing = self.reported.iter().filter(|c| c.disagrees()).count();
            let cannot = self
                .reported
                .iter()
                .filter(|c| c.worst.band() == Band::NotFinite)
                .count();
            let cannot = if cannot > 0 {
                format!(", {cannot} not finite (cannot judge)")
            } else {
                String::new()
            };
            let raised = self
                .reported
                .iter()
                .map(|c| c.tolerance)
                .fold(self.tolerance, f64::max);
            let raised = if raised > self.tolerance {
                format!(
                    " (within {}: the trace computes in a half format, which rounds no finer)",
                    compact(raised)
                )
            } else {
                String::new()
            };
            out.push_str(&format!(
                "reported {} reported gradients compared, {disagreeing} disagree{cannot}{raised}\n",
                self.reported.len()
            ));
        }
        if let Some(tangent) = &self.tangent {
            let verdict = if Band::of(tangent.relative) == Band::NotFinite {
                "not finite: cannot judge".to_string()
            } else {
                format!("relative error {}", compact(tangent.relative))
            };
            out.push_str(&format!(
                "tangent  ∂f/∂v = {} by the tangent sweep, ⟨v, ∇f⟩ = {} by the reverse sweep ({verdict})\n",
                tangent.tangent, tangent.reverse
            ));
        }
        for &node in &self.custom {
            let judged = if self.custom_judged_by_reported(trace, node) {
                "only the reported gradients judge it (above)"
            } else {
                "nothing here judges it: record the framework's gradients (`reported`) to check it"
            };
            out.push_str(&format!(
                "custom   '{}' ({}): the op table has no rule for it, and finite differences and the tangent sweep use its recorded partials, so they cannot judge it; {judged}\n",
                id(node),
                trace.node(node).op_name
            ));
        }
        out
    }

    /// The report as JSON, node indices replaced by ids.
    pub fn to_json(&self, trace: &Trace) -> String {
        let id = |node: usize| trace.node(node).id.clone();
        let value = json!({
            "verify": 1,
            "tolerance": self.tolerance,
            "agrees": self.agrees(),
            "verdict": self.verdict().name(),
            "sweep_flags": self.sweep_flags,
            "masked": self.masked.iter().map(|&n| id(n)).collect::<Vec<_>>(),
            "not_finite": self.not_finite.iter().map(|n| match *n {
                NotFinite::Partial { node, slot } => json!({"check": "partial", "node": id(node), "slot": slot}),
                NotFinite::FiniteDifference { param, entries } => json!({"check": "finite_difference", "param": id(param), "entries": entries}),
                NotFinite::Reported { node } => json!({"check": "reported", "node": id(node)}),
                NotFinite::Tangent => json!({"check": "tangent"}),
            }).collect::<Vec<_>>(),
            "custom": self.custom.iter().map(|&n| json!({
                "node": id(n), "op": &*trace.node(n).op_name,
                "judged_by_reported": self.custom_judged_by_reported(trace, n),
            })).collect::<Vec<_>>(),
            "suspects": self.suspects.iter().map(|s| json!({
                "node": id(s.node), "op": &*trace.node(s.node).op_name, "evidence": s.evidence,
                "relative": Num(s.relative), "band": s.band, "detail": s.detail,
            })).collect::<Vec<_>>(),
            "partials": self.partials.iter().map(|c| json!({
                "node": id(c.node), "slot": c.slot, "element": c.worst.element,
                "recorded": Num(c.worst.actual), "recomputed": Num(c.worst.expected),
                "absolute": Num(c.worst.absolute), "relative": Num(c.worst.relative), "band": c.worst.band(),
            })).collect::<Vec<_>>(),
            "finite_differences": self.differences.iter().map(|c| json!({
                "param": id(c.param), "band": c.band(), "unresolved": c.unresolved(), "not_finite": c.not_finite(),
                "entries": c.entries.iter().map(|e| json!({
                    "element": e.element, "step": Num(e.step), "central": Num(e.central), "reverse": Num(e.reverse), "relative": Num(e.relative),
                    "floor": Num(e.floor), "within_floor": e.within_floor(), "band": e.band(),
                })).collect::<Vec<_>>(),
                "kinks": c.kinks.iter().map(|&n| id(n)).collect::<Vec<_>>(),
                "linearised": c.linearised.iter().map(|&n| id(n)).collect::<Vec<_>>(),
            })).collect::<Vec<_>>(),
            "reported": self.reported.iter().map(|c| json!({
                "node": id(c.node), "element": c.worst.element, "sweep": Num(c.worst.actual),
                "reported": Num(c.worst.expected), "relative": Num(c.worst.relative),
                "tolerance": Num(c.tolerance),
            })).collect::<Vec<_>>(),
            "walk": self.walk.as_ref().map(|w| json!({
                "param": id(w.param), "path": w.path.iter().map(|&n| id(n)).collect::<Vec<_>>(),
                "suspects": w.suspects.iter().map(|&n| id(n)).collect::<Vec<_>>(),
            })),
            "tangent": self.tangent.map(|t| json!({"tangent": Num(t.tangent), "reverse": Num(t.reverse), "relative": Num(t.relative)})),
        });
        serde_json::to_string_pretty(&value).expect("a verification always serialises")
    }
}
