//! The Edges pane's drawing of the graph: layered, with arrows in the
//! direction the adjoint flows (from a consumer down to its inputs).
//!
//! Layers are longest paths to the output (the output on top, every node as
//! close to its first consumer as it can be), found in one pass over the
//! reverse recording order; an edge spanning several layers passes through
//! placeholder points, one per layer. Crossings are reduced by ordering each
//! layer by the mean position of its neighbours (the barycentre method),
//! sweeping down and up a few times and keeping the best order. Each node is
//! a box `[✓id]` (its sweep state, then its whole id, or a shortened one
//! that is still unique). Small traces are drawn whole; others as the neighbourhood of the
//! selected node, some steps out, with the rest counted.

use std::collections::{HashMap, HashSet, VecDeque};

use crate::trace::Trace;

/// Traces up to this many nodes are drawn whole when they fit.
pub const WHOLE: usize = 40;
/// A neighbourhood holds at most this many nodes.
const MOST: usize = 32;
/// Label length assumed for an empty node list.
const LONGEST: usize = 16;
/// Columns between two boxes of a layer.
const GAP: usize = 2;

/// Line directions of a cell, as bits.
const UP: u8 = 1;
const DOWN: u8 = 2;
const LEFT: u8 = 4;
const RIGHT: u8 = 8;

/// One node's box.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct NodeBox {
    /// The node.
    pub node: usize,
    /// What the box says inside its brackets (the id, or a unique shortening).
    pub label: String,
    /// Column of the `[`.
    pub x: usize,
    /// Row.
    pub y: usize,
    /// Columns: brackets, the marker and the label.
    pub width: usize,
}

/// One arrow: a consumer's adjoint flowing to one of its inputs.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Arrow {
    /// The node the adjoint comes from (drawn above).
    pub consumer: usize,
    /// The input it flows to (drawn below).
    pub input: usize,
    /// The input slots the edge fills (a node used twice by one consumer has two).
    pub slots: Vec<usize>,
    /// Every cell of its line, from just below the consumer's box down to the head.
    pub path: Vec<(usize, usize)>,
}

/// What is drawn.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Extent {
    /// The whole graph.
    Whole,
    /// The nodes up to this many edges from the selected one.
    Around(usize),
}

/// A drawing on a grid of cells.
#[derive(Debug, Clone)]
pub struct Drawing {
    /// Columns.
    pub width: usize,
    /// Rows.
    pub height: usize,
    /// The boxes.
    pub boxes: Vec<NodeBox>,
    /// The arrows.
    pub arrows: Vec<Arrow>,
    /// Labels written beside arrowheads: text, column, row.
    pub labels: Vec<(String, usize, usize)>,
    /// What part of the graph is drawn.
    pub extent: Extent,
    /// Nodes of the trace not drawn.
    pub hidden: usize,
    lines: Vec<u8>,
}

/// An item of a layer: a node, or the point where an edge crosses the layer.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
enum Item {
    Node(usize),
    /// Edge `.0` crossing layer `.1`.
    Pass(usize, usize),
}

impl Drawing {
    /// The drawing for `selected` in at most `width`×`height` cells: the whole
    /// graph if small enough and it fits, else the largest neighbourhood that
    /// fits. `label` gives the text beside an arrow (consumer, input), if any.
    pub fn of(
        trace: &Trace,
        selected: usize,
        width: usize,
        height: usize,
        label: &dyn Fn(usize, usize) -> Option<String>,
    ) -> Option<Drawing> {
        let count = trace.nodes().len();
        if count <= WHOLE {
            let all: Vec<usize> = (0..count).collect();
            if let Some(drawing) = lay_out(trace, &all, width, height, label) {
                return Some(Drawing {
                    extent: Extent::Whole,
                    ..drawing
                });
            }
        }
        for steps in [3, 2, 1] {
            let mut nodes = around(trace, selected, steps);
            // Drop the farthest nodes until the rest fits.
            while !nodes.is_empty() {
                if let Some(drawing) = lay_out(trace, &nodes, width, height, label) {
                    return Some(Drawing {
                        extent: Extent::Around(steps),
                        hidden: count - drawing.boxes.len(),
                        ..drawing
                    });
                }
                if steps > 1 {
                    break;
                }
                nodes.pop();
            }
        }
        None
    }

