//! Normalisations: layer_norm, rms_norm, batch_norm (training mode, batch
//! statistics) and group_norm, each with an optional per-element weight and
//! bias as further inputs.
//!
//! All four normalise "lanes" of elements: layer_norm and rms_norm the
//! trailing axes from `axis` on, batch_norm each channel across the batch
//! and the spatial axes, group_norm each group of channels of one sample.
//! Statistics are carried in the accumulation dtype, the variance is the
//! biased one (divided by n), and each output is rounded once into the dtype.
//!
//! With x̂ = (x − μ) r, r = 1/√(σ² + ε) and y = w x̂ + b, the vector-Jacobian
//! product is x̄ = r (ĝ − mean(ĝ) − x̂ mean(ĝ x̂)) with ĝ = w ȳ (Ioffe &
//! Szegedy, "Batch Normalization", 2015, §3; the same algebra per row for
//! layer normalisation, Ba, Kiros & Hinton, "Layer Normalization", 2016);
//! rms_norm drops the mean: x̂ = x r, r = 1/√(mean(x²) + ε), x̄ = r (ĝ − x̂ mean(ĝ x̂)).

use super::kernels::arith::{Arith, Fix};
use super::{Attrs, JvpArgs, Precision, StructuredRule, VjpArgs};
use crate::format::shape as show;
use crate::tensor::{Buffer, Value, elements_as, numel, resolve_axis};
use rayon::prelude::*;
use std::borrow::Cow;

/// Normalisation over the axes from `axis` (default −1) to the last.
pub static LAYER_NORM: StructuredRule = StructuredRule {
    shape: |inputs, attrs| shape(Kind::Layer, inputs, attrs),
    forward: |inputs, attrs, p| forward(Kind::Layer, inputs, attrs, p),
    vjp: |args| vjp(Kind::Layer, args),
    jvp: |args| jvp(Kind::Layer, args),
};
/// Root-mean-square normalisation over the axes from `axis` to the last.
pub static RMS_NORM: StructuredRule = StructuredRule {
    shape: |inputs, attrs| shape(Kind::Rms, inputs, attrs),
    forward: |inputs, attrs, p| forward(Kind::Rms, inputs, attrs, p),
    vjp: |args| vjp(Kind::Rms, args),
    jvp: |args| jvp(Kind::Rms, args),
};
/// Per channel, over the batch and spatial axes (training mode).
pub static BATCH_NORM: StructuredRule = StructuredRule {
    shape: |inputs, attrs| shape(Kind::Batch, inputs, attrs),
    forward: |inputs, attrs, p| forward(Kind::Batch, inputs, attrs, p),
    vjp: |args| vjp(Kind::Batch, args),
    jvp: |args| jvp(Kind::Batch, args),
};
/// Per sample, over groups of channels and the spatial axes.
pub static GROUP_NORM: StructuredRule = StructuredRule {
    shape: |inputs, attrs| shape(Kind::Group, inputs, attrs),
    forward: |inputs, attrs, p| forward(Kind::Group, inputs, attrs, p),
    vjp: |args| vjp(Kind::Group, args),
    jvp: |args| jvp(Kind::Group, args),
};

/// Which normalisation a node is.
#[derive(Clone, Copy, PartialEq, Eq)]
enum Kind {
    Layer,
    Rms,
    Batch,
    Group,
}

impl Kind {
    fn name(self) -> &'static str {
        match self {
            Kind::Layer => "layer_norm",
            Kind::Rms => "rms_norm",
            Kind::Batch => "batch_norm",
            Kind::Group => "group_norm",
        }
    }

    /// PyTorch's default ε: 1e-5, and for rms_norm f32's machine epsilon
    /// (its default for f32 inputs).
    fn eps(self, attrs: &Attrs) -> f64 {
        attrs.eps.unwrap_or(match self {
            Kind::Rms => f32::EPSILON as f64,
            _ => 1e-5,
        })
    }

    fn centred(self) -> bool {
        self != Kind::Rms
    }
}

