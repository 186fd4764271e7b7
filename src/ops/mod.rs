//! The op catalog: one table entry per op with its forward rule and its
//! derivative rule. This is the single place where an op's derivative is
//! written; the sweep engine, the recorder and the checks all call through it.

mod attrs;
mod cast;
mod elementwise;
pub mod kernels;
mod linalg;
mod loss;
mod precision;
mod reduce;

pub use attrs::{AttrName, Attrs};
pub use precision::Precision;

use crate::dtype::Dtype;
use crate::tensor::{Value, broadcast_shapes, broadcast_source_indices, numel};

pub use linalg::add_rounded;

/// Every op Ebb knows, plus `Custom` for ops that carry their own partials.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
#[allow(missing_docs)]
pub enum Op {
    Input,
    Param,
    Const,
    Add,
    Sub,
    Mul,
    Div,
    Neg,
    Pow,
    Exp,
    Log,
    Sqrt,
    Abs,
    Sin,
    Cos,
    Tanh,
    Sigmoid,
    Relu,
    LeakyRelu,
    Matmul,
    Transpose,
    Reshape,
    Cast,
    Sum,
    Mean,
    Max,
    Softmax,
    LogSoftmax,
    Logsumexp,
    CrossEntropy,
    Mse,
    /// An op outside the catalog; its node names it and records every partial.
    Custom,
}

/// How many inputs an op takes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Arity {
    /// Exactly this many.
    Exactly(usize),
    /// Any number, at least this many.
    AtLeast(usize),
}

impl Arity {
    /// Whether `n` inputs fit.
    pub fn accepts(self, n: usize) -> bool {
        match self {
            Arity::Exactly(k) => n == k,
            Arity::AtLeast(k) => n >= k,
        }
    }
}

impl std::fmt::Display for Arity {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Arity::Exactly(1) => write!(f, "1 input"),
            Arity::Exactly(k) => write!(f, "{k} inputs"),
            Arity::AtLeast(k) => write!(f, "at least {k} inputs"),
        }
    }
}

/// An elementwise op of one input: `y = value(x)`, `∂y/∂x = partial(x, y)`.
pub struct UnaryRule {
    /// Forward rule.
    pub value: fn(x: f64, attrs: &Attrs) -> f64,
    /// Local partial ∂y/∂x given the input and the output.
    pub partial: fn(x: f64, y: f64, attrs: &Attrs) -> f64,
}

/// An elementwise op of two broadcast inputs.
pub struct BinaryRule {
    /// Forward rule.
    pub value: fn(a: f64, b: f64) -> f64,
    /// Local partials ∂y/∂a and ∂y/∂b given both inputs and the output.
    pub partials: [fn(a: f64, b: f64, y: f64) -> f64; 2],
}

/// Everything a vector-Jacobian product needs.
pub struct VjpArgs<'a> {
    /// Which input the contribution goes to.
    pub slot: usize,
    /// The recorded forward values of the inputs.
    pub inputs: &'a [&'a Value],
    /// The recorded forward value of the node.
    pub output: &'a Value,
    /// The node's adjoint (shape of `output`).
    pub adjoint: &'a Value,
    /// The node's attributes.
    pub attrs: &'a Attrs,
    /// The node's precision: its dtype, and the dtype its sums accumulate in.
    pub precision: Precision,
}

/// Everything a Jacobian-vector product (tangent) needs.
pub struct JvpArgs<'a> {
    /// The recorded forward values of the inputs.
    pub inputs: &'a [&'a Value],
    /// The recorded forward value of the node.
    pub output: &'a Value,
    /// One tangent per input, each of its input's shape.
    pub tangents: &'a [&'a Value],
    /// The node's attributes.
    pub attrs: &'a Attrs,
    /// The node's precision: its dtype, and the dtype its sums accumulate in.
    pub precision: Precision,
}

/// A shape rule: the output shape for the input shapes, or why they do not fit.
pub type ShapeRule = fn(inputs: &[&[usize]], attrs: &Attrs) -> Result<Vec<usize>, String>;

