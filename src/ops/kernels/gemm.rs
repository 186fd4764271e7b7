//! Matrix products in the accumulation dtype.
//!
//! f32 and f64 accumulation go through `matrixmultiply` (chosen by
//! measurement, see DEVELOPERS.md): its packed, blocked kernels run at
//! 170–200 GFLOP/s in f32 on one core here, against about 1 for a naive
//! loop, and its threads split the output, never a sum, so the result does
//! not depend on the thread count (tested below). Operands stored in another
//! dtype are widened once into the accumulation dtype for the product. f16
//! and bf16 accumulation (a pure half-precision replay) has no fast kernel
//! anywhere; it runs a plain loop that rounds after every product and sum.

use crate::dtype::Dtype;
use crate::tensor::{Buffer, Elements, Float, elements_as};
use std::borrow::Cow;

/// One matrix inside a flat row-major buffer: its first element and the
/// distance between rows and between columns, in elements. A transposed
/// view swaps the two strides.
#[derive(Debug, Clone, Copy)]
pub struct Layout {
    /// Index of element (0, 0).
    pub offset: usize,
    /// Elements between consecutive rows.
    pub row_stride: usize,
    /// Elements between consecutive columns.
    pub col_stride: usize,
}

impl Layout {
    /// A row-major `rows × cols` block at `offset`.
    pub fn rows(offset: usize, cols: usize) -> Layout {
        Layout {
            offset,
            row_stride: cols,
            col_stride: 1,
        }
    }

    /// The transpose of a row-major block of `cols` columns at `offset`.
    pub fn transposed(offset: usize, cols: usize) -> Layout {
        Layout {
            offset,
            row_stride: 1,
            col_stride: cols,
        }
    }
}

/// A product accumulator: `m × n` results held in the accumulation dtype
/// until one final rounding into the output's dtype.
pub struct Accumulator {
    accumulate: Dtype,
    data: AccData,
}

enum AccData {
    F32(Vec<f32>),
    /// f64 accumulation, or f16/bf16 accumulation held as rounded f64s.
    F64(Vec<f64>),
}

/// Operands widened (when needed) into the accumulation type once per op.
pub enum Operands<'a> {
    /// f32 accumulation.
    F32(Cow<'a, [f32]>, Cow<'a, [f32]>),
    /// f64, f16 or bf16 accumulation.
    F64(Cow<'a, [f64]>, Cow<'a, [f64]>),
}

impl<'a> Operands<'a> {
    /// `a` and `b` as slices of the accumulation type.
    pub fn new(accumulate: Dtype, a: Elements<'a>, b: Elements<'a>) -> Operands<'a> {
        match accumulate {
            Dtype::F32 => Operands::F32(elements_as(a), elements_as(b)),
            _ => Operands::F64(elements_as(a), elements_as(b)),
        }
    }
}

impl Accumulator {
    /// `len` zeros in the accumulation dtype.
    pub fn zeros(accumulate: Dtype, len: usize) -> Accumulator {
        let data = match accumulate {
            Dtype::F32 => AccData::F32(vec![0.0; len]),
            _ => AccData::F64(vec![0.0; len]),
        };
        Accumulator { accumulate, data }
    }

    /// `C[c] (+)= A[a] · B[b]` for an `m × k` by `k × n` product, with `C`
    /// row-major at `c_offset`: assigned when `add` is false, else added to.
    #[allow(clippy::too_many_arguments)]
    pub fn product(
        &mut self,
        operands: &Operands<'_>,
        (m, k, n): (usize, usize, usize),
        a: Layout,
        b: Layout,
        c_offset: usize,
        add: bool,
    ) {
        match (&mut self.data, operands) {
            (AccData::F32(c), Operands::F32(x, y)) => {
                fast::<f32>(c, x, y, (m, k, n), a, b, c_offset, add)
            }
            (AccData::F64(c), Operands::F64(x, y)) if self.accumulate == Dtype::F64 => {
                fast::<f64>(c, x, y, (m, k, n), a, b, c_offset, add)
            }
            (AccData::F64(c), Operands::F64(x, y)) => {
                plain(self.accumulate, c, x, y, (m, k, n), a, b, c_offset, add)
            }
            _ => unreachable!("operands are widened into the accumulator's dtype"),
        }
    }

    /// The results so far, in the accumulation type (f16 and bf16
    /// accumulation hold rounded f64s).
    pub fn elements(&self) -> Elements<'_> {
        match &self.data {
            AccData::F32(v) => Elements::F32(v),
            AccData::F64(v) => Elements::F64(v),
        }
    }

    /// The results rounded once into `dtype`.
    pub fn finish(self, dtype: Dtype) -> Buffer {
        match self.data {
            AccData::F32(v) if dtype == Dtype::F32 => Buffer::F32(v),
            AccData::F64(v) if dtype == Dtype::F64 => Buffer::F64(v),
            AccData::F32(v) => Buffer::converted(Elements::F32(&v), dtype),
            AccData::F64(v) => Buffer::converted(Elements::F64(&v), dtype),
        }
    }
}

