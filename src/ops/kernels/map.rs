//! Elementwise work over typed storage: each output element is computed in
//! f64 from widened inputs and rounded into the output's dtype. Inputs are
//! widened a chunk at a time into small buffers, so nothing the size of a
//! tensor is ever widened; above [`PARALLEL_THRESHOLD`] elements the chunks
//! run on all cores. Every output element depends on its own inputs only, so
//! the bits are the same on any number of threads.

use super::{CHUNK, PARALLEL_THRESHOLD};
use crate::dtype::Dtype;
use crate::tensor::{Buffer, Elements, Float};
use rayon::prelude::*;

/// Widens elements `start..start + out.len()` of `elements` into `out`. An
/// input shorter than the range repeats with its own length as the period:
/// a one-element input, or one broadcast over leading axes (a bias of shape
/// `[n]` against `[m, n]`), which is how row-major broadcasting over leading
/// axes reads. Callers use short inputs only for such broadcasts.
#[inline]
pub fn widen(elements: Elements<'_>, start: usize, out: &mut [f64]) {
    let (len, period) = (out.len(), elements.len());
    if period == 1 {
        out.fill(elements.get(0));
        return;
    }
    crate::with_elements!(elements, s => {
        if start + len <= period {
            for (slot, x) in out.iter_mut().zip(&s[start..start + len]) {
                *slot = x.to_f64();
            }
        } else {
            let mut at = start % period;
            for slot in out.iter_mut() {
                *slot = s[at].to_f64();
                at += 1;
                if at == period {
                    at = 0;
                }
            }
        }
    })
}

/// True when a value of `shape` broadcasts into `out` by repeating whole:
/// one element, the same shape, or the trailing axes of `out` (leading ones
/// of `shape` aside). [`widen`] reads such inputs directly.
pub fn repeats_into(shape: &[usize], out: &[usize]) -> bool {
    let kept = &shape[shape.iter().take_while(|&&d| d == 1).count()..];
    crate::tensor::numel(shape) == 1 || out.ends_with(kept)
}

thread_local! {
    /// Widening buffers of [`CHUNK`] f64s, kept per thread and reused.
    static SCRATCH: std::cell::RefCell<Vec<Vec<f64>>> = const { std::cell::RefCell::new(Vec::new()) };
}

/// Runs `body` with a buffer of [`CHUNK`] f64s from this thread's spares
/// (allocated once per thread; nested uses take further buffers), so the
/// kernels neither allocate nor zero-fill per chunk.
#[inline]
pub fn with_scratch<R>(body: impl FnOnce(&mut [f64]) -> R) -> R {
    let mut buffer = SCRATCH
        .with(|spares| spares.borrow_mut().pop())
        .unwrap_or_else(|| vec![0.0; CHUNK]);
    let result = body(&mut buffer);
    SCRATCH.with(|spares| spares.borrow_mut().push(buffer));
    result
}

/// A buffer of `len` elements of `dtype` whose chunk starting at `start` is
/// filled by `fill(start, chunk)` with f64 results, then rounded into
/// `dtype` (results already rounded are stored exactly).
pub fn build(dtype: Dtype, len: usize, fill: impl Fn(usize, &mut [f64]) + Sync) -> Buffer {
    fn typed<T: Float>(len: usize, fill: &(impl Fn(usize, &mut [f64]) + Sync)) -> Vec<T> {
        let mut out = vec![T::from_f64(0.0); len];
        let work = |(index, chunk): (usize, &mut [T])| {
            with_scratch(|wide| {
                let wide = &mut wide[..chunk.len()];
                fill(index * CHUNK, wide);
                for (slot, &x) in chunk.iter_mut().zip(wide.iter()) {
                    *slot = T::from_f64(x);
                }
            })
        };
        if len >= PARALLEL_THRESHOLD {
            out.par_chunks_mut(CHUNK).enumerate().for_each(work);
        } else {
            out.chunks_mut(CHUNK).enumerate().for_each(work);
        }
        out
    }
    match dtype {
        Dtype::F64 => Buffer::F64(typed(len, &fill)),
        Dtype::F32 => Buffer::F32(typed(len, &fill)),
        Dtype::F16 => Buffer::F16(typed(len, &fill)),
        Dtype::Bf16 => Buffer::Bf16(typed(len, &fill)),
    }
}

/// `f(x)` for every element of `x`, stored in `dtype`.
pub fn unary(x: Elements<'_>, dtype: Dtype, f: impl Fn(f64) -> f64 + Sync) -> Buffer {
    build(dtype, x.len(), |start, out| {
        widen(x, start, out);
        out.iter_mut().for_each(|v| *v = f(*v));
    })
}

