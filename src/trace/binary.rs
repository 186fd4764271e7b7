//! Binary-backed traces: the graph in a small RON header (`NAME.tape`), the
//! tensor data in a little-endian sidecar (`NAME.bin`) that is memory-mapped.
//!
//! Every declared offset and size is checked against the sidecar's real
//! length before anything is read, so a header that lies gives one clear
//! error, never a read outside the file or a huge allocation. The layout is
//! documented in traces/FORMAT.md, "Binary-backed traces".

use super::error::{LoadError, SaveError};
use super::load::{Encoding, parse_as, placed, syntax_error, text_of};
use super::model::Trace;
use super::progress::{self, Progress};
use super::schema::{NodeFile, TraceFile, ValueRepr};
use super::store;
use super::validate::validate_with;
use crate::dtype::Dtype;
use crate::format::shape as show;
use crate::tensor::{Mapped, Value};

/// How elements are stored in a sidecar: little-endian IEEE 754.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Element {
    /// binary32, 4 bytes.
    F32,
    /// binary64, 8 bytes.
    F64,
}

impl Element {
    /// Bytes per element.
    pub fn width(self) -> usize {
        self.dtype().width()
    }

    /// The name used in headers and messages.
    pub fn name(self) -> &'static str {
        self.dtype().name()
    }

    fn dtype(self) -> Dtype {
        match self {
            Element::F32 => Dtype::F32,
            Element::F64 => Dtype::F64,
        }
    }
}
use memmap2::Mmap;
use serde::{Deserialize, Serialize};
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::Arc;

/// The first eight bytes of every sidecar.
pub const MAGIC: &[u8; 8] = b"ebb-side";
/// The sidecar layout version this build reads and writes.
pub const SIDECAR_VERSION: u32 = 1;
/// Bytes before the first tensor: magic, version, element width.
pub const PREAMBLE: u64 = 16;
/// Every tensor starts at a multiple of this, so f64 data can be used in place.
const ALIGN: u64 = 8;

/// The header file of a binary-backed trace.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct HeaderFile {
    /// Where the data is.
    pub sidecar: SidecarInfo,
    /// The trace, with each tensor written `(shape: [..], offset: N)`.
    pub trace: TraceFile,
}

/// The header's description of its sidecar.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SidecarInfo {
    /// File name, beside the header (no directories).
    pub file: String,
    /// Exact length in bytes.
    pub bytes: u64,
    /// How every element is stored.
    pub element: Element,
}

/// The sidecar path of the header at `header`: the same name with extension `.bin`.
pub fn sidecar_path(header: &Path) -> PathBuf {
    header.with_extension("bin")
}

/// The first node holding a sidecar reference, if any.
pub(crate) fn first_stored(file: &TraceFile) -> Option<String> {
    let stored = |value: &ValueRepr| matches!(value, ValueRepr::Stored { .. });
    if file.seed.as_ref().is_some_and(stored) {
        return Some(file.output.0.clone());
    }
    file.nodes
        .iter()
        .find(|node| stored(&node.value) || node.reported.as_ref().is_some_and(stored))
        .map(|node| node.id.0.clone())
}

/// The element type a trace's data is stored in: f32 when every element of
/// the trace is exactly an f32 (always so for f16, bf16 and f32 runs whose
/// values came from Ebb's rounding), f64 otherwise.
pub fn element_for(file: &TraceFile) -> Element {
    if file.dtype == Dtype::F64 {
        return Element::F64;
    }
    let exact = |x: &f64| x.is_nan() || (*x as f32) as f64 == *x;
    let fits = |value: &ValueRepr| match value {
        ValueRepr::Tensor { data, .. } => data.iter().all(exact),
        ValueRepr::Scalar(_) | ValueRepr::Stored { .. } => true,
    };
    let all = file.seed.as_ref().is_none_or(fits)
        && file
            .nodes
            .iter()
            .all(|node| fits(&node.value) && node.reported.as_ref().is_none_or(fits));
    if all { Element::F32 } else { Element::F64 }
}

/// Appends tensors to a sidecar and hands back their references.
struct SidecarWriter<'w> {
    out: &'w mut dyn Write,
    element: Element,
    position: u64,
}

