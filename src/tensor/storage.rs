//! Where a tensor's elements live: an owned buffer of the tensor's dtype, or
//! a range of a memory-mapped sidecar that is used in place, without a copy.
//! Nothing is widened to f64 here: a tensor recorded in f16 takes 2 bytes an
//! element from the file through the sweep.

use super::float::{Buffer, Elements};
use crate::dtype::Dtype;
use half::{bf16, f16};
use memmap2::Mmap;
use std::sync::Arc;

/// A checked range of a mapped sidecar holding one tensor's elements, in
/// place: little-endian, aligned for the element type.
#[derive(Clone)]
pub struct Mapped {
    map: Arc<Mmap>,
    /// Byte offset of the first element.
    start: usize,
    /// Number of elements.
    len: usize,
    dtype: Dtype,
}

impl Mapped {
    /// A range of `len` elements of `dtype` at byte `start` of `map`, or
    /// `None` when it does not lie inside the mapping (checked arithmetic: a
    /// lying header cannot make this read outside the file), when it is not
    /// aligned for the element type, or on a big-endian machine. Callers copy
    /// such ranges into an owned buffer instead.
    pub fn new(map: Arc<Mmap>, start: usize, len: usize, dtype: Dtype) -> Option<Mapped> {
        let end = len.checked_mul(dtype.width())?.checked_add(start)?;
        let aligned = (map.as_ptr() as usize)
            .checked_add(start)?
            .is_multiple_of(dtype.width());
        (end <= map.len() && aligned && cfg!(target_endian = "little")).then_some(Mapped {
            map,
            start,
            len,
            dtype,
        })
    }

    /// The elements in place.
    pub fn elements(&self) -> Elements<'_> {
        let bytes = &self.map[self.start..self.start + self.len * self.dtype.width()];
        // SAFETY: the range lies inside the mapping and is aligned for the
        // element type (both checked in `new`); every bit pattern is a valid
        // f64, f32, f16 or bf16; the bytes are little-endian like this machine
        // (checked in `new`); and the mapping lives as long as `self` through
        // the Arc. The mapping is read-only.
        unsafe {
            let ptr = bytes.as_ptr();
            match self.dtype {
                Dtype::F64 => {
                    Elements::F64(std::slice::from_raw_parts(ptr.cast::<f64>(), self.len))
                }
                Dtype::F32 => {
                    Elements::F32(std::slice::from_raw_parts(ptr.cast::<f32>(), self.len))
                }
                Dtype::F16 => {
                    Elements::F16(std::slice::from_raw_parts(ptr.cast::<f16>(), self.len))
                }
                Dtype::Bf16 => {
                    Elements::Bf16(std::slice::from_raw_parts(ptr.cast::<bf16>(), self.len))
                }
            }
        }
    }

    /// Number of elements.
    pub fn len(&self) -> usize {
        self.len
    }

    /// True for an empty range.
    pub fn is_empty(&self) -> bool {
        self.len == 0
    }
}

/// A tensor's elements.
///
/// Owned elements are shared: values are never changed in place but through
/// [`Storage::make_owned`], which copies when another value shares them. So
/// a contribution that is its consumer's adjoint unchanged (an add's), a
/// ledger entry or a reshape costs no copy.
#[derive(Clone)]
pub(crate) enum Storage {
    /// Elements in memory.
    Owned(Arc<Buffer>),
    /// Elements in a mapped sidecar.
    Mapped(Mapped),
}

impl Storage {
    pub(crate) fn owned(buffer: Buffer) -> Storage {
        Storage::Owned(Arc::new(buffer))
    }

    pub(crate) fn elements(&self) -> Elements<'_> {
        match self {
            Storage::Owned(buffer) => buffer.elements(),
            Storage::Mapped(mapped) => mapped.elements(),
        }
    }

    /// Makes the elements owned and unshared (copying a mapped range, or
    /// elements another value shares) and returns them.
    pub(crate) fn make_owned(&mut self) -> &mut Buffer {
        if let Storage::Mapped(mapped) = self {
            *self = Storage::owned(Buffer::converted(mapped.elements(), mapped.dtype));
        }
        match self {
            Storage::Owned(buffer) => Arc::make_mut(buffer),
            Storage::Mapped(_) => unreachable!("converted above"),
        }
    }

    pub(crate) fn is_mapped(&self) -> bool {
        matches!(self, Storage::Mapped(_))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use memmap2::MmapMut;

    fn map_of(bytes: &[u8]) -> Arc<Mmap> {
        let mut map = MmapMut::map_anon(bytes.len()).unwrap();
        map.copy_from_slice(bytes);
        Arc::new(map.make_read_only().unwrap())
    }

    #[test]
    fn mapped_ranges_read_little_endian_elements_in_place() {
        let mut bytes = vec![0u8; 8];
        for x in [1.5f64, -0.0, f64::INFINITY] {
            bytes.extend_from_slice(&x.to_le_bytes());
        }
        for x in [0.1f32, f32::NAN] {
            bytes.extend_from_slice(&x.to_le_bytes());
        }
        for x in [f16::from_f32(0.5), f16::NEG_INFINITY] {
            bytes.extend_from_slice(&x.to_le_bytes());
        }
        let map = map_of(&bytes);
        let wide = Mapped::new(Arc::clone(&map), 8, 3, Dtype::F64).unwrap();
        assert_eq!(wide.elements().get(0), 1.5);
        assert!(wide.elements().get(1).is_sign_negative());
        assert_eq!(wide.elements().get(2), f64::INFINITY);
        let narrow = Mapped::new(Arc::clone(&map), 32, 2, Dtype::F32).unwrap();
        assert_eq!(narrow.elements().get(0), 0.1f32 as f64);
        assert!(narrow.elements().get(1).is_nan());
        let half = Mapped::new(Arc::clone(&map), 40, 2, Dtype::F16).unwrap();
        assert_eq!(half.elements().to_vec_f64(), vec![0.5, f64::NEG_INFINITY]);
    }

    #[test]
    fn ranges_outside_the_mapping_or_misaligned_are_refused() {
        let map = map_of(&[0u8; 16]);
        assert!(Mapped::new(Arc::clone(&map), 8, 1, Dtype::F64).is_some());
        assert!(Mapped::new(Arc::clone(&map), 9, 1, Dtype::F64).is_none());
        assert!(
            Mapped::new(Arc::clone(&map), 2, 1, Dtype::F32).is_none(),
            "misaligned"
        );
        assert!(
            Mapped::new(Arc::clone(&map), 0, usize::MAX / 2, Dtype::F64).is_none(),
            "overflowing sizes are refused"
        );
        assert!(Mapped::new(map, usize::MAX, 1, Dtype::F32).is_none());
    }
}