/// An op whose Jacobian is not diagonal: shape rule, forward rule and
/// vector-Jacobian product written directly.
pub struct StructuredRule {
    /// The output shape for the given input shapes, or why they do not fit.
    pub shape: ShapeRule,
    /// Forward rule: computes in the accumulation dtype and rounds each
    /// result once into the storage dtype.
    pub forward: fn(inputs: &[&Value], attrs: &Attrs, precision: Precision) -> Value,
    /// The contribution to input `slot`: the adjoint pulled back through the
    /// op's Jacobian, in the input's shape.
    pub vjp: fn(args: &VjpArgs) -> Value,
    /// The tangent of the output: the op's Jacobian applied to the inputs'
    /// tangents (forward mode), in the output's shape.
    pub jvp: fn(args: &JvpArgs) -> Value,
}

/// The derivative rule of an op.
pub enum Rule {
    /// input, param, const: no inputs, nothing to pull back.
    Leaf,
    /// Elementwise of one input.
    Unary(&'static UnaryRule),
    /// Elementwise of two broadcast inputs.
    Binary(&'static BinaryRule),
    /// Anything else from the catalog.
    Structured(&'static StructuredRule),
    /// A custom op: partials come from the trace.
    Custom,
}

/// One row of the catalog.
pub struct OpSpec {
    /// The op.
    pub op: Op,
    /// Its name in trace files.
    pub name: &'static str,
    /// Its number of inputs.
    pub arity: Arity,
    /// Attributes that must be present.
    pub required: &'static [AttrName],
    /// One line for help and reports.
    pub summary: &'static str,
    /// How the adjoint reaches the inputs, in one line of words: what the
    /// view's Node pane teaches with (the numbers of the step are filled in
    /// beside it). Every row has one; a test checks.
    pub derivative: &'static str,
    /// Forward and derivative rules.
    pub rule: Rule,
}

/// The catalog, in the order help lists it.
pub static CATALOG: &[OpSpec] = &[
    leaf(Op::Input, "input", "a value fed to the step (data)")
        .says("a leaf: it keeps the adjoint it receives and passes nothing on"),
    leaf(
        Op::Param,
        "param",
        "a trainable parameter: its adjoint is the gradient",
    )
    .says("a leaf: the adjoint it receives is the parameter's gradient"),
    leaf(Op::Const, "const", "a constant")
        .says("a leaf: it keeps the adjoint it receives and passes nothing on"),
    binary(Op::Add, "add", "a + b, broadcast", &elementwise::ADD)
        .says("each input receives the adjoint unchanged (summed over broadcast axes)"),
    binary(Op::Sub, "sub", "a − b, broadcast", &elementwise::SUB)
        .says("a receives the adjoint, b receives −adjoint"),
    binary(Op::Mul, "mul", "a · b, broadcast", &elementwise::MUL)
        .says("each input receives adjoint × the other input"),
    binary(Op::Div, "div", "a / b, broadcast", &elementwise::DIV)
        .says("a receives adjoint / b, b receives −adjoint × a / b²"),
    unary(Op::Neg, "neg", "−x", &elementwise::NEG, &[]).says("the input receives −adjoint"),
    unary(
        Op::Pow,
        "pow",
        "x^p for a constant exponent p",
        &elementwise::POW,
        &[AttrName::Exponent],
    )
    .says("the input receives adjoint × p·x^(p−1)"),
    unary(Op::Exp, "exp", "eˣ", &elementwise::EXP, &[])
        .says("the input receives adjoint × eˣ, the node's own value"),
    unary(Op::Log, "log", "natural logarithm", &elementwise::LOG, &[])
        .says("the input receives adjoint / x"),
    unary(Op::Sqrt, "sqrt", "square root", &elementwise::SQRT, &[])
        .says("the input receives adjoint / (2√x), half the adjoint over the node's value"),
    unary(
        Op::Abs,
        "abs",
        "|x| (partial 0 at the kink)",
        &elementwise::ABS,
        &[],
    )
    .says("the input receives adjoint × sign(x), 0 at x = 0"),
    unary(Op::Sin, "sin", "sine", &elementwise::SIN, &[])
        .says("the input receives adjoint × cos x"),
    unary(Op::Cos, "cos", "cosine", &elementwise::COS, &[])
        .says("the input receives adjoint × −sin x"),
    unary(
        Op::Tanh,
        "tanh",
        "hyperbolic tangent",
        &elementwise::TANH,
        &[],
    )
    .says("the input receives adjoint × (1 − y²), y the node's value"),
    unary(
        Op::Sigmoid,
        "sigmoid",
        "1 / (1 + e⁻ˣ)",
        &elementwise::SIGMOID,
        &[],
    )
    .says("the input receives adjoint × y(1 − y), y the node's value"),
    unary(
        Op::Relu,
        "relu",
        "max(x, 0) (partial 0 at the kink)",
        &elementwise::RELU,
        &[],
    )
    .says("the input receives the adjoint where x > 0, else 0"),
    unary(
        Op::LeakyRelu,
        "leaky_relu",
        "x if x > 0 else slope·x",
        &elementwise::LEAKY_RELU,
        &[AttrName::Slope],
    )
    .says("the input receives the adjoint where x > 0, else adjoint × slope"),
    structured(
        Op::Matmul,
        "matmul",
        2,
        &[],
        "matrix product, batched over leading axes",
        &linalg::MATMUL,
    )
    .says("A receives adjoint · Bᵀ, B receives Aᵀ · adjoint"),
    structured(
        Op::Transpose,
        "transpose",
        1,
        &[],
        "permute axes (default: swap the last two)",
        &linalg::TRANSPOSE,
    )
    .says("the input receives the adjoint with the axes permuted back"),
    structured(
        Op::Reshape,
        "reshape",
        1,
        &[AttrName::Shape],
        "same elements, new shape",
        &linalg::RESHAPE,
    )
    .says("the input receives the adjoint in its own shape"),
    structured(
        Op::Cast,
        "cast",
        1,
        &[],
        "the value converted into the node's dtype",
        &cast::CAST,
    )
    .says("the input receives the adjoint unchanged, rounded into the input's dtype"),
    structured(
        Op::Sum,
        "sum",
        1,
        &[],
        "sum of all elements, or along axis",
        &reduce::SUM,
    )
    .says("every summed element receives the adjoint"),
    structured(
        Op::Mean,
        "mean",
        1,
        &[],
        "mean of all elements, or along axis",
        &reduce::MEAN,
    )
    .says("every averaged element receives adjoint / n"),
    structured(
        Op::Max,
        "max",
        1,
        &[AttrName::Axis],
        "maximum along axis (ties: first)",
        &reduce::MAX,
    )
    .says("the (first) largest element receives the adjoint, the others 0"),
    structured(
        Op::Softmax,
        "softmax",
        1,
        &[],
        "softmax along axis (default −1)",
        &reduce::SOFTMAX,
    )
    .says("the input receives y ⊙ (adjoint − Σ adjoint ⊙ y) along the axis"),
    structured(
        Op::LogSoftmax,
        "log_softmax",
        1,
        &[],
        "log of softmax along axis (default −1)",
        &reduce::LOG_SOFTMAX,
    )
    .says("the input receives adjoint − softmax(x) × Σ adjoint along the axis"),
    structured(
        Op::Logsumexp,
        "logsumexp",
        1,
        &[],
        "log Σ eˣ of all elements, or along axis",
        &reduce::LOGSUMEXP,
    )
    .says("each element receives adjoint × softmax(x)"),
    structured(
        Op::CrossEntropy,
        "cross_entropy",
        1,
        &[AttrName::Targets],
        "mean cross-entropy of logits [N, C] against class indices",
        &loss::CROSS_ENTROPY,
    )
    .says("the logits receive adjoint × (softmax(logits) − one-hot(targets)) / N"),
    structured(
        Op::Mse,
        "mse",
        2,
        &[],
        "mean squared error of prediction against target",
        &loss::MSE,
    )
    .says("the prediction receives adjoint × 2(p − t) / n, the target its negative"),
];

/// The catalog row standing in for custom ops.
static CUSTOM: OpSpec = OpSpec {
    op: Op::Custom,
    name: "custom",
    arity: Arity::AtLeast(1),
    required: &[],
    summary: "an op outside the catalog, with recorded partials on every edge",
    derivative: "each input receives adjoint × the recorded partial on its edge",
    rule: Rule::Custom,
};

const fn leaf(op: Op, name: &'static str, summary: &'static str) -> OpSpec {
    OpSpec {
        op,
        name,
        arity: Arity::Exactly(0),
        required: &[],
        summary,
        derivative: "",
        rule: Rule::Leaf,
    }
}

const fn unary(
    op: Op,
    name: &'static str,
    summary: &'static str,
    rule: &'static UnaryRule,
    required: &'static [AttrName],
) -> OpSpec {
    OpSpec {
        op,
        name,
        arity: Arity::Exactly(1),
        required,
        summary,
        derivative: "",
        rule: Rule::Unary(rule),
    }
}

const fn binary(
    op: Op,
    name: &'static str,
    summary: &'static str,
    rule: &'static BinaryRule,
) -> OpSpec {
    OpSpec {
        op,
        name,
        arity: Arity::Exactly(2),
        required: &[],
        summary,
        derivative: "",
        rule: Rule::Binary(rule),
    }
}

const fn structured(
    op: Op,
    name: &'static str,
    arity: usize,
    required: &'static [AttrName],
    summary: &'static str,
    rule: &'static StructuredRule,
) -> OpSpec {
    OpSpec {
        op,
        name,
        arity: Arity::Exactly(arity),
        required,
        summary,
        derivative: "",
        rule: Rule::Structured(rule),
    }
}

impl OpSpec {
    /// The row with its derivative in words (see [`OpSpec::derivative`]).
    const fn says(self, derivative: &'static str) -> OpSpec {
        OpSpec { derivative, ..self }
    }
}

impl Op {
    /// The catalog row of this op.
    pub fn spec(self) -> &'static OpSpec {
        if self == Op::Custom {
            return &CUSTOM;
        }
        let row = &CATALOG[self as usize];
        debug_assert_eq!(row.op, self, "catalog order must follow the enum");
        row
    }

    /// The op of a catalog name; `None` for a name outside the catalog.
    pub fn from_name(name: &str) -> Option<Op> {
        // A map built once from the catalog: loading calls this once per node,
        // and a linear scan of string comparisons showed in profiles.
        static BY_NAME: std::sync::LazyLock<std::collections::HashMap<&'static str, Op>> =
            std::sync::LazyLock::new(|| CATALOG.iter().map(|row| (row.name, row.op)).collect());
        BY_NAME.get(name).copied()
    }

    /// The name in trace files.
    pub fn name(self) -> &'static str {
        self.spec().name
    }

    /// True for input, param and const.
    pub fn is_leaf(self) -> bool {
        matches!(self, Op::Input | Op::Param | Op::Const)
    }

    /// True for elementwise ops, whose partial on each edge is diagonal.
    pub fn is_elementwise(self) -> bool {
        matches!(self.spec().rule, Rule::Unary(_) | Rule::Binary(_))
    }

    /// The catalog name closest to `name` by edit distance, for hints.
    pub fn closest_name(name: &str) -> Option<&'static str> {
        crate::closest::closest(name, CATALOG.iter().map(|row| row.name))
    }
}

