//! Turns a parsed [`TraceFile`] into a checked [`Trace`], collecting every
//! problem instead of stopping at the first.

use super::error::Problem;
use super::ids::IdIndex;
use super::model::Rounding;
use super::model::{Node, Partial, Trace, UNREACHED};
use super::schema::{NodeFile, NodeId, PartialRepr, READABLE_VERSIONS, TraceFile, ValueRepr};
use crate::dtype::Dtype;
use crate::format::shape as show;
use crate::ops::{self, Op};
use crate::tensor::{Value, broadcast_shapes, numel};
use petgraph::graph::{DiGraph, NodeIndex};
use petgraph::visit::{Bfs, Reversed};
use std::collections::HashMap;
use std::sync::Arc;

impl TryFrom<TraceFile> for Trace {
    type Error = Vec<Problem>;

    fn try_from(file: TraceFile) -> Result<Trace, Vec<Problem>> {
        validate(file)
    }
}

/// Turns a sidecar reference (tensor name, declared shape, the node's dtype)
/// into a value. The loader supplies one backed by the mapped sidecar.
pub(crate) type Resolver<'a> = &'a dyn Fn(&str, Option<&[usize]>, Dtype) -> Result<Value, String>;

fn no_sidecar(_: &str, _: Option<&[usize]>, _: Dtype) -> Result<Value, String> {
    Err("refers to a sidecar tensor, but the trace is checked without its sidecar (load it from its file)".to_string())
}

/// Checks a parsed trace file and builds the [`Trace`]; on failure returns
/// every problem found, in file order.
pub fn validate(file: TraceFile) -> Result<Trace, Vec<Problem>> {
    validate_with(file, &no_sidecar)
}

/// [`validate`], resolving sidecar references with `resolve`.
pub(crate) fn validate_with(file: TraceFile, resolve: Resolver) -> Result<Trace, Vec<Problem>> {
    let TraceFile {
        format,
        title,
        description,
        dtype,
        accumulate,
        sidecar: _,
        output,
        seed,
        nodes,
    } = file;
    let mut checker = Checker::new(dtype);
    for node in nodes {
        checker.push(node, resolve);
    }
    let header = HeaderFile {
        format,
        title,
        description,
        dtype,
        accumulate,
        output: output.0,
        seed,
    };
    checker.finish(header, resolve)
}

/// What a trace file says besides its nodes, as written.
pub(crate) struct HeaderFile {
    pub format: u32,
    pub title: String,
    pub description: String,
    pub dtype: Dtype,
    pub accumulate: Option<Dtype>,
    pub output: String,
    pub seed: Option<ValueRepr>,
}

/// Checks a trace's nodes one at a time, in file order, so a loader can
/// hand each node over as soon as it is parsed and never hold the whole
/// parsed file (`stream`); [`validate`] hands over a parsed file's nodes
/// the same way. Every problem is collected, and the result and its
/// problems are the same whichever way the nodes arrive.
pub(crate) struct Checker {
    default_dtype: Dtype,
    problems: Vec<Problem>,
    rounded: Vec<Rounding>,
    names: Names,
    /// Each id's first node.
    index: IdIndex,
    /// Checked nodes; `None` where a node has problems.
    nodes: Vec<Option<Node>>,
    /// The ids of the nodes that are `None` (a checked node keeps its own).
    failed_ids: HashMap<usize, String>,
    /// Nodes with an input that named no earlier node when they arrived (an
    /// unknown id, or a node recorded later: only the end can tell which),
    /// with their inputs as written and the earlier ones resolved.
    waiting: Vec<Waiting>,
    /// The inputs of nodes with problems, as edges (input, node), so cycles
    /// through them can still be named; the checked nodes keep their own.
    loose_edges: Vec<(usize, usize)>,
}

/// A node whose inputs are resolved at the end.
struct Waiting {
    position: usize,
    inputs: Vec<NodeId>,
}