/// How the elements of x fall into lanes: x is cut into `planes` contiguous
/// planes of `size` elements; each plane belongs to one lane, and every
/// element of a lane uses the weight element its plane (or, for the trailing
/// kind, its place in the plane) says.
#[derive(Clone, Copy)]
struct Lanes {
    kind: Kind,
    planes: usize,
    size: usize,
    /// Channels of x [N, C, …] (batch and group norm).
    channels: usize,
    /// Groups per sample (group norm).
    groups: usize,
}

impl Lanes {
    fn of(kind: Kind, shape: &[usize], attrs: &Attrs) -> Lanes {
        match kind {
            Kind::Layer | Kind::Rms => {
                let axis = trailing_axis(shape, attrs).expect("axis checked by the validator");
                let size = numel(&shape[axis..]);
                Lanes {
                    kind,
                    planes: numel(&shape[..axis]),
                    size,
                    channels: 1,
                    groups: 1,
                }
            }
            Kind::Batch | Kind::Group => Lanes {
                kind,
                planes: shape[0] * shape[1],
                size: numel(&shape[2..]),
                channels: shape[1],
                groups: attrs.groups.unwrap_or(1).max(1),
            },
        }
    }

    fn count(self) -> usize {
        match self.kind {
            Kind::Layer | Kind::Rms => self.planes,
            Kind::Batch => self.channels,
            Kind::Group => self.planes / self.channels * self.groups,
        }
    }

    /// Elements per lane.
    fn length(self) -> usize {
        self.size * self.planes / self.count().max(1)
    }

    /// The lane plane `plane` belongs to.
    #[inline]
    fn lane_of(self, plane: usize) -> usize {
        match self.kind {
            Kind::Layer | Kind::Rms => plane,
            Kind::Batch => plane % self.channels,
            Kind::Group => {
                let per_group = self.channels / self.groups;
                plane / self.channels * self.groups + plane % self.channels / per_group
            }
        }
    }

    /// The planes of `lane`, in order.
    fn planes_of(self, lane: usize) -> impl Iterator<Item = usize> {
        let (first, step, count) = match self.kind {
            Kind::Layer | Kind::Rms => (lane, 1, 1),
            Kind::Batch => (lane, self.channels, self.planes / self.channels),
            Kind::Group => {
                let per_group = self.channels / self.groups;
                (lane * per_group, 1, per_group)
            }
        };
        (0..count).map(move |k| first + k * step)
    }

    /// The weight element of element k of plane `plane`.
    #[inline]
    fn weight(self, plane: usize, k: usize) -> usize {
        match self.kind {
            Kind::Layer | Kind::Rms => k,
            Kind::Batch | Kind::Group => plane % self.channels,
        }
    }

    /// The elements of `lane`, plane by plane, as slices of `data`.
    fn slices(self, data: &[f64], lane: usize) -> impl Iterator<Item = &[f64]> {
        self.planes_of(lane)
            .map(move |plane| &data[plane * self.size..(plane + 1) * self.size])
    }
}

/// The first normalised axis of layer_norm and rms_norm.
fn trailing_axis(shape: &[usize], attrs: &Attrs) -> Result<usize, String> {
    let axis = attrs.axis.unwrap_or(-1);
    resolve_axis(axis, shape.len())
        .ok_or_else(|| format!("axis {axis} is out of range for rank {}", shape.len()))
}

/// The shape a weight or bias must have.
fn parameter_shape(kind: Kind, x: &[usize], attrs: &Attrs) -> Result<Vec<usize>, String> {
    match kind {
        Kind::Layer | Kind::Rms => Ok(x[trailing_axis(x, attrs)?..].to_vec()),
        Kind::Batch | Kind::Group => Ok(vec![x[1]]),
    }
}