/// The output shape of `op` for the given input shapes, or why they do not fit.
/// Leaves and custom ops have no rule: their recorded shape stands.
pub fn infer_shape(
    op: Op,
    inputs: &[&[usize]],
    attrs: &Attrs,
) -> Result<Option<Vec<usize>>, String> {
    match &op.spec().rule {
        Rule::Leaf | Rule::Custom => Ok(None),
        Rule::Unary(_) => Ok(Some(inputs[0].to_vec())),
        Rule::Binary(_) => broadcast_shapes(inputs[0], inputs[1])
            .map(Some)
            .ok_or_else(|| {
                format!(
                    "shapes {} and {} do not broadcast",
                    crate::format::shape(inputs[0]),
                    crate::format::shape(inputs[1])
                )
            }),
        Rule::Structured(rule) => (rule.shape)(inputs, attrs).map(Some),
    }
}

/// Evaluates `op` on forward values: elementwise results rounded into the
/// precision's dtype, sums accumulated in its accumulation dtype and rounded
/// once. The result is stored in the precision's dtype.
///
/// # Panics
/// For leaves and custom ops, which have no forward rule, and for inputs whose
/// shapes [`infer_shape`] rejects.
pub fn forward(op: Op, inputs: &[&Value], attrs: &Attrs, precision: impl Into<Precision>) -> Value {
    let p: Precision = precision.into();
    match &op.spec().rule {
        Rule::Leaf | Rule::Custom => panic!("{} has no forward rule", op.name()),
        Rule::Unary(rule) => match inputs[0] {
            Value::Scalar(x) => Value::Scalar(p.round((rule.value)(*x, attrs))),
            x => Value::from_buffer(
                x.shape().to_vec(),
                kernels::map::unary(x.elements(), p.dtype, |v| p.round((rule.value)(v, attrs))),
            ),
        },
        Rule::Binary(rule) => {
            let (a, b) = (inputs[0], inputs[1]);
            if let (Value::Scalar(x), Value::Scalar(y)) = (a, b) {
                return Value::Scalar(p.round((rule.value)(*x, *y)));
            }
            let shape =
                broadcast_shapes(a.shape(), b.shape()).expect("shapes checked by the validator");
            zip_broadcast(a, b, &shape, p.dtype, |x, y| p.round((rule.value)(x, y)))
        }
        Rule::Structured(rule) => (rule.forward)(inputs, attrs, p).stored_as(p.dtype),
    }
}

