//! Element-by-element scans of typed elements, widened to f64 a block at a
//! time instead of into a new vector: the diagnosis looks for the first
//! element that crossed a line in tensors of millions of elements, and a
//! widened copy of each (allocated, faulted in, written, read, freed) cost
//! more than the look itself.

use super::float::{Elements, Float};
use crate::dtype::Dtype;
use half::slice::HalfFloatSliceExt;

/// Elements widened per block: 8 KiB of f64, so a block and its pair stay in L1.
const BLOCK: usize = 1024;

/// Widens `elements[start..start + out.len()]` exactly into `out`.
fn widen_block(elements: Elements<'_>, start: usize, out: &mut [f64]) {
    let end = start + out.len();
    match elements {
        Elements::F64(s) => out.copy_from_slice(&s[start..end]),
        Elements::F32(s) => out
            .iter_mut()
            .zip(&s[start..end])
            .for_each(|(o, &x)| *o = f64::from(x)),
        Elements::F16(s) => s[start..end].convert_to_f64_slice(out),
        Elements::Bf16(s) => s[start..end].convert_to_f64_slice(out),
    }
}

/// Calls `visit(index, x)` for every element in order, `x` widened exactly.
pub fn scan_each(elements: Elements<'_>, mut visit: impl FnMut(usize, f64)) {
    if let Some(s) = elements.as_f64() {
        s.iter().enumerate().for_each(|(index, &x)| visit(index, x));
        return;
    }
    let mut buffer = [0f64; BLOCK];
    let len = elements.len();
    let mut start = 0;
    while start < len {
        let block = &mut buffer[..BLOCK.min(len - start)];
        widen_block(elements, start, block);
        for (offset, &x) in block.iter().enumerate() {
            visit(start + offset, x);
        }
        start += block.len();
    }
}

/// Calls `visit(index, [x, y, …])` for the elements of `inputs` side by
/// side, in order, each widened exactly, a block at a time.
///
/// # Panics
/// If the inputs differ in length (callers compare lengths first).
pub fn scan_zip<const N: usize>(inputs: [Elements<'_>; N], mut visit: impl FnMut(usize, [f64; N])) {
    let len = inputs.first().map_or(0, Elements::len);
    assert!(
        inputs.iter().all(|input| input.len() == len),
        "zipped scans need equally many elements"
    );
    let mut blocks = [[0f64; BLOCK]; N];
    let mut start = 0;
    while start < len {
        let width = BLOCK.min(len - start);
        for (input, block) in inputs.iter().zip(blocks.iter_mut()) {
            widen_block(*input, start, &mut block[..width]);
        }
        // One element from each of N blocks: an index, not an iterator, reads them.
        #[allow(clippy::needless_range_loop)]
        for offset in 0..width {
            visit(start + offset, std::array::from_fn(|k| blocks[k][offset]));
        }
        start += width;
    }
}

/// The first element where `bad(index, x)` holds, with its value and how
/// many elements it holds for.
pub fn first_where(
    elements: Elements<'_>,
    bad: impl Fn(usize, f64) -> bool,
) -> Option<(usize, f64, usize)> {
    let mut first = None;
    let mut count = 0;
    scan_each(elements, |index, x| {
        if bad(index, x) {
            count += 1;
            first.get_or_insert((index, x));
        }
    });
    first.map(|(index, x)| (index, x, count))
}

/// The first element that is subnormal in `dtype`, with how many are: on
/// the bits when the elements are stored in `dtype` (the usual case), else
/// widened.
pub fn first_subnormal(elements: Elements<'_>, dtype: Dtype) -> Option<(usize, f64, usize)> {
    fn typed<T: Float>(s: &[T]) -> Option<(usize, f64, usize)> {
        let count = s.iter().filter(|x| x.is_subnormal()).count();
        let at = s.iter().position(|x| x.is_subnormal())?;
        Some((at, s[at].to_f64(), count))
    }
    if elements.dtype() != dtype {
        return first_where(elements, |_, x| dtype.is_subnormal(x));
    }
    crate::with_elements!(elements, s => typed(s))
}

/// What [`first_pair`] looks for: an element of the sweep under test
/// against the reference's element at the same place.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PairTest {
    /// Zero here, non-zero and finite in the reference: flushed to zero.
    Flushed,
    /// Infinite here, finite in the reference: an overflow of this dtype.
    Overflowed,
}