fn shape(kind: Kind, inputs: &[&[usize]], attrs: &Attrs) -> Result<Vec<usize>, String> {
    let x = inputs[0];
    let name = kind.name();
    let eps = kind.eps(attrs);
    if !(eps >= 0.0 && eps.is_finite()) {
        return Err(format!("{name} needs a finite eps ≥ 0, got {eps}"));
    }
    match kind {
        Kind::Layer | Kind::Rms if x.is_empty() => {
            return Err(format!("{name} needs a tensor, got a scalar"));
        }
        Kind::Batch | Kind::Group if x.len() < 2 => {
            return Err(format!(
                "{name} needs x of shape [N, C, …], got {}",
                show(x)
            ));
        }
        Kind::Batch if x[0] * numel(&x[2..]) <= 1 => {
            return Err(format!(
                "batch_norm in training mode needs more than one value per channel, got {}",
                show(x)
            ));
        }
        Kind::Group => {
            let groups = attrs.groups.unwrap_or(0);
            if groups == 0 || !x[1].is_multiple_of(groups) {
                return Err(format!(
                    "groups {groups} do not divide the {} channels of {}",
                    x[1],
                    show(x)
                ));
            }
        }
        _ => {}
    }
    let expected = parameter_shape(kind, x, attrs)?;
    for (slot, input) in inputs.iter().enumerate().skip(1) {
        if *input != expected.as_slice() {
            let role = if slot == 1 { "weight" } else { "bias" };
            return Err(format!(
                "{name} {role} has shape {} but x {} needs {}",
                show(input),
                show(x),
                show(&expected)
            ));
        }
    }
    Ok(x.to_vec())
}

/// Per lane, in the accumulation dtype: the mean (0 for rms_norm) and
/// r = 1/√(σ² + ε), split over lanes. Sums run in the lane's element order.
fn statistics(kind: Kind, lanes: Lanes, x: &[f64], eps: f64, p: Precision) -> Vec<(f64, f64)> {
    let n = lanes.length() as f64;
    (0..lanes.count())
        .into_par_iter()
        .with_min_len(lane_batch(lanes.length()))
        .map(|lane| {
            let mut mean = 0.0;
            if kind.centred() {
                let mut sum: Option<f64> = None;
                for slice in lanes.slices(x, lane) {
                    for &v in slice {
                        sum = Some(sum.map_or(v, |s| p.acc(s + v)));
                    }
                }
                mean = p.acc(sum.unwrap_or(0.0) / n);
            }
            let mut squares: Option<f64> = None;
            for slice in lanes.slices(x, lane) {
                for &v in slice {
                    let d = p.acc(v - mean);
                    let square = p.acc(d * d);
                    squares = Some(squares.map_or(square, |s| p.acc(s + square)));
                }
            }
            let variance = p.acc(squares.unwrap_or(0.0) / n);
            (mean, p.acc(1.0 / p.acc(p.acc(variance + eps).sqrt())))
        })
        .collect()
}

/// Lanes per task, so that a task holds at least a few thousand elements.
fn lane_batch(length: usize) -> usize {
    (4096 / length.max(1)).max(1)
}

/// The optional weight and bias, widened.
fn affine(inputs: &[&Value]) -> [Option<Vec<f64>>; 2] {
    [1, 2].map(|slot| inputs.get(slot).map(|v| v.to_f64().into_owned()))
}

/// x̂ of element `v` of a lane with statistics (mean, r).
#[inline]
fn hat(p: Precision, v: f64, (mean, r): (f64, f64)) -> f64 {
    p.acc(p.acc(v - mean) * r)
}

/// Fills every plane of an output of x's shape, in parallel:
/// `each(plane, lane, slot)` writes one plane.
fn per_plane(lanes: Lanes, each: impl Fn(usize, usize, &mut [f64]) + Sync) -> Vec<f64> {
    let mut out = vec![0.0; lanes.planes * lanes.size];
    out.par_chunks_mut(lanes.size.max(1))
        .enumerate()
        .with_min_len(lane_batch(lanes.size))
        .for_each(|(plane, slot)| each(plane, lanes.lane_of(plane), slot));
    out
}

fn forward(kind: Kind, inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    let buffer = crate::in_accumulation_type!(p, forward_in(kind, inputs, attrs, p));
    Value::from_buffer(inputs[0].shape().to_vec(), buffer)
}

