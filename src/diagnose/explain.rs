//! One sentence per origin, in the trade's words, with the numbers involved.

use super::origin::{Origin, OriginClass};
use crate::format::compact;
use crate::ops::Op;
use crate::trace::Trace;

/// The sentence for a non-finite seed.
pub(super) fn seed(trace: &Trace, bad: f64) -> String {
    format!(
        "the seed of the output '{}' is {}, so every adjoint it reaches is too",
        trace.node(trace.output()).id,
        compact(bad)
    )
}

/// The sentence for an origin.
pub(super) fn origin(trace: &Trace, origin: &Origin) -> String {
    let node = trace.node(origin.node);
    let id = &node.id;
    let op = node.op_name.as_ref();
    let max = compact(trace.dtype().limits().max_finite());
    let dtype = trace.dtype();
    let operand = |k: usize| {
        origin
            .operands
            .get(k)
            .copied()
            .map_or("?".to_string(), compact)
    };
    match origin.class {
        OriginClass::NonFiniteValue => forward(trace, origin),
        OriginClass::NonFinitePartial => {
            let at = operand(0);
            let partial = compact(*origin.operands.last().unwrap_or(&f64::NAN));
            let why = match node.op {
                Op::Sqrt => "the derivative of sqrt, 1/(2√x), is infinite at 0".to_string(),
                Op::Pow => format!(
                    "the derivative of x^{}, infinite at 0 for an exponent between 0 and 1",
                    node.attrs.exponent.map_or("p".into(), compact)
                ),
                Op::Log => "the derivative of log, 1/x, is infinite at 0".to_string(),
                Op::Div => "the derivative of a division by 0".to_string(),
                _ if node.partials.iter().any(Option::is_some) => "a recorded partial".to_string(),
                _ => format!("the derivative of {op}"),
            };
            format!(
                "'{id}' ({op}) has the finite value it should at {at}, but its partial is {partial}: {why}"
            )
        }
        OriginClass::ProductOverflow => match origin.operands.as_slice() {
            [g, p] => format!(
                "pulling back through '{id}' ({op}) multiplied the adjoint {} by the partial {} and overflowed {dtype}'s largest finite value {max}",
                compact(*g),
                compact(*p)
            ),
            _ => format!(
                "pulling back through '{id}' ({op}) multiplied finite numbers whose product overflowed {dtype}'s largest finite value {max}"
            ),
        },
        OriginClass::SumOverflow => {
            let from = origin.edge.map_or("?".to_string(), |(consumer, _)| {
                trace.node(consumer).id.clone()
            });
            format!(
                "at the branch point '{id}', adding the contribution {} from '{from}' to the adjoint {} overflowed {dtype}'s largest finite value {max}",
                operand(1),
                operand(0)
            )
        }
        OriginClass::NanFromInfinity => {
            let input = origin.edge.map_or("?".to_string(), |(_, slot)| {
                trace.node(node.inputs[slot]).id.clone()
            });
            if origin.operands.len() == 2 && origin.operands[0] == 0.0 {
                format!(
                    "the adjoint of '{id}' ({op}) is 0 but its partial towards '{input}' is {}, and 0 × inf is NaN: a branch that does not count still passes back an infinite derivative",
                    operand(1)
                )
            } else {
                format!(
                    "pulling back through '{id}' ({op}) to '{input}', terms that overflowed to +inf and −inf cancelled into NaN (inf − inf)"
                )
            }
        }
        OriginClass::NonFiniteSeed => seed(trace, origin.result),
    }
}

