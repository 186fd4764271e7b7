//! The one-line prompt: jump to a node by id (with completion over a sorted
//! id index), search by id, op or group, or watch for a condition
//! (`watch.rs` holds its syntax).

use crate::trace::Trace;

/// What the prompt is for.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PromptKind {
    /// Jump to a node by exact id.
    Jump,
    /// Search ids, ops and groups.
    Search,
    /// Run the sweep until a condition holds.
    Watch,
}

impl PromptKind {
    /// The text before the input.
    pub fn label(self) -> &'static str {
        match self {
            PromptKind::Jump => "jump to node: ",
            PromptKind::Search => "search id, op or group: ",
            PromptKind::Watch => "run until: ",
        }
    }
}

/// The prompt's state.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Prompt {
    /// Jump or search.
    pub kind: PromptKind,
    /// What has been typed.
    pub text: String,
    /// For a jump: nodes whose id starts with the text, in id order (at most [`MAX_CANDIDATES`]).
    pub candidates: Vec<usize>,
    /// How many nodes match in all.
    pub matches: usize,
    /// The highlighted candidate.
    pub pick: usize,
    /// Why the text was refused (a watch condition that does not parse).
    pub error: Option<String>,
}

/// Candidates listed under the prompt.
pub const MAX_CANDIDATES: usize = 8;

impl Prompt {
    /// An empty prompt.
    pub fn new(kind: PromptKind) -> Prompt {
        Prompt {
            kind,
            text: String::new(),
            candidates: Vec::new(),
            matches: 0,
            pick: 0,
            error: None,
        }
    }

    /// Recomputes the candidates from the text, with `by_id` the node
    /// indices sorted by id.
    pub fn refresh(&mut self, trace: &Trace, by_id: &[usize]) {
        self.pick = 0;
        if self.kind != PromptKind::Jump {
            return;
        }
        let range = prefix_range(trace, by_id, &self.text);
        self.matches = range.len();
        self.candidates = by_id[range].iter().copied().take(MAX_CANDIDATES).collect();
    }

    /// Tab: extends the text to the longest prefix every match shares; when
    /// it already is, moves the highlight to the next candidate.
    pub fn complete(&mut self, trace: &Trace, by_id: &[usize]) {
        let range = prefix_range(trace, by_id, &self.text);
        if range.is_empty() {
            return;
        }
        let first = &trace.node(by_id[range.start]).id;
        let last = &trace.node(by_id[range.end - 1]).id;
        // Ids are sorted, so the prefix shared by the first and last is shared by all.
        let shared: String = first
            .chars()
            .zip(last.chars())
            .take_while(|(a, b)| a == b)
            .map(|(a, _)| a)
            .collect();
        if shared.len() > self.text.len() {
            self.text = shared;
            self.refresh(trace, by_id);
        } else if !self.candidates.is_empty() {
            self.pick = (self.pick + 1) % self.candidates.len();
        }
    }

    /// The node a jump lands on: the exact id, else the highlighted candidate.
    pub fn target(&self, trace: &Trace) -> Option<usize> {
        trace
            .find(&self.text)
            .or_else(|| self.candidates.get(self.pick).copied())
    }
}

/// The node indices sorted by id.
pub fn sorted_ids(trace: &Trace) -> Vec<usize> {
    let mut by_id: Vec<usize> = (0..trace.nodes().len()).collect();
    by_id.sort_unstable_by(|&a, &b| trace.node(a).id.cmp(&trace.node(b).id));
    by_id
}

fn prefix_range(trace: &Trace, by_id: &[usize], prefix: &str) -> std::ops::Range<usize> {
    let start = by_id.partition_point(|&node| trace.node(node).id.as_str() < prefix);
    let len = by_id[start..].partition_point(|&node| trace.node(node).id.starts_with(prefix));
    start..start + len
}

/// True when `node` matches a search for `query`: its id or group contains
/// it, or its op is named by it.
pub fn matches(trace: &Trace, node: usize, query: &str) -> bool {
    let recorded = trace.node(node);
    recorded.id.contains(query) || &*recorded.op_name == query || recorded.group.contains(query)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::trace::validate;

    #[test]
    fn tab_completes_to_the_shared_prefix_then_cycles() {
        let trace = validate(crate::demos::teaching()).unwrap();
        let by_id = sorted_ids(&trace);
        let mut prompt = Prompt::new(PromptKind::Jump);
        prompt.text = "de".to_string();
        prompt.refresh(&trace, &by_id);
        assert_eq!(prompt.matches, 2, "demand and demand_sq");
        prompt.complete(&trace, &by_id);
        assert_eq!(prompt.text, "demand");
        assert_eq!(prompt.target(&trace), trace.find("demand"));
        prompt.text = "s".to_string();
        prompt.refresh(&trace, &by_id);
        prompt.complete(&trace, &by_id);
        assert_eq!(
            prompt.text, "s",
            "sensitivity, s_times_p and storage share only s"
        );
        assert_eq!(prompt.pick, 1);
        assert_eq!(
            prompt
                .target(&trace)
                .map(|node| trace.node(node).id.as_str()),
            Some("sensitivity")
        );
    }

    #[test]
    fn search_matches_id_op_and_group() {
        let trace = validate(crate::demos::teaching()).unwrap();
        let hits = |query: &str| {
            (0..trace.nodes().len())
                .filter(|&node| matches(&trace, node, query))
                .count()
        };
        // s_times_p, gross, demand_sq, storage and fee multiply.
        assert_eq!(hits("mul"), 5);
        // The group profit holds margin, gross, demand_sq, storage, fee, costs and profit itself.
        assert_eq!(hits("profit"), 7);
        assert_eq!(hits("zzz"), 0);
    }
}
