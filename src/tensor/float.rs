//! The element types a tensor can be stored in, one per dtype, and the
//! conversions between them and the `f64` the op rules compute in.

use crate::dtype::Dtype;
use half::slice::HalfFloatSliceExt;
use half::{bf16, f16};

/// An element type of tensor storage.
///
/// Values are rounded into their dtype before they are stored (see
/// [`Dtype::round`]), so `from_f64` only ever sees representable numbers and
/// never rounds; it still rounds to nearest, ties to even, if given one that
/// is not.
pub trait Float: Copy + Send + Sync + PartialEq + std::fmt::Debug + 'static {
    /// The dtype this type stores.
    const DTYPE: Dtype;
    /// Widens exactly.
    fn to_f64(self) -> f64;
    /// Narrows, rounding to nearest even.
    fn from_f64(x: f64) -> Self;
    /// The elements as a slice of this type, when they are of it.
    fn view(elements: Elements<'_>) -> Option<&[Self]>;
    /// Owned elements of this type as a buffer.
    fn buffer(data: Vec<Self>) -> Buffer;
    /// Neither NaN nor infinite (branch-free, so scans vectorise).
    fn finite(self) -> bool;
    /// Zero of either sign (on the bits where that is cheaper).
    fn is_zero(self) -> bool;
    /// Non-zero and below this type's smallest normal magnitude, on the bits.
    fn is_subnormal(self) -> bool;
    /// The elements as f32s in place, when they are f32s.
    fn as_f32(_: &[Self]) -> Option<&[f32]> {
        None
    }
    /// f32s converted into this type, each rounded once to nearest, ties to
    /// even: the same numbers as through f64 (an f32 is exact there), by the
    /// processor's own conversion where it has one.
    fn from_f32_slice(data: &[f32]) -> Vec<Self> {
        data.iter().map(|&x| Self::from_f64(f64::from(x))).collect()
    }
    /// [`Float::from_f32_slice`] taking the vector (kept as it is for f32).
    fn from_f32_vec(data: Vec<f32>) -> Vec<Self> {
        Self::from_f32_slice(&data)
    }
    /// The elements widened exactly into f32s by the processor's own
    /// conversion, for the half-precision types (every f16 and bf16 is an f32).
    fn widened_to_f32(_: &[Self]) -> Option<Vec<f32>> {
        None
    }
}

impl Float for f64 {
    const DTYPE: Dtype = Dtype::F64;
    #[inline]
    fn view(elements: Elements<'_>) -> Option<&[f64]> {
        match elements {
            Elements::F64(s) => Some(s),
            _ => None,
        }
    }
    fn buffer(data: Vec<f64>) -> Buffer {
        Buffer::F64(data)
    }
    #[inline]
    fn to_f64(self) -> f64 {
        self
    }
    #[inline]
    fn from_f64(x: f64) -> f64 {
        x
    }
    #[inline]
    fn finite(self) -> bool {
        self.is_finite()
    }
    #[inline]
    fn is_zero(self) -> bool {
        self == 0.0
    }
    #[inline]
    fn is_subnormal(self) -> bool {
        let bits = self.to_bits() & 0x7fff_ffff_ffff_ffff;
        bits != 0 && bits < 0x0010_0000_0000_0000
    }
}

impl Float for f32 {
    const DTYPE: Dtype = Dtype::F32;
    #[inline]
    fn view(elements: Elements<'_>) -> Option<&[f32]> {
        match elements {
            Elements::F32(s) => Some(s),
            _ => None,
        }
    }
    fn buffer(data: Vec<f32>) -> Buffer {
        Buffer::F32(data)
    }
    #[inline]
    fn to_f64(self) -> f64 {
        self as f64
    }
    #[inline]
    fn from_f64(x: f64) -> f32 {
        x as f32
    }
    #[inline]
    fn finite(self) -> bool {
        self.is_finite()
    }
    #[inline]
    fn is_zero(self) -> bool {
        self == 0.0
    }
    #[inline]
    fn is_subnormal(self) -> bool {
        let bits = self.to_bits() & 0x7fff_ffff;
        bits != 0 && bits < 0x0080_0000
    }
    fn as_f32(s: &[f32]) -> Option<&[f32]> {
        Some(s)
    }
    fn from_f32_slice(data: &[f32]) -> Vec<f32> {
        data.to_vec()
    }
    fn from_f32_vec(data: Vec<f32>) -> Vec<f32> {
        data
    }
}

