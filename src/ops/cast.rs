//! Conversion between dtypes: the value rounded once into the node's dtype;
//! the derivative is the identity, and the sweep rounds each contribution
//! into the input's dtype, as a framework's backward of a cast does.

use super::{Attrs, JvpArgs, Precision, StructuredRule, VjpArgs};
use crate::tensor::Value;

/// `x` converted into the node's dtype.
pub static CAST: StructuredRule = StructuredRule {
    shape: |inputs, _| Ok(inputs[0].to_vec()),
    forward: cast_forward,
    vjp: cast_vjp,
    jvp: cast_jvp,
};

fn cast_forward(inputs: &[&Value], _: &Attrs, p: Precision) -> Value {
    inputs[0].clone().stored_as(p.dtype)
}

/// The identity: the adjoint passes through unchanged.
fn cast_vjp(args: &VjpArgs) -> Value {
    args.adjoint.clone()
}

fn cast_jvp(args: &JvpArgs) -> Value {
    args.tangents[0].clone().stored_as(args.precision.dtype)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::dtype::Dtype;

    // 0.1 is not a binary16 number: the nearest is 0.0999755859375 (IEEE
    // 754-2019 binary16, p = 11: 0.1 = 1.6 × 2^-4, 1.6 rounds to 1638/1024).
    #[test]
    fn casting_rounds_once_into_the_target_dtype() {
        let x = Value::from_parts(vec![2], vec![0.1, 70000.0]);
        let y = cast_forward(&[&x], &Attrs::default(), Precision::of(Dtype::F16));
        assert_eq!(y.storage_dtype(), Dtype::F16);
        assert_eq!(*y.to_f64(), [0.0999755859375, f64::INFINITY]);
    }
}