/// `f(a, b)` over the broadcast of two values into `shape`, stored in `dtype`.
fn zip_broadcast(
    a: &Value,
    b: &Value,
    shape: &[usize],
    dtype: Dtype,
    f: impl Fn(f64, f64) -> f64 + Sync,
) -> Value {
    let len = numel(shape);
    let direct = |v: &Value| v.shape() == shape || v.len() == 1;
    if direct(a) && direct(b) {
        let buffer = kernels::map::ternary(
            len,
            [a.elements(), b.elements(), a.elements()],
            dtype,
            |x, y, _| f(x, y),
        );
        return Value::from_buffer(shape.to_vec(), buffer);
    }
    let (ia, ib) = (
        broadcast_source_indices(a.shape(), shape),
        broadcast_source_indices(b.shape(), shape),
    );
    let (ea, eb) = (a.elements(), b.elements());
    let data = ia
        .iter()
        .zip(&ib)
        .map(|(&i, &j)| f(ea.get(i), eb.get(j)))
        .collect();
    Value::from_parts_in(dtype, shape.to_vec(), data)
}

/// The local partial of an elementwise op on edge `slot`, one entry per
/// output element (the diagonal of the Jacobian), rounded into and stored in
/// `dtype`. `None` for ops whose Jacobian is not diagonal.
pub fn elementwise_partial(
    op: Op,
    slot: usize,
    inputs: &[&Value],
    output: &Value,
    attrs: &Attrs,
    dtype: Dtype,
) -> Option<Value> {
    match &op.spec().rule {
        Rule::Unary(rule) => Some(match (inputs[0], output) {
            (Value::Scalar(x), Value::Scalar(y)) => {
                Value::Scalar(dtype.round((rule.partial)(*x, *y, attrs)))
            }
            (x, y) => Value::from_buffer(
                output.shape().to_vec(),
                kernels::map::ternary(
                    x.len(),
                    [x.elements(), y.elements(), y.elements()],
                    dtype,
                    |xi, yi, _| dtype.round((rule.partial)(xi, yi, attrs)),
                ),
            ),
        }),
        Rule::Binary(rule) => {
            let (a, b) = (inputs[0], inputs[1]);
            let partial = rule.partials[slot];
            if let (Value::Scalar(x), Value::Scalar(y), Value::Scalar(z)) = (a, b, output) {
                return Some(Value::Scalar(dtype.round(partial(*x, *y, *z))));
            }
            Some(binary_partial(a, b, output, dtype, partial))
        }
        _ => None,
    }
}