/// `f(a, b, c)` for every element of three inputs of `len` elements (a
/// shorter input repeats, see [`widen`]), stored in `dtype`.
pub fn ternary(
    len: usize,
    [a, b, c]: [Elements<'_>; 3],
    dtype: Dtype,
    f: impl Fn(f64, f64, f64) -> f64 + Sync,
) -> Buffer {
    build(dtype, len, |start, out| {
        with_scratch(|wide_b| {
            with_scratch(|wide_c| {
                let n = out.len();
                let (wide_b, wide_c) = (&mut wide_b[..n], &mut wide_c[..n]);
                widen(a, start, out);
                widen(b, start, wide_b);
                widen(c, start, wide_c);
                for ((v, &y), &z) in out.iter_mut().zip(wide_b.iter()).zip(wide_c.iter()) {
                    *v = f(*v, y, z);
                }
            })
        })
    })
}

/// `f(a, b, c, d)` for every element of four inputs of `len` elements (a
/// shorter input repeats, see [`widen`]), stored in `dtype`.
pub fn quaternary(
    len: usize,
    [a, b, c, d]: [Elements<'_>; 4],
    dtype: Dtype,
    f: impl Fn(f64, f64, f64, f64) -> f64 + Sync,
) -> Buffer {
    build(dtype, len, |start, out| {
        with_scratch(|wide_b| {
            with_scratch(|wide_c| {
                with_scratch(|wide_d| {
                    let n = out.len();
                    let (wb, wc, wd) = (&mut wide_b[..n], &mut wide_c[..n], &mut wide_d[..n]);
                    widen(a, start, out);
                    widen(b, start, wb);
                    widen(c, start, wc);
                    widen(d, start, wd);
                    for k in 0..n {
                        out[k] = f(out[k], wb[k], wc[k], wd[k]);
                    }
                })
            })
        })
    })
}

/// Element-by-element sum `before + contribution` rounded into `dtype`: how
/// an adjoint takes in one more contribution.
pub fn add(before: Elements<'_>, contribution: Elements<'_>, dtype: Dtype) -> Buffer {
    build(dtype, before.len(), |start, out| {
        with_scratch(|wide| {
            let wide = &mut wide[..out.len()];
            widen(before, start, out);
            widen(contribution, start, wide);
            for (v, &c) in out.iter_mut().zip(wide.iter()) {
                *v = dtype.round(*v + c);
            }
        })
    })
}

/// Sums `data` (of `rows × cols`, row-major) over its rows into `cols`
/// results, in the accumulation dtype, rounded once into `dtype`: the
/// broadcast sum of a bias's vector-Jacobian product. Split over columns.
pub fn sum_rows(
    data: Elements<'_>,
    rows: usize,
    cols: usize,
    accumulate: Dtype,
    dtype: Dtype,
) -> Buffer {
    build(dtype, cols, |start, out| {
        with_scratch(|row| {
            let row = &mut row[..out.len()];
            if rows == 0 {
                out.fill(0.0);
            }
            for r in 0..rows {
                widen(data, r * cols + start, row);
                if r == 0 {
                    out.copy_from_slice(row);
                } else {
                    for (v, &x) in out.iter_mut().zip(row.iter()) {
                        *v = accumulate.round(*v + x);
                    }
                }
            }
            out.iter_mut().for_each(|v| *v = dtype.round(*v));
        })
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn maps_cross_chunk_and_thread_boundaries_without_changing_bits() {
        let len = PARALLEL_THRESHOLD + CHUNK + 17;
        let x = Buffer::F64((0..len).map(|i| (i as f64).sin() * 1e3).collect());
        let parallel = unary(x.elements(), Dtype::F32, |v| v.exp().ln_1p());
        let serial: Vec<f64> = x
            .elements()
            .to_vec_f64()
            .iter()
            .map(|&v| Dtype::F32.round(v.exp().ln_1p()))
            .collect();
        assert_eq!(parallel.elements().to_vec_f64(), serial);
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(1)
            .build()
            .unwrap();
        let one_thread = pool.install(|| unary(x.elements(), Dtype::F32, |v| v.exp().ln_1p()));
        assert_eq!(one_thread, parallel);
    }

    #[test]
    fn row_sums_accumulate_then_round_once() {
        // 4096 rows of 2^-12 in f16 with f32 accumulation: exactly 1 (IEEE
        // 754-2019 binary16; a sequential f16 sum would stall at 0.5).
        let data = Buffer::from_f64(Dtype::F16, &vec![2f64.powi(-12); 4096 * 2]);
        let sums = sum_rows(data.elements(), 4096, 2, Dtype::F32, Dtype::F16);
        assert_eq!(sums.elements().to_vec_f64(), vec![1.0, 1.0]);
        let stalled = sum_rows(data.elements(), 4096, 2, Dtype::F16, Dtype::F16);
        assert_eq!(stalled.elements().to_vec_f64(), vec![0.5, 0.5]);
    }
}
