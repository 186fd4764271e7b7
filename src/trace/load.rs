//! Reading and writing trace files: choosing the encoding, parsing RON or
//! JSON into the schema types, and attaching file positions to problems.

use super::error::{LoadError, Problem, one_line};
use super::model::Trace;
use super::overflow;
use super::positions;
use super::progress::{self, Progress, Silent};
use super::schema::TraceFile;
use super::stream::{self, Source, Streamed};
use serde::Serialize;
use serde::de::{DeserializeOwned, DeserializeSeed};
use std::marker::PhantomData;
use std::path::Path;

/// The two text encodings of the schema.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Encoding {
    /// Rusty Object Notation.
    Ron,
    /// JSON, with non-finite numbers as strings.
    Json,
}

impl Encoding {
    /// The encoding named by a path's extension, if any.
    pub fn from_path(path: &Path) -> Option<Encoding> {
        match path.extension()?.to_str()?.to_ascii_lowercase().as_str() {
            "ron" => Some(Encoding::Ron),
            "json" => Some(Encoding::Json),
            _ => None,
        }
    }

    /// Guesses from the first significant character: `{` is JSON, anything
    /// else (`(`, `#![enable(..)]`, comments) RON.
    pub fn sniff(text: &str) -> Encoding {
        match text.trim_start().chars().next() {
            Some('{') => Encoding::Json,
            _ => Encoding::Ron,
        }
    }
}

/// The RON options Ebb reads and writes with: `implicit_some`, so optional
/// fields are written bare (`seed: 2.0`, not `seed: Some(2.0)`).
fn ron_options() -> ron::Options {
    ron::Options::default().with_default_extension(ron::extensions::Extensions::IMPLICIT_SOME)
}

/// A syntax error: 1-based line and column, and the parser's message.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct SyntaxError {
    /// 1-based line.
    pub line: usize,
    /// 1-based column.
    pub column: usize,
    /// What the parser said.
    pub message: String,
}

/// Parses trace text in the given encoding into the schema types.
pub fn parse(text: &str, encoding: Encoding) -> Result<TraceFile, SyntaxError> {
    parse_as(text, encoding)
}

/// Parses any serde type with the options and error positions of [`parse`].
pub(crate) fn parse_as<T: DeserializeOwned>(
    text: &str,
    encoding: Encoding,
) -> Result<T, SyntaxError> {
    match parse_seed(text, encoding, PhantomData::<T>) {
        Err(error) if overflowed(&error, encoding) => {
            match overflow::widen_overflowing_numbers(text) {
                Some(widened) => parse_seed(&widened, encoding, PhantomData::<T>),
                None => Err(error),
            }
        }
        parsed => parsed,
    }
}

/// A JSON number too large for an f64, which JSON's parser refuses and
/// RON's reads as infinity: the text is read again with such numbers
/// written as strings, so both read it alike (`overflow`).
fn overflowed(error: &SyntaxError, encoding: Encoding) -> bool {
    encoding == Encoding::Json && error.message == "number out of range"
}

/// One parse of `text` through `seed`, with the options and error
/// positions of [`parse`] (no second reading of overflowing numbers).
fn parse_seed<'de, S: DeserializeSeed<'de>>(
    text: &'de str,
    encoding: Encoding,
    seed: S,
) -> Result<S::Value, SyntaxError> {
    match encoding {
        Encoding::Ron => ron_options()
            .from_str_seed(text, seed)
            .map_err(|error| SyntaxError {
                line: error.span.start.line,
                column: error.span.start.col,
                message: match error.code {
                    ron::Error::ExceededRecursionLimit => TOO_DEEP.to_string(),
                    code => code.to_string(),
                },
            }),
        Encoding::Json => {
            // What serde_json::from_str does, with a seed.
            let mut deserializer = serde_json::Deserializer::from_str(text);
            seed.deserialize(&mut deserializer)
                .and_then(|value| deserializer.end().map(|()| value))
                .map_err(json_error)
        }
    }
}

/// How a file nested deeper than the parsers allow is described: both stop
/// at 128 levels (serde_json always, RON by default), and a trace nests a
/// handful.
const TOO_DEEP: &str =
    "nested more than 128 levels deep, which no trace needs (a trace nests 8 levels at most)";

fn json_error(error: serde_json::Error) -> SyntaxError {
    let message = error.to_string();
    // serde_json appends " at line L column C"; the position is reported separately.
    let message = message
        .split(" at line ")
        .next()
        .unwrap_or(&message)
        .to_string();
    SyntaxError {
        line: error.line(),
        column: error.column(),
        message: if message == "recursion limit exceeded" {
            TOO_DEEP.to_string()
        } else {
            message
        },
    }
}

/// Serialises a trace file in the given encoding.
pub fn to_text(file: &TraceFile, encoding: Encoding) -> String {
    text_of(file, encoding)
}