    /// The character at a cell, with whether it belongs to the selected node's edges left to the caller.
    pub fn char_at(&self, x: usize, y: usize) -> Option<char> {
        let bits = self.lines[y * self.width + x];
        Some(match bits {
            0 => return None,
            b if b == UP | DOWN || b == UP || b == DOWN => '│',
            b if b == LEFT | RIGHT || b == LEFT || b == RIGHT => '─',
            b if b == DOWN | RIGHT => '┌',
            b if b == DOWN | LEFT => '┐',
            b if b == UP | RIGHT => '└',
            b if b == UP | LEFT => '┘',
            b if b == UP | DOWN | RIGHT => '├',
            b if b == UP | DOWN | LEFT => '┤',
            b if b == DOWN | LEFT | RIGHT => '┬',
            b if b == UP | LEFT | RIGHT => '┴',
            _ => '┼',
        })
    }

    /// The drawing as text, one string per row (boxes, lines, arrowheads, labels).
    #[cfg(test)]
    pub fn rows(&self) -> Vec<String> {
        let mut grid: Vec<Vec<char>> = (0..self.height)
            .map(|y| {
                (0..self.width)
                    .map(|x| self.char_at(x, y).unwrap_or(' '))
                    .collect()
            })
            .collect();
        for arrow in &self.arrows {
            let &(x, y) = arrow.path.last().expect("an arrow has a head");
            grid[y][x] = '▼';
        }
        for (text, x, y) in &self.labels {
            for (at, c) in text.chars().enumerate() {
                grid[*y][x + at] = c;
            }
        }
        for node_box in &self.boxes {
            let text = format!("[ {}]", node_box.label);
            for (at, c) in text.chars().enumerate() {
                grid[node_box.y][node_box.x + at] = c;
            }
        }
        grid.into_iter()
            .map(|row| row.into_iter().collect())
            .collect()
    }
}

/// The nodes up to `steps` edges from `selected` either way, nearest first,
/// at most [`MOST`].
fn around(trace: &Trace, selected: usize, steps: usize) -> Vec<usize> {
    let mut seen: HashSet<usize> = HashSet::from([selected]);
    let mut order = vec![selected];
    let mut queue = VecDeque::from([(selected, 0)]);
    while let Some((node, distance)) = queue.pop_front() {
        if distance == steps {
            continue;
        }
        let inputs = trace.node(node).inputs.iter().copied();
        let consumers = trace
            .consumers(node)
            .into_iter()
            .map(|(consumer, _)| consumer);
        for next in consumers.chain(inputs) {
            if order.len() >= MOST {
                return order;
            }
            if seen.insert(next) {
                order.push(next);
                queue.push_back((next, distance + 1));
            }
        }
    }
    order
}

/// Labels for `nodes`: whole ids where they fit, else shortened around an
/// ellipsis, lengthened until no two are the same.
fn labels(trace: &Trace, nodes: &[usize], longest: usize) -> HashMap<usize, String> {
    let id = |node: usize| trace.node(node).id.as_str();
    let shorten = |text: &str, head: usize, tail: usize| {
        let chars: Vec<char> = text.chars().collect();
        if chars.len() <= head + tail + 1 {
            return text.to_string();
        }
        let start: String = chars[..head].iter().collect();
        let end: String = chars[chars.len() - tail..].iter().collect();
        format!("{start}…{end}")
    };
    let longest = longest.max(3);
    for tail in (0..longest).rev() {
        let head = longest - 1 - tail;
        if head == 0 {
            continue;
        }
        let made: HashMap<usize, String> = nodes
            .iter()
            .map(|&node| (node, shorten(id(node), head, tail)))
            .collect();
        let distinct: HashSet<&String> = made.values().collect();
        if distinct.len() == made.len() {
            return made;
        }
    }
    // Ids that differ only deep inside: fall back to the node's place in the trace.
    nodes
        .iter()
        .map(|&node| (node, format!("#{node}")))
        .collect()
}