/// The id of the node at `position`: from the checked node, else from the
/// ids of nodes with problems.
fn id_at<'a>(
    nodes: &'a [Option<Node>],
    failed_ids: &'a HashMap<usize, String>,
    position: usize,
) -> &'a str {
    match nodes.get(position) {
        Some(Some(node)) => &node.id,
        _ => failed_ids.get(&position).map_or("", |id| id.as_str()),
    }
}

impl Checker {
    /// A checker for a trace whose header dtype is `default_dtype`.
    pub(crate) fn new(default_dtype: Dtype) -> Checker {
        Checker {
            default_dtype,
            problems: Vec::new(),
            rounded: Vec::new(),
            names: Names::default(),
            index: IdIndex::new(),
            nodes: Vec::new(),
            failed_ids: HashMap::new(),
            waiting: Vec::new(),
            loose_edges: Vec::new(),
        }
    }

    /// Checks the next node in file order.
    pub(crate) fn push(&mut self, mut raw: NodeFile, resolve: Resolver) {
        let position = self.nodes.len();
        let before = self.problems.len();
        let mut id = std::mem::take(&mut raw.id.0);
        let mut inputs = Vec::with_capacity(raw.inputs.len());
        let mut resolved = true;
        {
            let (nodes, failed_ids, current) = (&self.nodes, &self.failed_ids, id.as_str());
            let id_of = |at: usize| {
                if at == position {
                    current
                } else {
                    id_at(nodes, failed_ids, at)
                }
            };
            // One lookup per node, so a file of a million duplicates is still linear.
            if let Err(first) = self.index.insert(current, position, id_of) {
                self.problems.push(
                    Problem::at_node(
                        current,
                        format!("duplicate id (node #{position} repeats the id of node #{first})"),
                        "give every node a unique id",
                    )
                    .kind("duplicate id"),
                );
            }
            for input in &raw.inputs {
                match self.index.get(&input.0, id_of) {
                    Some(source) if source < position => inputs.push(source),
                    _ => resolved = false,
                }
            }
        }
        let checked = if resolved {
            let context = NodeContext {
                position,
                default_dtype: self.default_dtype,
                rounded: &mut self.rounded,
                names: &mut self.names,
            };
            let checked = check_node(
                raw,
                &mut id,
                &mut inputs,
                &self.nodes,
                &mut self.problems,
                resolve,
                context,
            );
            if checked.is_none() {
                self.loose_edges
                    .extend(inputs.iter().map(|&source| (source, position)));
            }
            checked
        } else {
            self.waiting.push(Waiting {
                position,
                inputs: std::mem::take(&mut raw.inputs),
            });
            None
        };
        if checked.is_none() {
            self.failed_ids.insert(position, id);
        }
        // Every problem of this node knows where the node is, for its line and column.
        for problem in &mut self.problems[before..] {
            problem.index = problem.index.or(Some(position));
        }
        self.nodes.push(checked);
    }

