//! The safetensors sidecar: a trace's tensors in a safetensors file beside
//! it, memory-mapped, each used in place in its own dtype.
//!
//! The `safetensors` crate checks the file before anything is read: the
//! header's length, its JSON, every entry's dtype, shape and byte range
//! against each other and against the file's exact length. Ebb then checks
//! each reference against its node: the entry exists, its dtype is the
//! node's, its shape is the declared one. A lying header can neither read
//! outside the file nor make Ebb allocate more than the file holds.

use super::error::{LoadError, SaveError};
use super::schema::{NodeFile, TraceFile, ValueRepr};
use super::store;
use crate::dtype::Dtype;
use crate::format::shape as show;
use crate::tensor::{Buffer, Elements, Mapped, Value};
use memmap2::Mmap;
use safetensors::tensor::{Dtype as StDtype, SafeTensors, View};
use std::borrow::Cow;
use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::Arc;

/// The sidecar a `.tape` trace at `path` is written with: the same name with
/// extension `.safetensors`.
pub fn sidecar_path(path: &Path) -> PathBuf {
    path.with_extension("safetensors")
}

/// The sidecar named in a trace's header, resolved beside the trace, or why
/// the name is not acceptable (directories are refused: a trace's sidecar
/// lives beside it).
pub fn resolve_name(trace: &Path, name: &str) -> Result<PathBuf, String> {
    let plain =
        Path::new(name).file_name().is_some_and(|file| file == name) && name != ".." && name != ".";
    if !plain {
        return Err(format!("sidecar name `{name}` is not a plain file name"));
    }
    Ok(trace.parent().unwrap_or(Path::new("")).join(name))
}

/// One checked entry of the sidecar.
struct Entry {
    dtype: StDtype,
    shape: Vec<usize>,
    /// Byte range within the mapping.
    start: usize,
    end: usize,
}

/// An opened, checked sidecar.
pub(crate) struct Sidecar {
    map: Arc<Mmap>,
    entries: HashMap<String, Entry>,
    /// The file name, for messages.
    name: String,
}

/// A problem of one sidecar reference, before the node is known.
pub(crate) type RefError = String;

impl Sidecar {
    /// Opens, maps and checks the sidecar `name` of the trace at `trace`.
    pub(crate) fn open(trace: &Path, name: &str) -> Result<Sidecar, LoadError> {
        let fail = |message: String, hint: &str| LoadError::Sidecar {
            path: trace.to_path_buf(),
            node: None,
            message,
            hint: hint.to_string(),
        };
        let path = resolve_name(trace, name).map_err(|message| {
            fail(
                message,
                "a sidecar lives beside its trace; name it without directories",
            )
        })?;
        // Links, special files and holes are refused; small files copied,
        // big ones mapped and watched for change (see `sidecar_file`).
        let map = super::sidecar_file::open(trace, &path)?;
        let parsed = SafeTensors::deserialize(&map).map_err(|error| {
            fail(
                format!("{name} is not a valid safetensors file: {error}"),
                "the sidecar is damaged or not the one written with this trace; regenerate both",
            )
        })?;
        let base = map.as_ptr() as usize;
        let entries = parsed
            .iter()
            .map(|(tensor, view)| {
                let start = view.data().as_ptr() as usize - base;
                let entry = Entry {
                    dtype: view.dtype(),
                    shape: view.shape().to_vec(),
                    start,
                    end: start + view.data().len(),
                };
                (tensor.to_string(), entry)
            })
            .collect();
        Ok(Sidecar {
            map,
            entries,
            name: name.to_string(),
        })
    }

