//! The check report: counts, every parameter's gradient and the flags of a
//! finished sweep, as text for people and as JSON for CI scripts.
//!
//! JSON fields (stable; documented in README): `report` (schema version, 1),
//! `trace` {`path`, `title`, `dtype`}, `counts` {`nodes`, `edges`, `groups`,
//! `params`, `swept`, `unreached`}, `gradients` [{`id`, `group`, `shape`,
//! `norm`, `min`, `max`, `non_finite`, `reaches_output`, `finite_min`,
//! `finite_max`, `nan`, `pos_inf`, `neg_inf`}], `flags` [{`step`, `node`,
//! `op`, `kind`, `value`, `element`, `count`, `slot`, `from`, `first`,
//! `origin`, `class`}], `clean`, `diagnosis` (see [`diagnosis`]). Non-finite
//! numbers are the strings "NaN", "inf", "-inf". Fields after the first
//! version (`class`, `origin`, `diagnosis`, the gradients' finite and
//! non-finite counts) were added to schema 1 without changing any earlier
//! field; `class`, `origin` and `diagnosis` are absent when no diagnosis ran.

pub mod diagnosis;
pub mod fit;
pub mod gradients;

pub use diagnosis::DiagnosisReport;
pub use gradients::{Gradients, GradientsError};

use crate::diagnose::{Diagnosis, Rule};
use crate::format::{compact, shape as show};
use crate::sweep::{Flag, FlagKind, Masking, Sweep};
use crate::trace::{Num, Trace};
use serde::Serialize;

/// Version of the JSON report's schema.
pub const REPORT_VERSION: u32 = 1;

/// Everything `ebb check` reports.
#[derive(Debug, Clone, Serialize)]
pub struct Report {
    /// Schema version of this report.
    pub report: u32,
    /// Which trace.
    pub trace: TraceInfo,
    /// Sizes.
    pub counts: Counts,
    /// One entry per parameter, in recording order.
    pub gradients: Vec<Gradient>,
    /// Nodes whose recorded numbers were not representable in their dtype
    /// and were rounded on load (every sweep uses the rounded values);
    /// absent when there are none.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub rounded_on_load: Vec<RoundingEntry>,
    /// Flags in sweep order; the first is marked. A mask's absorbed −inf is
    /// not flagged (`sweep::masked`): it is listed in `masked`.
    pub flags: Vec<FlagEntry>,
    /// Nodes holding −inf on purpose (an attention mask) that later ops
    /// absorb: noted, not flagged; absent when there are none.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub masked: Vec<MaskedEntry>,
    /// True when nothing was flagged.
    pub clean: bool,
    /// Whether the check fails (exit status 1): something was flagged, or
    /// with `fail_on`, a finding of one of those rules.
    pub failed: bool,
    /// The rules that fail the check when given (`--fail-on`); absent: any.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub fail_on: Option<Vec<&'static str>>,
    /// The diagnosis, when one was made.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub diagnosis: Option<DiagnosisReport>,
    /// The sweep's flags by node index, to place the origin among them.
    #[serde(skip)]
    sweep_flags: Vec<Flag>,
}

/// A node whose −inf is an absorbed mask.
#[derive(Debug, Clone, Serialize)]
pub struct MaskedEntry {
    /// The node's id.
    pub node: String,
    /// Its sweep step (0-based).
    pub step: usize,
    /// Elements that are −inf.
    pub count: usize,
    /// The nodes with finite values that absorb it.
    pub absorbed_by: Vec<String>,
}

/// The trace's header.
#[derive(Debug, Clone, Serialize)]
pub struct TraceInfo {
    /// The path as given.
    pub path: String,
    /// Title.
    pub title: String,
    /// dtype of the run.
    pub dtype: String,
}