/// Lays out `nodes` in `width`×`height`, or
/// `None` when it does not fit.
fn lay_out(
    trace: &Trace,
    nodes: &[usize],
    width: usize,
    height: usize,
    label: &dyn Fn(usize, usize) -> Option<String>,
) -> Option<Drawing> {
    let members: HashSet<usize> = nodes.iter().copied().collect();
    // Longest path to a node with no consumer among the members, in reverse recording order.
    let mut sorted: Vec<usize> = nodes.to_vec();
    sorted.sort_unstable();
    let mut depth: HashMap<usize, usize> = HashMap::new();
    let mut edges: Vec<(usize, usize, Vec<usize>)> = Vec::new();
    for &node in sorted.iter().rev() {
        let mut deepest: Option<usize> = None;
        for (consumer, slot) in trace.consumers(node) {
            if !members.contains(&consumer) {
                continue;
            }
            deepest = Some(deepest.map_or(depth[&consumer], |d: usize| d.max(depth[&consumer])));
            match edges
                .iter_mut()
                .find(|(c, i, _)| *c == consumer && *i == node)
            {
                Some((_, _, slots)) => slots.push(slot),
                None => edges.push((consumer, node, vec![slot])),
            }
        }
        depth.insert(node, deepest.map_or(0, |d| d + 1));
    }
    let layers = depth.values().copied().max().unwrap_or(0) + 1;
    // Items per layer: the nodes, then a pass point per layer an edge crosses.
    let mut rows: Vec<Vec<Item>> = vec![Vec::new(); layers];
    for &node in &sorted {
        rows[depth[&node]].push(Item::Node(node));
    }
    let mut chains: Vec<Vec<Item>> = Vec::new();
    for (at, (consumer, input, _)) in edges.iter().enumerate() {
        let mut chain = vec![Item::Node(*consumer)];
        for (layer, row) in rows
            .iter_mut()
            .enumerate()
            .take(depth[input])
            .skip(depth[consumer] + 1)
        {
            row.push(Item::Pass(at, layer));
            chain.push(Item::Pass(at, layer));
        }
        chain.push(Item::Node(*input));
        chains.push(chain);
    }
    order_layers(&mut rows, &chains);
    // Box labels, shortened until the widest layer fits.
    // Whole ids where they fit, else shorter, down to a few characters.
    let mut longest = nodes
        .iter()
        .map(|&node| trace.node(node).id.chars().count())
        .max()
        .unwrap_or(LONGEST);
    let names = loop {
        let names = labels(trace, nodes, longest);
        let widest = rows
            .iter()
            .map(|row| row_width(row, &names))
            .max()
            .unwrap_or(0);
        if widest <= width {
            break names;
        }
        if longest <= 4 {
            return None;
        }
        longest -= 1;
    };
    // Columns: each item pulled towards the mean of its neighbours' middles
    // (so edges run as straight as the order allows), items kept apart.
    let mut anchor: HashMap<(usize, Item), usize> = HashMap::new();
    let mut boxes = Vec::new();
    let placed_x = place_columns(&rows, &chains, &names, width);
    // Rows: a box row per layer, then the tracks its edges run on, then the arrowhead row.
    let mut tracks_below: Vec<Vec<Vec<usize>>> = Vec::new();
    for (layer, placed) in placed_x.iter().enumerate() {
        for &(item, x, w) in placed {
            anchor.insert((layer, item), x + w / 2);
        }
    }
    // Where each edge arrives at its input's box: the edges into one box
    // spread over its width, in the order of where they come from, so each
    // has an arrowhead of its own.
    let mut ports: HashMap<usize, usize> = HashMap::new();
    for (layer, placed) in placed_x.iter().enumerate() {
        for &(item, x, w) in placed {
            let Item::Node(node) = item else { continue };
            let mut arriving: Vec<(usize, usize)> = chains
                .iter()
                .enumerate()
                .filter(|(at, chain)| edges[*at].1 == node && chain.len() >= 2)
                .map(|(at, chain)| (anchor[&(layer - 1, chain[chain.len() - 2])], at))
                .collect();
            arriving.sort_unstable();
            let inner = w.saturating_sub(2).max(1);
            let count = arriving.len();
            for (k, &(_, at)) in arriving.iter().enumerate() {
                let offset = if count <= 1 {
                    w / 2
                } else {
                    1 + k * inner / count + inner / (2 * count)
                };
                ports.insert(at, x + offset.min(w - 1));
            }
        }
    }
    let segments = |layer: usize| -> Vec<(usize, usize, usize)> {
        // (edge, upper x, lower x) for every edge segment from `layer` to the next.
        let mut found = Vec::new();
        for (at, chain) in chains.iter().enumerate() {
            let (consumer, _, _) = &edges[at];
            let start = depth[consumer];
            if layer >= start && layer + 1 < start + chain.len() {
                let offset = layer - start;
                let upper = anchor[&(layer, chain[offset])];
                let lower = if offset + 2 == chain.len() {
                    ports[&at]
                } else {
                    anchor[&(layer + 1, chain[offset + 1])]
                };
                found.push((at, upper, lower));
            }
        }
        found
    };
    let mut row_of_layer = Vec::new();
    let mut y = 0;
    for layer in 0..layers {
        row_of_layer.push(y);
        let found = if layer + 1 < layers {
            segments(layer)
        } else {
            Vec::new()
        };
        // Edges leaving one point share a track; spans that overlap get different ones.
        let mut spans: Vec<(usize, usize, usize)> = Vec::new(); // (upper x, low, high)
        for &(_, upper, lower) in &found {
            let (low, high) = (upper.min(lower), upper.max(lower));
            match spans.iter_mut().find(|(from, _, _)| *from == upper) {
                Some(span) => {
                    span.1 = span.1.min(low);
                    span.2 = span.2.max(high);
                }
                None => spans.push((upper, low, high)),
            }
        }
        spans.sort_by_key(|&(_, low, high)| (low, high));
        let mut tracks: Vec<Vec<usize>> = Vec::new(); // per track: the uppers on it
        let mut ends: Vec<usize> = Vec::new();
        for &(upper, low, high) in &spans {
            match ends.iter().position(|&end| end + 1 < low) {
                Some(track) => {
                    tracks[track].push(upper);
                    ends[track] = high;
                }
                None => {
                    tracks.push(vec![upper]);
                    ends.push(high);
                }
            }
        }
        let gap = if layer + 1 < layers {
            tracks.len().max(1) + 1
        } else {
            0
        };
        tracks_below.push(tracks);
        y += 1 + gap;
    }
    let total_height = y;
    if total_height > height {
        return None;
    }
    let mut lines = vec![0u8; width * total_height];
    let mut set = |x: usize, y: usize, bits: u8| lines[y * width + x] |= bits;
    let mut arrows: Vec<Arrow> = edges
        .iter()
        .map(|(consumer, input, slots)| Arrow {
            consumer: *consumer,
            input: *input,
            slots: slots.clone(),
            path: Vec::new(),
        })
        .collect();
    for layer in 0..layers.saturating_sub(1) {
        let top = row_of_layer[layer];
        let bottom = row_of_layer[layer + 1];
        let head = bottom - 1;
        for (at, upper, lower) in segments(layer) {
            let track = tracks_below[layer]
                .iter()
                .position(|uppers| uppers.contains(&upper))
                .expect("every segment has a track");
            let turn = top + 1 + track;
            let path = &mut arrows[at].path;
            // Down from the upper point to the track.
            for row in top + 1..=turn {
                let on = if row < turn || lower == upper {
                    DOWN
                } else {
                    0
                };
                set(upper, row, UP | on);
                path.push((upper, row));
            }
            // Along the track, then down at the lower point.
            if lower != upper {
                let (from, to) = (upper.min(lower), upper.max(lower));
                for x in from..=to {
                    set(
                        x,
                        turn,
                        if x > from { LEFT } else { 0 } | if x < to { RIGHT } else { 0 },
                    );
                }
                set(lower, turn, DOWN);
                let step: isize = if lower > upper { 1 } else { -1 };
                let mut x = upper as isize;
                while x != lower as isize {
                    x += step;
                    path.push((x as usize, turn));
                }
            }
            // Down to the head above the input, or on through a pass point's row.
            let to_node = bottom == row_of_layer[depth[&edges[at].1]];
            let end = if to_node { head } else { bottom };
            for row in turn + 1..=end {
                let on = if row < end || !to_node { DOWN } else { 0 };
                set(lower, row, UP | on);
                path.push((lower, row));
            }
        }
    }
    // A pass point is a plain vertical line through its layer's box row.
    let mut labels_at = Vec::new();
    for arrow in &arrows {
        let &(x, y) = arrow.path.last().expect("an arrow has a path");
        if let Some(text) = label(arrow.consumer, arrow.input) {
            labels_at.push((text, x + 1, y));
        }
    }
    for (layer, placed) in placed_x.iter().enumerate() {
        for &(item, x, w) in placed {
            if let Item::Node(node) = item {
                boxes.push(NodeBox {
                    node,
                    label: names[&node].clone(),
                    x,
                    y: row_of_layer[layer],
                    width: w,
                });
            }
        }
    }
    let mut drawing = Drawing {
        width,
        height: total_height,
        boxes,
        arrows,
        labels: Vec::new(),
        extent: Extent::Whole,
        hidden: 0,
        lines,
    };
    // Labels go where nothing else is drawn.
    labels_at.sort_by_key(|(_, x, y)| (*y, *x));
    for (text, x, y) in labels_at {
        let fits = x + text.chars().count() <= width
            && (x..x + text.chars().count()).all(|column| drawing.free(column, y));
        if fits {
            drawing.labels.push((text, x, y));
        }
    }
    Some(drawing)
}