    /// The tensor `tensor` as a value of `dtype`, checked against the
    /// declared shape when one is given.
    pub(crate) fn value(
        &self,
        tensor: &str,
        shape: Option<&[usize]>,
        dtype: Dtype,
    ) -> Result<Value, RefError> {
        let entry = self
            .entries
            .get(tensor)
            .ok_or_else(|| format!("tensor '{tensor}' is not in the sidecar {}", self.name))?;
        if let Some(shape) = shape
            && shape != entry.shape.as_slice()
        {
            return Err(format!(
                "tensor '{tensor}' has shape {} in {} but the trace declares {}",
                show(&entry.shape),
                self.name,
                show(shape)
            ));
        }
        let bytes = &self.map[entry.start..entry.end];
        let count = entry.shape.iter().product::<usize>();
        let stored = float_dtype(entry.dtype);
        if let Some(stored) = stored {
            if stored != dtype {
                return Err(format!(
                    "tensor '{tensor}' is stored as {} but the node's dtype is {dtype}",
                    stored.name()
                ));
            }
            if entry.shape.is_empty() {
                return Ok(Value::Scalar(decode_float(bytes, stored)[0]));
            }
            let mapped = Mapped::new(Arc::clone(&self.map), entry.start, count, stored);
            return Ok(match mapped {
                Some(mapped) => Value::from_mapped(entry.shape.clone(), mapped),
                // Misaligned (another writer's layout): copied once, still in its dtype.
                None => Value::from_buffer(
                    entry.shape.clone(),
                    Buffer::from_vec(dtype, decode_float(bytes, stored)),
                ),
            });
        }
        let integers = decode_integers(bytes, entry.dtype).ok_or_else(|| {
            format!(
                "tensor '{tensor}' has dtype {:?}, which Ebb does not read (F64, F32, F16, BF16, or integers and BOOL for indices and masks)",
                entry.dtype
            )
        })?;
        let exact = 1i64 << dtype.limits().precision;
        if let Some((index, bad)) = integers
            .iter()
            .enumerate()
            .find(|(_, x)| x.unsigned_abs() > exact as u64)
        {
            return Err(format!(
                "tensor '{tensor}' element {index} is {bad}, which a {dtype} value cannot hold exactly"
            ));
        }
        let data: Vec<f64> = integers.iter().map(|&x| x as f64).collect();
        Ok(Value::from_parts_in(dtype, entry.shape.clone(), data))
    }
}

/// The Ebb dtype of a floating-point safetensors dtype.
fn float_dtype(dtype: StDtype) -> Option<Dtype> {
    match dtype {
        StDtype::F64 => Some(Dtype::F64),
        StDtype::F32 => Some(Dtype::F32),
        StDtype::F16 => Some(Dtype::F16),
        StDtype::BF16 => Some(Dtype::Bf16),
        _ => None,
    }
}

fn st_dtype(dtype: Dtype) -> StDtype {
    match dtype {
        Dtype::F64 => StDtype::F64,
        Dtype::F32 => StDtype::F32,
        Dtype::F16 => StDtype::F16,
        Dtype::Bf16 => StDtype::BF16,
    }
}

/// Little-endian floats widened.
fn decode_float(bytes: &[u8], dtype: Dtype) -> Vec<f64> {
    let width = dtype.width();
    bytes
        .chunks_exact(width)
        .map(|chunk| match dtype {
            Dtype::F64 => f64::from_le_bytes(chunk.try_into().expect("8 bytes")),
            Dtype::F32 => f32::from_le_bytes(chunk.try_into().expect("4 bytes")) as f64,
            Dtype::F16 => half::f16::from_le_bytes(chunk.try_into().expect("2 bytes")).to_f64(),
            Dtype::Bf16 => half::bf16::from_le_bytes(chunk.try_into().expect("2 bytes")).to_f64(),
        })
        .collect()
}

/// Little-endian integers (and booleans as 0 and 1), or `None` for other dtypes.
fn decode_integers(bytes: &[u8], dtype: StDtype) -> Option<Vec<i64>> {
    fn each<const N: usize>(bytes: &[u8], f: impl Fn([u8; N]) -> i64) -> Vec<i64> {
        bytes
            .chunks_exact(N)
            .map(|chunk| f(chunk.try_into().expect("chunk of N bytes")))
            .collect()
    }
    Some(match dtype {
        StDtype::BOOL => bytes.iter().map(|&b| i64::from(b != 0)).collect(),
        StDtype::U8 => bytes.iter().map(|&b| i64::from(b)).collect(),
        StDtype::I8 => bytes.iter().map(|&b| i64::from(b as i8)).collect(),
        StDtype::I16 => each::<2>(bytes, |b| i64::from(i16::from_le_bytes(b))),
        StDtype::U16 => each::<2>(bytes, |b| i64::from(u16::from_le_bytes(b))),
        StDtype::I32 => each::<4>(bytes, |b| i64::from(i32::from_le_bytes(b))),
        StDtype::U32 => each::<4>(bytes, |b| i64::from(u32::from_le_bytes(b))),
        StDtype::I64 => each::<8>(bytes, i64::from_le_bytes),
        _ => return None,
    })
}