/// Sizes of the trace and the sweep.
#[derive(Debug, Clone, Serialize)]
pub struct Counts {
    /// Nodes.
    pub nodes: usize,
    /// Edges.
    pub edges: usize,
    /// Distinct groups.
    pub groups: usize,
    /// Parameters.
    pub params: usize,
    /// Nodes the sweep processed (those reaching the output).
    pub swept: usize,
    /// Nodes that do not reach the output.
    pub unreached: usize,
}

/// One parameter's gradient.
#[derive(Debug, Clone, Serialize)]
pub struct Gradient {
    /// Node id.
    pub id: String,
    /// Group.
    pub group: String,
    /// Shape.
    pub shape: Vec<usize>,
    /// L2 norm.
    pub norm: Num,
    /// Smallest entry that is not NaN (−inf included); NaN when every entry is NaN.
    pub min: Num,
    /// Largest entry that is not NaN (+inf included); NaN when every entry is NaN.
    pub max: Num,
    /// NaN and ±inf entries.
    pub non_finite: usize,
    /// Smallest finite entry (NaN when none is finite).
    pub finite_min: Num,
    /// Largest finite entry (NaN when none is finite).
    pub finite_max: Num,
    /// NaN entries.
    pub nan: usize,
    /// +inf entries.
    pub pos_inf: usize,
    /// −inf entries.
    pub neg_inf: usize,
    /// False when the parameter does not reach the output (no gradient).
    pub reaches_output: bool,
}

impl Gradient {
    /// The non-finite entries in words: `0`, `20 NaN`, `1 +inf`, `3 (1 NaN, 2 -inf)`.
    pub fn non_finite_text(&self) -> String {
        crate::stats::non_finite_text(self.nan, self.pos_inf, self.neg_inf)
    }
}

/// How the text report is laid out.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct TextOptions {
    /// Fit chains and paths into this many columns, keeping both ends.
    pub width: Option<usize>,
    /// Only the diagnosis and the gradient table.
    pub brief: bool,
}

/// A node whose numbers were rounded into its dtype on load.
#[derive(Debug, Clone, Serialize)]
pub struct RoundingEntry {
    /// Node id.
    pub node: String,
    /// Its dtype.
    pub dtype: String,
    /// The first element that changed.
    pub element: usize,
    /// The number as written in the file.
    pub written: Num,
    /// The value it became.
    pub stored: Num,
    /// Elements that changed.
    pub count: usize,
}

impl RoundingEntry {
    /// The roundings of `trace`, by node id.
    pub fn all(trace: &Trace) -> Vec<RoundingEntry> {
        trace
            .rounded_on_load()
            .iter()
            .map(|rounding| RoundingEntry {
                node: trace.node(rounding.node).id.clone(),
                dtype: trace.node_dtype(rounding.node).name().to_string(),
                element: rounding.index,
                written: Num(rounding.written),
                stored: Num(rounding.stored),
                count: rounding.count,
            })
            .collect()
    }

    /// One line: `'w' (f16): 4.47e-8 is stored as 5.9605e-8 (element 3; 2 numbers in all)`.
    pub fn text(&self) -> String {
        let more = if self.count > 1 {
            format!("; {} numbers in all", self.count)
        } else {
            String::new()
        };
        // Debug formatting: the shortest round-trip digits, in scientific
        // notation for tiny and huge numbers.
        format!(
            "'{}' ({}): {:?} is stored as {:?} (element {}{more})",
            self.node, self.dtype, self.written.0, self.stored.0, self.element
        )
    }
}

/// One flag.
#[derive(Debug, Clone, Serialize)]
pub struct FlagEntry {
    /// 1-based step.
    pub step: usize,
    /// Node id.
    pub node: String,
    /// The node's op name.
    pub op: String,
    /// What was found.
    pub kind: FlagKind,
    /// First offending value.
    pub value: Num,
    /// Its flat index.
    pub element: usize,
    /// Offending elements.
    pub count: usize,
    /// Input slot of the edge, where one is involved.
    pub slot: Option<usize>,
    /// For an adjoint, the consumer whose contribution made it non-finite.
    pub from: Option<String>,
    /// True for the first flag of the sweep.
    pub first: bool,
    /// True for the flag at the diagnosis's first origin (the cause, not a
    /// symptom); absent when no diagnosis ran.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub origin: Option<bool>,
    /// For a non-finite adjoint, the letter of its root-cause class (a–e, or `seed`).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub class: Option<&'static str>,
}

