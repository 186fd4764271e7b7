//! Traces: the file schema, loading and saving, and validation into a checked
//! [`Trace`].

pub(crate) mod compact;
mod error;
mod load;
mod model;
pub mod schema;
mod validate;

pub use error::{LoadError, Problem};
pub use load::{Encoding, SyntaxError, load, load_str, parse, to_text};
pub use model::{Node, Partial, Trace};
pub use schema::{FORMAT_VERSION, NodeFile, NodeId, Num, PartialRepr, TraceFile, ValueRepr};
pub use validate::validate;