/// The element types `matrixmultiply` multiplies.
trait Gemm: Float + Default {
    /// `c = alpha·a·b + beta·c` over raw strided matrices.
    ///
    /// # Safety
    /// The pointers and strides must describe matrices inside live buffers.
    #[allow(clippy::too_many_arguments)]
    unsafe fn gemm(
        m: usize,
        k: usize,
        n: usize,
        a: *const Self,
        rsa: isize,
        csa: isize,
        b: *const Self,
        rsb: isize,
        csb: isize,
        beta: Self,
        c: *mut Self,
        rsc: isize,
        csc: isize,
    );
    const ZERO: Self;
    const ONE: Self;
}

impl Gemm for f32 {
    unsafe fn gemm(
        m: usize,
        k: usize,
        n: usize,
        a: *const f32,
        rsa: isize,
        csa: isize,
        b: *const f32,
        rsb: isize,
        csb: isize,
        beta: f32,
        c: *mut f32,
        rsc: isize,
        csc: isize,
    ) {
        // SAFETY: forwarded from the caller's contract.
        unsafe { matrixmultiply::sgemm(m, k, n, 1.0, a, rsa, csa, b, rsb, csb, beta, c, rsc, csc) }
    }
    const ZERO: f32 = 0.0;
    const ONE: f32 = 1.0;
}

impl Gemm for f64 {
    unsafe fn gemm(
        m: usize,
        k: usize,
        n: usize,
        a: *const f64,
        rsa: isize,
        csa: isize,
        b: *const f64,
        rsb: isize,
        csb: isize,
        beta: f64,
        c: *mut f64,
        rsc: isize,
        csc: isize,
    ) {
        // SAFETY: forwarded from the caller's contract.
        unsafe { matrixmultiply::dgemm(m, k, n, 1.0, a, rsa, csa, b, rsb, csb, beta, c, rsc, csc) }
    }
    const ZERO: f64 = 0.0;
    const ONE: f64 = 1.0;
}

/// The last element index a layout reaches, for bounds checks.
fn last_index(layout: Layout, rows: usize, cols: usize) -> usize {
    layout.offset + (rows.max(1) - 1) * layout.row_stride + (cols.max(1) - 1) * layout.col_stride
}

#[allow(clippy::too_many_arguments)]
fn fast<T: Gemm>(
    c: &mut [T],
    x: &[T],
    y: &[T],
    (m, k, n): (usize, usize, usize),
    a: Layout,
    b: Layout,
    c_offset: usize,
    add: bool,
) {
    if m == 0 || n == 0 {
        return;
    }
    let c_block = &mut c[c_offset..c_offset + m * n];
    if k == 0 {
        if !add {
            c_block.iter_mut().for_each(|v| *v = T::ZERO);
        }
        return;
    }
    assert!(last_index(a, m, k) < x.len() && last_index(b, k, n) < y.len());
    // SAFETY: both operand layouts stay inside their slices (asserted above),
    // the output block is m × n row-major inside `c`, and the three buffers
    // do not overlap (distinct borrows).
    unsafe {
        T::gemm(
            m,
            k,
            n,
            x.as_ptr().add(a.offset),
            a.row_stride as isize,
            a.col_stride as isize,
            y.as_ptr().add(b.offset),
            b.row_stride as isize,
            b.col_stride as isize,
            if add { T::ONE } else { T::ZERO },
            c_block.as_mut_ptr(),
            n as isize,
            1,
        )
    }
}

