//! conv1d and conv2d (batch, channel, spatial layout; stride, padding,
//! dilation, groups; an optional bias), through the same GEMM as matmul.
//!
//! Each image and group is unfolded into a column matrix (`kernels::im2col`)
//! and multiplied by the weight viewed as [O/groups, C/groups · taps]; the
//! weight's contribution multiplies the adjoint by the columns' transpose,
//! the input's multiplies the weight's transpose by the adjoint and folds the
//! columns back (col2im). Products accumulate in the accumulation dtype and
//! each result is rounded once. im2col was chosen over a direct loop by
//! measurement (benches/network.rs, "conv kernels"): the GEMM runs packed,
//! vectorised kernels that a direct loop nest does not reach.
//!
//! conv1d is conv2d on planes of height 1. Output sizes follow
//! o = ⌊(i + 2p − d(k − 1) − 1)/s⌋ + 1 (Dumoulin & Visin, "A guide to
//! convolution arithmetic for deep learning", 2016, §5.1, relationship 15).

use super::kernels::arith::{Arith, Fix};
use super::kernels::gemm::{Accumulator, Layout, Operands};
use super::kernels::im2col::{Column, Window, col2im, im2col};
use super::{Attrs, JvpArgs, Precision, StructuredRule, VjpArgs, add_rounded};
use crate::dtype::Dtype;
use crate::format::shape as show;
use crate::tensor::{Buffer, Value, elements_as};
use rayon::prelude::*;
use std::borrow::Cow;

/// Convolution over one spatial axis: x [N, C, L], w [O, C/groups, K].
pub static CONV1D: StructuredRule = StructuredRule {
    shape: |inputs, attrs| shape(1, inputs, attrs),
    forward: |inputs, attrs, p| forward(1, inputs, attrs, p),
    vjp: |args| vjp(1, args),
    jvp: |args| jvp(1, args),
};
/// Convolution over two spatial axes: x [N, C, H, W], w [O, C/groups, kH, kW].
pub static CONV2D: StructuredRule = StructuredRule {
    shape: |inputs, attrs| shape(2, inputs, attrs),
    forward: |inputs, attrs, p| forward(2, inputs, attrs, p),
    vjp: |args| vjp(2, args),
    jvp: |args| jvp(2, args),
};

/// A spatial attribute: absent (the default for every axis), one entry for
/// every axis, or one per axis.
pub(super) fn spatial(
    name: &str,
    values: Option<&[usize]>,
    rank: usize,
    default: usize,
) -> Result<Vec<usize>, String> {
    match values {
        None => Ok(vec![default; rank]),
        Some([one]) => Ok(vec![*one; rank]),
        Some(list) if list.len() == rank => Ok(list.to_vec()),
        Some(list) => Err(format!(
            "{name} has {} entries; give one, or one per spatial axis ({rank})",
            list.len()
        )),
    }
}

/// One spatial axis of a window: its output size, or why the kernel does not fit.
pub(super) fn output_size(
    axis: usize,
    input: usize,
    kernel: usize,
    stride: usize,
    padding: usize,
    dilation: usize,
) -> Result<usize, String> {
    if stride == 0 || dilation == 0 || kernel == 0 {
        return Err(format!(
            "kernel, stride and dilation must be at least 1 on axis {axis}"
        ));
    }
    let span = dilation * (kernel - 1) + 1;
    let padded = input + 2 * padding;
    if span > padded {
        return Err(format!(
            "kernel {kernel} (dilation {dilation}, spanning {span}) is larger than the padded input {padded} on axis {axis}"
        ));
    }
    Ok((padded - span) / stride + 1)
}

/// Everything a convolution's rules need.
struct Conv {
    batch: usize,
    channels: usize,
    out_channels: usize,
    groups: usize,
    window: Window,
    out_shape: Vec<usize>,
}

impl Conv {
    fn in_per_group(&self) -> usize {
        self.channels / self.groups
    }

    fn out_per_group(&self) -> usize {
        self.out_channels / self.groups
    }

    /// Rows of the column matrix (and columns of the weight matrix).
    fn depth(&self) -> usize {
        self.in_per_group() * self.window.taps()
    }
}

