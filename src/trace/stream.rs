//! Loading trace text node by node: each node is checked into the trace
//! being built as soon as the parser has read it, and dropped, so a big
//! trace is never held twice (once as parsed file, once checked). The file
//! is read with the same parsers and the same types as [`super::parse`],
//! field by field as `TraceFile`'s derived reader would, so every syntax
//! error and its line and column are the same as a whole parse's.
//!
//! Checking a node needs the header's dtype, and the sidecar when the node
//! refers to it. Ebb writes the header before the nodes; a file that lists
//! them first (or names its sidecar after a node that needs it) has those
//! nodes held, as parsed, until the header is complete: the same result,
//! without the saving.

use super::error::LoadError;
use super::load::NO_SIDECAR;
use super::model::Trace;
use super::progress::Progress;
use super::schema::{NodeFile, NodeId, TraceFile, ValueRepr};
use super::sidecar::Sidecar;
use super::validate::{Checker, HeaderFile, validate_with};
use crate::dtype::Dtype;
use crate::tensor::Value;
use serde::Deserialize;
use serde::de::{self, DeserializeSeed, Deserializer, MapAccess, SeqAccess, Visitor};
use std::fmt;
use std::path::Path;

/// The fields of a trace file in `TraceFile`'s order: the derived reader's
/// messages list them so.
const FIELDS: &[&str] = &[
    "format",
    "title",
    "description",
    "dtype",
    "accumulate",
    "sidecar",
    "output",
    "seed",
    "nodes",
];

/// What a streamed trace file turned out to be.
pub(crate) enum Streamed {
    /// Checked node by node: the checker, the header and the sidecar.
    Checked(Box<Stream>),
    /// Written as a sequence rather than a map (a form serde allows for
    /// structs), parsed whole.
    Whole(Box<TraceFile>),
}

/// The state of a file being read: the header fields seen so far, the
/// sidecar once named, and the nodes checked or held.
pub(crate) struct Stream {
    format: Option<u32>,
    title: Option<String>,
    description: Option<String>,
    dtype: Option<Dtype>,
    accumulate: Option<Option<Dtype>>,
    sidecar: Option<Option<String>>,
    output: Option<NodeId>,
    seed: Option<Option<ValueRepr>>,
    nodes_seen: bool,
    /// The sidecar, opened when its name was read.
    opened: Option<Result<Sidecar, LoadError>>,
    checker: Option<Checker>,
    /// Nodes that arrived before what checking them needs, in file order.
    held: Vec<NodeFile>,
}

/// Where a streamed file is read from, and where it reports.
pub(crate) struct Source<'a> {
    /// The trace, whose directory holds its sidecar.
    pub path: &'a Path,
    pub progress: &'a mut dyn Progress,
}

impl Stream {
    fn new() -> Stream {
        Stream {
            format: None,
            title: None,
            description: None,
            dtype: None,
            accumulate: None,
            sidecar: None,
            output: None,
            seed: None,
            nodes_seen: false,
            opened: None,
            checker: None,
            held: Vec::new(),
        }
    }

    /// Checks `node` now if its header is known, else holds it.
    fn take(&mut self, node: NodeFile) {
        let ready = self.held.is_empty()
            && self.dtype.is_some()
            && (self.sidecar.is_some() || !needs_sidecar(&node));
        match self.dtype {
            Some(dtype) if ready => {
                let checker = self.checker.get_or_insert_with(|| Checker::new(dtype));
                checker.push(node, &|tensor, shape, dtype| {
                    resolve(&self.opened, tensor, shape, dtype)
                });
            }
            _ => self.held.push(node),
        }
    }

