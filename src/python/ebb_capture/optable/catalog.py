"""The ops of Ebb's catalog this package writes (traces/FORMAT.md lists
them; `ebb ops` prints them). Every node the recorder emits is one of
these, or a custom op named `custom.<aten op>` with its partials."""

from __future__ import annotations

PRESENT = frozenset(
    {
        "input", "param", "const",
        "add", "sub", "mul", "div", "maximum", "minimum", "powt", "where",
        "neg", "pow", "exp", "log", "sqrt", "abs", "sin", "cos", "tan", "tanh", "sigmoid", "relu",
        "leaky_relu", "square", "reciprocal", "rsqrt", "log1p", "expm1", "erf", "clamp", "gelu",
        "silu", "softplus", "elu", "cast",
        "matmul", "transpose", "reshape", "broadcast_to", "concat", "stack", "slice", "select",
        "pad", "gather", "embedding",
        "sum", "mean", "max", "min", "prod", "var", "std", "cumsum", "softmax", "log_softmax",
        "logsumexp",
        "conv1d", "conv2d", "max_pool2d", "avg_pool2d",
        "layer_norm", "rms_norm", "batch_norm", "group_norm",
        "cross_entropy", "mse", "nll_loss", "bce_with_logits", "huber", "l1_loss",
    }
)  # fmt: skip


def known(op: str) -> bool:
    """A catalog op, or a custom op (which carries its partials)."""
    return op in PRESENT or op.startswith("custom.")