fn geometry(rank: usize, inputs: &[&[usize]], attrs: &Attrs) -> Result<Conv, String> {
    let (x, w) = (inputs[0], inputs[1]);
    let name = if rank == 1 { "conv1d" } else { "conv2d" };
    let layout = if rank == 1 {
        "[N, C, L]"
    } else {
        "[N, C, H, W]"
    };
    if x.len() != rank + 2 {
        return Err(format!("{name} needs x of shape {layout}, got {}", show(x)));
    }
    if w.len() != rank + 2 {
        return Err(format!(
            "{name} needs a weight of shape [O, C/groups, {}], got {}",
            if rank == 1 { "K" } else { "kH, kW" },
            show(w)
        ));
    }
    let (batch, channels, out_channels) = (x[0], x[1], w[0]);
    let groups = attrs.groups.unwrap_or(1);
    if groups == 0 || !channels.is_multiple_of(groups) {
        return Err(format!(
            "groups {groups} do not divide the {channels} input channels of x {}",
            show(x)
        ));
    }
    if !out_channels.is_multiple_of(groups) {
        return Err(format!(
            "groups {groups} do not divide the {out_channels} output channels of the weight {}",
            show(w)
        ));
    }
    if w[1] * groups != channels {
        return Err(format!(
            "the weight {} takes {} input channels per group, but x {} has {channels} in {groups} group(s)",
            show(w),
            w[1],
            show(x)
        ));
    }
    if let Some(bias) = inputs.get(2)
        && *bias != [out_channels]
    {
        return Err(format!(
            "{name} bias has shape {} but the weight's {out_channels} output channels need [{out_channels}]",
            show(bias)
        ));
    }
    let stride = spatial("stride", attrs.stride.as_deref(), rank, 1)?;
    let padding = spatial("padding", attrs.padding.as_deref(), rank, 0)?;
    let dilation = spatial("dilation", attrs.dilation.as_deref(), rank, 1)?;
    let mut out = Vec::with_capacity(rank);
    for d in 0..rank {
        out.push(output_size(
            d + 2,
            x[d + 2],
            w[d + 2],
            stride[d],
            padding[d],
            dilation[d],
        )?);
    }
    // Planes of height 1 for conv1d.
    let pick = |values: &[usize], fill: usize| {
        if rank == 1 {
            (fill, values[0])
        } else {
            (values[0], values[1])
        }
    };
    let (in_h, in_w) = pick(&x[2..], 1);
    let (kh, kw) = pick(&w[2..], 1);
    let (out_h, out_w) = pick(&out, 1);
    let mut out_shape = vec![batch, out_channels];
    out_shape.extend(&out);
    Ok(Conv {
        batch,
        channels,
        out_channels,
        groups,
        window: Window {
            in_h,
            in_w,
            kh,
            kw,
            stride: pick(&stride, 1),
            padding: pick(&padding, 0),
            dilation: pick(&dilation, 1),
            out_h,
            out_w,
        },
        out_shape,
    })
}

fn shape(rank: usize, inputs: &[&[usize]], attrs: &Attrs) -> Result<Vec<usize>, String> {
    geometry(rank, inputs, attrs).map(|conv| conv.out_shape)
}

fn checked(rank: usize, inputs: &[&Value], attrs: &Attrs) -> Conv {
    let shapes: Vec<&[usize]> = inputs.iter().map(|v| v.shape()).collect();
    geometry(rank, &shapes, attrs).expect("shapes checked by the validator")
}

/// The accumulation element types, and the GEMM operands they make.
trait Acc: Column {
    fn operands<'a>(a: Cow<'a, [Self]>, b: Cow<'a, [Self]>) -> Operands<'a>;
}

impl Acc for f32 {
    fn operands<'a>(a: Cow<'a, [f32]>, b: Cow<'a, [f32]>) -> Operands<'a> {
        Operands::F32(a, b)
    }
}

impl Acc for f64 {
    fn operands<'a>(a: Cow<'a, [f64]>, b: Cow<'a, [f64]>) -> Operands<'a> {
        Operands::F64(a, b)
    }
}

/// Runs `body` with the element type of `p`'s accumulation dtype.
macro_rules! in_accumulation {
    ($p:expr, $body:ident ( $($arg:expr),* )) => {
        match $p.accumulate {
            Dtype::F32 => $body::<f32>($($arg),*),
            _ => $body::<f64>($($arg),*),
        }
    };
}

