//! Loss functions: cross-entropy from logits against class indices, and mean
//! squared error.

use super::reduce::{logsumexp_of, softmax_of};
use super::{Attrs, JvpArgs, Precision, StructuredRule, VjpArgs};
use crate::format::shape as show;
use crate::tensor::Value;

/// mean over rows of logsumexp(zₙ) − zₙ[tₙ].
pub static CROSS_ENTROPY: StructuredRule = StructuredRule {
    shape: cross_entropy_shape,
    forward: cross_entropy_forward,
    vjp: cross_entropy_vjp,
    jvp: cross_entropy_jvp,
};

/// mean((p − t)²) over all elements.
pub static MSE: StructuredRule = StructuredRule {
    shape: mse_shape,
    forward: mse_forward,
    vjp: mse_vjp,
    jvp: mse_jvp,
};

/// Rows and classes of logits shaped [C] or [N, C].
fn rows_and_classes(shape: &[usize]) -> Option<(usize, usize)> {
    match shape {
        [classes] => Some((1, *classes)),
        [rows, classes] => Some((*rows, *classes)),
        _ => None,
    }
}

fn cross_entropy_shape(inputs: &[&[usize]], attrs: &Attrs) -> Result<Vec<usize>, String> {
    let logits = inputs[0];
    let (rows, classes) = rows_and_classes(logits).ok_or_else(|| {
        format!(
            "cross_entropy needs logits of shape [C] or [N, C], got {}",
            show(logits)
        )
    })?;
    let targets = attrs.targets.as_deref().unwrap_or_default();
    if targets.len() != rows {
        return Err(format!(
            "cross_entropy has {} target indices for {rows} rows of logits",
            targets.len()
        ));
    }
    if let Some(bad) = targets.iter().find(|&&t| t >= classes) {
        return Err(format!(
            "target class {bad} is out of range for {classes} classes"
        ));
    }
    Ok(Vec::new())
}

fn rows<'a>(logits: &'a [f64], shape: &[usize]) -> impl Iterator<Item = &'a [f64]> {
    let (_, classes) = rows_and_classes(shape).expect("shape checked by the validator");
    logits.chunks(classes.max(1))
}

fn targets(attrs: &Attrs) -> &[usize] {
    attrs.targets.as_deref().unwrap_or_default()
}

fn cross_entropy_forward(inputs: &[&Value], attrs: &Attrs, p: Precision) -> Value {
    let (logits, dtype) = (inputs[0].to_f64(), p.accumulate);
    let mut total: Option<f64> = None;
    let mut count = 0.0;
    for (row, &target) in rows(&logits, inputs[0].shape()).zip(targets(attrs)) {
        let loss = dtype.round(logsumexp_of(dtype, row) - row[target]);
        total = Some(total.map_or(loss, |t| dtype.round(t + loss)));
        count += 1.0;
    }
    Value::Scalar(p.round(dtype.round(total.unwrap_or(0.0) / count)))
}

/// z̄ₙ = ḡ · (softmax(zₙ) − onehot(tₙ)) / N.
fn cross_entropy_vjp(args: &VjpArgs) -> Value {
    let precision = args.precision;
    let (logits, dtype) = (args.inputs[0].to_f64(), precision.accumulate);
    let adjoint = args.adjoint.get(0);
    let count = targets(args.attrs).len() as f64;
    let mut out = Vec::with_capacity(logits.len());
    for (row, &target) in rows(&logits, args.inputs[0].shape()).zip(targets(args.attrs)) {
        for (class, p) in softmax_of(dtype, row).into_iter().enumerate() {
            let indicator = if class == target { 1.0 } else { 0.0 };
            out.push(
                precision
                    .round(dtype.round(adjoint * dtype.round(dtype.round(p - indicator) / count))),
            );
        }
    }
    Value::from_parts_in(precision.dtype, args.inputs[0].shape().to_vec(), out)
}