impl Report {
    /// Builds the report of `sweep` (normally run to the end) of the trace at `path`.
    pub fn new(path: &str, sweep: &Sweep) -> Report {
        let trace = sweep.trace();
        let dtype = trace.dtype();
        let gradients = trace
            .params()
            .map(|node| {
                let recorded = trace.node(node);
                let shape = recorded.value.shape().to_vec();
                match sweep.adjoint(node) {
                    Some(adjoint) => {
                        let summary = adjoint.summary(dtype);
                        Gradient {
                            id: recorded.id.clone(),
                            group: recorded.group.clone(),
                            shape,
                            norm: Num(summary.norm),
                            min: Num(summary.min),
                            max: Num(summary.max),
                            non_finite: summary.non_finite(),
                            finite_min: Num(summary.finite_min),
                            finite_max: Num(summary.finite_max),
                            nan: summary.nan,
                            pos_inf: summary.pos_inf,
                            neg_inf: summary.neg_inf,
                            reaches_output: true,
                        }
                    }
                    None => Gradient {
                        id: recorded.id.clone(),
                        group: recorded.group.clone(),
                        shape,
                        norm: Num(0.0),
                        min: Num(0.0),
                        max: Num(0.0),
                        non_finite: 0,
                        finite_min: Num(0.0),
                        finite_max: Num(0.0),
                        nan: 0,
                        pos_inf: 0,
                        neg_inf: 0,
                        reaches_output: false,
                    },
                }
            })
            .collect();
        let masking = Masking::of(sweep);
        let sweep_flags: Vec<Flag> = masking
            .unexplained(sweep.flags())
            .into_iter()
            .cloned()
            .collect();
        let flags: Vec<FlagEntry> = sweep_flags
            .iter()
            .enumerate()
            .map(|(k, flag)| flag_entry(trace, flag, k == 0))
            .collect();
        let id = |node: usize| trace.node(node).id.clone();
        let masked = masking
            .masked
            .iter()
            .map(|masked| MaskedEntry {
                node: id(masked.node),
                step: masked.step,
                count: masked.count,
                absorbed_by: masked.absorbed_by.iter().map(|&node| id(node)).collect(),
            })
            .collect();
        Report {
            report: REPORT_VERSION,
            trace: TraceInfo {
                path: path.to_string(),
                title: trace.title().to_string(),
                dtype: dtype.name().to_string(),
            },
            counts: Counts {
                nodes: trace.nodes().len(),
                edges: trace.edge_count(),
                groups: trace.groups().len(),
                params: trace.params().count(),
                swept: sweep.cursor(),
                unreached: trace.unreached().count(),
            },
            gradients,
            rounded_on_load: RoundingEntry::all(trace),
            clean: flags.is_empty(),
            failed: !flags.is_empty(),
            fail_on: None,
            flags,
            masked,
            diagnosis: None,
            sweep_flags,
        }
    }

    /// Adds the diagnosis: its section, the root-cause class of each
    /// non-finite adjoint flag, and its findings in `clean`.
    pub fn with_diagnosis(mut self, trace: &Trace, diagnosis: &Diagnosis) -> Report {
        let origin_flag = diagnosis.origin_flag(&self.sweep_flags);
        for (k, flag) in self.flags.iter_mut().enumerate() {
            flag.origin = Some(origin_flag == Some(k));
            if flag.kind == FlagKind::NonFiniteAdjoint
                && let Some(node) = trace.find(&flag.node)
            {
                flag.class = diagnosis
                    .origin_of(node)
                    .map(|origin| origin.class.letter());
            }
        }
        self.clean = self.clean && diagnosis.is_clean();
        self.failed = !self.clean;
        self.diagnosis = Some(DiagnosisReport::new(trace, diagnosis));
        self
    }