/// Per lane, carried in `T`: the mean (0 for rms_norm) and r = 1/√(σ² + ε),
/// each sum in the lane's element order, split over lanes.
fn lane_statistics<T: Arith>(kind: Kind, lanes: Lanes, x: &[T], eps: f64, fix: Fix) -> Vec<(T, T)> {
    let n = T::from_f64(lanes.length() as f64);
    let (eps, one) = (T::from_f64(eps), T::from_f64(1.0));
    (0..lanes.count())
        .into_par_iter()
        .with_min_len(lane_batch(lanes.length()))
        .map(|lane| {
            let planes = || {
                lanes
                    .planes_of(lane)
                    .map(|plane| &x[plane * lanes.size..(plane + 1) * lanes.size])
            };
            let mut mean = T::default();
            if kind.centred() {
                let mut total = Running::default();
                for slice in planes() {
                    for &v in slice {
                        total.add(fix, v);
                    }
                }
                mean = fix.at(total.total / n);
            }
            let mut squares = Running::default();
            for slice in planes() {
                for &v in slice {
                    let d = fix.at(v - mean);
                    squares.add(fix, fix.at(d * d));
                }
            }
            let variance = fix.at(squares.total / n);
            (mean, fix.at(one / fix.at(fix.at(variance + eps).sqrt())))
        })
        .collect()
}

/// A running sum, each addition rounded; the first term taken as is (so
/// that a lone −0 survives, as a framework's sum keeps it).
#[derive(Default, Clone, Copy)]
struct Running<T> {
    total: T,
    started: bool,
}

impl<T: Arith> Running<T> {
    #[inline(always)]
    fn add(&mut self, fix: Fix, v: T) {
        self.total = if self.started {
            fix.at(self.total + v)
        } else {
            v
        };
        self.started = true;
    }
}

/// A sequential sum, each addition rounded; the first term as is.
#[inline]
fn sum<T: Arith>(fix: Fix, mut values: impl Iterator<Item = T>) -> T {
    let Some(mut total) = values.next() else {
        return T::default();
    };
    for v in values {
        total = fix.at(total + v);
    }
    total
}

/// The optional weight and bias in the accumulation type.
fn affine_in<'a, T: Arith>(inputs: &[&'a Value]) -> [Option<Cow<'a, [T]>>; 2] {
    [1, 2].map(|slot| inputs.get(slot).map(|v| elements_as::<T>(v.elements())))
}

fn forward_in<T: Arith>(kind: Kind, inputs: &[&Value], attrs: &Attrs, p: Precision) -> Buffer {
    let fix = Fix::of::<T>(p.accumulate);
    let lanes = Lanes::of(kind, inputs[0].shape(), attrs);
    let x = elements_as::<T>(inputs[0].elements());
    let stats = lane_statistics(kind, lanes, &x, kind.eps(attrs), fix);
    let [weight, bias] = affine_in::<T>(inputs);
    let mut out = vec![T::default(); x.len()];
    out.par_chunks_mut(lanes.size.max(1))
        .enumerate()
        .with_min_len(lane_batch(lanes.size))
        .for_each(|(plane, slot)| {
            let (mean, r) = stats[lanes.lane_of(plane)];
            let source = &x[plane * lanes.size..(plane + 1) * lanes.size];
            for (k, (y, &v)) in slot.iter_mut().zip(source).enumerate() {
                let h = fix.at(fix.at(v - mean) * r);
                let j = lanes.weight(plane, k);
                let scaled = weight.as_ref().map_or(h, |w| fix.at(h * w[j]));
                *y = bias.as_ref().map_or(scaled, |b| fix.at(scaled + b[j]));
            }
        });
    Buffer::converted(T::buffer(out).elements(), p.dtype)
}

/// The contribution to x, the weight or the bias.
fn vjp(kind: Kind, args: &VjpArgs) -> Value {
    let buffer = crate::in_accumulation_type!(args.precision, vjp_in(kind, args));
    Value::from_buffer(args.inputs[args.slot].shape().to_vec(), buffer)
}

