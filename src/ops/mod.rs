//! The op catalog: one table entry per op with its forward rule and its
//! derivative rule. This is the single place where an op's derivative is
//! written; the sweep engine, the recorder and the checks all call through it.

mod activation;
mod attrs;
mod cast;
mod condition;
mod conv;
mod elementwise;
mod index;
pub mod kernels;
mod linalg;
mod loss;
mod losses;
mod moments;
mod norm;
mod pool;
mod precision;
mod reduce;
mod scan;
mod shape;

pub use attrs::{Approximate, AttrName, Attrs, BoxedAttrs, Reduction};
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
    Maximum,
    Minimum,
    Powt,
    Where,
    Neg,
    Pow,
    Exp,
    Log,
    Sqrt,
    Abs,
    Sin,
    Cos,
    Tan,
    Tanh,
    Sigmoid,
    Relu,
    LeakyRelu,
    Square,
    Reciprocal,
    Rsqrt,
    Log1p,
    Expm1,
    Erf,
    Clamp,
    Gelu,
    Silu,
    Softplus,
    Elu,
    Matmul,
    Transpose,
    Reshape,
    Cast,
    BroadcastTo,
    Concat,
    Stack,
    Slice,
    Select,
    Pad,
    Gather,
    Embedding,
    Sum,
    Mean,
    Max,
    Min,
    Prod,
    Var,
    Std,
    Cumsum,
    Softmax,
    LogSoftmax,
    Logsumexp,
    Conv1d,
    Conv2d,
    MaxPool2d,
    AvgPool2d,
    LayerNorm,
    RmsNorm,
    BatchNorm,
    GroupNorm,
    CrossEntropy,
    Mse,
    NllLoss,
    BceWithLogits,
    Huber,
    L1Loss,
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
    /// From the first to the second, inclusive (trailing inputs optional).
    Between(usize, usize),
}

impl Arity {
    /// Whether `n` inputs fit.
    pub fn accepts(self, n: usize) -> bool {
        match self {
            Arity::Exactly(k) => n == k,
            Arity::AtLeast(k) => n >= k,
            Arity::Between(low, high) => (low..=high).contains(&n),
        }
    }
}