/// A binary op's partial on one edge over the output's shape.
fn binary_partial(
    a: &Value,
    b: &Value,
    output: &Value,
    dtype: Dtype,
    partial: fn(f64, f64, f64) -> f64,
) -> Value {
    let shape = output.shape();
    let direct = |v: &Value| v.shape() == shape || v.len() == 1;
    if direct(a) && direct(b) {
        let buffer = kernels::map::ternary(
            output.len(),
            [a.elements(), b.elements(), output.elements()],
            dtype,
            |x, y, z| dtype.round(partial(x, y, z)),
        );
        return Value::from_buffer(shape.to_vec(), buffer);
    }
    let (ia, ib) = (
        broadcast_source_indices(a.shape(), shape),
        broadcast_source_indices(b.shape(), shape),
    );
    let (ea, eb, ey) = (a.elements(), b.elements(), output.elements());
    let data = ia
        .iter()
        .zip(&ib)
        .enumerate()
        .map(|(k, (&i, &j))| dtype.round(partial(ea.get(i), eb.get(j), ey.get(k))))
        .collect();
    Value::from_parts_in(dtype, shape.to_vec(), data)
}

/// The scalar local partial of an elementwise op whose inputs are all scalars.
/// The engine's fast path for scalar traces; same rule as [`elementwise_partial`].
#[inline]
pub fn scalar_partial(
    op: Op,
    slot: usize,
    inputs: &[f64],
    output: f64,
    attrs: &Attrs,
    dtype: Dtype,
) -> Option<f64> {
    match &op.spec().rule {
        Rule::Unary(rule) => Some(dtype.round((rule.partial)(inputs[0], output, attrs))),
        Rule::Binary(rule) => {
            Some(dtype.round((rule.partials[slot])(inputs[0], inputs[1], output)))
        }
        _ => None,
    }
}

