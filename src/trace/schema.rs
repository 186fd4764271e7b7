//! The trace file format, version 2 (version 1 is read too): plain serde
//! types shared by the RON and JSON encodings. Nothing here is checked; `validate` turns a [`TraceFile`]
//! into a checked `Trace`.
//!
//! Numbers may be written as numbers or as the strings `"NaN"`, `"inf"` and
//! `"-inf"` (JSON has no literal for them); Ebb writes non-finite numbers as
//! those strings in both encodings, and RON's own `NaN` and `inf` are accepted
//! on reading.

use crate::dtype::Dtype;
use crate::ops::BoxedAttrs;
use serde::de::{self, Deserializer, MapAccess, SeqAccess, Visitor};
use serde::ser::{SerializeMap, SerializeStruct, Serializer};
use serde::{Deserialize, Serialize};
use std::fmt;

/// The format version this build writes.
pub const FORMAT_VERSION: u32 = 2;

/// The format versions this build reads: version 1 is version 2 without
/// per-node dtypes, `accumulate`, `sidecar` or `cast`.
pub const READABLE_VERSIONS: [u32; 2] = [1, 2];

/// A whole trace file, as written.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TraceFile {
    /// Format version; must be [`FORMAT_VERSION`].
    pub format: u32,
    /// A short title for the run.
    pub title: String,
    /// Free text: what was run, why the trace was kept.
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub description: String,
    /// The dtype of every node that does not name its own.
    pub dtype: Dtype,
    /// The dtype matmul, convolution and reduction sums accumulate in; by
    /// default f32 for f16, bf16 and f32 traces, f64 for f64 ones.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub accumulate: Option<Dtype>,
    /// A safetensors file beside the trace holding the tensors that are
    /// written `(tensor: "name")`: a plain file name, no directories.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub sidecar: Option<String>,
    /// The node whose adjoint is seeded.
    pub output: NodeId,
    /// The seed; default 1 (ones of the output's shape for a tensor output).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub seed: Option<ValueRepr>,
    /// The nodes in recording (forward) order.
    pub nodes: Vec<NodeFile>,
}

/// One recorded node.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct NodeFile {
    /// Unique id.
    pub id: NodeId,
    /// A catalog op name, or any other name for a custom op.
    pub op: String,
    /// Input node ids, in argument order.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub inputs: Vec<NodeId>,
    /// The node's dtype, when it differs from the header's.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub dtype: Option<Dtype>,
    /// Scope path such as `encoder/block2/mlp`.
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub group: String,
    /// Where the node was recorded, `file:line`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub site: Option<String>,
    /// The forward value.
    pub value: ValueRepr,
    /// Op attributes.
    #[serde(default, skip_serializing_if = "BoxedAttrs::is_empty")]
    pub attrs: BoxedAttrs,
    /// Recorded partials, one per input edge (absent entries are derived).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub partials: Vec<PartialRepr>,
    /// The gradient the original run's framework reported for this node.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub reported: Option<ValueRepr>,
}

/// A node id: written as a string, or as an integer for generated traces.
#[derive(Debug, Clone, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct NodeId(pub String);

impl fmt::Display for NodeId {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.0)
    }
}

impl From<&str> for NodeId {
    fn from(id: &str) -> Self {
        NodeId(id.to_string())
    }
}

impl Serialize for NodeId {
    fn serialize<S: Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        serializer.serialize_str(&self.0)
    }
}

impl<'de> Deserialize<'de> for NodeId {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        struct IdVisitor;
        impl Visitor<'_> for IdVisitor {
            type Value = NodeId;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("a node id (string or integer)")
            }
            fn visit_str<E: de::Error>(self, v: &str) -> Result<NodeId, E> {
                Ok(NodeId(v.to_string()))
            }
            fn visit_string<E: de::Error>(self, v: String) -> Result<NodeId, E> {
                Ok(NodeId(v))
            }
            fn visit_u64<E: de::Error>(self, v: u64) -> Result<NodeId, E> {
                Ok(NodeId(v.to_string()))
            }
            fn visit_i64<E: de::Error>(self, v: i64) -> Result<NodeId, E> {
                Ok(NodeId(v.to_string()))
            }
        }
        deserializer.deserialize_any(IdVisitor)
    }
}

