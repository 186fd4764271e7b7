//! Pooling over the spatial axes of x [N, C, H, W]: max_pool2d (padding is
//! −∞; the first maximum of a window receives the adjoint, ties included, as
//! is common practice) and avg_pool2d (padding is 0, counted in the divisor
//! unless `count_include_pad` is false). Planes are independent, so the work
//! is split over them; overlapping windows add up in a fixed order.

use super::conv::{output_size, spatial};
use super::kernels::arith::{Arith, Fix};
use super::kernels::im2col::Window;
use super::{Attrs, JvpArgs, Precision, StructuredRule, VjpArgs};
use crate::format::shape as show;
use crate::tensor::{Buffer, Value, elements_as};
use rayon::prelude::*;

/// Maximum over each window.
pub static MAX_POOL2D: StructuredRule = StructuredRule {
    shape: |inputs, attrs| geometry(true, inputs[0], attrs).map(|(_, shape)| shape),
    forward: max_forward,
    vjp: max_vjp,
    jvp: max_jvp,
};
/// Mean over each window.
pub static AVG_POOL2D: StructuredRule = StructuredRule {
    shape: |inputs, attrs| geometry(false, inputs[0], attrs).map(|(_, shape)| shape),
    forward: avg_forward,
    vjp: avg_vjp,
    jvp: avg_jvp,
};

fn geometry(max: bool, x: &[usize], attrs: &Attrs) -> Result<(Window, Vec<usize>), String> {
    let name = if max { "max_pool2d" } else { "avg_pool2d" };
    if x.len() != 4 {
        return Err(format!(
            "{name} needs x of shape [N, C, H, W], got {}",
            show(x)
        ));
    }
    let kernel = spatial("kernel", attrs.kernel.as_deref(), 2, 0)?;
    let stride = spatial(
        "stride",
        Some(attrs.stride.as_deref().unwrap_or(&kernel)),
        2,
        1,
    )?;
    let padding = spatial("padding", attrs.padding.as_deref(), 2, 0)?;
    let dilation = if max {
        spatial("dilation", attrs.dilation.as_deref(), 2, 1)?
    } else {
        vec![1, 1]
    };
    for d in 0..2 {
        if 2 * padding[d] > kernel[d] {
            return Err(format!(
                "{name} padding {} is more than half the kernel {} on axis {}",
                padding[d],
                kernel[d],
                d + 2
            ));
        }
    }
    let out_h = output_size(2, x[2], kernel[0], stride[0], padding[0], dilation[0])?;
    let out_w = output_size(3, x[3], kernel[1], stride[1], padding[1], dilation[1])?;
    let window = Window {
        in_h: x[2],
        in_w: x[3],
        kh: kernel[0],
        kw: kernel[1],
        stride: (stride[0], stride[1]),
        padding: (padding[0], padding[1]),
        dilation: (dilation[0], dilation[1]),
        out_h,
        out_w,
    };
    Ok((window, vec![x[0], x[1], out_h, out_w]))
}

fn checked(max: bool, x: &Value, attrs: &Attrs) -> (Window, Vec<usize>) {
    geometry(max, x.shape(), attrs).expect("shapes checked by the validator")
}

/// The in-plane indices of the taps of output (oy, ox) inside the plane, in
/// row-major tap order.
fn taps(window: &Window, oy: usize, ox: usize) -> impl Iterator<Item = usize> + '_ {
    (0..window.kh).flat_map(move |i| {
        (0..window.kw)
            .filter_map(move |j| Some(window.row(oy, i)? * window.in_w + window.col(ox, j)?))
    })
}

/// The in-plane index of each window's first maximum (NaN wins, as it
/// propagates), written into `out` (one per output position).
fn winners_into<T: Arith>(window: &Window, plane: &[T], out: &mut [usize]) {
    #[allow(clippy::eq_op)]
    let is_nan = |v: T| v != v;
    for oy in 0..window.out_h {
        for ox in 0..window.out_w {
            let mut best = T::default();
            let mut winner = usize::MAX;
            for i in 0..window.kh {
                let Some(y) = window.row(oy, i) else { continue };
                for j in 0..window.kw {
                    let Some(x) = window.col(ox, j) else { continue };
                    let index = y * window.in_w + x;
                    let v = plane[index];
                    if winner == usize::MAX || (!is_nan(best) && (v > best || is_nan(v))) {
                        best = v;
                        winner = index;
                    }
                }
            }
            out[oy * window.out_w + ox] = if winner == usize::MAX { 0 } else { winner };
        }
    }
}

fn winners(window: &Window, plane: &[f64]) -> Vec<usize> {
    let mut out = vec![0; window.positions()];
    winners_into(window, plane, &mut out);
    out
}