fn vjp_in<T: Arith>(kind: Kind, args: &VjpArgs) -> Buffer {
    let p = args.precision;
    let fix = Fix::of::<T>(p.accumulate);
    let lanes = Lanes::of(kind, args.inputs[0].shape(), args.attrs);
    let g = elements_as::<T>(args.adjoint.elements());
    let done = |out: Vec<T>| Buffer::converted(T::buffer(out).elements(), p.dtype);
    if args.slot == 2 {
        return done(weight_sums(lanes, args.inputs[2].len(), fix, |i, _| g[i]));
    }
    let x = elements_as::<T>(args.inputs[0].elements());
    let stats = lane_statistics(kind, lanes, &x, kind.eps(args.attrs), fix);
    let hat = |i: usize, (mean, r): (T, T)| fix.at(fix.at(x[i] - mean) * r);
    if args.slot == 1 {
        return done(weight_sums(lanes, args.inputs[1].len(), fix, |i, lane| {
            fix.at(g[i] * hat(i, stats[lane]))
        }));
    }
    let [weight, _] = affine_in::<T>(args.inputs);
    let ghat = |i: usize, j: usize| weight.as_ref().map_or(g[i], |w| fix.at(g[i] * w[j]));
    let n = T::from_f64(lanes.length() as f64);
    // Per lane: mean(ĝ) and mean(ĝ x̂), both sums in the lane's element order.
    let means: Vec<(T, T)> = (0..lanes.count())
        .into_par_iter()
        .with_min_len(lane_batch(lanes.length()))
        .map(|lane| {
            let (mut sum_g, mut sum_gh) = (Running::default(), Running::default());
            for plane in lanes.planes_of(lane) {
                for k in 0..lanes.size {
                    let i = plane * lanes.size + k;
                    let gh = ghat(i, lanes.weight(plane, k));
                    sum_g.add(fix, gh);
                    sum_gh.add(fix, fix.at(gh * hat(i, stats[lane])));
                }
            }
            let mean_g = if kind.centred() {
                fix.at(sum_g.total / n)
            } else {
                T::default()
            };
            (mean_g, fix.at(sum_gh.total / n))
        })
        .collect();
    let mut out = vec![T::default(); x.len()];
    out.par_chunks_mut(lanes.size.max(1))
        .enumerate()
        .with_min_len(lane_batch(lanes.size))
        .for_each(|(plane, slot)| {
            let lane = lanes.lane_of(plane);
            let (mean_g, mean_gh) = means[lane];
            let r = stats[lane].1;
            for (k, y) in slot.iter_mut().enumerate() {
                let i = plane * lanes.size + k;
                let h = hat(i, stats[lane]);
                let inner =
                    fix.at(fix.at(ghat(i, lanes.weight(plane, k)) - mean_g) - fix.at(h * mean_gh));
                *y = fix.at(r * inner);
            }
        });
    done(out)
}

/// Σ of `term(element, lane)` over the elements that use each weight
/// element, carried in `T`, in order of the planes.
fn weight_sums<T: Arith>(
    lanes: Lanes,
    len: usize,
    fix: Fix,
    term: impl Fn(usize, usize) -> T + Sync,
) -> Vec<T> {
    match lanes.kind {
        // Weight element k is element k of every plane: split over k.
        Kind::Layer | Kind::Rms => (0..len)
            .into_par_iter()
            .with_min_len(64)
            .map(|k| {
                sum(
                    fix,
                    (0..lanes.planes).map(|plane| term(plane * lanes.size + k, plane)),
                )
            })
            .collect(),
        // Weight element c is every element of the planes of channel c.
        Kind::Batch | Kind::Group => (0..len)
            .into_par_iter()
            .map(|channel| {
                let term = &term;
                let planes = (channel..lanes.planes).step_by(lanes.channels);
                let elements = planes.flat_map(|plane| {
                    let lane = lanes.lane_of(plane);
                    (plane * lanes.size..(plane + 1) * lanes.size).map(move |i| term(i, lane))
                });
                sum(fix, elements)
            })
            .collect(),
    }
}