/// A number that may be non-finite.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Num(pub f64);

impl Serialize for Num {
    fn serialize<S: Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        let x = self.0;
        if x.is_finite() {
            serializer.serialize_f64(x)
        } else if x.is_nan() {
            serializer.serialize_str("NaN")
        } else if x > 0.0 {
            serializer.serialize_str("inf")
        } else {
            serializer.serialize_str("-inf")
        }
    }
}

/// Reads the string spellings of non-finite numbers.
fn parse_special(text: &str) -> Option<f64> {
    match text {
        "NaN" | "nan" | "NAN" => Some(f64::NAN),
        "inf" | "+inf" | "Infinity" | "+Infinity" | "INF" => Some(f64::INFINITY),
        "-inf" | "-Infinity" | "-INF" => Some(f64::NEG_INFINITY),
        _ => None,
    }
}

const NUMBER_EXPECTED: &str = "a number, or one of the strings \"NaN\", \"inf\", \"-inf\"";

struct NumVisitor;

impl Visitor<'_> for NumVisitor {
    type Value = f64;
    fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
        f.write_str(NUMBER_EXPECTED)
    }
    fn visit_f64<E: de::Error>(self, v: f64) -> Result<f64, E> {
        Ok(v)
    }
    fn visit_f32<E: de::Error>(self, v: f32) -> Result<f64, E> {
        Ok(v as f64)
    }
    fn visit_i64<E: de::Error>(self, v: i64) -> Result<f64, E> {
        Ok(v as f64)
    }
    fn visit_u64<E: de::Error>(self, v: u64) -> Result<f64, E> {
        Ok(v as f64)
    }
    fn visit_i128<E: de::Error>(self, v: i128) -> Result<f64, E> {
        Ok(v as f64)
    }
    fn visit_u128<E: de::Error>(self, v: u128) -> Result<f64, E> {
        Ok(v as f64)
    }
    fn visit_str<E: de::Error>(self, v: &str) -> Result<f64, E> {
        parse_special(v).ok_or_else(|| E::invalid_value(de::Unexpected::Str(v), &NUMBER_EXPECTED))
    }
}

impl<'de> Deserialize<'de> for Num {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        deserializer.deserialize_any(NumVisitor).map(Num)
    }
}

/// An optional number that may be non-finite, for `#[serde(with)]` on an
/// `Option<f64>` field (the attributes `exponent` and `slope`): written and
/// read like [`Num`], so NaN and ±inf survive JSON too.
pub mod opt_num {
    use super::Num;
    use serde::{Deserialize, Deserializer, Serialize, Serializer};

    /// Writes `Some(x)` as [`Num`] (`None` is skipped by the field).
    pub fn serialize<S: Serializer>(value: &Option<f64>, serializer: S) -> Result<S::Ok, S::Error> {
        value.map(Num).serialize(serializer)
    }

    /// Reads a number or one of the strings for NaN and ±inf.
    pub fn deserialize<'de, D: Deserializer<'de>>(
        deserializer: D,
    ) -> Result<Option<f64>, D::Error> {
        Ok(Option::<Num>::deserialize(deserializer)?.map(|num| num.0))
    }
}

/// A forward value, seed or reported gradient: a number for a scalar,
/// `(shape: [..], data: [..])` for a tensor, or a bare list for a vector.
#[derive(Debug, Clone, PartialEq)]
pub enum ValueRepr {
    /// A scalar.
    Scalar(f64),
    /// A tensor with its shape and row-major data.
    Tensor {
        /// Dimensions.
        shape: Vec<usize>,
        /// Elements, row-major.
        data: Vec<f64>,
    },
    /// A tensor stored in the trace's safetensors sidecar under `tensor`,
    /// written `(tensor: "name")`, optionally with the shape to check.
    Sidecar {
        /// The tensor's name in the sidecar.
        tensor: String,
        /// The shape the sidecar entry must have, when given.
        shape: Option<Vec<usize>>,
    },
}

/// Wraps a slice of f64 so that non-finite elements serialise as strings.
struct NumSlice<'a>(&'a [f64]);