    /// Checks the header against the nodes and builds the trace; on failure
    /// returns every problem found, in file order.
    pub(crate) fn finish(
        self,
        header: HeaderFile,
        resolve: Resolver,
    ) -> Result<Trace, Vec<Problem>> {
        let Checker {
            problems: node_problems,
            rounded,
            index,
            nodes,
            failed_ids,
            waiting,
            loose_edges,
            ..
        } = self;
        let id_of = |at: usize| id_at(&nodes, &failed_ids, at);
        let mut problems = Vec::new();
        if !READABLE_VERSIONS.contains(&header.format) {
            problems.push(
                Problem::general(
                    format!(
                        "unsupported format version {} (this build reads versions {READABLE_VERSIONS:?})",
                        header.format
                    ),
                    "re-record the trace, or convert it with a matching release of ebb",
                )
                .kind("format version"),
            );
        }
        problems.extend(node_problems);
        let mut forward_edges = false;
        let mut late_edges = Vec::new();
        for node in &waiting {
            resolve_inputs(
                node,
                (&index, &id_of),
                &mut problems,
                &mut late_edges,
                &mut forward_edges,
            );
        }
        let output = resolve_output(&header.output, (&index, &id_of), &mut problems);
        if forward_edges {
            let mut edges = late_edges;
            edges.extend(loose_edges);
            for (position, node) in nodes.iter().enumerate() {
                if let Some(node) = node {
                    edges.extend(node.inputs.iter().map(|&source| (source, position)));
                }
            }
            report_cycles(nodes.len(), &id_of, &edges, &mut problems);
        }
        if !problems.is_empty() {
            // Problems of the trace as a whole first, then by node (stable:
            // a node's own problems keep the order they were found in).
            problems.sort_by_key(|problem| problem.index.map_or(0, |index| index + 1));
            return Err(problems);
        }
        let nodes: Vec<Node> = nodes
            .into_iter()
            .map(|node| node.expect("a node without problems is checked"))
            .collect();
        let output = output.expect("output resolved");
        let output_dtype = nodes[output].dtype;
        let seed = match header.seed {
            None => Value::filled(nodes[output].value.shape(), 1.0).stored_as(output_dtype),
            Some(raw) => match checked_value(raw, resolve, output_dtype, &mut None) {
                Ok(seed) if seed.shape() == nodes[output].value.shape() => seed,
                Ok(seed) => {
                    return Err(vec![Problem::general(
                        format!(
                            "seed has shape {} but output '{}' has shape {}",
                            show(seed.shape()),
                            nodes[output].id,
                            show(nodes[output].value.shape())
                        ),
                        "give a seed of the output's shape, or omit it for ones",
                    )]);
                }
                Err(message) => {
                    return Err(vec![Problem::general(
                        format!("seed: {message}"),
                        "fix the seed's shape or data",
                    )]);
                }
            },
        };
        Ok(build(
            Header {
                title: header.title,
                description: header.description,
                dtype: header.dtype,
                accumulate: header
                    .accumulate
                    .unwrap_or_else(|| header.dtype.default_accumulate()),
            },
            nodes,
            output,
            seed,
            index,
            rounded,
        ))
    }
}

/// Resolves the inputs of a node that had to wait for the whole file: each
/// is an unknown id, or refers forward (to a node recorded later, or to the
/// node itself), or to an earlier node after all; the edges found are kept
/// so cycles can be named.
fn resolve_inputs(
    node: &Waiting,
    (index, id_of): Ids,
    problems: &mut Vec<Problem>,
    edges: &mut Vec<(usize, usize)>,
    forward_edges: &mut bool,
) {
    let position = node.position;
    let id = id_of(position);
    for input in &node.inputs {
        let source = index.get(&input.0, id_of);
        if let Some(source) = source {
            edges.push((source, position));
        }
        match source {
            None => problems.push(
                Problem::at_node(
                    id,
                    format!("unknown input id '{input}'"),
                    "every input must be the id of a node in this trace",
                )
                .kind("unknown input id")
                .at(position),
            ),
            Some(source) if source >= position => {
                *forward_edges = true;
                let what = if source == position {
                    "itself".to_string()
                } else {
                    format!("'{input}', recorded later (node #{source})")
                };
                problems.push(
                    Problem::at_node(
                        id,
                        format!("input refers forward to {what}"),
                        "list nodes in recording order: each node after all of its inputs",
                    )
                    .kind("forward input")
                    .at(position),
                );
            }
            Some(_) => {}
        }
    }
}

