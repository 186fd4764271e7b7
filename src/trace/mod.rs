//! Traces: the file schema, loading and saving, and validation into a checked
//! [`Trace`].

pub(crate) mod compact;
mod error;
mod ids;
mod load;
mod model;
mod overflow;
mod positions;
mod progress;
mod retype;
pub mod schema;
pub mod sidecar;
mod sidecar_file;
pub(crate) mod store;
mod stream;
mod text;
mod validate;

pub(crate) use compact::{Compact, StepKind};
pub use error::{LoadError, Problem, SaveError, one_line};
pub use load::{Encoding, SyntaxError, load, load_str, load_with, parse, to_text};
pub use model::{Node, Partial, Rounding, Trace};
pub use progress::{Progress, Silent};
pub use schema::{
    FORMAT_VERSION, NodeFile, NodeId, Num, PartialRepr, READABLE_VERSIONS, TraceFile, ValueRepr,
};
pub use sidecar_file::{COPY_LIMIT, HOLE_LIMIT, check_unchanged as check_sidecars_unchanged};
pub use store::{Format, abandon_saves, read_file, read_file_from, save, save_with};
pub use text::TEXT_LIMIT;
pub use validate::validate;