/// The contribution to input `slot` of a catalog op: the adjoint pulled back
/// through the op's Jacobian (a vector-Jacobian product), in the input's
/// shape, stored in the node's dtype. Elementwise ops multiply by their
/// diagonal partial and sum over broadcast axes.
///
/// # Panics
/// For leaves and custom ops.
pub fn vjp(op: Op, args: &VjpArgs) -> Value {
    let p = args.precision;
    match &op.spec().rule {
        Rule::Leaf | Rule::Custom => panic!("{} has no derivative rule", op.name()),
        Rule::Unary(rule) => {
            let (x, y, g) = (args.inputs[0], args.output, args.adjoint);
            if let (Value::Scalar(x), Value::Scalar(y), Value::Scalar(g)) = (x, y, g) {
                return Value::Scalar(p.round(g * p.round((rule.partial)(*x, *y, args.attrs))));
            }
            // Fused: the partial is never stored, each element is rounded as
            // the two-step product would round it.
            let buffer = kernels::map::ternary(
                y.len(),
                [g.elements(), x.elements(), y.elements()],
                p.dtype,
                |gi, xi, yi| p.round(gi * p.round((rule.partial)(xi, yi, args.attrs))),
            );
            Value::from_buffer(y.shape().to_vec(), buffer)
        }
        Rule::Binary(rule) => {
            let (a, b, y, g) = (args.inputs[0], args.inputs[1], args.output, args.adjoint);
            let target_shape = args.inputs[args.slot].shape();
            let partial = rule.partials[args.slot];
            if let (Value::Scalar(x0), Value::Scalar(x1), Value::Scalar(z), Value::Scalar(gs)) =
                (a, b, y, g)
            {
                return Value::Scalar(p.round(gs * p.round(partial(*x0, *x1, *z))));
            }
            let shape = y.shape();
            let direct = |v: &Value| v.shape() == shape || v.len() == 1;
            if direct(a) && direct(b) && g.shape() == shape {
                // Partial and product in one pass over the output's shape.
                let (ea, eb, ey) = (a.elements(), b.elements(), y.elements());
                let product = kernels::map::build(p.dtype, y.len(), |start, out| {
                    let mut wide = [[0.0f64; kernels::CHUNK]; 3];
                    let [wa, wb, wy] = &mut wide;
                    let n = out.len();
                    kernels::map::widen(ea, start, &mut wa[..n]);
                    kernels::map::widen(eb, start, &mut wb[..n]);
                    kernels::map::widen(ey, start, &mut wy[..n]);
                    kernels::map::widen(g.elements(), start, out);
                    for k in 0..n {
                        out[k] = p.round(out[k] * p.round(partial(wa[k], wb[k], wy[k])));
                    }
                });
                let product = Value::from_buffer(shape.to_vec(), product);
                return reduce_to_shape(&product, target_shape, p);
            }
            let partial = binary_partial(a, b, y, p.dtype, partial);
            scale_and_reduce(g, &partial, target_shape, p)
        }
        Rule::Structured(rule) => (rule.vjp)(args).stored_as(p.dtype),
    }
}