/// The index of a trace's ids, and the id at each position.
type Ids<'a, 'b> = (&'a IdIndex, &'a dyn Fn(usize) -> &'b str);

fn resolve_output(id: &str, (index, id_of): Ids, problems: &mut Vec<Problem>) -> Option<usize> {
    if id.is_empty() {
        problems.push(
            Problem::general(
                "the header names no output node",
                "set `output` to the id of the loss node",
            )
            .kind("output"),
        );
        return None;
    }
    let found = index.get(id, id_of);
    if found.is_none() {
        problems.push(
            Problem::general(
                format!("output node '{id}' is not in the trace"),
                "set `output` to the id of the loss node",
            )
            .kind("output"),
        );
    }
    found
}

/// The most elements a shape read from a file may describe, counting every
/// zero dimension as one. Sizes, strides and byte offsets computed from a
/// checked shape then fit in `usize` in any order of multiplication, even
/// for an empty tensor whose other dimensions are huge.
pub const MAX_ELEMENTS: usize = isize::MAX as usize / 8;

/// The number of elements of a shape read from a file, in checked
/// arithmetic; an error when the shape exceeds [`MAX_ELEMENTS`].
pub(crate) fn checked_numel(shape: &[usize]) -> Result<usize, String> {
    let extent = shape
        .iter()
        .try_fold(1usize, |acc, &d| acc.checked_mul(d.max(1)))
        .filter(|&extent| extent <= MAX_ELEMENTS);
    match extent {
        Some(_) => Ok(shape.iter().product()),
        None => Err(format!(
            "shape {} is too large: its dimensions multiply to more than {MAX_ELEMENTS}",
            show(shape)
        )),
    }
}

/// Where a node's values were rounded into its dtype on load, if anywhere:
/// the first element that changed and how many did.
type RoundingSlot<'a> = Option<&'a mut Option<(usize, f64, f64, usize)>>;

/// A value's data must fill its shape; inline numbers are rounded into
/// `dtype` (and the first one that changed is noted in `rounding`). Takes the
/// data by value so that a big trace is not held twice while it is checked.
fn checked_value(
    raw: ValueRepr,
    resolve: Resolver,
    dtype: Dtype,
    rounding: &mut RoundingSlot,
) -> Result<Value, String> {
    let mut note = |data: &[f64]| {
        let Some(slot) = rounding.as_deref_mut() else {
            return;
        };
        for (index, &x) in data.iter().enumerate() {
            let stored = dtype.round(x);
            if stored.to_bits() != x.to_bits() && !x.is_nan() {
                match slot {
                    Some((_, _, _, count)) => *count += 1,
                    None => *slot = Some((index, x, stored, 1)),
                }
            }
        }
    };
    match raw {
        ValueRepr::Scalar(x) => {
            note(std::slice::from_ref(&x));
            Ok(Value::Scalar(dtype.round(x)))
        }
        ValueRepr::Tensor { shape, data } => {
            let expected = checked_numel(&shape)?;
            if expected == data.len() {
                note(&data);
                Ok(Value::from_parts_in(dtype, shape, data))
            } else {
                Err(format!(
                    "data has {} elements but shape {} needs {expected}",
                    data.len(),
                    show(&shape)
                ))
            }
        }
        ValueRepr::Sidecar { tensor, shape } => {
            if let Some(shape) = &shape {
                checked_numel(shape)?;
            }
            resolve(&tensor, shape.as_deref(), dtype)
        }
    }
}

/// What checking one node needs besides the node itself.
struct NodeContext<'a> {
    position: usize,
    default_dtype: Dtype,
    rounded: &'a mut Vec<Rounding>,
    names: &'a mut Names,
}

/// One shared copy of each op name and recording site: a trace repeats a
/// few of each over millions of nodes.
#[derive(Default)]
struct Names(std::collections::HashSet<Arc<str>>);

impl Names {
    fn shared(&mut self, name: String) -> Arc<str> {
        if let Some(known) = self.0.get(name.as_str()) {
            return known.clone();
        }
        let name: Arc<str> = name.into();
        self.0.insert(name.clone());
        name
    }
}