/// Serialises any serde type the way [`to_text`] writes traces.
pub(crate) fn text_of<T: Serialize>(file: &T, encoding: Encoding) -> String {
    match encoding {
        Encoding::Ron => {
            let pretty = ron::ser::PrettyConfig::new()
                .extensions(ron::extensions::Extensions::IMPLICIT_SOME)
                .compact_arrays(true)
                .indentor("  ".to_string());
            ron_options()
                .to_string_pretty(file, pretty)
                .expect("the schema types always serialise")
        }
        Encoding::Json => {
            serde_json::to_string_pretty(file).expect("the schema types always serialise")
        }
    }
}

/// Parses and validates trace text; `path` only labels errors.
pub fn load_str(text: &str, encoding: Encoding, path: &Path) -> Result<Trace, LoadError> {
    load_str_with(text, encoding, path, &mut Silent)
}

fn load_str_with(
    text: &str,
    encoding: Encoding,
    path: &Path,
    progress: &mut dyn Progress,
) -> Result<Trace, LoadError> {
    progress.stage("parsing", None);
    let streamed =
        stream_text(text, encoding, path, progress).map_err(|error| syntax_error(path, error))?;
    let checked = match streamed {
        Streamed::Checked(stream) => {
            progress.stage("checking", None);
            stream.finish()
        }
        Streamed::Whole(file) => stream::check_whole(*file, path, progress),
    };
    checked.map_err(|failed| match failed {
        Ok(problems) => placed(text, path, problems),
        Err(error) => error,
    })
}

/// Parses `text`, checking each node as it is read (`stream`).
fn stream_text(
    text: &str,
    encoding: Encoding,
    path: &Path,
    progress: &mut dyn Progress,
) -> Result<Streamed, SyntaxError> {
    let mut once = |text: &str| {
        let source = Source {
            path,
            progress: &mut *progress,
        };
        parse_seed(text, encoding, stream::Seed(source))
    };
    match once(text) {
        Err(error) if overflowed(&error, encoding) => {
            match overflow::widen_overflowing_numbers(text) {
                Some(widened) => once(&widened),
                None => Err(error),
            }
        }
        parsed => parsed,
    }
}

pub(crate) const NO_SIDECAR: &str =
    "refers to a sidecar tensor, but the trace names no `sidecar` file in its header";

/// A syntax error of the file at `path`.
pub(crate) fn syntax_error(path: &Path, error: SyntaxError) -> LoadError {
    LoadError::Syntax {
        path: path.to_path_buf(),
        line: error.line,
        column: error.column,
        // The parser quotes the file: keep the error on one line.
        message: one_line(&error.message).into_owned(),
    }
}

/// Validation problems with the line and column of their nodes in `text`,
/// in file order (problems of the whole trace first). The text is scanned
/// once, however many problems there are.
pub(crate) fn placed(text: &str, path: &Path, mut problems: Vec<Problem>) -> LoadError {
    if problems.iter().any(|problem| problem.index.is_some()) {
        let keys = positions::id_keys(text);
        for problem in &mut problems {
            let (Some(index), Some(node)) = (problem.index, &problem.node) else {
                continue;
            };
            // The k-th key belongs to the k-th node; its written id confirms it.
            let Some(key) = keys.get(index) else { continue };
            let written = &text[key.value.0..key.value.1];
            if written == node || written.contains('\\') {
                problem.position = Some(key.place);
            }
        }
    }
    problems.sort_by_key(|problem| problem.index.map_or(0, |index| index + 1));
    LoadError::Invalid {
        path: path.to_path_buf(),
        problems,
    }
}

/// Reads, parses and validates a trace file. The encoding comes from the
/// extension, or from the content when the extension names none (a `.tape`
/// file is sniffed); tensors written `(tensor: "name")` are mapped from the
/// safetensors sidecar the header names.
pub fn load(path: &Path) -> Result<Trace, LoadError> {
    load_with(path, &mut Silent)
}

/// [`load`], reporting progress.
pub fn load_with(path: &Path, progress: &mut dyn Progress) -> Result<Trace, LoadError> {
    let text =
        progress::read_text(path, progress).map_err(|error| LoadError::reading(path, error))?;
    let encoding = Encoding::from_path(path).unwrap_or_else(|| Encoding::sniff(&text));
    let trace = load_str_with(&text, encoding, path, progress);
    progress.finish();
    trace
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn encodings_are_chosen_by_extension_then_content() {
        assert_eq!(
            Encoding::from_path(Path::new("t.JSON")),
            Some(Encoding::Json)
        );
        assert_eq!(Encoding::from_path(Path::new("t.trace")), None);
        assert_eq!(Encoding::sniff("  {\"format\": 1}"), Encoding::Json);
        assert_eq!(
            Encoding::sniff("#![enable(implicit_some)]\n("),
            Encoding::Ron
        );
    }
}
