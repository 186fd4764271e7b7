//! Matrix product (batched, with broadcast batch axes), transpose and reshape.

use super::kernels::gemm::{Accumulator, Layout, Operands};
use super::kernels::map::add;
use super::{Attrs, JvpArgs, Precision, StructuredRule, VjpArgs};
use crate::dtype::Dtype;
use crate::format::shape as show;
use crate::tensor::{
    Value, broadcast_shapes, broadcast_source_indices, numel, strided_indices, strides,
};

/// `a @ b` over the last two axes; leading axes broadcast as batch axes.
pub static MATMUL: StructuredRule = StructuredRule {
    shape: matmul_shape,
    forward: matmul_forward,
    vjp: matmul_vjp,
    jvp: matmul_jvp,
};

/// Axis permutation.
pub static TRANSPOSE: StructuredRule = StructuredRule {
    shape: transpose_shape,
    forward: transpose_forward,
    vjp: transpose_vjp,
    jvp: transpose_jvp,
};

/// Same elements under a new shape.
pub static RESHAPE: StructuredRule = StructuredRule {
    shape: reshape_shape,
    forward: reshape_forward,
    vjp: reshape_vjp,
    jvp: reshape_jvp,
};

/// Shapes of a batched product: batch axes, m, k, n.
struct MatmulDims {
    batch: Vec<usize>,
    m: usize,
    k: usize,
    n: usize,
}

fn matmul_dims(a: &[usize], b: &[usize]) -> Result<MatmulDims, String> {
    if a.len() < 2 || b.len() < 2 {
        return Err(format!(
            "matmul needs operands of rank 2 or more, got {} and {}; reshape a vector to [1, n] or [n, 1]",
            show(a),
            show(b)
        ));
    }
    let (m, k) = (a[a.len() - 2], a[a.len() - 1]);
    let (k2, n) = (b[b.len() - 2], b[b.len() - 1]);
    if k != k2 {
        return Err(format!(
            "matmul inner dimensions differ: {} @ {} ({k} vs {k2})",
            show(a),
            show(b)
        ));
    }
    let batch = broadcast_shapes(&a[..a.len() - 2], &b[..b.len() - 2]).ok_or_else(|| {
        format!(
            "matmul batch axes of {} and {} do not broadcast",
            show(a),
            show(b)
        )
    })?;
    Ok(MatmulDims { batch, m, k, n })
}

fn matmul_shape(inputs: &[&[usize]], _: &Attrs) -> Result<Vec<usize>, String> {
    let dims = matmul_dims(inputs[0], inputs[1])?;
    let mut shape = dims.batch;
    shape.extend([dims.m, dims.n]);
    Ok(shape)
}

/// For each output batch, the batch index read from `a` and from `b`.
fn batch_sources(a: &[usize], b: &[usize], batch: &[usize]) -> (Vec<usize>, Vec<usize>) {
    (
        broadcast_source_indices(&a[..a.len() - 2], batch),
        broadcast_source_indices(&b[..b.len() - 2], batch),
    )
}

/// True when `b` is one matrix shared by every batch of a batch-contiguous
/// `a`: then the batches stack into the rows of one larger product.
fn stacks(b: &Value, a_batches: &[usize]) -> bool {
    numel(&b.shape()[..b.shape().len() - 2]) == 1
        && a_batches
            .iter()
            .enumerate()
            .all(|(batch, &source)| batch == source)
}

fn matmul_forward(inputs: &[&Value], _: &Attrs, p: Precision) -> Value {
    let (a, b) = (inputs[0], inputs[1]);
    let dims = matmul_dims(a.shape(), b.shape()).expect("shapes checked by the validator");
    let MatmulDims { m, k, n, .. } = dims;
    let (a_batches, b_batches) = batch_sources(a.shape(), b.shape(), &dims.batch);
    let operands = Operands::new(p.accumulate, a.elements(), b.elements());
    let mut out = Accumulator::zeros(p.accumulate, a_batches.len() * m * n);
    if stacks(b, &a_batches) {
        let rows = a_batches.len() * m;
        out.product(
            &operands,
            (rows, k, n),
            Layout::rows(0, k),
            Layout::rows(0, n),
            0,
            false,
        );
    } else {
        for (batch, (&ab, &bb)) in a_batches.iter().zip(&b_batches).enumerate() {
            out.product(
                &operands,
                (m, k, n),
                Layout::rows(ab * m * k, k),
                Layout::rows(bb * k * n, n),
                batch * m * n,
                false,
            );
        }
    }
    let mut shape = dims.batch;
    shape.extend([m, n]);
    Value::from_buffer(shape, out.finish(p.dtype))
}