impl Drawing {
    /// Whether nothing is drawn at a cell yet.
    fn free(&self, x: usize, y: usize) -> bool {
        self.lines[y * self.width + x] == 0
            && !self
                .arrows
                .iter()
                .any(|arrow| arrow.path.last() == Some(&(x, y)))
            && !self
                .boxes
                .iter()
                .any(|b| b.y == y && (b.x..b.x + b.width).contains(&x))
            && !self.labels.iter().any(|(text, lx, ly)| {
                *ly == y && (*lx..*lx + text.chars().count() + 1).contains(&x)
            })
    }
}

/// Left columns of every item: start packed and centred, then a few rounds
/// of moving each item towards the mean middle of its neighbours in the
/// layers above and below, keeping the order and at least [`GAP`] between
/// items, inside `width`.
fn place_columns(
    rows: &[Vec<Item>],
    chains: &[Vec<Item>],
    names: &HashMap<usize, String>,
    width: usize,
) -> Vec<Vec<(Item, usize, usize)>> {
    let widths: Vec<Vec<usize>> = rows
        .iter()
        .map(|row| row.iter().map(|&item| item_width(item, names)).collect())
        .collect();
    let mut left: Vec<Vec<f64>> = rows
        .iter()
        .zip(&widths)
        .map(|(row, sizes)| {
            let total = row_width(row, names);
            let mut x = ((width - total) / 2) as f64;
            sizes
                .iter()
                .map(|size| {
                    let at = x;
                    x += (size + GAP) as f64;
                    at
                })
                .collect()
        })
        .collect();
    let index: HashMap<Item, (usize, usize)> = rows
        .iter()
        .enumerate()
        .flat_map(|(layer, row)| {
            row.iter()
                .enumerate()
                .map(move |(at, &item)| (item, (layer, at)))
        })
        .collect();
    let mut neighbours: HashMap<Item, Vec<Item>> = HashMap::new();
    for chain in chains {
        for pair in chain.windows(2) {
            neighbours.entry(pair[0]).or_default().push(pair[1]);
            neighbours.entry(pair[1]).or_default().push(pair[0]);
        }
    }
    for round in 0..8 {
        let order: Vec<usize> = if round % 2 == 0 {
            (0..rows.len()).collect()
        } else {
            (0..rows.len()).rev().collect()
        };
        for layer in order {
            let middle = |left: &Vec<Vec<f64>>, item: Item| {
                let (l, at) = index[&item];
                left[l][at] + widths[l][at] as f64 / 2.0
            };
            let wanted: Vec<f64> = rows[layer]
                .iter()
                .enumerate()
                .map(|(at, item)| match neighbours.get(item) {
                    Some(around) if !around.is_empty() => {
                        let mean = around
                            .iter()
                            .map(|&other| middle(&left, other))
                            .sum::<f64>()
                            / around.len() as f64;
                        mean - widths[layer][at] as f64 / 2.0
                    }
                    _ => left[layer][at],
                })
                .collect();
            left[layer] = separate(&wanted, &widths[layer], width);
        }
    }
    // The drawing as a whole centred.
    let lowest = left.iter().flatten().copied().fold(f64::INFINITY, f64::min);
    let highest = left
        .iter()
        .zip(&widths)
        .flat_map(|(lefts, sizes)| lefts.iter().zip(sizes).map(|(x, size)| x + *size as f64))
        .fold(f64::NEG_INFINITY, f64::max);
    if lowest.is_finite() && highest.is_finite() {
        let shift = ((width as f64 - (highest - lowest)) / 2.0).floor() - lowest;
        left.iter_mut().flatten().for_each(|x| *x += shift);
    }
    rows.iter()
        .enumerate()
        .map(|(layer, row)| {
            let mut lefts: Vec<usize> = left[layer]
                .iter()
                .map(|x| x.round().max(0.0) as usize)
                .collect();
            // Rounding may bring two items a column too close: push right, then back inside.
            for at in 1..lefts.len() {
                lefts[at] = lefts[at].max(lefts[at - 1] + widths[layer][at - 1] + GAP);
            }
            for at in (0..lefts.len()).rev() {
                let limit = if at + 1 < lefts.len() {
                    lefts[at + 1] - GAP - widths[layer][at]
                } else {
                    width - widths[layer][at]
                };
                lefts[at] = lefts[at].min(limit);
            }
            row.iter()
                .zip(lefts)
                .zip(&widths[layer])
                .map(|((&item, x), &size)| (item, x, size))
                .collect()
        })
        .collect()
}

