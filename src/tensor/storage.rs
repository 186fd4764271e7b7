//! Where a tensor's elements live: owned `f64`s, or a range of a
//! memory-mapped sidecar file that is read only when someone looks.
//!
//! A mapped f64 range on a little-endian machine is used in place, without a
//! copy; a mapped f32 range is widened to `f64` on first access and the wide
//! copy kept. Summaries can walk the narrow elements without widening, so a
//! trace can be opened and summarised in about the sidecar's size of memory.

use memmap2::Mmap;
use serde::{Deserialize, Serialize};
use std::sync::{Arc, OnceLock};

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
        match self {
            Element::F32 => 4,
            Element::F64 => 8,
        }
    }

    /// The name used in headers and messages.
    pub fn name(self) -> &'static str {
        match self {
            Element::F32 => "f32",
            Element::F64 => "f64",
        }
    }

    /// Decodes one element from exactly `width()` little-endian bytes.
    #[inline]
    fn decode(self, bytes: &[u8]) -> f64 {
        match self {
            Element::F32 => f32::from_le_bytes(bytes.try_into().expect("4 bytes")) as f64,
            Element::F64 => f64::from_le_bytes(bytes.try_into().expect("8 bytes")),
        }
    }
}

/// A checked range of a mapped sidecar holding one tensor's elements.
pub struct Mapped {
    map: Arc<Mmap>,
    /// Byte offset of the first element.
    start: usize,
    /// Number of elements.
    len: usize,
    element: Element,
    /// The elements widened to f64, made on first access when they cannot be used in place.
    widened: OnceLock<Box<[f64]>>,
}

impl Mapped {
    /// A range of `len` elements at byte `start` of `map`, or `None` when it
    /// does not lie inside the mapping (checked arithmetic: a lying header
    /// cannot make this read outside the file).
    pub fn new(map: Arc<Mmap>, start: usize, len: usize, element: Element) -> Option<Mapped> {
        let end = len.checked_mul(element.width())?.checked_add(start)?;
        (end <= map.len()).then(|| Mapped {
            map,
            start,
            len,
            element,
            widened: OnceLock::new(),
        })
    }

    fn bytes(&self) -> &[u8] {
        &self.map[self.start..self.start + self.len * self.element.width()]
    }

    /// The elements in place, when they are f64s this machine can read directly.
    fn in_place(&self) -> Option<&[f64]> {
        if self.element != Element::F64 || cfg!(target_endian = "big") {
            return None;
        }
        let bytes = self.bytes();
        if !(bytes.as_ptr() as usize).is_multiple_of(std::mem::align_of::<f64>()) {
            return None;
        }
        // SAFETY: the range lies inside the mapping (checked in `new`), the
        // pointer is aligned for f64 (checked above), every bit pattern is a
        // valid f64, the bytes are little-endian like this machine, and the
        // mapping lives as long as `self` through the Arc. The mapping is
        // read-only; a file changed by another process underneath it is the
        // usual caveat of memory maps (see traces/FORMAT.md).
        Some(unsafe { std::slice::from_raw_parts(bytes.as_ptr().cast::<f64>(), self.len) })
    }

    /// The elements as f64s.
    pub fn data(&self) -> &[f64] {
        if let Some(data) = self.in_place() {
            return data;
        }
        self.widened
            .get_or_init(|| self.narrow_elements().collect())
    }

    /// True once a widened copy has been made.
    pub fn is_widened(&self) -> bool {
        self.widened.get().is_some()
    }

    /// The elements decoded one by one, without keeping a widened copy.
    pub fn narrow_elements(&self) -> impl Iterator<Item = f64> + '_ {
        let element = self.element;
        self.bytes()
            .chunks_exact(element.width())
            .map(move |chunk| element.decode(chunk))
    }

    /// True once the elements are available as f64s without decoding.
    pub fn is_wide(&self) -> bool {
        self.in_place().is_some() || self.widened.get().is_some()
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

impl Clone for Mapped {
    /// Shares the mapping; a widened copy is not duplicated but made again on demand.
    fn clone(&self) -> Mapped {
        Mapped {
            map: Arc::clone(&self.map),
            start: self.start,
            len: self.len,
            element: self.element,
            widened: OnceLock::new(),
        }
    }
}

/// A tensor's elements.
#[derive(Clone)]
pub(crate) enum Storage {
    /// Elements in memory.
    Owned(Vec<f64>),
    /// Elements in a mapped sidecar.
    Mapped(Mapped),
}

impl Storage {
    /// True when the elements are mapped and a widened f64 copy of them is held.
    pub(crate) fn is_widened(&self) -> bool {
        matches!(self, Storage::Mapped(mapped) if mapped.is_widened())
    }

    pub(crate) fn data(&self) -> &[f64] {
        match self {
            Storage::Owned(data) => data,
            Storage::Mapped(mapped) => mapped.data(),
        }
    }

    /// Makes the elements owned (copying a mapped range) and returns them.
    pub(crate) fn make_owned(&mut self) -> &mut Vec<f64> {
        if let Storage::Mapped(mapped) = self {
            *self = Storage::Owned(mapped.data().to_vec());
        }
        match self {
            Storage::Owned(data) => data,
            Storage::Mapped(_) => unreachable!("converted above"),
        }
    }

    /// Visits every element in order without widening a mapped f32 range.
    pub(crate) fn for_each(&self, mut visit: impl FnMut(f64)) {
        match self {
            Storage::Owned(data) => data.iter().for_each(|&x| visit(x)),
            Storage::Mapped(mapped) if mapped.is_wide() => {
                mapped.data().iter().for_each(|&x| visit(x))
            }
            Storage::Mapped(mapped) => mapped.narrow_elements().for_each(visit),
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
    fn mapped_ranges_decode_little_endian_elements() {
        let mut bytes = vec![0u8; 8];
        for x in [1.5f64, -0.0, f64::INFINITY] {
            bytes.extend_from_slice(&x.to_le_bytes());
        }
        for x in [0.1f32, f32::NAN] {
            bytes.extend_from_slice(&x.to_le_bytes());
        }
        let map = map_of(&bytes);
        let wide = Mapped::new(Arc::clone(&map), 8, 3, Element::F64).unwrap();
        assert!(wide.is_wide(), "aligned f64s are used in place");
        assert_eq!(wide.data()[0], 1.5);
        assert!(wide.data()[1].is_sign_negative());
        assert_eq!(wide.data()[2], f64::INFINITY);
        let narrow = Mapped::new(Arc::clone(&map), 32, 2, Element::F32).unwrap();
        assert!(!narrow.is_wide());
        assert_eq!(narrow.data()[0], 0.1f32 as f64);
        assert!(narrow.data()[1].is_nan());
        assert!(narrow.is_wide());
    }

    #[test]
    fn ranges_outside_the_mapping_are_refused() {
        let map = map_of(&[0u8; 16]);
        assert!(Mapped::new(Arc::clone(&map), 8, 1, Element::F64).is_some());
        assert!(Mapped::new(Arc::clone(&map), 9, 1, Element::F64).is_none());
        assert!(
            Mapped::new(Arc::clone(&map), 0, usize::MAX / 2, Element::F64).is_none(),
            "overflowing sizes are refused"
        );
        assert!(Mapped::new(map, usize::MAX, 1, Element::F32).is_none());
    }
}