/// Half-precision accumulation: every product and partial sum rounded into
/// `accumulate`, summed in order of the inner index.
#[allow(clippy::too_many_arguments)]
fn plain(
    accumulate: Dtype,
    c: &mut [f64],
    x: &[f64],
    y: &[f64],
    (m, k, n): (usize, usize, usize),
    a: Layout,
    b: Layout,
    c_offset: usize,
    add: bool,
) {
    for i in 0..m {
        for j in 0..n {
            let slot = &mut c[c_offset + i * n + j];
            let mut sum = if add { Some(*slot) } else { None };
            for p in 0..k {
                let product = accumulate.round(
                    x[a.offset + i * a.row_stride + p * a.col_stride]
                        * y[b.offset + p * b.row_stride + j * b.col_stride],
                );
                sum = Some(sum.map_or(product, |s| accumulate.round(s + product)));
            }
            *slot = sum.unwrap_or(0.0);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn product(
        accumulate: Dtype,
        a: &[f64],
        b: &[f64],
        (m, k, n): (usize, usize, usize),
    ) -> Vec<f64> {
        let (a, b) = (Buffer::F64(a.to_vec()), Buffer::F64(b.to_vec()));
        let operands = Operands::new(accumulate, a.elements(), b.elements());
        let mut acc = Accumulator::zeros(accumulate, m * n);
        acc.product(
            &operands,
            (m, k, n),
            Layout::rows(0, k),
            Layout::rows(0, n),
            0,
            false,
        );
        acc.finish(Dtype::F64).elements().to_vec_f64()
    }

    #[test]
    fn small_products_by_hand() {
        // [[1,2],[3,4]] @ [[5,6],[7,8]] = [[19,22],[43,50]] (hand computation).
        for accumulate in Dtype::ALL {
            assert_eq!(
                product(
                    accumulate,
                    &[1.0, 2.0, 3.0, 4.0],
                    &[5.0, 6.0, 7.0, 8.0],
                    (2, 2, 2)
                ),
                vec![19.0, 22.0, 43.0, 50.0],
                "{accumulate}"
            );
        }
    }

    #[test]
    fn transposed_layouts_read_the_transpose() {
        // Aᵀ with A = [[1,2],[3,4]] stored row-major: Aᵀ·I = [[1,3],[2,4]].
        let (a, b) = (
            Buffer::F64(vec![1.0, 2.0, 3.0, 4.0]),
            Buffer::F64(vec![1.0, 0.0, 0.0, 1.0]),
        );
        let operands = Operands::new(Dtype::F64, a.elements(), b.elements());
        let mut acc = Accumulator::zeros(Dtype::F64, 4);
        acc.product(
            &operands,
            (2, 2, 2),
            Layout::transposed(0, 2),
            Layout::rows(0, 2),
            0,
            false,
        );
        acc.product(
            &operands,
            (2, 2, 2),
            Layout::transposed(0, 2),
            Layout::rows(0, 2),
            0,
            true,
        );
        assert_eq!(
            acc.finish(Dtype::F64).elements().to_vec_f64(),
            vec![2.0, 6.0, 4.0, 8.0]
        );
    }

    // IEEE 754 binary16 arithmetic (IEEE 754-2019 §4.3.1, table 3.5): a dot
    // product of 4096 terms 2^-6 · 2^-6 = 2^-12, carried in binary32 and
    // rounded once, is exactly 1; carried in binary16 it stalls at 0.5.
    #[test]
    fn half_precision_products_accumulate_in_f32() {
        let ones = vec![2f64.powi(-6); 4096];
        let (a, b) = (
            Buffer::from_f64(Dtype::F16, &ones),
            Buffer::from_f64(Dtype::F16, &ones),
        );
        let run = |accumulate: Dtype| {
            let operands = Operands::new(accumulate, a.elements(), b.elements());
            let mut acc = Accumulator::zeros(accumulate, 1);
            acc.product(
                &operands,
                (1, 4096, 1),
                Layout::rows(0, 4096),
                Layout::rows(0, 1),
                0,
                false,
            );
            acc.finish(Dtype::F16).elements().get(0)
        };
        assert_eq!(run(Dtype::F32), 1.0);
        assert_eq!(run(Dtype::F16), 0.5);
    }

    #[test]
    fn results_do_not_depend_on_the_thread_count() {
        // matrixmultiply reads MATMUL_NUM_THREADS once per process, so the
        // comparison runs the product in child processes of this test binary.
        if let Ok(threads) = std::env::var("EBB_GEMM_CHILD") {
            let (m, k, n) = (517, 389, 601);
            let a: Vec<f64> = (0..m * k)
                .map(|i| ((i * 7919 % 1000) as f64) / 997.0 - 0.5)
                .collect();
            let b: Vec<f64> = (0..k * n)
                .map(|i| ((i * 104729 % 1000) as f64) / 991.0 - 0.5)
                .collect();
            let mut hash = 0u64;
            for accumulate in [Dtype::F32, Dtype::F64] {
                let (a, b) = (
                    Buffer::from_f64(accumulate, &a),
                    Buffer::from_f64(accumulate, &b),
                );
                let operands = Operands::new(accumulate, a.elements(), b.elements());
                let mut acc = Accumulator::zeros(accumulate, m * n);
                acc.product(
                    &operands,
                    (m, k, n),
                    Layout::rows(0, k),
                    Layout::rows(0, n),
                    0,
                    false,
                );
                for x in acc.finish(accumulate).elements().to_vec_f64() {
                    hash = hash.wrapping_mul(1_000_003).wrapping_add(x.to_bits());
                }
            }
            println!("EBB_GEMM_HASH {threads} {hash:x}");
            return;
        }
        let run = |threads: &str| {
            let output = std::process::Command::new(std::env::current_exe().unwrap())
                .args([
                    "--exact",
                    "ops::kernels::gemm::tests::results_do_not_depend_on_the_thread_count",
                    "--nocapture",
                ])
                .env("EBB_GEMM_CHILD", threads)
                .env("MATMUL_NUM_THREADS", threads)
                .output()
                .unwrap();
            let text = String::from_utf8_lossy(&output.stdout).to_string();
            text.lines()
                .find_map(|line| line.strip_prefix("EBB_GEMM_HASH "))
                .map(|rest| rest.split_whitespace().nth(1).unwrap().to_string())
                .unwrap_or_else(|| panic!("child printed no hash: {text}"))
        };
        assert_eq!(run("1"), run("2"));
        assert_eq!(run("1"), run("4"));
    }
}