    /// Checks the held nodes and the header, and builds the trace: an error
    /// for a sidecar that could not be opened, else the checker's problems.
    pub(crate) fn finish(self) -> Result<Trace, Result<Vec<super::Problem>, LoadError>> {
        let Stream {
            format,
            title,
            description,
            dtype,
            accumulate,
            output,
            seed,
            opened,
            checker,
            held,
            ..
        } = self;
        if let Some(Err(error)) = opened {
            return Err(Err(error));
        }
        // A complete map has every required field (checked while reading).
        let dtype = dtype.expect("dtype was read");
        let resolver = |tensor: &str, shape: Option<&[usize]>, dtype: Dtype| {
            resolve(&opened, tensor, shape, dtype)
        };
        let mut checker = checker.unwrap_or_else(|| Checker::new(dtype));
        for node in held {
            checker.push(node, &resolver);
        }
        let header = HeaderFile {
            format: format.expect("format was read"),
            title: title.expect("title was read"),
            description: description.unwrap_or_default(),
            dtype,
            accumulate: accumulate.flatten(),
            output: output.expect("output was read").0,
            seed: seed.flatten(),
        };
        checker.finish(header, &resolver).map_err(Ok)
    }
}

/// A sidecar tensor's value, from the sidecar named so far.
fn resolve(
    opened: &Option<Result<Sidecar, LoadError>>,
    tensor: &str,
    shape: Option<&[usize]>,
    dtype: Dtype,
) -> Result<Value, String> {
    match opened {
        Some(Ok(sidecar)) => sidecar.value(tensor, shape, dtype),
        // The open's own error is what the load reports.
        Some(Err(_)) => Err("the sidecar could not be opened".to_string()),
        None => Err(NO_SIDECAR.to_string()),
    }
}

fn needs_sidecar(node: &NodeFile) -> bool {
    matches!(node.value, ValueRepr::Sidecar { .. })
        || matches!(node.reported, Some(ValueRepr::Sidecar { .. }))
}

/// Reads a trace file, checking its nodes as they come.
pub(crate) struct Seed<'a>(pub Source<'a>);

impl<'de> DeserializeSeed<'de> for Seed<'_> {
    type Value = Streamed;

    fn deserialize<D: Deserializer<'de>>(self, deserializer: D) -> Result<Streamed, D::Error> {
        deserializer.deserialize_struct("TraceFile", FIELDS, self)
    }
}

impl<'de> Visitor<'de> for Seed<'_> {
    type Value = Streamed;

    fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
        f.write_str("struct TraceFile")
    }

    fn visit_seq<A: SeqAccess<'de>>(self, seq: A) -> Result<Streamed, A::Error> {
        let file = TraceFile::deserialize(de::value::SeqAccessDeserializer::new(seq))?;
        Ok(Streamed::Whole(Box::new(file)))
    }

    fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<Streamed, A::Error> {
        let Source { path, progress } = self.0;
        let mut stream = Stream::new();
        fn once<T, E: de::Error>(slot: &Option<T>, name: &'static str) -> Result<(), E> {
            match slot {
                Some(_) => Err(E::duplicate_field(name)),
                None => Ok(()),
            }
        }
        while let Some(field) = map.next_key_seed(FieldSeed)? {
            match field {
                Field::Format => {
                    once(&stream.format, "format")?;
                    stream.format = Some(map.next_value()?);
                }
                Field::Title => {
                    once(&stream.title, "title")?;
                    stream.title = Some(map.next_value()?);
                }
                Field::Description => {
                    once(&stream.description, "description")?;
                    stream.description = Some(map.next_value()?);
                }
                Field::Dtype => {
                    once(&stream.dtype, "dtype")?;
                    stream.dtype = Some(map.next_value()?);
                }
                Field::Accumulate => {
                    once(&stream.accumulate, "accumulate")?;
                    stream.accumulate = Some(map.next_value()?);
                }
                Field::Sidecar => {
                    once(&stream.sidecar, "sidecar")?;
                    let name: Option<String> = map.next_value()?;
                    if let Some(name) = &name {
                        progress.stage("opening sidecar", None);
                        stream.opened = Some(Sidecar::open(path, name));
                        progress.stage("parsing", None);
                    }
                    stream.sidecar = Some(name);
                }
                Field::Output => {
                    once(&stream.output, "output")?;
                    stream.output = Some(map.next_value()?);
                }
                Field::Seed => {
                    once(&stream.seed, "seed")?;
                    stream.seed = Some(map.next_value()?);
                }
                Field::Nodes => {
                    if stream.nodes_seen {
                        return Err(de::Error::duplicate_field("nodes"));
                    }
                    map.next_value_seed(NodesSeed(&mut stream))?;
                    stream.nodes_seen = true;
                }
            }
        }
        // Missing fields in `TraceFile`'s order, as its derived reader checks.
        let missing = [
            ("format", stream.format.is_none()),
            ("title", stream.title.is_none()),
            ("dtype", stream.dtype.is_none()),
            ("output", stream.output.is_none()),
            ("nodes", !stream.nodes_seen),
        ];
        if let Some((name, _)) = missing.iter().find(|(_, missing)| *missing) {
            return Err(de::Error::missing_field(name));
        }
        Ok(Streamed::Checked(Box::new(stream)))
    }
}