/// One tensor to write: its dtype, shape and little-endian bytes.
pub(crate) struct Outgoing {
    dtype: StDtype,
    shape: Vec<usize>,
    bytes: Vec<u8>,
}

impl Outgoing {
    /// `data` of `shape`, rounded into `dtype`, ready for a safetensors file.
    pub(crate) fn new(dtype: Dtype, shape: Vec<usize>, data: &[f64]) -> Outgoing {
        Outgoing {
            dtype: st_dtype(dtype),
            shape,
            bytes: encode(data, dtype),
        }
    }
}

impl View for &Outgoing {
    fn dtype(&self) -> StDtype {
        self.dtype
    }
    fn shape(&self) -> &[usize] {
        &self.shape
    }
    fn data(&self) -> Cow<'_, [u8]> {
        Cow::Borrowed(&self.bytes)
    }
    fn data_len(&self) -> usize {
        self.bytes.len()
    }
}

/// `data` rounded into `dtype`, as little-endian bytes.
fn encode(data: &[f64], dtype: Dtype) -> Vec<u8> {
    match Buffer::from_vec(dtype, data.to_vec()) {
        Buffer::F64(v) => v.iter().flat_map(|x| x.to_le_bytes()).collect(),
        Buffer::F32(v) => v.iter().flat_map(|x| x.to_le_bytes()).collect(),
        Buffer::F16(v) => v.iter().flat_map(|x| x.to_le_bytes()).collect(),
        Buffer::Bf16(v) => v.iter().flat_map(|x| x.to_le_bytes()).collect(),
    }
}

/// Moves every inline tensor of `file` into a sidecar: returns the trace with
/// `(tensor: "name")` references and the tensors to write. Tensors are named
/// `value/ID`, `reported/ID` and `seed`, and stored in their node's dtype.
fn split(file: &TraceFile, sidecar: &str) -> (TraceFile, Vec<(String, Outgoing)>) {
    let mut out = Vec::new();
    let mut take = |value: &ValueRepr, name: String, dtype: Dtype| -> ValueRepr {
        match value {
            ValueRepr::Tensor { shape, data } if !shape.is_empty() => {
                out.push((name.clone(), Outgoing::new(dtype, shape.clone(), data)));
                ValueRepr::Sidecar {
                    tensor: name,
                    shape: None,
                }
            }
            other => other.clone(),
        }
    };
    let nodes: Vec<NodeFile> = file
        .nodes
        .iter()
        .map(|node| {
            let dtype = node.dtype.unwrap_or(file.dtype);
            NodeFile {
                value: take(&node.value, format!("value/{}", node.id), dtype),
                reported: node
                    .reported
                    .as_ref()
                    .map(|reported| take(reported, format!("reported/{}", node.id), dtype)),
                ..node.clone()
            }
        })
        .collect();
    let output_dtype = file
        .nodes
        .iter()
        .find(|node| node.id == file.output)
        .and_then(|node| node.dtype)
        .unwrap_or(file.dtype);
    let seed = file
        .seed
        .as_ref()
        .map(|seed| take(seed, "seed".to_string(), output_dtype));
    let trace = TraceFile {
        format: file.format,
        title: file.title.clone(),
        description: file.description.clone(),
        dtype: file.dtype,
        accumulate: file.accumulate,
        sidecar: Some(sidecar.to_string()),
        output: file.output.clone(),
        seed,
        nodes,
    };
    (trace, out)
}