/// ∂L/∂A = Ḡ Bᵀ and ∂L/∂B = Aᵀ Ḡ per batch, summed over broadcast batches
/// in the accumulation dtype and rounded once.
fn matmul_vjp(args: &VjpArgs) -> Value {
    let (a, b, g, p) = (args.inputs[0], args.inputs[1], args.adjoint, args.precision);
    let dims = matmul_dims(a.shape(), b.shape()).expect("shapes checked by the validator");
    let MatmulDims { m, k, n, .. } = dims;
    let (a_batches, b_batches) = batch_sources(a.shape(), b.shape(), &dims.batch);
    let target = args.inputs[args.slot];
    let mut out = Accumulator::zeros(p.accumulate, target.len());
    let stacked = stacks(b, &a_batches);
    if args.slot == 0 {
        let operands = Operands::new(p.accumulate, g.elements(), b.elements());
        if stacked {
            let rows = a_batches.len() * m;
            out.product(
                &operands,
                (rows, n, k),
                Layout::rows(0, n),
                Layout::transposed(0, n),
                0,
                false,
            );
        } else {
            let mut written = vec![false; numel(&a.shape()[..a.shape().len() - 2])];
            for (batch, (&ab, &bb)) in a_batches.iter().zip(&b_batches).enumerate() {
                let add = std::mem::replace(&mut written[ab], true);
                out.product(
                    &operands,
                    (m, n, k),
                    Layout::rows(batch * m * n, n),
                    Layout::transposed(bb * k * n, n),
                    ab * m * k,
                    add,
                );
            }
        }
    } else {
        let operands = Operands::new(p.accumulate, a.elements(), g.elements());
        if stacked {
            let rows = a_batches.len() * m;
            out.product(
                &operands,
                (k, rows, n),
                Layout::transposed(0, k),
                Layout::rows(0, n),
                0,
                false,
            );
        } else {
            let mut written = vec![false; numel(&b.shape()[..b.shape().len() - 2])];
            for (batch, (&ab, &bb)) in a_batches.iter().zip(&b_batches).enumerate() {
                let add = std::mem::replace(&mut written[bb], true);
                out.product(
                    &operands,
                    (k, m, n),
                    Layout::transposed(ab * m * k, k),
                    Layout::rows(batch * m * n, n),
                    bb * k * n,
                    add,
                );
            }
        }
    }
    Value::from_buffer(target.shape().to_vec(), out.finish(p.dtype))
}

/// Elementwise sum of two values of one shape, rounded into `dtype`.
pub fn add_rounded(a: &Value, b: &Value, dtype: Dtype) -> Value {
    if let (Value::Scalar(x), Value::Scalar(y)) = (a, b) {
        return Value::Scalar(dtype.round(x + y));
    }
    Value::from_buffer(a.shape().to_vec(), add(a.elements(), b.elements(), dtype))
}

/// The product is bilinear: ṫ = Ȧ B + A Ḃ.
fn matmul_jvp(args: &JvpArgs) -> Value {
    let (a, b, p) = (args.inputs[0], args.inputs[1], args.precision);
    let first = matmul_forward(&[args.tangents[0], b], args.attrs, p);
    let second = matmul_forward(&[a, args.tangents[1]], args.attrs, p);
    add_rounded(&first, &second, p.dtype)
}

/// The permutation in force: the attribute, or a swap of the last two axes.
fn permutation(rank: usize, attrs: &Attrs) -> Vec<usize> {
    match &attrs.perm {
        Some(perm) => perm.clone(),
        None => {
            let mut perm: Vec<usize> = (0..rank).collect();
            if rank >= 2 {
                perm.swap(rank - 2, rank - 1);
            }
            perm
        }
    }
}

fn transpose_shape(inputs: &[&[usize]], attrs: &Attrs) -> Result<Vec<usize>, String> {
    let input = inputs[0];
    let perm = permutation(input.len(), attrs);
    let mut seen = vec![false; input.len()];
    let valid = perm.len() == input.len()
        && perm
            .iter()
            .all(|&axis| axis < input.len() && !std::mem::replace(&mut seen[axis], true));
    if !valid {
        return Err(format!(
            "perm {perm:?} is not a permutation of the {} axes of {}",
            input.len(),
            show(input)
        ));
    }
    Ok(perm.iter().map(|&axis| input[axis]).collect())
}

/// Moves the elements of `value` so that output axis k is input axis `perm[k]`.
fn permute(value: &Value, perm: &[usize]) -> Value {
    let in_shape = value.shape();
    let out_shape: Vec<usize> = perm.iter().map(|&axis| in_shape[axis]).collect();
    let in_strides = strides(in_shape);
    let steps: Vec<usize> = perm.iter().map(|&axis| in_strides[axis]).collect();
    let elements = value.elements();
    let out = strided_indices(&out_shape, &steps)
        .into_iter()
        .map(|source| elements.get(source))
        .collect();
    Value::from_parts_in(value.storage_dtype(), out_shape, out)
}