/// Left columns as near `wanted` as the order, the gaps and `width` allow.
fn separate(wanted: &[f64], widths: &[usize], width: usize) -> Vec<f64> {
    let mut left = wanted.to_vec();
    for at in 0..left.len() {
        let floor = if at == 0 {
            0.0
        } else {
            left[at - 1] + (widths[at - 1] + GAP) as f64
        };
        left[at] = left[at].max(floor);
    }
    for at in (0..left.len()).rev() {
        let ceiling = if at + 1 < left.len() {
            left[at + 1] - (widths[at] + GAP) as f64
        } else {
            (width - widths[at]) as f64
        };
        left[at] = left[at].min(ceiling);
    }
    left
}

/// Columns an item takes: a box with brackets, or one for a pass point.
fn item_width(item: Item, names: &HashMap<usize, String>) -> usize {
    match item {
        // `[`, a state marker, the label, `]`.
        Item::Node(node) => names[&node].chars().count() + 3,
        Item::Pass(..) => 1,
    }
}

fn row_width(row: &[Item], names: &HashMap<usize, String>) -> usize {
    let items: usize = row.iter().map(|&item| item_width(item, names)).sum();
    items + GAP * row.len().saturating_sub(1)
}

/// Orders each layer to reduce crossings: barycentre sweeps down and up,
/// keeping the order with the fewest crossings.
fn order_layers(rows: &mut [Vec<Item>], chains: &[Vec<Item>]) {
    // Neighbours between consecutive layers, from the chains.
    let mut links: Vec<(Item, Item)> = Vec::new();
    for chain in chains {
        for pair in chain.windows(2) {
            links.push((pair[0], pair[1]));
        }
    }
    let crossings = |rows: &[Vec<Item>]| -> usize {
        let position: HashMap<(usize, Item), usize> = rows
            .iter()
            .enumerate()
            .flat_map(|(layer, row)| {
                row.iter()
                    .enumerate()
                    .map(move |(at, &item)| ((layer, item), at))
            })
            .collect();
        let layer_of: HashMap<Item, usize> = rows
            .iter()
            .enumerate()
            .flat_map(|(layer, row)| row.iter().map(move |&item| (item, layer)))
            .collect();
        let segments: Vec<(usize, usize, usize)> = links
            .iter()
            .map(|&(upper, lower)| {
                let layer = layer_of[&upper];
                (
                    layer,
                    position[&(layer, upper)],
                    position[&(layer + 1, lower)],
                )
            })
            .collect();
        let mut count = 0;
        for (at, a) in segments.iter().enumerate() {
            for b in &segments[at + 1..] {
                if a.0 == b.0 && (a.1 < b.1 && a.2 > b.2 || a.1 > b.1 && a.2 < b.2) {
                    count += 1;
                }
            }
        }
        count
    };
    let mut best = rows.to_vec();
    let mut fewest = crossings(rows);
    for _ in 0..4 {
        for downward in [true, false] {
            let order: Vec<usize> = if downward {
                (1..rows.len()).collect()
            } else {
                (0..rows.len().saturating_sub(1)).rev().collect()
            };
            for layer in order {
                let neighbour = if downward { layer - 1 } else { layer + 1 };
                let position: HashMap<Item, usize> = rows[neighbour]
                    .iter()
                    .enumerate()
                    .map(|(at, &item)| (item, at))
                    .collect();
                let mut keyed: Vec<(f64, usize, Item)> = rows[layer]
                    .iter()
                    .enumerate()
                    .map(|(at, &item)| {
                        let around: Vec<usize> = links
                            .iter()
                            .filter_map(|&(upper, lower)| {
                                if downward && lower == item {
                                    position.get(&upper).copied()
                                } else if !downward && upper == item {
                                    position.get(&lower).copied()
                                } else {
                                    None
                                }
                            })
                            .collect();
                        let centre = if around.is_empty() {
                            at as f64
                        } else {
                            around.iter().sum::<usize>() as f64 / around.len() as f64
                        };
                        (centre, at, item)
                    })
                    .collect();
                keyed.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)));
                rows[layer] = keyed.into_iter().map(|(_, _, item)| item).collect();
            }
            let count = crossings(rows);
            if count < fewest {
                fewest = count;
                best = rows.to_vec();
            }
        }
    }
    rows.clone_from_slice(&best);
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::trace::validate;

    /// Every box's label is unique, and every arrow runs from just below its
    /// consumer's box, cell by neighbouring cell, to just above its input's box.
    #[track_caller]
    fn check(trace: &Trace, drawing: &Drawing) {
        let mut labels: Vec<&String> = drawing.boxes.iter().map(|b| &b.label).collect();
        let count = labels.len();
        labels.sort();
        labels.dedup();
        assert_eq!(labels.len(), count, "labels repeat: {:?}", drawing.rows());
        let box_of = |node: usize| {
            drawing
                .boxes
                .iter()
                .find(|b| b.node == node)
                .unwrap_or_else(|| panic!("{} is not drawn", trace.node(node).id))
        };
        for arrow in &drawing.arrows {
            let (consumer, input) = (box_of(arrow.consumer), box_of(arrow.input));
            let &(fx, fy) = arrow.path.first().expect("a path");
            assert_eq!(fy, consumer.y + 1, "starts below its consumer");
            assert!((consumer.x..consumer.x + consumer.width).contains(&fx));
            let &(hx, hy) = arrow.path.last().unwrap();
            assert_eq!(hy + 1, input.y, "its head sits above its input");
            assert!((input.x..input.x + input.width).contains(&hx));
            for pair in arrow.path.windows(2) {
                let (a, b) = (pair[0], pair[1]);
                assert_eq!(a.0.abs_diff(b.0) + a.1.abs_diff(b.1), 1, "{:?}", arrow.path);
            }
        }
        // Each arrow has a head of its own.
        let mut heads: Vec<(usize, usize)> = drawing
            .arrows
            .iter()
            .map(|arrow| *arrow.path.last().unwrap())
            .collect();
        heads.sort_unstable();
        heads.dedup();
        assert_eq!(
            heads.len(),
            drawing.arrows.len(),
            "{}",
            drawing.rows().join("\n")
        );
        // Every arrowhead drawn is one of the arrows, above a box.
        let rows = drawing.rows();
        for (y, row) in rows.iter().enumerate() {
            for (x, c) in row.chars().enumerate() {
                if c == '▼' {
                    assert!(
                        drawing
                            .arrows
                            .iter()
                            .any(|a| a.path.last() == Some(&(x, y)))
                    );
                    assert!(rows[y + 1].chars().nth(x).is_some_and(|below| below != ' '));
                }
            }
        }
    }

    #[test]
    fn the_teaching_graph_drawn_whole_has_unique_boxes_and_joined_arrows() {
        let trace = validate(crate::demos::teaching()).unwrap();
        let demand = trace.find("demand").unwrap();
        let drawing = Drawing::of(&trace, demand, 120, 60, &|_, _| None).unwrap();
        assert_eq!(drawing.extent, Extent::Whole);
        assert_eq!(drawing.boxes.len(), trace.nodes().len());
        check(&trace, &drawing);
        // The output sits on top, alone.
        let top = drawing.boxes.iter().filter(|b| b.y == 0).count();
        assert_eq!(top, 1);
        assert_eq!(
            drawing.boxes.iter().find(|b| b.y == 0).unwrap().node,
            trace.output()
        );
        // Edges: one arrow per consumer-input pair (demand_sq uses demand twice: one arrow, two slots).
        let pairs: HashSet<(usize, usize)> = trace
            .nodes()
            .iter()
            .enumerate()
            .flat_map(|(consumer, node)| node.inputs.iter().map(move |&input| (consumer, input)))
            .collect();
        assert_eq!(drawing.arrows.len(), pairs.len());
    }

    #[test]
    fn a_big_trace_draws_the_neighbourhood_and_counts_the_rest() {
        let mut tape = crate::record::Tape::new("chain", crate::dtype::Dtype::F64);
        let mut x = tape.param("a_rather_long_parameter_name", 0.5);
        for _ in 0..500 {
            x = tape.sin(x);
        }
        let trace = validate(tape.finish(x)).unwrap();
        let middle = 250;
        let drawing =
            Drawing::of(&trace, middle, 60, 30, &|_, _| Some("×0.9".to_string())).unwrap();
        assert!(matches!(drawing.extent, Extent::Around(_)));
        assert_eq!(drawing.hidden + drawing.boxes.len(), trace.nodes().len());
        assert!(drawing.boxes.iter().any(|b| b.node == middle));
        check(&trace, &drawing);
        assert!(!drawing.labels.is_empty(), "labels beside the arrowheads");
    }

    #[test]
    fn shortened_ids_stay_unique() {
        let mut tape = crate::record::Tape::new("ids", crate::dtype::Dtype::F64);
        let a = tape.param("encoder.layer.weight_first", 1.0);
        let b = tape.param("encoder.layer.weight_second", 2.0);
        let c = tape.param("encoder.layer.bias_first", 3.0);
        let ab = tape.mul(a, b);
        let y = tape.add(ab, c);
        let trace = validate(tape.finish(y)).unwrap();
        let all: Vec<usize> = (0..trace.nodes().len()).collect();
        for longest in [6, 10, 16] {
            let made = labels(&trace, &all, longest);
            let distinct: HashSet<&String> = made.values().collect();
            assert_eq!(distinct.len(), all.len(), "{made:?}");
            assert!(
                made.values()
                    .all(|label| label.chars().count() <= longest.max(4) || label.starts_with('#'))
            );
        }
        let drawing = Drawing::of(&trace, 0, 44, 20, &|_, _| None).unwrap();
        check(&trace, &drawing);
    }
}
