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
    /// Target shape of `reshape` and `broadcast_to`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub shape: Option<Vec<usize>>,
    /// Lower bound of `clamp`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub min: Option<f64>,
    /// Upper bound of `clamp`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub max: Option<f64>,
    /// Which form of `gelu`: exact (default) or the tanh approximation.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub approximate: Option<Approximate>,
    /// β of `softplus` (default 1).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub beta: Option<f64>,
    /// Threshold of `softplus` above which βx is returned as x (default 20).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub threshold: Option<f64>,
    /// Scale of the negative branch of `elu` (default 1).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub alpha: Option<f64>,
    /// First index of `slice` (Python's rules; default: the start of the walk).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub start: Option<i64>,
    /// End of `slice`, exclusive (Python's rules; default: the end of the walk).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub end: Option<i64>,
    /// Step of `slice` (default 1; negative walks backwards).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub step: Option<i64>,
    /// Position of `select` along its axis.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub index: Option<i64>,
    /// Counts of `pad`: every axis's start, then every axis's end.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub pads: Option<Vec<i64>>,
    /// Padding value of `pad` (default 0).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub value: Option<f64>,
    /// The row of `embedding` that receives no gradient.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub padding_idx: Option<i64>,
    /// Subtracted from the count in the divisor of `var` and `std` (default 1).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub correction: Option<f64>,
    /// Steps of a convolution or pooling window, per spatial axis or one for all.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub stride: Option<Vec<usize>>,
    /// Zero (pooling: −∞) padding on both sides, per spatial axis or one for all.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub padding: Option<Vec<usize>>,
    /// Spacing of kernel taps, per spatial axis or one for all.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub dilation: Option<Vec<usize>>,
    /// Channel groups of a convolution or of `group_norm`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub groups: Option<usize>,
    /// Window size of pooling, per spatial axis or one for all.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub kernel: Option<Vec<usize>>,
    /// Whether `avg_pool2d` counts padding in its divisor (default true).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub count_include_pad: Option<bool>,
    /// Added to the variance (or mean square) of a normalisation.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub eps: Option<f64>,
    /// How a loss combines its per-element terms (default mean).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub reduction: Option<Reduction>,
    /// A target of `nll_loss` that contributes nothing (default −100).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub ignore_index: Option<i64>,
    /// Where `huber` turns from quadratic to linear (default 1).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub delta: Option<f64>,
}

/// The form of `gelu`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Approximate {
    /// x Φ(x), with the normal distribution's Φ from erf.
    None,
    /// 0.5 x (1 + tanh(√(2/π) (x + 0.044715 x³))).
    Tanh,
}

/// How a loss combines its per-element terms.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Reduction {
    /// The mean (for `nll_loss`, over the targets not ignored).
    Mean,
    /// The sum.
    Sum,
    /// No reduction: one loss per element (per row for `nll_loss`).
    None,
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
    /// [`Attrs::index`]
    Index,
    /// [`Attrs::pads`]
    Pads,
    /// [`Attrs::kernel`]
    Kernel,
    /// [`Attrs::groups`]
    Groups,
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
            AttrName::Index => "index",
            AttrName::Pads => "pads",
            AttrName::Kernel => "kernel",
            AttrName::Groups => "groups",
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
            AttrName::Index => attrs.index.is_some(),
            AttrName::Pads => attrs.pads.is_some(),
            AttrName::Kernel => attrs.kernel.is_some(),
            AttrName::Groups => attrs.groups.is_some(),
        }
    }
}

impl Attrs {
    /// True when no attribute is set.
    pub fn is_empty(&self) -> bool {
        *self == Attrs::default()
    }
}

/// A node's [`Attrs`], kept out of line: a node without attributes (most
/// nodes of a big trace) holds one null pointer instead of the few hundred
/// bytes of an [`Attrs`], in the parsed file and in every copy of a trace.
/// Reads go through [`Deref`](std::ops::Deref) (an absent set reads as the
/// empty one); a write through [`DerefMut`](std::ops::DerefMut) allocates.
/// Serialised as the [`Attrs`] it holds.
#[derive(Clone, Default)]
pub struct BoxedAttrs(Option<Box<Attrs>>);

impl PartialEq for BoxedAttrs {
    fn eq(&self, other: &BoxedAttrs) -> bool {
        **self == **other
    }
}

/// The attributes of a node that has none.
static NO_ATTRS: std::sync::LazyLock<Attrs> = std::sync::LazyLock::new(Attrs::default);

impl BoxedAttrs {
    /// True when no attribute is set.
    pub fn is_empty(&self) -> bool {
        self.0.as_deref().is_none_or(Attrs::is_empty)
    }
}

impl From<Attrs> for BoxedAttrs {
    fn from(attrs: Attrs) -> BoxedAttrs {
        BoxedAttrs((!attrs.is_empty()).then(|| Box::new(attrs)))
    }
}

impl std::ops::Deref for BoxedAttrs {
    type Target = Attrs;
    fn deref(&self) -> &Attrs {
        self.0.as_deref().unwrap_or(&NO_ATTRS)
    }
}

impl std::ops::DerefMut for BoxedAttrs {
    fn deref_mut(&mut self) -> &mut Attrs {
        self.0.get_or_insert_with(Box::default)
    }
}

impl std::fmt::Debug for BoxedAttrs {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        std::fmt::Debug::fmt(&**self, f)
    }
}

impl Serialize for BoxedAttrs {
    fn serialize<S: serde::Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        (**self).serialize(serializer)
    }
}

impl<'de> Deserialize<'de> for BoxedAttrs {
    fn deserialize<D: serde::Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        Attrs::deserialize(deserializer).map(BoxedAttrs::from)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn boxed_attributes_hold_nothing_when_empty() {
        assert!(std::mem::size_of::<BoxedAttrs>() <= 8);
        let empty = BoxedAttrs::from(Attrs::default());
        assert!(empty.0.is_none() && empty.is_empty());
        assert_eq!(empty.exponent, None);
        // A write allocates; a set emptied again equals an empty one.
        let mut set = BoxedAttrs::from(Attrs::default());
        set.exponent = Some(2.0);
        assert!(!set.is_empty());
        assert_eq!(set.exponent, Some(2.0));
        assert_eq!(
            BoxedAttrs::from(Attrs {
                exponent: Some(2.0),
                ..Attrs::default()
            }),
            set
        );
        set.exponent = None;
        assert_eq!(set, empty);
    }
}
