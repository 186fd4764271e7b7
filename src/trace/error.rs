//! Errors of reading and validating a trace: every problem one line, naming
//! the file, the place and what to do.

use std::fmt;
use std::path::PathBuf;

/// One thing wrong with a trace.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Problem {
    /// The node at fault, if the problem belongs to one.
    pub node: Option<String>,
    /// The place of that node in the file's list of nodes (0-based), which
    /// tells duplicates apart; the validator sets it for every node problem.
    pub index: Option<usize>,
    /// A short name of the kind of problem (`duplicate id`), used to count
    /// the problems beyond those reported in full; empty when not named.
    pub kind: &'static str,
    /// 1-based line and column in the file, where known.
    pub position: Option<(usize, usize)>,
    /// What is wrong.
    pub message: String,
    /// What to do about it.
    pub hint: String,
}

impl Problem {
    /// A problem of the trace as a whole.
    pub fn general(message: impl Into<String>, hint: impl Into<String>) -> Problem {
        Problem {
            node: None,
            index: None,
            kind: "",
            position: None,
            message: message.into(),
            hint: hint.into(),
        }
    }

    /// A problem of one node.
    pub fn at_node(node: &str, message: impl Into<String>, hint: impl Into<String>) -> Problem {
        Problem {
            node: Some(node.to_string()),
            index: None,
            kind: "",
            position: None,
            message: message.into(),
            hint: hint.into(),
        }
    }

    /// Names the kind of problem.
    pub fn kind(mut self, kind: &'static str) -> Problem {
        self.kind = kind;
        self
    }

    /// Sets the place of the node in the file's list of nodes.
    pub fn at(mut self, index: usize) -> Problem {
        self.index = Some(index);
        self
    }
}

/// `text` with every control character written as an escape (`\n`,
/// `\u{1b}`), so that text from a file (an id, a key the parser quotes)
/// can neither break an error across lines nor send escape sequences to the
/// terminal.
pub fn one_line(text: &str) -> std::borrow::Cow<'_, str> {
    if !text.chars().any(char::is_control) {
        return std::borrow::Cow::Borrowed(text);
    }
    let mut out = String::with_capacity(text.len() + 8);
    for c in text.chars() {
        match c {
            '\n' => out.push_str("\\n"),
            '\r' => out.push_str("\\r"),
            '\t' => out.push_str("\\t"),
            c if c.is_control() => out.push_str(&format!("\\u{{{:x}}}", c as u32)),
            c => out.push(c),
        }
    }
    std::borrow::Cow::Owned(out)
}

/// How many problems an invalid trace reports in full; the rest are counted
/// by kind, so a file with a million bad nodes still gets a short message.
pub const PROBLEMS_SHOWN: usize = 20;

impl fmt::Display for Problem {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        if let Some((line, column)) = self.position {
            write!(f, "{line}:{column}: ")?;
        }
        if let Some(node) = &self.node {
            write!(f, "node '{node}': ")?;
        }
        write!(f, "{}", self.message)?;
        if !self.hint.is_empty() {
            write!(f, " (hint: {})", self.hint)?;
        }
        Ok(())
    }
}

/// Why a trace could not be loaded.
#[derive(Debug, thiserror::Error)]
pub enum LoadError {
    /// The file could not be read.
    #[error("{}: cannot read the trace: {error} (hint: {})", path.display(), read_hint(error))]
    Io {
        /// The file.
        path: PathBuf,
        /// The I/O error (in the message, not as a source, so it is printed once).
        error: std::io::Error,
    },
    /// The file is not text: it holds a NUL byte or bytes that are not
    /// UTF-8 (a binary file, or the wrong file).
    #[error("{}:{line}:{column}: not a text trace: {what} at byte {byte} (hint: a trace is RON or JSON text, or a .tape header beside its sidecar; see traces/FORMAT.md)", path.display())]
    NotText {
        /// The file.
        path: PathBuf,
        /// 1-based line of the first offending byte.
        line: usize,
        /// 1-based column (in characters) of the first offending byte.
        column: usize,
        /// 0-based byte offset of the first offending byte.
        byte: u64,
        /// What was found there.
        what: String,
    },
    /// The file is longer than a text trace may be, or never ends (a
    /// device or a pipe that keeps writing).
    #[error("{}: the trace is longer than {} bytes, the most Ebb reads as text (hint: is this the right file? store big tensors in a safetensors sidecar, see traces/FORMAT.md)", path.display(), limit)]
    TooLong {
        /// The file.
        path: PathBuf,
        /// The limit in bytes.
        limit: u64,
    },
    /// The text is not valid RON or JSON of the trace schema.
    #[error("{}:{line}:{column}: {message} (hint: see traces/FORMAT.md for the schema)", path.display())]
    Syntax {
        /// The file.
        path: PathBuf,
        /// 1-based line.
        line: usize,
        /// 1-based column.
        column: usize,
        /// The parser's message.
        message: String,
    },
    /// A trace whose safetensors sidecar is missing, damaged, or does not
    /// match the references in its header.
    #[error("{}: {}{message} (hint: {hint})", path.display(), node.as_ref().map(|node| format!("node '{node}': ")).unwrap_or_default())]
    Sidecar {
        /// The header file.
        path: PathBuf,
        /// The node whose data reference is at fault, if one is.
        node: Option<String>,
        /// What is wrong.
        message: String,
        /// What to do.
        hint: String,
    },
    /// The file parsed but describes an invalid trace.
    #[error("{}", render_problems(path, problems))]
    Invalid {
        /// The file.
        path: PathBuf,
        /// Every problem found, in file order.
        problems: Vec<Problem>,
    },
}