    /// The report as pretty JSON.
    pub fn to_json(&self) -> String {
        serde_json::to_string_pretty(self).expect("a report always serialises")
    }

    /// The report as text: the short diagnosis first, then the counts,
    /// gradients and flags, then the diagnosis's details.
    pub fn to_text(&self) -> String {
        self.to_text_with(&TextOptions::default())
    }

    /// The report as text, laid out by `options`.
    pub fn to_text_with(&self, options: &TextOptions) -> String {
        let mut out = String::new();
        if let Some(diagnosis) = &self.diagnosis {
            out.push_str(&diagnosis.summary_text_fit(options.width));
            out.push('\n');
        }
        if options.brief {
            out.push_str(&self.gradients_text());
            return out;
        }
        let c = &self.counts;
        out.push_str(&format!(
            "trace    {}  \"{}\"  ({})\n",
            self.trace.path, self.trace.title, self.trace.dtype
        ));
        out.push_str(&format!(
            "counts   {}, {}, {}, {}; swept {} of {}",
            plural(c.nodes, "node"),
            plural(c.edges, "edge"),
            plural(c.groups, "group"),
            plural(c.params, "param"),
            c.swept,
            plural(c.nodes, "node")
        ));
        if c.unreached > 0 {
            out.push_str(&format!(" ({} do not reach the output)", c.unreached));
        }
        out.push('\n');
        if !self.rounded_on_load.is_empty() {
            let count = self.rounded_on_load.len();
            out.push_str(&format!(
                "rounded  {count} {} numbers not representable in {} dtype, rounded on load (every sweep uses the stored value)\n",
                if count == 1 { "node holds" } else { "nodes hold" },
                if count == 1 { "its" } else { "their" }
            ));
            for rounding in &self.rounded_on_load {
                out.push_str(&format!("  {}\n", rounding.text()));
            }
        }
        out.push_str(&self.gradients_text());
        out.push_str(&self.flags_text());
        if let Some(diagnosis) = &self.diagnosis {
            out.push_str(&diagnosis.details_text_fit(options.width));
        }
        out
    }

    /// Sets which rules fail the check (`fail_on`, and `failed` from it):
    /// `None` for any rule or flag; otherwise only findings of these rules
    /// (a sweep flag counts as `non_finite`).
    pub fn with_fail_on(mut self, rules: Option<&[Rule]>) -> Report {
        self.failed = match rules {
            None => !self.clean,
            Some(rules) => {
                let flagged = rules.contains(&Rule::NonFinite) && !self.flags.is_empty();
                flagged
                    || self.diagnosis.as_ref().is_some_and(|diagnosis| {
                        diagnosis
                            .findings
                            .iter()
                            .any(|finding| rules.contains(&finding.rule))
                    })
            }
        };
        self.fail_on = rules.map(|rules| rules.iter().map(|rule| rule.name()).collect());
        self
    }

    fn gradients_text(&self) -> String {
        if self.gradients.is_empty() {
            return "gradients  none (the trace has no param nodes)\n".to_string();
        }
        let rows: Vec<[String; 6]> = self
            .gradients
            .iter()
            .map(|g| {
                if !g.reaches_output {
                    return [
                        g.id.clone(),
                        show(&g.shape),
                        "—".into(),
                        "—".into(),
                        "—".into(),
                        "does not reach the output".into(),
                    ];
                }
                [
                    g.id.clone(),
                    show(&g.shape),
                    compact(g.norm.0),
                    compact(g.min.0),
                    compact(g.max.0),
                    g.non_finite_text(),
                ]
            })
            .collect();
        table(
            "gradients",
            ["param", "shape", "L2 norm", "min", "max", "non-finite"],
            &rows,
        )
    }

