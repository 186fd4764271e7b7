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

use super::{Attrs, JvpArgs, Precision, StructuredRule, VjpArgs};
use crate::format::shape as show;
use crate::tensor::{Value, numel, resolve_axis};
use rayon::prelude::*;

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

/// How the elements of x fall into lanes and onto the weight's elements.
#[derive(Clone, Copy)]
enum Lanes {
    /// Contiguous lanes of `length`; element k of a lane uses weight k.
    Trailing { lanes: usize, length: usize },
    /// One lane per channel of x [N, C, S…]: `batch` samples of `spatial`.
    Channels {
        batch: usize,
        channels: usize,
        spatial: usize,
    },
    /// One contiguous lane per (sample, group), each `per_group` channels of
    /// `spatial` elements.
    Groups {
        lanes: usize,
        groups: usize,
        per_group: usize,
        spatial: usize,
    },
}

impl Lanes {
    fn of(kind: Kind, shape: &[usize], attrs: &Attrs) -> Lanes {
        match kind {
            Kind::Layer | Kind::Rms => {
                let axis = trailing_axis(shape, attrs).expect("axis checked by the validator");
                let length = numel(&shape[axis..]);
                Lanes::Trailing {
                    lanes: numel(shape) / length.max(1),
                    length,
                }
            }
            Kind::Batch => Lanes::Channels {
                batch: shape[0],
                channels: shape[1],
                spatial: numel(&shape[2..]),
            },
            Kind::Group => {
                let groups = attrs.groups.unwrap_or(1).max(1);
                Lanes::Groups {
                    lanes: shape[0] * groups,
                    groups,
                    per_group: shape[1] / groups,
                    spatial: numel(&shape[2..]),
                }
            }
        }
    }

    fn count(self) -> usize {
        match self {
            Lanes::Trailing { lanes, .. } | Lanes::Groups { lanes, .. } => lanes,
            Lanes::Channels { channels, .. } => channels,
        }
    }

    fn length(self) -> usize {
        match self {
            Lanes::Trailing { length, .. } => length,
            Lanes::Channels { batch, spatial, .. } => batch * spatial,
            Lanes::Groups {
                per_group, spatial, ..
            } => per_group * spatial,
        }
    }

    /// Flat index of element k of `lane`.
    #[inline]
    fn element(self, lane: usize, k: usize) -> usize {
        match self {
            Lanes::Channels {
                channels, spatial, ..
            } => (k / spatial * channels + lane) * spatial + k % spatial,
            _ => lane * self.length() + k,
        }
    }

