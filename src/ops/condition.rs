//! `where`: an elementwise choice between two branches by a condition of 0s
//! and 1s, all three broadcast (NumPy's `where`).

use super::{Attrs, JvpArgs, Precision, StructuredRule, VjpArgs, reduce_to_shape};
use crate::format::shape as show;
use crate::tensor::{Value, broadcast_shapes, broadcast_source_indices};

/// a where the condition is 1, b where it is 0.
pub static WHERE: StructuredRule = StructuredRule {
    shape: where_shape,
    forward: where_forward,
    vjp: where_vjp,
    jvp: where_jvp,
};

fn where_shape(inputs: &[&[usize]], _: &Attrs) -> Result<Vec<usize>, String> {
    let pair = broadcast_shapes(inputs[1], inputs[2]);
    pair.and_then(|shape| broadcast_shapes(inputs[0], &shape))
        .ok_or_else(|| {
            format!(
                "condition {}, a {} and b {} do not broadcast",
                show(inputs[0]),
                show(inputs[1]),
                show(inputs[2])
            )
        })
}

/// Per output element: whether the condition holds, and the source index in
/// each branch.
fn choices(inputs: &[&Value]) -> (Vec<usize>, Vec<bool>, [Vec<usize>; 2]) {
    let shapes: Vec<&[usize]> = inputs.iter().map(|v| v.shape()).collect();
    let shape = where_shape(&shapes, &Attrs::default()).expect("shapes checked by the validator");
    let condition = inputs[0].elements();
    let chosen = broadcast_source_indices(inputs[0].shape(), &shape)
        .into_iter()
        .map(|i| condition.get(i) != 0.0)
        .collect();
    let sources = [
        broadcast_source_indices(inputs[1].shape(), &shape),
        broadcast_source_indices(inputs[2].shape(), &shape),
    ];
    (shape, chosen, sources)
}

fn where_forward(inputs: &[&Value], _: &Attrs, p: Precision) -> Value {
    let (shape, chosen, [from_a, from_b]) = choices(inputs);
    let (a, b) = (inputs[1].elements(), inputs[2].elements());
    let data = chosen
        .iter()
        .enumerate()
        .map(|(k, &take_a)| {
            p.round(if take_a {
                a.get(from_a[k])
            } else {
                b.get(from_b[k])
            })
        })
        .collect();
    Value::from_parts_in(p.dtype, shape, data)
}

/// The branch receives the adjoint where it was chosen, summed over its
/// broadcast axes; the condition receives 0.
fn where_vjp(args: &VjpArgs) -> Value {
    let p = args.precision;
    let target = args.inputs[args.slot].shape();
    if args.slot == 0 {
        return Value::filled(target, 0.0).stored_as(p.dtype);
    }
    let (shape, chosen, _) = choices(args.inputs);
    let g = args.adjoint.elements();
    let wanted = args.slot == 1;
    let masked = chosen
        .iter()
        .enumerate()
        .map(|(k, &take_a)| if take_a == wanted { g.get(k) } else { 0.0 })
        .collect();
    reduce_to_shape(&Value::from_parts_in(p.dtype, shape, masked), target, p)
}

/// The chosen branch's tangent.
fn where_jvp(args: &JvpArgs) -> Value {
    let tangents = [args.inputs[0], args.tangents[1], args.tangents[2]];
    where_forward(&tangents, args.attrs, args.precision)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::dtype::Dtype;

    #[test]
    fn the_condition_picks_and_the_adjoint_follows() {
        let condition = Value::from_parts(vec![3], vec![1.0, 0.0, 1.0]);
        let a = Value::from_parts(vec![2, 3], vec![1.0, 2.0, 3.0, 4.0, 5.0, 6.0]);
        let b = Value::Scalar(-1.0);
        let y = where_forward(&[&condition, &a, &b], &Attrs::default(), Dtype::F64.into());
        assert_eq!(
            y,
            Value::from_parts(vec![2, 3], vec![1.0, -1.0, 3.0, 4.0, -1.0, 6.0])
        );
        let g = Value::from_parts(vec![2, 3], vec![1.0, 2.0, 3.0, 4.0, 5.0, 6.0]);
        let inputs = [&condition, &a, &b];
        let none = Attrs::default();
        let args = |slot| VjpArgs {
            slot,
            inputs: &inputs,
            output: &y,
            adjoint: &g,
            attrs: &none,
            precision: Dtype::F64.into(),
        };
        assert_eq!(
            where_vjp(&args(1)),
            Value::from_parts(vec![2, 3], vec![1.0, 0.0, 3.0, 4.0, 0.0, 6.0])
        );
        assert_eq!(where_vjp(&args(2)), Value::Scalar(7.0));
        assert_eq!(
            where_vjp(&args(0)),
            Value::from_parts(vec![3], vec![0.0; 3])
        );
    }
}