impl Serialize for NumSlice<'_> {
    fn serialize<S: Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        serializer.collect_seq(self.0.iter().map(|&x| Num(x)))
    }
}

impl Serialize for ValueRepr {
    fn serialize<S: Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        match self {
            ValueRepr::Scalar(x) => Num(*x).serialize(serializer),
            ValueRepr::Tensor { shape, data } => {
                let mut s = serializer.serialize_struct("Tensor", 2)?;
                s.serialize_field("shape", shape)?;
                s.serialize_field("data", &NumSlice(data))?;
                s.end()
            }
            ValueRepr::Sidecar { tensor, shape } => {
                let mut s = serializer.serialize_struct("Tensor", 2)?;
                s.serialize_field("tensor", tensor)?;
                if let Some(shape) = shape {
                    s.serialize_field("shape", shape)?;
                }
                s.end()
            }
        }
    }
}

/// Reads a list of numbers.
fn read_numbers<'de, A: SeqAccess<'de>>(mut seq: A) -> Result<Vec<f64>, A::Error> {
    let mut out = Vec::with_capacity(seq.size_hint().unwrap_or(0).min(1 << 20));
    while let Some(Num(x)) = seq.next_element()? {
        out.push(x);
    }
    Ok(out)
}

struct Numbers(Vec<f64>);

impl<'de> Deserialize<'de> for Numbers {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        struct NumbersVisitor;
        impl<'de> Visitor<'de> for NumbersVisitor {
            type Value = Numbers;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("a list of numbers")
            }
            fn visit_seq<A: SeqAccess<'de>>(self, seq: A) -> Result<Numbers, A::Error> {
                read_numbers(seq).map(Numbers)
            }
        }
        deserializer.deserialize_seq(NumbersVisitor)
    }
}

const VALUE_EXPECTED: &str = "a number, a list of numbers, (shape: [..], data: [..]), or (tensor: \"name\") for a tensor in the trace's sidecar";

impl<'de> Deserialize<'de> for ValueRepr {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        struct ValueVisitor;
        impl<'de> Visitor<'de> for ValueVisitor {
            type Value = ValueRepr;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str(VALUE_EXPECTED)
            }
            fn visit_f64<E: de::Error>(self, v: f64) -> Result<ValueRepr, E> {
                Ok(ValueRepr::Scalar(v))
            }
            fn visit_i64<E: de::Error>(self, v: i64) -> Result<ValueRepr, E> {
                Ok(ValueRepr::Scalar(v as f64))
            }
            fn visit_u64<E: de::Error>(self, v: u64) -> Result<ValueRepr, E> {
                Ok(ValueRepr::Scalar(v as f64))
            }
            fn visit_str<E: de::Error>(self, v: &str) -> Result<ValueRepr, E> {
                NumVisitor.visit_str(v).map(ValueRepr::Scalar)
            }
            fn visit_seq<A: SeqAccess<'de>>(self, seq: A) -> Result<ValueRepr, A::Error> {
                let data = read_numbers(seq)?;
                Ok(ValueRepr::Tensor {
                    shape: vec![data.len()],
                    data,
                })
            }
            fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<ValueRepr, A::Error> {
                let (mut shape, mut data, mut tensor) = (None, None, None);
                while let Some(key) = map.next_key::<String>()? {
                    match key.as_str() {
                        "shape" => shape = Some(map.next_value::<Vec<usize>>()?),
                        "data" => data = Some(map.next_value::<Numbers>()?.0),
                        "tensor" => tensor = Some(map.next_value::<String>()?),
                        "offset" => {
                            return Err(de::Error::custom(
                                "`offset` refers to a format-1 `.bin` sidecar, which Ebb no longer reads; \
                                 write the tensor as (tensor: \"name\") in a safetensors sidecar",
                            ));
                        }
                        other => {
                            return Err(de::Error::unknown_field(
                                other,
                                &["shape", "data", "tensor"],
                            ));
                        }
                    }
                }
                match (data, tensor) {
                    (Some(data), None) => {
                        let shape = shape.ok_or_else(|| de::Error::missing_field("shape"))?;
                        Ok(ValueRepr::Tensor { shape, data })
                    }
                    (None, Some(tensor)) => Ok(ValueRepr::Sidecar { tensor, shape }),
                    (None, None) => Err(de::Error::missing_field("data")),
                    (Some(_), Some(_)) => Err(de::Error::custom(
                        "a tensor has either `data` or a sidecar `tensor`, not both",
                    )),
                }
            }
        }
        deserializer.deserialize_any(ValueVisitor)
    }
}

