//! One recorder method per catalog op. Each computes through the op table
//! and panics, naming the caller's line, when the inputs do not fit the op
//! (use [`Tape::apply`] for a `Result`).

use super::{Tape, Var};
use crate::ops::{Approximate, Attrs, Op};
use std::panic::Location;

/// Methods of ops without attributes: `name => Op(args)`.
macro_rules! plain_ops {
    ($($(#[$doc:meta])* $method:ident => $op:ident ( $($arg:ident),* );)*) => {
        impl Tape {
            $(
                $(#[$doc])*
                #[track_caller]
                pub fn $method(&mut self, $($arg: Var),*) -> Var {
                    self.op_at(Op::$op, &[$($arg),*], Attrs::default(), Location::caller())
                }
            )*
        }
    };
}

plain_ops! {
    /// a + b (broadcast).
    add => Add(a, b);
    /// a − b (broadcast).
    sub => Sub(a, b);
    /// a · b (broadcast).
    mul => Mul(a, b);
    /// a / b (broadcast).
    div => Div(a, b);
    /// −x.
    neg => Neg(x);
    /// eˣ.
    exp => Exp(x);
    /// ln x.
    log => Log(x);
    /// √x.
    sqrt => Sqrt(x);
    /// |x|.
    abs => Abs(x);
    /// sin x.
    sin => Sin(x);
    /// cos x.
    cos => Cos(x);
    /// tanh x.
    tanh => Tanh(x);
    /// σ(x) = 1 / (1 + e⁻ˣ).
    sigmoid => Sigmoid(x);
    /// max(x, 0).
    relu => Relu(x);
    /// a @ b, batched over leading axes.
    matmul => Matmul(a, b);
    /// Swaps the last two axes.
    transpose => Transpose(x);
    /// Mean squared error of `prediction` against `target`.
    mse => Mse(prediction, target);
    /// max(a, b) (broadcast); a tie gives each half the adjoint.
    maximum => Maximum(a, b);
    /// min(a, b) (broadcast); a tie gives each half the adjoint.
    minimum => Minimum(a, b);
    /// aᵇ with a tensor exponent (broadcast).
    powt => Powt(a, b);
    /// a where `condition` is 1, b where it is 0 (all three broadcast).
    where_ => Where(condition, a, b);
    /// tan x.
    tan => Tan(x);
    /// x².
    square => Square(x);
    /// 1/x.
    reciprocal => Reciprocal(x);
    /// 1/√x.
    rsqrt => Rsqrt(x);
    /// ln(1 + x).
    log1p => Log1p(x);
    /// eˣ − 1.
    expm1 => Expm1(x);
    /// The error function.
    erf => Erf(x);
    /// x σ(x).
    silu => Silu(x);
    /// x Φ(x), the exact GELU.
    gelu => Gelu(x);
    /// Rows of `table` [V, D] by `indices` (an index tensor, see [`Tape::indices`]).
    embedding => Embedding(table, indices);
    /// Mean negative log-likelihood of `log_probs` [N, C] at class `targets` [N].
    nll_loss => NllLoss(log_probs, targets);
    /// Mean binary cross-entropy of `logits` against `targets` (one shape).
    bce_with_logits => BceWithLogits(logits, targets);
    /// Mean |prediction − target|.
    l1_loss => L1Loss(prediction, target);
}

/// The attributes of a reduction along `axis` (all elements when `None`).
fn along(axis: Option<i64>, keepdims: bool) -> Attrs {
    Attrs {
        axis,
        keepdims,
        ..Attrs::default()
    }
}

/// Attributes with one field set, the rest default.
macro_rules! attrs {
    ($($field:ident: $value:expr),* $(,)?) => {
        Attrs { $($field: $value,)* ..Attrs::default() }
    };
}

/// The inputs of an op with optional trailing inputs: the leading ones, then
/// the optional ones that are given (a later one needs the earlier ones).
fn with_optional(leading: &[Var], optional: &[Option<Var>]) -> Vec<Var> {
    let mut inputs = leading.to_vec();
    inputs.extend(optional.iter().map_while(|var| *var));
    inputs
}

impl Tape {
    /// min(max(x, min), max); either bound may be `None`.
    #[track_caller]
    pub fn clamp(&mut self, x: Var, min: Option<f64>, max: Option<f64>) -> Var {
        self.op_at(
            Op::Clamp,
            &[x],
            attrs!(min: min, max: max),
            Location::caller(),
        )
    }

    /// GELU in its tanh form, 0.5 x (1 + tanh(√(2/π)(x + 0.044715 x³))).
    #[track_caller]
    pub fn gelu_tanh(&mut self, x: Var) -> Var {
        let attrs = attrs!(approximate: Some(Approximate::Tanh));
        self.op_at(Op::Gelu, &[x], attrs, Location::caller())
    }

    /// (1/β) ln(1 + e^(βx)), and x where βx > `threshold`.
    #[track_caller]
    pub fn softplus(&mut self, x: Var, beta: f64, threshold: f64) -> Var {
        let attrs = attrs!(beta: Some(beta), threshold: Some(threshold));
        self.op_at(Op::Softplus, &[x], attrs, Location::caller())
    }

    /// x for x > 0, else α(eˣ − 1).
    #[track_caller]
    pub fn elu(&mut self, x: Var, alpha: f64) -> Var {
        self.op_at(
            Op::Elu,
            &[x],
            attrs!(alpha: Some(alpha)),
            Location::caller(),
        )
    }

    /// `x` broadcast to `shape`.
    #[track_caller]
    pub fn broadcast_to(&mut self, x: Var, shape: &[usize]) -> Var {
        let attrs = attrs!(shape: Some(shape.to_vec()));
        self.op_at(Op::BroadcastTo, &[x], attrs, Location::caller())
    }

    /// `inputs` joined along an existing `axis`.
    #[track_caller]
    pub fn concat(&mut self, inputs: &[Var], axis: i64) -> Var {
        self.op_at(
            Op::Concat,
            inputs,
            attrs!(axis: Some(axis)),
            Location::caller(),
        )
    }

    /// `inputs` of one shape joined along a new `axis`.
    #[track_caller]
    pub fn stack(&mut self, inputs: &[Var], axis: i64) -> Var {
        self.op_at(
            Op::Stack,
            inputs,
            attrs!(axis: Some(axis)),
            Location::caller(),
        )
    }

    /// `x[start:end:step]` along `axis`, with Python's rules (negative bounds
    /// count from the end; `None` is the whole walk).
    #[track_caller]
    pub fn slice(
        &mut self,
        x: Var,
        axis: i64,
        start: Option<i64>,
        end: Option<i64>,
        step: i64,
    ) -> Var {
        let attrs = attrs!(axis: Some(axis), start: start, end: end, step: Some(step));
        self.op_at(Op::Slice, &[x], attrs, Location::caller())
    }

    /// Index `index` along `axis`, which is dropped.
    #[track_caller]
    pub fn select(&mut self, x: Var, axis: i64, index: i64) -> Var {
        let attrs = attrs!(axis: Some(axis), index: Some(index));
        self.op_at(Op::Select, &[x], attrs, Location::caller())
    }

    /// Constant padding: `pads` holds every axis's start count, then every
    /// axis's end count (negative crops).
    #[track_caller]
    pub fn pad(&mut self, x: Var, pads: &[i64], value: f64) -> Var {
        let attrs = attrs!(pads: Some(pads.to_vec()), value: Some(value));
        self.op_at(Op::Pad, &[x], attrs, Location::caller())
    }

    /// `data` read at `indices` along `axis` (PyTorch's gather).
    #[track_caller]
    pub fn gather(&mut self, data: Var, indices: Var, axis: i64) -> Var {
        self.op_at(
            Op::Gather,
            &[data, indices],
            attrs!(axis: Some(axis)),
            Location::caller(),
        )
    }

    /// Π of all elements: a scalar.
    #[track_caller]
    pub fn prod(&mut self, x: Var) -> Var {
        self.op_at(Op::Prod, &[x], Attrs::default(), Location::caller())
    }

    /// Π along `axis`.
    #[track_caller]
    pub fn prod_axis(&mut self, x: Var, axis: i64, keepdims: bool) -> Var {
        self.op_at(
            Op::Prod,
            &[x],
            along(Some(axis), keepdims),
            Location::caller(),
        )
    }

    /// Minimum along `axis`; the first minimum receives the adjoint.
    #[track_caller]
    pub fn min_axis(&mut self, x: Var, axis: i64, keepdims: bool) -> Var {
        self.op_at(
            Op::Min,
            &[x],
            along(Some(axis), keepdims),
            Location::caller(),
        )
    }

    /// Variance along `axis` (all elements when `None`), divided by n − `correction`.
    #[track_caller]
    pub fn var(&mut self, x: Var, axis: Option<i64>, correction: f64, keepdims: bool) -> Var {
        let attrs = Attrs {
            correction: Some(correction),
            ..along(axis, keepdims)
        };
        self.op_at(Op::Var, &[x], attrs, Location::caller())
    }

    /// Standard deviation along `axis` (all elements when `None`).
    #[track_caller]
    pub fn std(&mut self, x: Var, axis: Option<i64>, correction: f64, keepdims: bool) -> Var {
        let attrs = Attrs {
            correction: Some(correction),
            ..along(axis, keepdims)
        };
        self.op_at(Op::Std, &[x], attrs, Location::caller())
    }

    /// Running sum along `axis`.
    #[track_caller]
    pub fn cumsum(&mut self, x: Var, axis: i64) -> Var {
        self.op_at(
            Op::Cumsum,
            &[x],
            attrs!(axis: Some(axis)),
            Location::caller(),
        )
    }

    /// conv1d of x [N, C, L] by w [O, C, K] with an optional bias [O], the
    /// same `stride` and `padding` on its axis (dilation 1, one group; use
    /// [`Tape::apply`] with [`Attrs`] for the rest).
    #[track_caller]
    pub fn conv1d(
        &mut self,
        x: Var,
        w: Var,
        bias: Option<Var>,
        stride: usize,
        padding: usize,
    ) -> Var {
        let attrs = attrs!(stride: Some(vec![stride]), padding: Some(vec![padding]));
        let inputs = with_optional(&[x, w], &[bias]);
        self.op_at(Op::Conv1d, &inputs, attrs, Location::caller())
    }

    /// conv2d of x [N, C, H, W] by w [O, C, kH, kW] with an optional bias [O],
    /// the same `stride` and `padding` on both axes (dilation 1, one group;
    /// use [`Tape::apply`] with [`Attrs`] for the rest).
    #[track_caller]
    pub fn conv2d(
        &mut self,
        x: Var,
        w: Var,
        bias: Option<Var>,
        stride: usize,
        padding: usize,
    ) -> Var {
        let attrs = attrs!(stride: Some(vec![stride]), padding: Some(vec![padding]));
        let inputs = with_optional(&[x, w], &[bias]);
        self.op_at(Op::Conv2d, &inputs, attrs, Location::caller())
    }

    /// Maximum over `kernel` × `kernel` windows `stride` apart.
    #[track_caller]
    pub fn max_pool2d(&mut self, x: Var, kernel: usize, stride: usize) -> Var {
        let attrs = attrs!(kernel: Some(vec![kernel]), stride: Some(vec![stride]));
        self.op_at(Op::MaxPool2d, &[x], attrs, Location::caller())
    }

    /// Mean over `kernel` × `kernel` windows `stride` apart.
    #[track_caller]
    pub fn avg_pool2d(&mut self, x: Var, kernel: usize, stride: usize) -> Var {
        let attrs = attrs!(kernel: Some(vec![kernel]), stride: Some(vec![stride]));
        self.op_at(Op::AvgPool2d, &[x], attrs, Location::caller())
    }

    /// Layer normalisation over the last axis, then · weight + bias.
    #[track_caller]
    pub fn layer_norm(&mut self, x: Var, weight: Option<Var>, bias: Option<Var>, eps: f64) -> Var {
        let inputs = with_optional(&[x], &[weight, bias]);
        self.op_at(
            Op::LayerNorm,
            &inputs,
            attrs!(eps: Some(eps)),
            Location::caller(),
        )
    }

    /// Root-mean-square normalisation over the last axis, then · weight.
    #[track_caller]
    pub fn rms_norm(&mut self, x: Var, weight: Option<Var>, eps: f64) -> Var {
        let inputs = with_optional(&[x], &[weight]);
        self.op_at(
            Op::RmsNorm,
            &inputs,
            attrs!(eps: Some(eps)),
            Location::caller(),
        )
    }

    /// Batch normalisation in training mode over x [N, C, …], then · weight + bias.
    #[track_caller]
    pub fn batch_norm(&mut self, x: Var, weight: Option<Var>, bias: Option<Var>, eps: f64) -> Var {
        let inputs = with_optional(&[x], &[weight, bias]);
        self.op_at(
            Op::BatchNorm,
            &inputs,
            attrs!(eps: Some(eps)),
            Location::caller(),
        )
    }

    /// Group normalisation of x [N, C, …] in `groups` groups, then · weight + bias.
    #[track_caller]
    pub fn group_norm(
        &mut self,
        x: Var,
        groups: usize,
        weight: Option<Var>,
        bias: Option<Var>,
        eps: f64,
    ) -> Var {
        let inputs = with_optional(&[x], &[weight, bias]);
        let attrs = attrs!(groups: Some(groups), eps: Some(eps));
        self.op_at(Op::GroupNorm, &inputs, attrs, Location::caller())
    }

    /// Mean Huber loss with threshold `delta`.
    #[track_caller]
    pub fn huber(&mut self, prediction: Var, target: Var, delta: f64) -> Var {
        let attrs = attrs!(delta: Some(delta));
        self.op_at(Op::Huber, &[prediction, target], attrs, Location::caller())
    }

    /// xᵖ for a constant exponent `p`.
    #[track_caller]
    pub fn pow(&mut self, x: Var, exponent: f64) -> Var {
        self.op_at(
            Op::Pow,
            &[x],
            Attrs {
                exponent: Some(exponent),
                ..Attrs::default()
            },
            Location::caller(),
        )
    }

    /// x where x > 0, else `slope`·x.
    #[track_caller]
    pub fn leaky_relu(&mut self, x: Var, slope: f64) -> Var {
        self.op_at(
            Op::LeakyRelu,
            &[x],
            Attrs {
                slope: Some(slope),
                ..Attrs::default()
            },
            Location::caller(),
        )
    }

    /// Permutes the axes: output axis k is input axis `perm[k]`.
    #[track_caller]
    pub fn permute(&mut self, x: Var, perm: &[usize]) -> Var {
        self.op_at(
            Op::Transpose,
            &[x],
            Attrs {
                perm: Some(perm.to_vec()),
                ..Attrs::default()
            },
            Location::caller(),
        )
    }

    /// The same elements in a new shape of equal size.
    #[track_caller]
    pub fn reshape(&mut self, x: Var, shape: &[usize]) -> Var {
        self.op_at(
            Op::Reshape,
            &[x],
            Attrs {
                shape: Some(shape.to_vec()),
                ..Attrs::default()
            },
            Location::caller(),
        )
    }

    /// Σ of all elements: a scalar.
    #[track_caller]
    pub fn sum(&mut self, x: Var) -> Var {
        self.op_at(Op::Sum, &[x], Attrs::default(), Location::caller())
    }

    /// Σ along `axis` (negative counts from the end), keeping it with length 1 if `keepdims`.
    #[track_caller]
    pub fn sum_axis(&mut self, x: Var, axis: i64, keepdims: bool) -> Var {
        self.op_at(
            Op::Sum,
            &[x],
            along(Some(axis), keepdims),
            Location::caller(),
        )
    }

    /// Mean of all elements: a scalar.
    #[track_caller]
    pub fn mean(&mut self, x: Var) -> Var {
        self.op_at(Op::Mean, &[x], Attrs::default(), Location::caller())
    }

    /// Mean along `axis`.
    #[track_caller]
    pub fn mean_axis(&mut self, x: Var, axis: i64, keepdims: bool) -> Var {
        self.op_at(
            Op::Mean,
            &[x],
            along(Some(axis), keepdims),
            Location::caller(),
        )
    }

    /// Maximum along `axis`; the first maximum receives the adjoint.
    #[track_caller]
    pub fn max_axis(&mut self, x: Var, axis: i64, keepdims: bool) -> Var {
        self.op_at(
            Op::Max,
            &[x],
            along(Some(axis), keepdims),
            Location::caller(),
        )
    }

    /// Softmax along `axis` (−1 for the last).
    #[track_caller]
    pub fn softmax(&mut self, x: Var, axis: i64) -> Var {
        self.op_at(
            Op::Softmax,
            &[x],
            along(Some(axis), false),
            Location::caller(),
        )
    }

    /// Log-softmax along `axis` (−1 for the last).
    #[track_caller]
    pub fn log_softmax(&mut self, x: Var, axis: i64) -> Var {
        self.op_at(
            Op::LogSoftmax,
            &[x],
            along(Some(axis), false),
            Location::caller(),
        )
    }

    /// log Σ eˣ of all elements: a scalar.
    #[track_caller]
    pub fn logsumexp(&mut self, x: Var) -> Var {
        self.op_at(Op::Logsumexp, &[x], Attrs::default(), Location::caller())
    }

    /// log Σ eˣ along `axis`.
    #[track_caller]
    pub fn logsumexp_axis(&mut self, x: Var, axis: i64, keepdims: bool) -> Var {
        self.op_at(
            Op::Logsumexp,
            &[x],
            along(Some(axis), keepdims),
            Location::caller(),
        )
    }

    /// Mean cross-entropy of `logits` [N, C] against one class index per row.
    #[track_caller]
    pub fn cross_entropy(&mut self, logits: Var, targets: &[usize]) -> Var {
        self.op_at(
            Op::CrossEntropy,
            &[logits],
            Attrs {
                targets: Some(targets.to_vec()),
                ..Attrs::default()
            },
            Location::caller(),
        )
    }
}

#[cfg(test)]
mod tests {
    use crate::dtype::Dtype;
    use crate::ops::CATALOG;
    use crate::record::Tape;
    use crate::tensor::Value;

    /// Records every catalog op once, so adding an op to the catalog without
    /// a recorder method makes this test fail.
    #[test]
    fn every_catalog_op_has_a_method() {
        let mut tape = Tape::new("all ops", Dtype::F64);
        let m = tape.param(
            "m",
            Value::from_parts(vec![2, 3], vec![0.5, 1.0, 1.5, 2.0, 2.5, 3.0]),
        );
        let n = tape.input("n", Value::from_parts(vec![3, 2], vec![1.0; 6]));
        let k = tape.constant("k", 2.0);
        let x = tape.param("x", 0.75);
        let rows = tape.indices("rows", Value::from_parts(vec![2], vec![1.0, 0.0]));
        let picks = tape.indices("picks", Value::from_parts(vec![2, 1], vec![2.0, 0.0]));
        let mask = tape.constant("mask", Value::from_parts(vec![3], vec![1.0, 0.0, 1.0]));
        let image = tape.input(
            "image",
            Value::from_parts(vec![1, 2, 3, 3], (0..18).map(f64::from).collect()),
        );
        let kernel = tape.param("kernel", Value::from_parts(vec![1, 2, 2, 2], vec![0.5; 8]));
        let signal = tape.input("signal", Value::from_parts(vec![1, 2, 3], vec![1.0; 6]));
        let taps = tape.param("taps", Value::from_parts(vec![2, 2, 2], vec![0.25; 8]));
        let row = tape.param("row", Value::from_parts(vec![3], vec![1.0, 2.0, 0.5]));
        let channel = tape.param("channel", Value::from_parts(vec![2], vec![1.0, 0.5]));
        let recorded = [
            tape.add(m, k),
            tape.sub(m, k),
            tape.mul(m, k),
            tape.div(m, k),
            tape.neg(x),
            tape.pow(x, 3.0),
            tape.exp(x),
            tape.log(x),
            tape.sqrt(x),
            tape.abs(x),
            tape.sin(x),
            tape.cos(x),
            tape.tanh(x),
            tape.sigmoid(x),
            tape.relu(x),
            tape.leaky_relu(x, 0.01),
            tape.matmul(m, n),
            tape.transpose(m),
            tape.reshape(m, &[3, 2]),
            tape.sum(m),
            tape.mean_axis(m, 0, true),
            tape.max_axis(m, -1, false),
            tape.softmax(m, -1),
            tape.log_softmax(m, 1),
            tape.logsumexp_axis(m, 1, false),
            tape.cross_entropy(m, &[2, 0]),
            tape.mse(m, m),
            tape.cast(m, crate::dtype::Dtype::F32),
            tape.maximum(m, k),
            tape.minimum(m, k),
            tape.powt(m, k),
            tape.where_(mask, m, k),
            tape.tan(x),
            tape.square(x),
            tape.reciprocal(x),
            tape.rsqrt(x),
            tape.log1p(x),
            tape.expm1(x),
            tape.erf(x),
            tape.clamp(x, Some(0.0), None),
            tape.gelu(x),
            tape.gelu_tanh(x),
            tape.silu(x),
            tape.softplus(x, 1.0, 20.0),
            tape.elu(x, 1.0),
            tape.broadcast_to(row, &[2, 3]),
            tape.concat(&[m, m], 0),
            tape.stack(&[m, m], -1),
            tape.slice(m, 1, Some(-2), None, 1),
            tape.select(m, 0, -1),
            tape.pad(m, &[0, 1, 0, 1], 0.0),
            tape.gather(m, picks, 1),
            tape.embedding(m, rows),
            tape.min_axis(m, 1, false),
            tape.prod(m),
            tape.prod_axis(m, 0, false),
            tape.var(m, Some(1), 1.0, false),
            tape.std(m, None, 0.0, false),
            tape.cumsum(m, 1),
            tape.conv1d(signal, taps, Some(channel), 1, 1),
            tape.conv2d(image, kernel, None, 1, 0),
            tape.max_pool2d(image, 2, 1),
            tape.avg_pool2d(image, 2, 1),
            tape.layer_norm(m, Some(row), Some(row), 1e-5),
            tape.rms_norm(m, None, 1e-6),
            tape.batch_norm(image, Some(channel), Some(channel), 1e-5),
            tape.group_norm(image, 2, None, None, 1e-5),
            tape.nll_loss(m, rows),
            tape.bce_with_logits(m, m),
            tape.huber(m, m, 1.0),
            tape.l1_loss(m, m),
        ];
        let file = tape.finish(recorded[0]);
        let mut names: Vec<&str> = file.nodes.iter().map(|node| node.op.as_str()).collect();
        names.sort_unstable();
        names.dedup();
        for row in CATALOG {
            assert!(
                names.contains(&row.name),
                "no recorder method records `{}`",
                row.name
            );
        }
        assert!(
            crate::trace::validate(file).is_ok(),
            "every recorded node validates"
        );
    }

    #[test]
    #[should_panic(expected = "do not broadcast")]
    fn a_misfit_names_the_problem() {
        let mut tape = Tape::new("misfit", Dtype::F64);
        let a = tape.input("a", Value::from_parts(vec![3], vec![1.0; 3]));
        let b = tape.input("b", Value::from_parts(vec![4], vec![1.0; 4]));
        tape.add(a, b);
    }
}