impl std::fmt::Display for Arity {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Arity::Exactly(1) => write!(f, "1 input"),
            Arity::Exactly(k) => write!(f, "{k} inputs"),
            Arity::AtLeast(k) => write!(f, "at least {k} inputs"),
            Arity::Between(low, high) => write!(f, "{low} to {high} inputs"),
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
    /// Input slots that carry indices or a condition: whole numbers (0 or 1
    /// for a condition) checked on loading, never differentiated (they
    /// receive a zero contribution) and never rounded into another dtype.
    pub discrete: &'static [usize],
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
    binary(
        Op::Maximum,
        "maximum",
        "max(a, b), broadcast; NaN propagates",
        &activation::MAXIMUM,
    )
    .says("a receives the adjoint where a > b, b where b > a; at a tie each receives half"),
    binary(
        Op::Minimum,
        "minimum",
        "min(a, b), broadcast; NaN propagates",
        &activation::MINIMUM,
    )
    .says("a receives the adjoint where a < b, b where b < a; at a tie each receives half"),
    binary(
        Op::Powt,
        "powt",
        "aᵇ with a tensor exponent, broadcast",
        &activation::POWT,
    )
    .says("a receives adjoint × b·a^(b−1), b receives adjoint × aᵇ·ln a"),
    structured(
        Op::Where,
        "where",
        3,
        &[],
        "a where condition is 1, b where it is 0 (condition, a, b broadcast)",
        &condition::WHERE,
    )
    .indexed_by(&[0])
    .says("a receives the adjoint where the condition is 1, b where it is 0; the condition 0"),
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
    unary(Op::Tan, "tan", "tangent", &activation::TAN, &[])
        .says("the input receives adjoint × (1 + tan² x)"),
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
    unary(Op::Square, "square", "x²", &activation::SQUARE, &[])
        .says("the input receives adjoint × 2x"),
    unary(Op::Reciprocal, "reciprocal", "1/x", &activation::RECIPROCAL, &[])
        .says("the input receives adjoint × −1/x²"),
    unary(Op::Rsqrt, "rsqrt", "1/√x", &activation::RSQRT, &[])
        .says("the input receives adjoint × −½ x^(−3/2)"),
    unary(Op::Log1p, "log1p", "ln(1 + x), exact near 0", &activation::LOG1P, &[])
        .says("the input receives adjoint / (1 + x)"),
    unary(Op::Expm1, "expm1", "eˣ − 1, exact near 0", &activation::EXPM1, &[])
        .says("the input receives adjoint × eˣ"),
    unary(Op::Erf, "erf", "the error function", &activation::ERF, &[])
        .says("the input receives adjoint × (2/√π) e^(−x²)"),
    unary(
        Op::Clamp,
        "clamp",
        "x held within [min, max] (either bound optional)",
        &activation::CLAMP,
        &[],
    )
    .says("the input receives the adjoint where min ≤ x ≤ max (bounds included), else 0"),
    unary(
        Op::Gelu,
        "gelu",
        "x Φ(x), or its tanh form (approximate: tanh)",
        &activation::GELU,
        &[],
    )
    .says("the input receives adjoint × (Φ(x) + x φ(x)), or the tanh form's derivative"),
    unary(Op::Silu, "silu", "x σ(x)", &activation::SILU, &[])
        .says("the input receives adjoint × σ(x)(1 + x(1 − σ(x)))"),
    unary(
        Op::Softplus,
        "softplus",
        "(1/β) ln(1 + e^(βx)); x where βx > threshold",
        &activation::SOFTPLUS,
        &[],
    )
    .says("the input receives adjoint × σ(βx), or the adjoint where βx > threshold"),
    unary(
        Op::Elu,
        "elu",
        "x if x > 0 else α(eˣ − 1)",
        &activation::ELU,
        &[],
    )
    .says("the input receives the adjoint where x > 0, else adjoint × α eˣ"),
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
        Op::BroadcastTo,
        "broadcast_to",
        1,
        &[AttrName::Shape],
        "x broadcast to a shape (NumPy rules)",
        &shape::BROADCAST_TO,
    )
    .says("the input receives the adjoint summed over the broadcast axes"),
    structured(
        Op::Concat,
        "concat",
        1,
        &[AttrName::Axis],
        "inputs joined along an existing axis",
        &shape::CONCAT,
    )
    .takes(Arity::AtLeast(1))
    .says("each input receives its own block of the adjoint along the axis"),
    structured(
        Op::Stack,
        "stack",
        1,
        &[AttrName::Axis],
        "inputs of one shape joined along a new axis",
        &shape::STACK,
    )
    .takes(Arity::AtLeast(1))
    .says("each input receives its own slice of the adjoint along the new axis"),
    structured(
        Op::Slice,
        "slice",
        1,
        &[AttrName::Axis],
        "x[start:end:step] along an axis (Python's rules)",
        &shape::SLICE,
    )
    .says("the sliced elements receive their adjoint, the others 0"),
    structured(
        Op::Select,
        "select",
        1,
        &[AttrName::Axis, AttrName::Index],
        "one index along an axis, which is dropped",
        &shape::SELECT,
    )
    .says("the selected elements receive the adjoint, the others 0"),
    structured(
        Op::Pad,
        "pad",
        1,
        &[AttrName::Pads],
        "constant padding (pads: every axis's start, then end)",
        &shape::PAD,
    )
    .says("each kept element receives the adjoint at its padded place; the padding's is dropped"),
    structured(
        Op::Gather,
        "gather",
        2,
        &[AttrName::Axis],
        "data read at indices along an axis (take_along_axis)",
        &index::GATHER,
    )
    .indexed_by(&[1])
    .says("each read element receives the adjoint of every place it went to; indices 0"),
    structured(
        Op::Embedding,
        "embedding",
        2,
        &[],
        "rows of a table [V, D] by index",
        &index::EMBEDDING,
    )
    .indexed_by(&[1])
    .says("each looked-up row receives its output rows' adjoints (padding_idx none); indices 0"),
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
        Op::Min,
        "min",
        1,
        &[AttrName::Axis],
        "minimum along axis (ties: first)",
        &reduce::MIN,
    )
    .says("the (first) smallest element receives the adjoint, the others 0"),
    structured(
        Op::Prod,
        "prod",
        1,
        &[],
        "product of all elements, or along axis",
        &scan::PROD,
    )
    .says("each element receives adjoint × the product of the others"),
    structured(
        Op::Var,
        "var",
        1,
        &[],
        "variance (÷ n − correction) of all elements, or along axis",
        &moments::VAR,
    )
    .says("each element receives adjoint × 2(x − mean)/(n − correction)"),
    structured(
        Op::Std,
        "std",
        1,
        &[],
        "standard deviation (√var) of all elements, or along axis",
        &moments::STD,
    )
    .says("each element receives adjoint × (x − mean)/((n − correction) · std)"),
    structured(
        Op::Cumsum,
        "cumsum",
        1,
        &[AttrName::Axis],
        "running sum along axis",
        &scan::CUMSUM,
    )
    .says("each element receives the sum of the adjoints from its place to the end"),
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
        Op::Conv1d,
        "conv1d",
        2,
        &[],
        "convolution of x [N, C, L] by w [O, C/groups, K], optional bias [O]",
        &conv::CONV1D,
    )
    .takes(Arity::Between(2, 3))
    .says("x receives Wᵀ · adjoint folded back onto its windows, w adjoint · windowsᵀ, bias Σ adjoint"),
    structured(
        Op::Conv2d,
        "conv2d",
        2,
        &[],
        "convolution of x [N, C, H, W] by w [O, C/groups, kH, kW], optional bias [O]",
        &conv::CONV2D,
    )
    .takes(Arity::Between(2, 3))
    .says("x receives Wᵀ · adjoint folded back onto its windows, w adjoint · windowsᵀ, bias Σ adjoint"),
    structured(
        Op::MaxPool2d,
        "max_pool2d",
        1,
        &[AttrName::Kernel],
        "maximum over windows of x [N, C, H, W] (ties: first)",
        &pool::MAX_POOL2D,
    )
    .says("each window's (first) largest element receives the window's adjoint"),
    structured(
        Op::AvgPool2d,
        "avg_pool2d",
        1,
        &[AttrName::Kernel],
        "mean over windows of x [N, C, H, W]",
        &pool::AVG_POOL2D,
    )
    .says("each element of a window receives the window's adjoint / its divisor"),
    structured(
        Op::LayerNorm,
        "layer_norm",
        1,
        &[],
        "normalised over the axes from axis (−1) on, then · weight + bias",
        &norm::LAYER_NORM,
    )
    .takes(Arity::Between(1, 3))
    .says("x receives r(ĝ − mean ĝ − x̂ mean(ĝ x̂)), ĝ = weight · adjoint; weight Σ adjoint x̂, bias Σ adjoint"),
    structured(
        Op::RmsNorm,
        "rms_norm",
        1,
        &[],
        "x / √(mean(x²) + eps) over the axes from axis (−1) on, then · weight",
        &norm::RMS_NORM,
    )
    .takes(Arity::Between(1, 2))
    .says("x receives r(ĝ − x̂ mean(ĝ x̂)), ĝ = weight · adjoint; weight Σ adjoint x̂"),
    structured(
        Op::BatchNorm,
        "batch_norm",
        1,
        &[],
        "each channel of x [N, C, …] normalised by batch statistics, then · weight + bias",
        &norm::BATCH_NORM,
    )
    .takes(Arity::Between(1, 3))
    .says("x receives r(ĝ − mean ĝ − x̂ mean(ĝ x̂)) per channel; weight Σ adjoint x̂, bias Σ adjoint"),
    structured(
        Op::GroupNorm,
        "group_norm",
        1,
        &[AttrName::Groups],
        "each group of channels of each sample normalised, then · weight + bias",
        &norm::GROUP_NORM,
    )
    .takes(Arity::Between(1, 3))
    .says("x receives r(ĝ − mean ĝ − x̂ mean(ĝ x̂)) per sample and group; weight Σ adjoint x̂, bias Σ adjoint"),
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
    structured(
        Op::NllLoss,
        "nll_loss",
        2,
        &[],
        "−log_probs[n, target n], mean over targets not ignored (or sum, none)",
        &losses::NLL_LOSS,
    )
    .indexed_by(&[1])
    .says("each row's target log-probability receives −adjoint (÷ count for the mean), the rest 0"),
    structured(
        Op::BceWithLogits,
        "bce_with_logits",
        2,
        &[],
        "binary cross-entropy of logits against targets, stable",
        &losses::BCE_WITH_LOGITS,
    )
    .says("the logits receive adjoint × (σ(z) − t), the targets adjoint × −z (÷ n for the mean)"),
    structured(
        Op::Huber,
        "huber",
        2,
        &[],
        "½d² within ±delta, else delta(|d| − ½delta), d = prediction − target",
        &losses::HUBER,
    )
    .says("the prediction receives adjoint × d clipped to ±delta, the target its negative"),
    structured(
        Op::L1Loss,
        "l1_loss",
        2,
        &[],
        "|prediction − target|, mean (or sum, none)",
        &losses::L1_LOSS,
    )
    .says("the prediction receives adjoint × sign(p − t), 0 at a tie; the target its negative"),
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
    discrete: &[],
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
        discrete: &[],
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
        discrete: &[],
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
        discrete: &[],
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
        discrete: &[],
    }
}

