//! Every parameter's gradient in full: `ebb gradients`, as JSON (each number
//! in the shortest form that reads back to the same bits) or as a
//! safetensors file (each tensor in its parameter's dtype), so a test or a
//! user can compare element by element with another framework's gradients.

use crate::dtype::Dtype;
use crate::sweep::Sweep;
use crate::trace::sidecar::Outgoing;
use crate::trace::{Num, Trace};
use serde::Serialize;
use std::collections::HashMap;
use std::path::{Path, PathBuf};

/// Why the gradients could not be written.
#[derive(Debug, thiserror::Error)]
pub enum GradientsError {
    /// Writing or renaming failed; nothing was left half-written.
    #[error("{}: cannot write the gradients: {error} (hint: check the directory exists and is writable)", path.display())]
    Io {
        /// The file being written.
        path: PathBuf,
        /// The I/O error.
        error: std::io::Error,
    },
    /// Two parameters share an id, which safetensors cannot hold.
    #[error("{}: two parameters are called '{id}' (hint: give each parameter its own id)", path.display())]
    Duplicate {
        /// The file being written.
        path: PathBuf,
        /// The id.
        id: String,
    },
}

/// One parameter's gradient.
#[derive(Debug, Clone, Serialize)]
pub struct ParamGradient {
    /// Node id.
    pub id: String,
    /// Group.
    pub group: String,
    /// The dtype it is held in (the parameter's).
    pub dtype: Dtype,
    /// Shape.
    pub shape: Vec<usize>,
    /// False when the parameter does not reach the output: its gradient is 0.
    pub reaches_output: bool,
    /// Every element, row-major, in full precision.
    pub data: Vec<Num>,
}

/// Every parameter's gradient after a full sweep.
#[derive(Debug, Clone, Serialize)]
pub struct Gradients {
    /// Schema version of this file (1).
    pub gradients: u32,
    /// The trace, as given.
    pub trace: String,
    /// Its title.
    pub title: String,
    /// Its dtype.
    pub dtype: Dtype,
    /// One entry per parameter, in recording order.
    pub params: Vec<ParamGradient>,
}

impl Gradients {
    /// The gradients of `sweep`, which must have run to the end.
    pub fn new(path: &str, sweep: &Sweep) -> Gradients {
        let trace: &Trace = sweep.trace();
        let params = trace
            .params()
            .map(|param| {
                let node = trace.node(param);
                let adjoint = sweep.adjoint(param);
                let data = match &adjoint {
                    Some(adjoint) => adjoint.to_f64().iter().map(|&x| Num(x)).collect(),
                    None => vec![Num(0.0); node.value.len()],
                };
                ParamGradient {
                    id: node.id.clone(),
                    group: node.group.clone(),
                    dtype: trace.node_dtype(param),
                    shape: node.value.shape().to_vec(),
                    reaches_output: adjoint.is_some(),
                    data,
                }
            })
            .collect();
        Gradients {
            gradients: 1,
            trace: path.to_string(),
            title: trace.title().to_string(),
            dtype: trace.dtype(),
            params,
        }
    }

    /// Pretty JSON.
    pub fn to_json(&self) -> String {
        serde_json::to_string_pretty(self).expect("gradients always serialise")
    }

    /// Writes the JSON to `path` through a temporary file.
    pub fn write_json(&self, path: &Path) -> Result<(), GradientsError> {
        let text = self.to_json() + "\n";
        crate::trace::store::write_atomically(path, |out| out.write_all(text.as_bytes()))
            .map_err(|error| io_error(path, error))
    }

    /// Writes a safetensors file: one tensor per parameter, named by its id,
    /// in its dtype; metadata `format` (`ebb-gradients`), `trace`, `title`
    /// and `unreached` (the ids of parameters that do not reach the output,
    /// comma-separated). Written to a temporary file, then renamed.
    pub fn write_safetensors(&self, path: &Path) -> Result<(), GradientsError> {
        let mut seen = std::collections::HashSet::new();
        if let Some(twice) = self.params.iter().find(|p| !seen.insert(&p.id)) {
            return Err(GradientsError::Duplicate {
                path: path.to_path_buf(),
                id: twice.id.clone(),
            });
        }
        let tensors: Vec<(String, Outgoing)> = self
            .params
            .iter()
            .map(|param| {
                let data: Vec<f64> = param.data.iter().map(|x| x.0).collect();
                let tensor = Outgoing::new(param.dtype, param.shape.clone(), &data);
                (param.id.clone(), tensor)
            })
            .collect();
        let unreached: Vec<&str> = self
            .params
            .iter()
            .filter(|p| !p.reaches_output)
            .map(|p| p.id.as_str())
            .collect();
        let metadata: HashMap<String, String> = [
            ("format".to_string(), "ebb-gradients".to_string()),
            ("trace".to_string(), self.trace.clone()),
            ("title".to_string(), self.title.clone()),
            ("unreached".to_string(), unreached.join(",")),
        ]
        .into_iter()
        .collect();
        let io = |error| io_error(path, error);
        let staged = crate::trace::store::stage_path(path, |temp| {
            let views = tensors.iter().map(|(name, tensor)| (name.as_str(), tensor));
            safetensors::serialize_to_file(views, Some(metadata), temp)
                .map_err(std::io::Error::other)
        })
        .map_err(io)?;
        crate::trace::store::commit(staged, path).map_err(io)
    }
}

/// A save error as a gradients error for `path`.
fn io_error(path: &Path, error: crate::trace::SaveError) -> GradientsError {
    match error {
        crate::trace::SaveError::Io { error, .. } => GradientsError::Io {
            path: path.to_path_buf(),
            error,
        },
        other => GradientsError::Io {
            path: path.to_path_buf(),
            error: std::io::Error::other(other.to_string()),
        },
    }
}