/// Checks one node whose inputs resolved; `earlier` holds the checked nodes
/// before it (`None` where those had problems). The node takes `inputs`
/// when it checks; with problems they are left for the caller.
fn check_node(
    mut raw: NodeFile,
    id_slot: &mut String,
    inputs: &mut Vec<usize>,
    earlier: &[Option<Node>],
    problems: &mut Vec<Problem>,
    resolve: Resolver,
    context: NodeContext,
) -> Option<Node> {
    let id = id_slot.as_str();
    let before = problems.len();
    let dtype = raw.dtype.unwrap_or(context.default_dtype);
    let mut first_rounded = None;
    let op = Op::from_name(&raw.op).unwrap_or(Op::Custom);
    let spec = op.spec();
    if !spec.arity.accepts(inputs.len()) && raw.inputs.len() == inputs.len() {
        let hint = if op == Op::Custom {
            "use input, param or const for a leaf"
        } else {
            "give the op its inputs in argument order"
        };
        problems.push(
            Problem::at_node(
                id,
                format!("{} takes {}, got {}", raw.op, spec.arity, inputs.len()),
                hint,
            )
            .kind("wrong number of inputs"),
        );
    }
    if op == Op::Custom {
        check_custom_partials(id, &raw, problems);
    }
    for attr in spec.required {
        if !attr.is_set(&raw.attrs) {
            problems.push(
                Problem::at_node(
                    id,
                    format!("{} needs the attribute `{}`", raw.op, attr.as_str()),
                    format!("add attrs: ({}: ..)", attr.as_str()),
                )
                .kind("missing attribute"),
            );
        }
    }
    if let Some(Err(message)) = raw.attrs.shape.as_deref().map(checked_numel) {
        problems.push(
            Problem::at_node(
                id,
                format!("attribute `shape`: {message}"),
                "give the target shape of the reshape",
            )
            .kind("bad attribute"),
        );
    }
    if raw.partials.len() > raw.inputs.len() {
        problems.push(
            Problem::at_node(
                id,
                format!(
                    "{} partials recorded for {} input edges",
                    raw.partials.len(),
                    raw.inputs.len()
                ),
                "record at most one partial per input, in input order",
            )
            .kind("too many partials"),
        );
    }
    let value = match checked_value(
        std::mem::replace(&mut raw.value, ValueRepr::Scalar(0.0)),
        resolve,
        dtype,
        &mut Some(&mut first_rounded),
    ) {
        Ok(value) => Some(value),
        Err(message) => {
            problems.push(
                Problem::at_node(
                    id,
                    format!("value: {message}"),
                    "the data length must equal the product of the shape",
                )
                .kind("bad value"),
            );
            None
        }
    };
    let reported = raw
        .reported
        .take()
        .map(|reported| checked_value(reported, resolve, dtype, &mut None))
        .transpose()
        .unwrap_or_else(|message| {
            problems.push(
                Problem::at_node(
                    id,
                    format!("reported gradient: {message}"),
                    "the data length must equal the product of the shape",
                )
                .kind("bad reported gradient"),
            );
            None
        });
    let input_values: Option<Vec<&Value>> = inputs
        .iter()
        .map(|&input| earlier[input].as_ref().map(|node| &node.value))
        .collect();
    let (Some(value), Some(input_values)) = (value, input_values) else {
        // Shapes cannot be checked against inputs that are themselves broken.
        return None;
    };
    if problems.len() > before {
        return None;
    }
    let input_shapes: Vec<&[usize]> = input_values.iter().map(|value| value.shape()).collect();
    match ops::infer_shape(op, &input_shapes, &raw.attrs) {
        Err(message) => problems.push(
            Problem::at_node(id, message, "check the shapes of the inputs against the op")
                .kind("shape"),
        ),
        Ok(Some(expected)) if expected != value.shape() => problems.push(
            Problem::at_node(
                id,
                format!(
                    "recorded value has shape {} but {} of these inputs gives {}",
                    show(value.shape()),
                    raw.op,
                    show(&expected)
                ),
                "record the value the op produced",
            )
            .kind("shape"),
        ),
        Ok(_) => {
            check_index_rounding(id, &raw, inputs, spec.discrete, context.rounded, problems);
            if let Err(misfit) = ops::check_inputs(op, &input_values, &raw.attrs) {
                problems.push(Problem::at_node(id, misfit.message, misfit.hint).kind("bad index"));
            }
        }
    }
    if let Some(reported) = &reported
        && reported.shape() != value.shape()
    {
        problems.push(
            Problem::at_node(
                id,
                format!(
                    "reported gradient has shape {} but the value has shape {}",
                    show(reported.shape()),
                    show(value.shape())
                ),
                "a gradient has the shape of its node's value",
            )
            .kind("shape"),
        );
    }
    let mut partials = Vec::with_capacity(inputs.len());
    for (slot, input_shape) in input_shapes.iter().enumerate() {
        let raw_partial = raw.partials.get(slot).unwrap_or(&PartialRepr::Absent);
        match check_partial(raw_partial, value.shape(), input_shape) {
            Ok(partial) => partials.push(partial),
            Err(message) => problems.push(
                Problem::at_node(
                    id,
                    format!(
                        "partial on edge {slot} (from '{}'): {message}",
                        raw.inputs[slot]
                    ),
                    "see traces/FORMAT.md, partials",
                )
                .kind("bad partial"),
            ),
        }
    }
    if problems.len() > before {
        return None;
    }
    // Most nodes record no partial: they keep no list (see `Node::partial`).
    if partials.iter().all(Option::is_none) {
        partials = Vec::new();
    }
    if let Some((index, written, stored, count)) = first_rounded {
        context.rounded.push(Rounding {
            node: context.position,
            index,
            written,
            stored,
            count,
        });
    }
    Some(Node {
        id: std::mem::take(id_slot),
        op,
        op_name: context.names.shared(raw.op),
        dtype,
        inputs: std::mem::take(inputs),
        group: raw.group,
        site: raw.site.map(|site| context.names.shared(site)),
        value,
        attrs: raw.attrs,
        partials,
        reported,
    })
}