impl SidecarWriter<'_> {
    fn store(&mut self, value: &ValueRepr) -> std::io::Result<ValueRepr> {
        let ValueRepr::Tensor { shape, data } = value else {
            return Ok(value.clone());
        };
        let padding = (ALIGN - self.position % ALIGN) % ALIGN;
        self.out
            .write_all(&[0u8; ALIGN as usize][..padding as usize])?;
        self.position += padding;
        let offset = self.position;
        for &x in data {
            match self.element {
                Element::F32 => self.out.write_all(&(x as f32).to_le_bytes())?,
                Element::F64 => self.out.write_all(&x.to_le_bytes())?,
            }
        }
        self.position += (data.len() * self.element.width()) as u64;
        Ok(ValueRepr::Stored {
            shape: shape.clone(),
            offset,
        })
    }
}

/// Writes `file` (data inline) as the header `header` and its sidecar.
/// Both are written to temporary files first; the sidecar is renamed into
/// place before the header.
pub(crate) fn write(
    file: &TraceFile,
    header: &Path,
    progress: &mut dyn Progress,
) -> Result<(), SaveError> {
    if let Some(node) = first_stored(file) {
        return Err(SaveError::NotInline {
            path: header.to_path_buf(),
            node,
        });
    }
    let sidecar = sidecar_path(header);
    let element = element_for(file);
    progress.stage("writing", None);
    let mut trace = TraceFile {
        nodes: Vec::with_capacity(file.nodes.len()),
        seed: None,
        ..file.clone_header()
    };
    let staged_sidecar = store::stage(&sidecar, |out| {
        out.write_all(MAGIC)?;
        out.write_all(&SIDECAR_VERSION.to_le_bytes())?;
        out.write_all(&(element.width() as u32).to_le_bytes())?;
        let mut writer = SidecarWriter {
            out,
            element,
            position: PREAMBLE,
        };
        trace.seed = file
            .seed
            .as_ref()
            .map(|seed| writer.store(seed))
            .transpose()?;
        for node in &file.nodes {
            trace.nodes.push(NodeFile {
                value: writer.store(&node.value)?,
                reported: node
                    .reported
                    .as_ref()
                    .map(|reported| writer.store(reported))
                    .transpose()?,
                ..node.clone_without_data()
            });
        }
        progress.advance(writer.position);
        Ok(())
    })?;
    let bytes = staged_sidecar_len(&staged_sidecar, &sidecar)?;
    let name = sidecar
        .file_name()
        .and_then(|name| name.to_str())
        .unwrap_or("trace.bin")
        .to_string();
    let header_file = HeaderFile {
        sidecar: SidecarInfo {
            file: name,
            bytes,
            element,
        },
        trace,
    };
    let text = text_of(&header_file, Encoding::Ron);
    let staged_header = store::stage(header, |out| out.write_all(text.as_bytes()))?;
    store::commit(staged_sidecar, &sidecar)?;
    store::commit(staged_header, header)
}

fn staged_sidecar_len(staged: &store::Staged, path: &Path) -> Result<u64, SaveError> {
    staged.len().map_err(|error| SaveError::Io {
        path: path.to_path_buf(),
        error,
    })
}

impl TraceFile {
    /// The header fields with no nodes and no seed.
    fn clone_header(&self) -> TraceFile {
        TraceFile {
            format: self.format,
            title: self.title.clone(),
            description: self.description.clone(),
            dtype: self.dtype,
            output: self.output.clone(),
            seed: None,
            nodes: Vec::new(),
        }
    }
}

impl NodeFile {
    /// Everything but the value and the reported gradient, which the caller replaces.
    fn clone_without_data(&self) -> NodeFile {
        NodeFile {
            id: self.id.clone(),
            op: self.op.clone(),
            inputs: self.inputs.clone(),
            group: self.group.clone(),
            site: self.site.clone(),
            value: ValueRepr::Scalar(0.0),
            attrs: self.attrs.clone(),
            partials: self.partials.clone(),
            reported: None,
        }
    }
}

/// An opened, checked sidecar.
struct Sidecar {
    map: Arc<Mmap>,
    element: Element,
    name: String,
}

fn sidecar_error(header: &Path, node: Option<&str>, message: String, hint: &str) -> LoadError {
    LoadError::Sidecar {
        path: header.to_path_buf(),
        node: node.map(str::to_string),
        message,
        hint: hint.to_string(),
    }
}

const REGENERATE: &str = "the header and its sidecar no longer belong together; regenerate both, e.g. with `ebb convert` from the original trace";

