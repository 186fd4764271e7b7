//! Values held by nodes, partials and adjoints: a scalar or a row-major tensor
//! stored in its own dtype, plus the shape arithmetic (NumPy broadcasting,
//! axes) the op rules share.

mod float;
pub mod scan;
mod storage;
mod survey;

pub use float::{Buffer, Elements, Float, convert, elements_as, narrow};
pub use storage::Mapped;
pub use survey::Survey;

use crate::dtype::Dtype;
use crate::stats::Summary;
use std::borrow::Cow;
use std::fmt;
use std::sync::OnceLock;
use storage::Storage;

/// A scalar or a dense row-major tensor.
///
/// A rank-0 value is always `Scalar`, held as an `f64` (already rounded into
/// its node's dtype): scalar traces, the common case for teaching and for
/// million-node chains, never allocate. A tensor's elements are stored in
/// their own dtype: 4 bytes an element for f32, 2 for f16 and bf16.
#[derive(Debug, Clone, PartialEq)]
pub enum Value {
    /// A rank-0 value.
    Scalar(f64),
    /// A tensor of rank one or more (boxed, so a `Value` is two words).
    Tensor(Box<Tensor>),
}

/// A dense tensor of rank one or more, row-major.
///
/// Its elements are owned, or a range of a memory-mapped sidecar (see
/// [`Mapped`]); either way [`Tensor::elements`] gives them typed, in place.
#[derive(Clone)]
pub struct Tensor {
    shape: Vec<usize>,
    storage: Storage,
    /// The summary, computed on first request for the dtype it was asked in.
    summary: OnceLock<(Dtype, Summary)>,
}

impl Tensor {
    fn new(shape: Vec<usize>, storage: Storage) -> Tensor {
        Tensor {
            shape,
            storage,
            summary: OnceLock::new(),
        }
    }

    /// The tensor's shape.
    pub fn shape(&self) -> &[usize] {
        &self.shape
    }

    /// The elements, typed, in place.
    pub fn elements(&self) -> Elements<'_> {
        self.storage.elements()
    }

    /// Number of elements.
    pub fn len(&self) -> usize {
        self.elements().len()
    }

    /// True when a dimension is zero.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Element `i` (row-major), widened.
    pub fn get(&self, i: usize) -> f64 {
        self.elements().get(i)
    }

    /// The elements as f64s: borrowed when stored as f64, else a widened copy.
    pub fn to_f64(&self) -> Cow<'_, [f64]> {
        match self.elements() {
            Elements::F64(s) => Cow::Borrowed(s),
            other => Cow::Owned(other.to_vec_f64()),
        }
    }

    /// True when the elements live in a mapped sidecar rather than in memory.
    pub fn is_mapped(&self) -> bool {
        self.storage.is_mapped()
    }

    /// Summary statistics as values of `dtype`: computed once and cached, so
    /// views and reports may ask every frame. Never widens the tensor.
    pub fn summary(&self, dtype: Dtype) -> Summary {
        if let Some((cached_dtype, summary)) = self.summary.get()
            && *cached_dtype == dtype
        {
            return *summary;
        }
        let mut builder = Summary::builder(dtype);
        self.elements().for_each(|x| builder.push(x));
        let summary = builder.finish();
        // Keeps the first dtype asked for; another dtype is computed afresh.
        let _ = self.summary.set((dtype, summary));
        summary
    }
}

impl fmt::Debug for Tensor {
    /// The same text for every storage, so debug comparisons do not depend on it.
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("Tensor")
            .field("shape", &self.shape)
            .field("data", &self.elements().to_vec_f64())
            .finish()
    }
}

impl PartialEq for Tensor {
    /// Equal shapes and equal numbers, whatever the storage.
    fn eq(&self, other: &Tensor) -> bool {
        if self.shape != other.shape {
            return false;
        }
        let (a, b) = (self.elements(), other.elements());
        (0..a.len()).all(|i| a.get(i) == b.get(i))
    }
}

impl Value {
    /// Builds an f64 value from a shape and row-major data; an empty shape gives a scalar.
    ///
    /// # Panics
    /// If `data.len()` differs from the product of `shape` (callers validate first).
    pub fn from_parts(shape: Vec<usize>, data: Vec<f64>) -> Value {
        Value::from_buffer(shape, Buffer::F64(data))
    }