impl OpSpec {
    /// The row with its derivative in words (see [`OpSpec::derivative`]).
    const fn says(self, derivative: &'static str) -> OpSpec {
        OpSpec { derivative, ..self }
    }

    /// The row taking `arity` inputs (optional trailing inputs, or any number).
    const fn takes(self, arity: Arity) -> OpSpec {
        OpSpec { arity, ..self }
    }

    /// The row with index or condition inputs at `slots` (see [`OpSpec::discrete`]).
    const fn indexed_by(self, slots: &'static [usize]) -> OpSpec {
        OpSpec {
            discrete: slots,
            ..self
        }
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
    let direct = |v: &Value| kernels::map::repeats_into(v.shape(), shape);
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
    let direct = |v: &Value| kernels::map::repeats_into(v.shape(), shape);
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
            if let Some(constant) = constant_partial(op, args.slot) {
                // add and sub: the product with ±1 is exact, so the
                // contribution is the adjoint itself, or its negation.
                let product = if constant == 1.0 {
                    g.clone()
                } else {
                    let mut negated = g.clone();
                    negated.map_in_place(|x| -x);
                    negated
                };
                return reduce_to_shape(&product, target_shape, p);
            }
            let direct = |v: &Value| kernels::map::repeats_into(v.shape(), shape);
            if direct(a) && direct(b) && g.shape() == shape {
                // Partial and product in one pass over the output's shape.
                let product = kernels::map::quaternary(
                    y.len(),
                    [g.elements(), a.elements(), b.elements(), y.elements()],
                    p.dtype,
                    |gk, ak, bk, yk| p.round(gk * p.round(partial(ak, bk, yk))),
                );
                let product = Value::from_buffer(shape.to_vec(), product);
                return reduce_to_shape(&product, target_shape, p);
            }
            let partial = binary_partial(a, b, y, p.dtype, partial);
            scale_and_reduce(g, &partial, target_shape, p)
        }
        Rule::Structured(rule) => (rule.vjp)(args).stored_as(p.dtype),
    }
}