fn transpose_forward(inputs: &[&Value], attrs: &Attrs, _: Precision) -> Value {
    permute(inputs[0], &permutation(inputs[0].shape().len(), attrs))
}

fn transpose_vjp(args: &VjpArgs) -> Value {
    let perm = permutation(args.inputs[0].shape().len(), args.attrs);
    let mut inverse = vec![0; perm.len()];
    for (k, &axis) in perm.iter().enumerate() {
        inverse[axis] = k;
    }
    permute(args.adjoint, &inverse)
}

/// Linear: the tangent is permuted like the value.
fn transpose_jvp(args: &JvpArgs) -> Value {
    transpose_forward(args.tangents, args.attrs, args.precision)
}

fn reshape_shape(inputs: &[&[usize]], attrs: &Attrs) -> Result<Vec<usize>, String> {
    let target = attrs.shape.clone().unwrap_or_default();
    // The target comes from a file: multiply in checked arithmetic.
    let Some(count) = target.iter().try_fold(1usize, |acc, &d| acc.checked_mul(d)) else {
        return Err(format!("reshape target {} is too large", show(&target)));
    };
    if count != numel(inputs[0]) {
        return Err(format!(
            "cannot reshape {} ({} elements) to {} ({} elements)",
            show(inputs[0]),
            numel(inputs[0]),
            show(&target),
            count
        ));
    }
    Ok(target)
}

fn reshape_forward(inputs: &[&Value], attrs: &Attrs, _: Precision) -> Value {
    inputs[0].reshaped(attrs.shape.as_deref().unwrap_or(&[]))
}

fn reshape_vjp(args: &VjpArgs) -> Value {
    args.adjoint.reshaped(args.inputs[0].shape())
}

/// Linear: the tangent is reshaped like the value.
fn reshape_jvp(args: &JvpArgs) -> Value {
    args.tangents[0].reshaped(args.output.shape())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn tensor(shape: &[usize], data: &[f64]) -> Value {
        Value::from_parts(shape.to_vec(), data.to_vec())
    }

    #[test]
    fn matmul_of_small_matrices() {
        // [[1,2],[3,4]] @ [[5,6],[7,8]] = [[19,22],[43,50]] (hand computation).
        let a = tensor(&[2, 2], &[1.0, 2.0, 3.0, 4.0]);
        let b = tensor(&[2, 2], &[5.0, 6.0, 7.0, 8.0]);
        let y = matmul_forward(&[&a, &b], &Attrs::default(), Dtype::F64.into());
        assert_eq!(y, tensor(&[2, 2], &[19.0, 22.0, 43.0, 50.0]));
    }

    #[test]
    fn matmul_batch_broadcast_sums_weight_gradient() {
        // x: [3, 1, 2] batches against a shared w: [2, 2]; w's contribution sums the batches.
        let x = tensor(&[3, 1, 2], &[1.0, 0.0, 0.0, 1.0, 1.0, 1.0]);
        let w = tensor(&[2, 2], &[1.0, 2.0, 3.0, 4.0]);
        let y = matmul_forward(&[&x, &w], &Attrs::default(), Dtype::F64.into());
        assert_eq!(y.shape(), &[3, 1, 2]);
        let g = Value::filled(&[3, 1, 2], 1.0);
        let args = VjpArgs {
            slot: 1,
            inputs: &[&x, &w],
            output: &y,
            adjoint: &g,
            attrs: &Attrs::default(),
            precision: Dtype::F64.into(),
        };
        // Σ_batches xᵀ·1 = rows [2, 2] for both columns.
        assert_eq!(matmul_vjp(&args), tensor(&[2, 2], &[2.0, 2.0, 2.0, 2.0]));
    }

    #[test]
    fn transpose_round_trips_through_its_vjp() {
        let x = tensor(&[2, 3], &[1.0, 2.0, 3.0, 4.0, 5.0, 6.0]);
        let y = transpose_forward(&[&x], &Attrs::default(), Dtype::F64.into());
        assert_eq!(y, tensor(&[3, 2], &[1.0, 4.0, 2.0, 5.0, 3.0, 6.0]));
        let args = VjpArgs {
            slot: 0,
            inputs: &[&x],
            output: &y,
            adjoint: &y,
            attrs: &Attrs::default(),
            precision: Dtype::F64.into(),
        };
        assert_eq!(transpose_vjp(&args), x);
    }

    #[test]
    fn bad_shapes_are_explained() {
        assert!(
            matmul_shape(&[&[2, 3], &[4, 5]], &Attrs::default())
                .unwrap_err()
                .contains("inner dimensions")
        );
        assert!(
            matmul_shape(&[&[3], &[3, 1]], &Attrs::default())
                .unwrap_err()
                .contains("rank 2")
        );
        let perm = Attrs {
            perm: Some(vec![0, 0]),
            ..Attrs::default()
        };
        assert!(transpose_shape(&[&[2, 3]], &perm).is_err());
    }
}