    /// Builds a value stored in `dtype` from f64 data already rounded into it.
    ///
    /// # Panics
    /// As [`Value::from_parts`].
    pub fn from_parts_in(dtype: Dtype, shape: Vec<usize>, data: Vec<f64>) -> Value {
        if shape.is_empty() {
            return Value::from_parts(shape, data);
        }
        Value::from_buffer(shape, Buffer::from_vec(dtype, data))
    }

    /// Builds a value from a shape and typed elements; an empty shape gives a scalar.
    ///
    /// # Panics
    /// If the number of elements differs from the product of `shape`.
    pub fn from_buffer(shape: Vec<usize>, buffer: Buffer) -> Value {
        assert_eq!(numel(&shape), buffer.len(), "data length must match shape");
        if shape.is_empty() {
            Value::Scalar(buffer.elements().get(0))
        } else {
            Value::Tensor(Box::new(Tensor::new(shape, Storage::owned(buffer))))
        }
    }

    /// A tensor whose elements are a checked range of a mapped sidecar.
    ///
    /// # Panics
    /// If `shape` is empty or its size differs from the range's length.
    pub fn from_mapped(shape: Vec<usize>, mapped: Mapped) -> Value {
        assert!(
            !shape.is_empty() && numel(&shape) == mapped.len(),
            "a mapped tensor's shape must match its range"
        );
        Value::Tensor(Box::new(Tensor::new(shape, Storage::Mapped(mapped))))
    }

    /// An f64 value of `shape` with every element equal to `x`.
    pub fn filled(shape: &[usize], x: f64) -> Value {
        if shape.is_empty() {
            Value::Scalar(x)
        } else {
            Value::from_parts(shape.to_vec(), vec![x; numel(shape)])
        }
    }

    /// The shape; empty for a scalar.
    pub fn shape(&self) -> &[usize] {
        match self {
            Value::Scalar(_) => &[],
            Value::Tensor(t) => &t.shape,
        }
    }