/// ẏ = w ẋ̂ + ẇ x̂ + ḃ, with ẋ̂ = r (ẋ − mean(ẋ) − x̂ mean(x̂ ẋ)).
fn jvp(kind: Kind, args: &JvpArgs) -> Value {
    let (x, p) = (args.inputs[0], args.precision);
    let lanes = Lanes::of(kind, x.shape(), args.attrs);
    let values = x.to_f64();
    let t = args.tangents[0].to_f64();
    let stats = statistics(kind, lanes, &values, kind.eps(args.attrs), p);
    let [weight, _] = affine(args.inputs);
    let weight_tangent = args.tangents.get(1).map(|v| v.to_f64());
    let bias_tangent = args.tangents.get(2).map(|v| v.to_f64());
    let n = lanes.length() as f64;
    let means: Vec<(f64, f64)> = (0..lanes.count())
        .map(|lane| {
            let mean_t = if kind.centred() {
                p.acc(p.sum(lanes.slices(&t, lane).flatten().copied()) / n)
            } else {
                0.0
            };
            let products = lanes
                .slices(&t, lane)
                .flatten()
                .zip(lanes.slices(&values, lane).flatten())
                .map(|(&ti, &v)| p.acc(ti * hat(p, v, stats[lane])));
            (mean_t, p.acc(p.sum(products) / n))
        })
        .collect();
    let out = per_plane(lanes, |plane, lane, slot| {
        let (mean_t, mean_ht) = means[lane];
        let r = stats[lane].1;
        for (k, y) in slot.iter_mut().enumerate() {
            let i = plane * lanes.size + k;
            let j = lanes.weight(plane, k);
            let h = hat(p, values[i], stats[lane]);
            let hat_dot = p.acc(r * p.acc(p.acc(t[i] - mean_t) - p.acc(h * mean_ht)));
            let mut total = weight.as_ref().map_or(hat_dot, |w| p.acc(w[j] * hat_dot));
            if let Some(wt) = &weight_tangent {
                total = p.acc(total + p.acc(wt[j] * h));
            }
            if let Some(bt) = &bias_tangent {
                total = p.acc(total + bt[j]);
            }
            *y = p.round(total);
        }
    });
    Value::from_parts_in(p.dtype, x.shape().to_vec(), out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::dtype::Dtype;

    fn tensor(shape: &[usize], data: &[f64]) -> Value {
        Value::from_parts(shape.to_vec(), data.to_vec())
    }

    #[test]
    fn layer_norm_rows_have_zero_mean_and_unit_variance() {
        let x = tensor(&[2, 4], &[1.0, 2.0, 3.0, 4.0, -3.0, 0.0, 3.0, 6.0]);
        let attrs = Attrs {
            eps: Some(0.0),
            ..Attrs::default()
        };
        let y = forward(Kind::Layer, &[&x], &attrs, Dtype::F64.into());
        // Row 1: mean 2.5, variance 1.25, so (1 − 2.5)/√1.25 = −1.3416… (by hand).
        assert!((y.get(0) + 1.5 / 1.25f64.sqrt()).abs() < 1e-15);
        for row in y.to_f64().chunks(4) {
            assert!(row.iter().sum::<f64>().abs() < 1e-14);
            assert!((row.iter().map(|v| v * v).sum::<f64>() / 4.0 - 1.0).abs() < 1e-14);
        }
    }

    #[test]
    fn misfits_are_explained() {
        let groups = Attrs {
            groups: Some(3),
            ..Attrs::default()
        };
        assert!(
            shape(Kind::Group, &[&[2, 4, 5]], &groups)
                .unwrap_err()
                .contains("groups 3 do not divide the 4 channels")
        );
        assert!(
            shape(Kind::Layer, &[&[2, 4], &[3]], &Attrs::default())
                .unwrap_err()
                .contains("weight")
        );
        assert!(shape(Kind::Batch, &[&[1, 3]], &Attrs::default()).is_err());
    }
}
