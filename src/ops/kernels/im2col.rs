//! The column matrix of a 2-D convolution (im2col) and its adjoint (col2im),
//! so that convolution runs through the same GEMM as matmul.
//!
//! For one image and one group of `channels` input channels, column
//! (oy · out_w + ox) of the column matrix holds the window the kernel sees at
//! output position (oy, ox), row (c · kh · kw + i · kw + j) its tap (c, i, j);
//! taps in the zero padding hold 0. The output is then W [O, C·kh·kw] times
//! the columns (Chellapilla, Puri & Simard, "High Performance Convolutional
//! Neural Networks for Document Processing", 2006).

use crate::dtype::Dtype;

/// Where a convolution's or pooling window's taps fall, in one spatial plane.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Window {
    /// Input plane height and width.
    pub in_h: usize,
    /// Input plane width.
    pub in_w: usize,
    /// Kernel height and width.
    pub kh: usize,
    /// Kernel width.
    pub kw: usize,
    /// Steps between windows (rows, columns).
    pub stride: (usize, usize),
    /// Padding on both sides (rows, columns).
    pub padding: (usize, usize),
    /// Spacing between taps (rows, columns).
    pub dilation: (usize, usize),
    /// Output plane height.
    pub out_h: usize,
    /// Output plane width.
    pub out_w: usize,
}

impl Window {
    /// The input row of tap row `i` at output row `oy`, if inside the plane.
    #[inline]
    pub fn row(&self, oy: usize, i: usize) -> Option<usize> {
        let y = (oy * self.stride.0 + i * self.dilation.0) as isize - self.padding.0 as isize;
        (0..self.in_h as isize).contains(&y).then_some(y as usize)
    }

    /// The input column of tap column `j` at output column `ox`, if inside.
    #[inline]
    pub fn col(&self, ox: usize, j: usize) -> Option<usize> {
        let x = (ox * self.stride.1 + j * self.dilation.1) as isize - self.padding.1 as isize;
        (0..self.in_w as isize).contains(&x).then_some(x as usize)
    }

    /// The output columns `lo..hi` whose tap column `j` lies inside the plane.
    pub fn inside(&self, j: usize) -> (usize, usize) {
        let shift = j * self.dilation.1;
        let (s, p) = (self.stride.1, self.padding.1);
        let lo = if p > shift {
            (p - shift).div_ceil(s)
        } else {
            0
        };
        // x = ox·s + shift − p < in_w  ⇔  ox·s < in_w + p − shift.
        let limit = (self.in_w + p).saturating_sub(shift);
        let hi = limit.div_ceil(s).min(self.out_w);
        (lo.min(hi), hi)
    }

    /// Taps per channel.
    pub fn taps(&self) -> usize {
        self.kh * self.kw
    }

    /// Output positions per plane.
    pub fn positions(&self) -> usize {
        self.out_h * self.out_w
    }

    /// Input elements per plane.
    pub fn plane(&self) -> usize {
        self.in_h * self.in_w
    }
}

/// The element types columns are built in: the accumulation types.
pub trait Column: crate::tensor::Float + Default + std::ops::Add<Output = Self> {}
impl Column for f32 {}
impl Column for f64 {}

/// Fills `col` ([channels · taps, positions], row-major) from `channels`
/// consecutive planes of `x` starting at `offset`.
pub fn im2col<T: Column>(x: &[T], offset: usize, channels: usize, window: &Window, col: &mut [T]) {
    let positions = window.positions();
    let (out_h, out_w) = (window.out_h, window.out_w);
    for c in 0..channels {
        let plane = &x[offset + c * window.plane()..offset + (c + 1) * window.plane()];
        for i in 0..window.kh {
            for j in 0..window.kw {
                let row = (c * window.taps() + i * window.kw + j) * positions;
                let out = &mut col[row..row + positions];
                for oy in 0..out_h {
                    let line = &mut out[oy * out_w..(oy + 1) * out_w];
                    match window.row(oy, i) {
                        None => line.fill(T::default()),
                        Some(y) => {
                            let source = &plane[y * window.in_w..(y + 1) * window.in_w];
                            let (lo, hi) = window.inside(j);
                            line[..lo].fill(T::default());
                            line[hi..].fill(T::default());
                            if lo == hi {
                                continue;
                            }
                            let first =
                                lo * window.stride.1 + j * window.dilation.1 - window.padding.1;
                            if window.stride.1 == 1 {
                                line[lo..hi].copy_from_slice(&source[first..first + hi - lo]);
                            } else {
                                for (k, slot) in line[lo..hi].iter_mut().enumerate() {
                                    *slot = source[first + k * window.stride.1];
                                }
                            }
                        }
                    }
                }
            }
        }
    }
}

/// Adds the columns' entries back onto the input planes they came from:
/// `dx[offset..]` (channels planes) += col2im(col). Overlapping windows add
/// up in the order of the column matrix's rows, then columns, so the sum is
/// the same on every run; with half-precision accumulation every addition is
/// rounded into `accumulate`.
pub fn col2im<T: Column>(
    col: &[T],
    channels: usize,
    window: &Window,
    accumulate: Dtype,
    dx: &mut [T],
    offset: usize,
) {
    let positions = window.positions();
    let half = matches!(accumulate, Dtype::F16 | Dtype::Bf16);
    for c in 0..channels {
        let plane = &mut dx[offset + c * window.plane()..offset + (c + 1) * window.plane()];
        for i in 0..window.kh {
            for j in 0..window.kw {
                let row = &col[(c * window.taps() + i * window.kw + j) * positions..][..positions];
                for oy in 0..window.out_h {
                    let Some(y) = window.row(oy, i) else { continue };
                    for ox in 0..window.out_w {
                        let Some(x) = window.col(ox, j) else { continue };
                        let slot = &mut plane[y * window.in_w + x];
                        let sum = *slot + row[oy * window.out_w + ox];
                        *slot = if half {
                            T::from_f64(accumulate.round(sum.to_f64()))
                        } else {
                            sum
                        };
                    }
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn columns_hold_windows_and_fold_back_onto_overlaps() {
        // One 3×3 plane 1..9, a 2×2 kernel, stride 1, no padding: four windows.
        let window = Window {
            in_h: 3,
            in_w: 3,
            kh: 2,
            kw: 2,
            stride: (1, 1),
            padding: (0, 0),
            dilation: (1, 1),
            out_h: 2,
            out_w: 2,
        };
        let x: Vec<f64> = (1..=9).map(f64::from).collect();
        let mut col = vec![0.0; 4 * 4];
        im2col(&x, 0, 1, &window, &mut col);
        // Row (i, j) = (0, 0) holds each window's top-left tap: 1, 2, 4, 5.
        assert_eq!(&col[0..4], &[1.0, 2.0, 4.0, 5.0]);
        assert_eq!(&col[12..16], &[5.0, 6.0, 8.0, 9.0]);
        // Folding ones back counts how many windows cover each input element.
        let ones = vec![1.0; 16];
        let mut dx = vec![0.0; 9];
        col2im(&ones, 1, &window, Dtype::F64, &mut dx, 0);
        assert_eq!(dx, vec![1.0, 2.0, 1.0, 2.0, 4.0, 2.0, 1.0, 2.0, 1.0]);
    }
}