/// The list of nodes, each handed to the stream as soon as it is read.
struct NodesSeed<'s>(&'s mut Stream);

impl<'de> DeserializeSeed<'de> for NodesSeed<'_> {
    type Value = ();

    fn deserialize<D: Deserializer<'de>>(self, deserializer: D) -> Result<(), D::Error> {
        deserializer.deserialize_seq(self)
    }
}

impl<'de> Visitor<'de> for NodesSeed<'_> {
    type Value = ();

    fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
        f.write_str("a sequence")
    }

    fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<(), A::Error> {
        while let Some(node) = seq.next_element::<NodeFile>()? {
            self.0.take(node);
        }
        Ok(())
    }
}

/// A field name of the trace file.
#[derive(Clone, Copy)]
enum Field {
    Format,
    Title,
    Description,
    Dtype,
    Accumulate,
    Sidecar,
    Output,
    Seed,
    Nodes,
}

struct FieldSeed;

impl<'de> DeserializeSeed<'de> for FieldSeed {
    type Value = Field;

    fn deserialize<D: Deserializer<'de>>(self, deserializer: D) -> Result<Field, D::Error> {
        deserializer.deserialize_identifier(self)
    }
}

impl Visitor<'_> for FieldSeed {
    type Value = Field;

    fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
        f.write_str("field identifier")
    }

    fn visit_u64<E: de::Error>(self, index: u64) -> Result<Field, E> {
        FIELDS
            .get(index as usize)
            .map(|name| field(name).expect("a field's own name"))
            .ok_or_else(|| {
                E::invalid_value(de::Unexpected::Unsigned(index), &"field index 0 <= i < 9")
            })
    }

    fn visit_str<E: de::Error>(self, name: &str) -> Result<Field, E> {
        field(name).ok_or_else(|| E::unknown_field(name, FIELDS))
    }

    fn visit_bytes<E: de::Error>(self, name: &[u8]) -> Result<Field, E> {
        let name = String::from_utf8_lossy(name);
        self.visit_str(&name)
    }
}

fn field(name: &str) -> Option<Field> {
    Some(match name {
        "format" => Field::Format,
        "title" => Field::Title,
        "description" => Field::Description,
        "dtype" => Field::Dtype,
        "accumulate" => Field::Accumulate,
        "sidecar" => Field::Sidecar,
        "output" => Field::Output,
        "seed" => Field::Seed,
        "nodes" => Field::Nodes,
        _ => return None,
    })
}

