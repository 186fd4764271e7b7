//! A layered drawing of a small graph: each node's layer is the length of
//! the longest path from a leaf to it, found in one pass over the recording
//! order (inputs always come first), never by recursion.

use crate::trace::Trace;

/// Up to this many nodes the Edges pane draws the whole graph.
pub const MAX_DRAWN: usize = 40;

/// Where each node sits in the drawing.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Layers {
    /// Layer of each node (0: leaves).
    pub layer: Vec<usize>,
    /// Position of each node within its layer, from the top.
    pub row: Vec<usize>,
    /// Nodes per layer.
    pub counts: Vec<usize>,
}

impl Layers {
    /// The layering of `trace`, or `None` when it is too big to draw.
    pub fn of(trace: &Trace) -> Option<Layers> {
        let nodes = trace.nodes();
        if nodes.len() > MAX_DRAWN {
            return None;
        }
        let mut layer = vec![0usize; nodes.len()];
        for (index, node) in nodes.iter().enumerate() {
            layer[index] = node
                .inputs
                .iter()
                .map(|&input| layer[input] + 1)
                .max()
                .unwrap_or(0);
        }
        let depth = layer.iter().max().map_or(0, |deepest| deepest + 1);
        let mut counts = vec![0usize; depth];
        let mut row = vec![0usize; nodes.len()];
        for (index, &at) in layer.iter().enumerate() {
            row[index] = counts[at];
            counts[at] += 1;
        }
        Some(Layers { layer, row, counts })
    }

    /// Number of layers.
    pub fn depth(&self) -> usize {
        self.counts.len()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::trace::validate;

    #[test]
    fn layers_are_longest_paths_from_the_leaves() {
        let trace = validate(crate::demos::teaching()).unwrap();
        let layers = Layers::of(&trace).unwrap();
        let at = |id: &str| layers.layer[trace.find(id).unwrap()];
        // price → s_times_p → minus_sp → demand → demand_sq → storage → profit: six edges.
        assert_eq!(
            (
                at("price"),
                at("s_times_p"),
                at("demand"),
                at("storage"),
                at("profit")
            ),
            (0, 1, 3, 5, 6)
        );
        // margin sits one above its leaves even though it feeds a deep node.
        assert_eq!(at("margin"), 1);
        for node in trace.nodes() {
            let index = trace.find(&node.id).unwrap();
            assert!(
                node.inputs
                    .iter()
                    .all(|&input| layers.layer[input] < layers.layer[index])
            );
        }
        assert_eq!(layers.counts.iter().sum::<usize>(), trace.nodes().len());
    }
}