    /// The elements, typed, in place (one f64 for a scalar).
    pub fn elements(&self) -> Elements<'_> {
        match self {
            Value::Scalar(x) => Elements::F64(std::slice::from_ref(x)),
            Value::Tensor(t) => t.elements(),
        }
    }

    /// The dtype the elements are stored in (f64 for a scalar).
    pub fn storage_dtype(&self) -> Dtype {
        self.elements().dtype()
    }

    /// The elements as f64s in row-major order: borrowed when they are stored
    /// as f64, else widened into a temporary copy for one computation. Bind
    /// it once outside loops.
    pub fn to_f64(&self) -> Cow<'_, [f64]> {
        match self {
            Value::Scalar(x) => Cow::Borrowed(std::slice::from_ref(x)),
            Value::Tensor(t) => t.to_f64(),
        }
    }

    /// Element `i` (row-major), widened.
    #[inline]
    pub fn get(&self, i: usize) -> f64 {
        match self {
            Value::Scalar(x) => *x,
            Value::Tensor(t) => t.elements().get(i),
        }
    }

    /// The same value stored in `dtype` (a scalar stays an f64). Elements are
    /// rounded into `dtype` if they are not representable in it.
    pub fn stored_as(self, dtype: Dtype) -> Value {
        match self {
            Value::Scalar(x) => Value::Scalar(dtype.round(x)),
            Value::Tensor(t) if t.elements().dtype() != dtype => {
                let buffer = Buffer::converted(t.elements(), dtype);
                Value::Tensor(Box::new(Tensor::new(t.shape, Storage::owned(buffer))))
            }
            other => other,
        }
    }

    /// Applies `f` to every element in place, keeping the shape and the
    /// storage dtype (a mapped tensor is copied into memory first; the cached
    /// summary is dropped).
    pub fn map_in_place(&mut self, f: impl Fn(f64) -> f64) {
        match self {
            Value::Scalar(x) => *x = f(*x),
            Value::Tensor(t) => {
                t.summary = OnceLock::new();
                t.storage.make_owned().map_in_place(f);
            }
        }
    }

    /// Sets element `i` (row-major) to `x`, rounded into the storage dtype (a
    /// mapped tensor is copied into memory first).
    ///
    /// # Panics
    /// If `i` is out of range.
    pub fn set(&mut self, i: usize, x: f64) {
        match self {
            Value::Scalar(y) => {
                assert_eq!(i, 0, "a scalar has one element");
                *y = x;
            }
            Value::Tensor(t) => {
                t.summary = OnceLock::new();
                t.storage.make_owned().set(i, x);
            }
        }
    }

    /// Summary statistics as values of `dtype`; cached for tensors (see [`Tensor::summary`]).
    pub fn summary(&self, dtype: Dtype) -> Summary {
        match self {
            Value::Scalar(x) => Summary::of(std::slice::from_ref(x), dtype),
            Value::Tensor(t) => t.summary(dtype),
        }
    }

    /// Number of elements.
    pub fn len(&self) -> usize {
        match self {
            Value::Scalar(_) => 1,
            Value::Tensor(t) => t.elements().len(),
        }
    }

    /// True when the value has no elements (a tensor with a zero dimension).
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The single element of a scalar, or of a one-element tensor.
    pub fn as_scalar(&self) -> Option<f64> {
        (self.len() == 1).then(|| self.get(0))
    }

    /// Applies `f` to every element, keeping the shape; the result is stored as f64.
    pub fn map(&self, f: impl Fn(f64) -> f64) -> Value {
        match self {
            Value::Scalar(x) => Value::Scalar(f(*x)),
            Value::Tensor(t) => {
                let mut data = Vec::with_capacity(t.elements().len());
                t.elements().for_each(|x| data.push(f(x)));
                Value::from_parts(t.shape.clone(), data)
            }
        }
    }

    /// The same elements under another shape of equal size, in the same storage.
    pub fn reshaped(&self, shape: &[usize]) -> Value {
        match self {
            Value::Tensor(t) if !shape.is_empty() => {
                assert_eq!(numel(shape), t.elements().len(), "reshape keeps the size");
                Value::Tensor(Box::new(Tensor::new(shape.to_vec(), t.storage.clone())))
            }
            _ => Value::from_parts(shape.to_vec(), self.to_f64().into_owned()),
        }
    }

    /// True when every element is finite.
    pub fn is_finite(&self) -> bool {
        self.first_non_finite().is_none()
    }

    /// The first non-finite element, if any, with its flat index.
    pub fn first_non_finite(&self) -> Option<(usize, f64)> {
        match self {
            Value::Scalar(x) => (!x.is_finite()).then_some((0, *x)),
            Value::Tensor(t) => t.elements().first_non_finite(),
        }
    }

    /// Euclidean norm of all elements, computed in f64 so that it neither
    /// overflows nor underflows for finite entries (see [`survey::l2_norm_of`]).
    pub fn l2_norm(&self) -> f64 {
        match self {
            // One element: the norm is |x| exactly (NaN and ±inf included).
            Value::Scalar(x) => x.abs(),
            Value::Tensor(t) => survey::l2_norm_of(t.elements()),
        }
    }

    /// Non-finite count and finite magnitude bounds, in one pass over the
    /// elements in their own dtype.
    pub fn survey(&self) -> Survey {
        match self {
            Value::Scalar(x) => Survey::of_scalar(*x),
            Value::Tensor(t) => Survey::of(t.elements()),
        }
    }

    /// Bytes the elements take in their storage.
    pub fn bytes(&self) -> usize {
        match self {
            Value::Scalar(_) => 8,
            Value::Tensor(t) => t.elements().bytes(),
        }
    }
}

impl From<f64> for Value {
    fn from(x: f64) -> Value {
        Value::Scalar(x)
    }
}

/// Euclidean norm with a running scale (the method of LAPACK's `dnrm2`,
/// Anderson et al., LAPACK Users' Guide, 3rd ed., SIAM 1999), so squares of
/// large entries cannot overflow. NaN propagates; an infinite entry gives inf.
pub fn l2_norm(data: &[f64]) -> f64 {
    let mut norm = NormAccumulator::default();
    data.iter().for_each(|&x| norm.push(x));
    norm.finish()
}