/// An index tensor or condition whose numbers its dtype rounded on load no
/// longer says which element it meant (3001 in f16 is 3000): refused.
fn check_index_rounding(
    id: &str,
    raw: &NodeFile,
    inputs: &[usize],
    discrete: &[usize],
    rounded: &[Rounding],
    problems: &mut Vec<Problem>,
) {
    for &slot in discrete {
        let Some(&input) = inputs.get(slot) else {
            continue;
        };
        // Roundings are noted in recording order, so a search finds the input's.
        if let Ok(at) = rounded.binary_search_by_key(&input, |rounding| rounding.node) {
            let rounding = rounded[at];
            problems.push(
                Problem::at_node(
                    id,
                    format!(
                        "index input '{}' was rounded into its dtype on load: element {} was written {} but holds {}",
                        raw.inputs[slot], rounding.index, rounding.written, rounding.stored
                    ),
                    "give the index node a dtype that holds its whole numbers exactly (dtype: f32 or f64)",
                )
                .kind("bad index"),
            );
        }
    }
}

fn check_custom_partials(id: &str, raw: &NodeFile, problems: &mut Vec<Problem>) {
    let missing: Vec<usize> = (0..raw.inputs.len())
        .filter(|&slot| matches!(raw.partials.get(slot), None | Some(PartialRepr::Absent)))
        .collect();
    if missing.is_empty() {
        return;
    }
    let suggestion = Op::closest_name(&raw.op)
        .map(|name| format!("did you mean the catalog op '{name}'? "))
        .unwrap_or_default();
    let edges: Vec<String> = missing.iter().map(|slot| slot.to_string()).collect();
    problems.push(Problem::at_node(
        id,
        format!("'{}' is not a catalog op, so it is a custom op, and it has no recorded partial on edge {}", raw.op, edges.join(", ")),
        format!("{suggestion}a custom op must record a partial on every input edge"),
    ).kind("custom op without partials"));
}

/// Checks a recorded partial against its edge: the node's output shape and the input's shape.
fn check_partial(
    raw: &PartialRepr,
    output: &[usize],
    input: &[usize],
) -> Result<Option<Partial>, String> {
    let broadcasts = || broadcast_shapes(input, output).is_some_and(|shape| shape == output);
    match raw {
        PartialRepr::Absent => Ok(None),
        PartialRepr::Scalar(x) if broadcasts() => Ok(Some(Partial::Scalar(*x))),
        PartialRepr::Diagonal(data) if data.len() != numel(output) => Err(format!(
            "a diagonal partial needs {} entries (the output's {}), got {}",
            numel(output),
            show(output),
            data.len()
        )),
        PartialRepr::Diagonal(data) if broadcasts() => Ok(Some(Partial::Diagonal(
            Value::from_parts(output.to_vec(), data.clone()),
        ))),
        PartialRepr::Scalar(_) | PartialRepr::Diagonal(_) => Err(format!(
            "an elementwise partial needs an input that broadcasts to the output {}, but the input is {}; record a jacobian",
            show(output),
            show(input)
        )),
        PartialRepr::Jacobian(rows) => {
            let cols = numel(input);
            if rows.len() != numel(output) {
                return Err(format!(
                    "a jacobian needs {} rows (output elements), got {}",
                    numel(output),
                    rows.len()
                ));
            }
            if let Some((row, bad)) = rows.iter().enumerate().find(|(_, row)| row.len() != cols) {
                return Err(format!(
                    "jacobian row {row} has {} entries but the input has {cols} elements",
                    bad.len()
                ));
            }
            Ok(Some(Partial::Jacobian {
                rows: rows.len(),
                cols,
                data: rows.concat(),
            }))
        }
    }
}