/// The partial of a binary op that is the same constant everywhere (add's
/// and sub's ±1), so its vector-Jacobian product needs no multiply. Checked
/// against the op table's own partials in the tests below.
fn constant_partial(op: Op, slot: usize) -> Option<f64> {
    match (op, slot) {
        (Op::Add, _) | (Op::Sub, 0) => Some(1.0),
        (Op::Sub, 1) => Some(-1.0),
        _ => None,
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

/// Whether `op` has kinks: points where it is not differentiable, at which
/// the catalog takes a convention (traces/FORMAT.md, "Kinks and ties").
pub fn has_kinks(op: Op) -> bool {
    matches!(
        op,
        Op::Relu
            | Op::LeakyRelu
            | Op::Abs
            | Op::Clamp
            | Op::Elu
            | Op::Softplus
            | Op::Maximum
            | Op::Minimum
            | Op::Max
            | Op::Min
            | Op::MaxPool2d
            | Op::L1Loss
            | Op::Embedding
    )
}

/// Where an op is not differentiable everywhere, which smooth piece its
/// inputs are on: one number per element (relu, leaky_relu, abs, elu,
/// clamp, softplus), per output element (maximum and minimum: the sign of
/// a − b; l1_loss: of prediction − target), per lane (max, min: the first
/// extremum's position plus one) or per window (max_pool2d). 0 means on a
/// kink (at relu's 0, at a bound of clamp, at a tie, at a lookup of
/// embedding's padding row, whose zero gradient is a convention). `None` for smooth ops
/// (elu with α = 1 is smooth). Two states that differ mean a change of the
/// inputs crossed a kink.
pub fn kink_state(op: Op, inputs: &[&Value], attrs: &Attrs) -> Option<Vec<i64>> {
    let per_element = |x: &Value| {
        let values = x.to_f64();
        values
            .iter()
            .map(|&v| activation::unary_kink(op, v, attrs))
            .collect()
    };
    match op {
        Op::Relu | Op::LeakyRelu | Op::Abs | Op::Clamp | Op::Softplus => {
            Some(per_element(inputs[0]))
        }
        Op::Elu if activation::elu_has_kink(attrs) => Some(per_element(inputs[0])),
        Op::Maximum | Op::Minimum | Op::L1Loss => {
            let (a, b) = (inputs[0], inputs[1]);
            let shape = broadcast_shapes(a.shape(), b.shape())?;
            let (ea, eb) = (a.elements(), b.elements());
            let signs = broadcast_source_indices(a.shape(), &shape)
                .into_iter()
                .zip(broadcast_source_indices(b.shape(), &shape))
                .map(|(i, j)| {
                    let d = ea.get(i) - eb.get(j);
                    i64::from(d > 0.0) - i64::from(d < 0.0) + 2 * i64::from(d.is_nan())
                })
                .collect();
            Some(signs)
        }
        Op::Max => Some(reduce::max_kink_state(inputs[0], attrs)),
        Op::Min => Some(reduce::min_kink_state(inputs[0], attrs)),
        Op::MaxPool2d => Some(pool::max_kink_state(inputs[0], attrs)),
        // The padding row's zero gradient is a convention, not a derivative:
        // a lookup of it counts as a kink, so a difference check can say why
        // it disagrees there.
        Op::Embedding => attrs
            .padding_idx
            .map(|_| index::padding_state(inputs, attrs)),
        _ => None,
    }
}

/// True when a [`kink_state`] puts some element exactly on a kink.
pub fn on_kink(state: &[i64]) -> bool {
    state.contains(&0)
}

/// Why an op's input values or attributes do not fit it, beyond their shapes.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Misfit {
    /// What is wrong, naming the input and the element.
    pub message: String,
    /// What to do.
    pub hint: &'static str,
}

/// Checks what shapes cannot: index tensors hold whole numbers within the
/// axis they index, conditions hold 0 or 1, and attributes that only make
/// sense in a range are in it. Loading and recording both call this after
/// the shapes fit.
pub fn check_inputs(op: Op, inputs: &[&Value], attrs: &Attrs) -> Result<(), Misfit> {
    const INDEX: &str = "index tensors hold whole numbers within the axis they index (traces/FORMAT.md, \"Index tensors and conditions\")";
    let misfit = |hint: &'static str| move |message: String| Misfit { message, hint };
    match op {
        Op::Gather => index::check_gather(inputs, attrs).map_err(misfit(INDEX)),
        Op::Embedding => index::check_embedding(inputs).map_err(misfit(INDEX)),
        Op::NllLoss => losses::check_nll(inputs, attrs).map_err(misfit(
            "targets are class indices within the classes, or ignore_index",
        )),
        Op::Where => index::check_condition(inputs[0])
            .map_err(misfit("a condition holds 0 (take b) or 1 (take a)")),
        Op::Clamp => {
            let bounds = [attrs.min, attrs.max];
            if bounds.iter().all(Option::is_none) {
                Err(misfit("add attrs: (min: ..), (max: ..) or both")(
                    "clamp needs min, max or both".to_string(),
                ))
            } else if bounds.iter().flatten().any(|b| b.is_nan()) {
                Err(misfit("give numbers (±inf for no bound)")(
                    "clamp bounds must not be NaN".to_string(),
                ))
            } else {
                Ok(())
            }
        }
        Op::Softplus => {
            let beta = attrs.beta.unwrap_or(1.0);
            if beta > 0.0 && beta.is_finite() && !attrs.threshold.is_some_and(f64::is_nan) {
                Ok(())
            } else {
                Err(misfit("PyTorch's defaults are beta 1, threshold 20")(
                    format!(
                        "softplus needs a finite beta > 0 and a threshold that is a number, got beta {beta}"
                    ),
                ))
            }
        }
        Op::Elu if attrs.alpha.is_some_and(|alpha| !alpha.is_finite()) => {
            Err(misfit("PyTorch's default is alpha 1")(
                "elu needs a finite alpha".to_string(),
            ))
        }
        _ => Ok(()),
    }
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
    fn kink_states_mark_the_kinks_and_ties() {
        let x = Value::from_parts(vec![5], vec![-2.0, -1.0, 0.0, 1.0, 3.0]);
        let clamp = Attrs {
            min: Some(-1.0),
            max: Some(1.0),
            ..Attrs::default()
        };
        assert_eq!(
            kink_state(Op::Clamp, &[&x], &clamp),
            Some(vec![-1, 0, 1, 0, 2])
        );
        assert_eq!(
            kink_state(Op::Relu, &[&x], &Attrs::default()),
            Some(vec![-1, -1, 0, 1, 1])
        );
        let y = Value::from_parts(vec![5], vec![0.0, -1.0, 0.0, 2.0, 3.0]);
        let ties = kink_state(Op::Maximum, &[&x, &y], &Attrs::default()).unwrap();
        assert_eq!(ties, vec![-1, 0, 0, -1, 0]);
        assert!(on_kink(&ties));
        // Negative is a side, not a kink: relu below 0 is smooth there.
        assert!(!on_kink(&[-1, 1, 2]));
        // elu with α = 1 is smooth; with α ≠ 1 its slope jumps at 0.
        assert_eq!(kink_state(Op::Elu, &[&x], &Attrs::default()), None);
        let alpha = Attrs {
            alpha: Some(0.5),
            ..Attrs::default()
        };
        assert!(on_kink(&kink_state(Op::Elu, &[&x], &alpha).unwrap()));
        assert_eq!(kink_state(Op::Gelu, &[&x], &Attrs::default()), None);
    }

    #[test]
    fn closest_name_suggests_typos() {
        assert_eq!(Op::closest_name("mull"), Some("mul"));
        assert_eq!(Op::closest_name("softmx"), Some("softmax"));
        assert_eq!(Op::closest_name("completely_new"), None);
    }

    #[test]
    fn constant_partials_are_the_op_tables_own() {
        for op in [Op::Add, Op::Sub] {
            let Rule::Binary(rule) = &op.spec().rule else {
                panic!("{} is binary", op.name())
            };
            for slot in 0..2 {
                for (a, b) in [(0.5, -3.0), (1e30, 2.0), (-0.0, 7.0)] {
                    let y = (rule.value)(a, b);
                    assert_eq!(
                        constant_partial(op, slot),
                        Some((rule.partials[slot])(a, b, y))
                    );
                }
            }
        }
        assert_eq!(constant_partial(Op::Mul, 0), None);
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