/// The running state of [`l2_norm`], for callers that visit elements one by one.
#[derive(Debug, Clone, Copy)]
pub struct NormAccumulator {
    scale: f64,
    sum_sq: f64,
    nan: bool,
    inf: bool,
}

impl Default for NormAccumulator {
    fn default() -> NormAccumulator {
        NormAccumulator {
            scale: 0.0,
            sum_sq: 1.0,
            nan: false,
            inf: false,
        }
    }
}

impl NormAccumulator {
    /// Adds one element.
    #[inline]
    pub fn push(&mut self, x: f64) {
        if x.is_nan() {
            self.nan = true;
        } else if x.is_infinite() {
            self.inf = true;
        } else if x != 0.0 {
            let a = x.abs();
            if self.scale < a {
                self.sum_sq = 1.0 + self.sum_sq * (self.scale / a) * (self.scale / a);
                self.scale = a;
            } else {
                self.sum_sq += (a / self.scale) * (a / self.scale);
            }
        }
    }

    /// The norm of the elements pushed so far.
    pub fn finish(&self) -> f64 {
        if self.nan {
            f64::NAN
        } else if self.inf {
            f64::INFINITY
        } else {
            self.scale * self.sum_sq.sqrt()
        }
    }
}

impl fmt::Display for Value {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Value::Scalar(x) => write!(f, "{}", crate::format::number(*x)),
            Value::Tensor(t) => write!(f, "tensor{}", crate::format::shape(&t.shape)),
        }
    }
}

/// Product of the dimensions (1 for a scalar).
pub fn numel(shape: &[usize]) -> usize {
    shape.iter().product()
}

/// The NumPy broadcast of two shapes, or `None` when they do not fit.
pub fn broadcast_shapes(a: &[usize], b: &[usize]) -> Option<Vec<usize>> {
    let rank = a.len().max(b.len());
    let mut out = vec![0; rank];
    for (k, slot) in out.iter_mut().enumerate() {
        let da = dim_from_right(a, rank - 1 - k);
        let db = dim_from_right(b, rank - 1 - k);
        *slot = match (da, db) {
            (x, y) if x == y => x,
            (1, y) => y,
            (x, 1) => x,
            _ => return None,
        };
    }
    Some(out)
}

fn dim_from_right(shape: &[usize], from_right: usize) -> usize {
    if from_right < shape.len() {
        shape[shape.len() - 1 - from_right]
    } else {
        1
    }
}

/// Row-major strides of `shape`.
pub fn strides(shape: &[usize]) -> Vec<usize> {
    let mut strides = vec![1; shape.len()];
    for k in (0..shape.len().saturating_sub(1)).rev() {
        strides[k] = strides[k + 1] * shape[k + 1];
    }
    strides
}

/// For every flat index of `out_shape`, the flat index of the element of a
/// value of `in_shape` that NumPy broadcasting reads there.
///
/// `in_shape` must broadcast to `out_shape`.
pub fn broadcast_source_indices(in_shape: &[usize], out_shape: &[usize]) -> Vec<usize> {
    let total = numel(out_shape);
    if in_shape == out_shape {
        return (0..total).collect();
    }
    if numel(in_shape) == 1 {
        return vec![0; total];
    }
    let rank = out_shape.len();
    let in_strides = strides(in_shape);
    // Stride of the input along each output axis; 0 where the input broadcasts.
    let mut step = vec![0usize; rank];
    for k in 0..rank {
        let offset = rank - in_shape.len();
        if k >= offset && in_shape[k - offset] != 1 {
            step[k] = in_strides[k - offset];
        }
    }
    strided_indices(out_shape, &step)
}

/// For every flat index of `out_shape` in row-major order, the source index
/// reached by moving `steps[k]` elements per step along output axis k (an
/// odometer over the output shape). Broadcasting (steps of 0) and axis
/// permutations (permuted strides) are both this walk.
pub fn strided_indices(out_shape: &[usize], steps: &[usize]) -> Vec<usize> {
    let total = numel(out_shape);
    let mut indices = Vec::with_capacity(total);
    let mut counter = vec![0usize; out_shape.len()];
    let mut source = 0usize;
    for _ in 0..total {
        indices.push(source);
        for k in (0..out_shape.len()).rev() {
            counter[k] += 1;
            source += steps[k];
            if counter[k] < out_shape[k] {
                break;
            }
            source -= steps[k] * counter[k];
            counter[k] = 0;
        }
    }
    indices
}