/// Writes `file` (tensors inline) as the header `path` (RON) and its
/// safetensors sidecar beside it. Both go to temporary files first; the
/// sidecar is renamed into place before the header.
pub(crate) fn write(file: &TraceFile, path: &Path) -> Result<(), SaveError> {
    if let Some(node) = first_in_sidecar(file) {
        return Err(SaveError::NotInline {
            path: path.to_path_buf(),
            node,
        });
    }
    let sidecar = sidecar_path(path);
    let name = sidecar
        .file_name()
        .and_then(|name| name.to_str())
        .unwrap_or("trace.safetensors")
        .to_string();
    let (header, tensors) = split(file, &name);
    let staged_sidecar = store::stage_path(&sidecar, |temp| {
        let views = tensors.iter().map(|(name, tensor)| (name.as_str(), tensor));
        safetensors::serialize_to_file(views, None, temp).map_err(std::io::Error::other)
    })?;
    let text = super::load::to_text(&header, super::load::Encoding::Ron);
    let staged_header = store::stage(path, |out| out.write_all(text.as_bytes()))?;
    store::commit(staged_sidecar, &sidecar)?;
    store::commit(staged_header, path)
}

/// The first node whose value, reported gradient or seed is a sidecar reference.
pub(crate) fn first_in_sidecar(file: &TraceFile) -> Option<String> {
    let referenced = |value: &ValueRepr| matches!(value, ValueRepr::Sidecar { .. });
    if file.seed.as_ref().is_some_and(referenced) {
        return Some(file.output.0.clone());
    }
    file.nodes
        .iter()
        .find(|node| referenced(&node.value) || node.reported.as_ref().is_some_and(referenced))
        .map(|node| node.id.0.clone())
}

/// Replaces every sidecar reference of `file` by its data inline, read from
/// the sidecar the header names beside `path`.
pub(crate) fn inline(file: &mut TraceFile, path: &Path) -> Result<(), LoadError> {
    let Some(name) = file.sidecar.take() else {
        return Ok(());
    };
    let sidecar = Sidecar::open(path, &name)?;
    let fail = |node: &str, message: String| LoadError::Sidecar {
        path: path.to_path_buf(),
        node: Some(node.to_string()),
        message,
        hint: "the trace and its sidecar no longer belong together; regenerate both".to_string(),
    };
    let inline_one = |value: &mut ValueRepr, node: &str, dtype: Dtype| -> Result<(), LoadError> {
        if let ValueRepr::Sidecar { tensor, shape } = value {
            let read = sidecar
                .value(tensor, shape.as_deref(), dtype)
                .map_err(|message| fail(node, message))?;
            *value = match read {
                Value::Scalar(x) => ValueRepr::Scalar(x),
                tensor => ValueRepr::Tensor {
                    shape: tensor.shape().to_vec(),
                    data: tensor.to_f64().into_owned(),
                },
            };
        }
        Ok(())
    };
    let default = file.dtype;
    let output = file.output.0.clone();
    let output_dtype = file
        .nodes
        .iter()
        .find(|node| node.id.0 == output)
        .and_then(|node| node.dtype)
        .unwrap_or(default);
    if let Some(seed) = &mut file.seed {
        inline_one(seed, &output, output_dtype)?;
    }
    for node in &mut file.nodes {
        let dtype = node.dtype.unwrap_or(default);
        inline_one(&mut node.value, &node.id.0, dtype)?;
        if let Some(reported) = &mut node.reported {
            inline_one(reported, &node.id.0, dtype)?;
        }
    }
    Ok(())
}

/// The elements of a value as little-endian bytes of their storage dtype
/// (for tests and tools that compare sidecars byte for byte).
pub fn storage_bytes(value: &Value) -> Vec<u8> {
    match value.elements() {
        Elements::F64(s) => s.iter().flat_map(|x| x.to_le_bytes()).collect(),
        Elements::F32(s) => s.iter().flat_map(|x| x.to_le_bytes()).collect(),
        Elements::F16(s) => s.iter().flat_map(|x| x.to_le_bytes()).collect(),
        Elements::Bf16(s) => s.iter().flat_map(|x| x.to_le_bytes()).collect(),
    }
}
