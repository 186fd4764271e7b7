//! Op attributes: the constants an op needs besides its inputs.

use serde::{Deserialize, Serialize};

/// Attributes of one node. Each op reads the fields it needs; the catalog
/// lists which are required.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Attrs {
    /// Axis of a reduction or of softmax; negative counts from the end.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub axis: Option<i64>,
    /// Whether a reduction keeps the reduced axis with length 1.
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub keepdims: bool,
    /// The constant exponent of `pow`.
    #[serde(
        default,
        skip_serializing_if = "Option::is_none",
        with = "crate::trace::schema::opt_num"
    )]
    pub exponent: Option<f64>,
    /// The negative slope of `leaky_relu`.
    #[serde(
        default,
        skip_serializing_if = "Option::is_none",
        with = "crate::trace::schema::opt_num"
    )]
    pub slope: Option<f64>,
    /// Target class indices of `cross_entropy`, one per row of logits.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub targets: Option<Vec<usize>>,
    /// Axis permutation of `transpose` (default: swap the last two axes).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub perm: Option<Vec<usize>>,
    /// Target shape of `reshape`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub shape: Option<Vec<usize>>,
}

/// Names an attribute, for the catalog's list of required ones.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum AttrName {
    /// [`Attrs::axis`]
    Axis,
    /// [`Attrs::exponent`]
    Exponent,
    /// [`Attrs::slope`]
    Slope,
    /// [`Attrs::targets`]
    Targets,
    /// [`Attrs::shape`]
    Shape,
}

impl AttrName {
    /// The field name as written in a trace.
    pub fn as_str(self) -> &'static str {
        match self {
            AttrName::Axis => "axis",
            AttrName::Exponent => "exponent",
            AttrName::Slope => "slope",
            AttrName::Targets => "targets",
            AttrName::Shape => "shape",
        }
    }

    /// Whether `attrs` sets this attribute.
    pub fn is_set(self, attrs: &Attrs) -> bool {
        match self {
            AttrName::Axis => attrs.axis.is_some(),
            AttrName::Exponent => attrs.exponent.is_some(),
            AttrName::Slope => attrs.slope.is_some(),
            AttrName::Targets => attrs.targets.is_some(),
            AttrName::Shape => attrs.shape.is_some(),
        }
    }
}

impl Attrs {
    /// True when no attribute is set.
    pub fn is_empty(&self) -> bool {
        *self == Attrs::default()
    }
}