/// A recorded partial on one input edge.
#[derive(Debug, Clone, PartialEq)]
pub enum PartialRepr {
    /// Not recorded: a catalog op's rule derives it.
    Absent,
    /// The same partial for every element.
    Scalar(f64),
    /// An elementwise partial with the output's shape, row-major.
    Diagonal(Vec<f64>),
    /// A dense Jacobian: one row per output element, one column per input element.
    Jacobian(Vec<Vec<f64>>),
}

impl Serialize for PartialRepr {
    fn serialize<S: Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        match self {
            PartialRepr::Absent => serializer.serialize_unit(),
            PartialRepr::Scalar(x) => Num(*x).serialize(serializer),
            PartialRepr::Diagonal(data) => {
                let mut map = serializer.serialize_map(Some(1))?;
                map.serialize_entry("diag", &NumSlice(data))?;
                map.end()
            }
            PartialRepr::Jacobian(rows) => {
                let rows: Vec<NumSlice> = rows.iter().map(|row| NumSlice(row)).collect();
                let mut map = serializer.serialize_map(Some(1))?;
                map.serialize_entry("jacobian", &rows)?;
                map.end()
            }
        }
    }
}

const PARTIAL_EXPECTED: &str =
    "a number, {\"diag\": [..]}, {\"jacobian\": [[..], ..]}, or null / () for a derived partial";

impl<'de> Deserialize<'de> for PartialRepr {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        struct PartialVisitor;
        impl<'de> Visitor<'de> for PartialVisitor {
            type Value = PartialRepr;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str(PARTIAL_EXPECTED)
            }
            fn visit_unit<E: de::Error>(self) -> Result<PartialRepr, E> {
                Ok(PartialRepr::Absent)
            }
            fn visit_none<E: de::Error>(self) -> Result<PartialRepr, E> {
                Ok(PartialRepr::Absent)
            }
            fn visit_some<D2: Deserializer<'de>>(
                self,
                inner: D2,
            ) -> Result<PartialRepr, D2::Error> {
                PartialRepr::deserialize(inner)
            }
            fn visit_f64<E: de::Error>(self, v: f64) -> Result<PartialRepr, E> {
                Ok(PartialRepr::Scalar(v))
            }
            fn visit_i64<E: de::Error>(self, v: i64) -> Result<PartialRepr, E> {
                Ok(PartialRepr::Scalar(v as f64))
            }
            fn visit_u64<E: de::Error>(self, v: u64) -> Result<PartialRepr, E> {
                Ok(PartialRepr::Scalar(v as f64))
            }
            fn visit_str<E: de::Error>(self, v: &str) -> Result<PartialRepr, E> {
                NumVisitor.visit_str(v).map(PartialRepr::Scalar)
            }
            fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<PartialRepr, A::Error> {
                let key = map
                    .next_key::<String>()?
                    .ok_or_else(|| de::Error::custom("empty partial; expected diag or jacobian"))?;
                let partial = match key.as_str() {
                    "scalar" => PartialRepr::Scalar(map.next_value::<Num>()?.0),
                    "diag" => PartialRepr::Diagonal(map.next_value::<Numbers>()?.0),
                    "jacobian" => {
                        let rows: Vec<Numbers> = map.next_value()?;
                        PartialRepr::Jacobian(rows.into_iter().map(|row| row.0).collect())
                    }
                    other => {
                        return Err(de::Error::unknown_field(
                            other,
                            &["scalar", "diag", "jacobian"],
                        ));
                    }
                };
                if let Some(extra) = map.next_key::<String>()? {
                    return Err(de::Error::custom(format!(
                        "a partial has one key, found also `{extra}`"
                    )));
                }
                Ok(partial)
            }
        }
        deserializer.deserialize_any(PartialVisitor)
    }
}