/// Checks a trace parsed whole (the sequence form) as [`super::load`] did
/// before streaming: sidecar first, then every node.
pub(crate) fn check_whole(
    file: TraceFile,
    path: &Path,
    progress: &mut dyn Progress,
) -> Result<Trace, Result<Vec<super::Problem>, LoadError>> {
    let opened = match &file.sidecar {
        Some(name) => {
            progress.stage("opening sidecar", None);
            Some(Sidecar::open(path, name).map_err(Err)?)
        }
        None => None,
    };
    progress.stage("checking", None);
    let opened = opened.map(Ok);
    validate_with(file, &|tensor, shape, dtype| {
        resolve(&opened, tensor, shape, dtype)
    })
    .map_err(Ok)
}

#[cfg(test)]
mod tests {
    use crate::trace::{Encoding, LoadError, load, load_str, parse, save};
    use std::path::Path;

    /// The loader's syntax error, as line, column and message.
    fn loaded_error(text: &str, encoding: Encoding) -> Option<(usize, usize, String)> {
        match load_str(text, encoding, Path::new("t")) {
            Err(LoadError::Syntax {
                line,
                column,
                message,
                ..
            }) => Some((line, column, message)),
            _ => None,
        }
    }

    /// Every syntax error of the node-by-node reader is the one serde's
    /// derived reader of `TraceFile` gives (`parse`), at the same line and
    /// column: the derived reader is the reference (common practice: the
    /// same grammar must give the same errors).
    #[test]
    fn syntax_errors_are_those_of_the_whole_parse() {
        let node = r#"{"id": "x", "op": "input", "value": 1.0}"#;
        let json = [
            format!(r#"{{"format": 2, "dtype": "f64", "output": "x", "nodes": [{node}]}}"#),
            format!(
                r#"{{"format": 2, "title": "a", "title": "b", "dtype": "f64", "output": "x", "nodes": [{node}]}}"#
            ),
            format!(
                r#"{{"format": 2, "title": "t", "colour": 1, "dtype": "f64", "output": "x", "nodes": [{node}]}}"#
            ),
            r#"{"format": 2, "title": "t", "dtype": "f64", "output": "x", "nodes": {}}"#.to_string(),
            format!(
                r#"{{"format": 2, "title": "t", "dtype": "f64", "output": "x", "nodes": [{node},
                {{"id": "y", "op": "neg", "inputs": ["x"], "value": [1, "two"]}}]}}"#
            ),
            format!(
                r#"{{"format": 2, "title": "t", "dtype": "f64", "output": "x", "nodes": [{node}], "nodes": []}}"#
            ),
            r#"{"format": 2, "title": "t", "dtype": "f64", "output": "x"}"#.to_string(),
            format!(
                r#"{{"format": 2, "title": "t", "dtype": "f65", "output": "x", "nodes": [{node}]}}"#
            ),
            format!(
                r#"{{"format": 2, "title": "t", "dtype": "f64", "output": "x", "nodes": [{node}]}} trailing"#
            ),
            r#"[2, "t", "", "f64"]"#.to_string(),
            format!(r#"{{"format": 2, "title": "t", "dtype": "f64", "output": "x", "nodes": [{node}"#),
            r#"{"format": 2, "title": "t", "dtype": "f64", "output": "x", "nodes": [], "seed": 1e999, "x": 1}"#
                .to_string(),
        ];
        let ron = [
            "(format: 2, dtype: f64, output: \"x\", nodes: [(id: \"x\", op: \"input\", value: 1.0)])",
            "(format: 2, title: \"t\", title: \"u\", dtype: f64, output: \"x\", nodes: [])",
            "(format: 2, title: \"t\", dtype: f64, output: \"x\", nodes: [], colour: 1)",
            "(format: 2, title: \"t\", dtype: f64, output: \"x\", nodes: [(id: \"x\", op: \"input\", value: 1.0, extra: 2)])",
            "(format: 2, title: \"t\", dtype: f64, output: \"x\", nodes: [(id: \"x\", op: \"input\", value: 1.0)]",
            "(2, \"t\")",
        ];
        let cases = json
            .iter()
            .map(|text| (text.as_str(), Encoding::Json))
            .chain(ron.iter().map(|text| (*text, Encoding::Ron)));
        for (text, encoding) in cases {
            let whole = parse(text, encoding)
                .err()
                .map(|error| (error.line, error.column, error.message));
            assert!(whole.is_some(), "not a syntax error: {text}");
            assert_eq!(loaded_error(text, encoding), whole, "{text}");
        }
    }

    /// A file may list its fields in any order: nodes before the dtype
    /// they default to, the sidecar named after the nodes that need it. The
    /// trace is the same as with the header first.
    #[test]
    fn fields_in_any_order_give_the_same_trace() {
        let node = |id: &str, op: &str, inputs: &str, value: f64| {
            format!(r#"{{"id": "{id}", "op": "{op}", "inputs": [{inputs}], "value": {value}}}"#)
        };
        let nodes = [
            node("a", "input", "", 0.1),
            node("b", "exp", r#""a""#, 0.1f64.exp()),
        ]
        .join(", ");
        let first = format!(
            r#"{{"format": 2, "title": "t", "dtype": "f32", "output": "b", "nodes": [{nodes}]}}"#
        );
        let last = format!(
            r#"{{"nodes": [{nodes}], "output": "b", "dtype": "f32", "title": "t", "format": 2}}"#
        );
        let first = load_str(&first, Encoding::Json, Path::new("t")).unwrap();
        let last = load_str(&last, Encoding::Json, Path::new("t")).unwrap();
        assert_eq!(first.nodes(), last.nodes());
        // The dtype read after the nodes still rounds them (0.1 is not an f32).
        assert_eq!(last.node(0).value.to_f64()[0], 0.1f32 as f64);
        assert_eq!(first.rounded_on_load(), last.rounded_on_load());

        // A .tape header naming its sidecar after its nodes.
        let dir = tempfile::tempdir().unwrap();
        let tape = dir.path().join("t.tape");
        save(&crate::demos::teaching(), &tape).unwrap();
        let header = std::fs::read_to_string(&tape).unwrap();
        let line = header
            .lines()
            .find(|line| line.trim_start().starts_with("sidecar:"))
            .expect("the header names its sidecar")
            .to_string();
        let end = header.rfind(')').unwrap();
        let moved = format!(
            "{}{}\n)",
            header[..end].replacen(&format!("{line}\n"), "", 1),
            line.trim()
        );
        assert_ne!(moved, header);
        let reference = load(&tape).unwrap();
        std::fs::write(&tape, &moved).unwrap();
        let reordered = load(&tape).unwrap();
        assert_eq!(reference.nodes(), reordered.nodes());
    }

    /// Problems found only at the end (inputs naming a node recorded later,
    /// unknown ids, cycles) are reported in file order, after the problems
    /// found while reading the same node.
    #[test]
    fn late_problems_keep_file_order() {
        let text = r#"{"format": 2, "title": "t", "dtype": "f64", "output": "c", "nodes": [
            {"id": "a", "op": "neg", "inputs": ["c"], "value": 1.0},
            {"id": "a", "op": "neg", "inputs": ["zz", "a"], "value": 1.0},
            {"id": "c", "op": "neg", "inputs": ["a"], "value": 1.0}
        ]}"#;
        let Err(LoadError::Invalid { problems, .. }) =
            load_str(text, Encoding::Json, Path::new("t"))
        else {
            panic!("the trace is invalid");
        };
        let said: Vec<(Option<usize>, &str)> = problems
            .iter()
            .map(|problem| (problem.index, problem.message.as_str()))
            .collect();
        assert_eq!(
            said,
            [
                (
                    Some(0),
                    "input refers forward to 'c', recorded later (node #2)"
                ),
                (Some(0), "cycle through 'a', 'c'"),
                (Some(1), "duplicate id (node #1 repeats the id of node #0)"),
                (Some(1), "unknown input id 'zz'"),
            ]
        );
    }
}