impl Float for f16 {
    const DTYPE: Dtype = Dtype::F16;
    #[inline]
    fn view(elements: Elements<'_>) -> Option<&[f16]> {
        match elements {
            Elements::F16(s) => Some(s),
            _ => None,
        }
    }
    fn buffer(data: Vec<f16>) -> Buffer {
        Buffer::F16(data)
    }
    #[inline]
    fn to_f64(self) -> f64 {
        f16::to_f64(self)
    }
    #[inline]
    fn from_f64(x: f64) -> f16 {
        // Through f32 rounded to odd: one correct rounding, never two (see
        // `dtype::to_f32_odd`), by the processor's conversion where it has one.
        f16::from_f32(crate::dtype::to_f32_odd(x))
    }
    #[inline]
    fn finite(self) -> bool {
        // binary16: the exponent field all ones is infinity or NaN.
        self.to_bits() & 0x7c00 != 0x7c00
    }
    #[inline]
    fn is_zero(self) -> bool {
        self.to_bits() & 0x7fff == 0
    }
    #[inline]
    fn is_subnormal(self) -> bool {
        // binary16: a zero exponent field below 2^-14.
        let bits = self.to_bits() & 0x7fff;
        bits != 0 && bits < 0x0400
    }
    fn from_f32_slice(data: &[f32]) -> Vec<f16> {
        let mut out = vec![f16::ZERO; data.len()];
        out.convert_from_f32_slice(data);
        out
    }
    fn widened_to_f32(data: &[f16]) -> Option<Vec<f32>> {
        Some(data.to_f32_vec())
    }
}

impl Float for bf16 {
    const DTYPE: Dtype = Dtype::Bf16;
    #[inline]
    fn view(elements: Elements<'_>) -> Option<&[bf16]> {
        match elements {
            Elements::Bf16(s) => Some(s),
            _ => None,
        }
    }
    fn buffer(data: Vec<bf16>) -> Buffer {
        Buffer::Bf16(data)
    }
    #[inline]
    fn to_f64(self) -> f64 {
        bf16::to_f64(self)
    }
    #[inline]
    fn from_f64(x: f64) -> bf16 {
        bf16::from_f32(crate::dtype::to_f32_odd(x))
    }
    #[inline]
    fn finite(self) -> bool {
        self.to_bits() & 0x7f80 != 0x7f80
    }
    #[inline]
    fn is_zero(self) -> bool {
        self.to_bits() & 0x7fff == 0
    }
    #[inline]
    fn is_subnormal(self) -> bool {
        // bfloat16: f32's exponent field, so a zero one below 2^-126.
        let bits = self.to_bits() & 0x7fff;
        bits != 0 && bits < 0x0080
    }
    fn from_f32_slice(data: &[f32]) -> Vec<bf16> {
        let mut out = vec![bf16::ZERO; data.len()];
        out.convert_from_f32_slice(data);
        out
    }
    fn widened_to_f32(data: &[bf16]) -> Option<Vec<f32>> {
        Some(data.to_f32_vec())
    }
}