/// The tangent of a catalog op's output given its inputs' tangents: the
/// Jacobian-vector product, the forward-mode counterpart of [`vjp`].
/// Elementwise ops sum each input's broadcast tangent times its diagonal partial.
///
/// # Panics
/// For leaves and custom ops.
pub fn jvp(op: Op, args: &JvpArgs) -> Value {
    let dtype = args.precision.dtype;
    match &op.spec().rule {
        Rule::Leaf | Rule::Custom => panic!("{} has no derivative rule", op.name()),
        Rule::Unary(_) | Rule::Binary(_) => {
            let shape = args.output.shape();
            let mut total: Option<Vec<f64>> = None;
            for (slot, tangent) in args.tangents.iter().enumerate() {
                let partial =
                    elementwise_partial(op, slot, args.inputs, args.output, args.attrs, dtype)
                        .expect("elementwise ops have a diagonal partial");
                let sources = broadcast_source_indices(tangent.shape(), shape);
                let (partial, tangent) = (partial.to_f64(), tangent.elements());
                let term = sources
                    .iter()
                    .zip(partial.iter())
                    .map(|(&k, &p)| dtype.round(p * tangent.get(k)));
                total = Some(match total {
                    None => term.collect(),
                    Some(sum) => sum
                        .iter()
                        .zip(term)
                        .map(|(&s, t)| dtype.round(s + t))
                        .collect(),
                });
            }
            Value::from_parts_in(
                dtype,
                shape.to_vec(),
                total.unwrap_or_else(|| vec![0.0; numel(shape)]),
            )
        }
        Rule::Structured(rule) => (rule.jvp)(args).stored_as(dtype),
    }
}

/// Where an op is not differentiable everywhere, which side of each kink its
/// inputs are on: per element −1, 0 or +1 for relu, leaky_relu and abs (0 is
/// on the kink); per lane of max, the first maximum's position plus one,
/// negated when the maximum is tied (on the kink). `None` for smooth ops.
/// Two states that differ mean a change of the inputs crossed a kink.
pub fn kink_state(op: Op, inputs: &[&Value], attrs: &Attrs) -> Option<Vec<i64>> {
    match op {
        Op::Relu | Op::LeakyRelu | Op::Abs => Some(
            inputs[0]
                .to_f64()
                .iter()
                .map(|&x| {
                    if x > 0.0 {
                        1
                    } else if x < 0.0 {
                        -1
                    } else {
                        0
                    }
                })
                .collect(),
        ),
        Op::Max => Some(reduce::max_kink_state(inputs[0], attrs)),
        _ => None,
    }
}

/// True when a [`kink_state`] puts some element exactly on a kink.
pub fn on_kink(state: &[i64]) -> bool {
    state.iter().any(|&side| side <= 0)
}

/// `adjoint ⊙ partial` (both of the output's shape, or a one-element partial),
/// each product rounded into the dtype, then summed over the axes along which
/// the input was broadcast (in the accumulation dtype, rounded once).
pub fn scale_and_reduce(
    adjoint: &Value,
    partial: &Value,
    input_shape: &[usize],
    precision: impl Into<Precision>,
) -> Value {
    let p: Precision = precision.into();
    if let (Value::Scalar(g), Value::Scalar(d)) = (adjoint, partial) {
        return reduce_to_shape(&Value::Scalar(p.round(g * d)), input_shape, p);
    }
    let buffer = kernels::map::ternary(
        adjoint.len(),
        [adjoint.elements(), partial.elements(), partial.elements()],
        p.dtype,
        |g, d, _| p.round(g * d),
    );
    let product = Value::from_buffer(adjoint.shape().to_vec(), buffer);
    reduce_to_shape(&product, input_shape, p)
}

