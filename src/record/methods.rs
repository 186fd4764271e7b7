//! One recorder method per catalog op. Each computes through the op table
//! and panics, naming the caller's line, when the inputs do not fit the op
//! (use [`Tape::apply`] for a `Result`).

use super::{Tape, Var};
use crate::ops::{Attrs, Op};
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
}

/// The attributes of a reduction along `axis` (all elements when `None`).
fn along(axis: Option<i64>, keepdims: bool) -> Attrs {
    Attrs {
        axis,
        keepdims,
        ..Attrs::default()
    }
}

impl Tape {
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
