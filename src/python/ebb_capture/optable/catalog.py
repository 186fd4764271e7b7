"""The ops of Ebb's catalog this package writes, as of the Ebb it ships with.

traces/FORMAT.md lists the whole catalog; Ebb adds its ops in stages. Where
an op is not in `PRESENT` yet, the recorder writes an exact stand-in made
of ops that are (a pick as a matmul with a 0/1 matrix, say) or a custom op
with its partials; once it is, the op itself.
"""

from __future__ import annotations

PRESENT = frozenset(
    {
        "input", "param", "const",
        "add", "sub", "mul", "div", "neg", "pow", "exp", "log", "sqrt", "abs", "sin", "cos",
        "tanh", "sigmoid", "relu", "leaky_relu",
        "matmul", "transpose", "reshape", "cast",
        "sum", "mean", "max", "softmax", "log_softmax", "logsumexp",
        "cross_entropy", "mse",
    }
)  # fmt: skip


def has(op: str) -> bool:
    """Whether traces may use catalog op `op`."""
    return op in PRESENT