/// Names each cycle among the edges, found as strongly connected components
/// with petgraph (Kosaraju's algorithm, iterative).
fn report_cycles<'a>(
    nodes: usize,
    id_of: &dyn Fn(usize) -> &'a str,
    edges: &[(usize, usize)],
    problems: &mut Vec<Problem>,
) {
    let mut graph = DiGraph::<(), ()>::with_capacity(nodes, edges.len());
    for _ in 0..nodes {
        graph.add_node(());
    }
    for &(source, target) in edges {
        graph.add_edge(NodeIndex::new(source), NodeIndex::new(target), ());
    }
    for component in petgraph::algo::kosaraju_scc(&graph) {
        let looped = component.len() > 1 || graph.contains_edge(component[0], component[0]);
        if !looped {
            continue;
        }
        let mut members: Vec<usize> = component.iter().map(|node| node.index()).collect();
        members.sort_unstable();
        let mut names: Vec<String> = members
            .iter()
            .take(6)
            .map(|&node| format!("'{}'", id_of(node)))
            .collect();
        if members.len() > 6 {
            names.push(format!("and {} more", members.len() - 6));
        }
        problems.push(
            Problem::at_node(
                id_of(members[0]),
                format!("cycle through {}", names.join(", ")),
                "a trace records one forward pass: no node may depend on itself",
            )
            .kind("cycle")
            .at(members[0]),
        );
    }
}

/// The header fields a checked trace keeps.
struct Header {
    title: String,
    description: String,
    dtype: Dtype,
    accumulate: Dtype,
}

fn build(
    header: Header,
    nodes: Vec<Node>,
    output: usize,
    seed: Value,
    index: IdIndex,
    rounded: Vec<Rounding>,
) -> Trace {
    let Header {
        title,
        description,
        dtype,
        accumulate,
    } = header;
    let edge_total: usize = nodes.iter().map(|node| node.inputs.len()).sum();
    let mut graph = DiGraph::<(), u32>::with_capacity(nodes.len(), edge_total);
    for _ in &nodes {
        graph.add_node(());
    }
    for (consumer, node) in nodes.iter().enumerate() {
        for (slot, &input) in node.inputs.iter().enumerate() {
            graph.add_edge(NodeIndex::new(input), NodeIndex::new(consumer), slot as u32);
        }
    }
    // Breadth-first search against the edges marks everything that reaches the output.
    let mut reaches = vec![false; nodes.len()];
    let reversed = Reversed(&graph);
    let mut search = Bfs::new(reversed, NodeIndex::new(output));
    while let Some(found) = search.next(reversed) {
        reaches[found.index()] = true;
    }
    // Inputs always precede their consumers, so reversed recording order is a
    // reverse topological order: a node comes after every consumer.
    let order: Vec<usize> = (0..nodes.len())
        .rev()
        .filter(|&node| reaches[node])
        .collect();
    let mut rank = vec![UNREACHED; nodes.len()];
    for (position, &node) in order.iter().enumerate() {
        rank[node] = position as u32;
    }
    let compact = super::compact::Compact::new(&nodes, dtype, &order);
    Trace {
        title,
        description,
        dtype,
        accumulate,
        rounded,
        subnormals: crate::dtype::Subnormals::Keep,
        nodes,
        output,
        seed,
        index: Arc::new(index),
        graph: Arc::new(graph),
        order: Arc::new(order),
        rank: Arc::new(rank),
        compact,
    }
}