/// Reads and parses the header.
fn read_header(
    header: &Path,
    progress: &mut dyn Progress,
) -> Result<(HeaderFile, String), LoadError> {
    let text = progress::read_text(header, progress).map_err(|error| LoadError::Io {
        path: header.to_path_buf(),
        error,
    })?;
    progress.stage("parsing", None);
    let parsed = parse_as::<HeaderFile>(&text, Encoding::sniff(&text))
        .map_err(|error| syntax_error(header, error))?;
    Ok((parsed, text))
}

/// The byte range of a reference, checked against the sidecar's length.
fn checked_range(
    shape: &[usize],
    offset: u64,
    element: Element,
    len: u64,
    name: &str,
) -> Result<(usize, usize), String> {
    let count = shape.iter().try_fold(1usize, |acc, &d| acc.checked_mul(d));
    let bytes = count
        .and_then(|count| count.checked_mul(element.width()))
        .map(|bytes| bytes as u64);
    let (Some(count), Some(bytes)) = (count, bytes) else {
        return Err(format!("shape {} is too large to be stored", show(shape)));
    };
    if shape.is_empty() {
        return Err(
            "a sidecar reference needs a tensor shape (a scalar is written inline)".to_string(),
        );
    }
    if offset < PREAMBLE {
        return Err(format!(
            "offset {offset} lies inside the {PREAMBLE}-byte preamble of {name}"
        ));
    }
    if !offset.is_multiple_of(element.width() as u64) {
        return Err(format!(
            "offset {offset} is not a multiple of the {}-byte element width",
            element.width()
        ));
    }
    match offset.checked_add(bytes) {
        Some(end) if end <= len => Ok((offset as usize, count)),
        _ => Err(format!(
            "data of shape {} at bytes {offset}..{} lies past the end of {name}, which is {len} bytes",
            show(shape),
            offset.saturating_add(bytes)
        )),
    }
}

/// Every reference in the trace: (node id, shape, offset), seed first.
fn references(file: &TraceFile) -> impl Iterator<Item = (&str, &[usize], u64)> {
    fn stored(value: &ValueRepr) -> Option<(&[usize], u64)> {
        match value {
            ValueRepr::Stored { shape, offset } => Some((shape.as_slice(), *offset)),
            _ => None,
        }
    }
    let seed = file
        .seed
        .as_ref()
        .and_then(stored)
        .map(|(shape, offset)| (file.output.0.as_str(), shape, offset));
    seed.into_iter()
        .chain(file.nodes.iter().flat_map(move |node| {
            let value =
                stored(&node.value).map(|(shape, offset)| (node.id.0.as_str(), shape, offset));
            let reported = node
                .reported
                .as_ref()
                .and_then(stored)
                .map(|(shape, offset)| (node.id.0.as_str(), shape, offset));
            value.into_iter().chain(reported)
        }))
}

