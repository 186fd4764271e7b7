//! Errors of reading and validating a trace: every problem one line, naming
//! the file, the place and what to do.

use std::fmt;
use std::path::PathBuf;

/// One thing wrong with a trace.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Problem {
    /// The node at fault, if the problem belongs to one.
    pub node: Option<String>,
    /// Which declaration of the node's id the problem is about (0 = the
    /// first); only duplicates have more than one.
    pub occurrence: usize,
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
            occurrence: 0,
            position: None,
            message: message.into(),
            hint: hint.into(),
        }
    }

    /// A problem of one node.
    pub fn at_node(node: &str, message: impl Into<String>, hint: impl Into<String>) -> Problem {
        Problem {
            node: Some(node.to_string()),
            occurrence: 0,
            position: None,
            message: message.into(),
            hint: hint.into(),
        }
    }
}

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
    #[error("{}: cannot read the trace: {error} (hint: check the path and permissions)", path.display())]
    Io {
        /// The file.
        path: PathBuf,
        /// The I/O error (in the message, not as a source, so it is printed once).
        error: std::io::Error,
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
    /// A binary-backed trace whose sidecar is missing, truncated or does not
    /// match its header. Nothing of the sidecar was read beyond its length
    /// and preamble.
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

impl LoadError {
    /// The problems of an invalid trace (empty for other errors).
    pub fn problems(&self) -> &[Problem] {
        match self {
            LoadError::Invalid { problems, .. } => problems,
            _ => &[],
        }
    }
}

fn render_problems(path: &std::path::Path, problems: &[Problem]) -> String {
    let lines: Vec<String> = problems
        .iter()
        .map(|problem| match problem.position {
            Some(_) => format!("{}:{problem}", path.display()),
            None => format!("{}: {problem}", path.display()),
        })
        .collect();
    lines.join("\n")
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
    #[error("{}: unknown trace extension (hint: use .ron or .json for text, .tape for a binary-backed trace)", path.display())]
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