/// ẏ = (1/N) Σₙ Σ_c (softmax(zₙ) − onehot(tₙ))_c żₙ_c.
fn cross_entropy_jvp(args: &JvpArgs) -> Value {
    let (logits, tangent) = (args.inputs[0].to_f64(), args.tangents[0].to_f64());
    let dtype = args.precision.accumulate;
    let shape = args.inputs[0].shape();
    let count = targets(args.attrs).len() as f64;
    let mut total: Option<f64> = None;
    for ((row, tangent_row), &target) in rows(&logits, shape)
        .zip(rows(&tangent, shape))
        .zip(targets(args.attrs))
    {
        for (class, (p, &t)) in softmax_of(dtype, row)
            .into_iter()
            .zip(tangent_row)
            .enumerate()
        {
            let indicator = if class == target { 1.0 } else { 0.0 };
            let term = dtype.round(dtype.round(p - indicator) * t);
            total = Some(total.map_or(term, |s| dtype.round(s + term)));
        }
    }
    Value::Scalar(
        args.precision
            .round(dtype.round(total.unwrap_or(0.0) / count)),
    )
}

fn mse_shape(inputs: &[&[usize]], _: &Attrs) -> Result<Vec<usize>, String> {
    if inputs[0] != inputs[1] {
        return Err(format!(
            "mse needs prediction and target of one shape, got {} and {}",
            show(inputs[0]),
            show(inputs[1])
        ));
    }
    Ok(Vec::new())
}

fn mse_forward(inputs: &[&Value], _: &Attrs, precision: Precision) -> Value {
    let (prediction, target) = (inputs[0].to_f64(), inputs[1].to_f64());
    let dtype = precision.accumulate;
    let mut total: Option<f64> = None;
    for (&p, &t) in prediction.iter().zip(target.iter()) {
        let difference = dtype.round(p - t);
        let square = dtype.round(difference * difference);
        total = Some(total.map_or(square, |s| dtype.round(s + square)));
    }
    Value::Scalar(precision.round(dtype.round(total.unwrap_or(0.0) / prediction.len() as f64)))
}

/// p̄ = ḡ · 2(p − t)/n; the target receives the negation.
fn mse_vjp(args: &VjpArgs) -> Value {
    let precision = args.precision;
    let (prediction, target) = (args.inputs[0].to_f64(), args.inputs[1].to_f64());
    let dtype = precision.accumulate;
    let adjoint = args.adjoint.get(0);
    let scale = dtype.round(2.0 / prediction.len() as f64);
    let sign = if args.slot == 0 { 1.0 } else { -1.0 };
    let data = prediction
        .iter()
        .zip(target.iter())
        .map(|(&p, &t)| {
            sign * precision.round(dtype.round(adjoint * dtype.round(scale * dtype.round(p - t))))
        })
        .collect();
    Value::from_parts_in(precision.dtype, args.inputs[0].shape().to_vec(), data)
}

/// ẏ = (2/n) Σ (p − t)(ṗ − ṫ).
fn mse_jvp(args: &JvpArgs) -> Value {
    let (prediction, target) = (args.inputs[0].to_f64(), args.inputs[1].to_f64());
    let (prediction_tangent, target_tangent) =
        (args.tangents[0].to_f64(), args.tangents[1].to_f64());
    let dtype = args.precision.accumulate;
    let scale = dtype.round(2.0 / prediction.len() as f64);
    let mut total: Option<f64> = None;
    for k in 0..prediction.len() {
        let difference = dtype.round(prediction[k] - target[k]);
        let tangent = dtype.round(prediction_tangent[k] - target_tangent[k]);
        let term = dtype.round(difference * tangent);
        total = Some(total.map_or(term, |s| dtype.round(s + term)));
    }
    Value::Scalar(
        args.precision
            .round(dtype.round(scale * total.unwrap_or(0.0))),
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn targets_must_fit_the_logits() {
        let attrs = Attrs {
            targets: Some(vec![3]),
            ..Attrs::default()
        };
        assert!(
            cross_entropy_shape(&[&[3]], &attrs)
                .unwrap_err()
                .contains("out of range")
        );
        let attrs = Attrs {
            targets: Some(vec![0]),
            ..Attrs::default()
        };
        assert!(
            cross_entropy_shape(&[&[2, 3]], &attrs)
                .unwrap_err()
                .contains("1 target indices for 2 rows")
        );
        assert!(mse_shape(&[&[2], &[3]], &Attrs::default()).is_err());
    }
}