/// The sentence for a non-finite forward value: which op, which inputs.
fn forward(trace: &Trace, origin: &Origin) -> String {
    let node = trace.node(origin.node);
    let id = &node.id;
    let op = node.op_name.as_ref();
    let result = compact(origin.result);
    let max = compact(trace.dtype().limits().max_finite());
    let dtype = trace.dtype();
    let inputs = &origin.operands;
    let x = inputs.first().copied().unwrap_or(f64::NAN);
    let y = inputs.get(1).copied().unwrap_or(f64::NAN);
    if origin.leak {
        return format!(
            "the forward value of '{id}' ({op}) is {result}: {}",
            leak(trace, origin.node)
        );
    }
    let what = match node.op {
        Op::Input | Op::Param | Op::Const => {
            return format!(
                "the recorded value of '{id}' ({op}) already holds {result}: the data fed to the step is bad"
            );
        }
        Op::Log if x == 0.0 => "log of 0 is −inf".to_string(),
        Op::Log if x < 0.0 => format!("log of a negative number ({}) is NaN", compact(x)),
        Op::Sqrt if x < 0.0 => format!("sqrt of a negative number ({}) is NaN", compact(x)),
        Op::Div if x == 0.0 && y == 0.0 => "0/0 is NaN".to_string(),
        Op::Div if y == 0.0 => format!("{} divided by 0 is {result}", compact(x)),
        Op::Div => format!(
            "{} / {} overflowed {dtype}'s largest finite value {max}",
            compact(x),
            compact(y)
        ),
        Op::Exp => format!(
            "exp({}) overflowed {dtype}'s largest finite value {max}",
            compact(x)
        ),
        Op::Pow if x < 0.0 => format!(
            "a negative number ({}) to a fractional power is NaN",
            compact(x)
        ),
        Op::Pow if x == 0.0 => "0 to a negative power is inf".to_string(),
        Op::Pow => format!(
            "{} to the power {} overflowed {dtype}'s largest finite value {max}",
            compact(x),
            node.attrs.exponent.map_or("?".into(), compact)
        ),
        Op::Mul | Op::Add | Op::Sub => {
            let sign = match node.op {
                Op::Mul => "×",
                Op::Add => "+",
                _ => "−",
            };
            format!(
                "{} {sign} {} overflowed {dtype}'s largest finite value {max}",
                compact(x),
                compact(y)
            )
        }
        _ if inputs.is_empty() => format!("it produced {result} from finite inputs"),
        _ => {
            let shown: Vec<String> = inputs.iter().map(|&v| compact(v)).collect();
            format!(
                "it produced {result} from the finite inputs {}",
                shown.join(", ")
            )
        }
    };
    format!("the forward value of '{id}' ({op}) is {result}: {what}")
}

/// Why a mask's −inf came out of `node` as a fault: a fully masked row of a
/// softmax, or an op that does not absorb −inf.
fn leak(trace: &Trace, node: usize) -> String {
    let recorded = trace.node(node);
    // The mask's source: follow the non-finite inputs back to a leaf.
    let mut source = node;
    while let Some(&input) = trace
        .node(source)
        .inputs
        .iter()
        .find(|&&input| !trace.node(input).value.is_finite())
    {
        source = input;
    }
    let mask = &trace.node(source).id;
    if matches!(recorded.op, Op::Softmax | Op::LogSoftmax) {
        return format!(
            "every element of one of its rows is masked with −inf (from '{mask}'), and softmax of a row that is all −inf is 0/0 = NaN (so is PyTorch's): leave at least one place of each row unmasked, such as the diagonal of a causal mask"
        );
    }
    format!(
        "the −inf of the mask '{mask}' reaches it, and {} does not absorb it the way softmax does: apply the mask to the scores before softmax",
        recorded.op_name
    )
}

#[cfg(test)]
mod tests {
    use crate::diagnose::{OriginClass, Settings, diagnose};
    use crate::dtype::Dtype;
    use crate::record::Tape;
    use crate::trace::Trace;

    fn first_sentence(
        build: impl FnOnce(&mut Tape) -> crate::record::Var,
    ) -> (OriginClass, String) {
        let mut tape = Tape::new("explain", Dtype::F64);
        let output = build(&mut tape);
        let trace = Trace::try_from(tape.finish(output)).unwrap();
        let diagnosis = diagnose(
            &trace,
            &Settings {
                replay: Vec::new(),
                ..Settings::default()
            },
        );
        let origin = diagnosis.first_origin().expect("an origin");
        (origin.class, origin.explanation.clone())
    }

    // 0/0 is NaN and x/0 is ±inf for x ≠ 0 (IEEE 754-2019 §7.2 and §7.3).
    #[test]
    fn divisions_by_zero_are_told_apart() {
        let (class, text) = first_sentence(|tape| {
            let w = tape.param("w", 0.0);
            let zero = tape.input("zero", 0.0);
            tape.div(w, zero)
        });
        assert_eq!(class, OriginClass::NonFiniteValue);
        assert!(text.ends_with("0/0 is NaN"), "{text}");
        let (_, text) = first_sentence(|tape| {
            let w = tape.param("w", 3.0);
            let zero = tape.input("zero", 0.0);
            tape.div(w, zero)
        });
        assert!(text.ends_with("3 divided by 0 is inf"), "{text}");
    }

    #[test]
    fn bad_data_is_named_as_such() {
        let (class, text) = first_sentence(|tape| {
            let w = tape.param("w", 2.0);
            let x = tape.input("x", f64::NAN);
            tape.mul(w, x)
        });
        assert_eq!(class, OriginClass::NonFiniteValue);
        assert!(
            text.contains("the recorded value of 'x' (input) already holds NaN"),
            "{text}"
        );
    }
}