/// Maps every plane of x to a plane of the output in parallel.
fn per_plane(
    x: &Value,
    window: &Window,
    shape: Vec<usize>,
    p: Precision,
    f: impl Fn(usize, &[f64], &mut [f64]) + Sync,
) -> Value {
    let values = x.to_f64();
    let mut out = vec![0.0; shape.iter().product()];
    out.par_chunks_mut(window.positions().max(1))
        .enumerate()
        .for_each(|(plane, slot)| {
            f(
                plane,
                &values[plane * window.plane()..(plane + 1) * window.plane()],
                slot,
            )
        });
    Value::from_parts_in(p.dtype, shape, out)
}

fn max_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    let (window, shape) = checked(true, inputs[0], attrs);
    per_plane(inputs[0], &window, shape, p, |_, plane, out| {
        for (slot, index) in out.iter_mut().zip(winners(&window, plane)) {
            *slot = p.round(plane[index]);
        }
    })
}

/// Sends `each(output position, adjoint)` to the in-plane indices it names,
/// plane by plane, adding in the accumulation dtype and rounding once.
fn scatter(
    args: &VjpArgs,
    window: &Window,
    each: impl Fn(&[f64], usize, &mut dyn FnMut(usize, f64)) + Sync,
) -> Value {
    let (x, p) = (args.inputs[0], args.precision);
    let values = x.to_f64();
    let g = args.adjoint.to_f64();
    let mut out = vec![0.0; x.len()];
    out.par_chunks_mut(window.plane().max(1))
        .enumerate()
        .for_each(|(plane, slot)| {
            let input = &values[plane * window.plane()..(plane + 1) * window.plane()];
            let adjoint = &g[plane * window.positions()..(plane + 1) * window.positions()];
            let mut touched = vec![false; slot.len()];
            for (position, &a) in adjoint.iter().enumerate() {
                each(input, position, &mut |index, share| {
                    let term = p.acc(a * share);
                    slot[index] = if touched[index] {
                        p.acc(slot[index] + term)
                    } else {
                        term
                    };
                    touched[index] = true;
                });
            }
            slot.iter_mut().for_each(|v| *v = p.round(*v));
        });
    Value::from_parts_in(p.dtype, x.shape().to_vec(), out)
}

/// Each window's first maximum receives the window's adjoint (windows
/// that overlap add up in order of the output positions).
fn max_vjp(args: &VjpArgs) -> Value {
    let buffer = crate::in_accumulation_type!(args.precision, max_vjp_in(args));
    Value::from_buffer(args.inputs[0].shape().to_vec(), buffer)
}

fn max_vjp_in<T: Arith>(args: &VjpArgs) -> Buffer {
    let (window, _) = checked(true, args.inputs[0], args.attrs);
    let p = args.precision;
    let fix = Fix::of::<T>(p.accumulate);
    let values = elements_as::<T>(args.inputs[0].elements());
    let g = elements_as::<T>(args.adjoint.elements());
    let (plane_len, positions) = (window.plane(), window.positions());
    let span = |k: usize, d: usize| d * (k - 1) + 1;
    let overlapping = window.stride.0 < span(window.kh, window.dilation.0)
        || window.stride.1 < span(window.kw, window.dilation.1);
    let mut out = vec![T::default(); values.len()];
    out.par_chunks_mut(plane_len.max(1))
        .enumerate()
        .for_each(|(plane, slot)| {
            let input = &values[plane * plane_len..(plane + 1) * plane_len];
            let adjoint = &g[plane * positions..(plane + 1) * positions];
            let mut won = vec![0; positions];
            winners_into(&window, input, &mut won);
            if overlapping {
                let mut touched = vec![false; plane_len];
                for (&index, &a) in won.iter().zip(adjoint) {
                    slot[index] = if touched[index] {
                        fix.at(slot[index] + a)
                    } else {
                        a
                    };
                    touched[index] = true;
                }
            } else {
                // Windows apart: each element wins at most once.
                for (&index, &a) in won.iter().zip(adjoint) {
                    slot[index] = a;
                }
            }
        });
    Buffer::converted(T::buffer(out).elements(), p.dtype)
}

fn max_jvp(args: &JvpArgs) -> Value {
    let (window, shape) = checked(true, args.inputs[0], args.attrs);
    let tangent = args.tangents[0].to_f64();
    per_plane(
        args.inputs[0],
        &window,
        shape,
        args.precision,
        |plane, values, out| {
            let t = &tangent[plane * window.plane()..(plane + 1) * window.plane()];
            for (slot, index) in out.iter_mut().zip(winners(&window, values)) {
                *slot = args.precision.round(t[index]);
            }
        },
    )
}