/// Opens the sidecar, checks its length, preamble and every reference, and maps it.
fn open_sidecar(header: &Path, parsed: &HeaderFile) -> Result<Sidecar, LoadError> {
    let info = &parsed.sidecar;
    let plain = Path::new(&info.file)
        .file_name()
        .is_some_and(|name| name == info.file.as_str())
        && info.file != "..";
    if !plain {
        return Err(sidecar_error(
            header,
            None,
            format!("sidecar name `{}` is not a plain file name", info.file),
            "a sidecar lives beside its header; name it without directories",
        ));
    }
    let path = header.parent().unwrap_or(Path::new("")).join(&info.file);
    let opened =
        std::fs::File::open(&path).and_then(|file| file.metadata().map(|meta| (file, meta.len())));
    let (file, len) = opened.map_err(|error| {
        sidecar_error(
            header,
            None,
            format!("cannot open its sidecar {}: {error}", path.display()),
            "keep the .bin sidecar beside its .tape header",
        )
    })?;
    let name = info.file.clone();
    if len < info.bytes {
        // Name the first node whose data is cut off.
        let cut = references(&parsed.trace).find(|(_, shape, offset)| {
            checked_range(shape, *offset, info.element, len, &name).is_err()
        });
        let message = format!(
            "sidecar {name} is truncated: {len} bytes, but the header declares {}",
            info.bytes
        );
        return Err(sidecar_error(
            header,
            cut.map(|(node, _, _)| node),
            message,
            "the sidecar was cut short (an interrupted copy?); copy or regenerate it",
        ));
    }
    if len > info.bytes {
        return Err(sidecar_error(
            header,
            None,
            format!(
                "sidecar {name} is {len} bytes, but the header declares {}",
                info.bytes
            ),
            REGENERATE,
        ));
    }
    // SAFETY: the file is opened read-only and the mapping is never written;
    // another process truncating or rewriting it while open is the usual
    // caveat of memory maps, documented in traces/FORMAT.md.
    let map = unsafe { Mmap::map(&file) }.map_err(|error| {
        sidecar_error(
            header,
            None,
            format!("cannot map its sidecar {}: {error}", path.display()),
            "check the file is readable",
        )
    })?;
    if map.len() < PREAMBLE as usize || &map[..8] != MAGIC {
        return Err(sidecar_error(
            header,
            None,
            format!("{name} is not an Ebb sidecar (it does not start with `ebb-side`)"),
            REGENERATE,
        ));
    }
    let version = u32::from_le_bytes(map[8..12].try_into().expect("4 bytes"));
    let width = u32::from_le_bytes(map[12..16].try_into().expect("4 bytes"));
    if version != SIDECAR_VERSION {
        return Err(sidecar_error(
            header,
            None,
            format!(
                "{name} has sidecar layout version {version}; this build reads version {SIDECAR_VERSION}"
            ),
            "convert the trace with a matching release of ebb",
        ));
    }
    if width as usize != info.element.width() {
        return Err(sidecar_error(
            header,
            None,
            format!(
                "{name} stores {width}-byte elements but the header declares {}",
                info.element.name()
            ),
            REGENERATE,
        ));
    }
    for (node, shape, offset) in references(&parsed.trace) {
        checked_range(shape, offset, info.element, len, &name)
            .map_err(|message| sidecar_error(header, Some(node), message, REGENERATE))?;
    }
    Ok(Sidecar {
        map: Arc::new(map),
        element: info.element,
        name,
    })
}

/// Opens a binary-backed trace: parses the header, checks and maps the
/// sidecar, and validates. Tensor data stays in the mapping until used.
pub(crate) fn load(header: &Path, progress: &mut dyn Progress) -> Result<Trace, LoadError> {
    let (parsed, text) = read_header(header, progress)?;
    progress.stage("checking", None);
    let sidecar = open_sidecar(header, &parsed)?;
    let resolve = |shape: &[usize], offset: u64| -> Result<Value, String> {
        let (start, count) = checked_range(
            shape,
            offset,
            sidecar.element,
            sidecar.map.len() as u64,
            &sidecar.name,
        )?;
        let mapped = Mapped::new(
            Arc::clone(&sidecar.map),
            start,
            count,
            sidecar.element.dtype(),
        )
        .ok_or("range outside the sidecar")?;
        Ok(Value::from_mapped(shape.to_vec(), mapped))
    };
    let trace =
        validate_with(parsed.trace, &resolve).map_err(|problems| placed(&text, header, problems));
    progress.finish();
    trace
}

/// Reads a binary-backed trace with every tensor's data copied inline, for
/// conversion to another form. Not validated.
pub(crate) fn read_inline(
    header: &Path,
    progress: &mut dyn Progress,
) -> Result<TraceFile, LoadError> {
    let (mut parsed, text) = read_header(header, progress)?;
    let sidecar = open_sidecar(header, &parsed)?;
    progress.stage("reading sidecar", Some(sidecar.map.len() as u64));
    let len = sidecar.map.len() as u64;
    let inline = |value: &mut ValueRepr, node: &str| -> Result<(), LoadError> {
        if let ValueRepr::Stored { shape, offset } = value {
            let (start, count) = checked_range(shape, *offset, sidecar.element, len, &sidecar.name)
                .map_err(|message| sidecar_error(header, Some(node), message, REGENERATE))?;
            let mapped = Mapped::new(
                Arc::clone(&sidecar.map),
                start,
                count,
                sidecar.element.dtype(),
            )
            .expect("range checked");
            *value = ValueRepr::Tensor {
                shape: std::mem::take(shape),
                data: mapped.elements().to_vec_f64(),
            };
        }
        Ok(())
    };
    let output = parsed.trace.output.0.clone();
    if let Some(seed) = &mut parsed.trace.seed {
        inline(seed, &output)?;
    }
    for node in &mut parsed.trace.nodes {
        inline(&mut node.value, &node.id.0)?;
        if let Some(reported) = &mut node.reported {
            inline(reported, &node.id.0)?;
        }
    }
    drop(text);
    Ok(parsed.trace)
}