/// Sums a value down to `to_shape`, undoing a broadcast: in the accumulation
/// dtype, rounded once into the dtype, stored in the dtype.
pub fn reduce_to_shape(
    value: &Value,
    to_shape: &[usize],
    precision: impl Into<Precision>,
) -> Value {
    let p: Precision = precision.into();
    let from_shape = value.shape();
    if from_shape == to_shape {
        return value.clone().stored_as(p.dtype);
    }
    // Broadcast over leading axes only (a bias): whole rows sum into one row.
    let inner = numel(to_shape);
    let kept = &to_shape[to_shape.iter().take_while(|&&d| d == 1).count()..];
    let trailing = from_shape.len() >= kept.len()
        && kept
            .iter()
            .rev()
            .zip(from_shape.iter().rev())
            .all(|(t, f)| t == f)
        && inner > 0;
    if trailing {
        let rows = value.len() / inner;
        let buffer = kernels::map::sum_rows(value.elements(), rows, inner, p.accumulate, p.dtype);
        return Value::from_buffer(to_shape.to_vec(), buffer);
    }
    let targets = broadcast_source_indices(to_shape, from_shape);
    let mut reduced = vec![0.0; numel(to_shape)];
    let mut touched = vec![false; reduced.len()];
    let elements = value.elements();
    for (k, &target) in targets.iter().enumerate() {
        let x = elements.get(k);
        // The first term is taken as is so that −0 survives, as a framework's sum would keep it.
        reduced[target] = if touched[target] {
            p.acc(reduced[target] + x)
        } else {
            x
        };
        touched[target] = true;
    }
    reduced.iter_mut().for_each(|x| *x = p.round(*x));
    Value::from_parts_in(p.dtype, to_shape.to_vec(), reduced)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn catalog_rows_follow_the_enum_order() {
        for (index, row) in CATALOG.iter().enumerate() {
            assert_eq!(row.op as usize, index, "{} is out of place", row.name);
            assert_eq!(Op::from_name(row.name), Some(row.op));
        }
        assert_eq!(Op::from_name("gelu_custom"), None);
    }

    #[test]
    fn every_row_says_how_its_derivative_is_formed() {
        for row in CATALOG.iter().chain([Op::Custom.spec()]) {
            assert!(
                !row.derivative.is_empty() && !row.derivative.contains('\n'),
                "{} needs a one-line derivative text",
                row.name
            );
        }
    }

    #[test]
    fn closest_name_suggests_typos() {
        assert_eq!(Op::closest_name("mull"), Some("mul"));
        assert_eq!(Op::closest_name("softmx"), Some("softmax"));
        assert_eq!(Op::closest_name("completely_new"), None);
    }

    #[test]
    fn broadcast_vjp_sums_over_broadcast_axes() {
        // y = a + b with a: [2, 3], b: [3]; ∂L/∂b sums the adjoint over rows.
        let a = Value::from_parts(vec![2, 3], vec![1.0; 6]);
        let b = Value::from_parts(vec![3], vec![1.0; 3]);
        let y = forward(Op::Add, &[&a, &b], &Attrs::default(), Dtype::F64);
        let adjoint = Value::from_parts(vec![2, 3], vec![1.0, 2.0, 3.0, 4.0, 5.0, 6.0]);
        let args = VjpArgs {
            slot: 1,
            inputs: &[&a, &b],
            output: &y,
            adjoint: &adjoint,
            attrs: &Attrs::default(),
            precision: Dtype::F64.into(),
        };
        assert_eq!(
            vjp(Op::Add, &args),
            Value::from_parts(vec![3], vec![5.0, 7.0, 9.0])
        );
    }
}