/// Per output position: the first maximum's tap position plus one, or 0
/// when the maximum is tied (on a kink).
pub(super) fn max_kink_state(x: &Value, attrs: &Attrs) -> Vec<i64> {
    let (window, _) = checked(true, x, attrs);
    let values = x.to_f64();
    let planes = x.shape()[0] * x.shape()[1];
    let mut state = Vec::with_capacity(planes * window.positions());
    for plane in 0..planes {
        let plane = &values[plane * window.plane()..(plane + 1) * window.plane()];
        for (position, winner) in winners(&window, plane).into_iter().enumerate() {
            let (oy, ox) = (position / window.out_w, position % window.out_w);
            let best = plane[winner];
            let tied = taps(&window, oy, ox).filter(|&i| plane[i] == best).count() > 1;
            state.push(if tied { 0 } else { winner as i64 + 1 });
        }
    }
    state
}

/// The divisor of each window: all its taps with `count_include_pad`
/// (default), else only those inside the plane.
fn divisor(window: &Window, attrs: &Attrs, oy: usize, ox: usize) -> f64 {
    if attrs.count_include_pad.unwrap_or(true) {
        window.taps() as f64
    } else {
        taps(window, oy, ox).count() as f64
    }
}

fn average(window: &Window, attrs: &Attrs, p: Precision, plane: &[f64], out: &mut [f64]) {
    for (position, slot) in out.iter_mut().enumerate() {
        let (oy, ox) = (position / window.out_w, position % window.out_w);
        let total = p.sum(taps(window, oy, ox).map(|i| plane[i]));
        *slot = p.round(p.acc(total / divisor(window, attrs, oy, ox)));
    }
}

fn avg_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    let (window, shape) = checked(false, inputs[0], attrs);
    per_plane(inputs[0], &window, shape, p, |_, plane, out| {
        average(&window, attrs, p, plane, out)
    })
}

/// Every tap inside the plane receives the window's adjoint over the divisor.
fn avg_vjp(args: &VjpArgs) -> Value {
    let (window, _) = checked(false, args.inputs[0], args.attrs);
    let p = args.precision;
    scatter(args, &window, |_, position, send| {
        let (oy, ox) = (position / window.out_w, position % window.out_w);
        let share = p.acc(1.0 / divisor(&window, args.attrs, oy, ox));
        for index in taps(&window, oy, ox) {
            send(index, share);
        }
    })
}

/// Linear: the average of the tangent.
fn avg_jvp(args: &JvpArgs) -> Value {
    let (window, shape) = checked(false, args.tangents[0], args.attrs);
    per_plane(
        args.tangents[0],
        &window,
        shape,
        args.precision,
        |_, plane, out| average(&window, args.attrs, args.precision, plane, out),
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::dtype::Dtype;

    fn kernel(k: usize) -> Attrs {
        Attrs {
            kernel: Some(vec![k]),
            ..Attrs::default()
        }
    }

    #[test]
    fn max_pool_sends_the_adjoint_to_the_first_maximum() {
        // One 2×4 plane, 2×2 windows: (1, 5 | 5, 2) ties at 5, first wins; (0, 3 | 7, 7).
        let x = Value::from_parts(
            vec![1, 1, 2, 4],
            vec![1.0, 5.0, 0.0, 3.0, 5.0, 2.0, 7.0, 7.0],
        );
        let y = max_forward(&[&x], &kernel(2), Dtype::F64.into());
        assert_eq!(y, Value::from_parts(vec![1, 1, 1, 2], vec![5.0, 7.0]));
        let g = Value::from_parts(vec![1, 1, 1, 2], vec![1.0, 2.0]);
        let args = VjpArgs {
            slot: 0,
            inputs: &[&x],
            output: &y,
            adjoint: &g,
            attrs: &kernel(2),
            precision: Dtype::F64.into(),
        };
        assert_eq!(
            max_vjp(&args),
            Value::from_parts(
                vec![1, 1, 2, 4],
                vec![0.0, 1.0, 0.0, 0.0, 0.0, 0.0, 2.0, 0.0]
            )
        );
        assert_eq!(max_kink_state(&x, &kernel(2)), vec![0, 0]);
    }

    #[test]
    fn average_pool_counts_padding_unless_told_not_to() {
        // A 2×2 plane of ones, 2×2 window, stride 1, padding 1: 3×3 outputs;
        // the corner window covers one element.
        let x = Value::from_parts(vec![1, 1, 2, 2], vec![1.0; 4]);
        let mut attrs = Attrs {
            kernel: Some(vec![2]),
            stride: Some(vec![1]),
            padding: Some(vec![1]),
            ..Attrs::default()
        };
        let y = avg_forward(&[&x], &attrs, Dtype::F64.into());
        assert_eq!(y.get(0), 0.25);
        assert_eq!(y.get(4), 1.0);
        attrs.count_include_pad = Some(false);
        let y = avg_forward(&[&x], &attrs, Dtype::F64.into());
        assert_eq!(y.get(0), 1.0);
    }
}