/// The first place where `test` holds between `a` and the reference `b`,
/// with `b`'s element there and how many places it holds at. Tested on the
/// typed bits and counted branch-free a block at a time, so the many zeros
/// a ReLU leaves cost no mispredicted branch; only a block with a hit is
/// searched.
///
/// # Panics
/// If the two differ in length (callers compare lengths first).
pub fn first_pair(a: Elements<'_>, b: Elements<'_>, test: PairTest) -> Option<(usize, f64, usize)> {
    assert_eq!(a.len(), b.len(), "pairs need equally many elements");
    fn typed<T: Float, U: Float>(a: &[T], b: &[U], test: PairTest) -> Option<(usize, f64, usize)> {
        // The test is chosen outside the loop, so each loop is one plain predicate.
        match test {
            PairTest::Flushed => counted(a, b, |x, y| x.is_zero() & !y.is_zero() & y.finite()),
            // Not finite and equal to itself: infinite, not NaN.
            #[allow(clippy::eq_op)]
            PairTest::Overflowed => counted(a, b, |x, y| !x.finite() & (x == x) & y.finite()),
        }
    }
    fn counted<T: Float, U: Float>(
        a: &[T],
        b: &[U],
        hit: impl Fn(T, U) -> bool,
    ) -> Option<(usize, f64, usize)> {
        let hit = |(&x, &y): (&T, &U)| hit(x, y);
        let (mut first, mut count) = (None, 0);
        for (block, (xs, ys)) in a.chunks(BLOCK).zip(b.chunks(BLOCK)).enumerate() {
            let hits: usize = xs.iter().zip(ys).map(|pair| usize::from(hit(pair))).sum();
            if hits > 0 && first.is_none() {
                let at = xs.iter().zip(ys).position(hit)?;
                first = Some((block * BLOCK + at, ys[at].to_f64()));
            }
            count += hits;
        }
        first.map(|(index, y)| (index, y, count))
    }
    fn of_first<T: Float>(a: &[T], b: Elements<'_>, test: PairTest) -> Option<(usize, f64, usize)> {
        crate::with_elements!(b, b => typed(a, b, test))
    }
    crate::with_elements!(a, a => of_first(a, b, test))
}

#[cfg(test)]
mod tests {
    use super::*;
    use half::{bf16, f16};

    /// The same answers as widening the whole tensor first, in every dtype,
    /// across block boundaries (the plain loop over a widened copy is the
    /// reference: common practice).
    #[test]
    fn scans_agree_with_a_widened_copy_in_every_dtype() {
        let data: Vec<f64> = (0..2500)
            .map(|i| match i % 7 {
                0 => 0.0,
                3 => 2f64.powi(-20) * (i as f64),
                // Below f16's smallest subnormal for small i: flushed there.
                5 => 1e-9 * (i as f64),
                _ => ((i as f64) * 0.618034).fract() - 0.5,
            })
            .collect();
        let f32s: Vec<f32> = data.iter().map(|&x| x as f32).collect();
        let f16s: Vec<f16> = data.iter().map(|&x| f16::from_f64(x)).collect();
        let bf16s: Vec<bf16> = data.iter().map(|&x| bf16::from_f64(x)).collect();
        let all = [
            Elements::F64(&data),
            Elements::F32(&f32s),
            Elements::F16(&f16s),
            Elements::Bf16(&bf16s),
        ];
        for elements in all {
            let widened = elements.to_vec_f64();
            let mut seen = Vec::new();
            scan_each(elements, |index, x| seen.push((index, x)));
            let expected: Vec<(usize, f64)> = widened.iter().copied().enumerate().collect();
            assert_eq!(seen, expected, "{:?}", elements.dtype());
            for dtype in [Dtype::F64, Dtype::F32, Dtype::F16, Dtype::Bf16] {
                let subnormal = |_: usize, x: f64| dtype.is_subnormal(x);
                assert_eq!(
                    first_subnormal(elements, dtype),
                    first_where(elements, subnormal),
                    "{dtype:?} in {:?}",
                    elements.dtype()
                );
            }
            let small = |_: usize, x: f64| x != 0.0 && x.abs() < 1e-3;
            let plain = widened.iter().position(|&x| small(0, x)).map(|at| {
                (
                    at,
                    widened[at],
                    widened.iter().filter(|&&x| small(0, x)).count(),
                )
            });
            assert_eq!(first_where(elements, small), plain);
            // Zero here, not in the f64 original: what a flush to zero looks like.
            let flushed = |x: f64, y: f64| x == 0.0 && y != 0.0;
            let plain = (0..data.len())
                .find(|&k| flushed(widened[k], data[k]))
                .map(|at| {
                    let count = (0..data.len())
                        .filter(|&k| flushed(widened[k], data[k]))
                        .count();
                    (at, data[at], count)
                });
            assert_eq!(
                first_pair(elements, Elements::F64(&data), PairTest::Flushed),
                plain
            );
        }
        assert_eq!(first_where(Elements::F32(&[]), |_, _| true), None);
        let f32s: Vec<f32> = data.iter().map(|&x| x as f32).collect();
        let mut seen = Vec::new();
        scan_zip(
            [
                Elements::F64(&data),
                Elements::F32(&f32s),
                Elements::F16(&f16s),
            ],
            |index, [x, y, z]| seen.push((index, x, y, z)),
        );
        let expected: Vec<_> = (0..data.len())
            .map(|k| (k, data[k], f64::from(f32s[k]), f16s[k].to_f64()))
            .collect();
        assert_eq!(seen, expected);
        // Infinite here, finite in the reference: what an overflow looks like.
        let here = [1.0f32, f32::INFINITY, f32::NAN, f32::NEG_INFINITY, 0.0];
        let there = [1.0, 1e39, 2.0, f64::NEG_INFINITY, -1e39];
        assert_eq!(
            first_pair(
                Elements::F32(&here),
                Elements::F64(&there),
                PairTest::Overflowed
            ),
            Some((1, 1e39, 1))
        );
    }
}
