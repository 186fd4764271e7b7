//! `ebb verify`'s report: text for people, JSON for scripts.

use super::Verification;
use crate::format::compact;
use crate::trace::{Num, Trace};
use serde_json::json;

impl Verification {
    /// The report as text: suspects first, then each check.
    pub fn to_text(&self, trace: &Trace) -> String {
        let id = |node: usize| trace.node(node).id.clone();
        let mut out = String::new();
        if self.sweep_flags > 0 {
            out.push_str(&format!(
                "warning  the reverse sweep is not finite ({} flags): where values are NaN or infinite the checks cannot judge a derivative; `ebb check` finds where it started\n",
                self.sweep_flags
            ));
        }
        if self.suspects.is_empty() && self.sweep_flags > 0 {
            out.push_str(&format!(
                "verdict  no mismatch beyond {} where the numbers are finite\n",
                self.tolerance
            ));
        } else if self.suspects.is_empty() {
            out.push_str(&format!(
                "verdict  every check agrees within {}\n",
                self.tolerance
            ));
        } else {
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
        }
        out.push_str(&format!(
            "partials {} recorded partials of catalog ops checked against the op table",
            self.partials.len()
        ));
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
            let mut line = format!(
                "  '{}'  {} {}  worst relative error {} ({})",
                id(check.param),
                check.entries.len(),
                if check.entries.len() == 1 {
                    "entry"
                } else {
                    "entries"
                },
                compact(worst.counted()),
                check.band().name()
            );
            let below = check.below_floor();
            if below > 0 {
                line.push_str(&format!("  {below} below the difference's resolution"));
            }
            if !check.kinks.is_empty() {
                let names: Vec<String> = check.kinks.iter().map(|&n| id(n)).collect();
                line.push_str(&format!("  kinks: {}", names.join(", ")));
            }
            if !check.linearised.is_empty() {
                line.push_str(&format!(
                    "  through {} custom op(s) by their recorded partials",
                    check.linearised.len()
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
            let disagreeing = self
                .reported
                .iter()
                .filter(|c| c.worst.relative > self.tolerance)
                .count();
            out.push_str(&format!(
                "reported {} reported gradients compared, {disagreeing} disagree\n",
                self.reported.len()
            ));
        }
        if let Some(tangent) = &self.tangent {
            out.push_str(&format!(
                "tangent  ∂f/∂v = {} by the tangent sweep, ⟨v, ∇f⟩ = {} by the reverse sweep (relative error {})\n",
                tangent.tangent,
                tangent.reverse,
                compact(tangent.relative)
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
            "sweep_flags": self.sweep_flags,
            "suspects": self.suspects.iter().map(|s| json!({
                "node": id(s.node), "op": trace.node(s.node).op_name, "evidence": s.evidence,
                "relative": Num(s.relative), "band": s.band, "detail": s.detail,
            })).collect::<Vec<_>>(),
            "partials": self.partials.iter().map(|c| json!({
                "node": id(c.node), "slot": c.slot, "element": c.worst.element,
                "recorded": Num(c.worst.actual), "recomputed": Num(c.worst.expected),
                "absolute": Num(c.worst.absolute), "relative": Num(c.worst.relative), "band": c.worst.band(),
            })).collect::<Vec<_>>(),
            "finite_differences": self.differences.iter().map(|c| json!({
                "param": id(c.param), "band": c.band(),
                "entries": c.entries.iter().map(|e| json!({
                    "element": e.element, "step": Num(e.step), "central": Num(e.central), "reverse": Num(e.reverse), "relative": Num(e.relative),
                    "floor": Num(e.floor), "within_floor": e.within_floor(),
                })).collect::<Vec<_>>(),
                "kinks": c.kinks.iter().map(|&n| id(n)).collect::<Vec<_>>(),
                "linearised": c.linearised.iter().map(|&n| id(n)).collect::<Vec<_>>(),
            })).collect::<Vec<_>>(),
            "reported": self.reported.iter().map(|c| json!({
                "node": id(c.node), "element": c.worst.element, "sweep": Num(c.worst.actual),
                "reported": Num(c.worst.expected), "relative": Num(c.worst.relative),
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