    fn flags_text(&self) -> String {
        let mut out = self.flags_only_text();
        for masked in &self.masked {
            out.push_str(&format!(
                "masked   '{}' holds −inf in {} {} (a mask), absorbed by {}: not a fault\n",
                masked.node,
                masked.count,
                if masked.count == 1 {
                    "element"
                } else {
                    "elements"
                },
                masked
                    .absorbed_by
                    .iter()
                    .map(|id| format!("'{id}'"))
                    .collect::<Vec<_>>()
                    .join(", ")
            ));
        }
        out
    }

    fn flags_only_text(&self) -> String {
        if self.flags.is_empty() {
            return if self.masked.is_empty() {
                "flags    none: every value, partial and adjoint is finite\n".to_string()
            } else {
                "flags    none: every partial and adjoint is finite, and every −inf value is a mask that is absorbed\n".to_string()
            };
        }
        let marked = self.flags.iter().any(|flag| flag.origin == Some(true));
        let mut out = format!(
            "flags    {} in sweep order (* {})\n",
            self.flags.len(),
            if marked { "the origin" } else { "first" }
        );
        for flag in &self.flags {
            let star = if marked {
                flag.origin == Some(true)
            } else {
                flag.first
            };
            let marker = if star { '*' } else { ' ' };
            out.push_str(&format!(
                "  {marker} step {:<5} {:<12} {}\n",
                flag.step,
                format!("'{}'", flag.node),
                describe(flag)
            ));
        }
        out
    }
}

/// One line saying what a flag found.
fn describe(flag: &FlagEntry) -> String {
    let place = if flag.count > 1 {
        format!(
            " ({} elements; first at element {})",
            flag.count, flag.element
        )
    } else {
        String::new()
    };
    match flag.kind {
        FlagKind::NonFiniteValue => format!(
            "({}) forward value is {}{place}",
            flag.op,
            compact(flag.value.0)
        ),
        FlagKind::NonFinitePartial => {
            format!(
                "({}) partial on input edge {} is {}",
                flag.op,
                flag.slot.unwrap_or(0),
                compact(flag.value.0)
            )
        }
        FlagKind::NonFiniteAdjoint => match &flag.from {
            Some(from) => format!(
                "({}) adjoint became {} from the contribution of '{from}'{place}",
                flag.op,
                compact(flag.value.0)
            ),
            None => format!("({}) seed is {}{place}", flag.op, compact(flag.value.0)),
        },
    }
}

fn flag_entry(trace: &Trace, flag: &Flag, first: bool) -> FlagEntry {
    let node = trace.node(flag.node);
    FlagEntry {
        step: flag.step + 1,
        node: node.id.clone(),
        op: node.op_name.to_string(),
        kind: flag.kind,
        value: Num(flag.value),
        element: flag.element,
        count: flag.count,
        slot: flag.slot,
        from: flag.from.map(|from| trace.node(from).id.clone()),
        first,
        origin: None,
        class: None,
    }
}

/// `1 node`, `2 nodes`.
fn plural(count: usize, noun: &str) -> String {
    if count == 1 {
        format!("1 {noun}")
    } else {
        format!("{count} {noun}s")
    }
}

/// A titled, left-aligned text table.
fn table<const N: usize>(title: &str, header: [&str; N], rows: &[[String; N]]) -> String {
    let mut widths = header.map(str::len);
    for row in rows {
        for (width, cell) in widths.iter_mut().zip(row) {
            *width = (*width).max(cell.chars().count());
        }
    }
    let line = |cells: Vec<&str>| {
        let padded: Vec<String> = cells
            .iter()
            .zip(&widths)
            // Padded by hand: a `{:<width$}` width must fit in u16, and an
            // id from a file can be longer.
            .map(|(cell, &width)| {
                let pad = width.saturating_sub(cell.chars().count());
                format!("{cell}{}", " ".repeat(pad))
            })
            .collect();
        format!("  {}\n", padded.join("  ").trim_end())
    };
    let mut out = format!("{title}\n");
    out.push_str(&line(header.to_vec()));
    for row in rows {
        out.push_str(&line(row.iter().map(String::as_str).collect()));
    }
    out
}