fn forward(rank: usize, inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    let conv = checked(rank, inputs, attrs);
    let buffer = in_accumulation!(p, convolve(&conv, inputs, p));
    Value::from_buffer(conv.out_shape.clone(), buffer)
}

/// y = bias ⊗ 1 + W_g · columns, per image and group.
fn convolve<T: Acc>(conv: &Conv, inputs: &[&Value], p: Precision) -> Buffer {
    let (x, w) = (
        elements_as::<T>(inputs[0].elements()),
        elements_as::<T>(inputs[1].elements()),
    );
    let window = &conv.window;
    let (depth, positions) = (conv.depth(), window.positions());
    let (cg, og) = (conv.in_per_group(), conv.out_per_group());
    let mut out = Accumulator::zeros(p.accumulate, conv.batch * conv.out_channels * positions);
    if let Some(bias) = inputs.get(2) {
        // The bias as a rank-one product, bias ⊗ ones, so it is summed in the
        // accumulator with the rest.
        let bias = elements_as::<T>(bias.elements());
        let ones = vec![T::from_f64(1.0); positions];
        let operands = T::operands(Cow::Borrowed(&bias), Cow::Borrowed(&ones));
        for image in 0..conv.batch {
            out.product(
                &operands,
                (conv.out_channels, 1, positions),
                Layout::rows(0, 1),
                Layout::rows(0, positions),
                image * conv.out_channels * positions,
                false,
            );
        }
    }
    let mut col = vec![T::default(); depth * positions];
    for image in 0..conv.batch {
        for group in 0..conv.groups {
            im2col(
                &x,
                (image * conv.channels + group * cg) * window.plane(),
                cg,
                window,
                &mut col,
            );
            let operands = T::operands(Cow::Borrowed(&w), Cow::Borrowed(&col));
            out.product(
                &operands,
                (og, depth, positions),
                Layout::rows(group * og * depth, depth),
                Layout::rows(0, positions),
                (image * conv.out_channels + group * og) * positions,
                inputs.len() > 2,
            );
        }
    }
    out.finish(p.dtype)
}

fn vjp(rank: usize, args: &VjpArgs) -> Value {
    let conv = checked(rank, args.inputs, args.attrs);
    let p = args.precision;
    let target = args.inputs[args.slot].shape().to_vec();
    let buffer = match args.slot {
        0 => in_accumulation!(p, input_contribution(&conv, args)),
        1 => in_accumulation!(p, weight_contribution(&conv, args)),
        _ => return bias_contribution(&conv, args),
    };
    Value::from_buffer(target, buffer)
}

/// x̄ = col2im(W_gᵀ · Ḡ) per image and group.
fn input_contribution<T: Acc>(conv: &Conv, args: &VjpArgs) -> Buffer {
    let p = args.precision;
    let w = elements_as::<T>(args.inputs[1].elements());
    let g = elements_as::<T>(args.adjoint.elements());
    let window = &conv.window;
    let (depth, positions) = (conv.depth(), window.positions());
    let (cg, og) = (conv.in_per_group(), conv.out_per_group());
    let mut dx = vec![T::default(); conv.batch * conv.channels * window.plane()];
    let mut columns = Accumulator::zeros(p.accumulate, depth * positions);
    let operands = T::operands(Cow::Borrowed(&w), Cow::Borrowed(&g));
    for image in 0..conv.batch {
        for group in 0..conv.groups {
            columns.product(
                &operands,
                (depth, og, positions),
                Layout::transposed(group * og * depth, depth),
                Layout::rows(
                    (image * conv.out_channels + group * og) * positions,
                    positions,
                ),
                0,
                false,
            );
            let values =
                T::view(columns.elements()).expect("columns are held in the accumulation type");
            col2im(
                values,
                cg,
                window,
                p.accumulate,
                &mut dx,
                (image * conv.channels + group * cg) * window.plane(),
            );
        }
    }
    Buffer::converted(T::buffer(dx).elements(), p.dtype)
}