/// A tensor's elements as a typed slice.
#[derive(Debug, Clone, Copy)]
pub enum Elements<'a> {
    /// binary64.
    F64(&'a [f64]),
    /// binary32.
    F32(&'a [f32]),
    /// binary16.
    F16(&'a [f16]),
    /// bfloat16.
    Bf16(&'a [bf16]),
}

/// Runs `$body` with `$s` bound to the typed slice inside an [`Elements`].
#[macro_export]
#[doc(hidden)]
macro_rules! with_elements {
    ($elements:expr, $s:ident => $body:expr) => {
        match $elements {
            $crate::tensor::Elements::F64($s) => $body,
            $crate::tensor::Elements::F32($s) => $body,
            $crate::tensor::Elements::F16($s) => $body,
            $crate::tensor::Elements::Bf16($s) => $body,
        }
    };
}

impl<'a> Elements<'a> {
    /// The dtype of the elements.
    pub fn dtype(&self) -> Dtype {
        match self {
            Elements::F64(_) => Dtype::F64,
            Elements::F32(_) => Dtype::F32,
            Elements::F16(_) => Dtype::F16,
            Elements::Bf16(_) => Dtype::Bf16,
        }
    }

    /// Number of elements.
    pub fn len(&self) -> usize {
        with_elements!(self, s => s.len())
    }

    /// True when there are none.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Element `i`, widened.
    #[inline]
    pub fn get(&self, i: usize) -> f64 {
        with_elements!(self, s => s[i].to_f64())
    }

    /// Visits every element in order, widened one at a time.
    #[inline]
    pub fn for_each(&self, mut visit: impl FnMut(f64)) {
        with_elements!(self, s => s.iter().for_each(|x| visit(x.to_f64())))
    }

    /// All elements widened into a new vector.
    pub fn to_vec_f64(&self) -> Vec<f64> {
        with_elements!(self, s => s.iter().map(|x| x.to_f64()).collect())
    }

    /// The elements as f64s in place, when they are f64s.
    pub fn as_f64(&self) -> Option<&'a [f64]> {
        match self {
            Elements::F64(s) => Some(s),
            _ => None,
        }
    }

    /// The first element that is NaN or infinite, with its index. Scans in
    /// branch-free blocks, so a finite tensor costs about a memory read.
    pub fn first_non_finite(&self) -> Option<(usize, f64)> {
        fn scan<T: Float>(s: &[T]) -> Option<(usize, f64)> {
            const BLOCK: usize = 1024;
            for (block, chunk) in s.chunks(BLOCK).enumerate() {
                if chunk.iter().fold(true, |ok, x| ok & x.finite()) {
                    continue;
                }
                let at = chunk.iter().position(|x| !x.finite())?;
                return Some((block * BLOCK + at, chunk[at].to_f64()));
            }
            None
        }
        with_elements!(self, s => scan(s))
    }

    /// How many elements are NaN or infinite.
    pub fn count_non_finite(&self) -> usize {
        with_elements!(self, s => s.iter().filter(|x| !x.finite()).count())
    }

    /// Size in bytes.
    pub fn bytes(&self) -> usize {
        self.len() * self.dtype().width()
    }
}

/// Owned elements of one dtype.
#[derive(Debug, Clone, PartialEq)]
pub enum Buffer {
    /// binary64.
    F64(Vec<f64>),
    /// binary32.
    F32(Vec<f32>),
    /// binary16.
    F16(Vec<f16>),
    /// bfloat16.
    Bf16(Vec<bf16>),
}

impl Buffer {
    /// The elements as a typed slice.
    pub fn elements(&self) -> Elements<'_> {
        match self {
            Buffer::F64(v) => Elements::F64(v),
            Buffer::F32(v) => Elements::F32(v),
            Buffer::F16(v) => Elements::F16(v),
            Buffer::Bf16(v) => Elements::Bf16(v),
        }
    }

    /// `data` (already rounded into `dtype`, or rounded here) stored as `dtype`.
    pub fn from_f64(dtype: Dtype, data: &[f64]) -> Buffer {
        match dtype {
            Dtype::F64 => Buffer::F64(data.to_vec()),
            Dtype::F32 => Buffer::F32(narrow(data)),
            Dtype::F16 => Buffer::F16(narrow(data)),
            Dtype::Bf16 => Buffer::Bf16(narrow(data)),
        }
    }

    /// `data` stored as `dtype`, taking the vector when it is f64 already.
    pub fn from_vec(dtype: Dtype, data: Vec<f64>) -> Buffer {
        match dtype {
            Dtype::F64 => Buffer::F64(data),
            _ => Buffer::from_f64(dtype, &data),
        }
    }

    /// Elements converted into `dtype` (a copy; the same storage when equal).
    pub fn converted(elements: Elements<'_>, dtype: Dtype) -> Buffer {
        fn from<T: Float>(s: &[T], dtype: Dtype) -> Buffer {
            match dtype {
                Dtype::F64 => Buffer::F64(convert(s)),
                Dtype::F32 => Buffer::F32(convert(s)),
                Dtype::F16 => Buffer::F16(convert(s)),
                Dtype::Bf16 => Buffer::Bf16(convert(s)),
            }
        }
        with_elements!(elements, s => from(s, dtype))
    }

    /// Applies `f` to every element in place, computing in f64 and rounding
    /// the result into the buffer's dtype.
    pub fn map_in_place(&mut self, f: impl Fn(f64) -> f64) {
        fn apply<T: Float>(v: &mut [T], f: impl Fn(f64) -> f64) {
            v.iter_mut().for_each(|x| *x = T::from_f64(f(x.to_f64())));
        }
        match self {
            Buffer::F64(v) => apply(v, f),
            Buffer::F32(v) => apply(v, f),
            Buffer::F16(v) => apply(v, f),
            Buffer::Bf16(v) => apply(v, f),
        }
    }

    /// Sets element `i`, rounding `x` into the buffer's dtype.
    pub fn set(&mut self, i: usize, x: f64) {
        match self {
            Buffer::F64(v) => v[i] = x,
            Buffer::F32(v) => v[i] = Float::from_f64(x),
            Buffer::F16(v) => v[i] = Float::from_f64(x),
            Buffer::Bf16(v) => v[i] = Float::from_f64(x),
        }
    }

    /// Number of elements.
    pub fn len(&self) -> usize {
        self.elements().len()
    }

    /// True when there are none.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

/// The elements as a slice of `T`: borrowed when they are of that type,
/// else converted (a temporary for one computation).
pub fn elements_as<T: Float>(elements: Elements<'_>) -> std::borrow::Cow<'_, [T]> {
    match T::view(elements) {
        Some(s) => std::borrow::Cow::Borrowed(s),
        None => std::borrow::Cow::Owned(with_elements!(elements, s => convert(s))),
    }
}

/// `f64`s narrowed into `T`.
pub fn narrow<T: Float>(data: &[f64]) -> Vec<T> {
    data.iter().map(|&x| T::from_f64(x)).collect()
}

/// Elements of one type converted into another: the numbers are those of
/// the way through f64 (exact widening, then one rounding), taken by the
/// vectorised f32 conversions where the source is f32.
pub fn convert<S: Float, T: Float>(data: &[S]) -> Vec<T> {
    if let Some(singles) = S::as_f32(data) {
        return T::from_f32_slice(singles);
    }
    if let Some(singles) = S::widened_to_f32(data) {
        return T::from_f32_vec(singles);
    }
    data.iter().map(|x| T::from_f64(x.to_f64())).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// `x` rounded into `dtype` by the independent scaled-integer method
    /// (`dtype::round_to_format`), not by any path under test; exact results
    /// convert into the half types without a further rounding.
    fn oracle(dtype: Dtype, x: f64) -> f64 {
        match dtype {
            Dtype::F64 => x,
            Dtype::F32 => x as f32 as f64,
            Dtype::F16 | Dtype::Bf16 => crate::dtype::round_to_format(x, dtype.limits()),
        }
    }

    /// The vectorised f32 conversions give the numbers of the independent
    /// scaled-integer rounding (tested against IEEE 754-2019 binary16 and
    /// Intel's bfloat16 probes in `dtype`), bit for bit: a sweep of bit patterns covering
    /// every exponent, plus each f16 and bf16 rounding boundary and its
    /// neighbours (ties go to even), subnormals, overflow and NaN.
    #[test]
    fn f32_conversions_round_as_the_independent_rounding() {
        let mut singles: Vec<f32> = (0..=u32::MAX).step_by(4093).map(f32::from_bits).collect();
        for bits in 0..=u16::MAX {
            // The midpoint above each f16 and each bf16, and its neighbours.
            let half = f16::from_bits(bits).to_f32();
            let next = f16::from_bits(bits.wrapping_add(1)).to_f32();
            let brain = bf16::from_bits(bits).to_f32();
            let brain_next = bf16::from_bits(bits.wrapping_add(1)).to_f32();
            for middle in [
                (half + next) / 2.0,
                f32::from_bits(brain.to_bits() | 0x8000),
                brain_next,
            ] {
                for delta in [-1i64, 0, 1] {
                    let bits = (i64::from(middle.to_bits()) + delta).clamp(0, i64::from(u32::MAX));
                    singles.push(f32::from_bits(bits as u32));
                }
            }
        }
        singles.extend([65519.996, 65520.0, f32::MAX, f32::INFINITY, -0.0, f32::NAN]);
        let fast: Vec<f16> = convert(&singles);
        for (&x, y) in singles.iter().zip(&fast) {
            let expected = f16::from_f64(oracle(Dtype::F16, f64::from(x)));
            assert!(
                y.to_bits() == expected.to_bits() || (y.is_nan() && expected.is_nan()),
                "f16 of {x:e} ({:#x}): {:#x} against {:#x}",
                x.to_bits(),
                y.to_bits(),
                expected.to_bits()
            );
        }
        let fast: Vec<bf16> = convert(&singles);
        for (&x, y) in singles.iter().zip(&fast) {
            let expected = bf16::from_f64(oracle(Dtype::Bf16, f64::from(x)));
            assert!(
                y.to_bits() == expected.to_bits() || (y.is_nan() && expected.is_nan()),
                "bf16 of {x:e} ({:#x}): {:#x} against {:#x}",
                x.to_bits(),
                y.to_bits(),
                expected.to_bits()
            );
        }
    }

    /// Every f16 and every bf16 (all 2^16 patterns each) converted into every
    /// other type agrees with the independent rounding, bit for bit (NaN as NaN).
    #[test]
    fn half_conversions_agree_with_the_independent_rounding() {
        fn check<S: Float, T: Float>(data: &[S]) {
            let fast: Vec<T> = convert(data);
            for (x, y) in data.iter().zip(&fast) {
                let (y, expected) = (y.to_f64(), oracle(T::DTYPE, x.to_f64()));
                assert!(
                    y.to_bits() == expected.to_bits() || (y.is_nan() && expected.is_nan()),
                    "{x:?} into {:?}: {y:e} against {expected:e}",
                    T::DTYPE
                );
            }
        }
        let halves: Vec<f16> = (0..=u16::MAX).map(f16::from_bits).collect();
        let brains: Vec<bf16> = (0..=u16::MAX).map(bf16::from_bits).collect();
        check::<f16, f64>(&halves);
        check::<f16, f32>(&halves);
        check::<f16, bf16>(&halves);
        check::<bf16, f64>(&brains);
        check::<bf16, f32>(&brains);
        check::<bf16, f16>(&brains);
    }

    #[test]
    fn conversions_are_exact_for_representable_values_and_round_otherwise() {
        // 2^-24 is the smallest f16 subnormal; 65504 its largest finite value
        // (IEEE 754-2019, table 3.5, binary16).
        for x in [0.0, -0.0, 1.0, 65504.0, 2f64.powi(-24), -3.5] {
            assert_eq!(f16::from_f64(x).to_f64(), x);
            assert_eq!(<f16 as Float>::from_f64(x).to_f64(), x);
        }
        assert_eq!(<f16 as Float>::from_f64(1e6).to_f64(), f64::INFINITY);
        // 1 + 2^-11 is halfway between f16's 1 and 1 + 2^-10: ties to even.
        assert_eq!(<f16 as Float>::from_f64(1.0 + 2f64.powi(-11)).to_f64(), 1.0);
        assert_eq!(<bf16 as Float>::from_f64(1.0 + 2f64.powi(-8)).to_f64(), 1.0);
        let buffer = Buffer::from_f64(Dtype::F32, &[0.1, f64::NAN]);
        assert_eq!(buffer.elements().get(0), 0.1f32 as f64);
        assert!(buffer.elements().get(1).is_nan());
        assert_eq!(
            Buffer::converted(buffer.elements(), Dtype::F64)
                .elements()
                .dtype(),
            Dtype::F64
        );
    }
}