/// Resolves a possibly negative axis against a rank, NumPy style.
pub fn resolve_axis(axis: i64, rank: usize) -> Option<usize> {
    let rank = rank as i64;
    let resolved = if axis < 0 { axis + rank } else { axis };
    (0..rank).contains(&resolved).then_some(resolved as usize)
}

/// Splits `shape` around `axis` into (outer, length, inner) counts, so the
/// element at (o, k, i) has flat index `(o * length + k) * inner + i`.
pub fn split_at_axis(shape: &[usize], axis: usize) -> (usize, usize, usize) {
    (
        numel(&shape[..axis]),
        shape[axis],
        numel(&shape[axis + 1..]),
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    // Broadcasting rules: NumPy documentation, "Broadcasting" (numpy.org, user guide).
    #[test]
    fn broadcast_shapes_follow_numpy_rules() {
        assert_eq!(
            broadcast_shapes(&[8, 1, 6, 1], &[7, 1, 5]),
            Some(vec![8, 7, 6, 5])
        );
        assert_eq!(broadcast_shapes(&[5, 4], &[1]), Some(vec![5, 4]));
        assert_eq!(broadcast_shapes(&[15, 3, 5], &[3, 1]), Some(vec![15, 3, 5]));
        assert_eq!(broadcast_shapes(&[3], &[4]), None);
        assert_eq!(broadcast_shapes(&[2, 1], &[8, 4, 3]), None);
        assert_eq!(broadcast_shapes(&[], &[2, 3]), Some(vec![2, 3]));
    }

    #[test]
    fn source_indices_repeat_broadcast_axes() {
        assert_eq!(
            broadcast_source_indices(&[3], &[2, 3]),
            vec![0, 1, 2, 0, 1, 2]
        );
        assert_eq!(
            broadcast_source_indices(&[2, 1], &[2, 3]),
            vec![0, 0, 0, 1, 1, 1]
        );
        assert_eq!(broadcast_source_indices(&[], &[2, 2]), vec![0, 0, 0, 0]);
        assert_eq!(broadcast_source_indices(&[1, 3], &[2, 1, 3]).len(), 6);
        assert_eq!(
            broadcast_source_indices(&[2, 1, 2], &[2, 3, 2]),
            vec![0, 1, 0, 1, 0, 1, 2, 3, 2, 3, 2, 3]
        );
    }

    #[test]
    fn axes_resolve_like_numpy() {
        assert_eq!(resolve_axis(-1, 3), Some(2));
        assert_eq!(resolve_axis(3, 3), None);
        assert_eq!(resolve_axis(-4, 3), None);
        assert_eq!(split_at_axis(&[2, 3, 4], 1), (2, 3, 4));
    }

    #[test]
    fn l2_norm_does_not_overflow() {
        assert_eq!(l2_norm(&[3.0, 4.0]), 5.0);
        assert!((l2_norm(&[1e300, 1e300]) - 1e300 * 2f64.sqrt()).abs() < 1e286);
        assert!(l2_norm(&[1.0, f64::NAN]).is_nan());
        assert_eq!(l2_norm(&[1.0, f64::NEG_INFINITY]), f64::INFINITY);
        assert_eq!(l2_norm(&[]), 0.0);
    }

    #[test]
    fn a_scalars_norm_is_what_the_scaled_sum_gives_for_one_element() {
        for x in [
            0.0,
            -0.0,
            1.5,
            -3e300,
            5e-324,
            f64::INFINITY,
            f64::NEG_INFINITY,
        ] {
            assert_eq!(
                Value::Scalar(x).l2_norm().to_bits(),
                l2_norm(&[x]).to_bits(),
                "{x}"
            );
        }
        assert!(Value::Scalar(f64::NAN).l2_norm().is_nan());
    }
}