/// W̄_g = Σ over images of Ḡ · columnsᵀ.
fn weight_contribution<T: Acc>(conv: &Conv, args: &VjpArgs) -> Buffer {
    let p = args.precision;
    let x = elements_as::<T>(args.inputs[0].elements());
    let g = elements_as::<T>(args.adjoint.elements());
    let window = &conv.window;
    let (depth, positions) = (conv.depth(), window.positions());
    let (cg, og) = (conv.in_per_group(), conv.out_per_group());
    let mut dw = Accumulator::zeros(p.accumulate, conv.out_channels * depth);
    let mut col = vec![T::default(); depth * positions];
    for image in 0..conv.batch {
        for group in 0..conv.groups {
            im2col(
                &x,
                (image * conv.channels + group * cg) * window.plane(),
                cg,
                window,
                &mut col,
            );
            let operands = T::operands(Cow::Borrowed(&g), Cow::Borrowed(&col));
            dw.product(
                &operands,
                (og, positions, depth),
                Layout::rows(
                    (image * conv.out_channels + group * og) * positions,
                    positions,
                ),
                Layout::transposed(0, positions),
                group * og * depth,
                image > 0,
            );
        }
    }
    dw.finish(p.dtype)
}

/// b̄ₒ = Σ over images and positions of Ḡ.
fn bias_contribution(conv: &Conv, args: &VjpArgs) -> Value {
    let buffer = crate::in_accumulation_type!(args.precision, bias_sums(conv, args));
    Value::from_buffer(vec![conv.out_channels], buffer)
}

/// Each channel's sum in the accumulation type, image by image and position
/// by position; channels split over threads.
fn bias_sums<T: Arith>(conv: &Conv, args: &VjpArgs) -> Buffer {
    let p = args.precision;
    let fix = Fix::of::<T>(p.accumulate);
    let g = elements_as::<T>(args.adjoint.elements());
    let positions = conv.window.positions();
    let sums: Vec<T> = (0..conv.out_channels)
        .into_par_iter()
        .map(|channel| {
            let mut total: Option<T> = None;
            for image in 0..conv.batch {
                let start = (image * conv.out_channels + channel) * positions;
                for &v in &g[start..start + positions] {
                    total = Some(total.map_or(v, |s| fix.at(s + v)));
                }
            }
            total.unwrap_or_default()
        })
        .collect();
    Buffer::converted(T::buffer(sums).elements(), p.dtype)
}

/// Bilinear in x and w, affine in the bias: ẏ = conv(ẋ, w) + ḃ + conv(x, ẇ).
fn jvp(rank: usize, args: &JvpArgs) -> Value {
    let p = args.precision;
    let mut first: Vec<&Value> = vec![args.tangents[0], args.inputs[1]];
    if let Some(bias) = args.tangents.get(2) {
        first.push(bias);
    }
    let a = forward(rank, &first, args.attrs, p);
    let b = forward(rank, &[args.inputs[0], args.tangents[1]], args.attrs, p);
    add_rounded(&a, &b, p.dtype)
}

#[cfg(test)]
mod tests {
    use super::*;

    // Dumoulin & Visin 2016, relationship 15 (§5.1): i = 7, k = 3, d = 2,
    // s = 1, p = 0 gives o = 7 − 5 + 1 = 3; with s = 2, p = 1: ⌊(7 + 2 − 5)/2⌋ + 1 = 3.
    #[test]
    fn output_sizes_follow_the_convolution_arithmetic() {
        assert_eq!(output_size(2, 7, 3, 1, 0, 2), Ok(3));
        assert_eq!(output_size(2, 7, 3, 2, 1, 2), Ok(3));
        assert_eq!(output_size(2, 5, 3, 1, 1, 1), Ok(5));
        assert!(
            output_size(2, 2, 5, 1, 1, 1)
                .unwrap_err()
                .contains("larger than the padded input 4")
        );
    }

    #[test]
    fn a_one_by_one_kernel_is_a_channel_mix() {
        // x [1, 2, 1, 2], w [1, 2, 1, 1] = (10, 1), bias 0.5: y = 10 x₀ + x₁ + 0.5.
        let x = Value::from_parts(vec![1, 2, 1, 2], vec![1.0, 2.0, 3.0, 4.0]);
        let w = Value::from_parts(vec![1, 2, 1, 1], vec![10.0, 1.0]);
        let b = Value::from_parts(vec![1], vec![0.5]);
        let y = forward(2, &[&x, &w, &b], &Attrs::default(), Dtype::F64.into());
        assert_eq!(y, Value::from_parts(vec![1, 1, 1, 2], vec![13.5, 24.5]));
    }
}