    /// The weight element that element k of `lane` uses.
    #[inline]
    fn weight(self, lane: usize, k: usize) -> usize {
        match self {
            Lanes::Trailing { .. } => k,
            Lanes::Channels { .. } => lane,
            Lanes::Groups {
                groups,
                per_group,
                spatial,
                ..
            } => (lane % groups) * per_group + k / spatial,
        }
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

/// One lane's statistics in the accumulation dtype: the mean (0 for
/// rms_norm) and r = 1/√(σ² + ε).
fn statistics(kind: Kind, p: Precision, lane: &[f64], eps: f64) -> (f64, f64) {
    let n = lane.len() as f64;
    let mean = if kind.centred() {
        p.acc(p.sum(lane.iter().copied()) / n)
    } else {
        0.0
    };
    let squares = lane.iter().map(|&x| {
        let d = p.acc(x - mean);
        p.acc(d * d)
    });
    let variance = p.acc(p.sum(squares) / n);
    (mean, p.acc(1.0 / p.acc(p.acc(variance + eps).sqrt())))
}

/// The normalised values x̂ of every lane, in lane order, with each lane's r.
struct Normalised {
    lanes: Lanes,
    /// x̂, lane by lane (element k of lane l at l · length + k).
    hat: Vec<f64>,
    /// r per lane.
    rstd: Vec<f64>,
}

fn normalise(kind: Kind, x: &Value, attrs: &Attrs, p: Precision) -> Normalised {
    let lanes = Lanes::of(kind, x.shape(), attrs);
    let (count, length) = (lanes.count(), lanes.length());
    let values = x.to_f64();
    let eps = kind.eps(attrs);
    let mut hat = vec![0.0; count * length];
    let mut rstd = vec![0.0; count];
    // Lanes are independent: split over them, never along a sum.
    hat.par_chunks_mut(length.max(1))
        .zip(rstd.par_iter_mut())
        .enumerate()
        .with_min_len(lane_batch(length))
        .for_each(|(lane, (out, r))| {
            let lane_values: Vec<f64> = (0..length)
                .map(|k| values[lanes.element(lane, k)])
                .collect();
            let (mean, inverse) = statistics(kind, p, &lane_values, eps);
            *r = inverse;
            for (slot, &v) in out.iter_mut().zip(&lane_values) {
                *slot = p.acc(p.acc(v - mean) * inverse);
            }
        });
    Normalised { lanes, hat, rstd }
}

/// Lanes per task, so that a task holds at least a few thousand elements.
fn lane_batch(length: usize) -> usize {
    (4096 / length.max(1)).max(1)
}

/// An optional input, widened.
type Widened<'a> = Option<std::borrow::Cow<'a, [f64]>>;

/// The optional weight and bias, widened.
fn affine<'a>(inputs: &'a [&'a Value]) -> (Widened<'a>, Widened<'a>) {
    (
        inputs.get(1).map(|w| w.to_f64()),
        inputs.get(2).map(|b| b.to_f64()),
    )
}

fn forward(kind: Kind, inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    let x = inputs[0];
    let normalised = normalise(kind, x, attrs, p);
    let (weight, bias) = affine(inputs);
    let lanes = normalised.lanes;
    let length = lanes.length();
    let mut out = vec![0.0; x.len()];
    for (lane, hats) in normalised.hat.chunks(length.max(1)).enumerate() {
        for (k, &h) in hats.iter().enumerate() {
            let j = lanes.weight(lane, k);
            let scaled = weight.as_ref().map_or(h, |w| p.acc(h * w[j]));
            let shifted = bias.as_ref().map_or(scaled, |b| p.acc(scaled + b[j]));
            out[lanes.element(lane, k)] = p.round(shifted);
        }
    }
    Value::from_parts_in(p.dtype, x.shape().to_vec(), out)
}

/// The contribution to x, the weight or the bias.
fn vjp(kind: Kind, args: &VjpArgs) -> Value {
    let (x, p) = (args.inputs[0], args.precision);
    let normalised = normalise(kind, x, args.attrs, p);
    let lanes = normalised.lanes;
    let length = lanes.length();
    let g = args.adjoint.to_f64();
    if args.slot > 0 {
        // Σ ȳ x̂ (weight) or Σ ȳ (bias) over the elements that use each parameter.
        let target = args.inputs[args.slot];
        let mut sums: Vec<Option<f64>> = vec![None; target.len()];
        for (lane, hats) in normalised.hat.chunks(length.max(1)).enumerate() {
            for (k, &h) in hats.iter().enumerate() {
                let gi = g[lanes.element(lane, k)];
                let term = if args.slot == 1 { p.acc(gi * h) } else { gi };
                let slot = &mut sums[lanes.weight(lane, k)];
                *slot = Some(slot.map_or(term, |s| p.acc(s + term)));
            }
        }
        let data = sums
            .into_iter()
            .map(|s| p.round(s.unwrap_or(0.0)))
            .collect();
        return Value::from_parts_in(p.dtype, target.shape().to_vec(), data);
    }
    let (weight, _) = affine(args.inputs);
    let n = length as f64;
    let mut out = vec![0.0; x.len()];
    let rows: Vec<Vec<(usize, f64)>> = normalised
        .hat
        .par_chunks(length.max(1))
        .enumerate()
        .with_min_len(lane_batch(length))
        .map(|(lane, hats)| {
            let ghat: Vec<f64> = (0..length)
                .map(|k| {
                    let gi = g[lanes.element(lane, k)];
                    weight
                        .as_ref()
                        .map_or(gi, |w| p.acc(gi * w[lanes.weight(lane, k)]))
                })
                .collect();
            let mean_g = if kind.centred() {
                p.acc(p.sum(ghat.iter().copied()) / n)
            } else {
                0.0
            };
            let mean_gh = p.acc(p.sum(ghat.iter().zip(hats).map(|(&a, &h)| p.acc(a * h))) / n);
            let r = normalised.rstd[lane];
            (0..length)
                .map(|k| {
                    let inner = p.acc(p.acc(ghat[k] - mean_g) - p.acc(hats[k] * mean_gh));
                    (lanes.element(lane, k), p.round(p.acc(r * inner)))
                })
                .collect()
        })
        .collect();
    for (index, value) in rows.into_iter().flatten() {
        out[index] = value;
    }
    Value::from_parts_in(p.dtype, x.shape().to_vec(), out)
}

/// ẏ = w ẋ̂ + ẇ x̂ + ḃ, with ẋ̂ = r (ẋ − mean(ẋ) − x̂ mean(x̂ ẋ)).
fn jvp(kind: Kind, args: &JvpArgs) -> Value {
    let (x, p) = (args.inputs[0], args.precision);
    let normalised = normalise(kind, x, args.attrs, p);
    let lanes = normalised.lanes;
    let length = lanes.length();
    let n = length as f64;
    let (weight, _) = affine(args.inputs);
    let t = args.tangents[0].to_f64();
    let weight_tangent = args.tangents.get(1).map(|v| v.to_f64());
    let bias_tangent = args.tangents.get(2).map(|v| v.to_f64());
    let mut out = vec![0.0; x.len()];
    for (lane, hats) in normalised.hat.chunks(length.max(1)).enumerate() {
        let ts: Vec<f64> = (0..length).map(|k| t[lanes.element(lane, k)]).collect();
        let mean_t = if kind.centred() {
            p.acc(p.sum(ts.iter().copied()) / n)
        } else {
            0.0
        };
        let mean_ht = p.acc(p.sum(ts.iter().zip(hats).map(|(&a, &h)| p.acc(a * h))) / n);
        let r = normalised.rstd[lane];
        for k in 0..length {
            let j = lanes.weight(lane, k);
            let hat_dot = p.acc(r * p.acc(p.acc(ts[k] - mean_t) - p.acc(hats[k] * mean_ht)));
            let mut total = weight.as_ref().map_or(hat_dot, |w| p.acc(w[j] * hat_dot));
            if let Some(wt) = &weight_tangent {
                total = p.acc(total + p.acc(wt[j] * hats[k]));
            }
            if let Some(bt) = &bias_tangent {
                total = p.acc(total + bt[j]);
            }
            out[lanes.element(lane, k)] = p.round(total);
        }
    }
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