/// What to do about a failed read, by its kind.
fn read_hint(error: &std::io::Error) -> &'static str {
    match error.kind() {
        std::io::ErrorKind::NotFound | std::io::ErrorKind::PermissionDenied => {
            "check the path and permissions"
        }
        std::io::ErrorKind::IsADirectory => "give the path of a trace file, not of a directory",
        _ => "check that the file is a readable trace and try again",
    }
}

impl LoadError {
    /// The problems of an invalid trace (empty for other errors).
    pub fn problems(&self) -> &[Problem] {
        match self {
            LoadError::Invalid { problems, .. } => problems,
            _ => &[],
        }
    }
}

/// The first [`PROBLEMS_SHOWN`] problems one a line, then one line counting
/// the rest by kind.
fn render_problems(path: &std::path::Path, problems: &[Problem]) -> String {
    let mut lines: Vec<String> = problems
        .iter()
        .take(PROBLEMS_SHOWN)
        .map(|problem| match problem.position {
            Some(_) => format!("{}:{}", path.display(), one_line(&problem.to_string())),
            None => format!("{}: {}", path.display(), one_line(&problem.to_string())),
        })
        .collect();
    let rest = &problems[problems.len().min(PROBLEMS_SHOWN)..];
    if !rest.is_empty() {
        lines.push(format!(
            "{}: and {} more {}: {} (hint: fix the problems above and check again; `ebb` reports the first {PROBLEMS_SHOWN} in full)",
            path.display(),
            rest.len(),
            if rest.len() == 1 { "problem" } else { "problems" },
            count_kinds(rest)
        ));
    }
    lines.join("\n")
}

/// `99980 duplicate id, 20 unknown input id`: counts by kind, most frequent
/// first (ties in order of first appearance).
fn count_kinds(problems: &[Problem]) -> String {
    let mut counts: Vec<(&str, usize)> = Vec::new();
    let mut slots = std::collections::HashMap::new();
    for problem in problems {
        let kind = if problem.kind.is_empty() {
            "other"
        } else {
            problem.kind
        };
        let slot = *slots.entry(kind).or_insert_with(|| {
            counts.push((kind, 0));
            counts.len() - 1
        });
        counts[slot].1 += 1;
    }
    counts.sort_by_key(|&(_, count)| std::cmp::Reverse(count));
    let parts: Vec<String> = counts
        .iter()
        .map(|(kind, count)| format!("{count} {kind}"))
        .collect();
    parts.join(", ")
}

/// Why a trace could not be written.
#[derive(Debug, thiserror::Error)]
pub enum SaveError {
    /// Writing, flushing or renaming failed; the target is left as it was.
    #[error("{}: cannot write the trace: {error} (hint: check the directory exists and is writable)", path.display())]
    Io {
        /// The file being written.
        path: PathBuf,
        /// The I/O error (in the message, not as a source, so it is printed once).
        error: std::io::Error,
    },
    /// The extension names no trace format.
    #[error("{}: unknown trace extension (hint: use .ron or .json for text, .tape for a trace with a safetensors sidecar)", path.display())]
    UnknownExtension {
        /// The path given.
        path: PathBuf,
    },
    /// The trace to write still refers to a sidecar instead of holding its data.
    #[error("{}: node '{node}' refers to a sidecar; read the trace with its data inline before writing it", path.display())]
    NotInline {
        /// The file being written.
        path: PathBuf,
        /// The first node whose value is a sidecar reference.
        node: String,
    },
}
