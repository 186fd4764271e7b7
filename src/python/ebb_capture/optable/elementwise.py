"""Elementwise ATen ops onto Ebb's elementwise ops (NumPy broadcasting on
both sides)."""

from __future__ import annotations

from typing import TYPE_CHECKING

import torch

from . import Call, Unmapped, handles

if TYPE_CHECKING:
    from ..recorder import Recorder

aten = torch.ops.aten

# ATen unary op → the Ebb op of the same meaning.
_UNARY = {
    aten.neg.default: "neg",
    aten.exp.default: "exp",
    aten.log.default: "log",
    aten.sqrt.default: "sqrt",
    aten.abs.default: "abs",
    aten.sin.default: "sin",
    aten.cos.default: "cos",
    aten.tanh.default: "tanh",
    aten.sigmoid.default: "sigmoid",
    aten.relu.default: "relu",
}


@handles(*_UNARY)
def unary(r: "Recorder", c: Call) -> list[str | None]:
    return [r.op(_UNARY[r.functional(c.func)], [c["self"]], c.outs[0])]


# Powers with a constant exponent.
_POWER = {
    aten.rsqrt.default: -0.5,
    aten.reciprocal.default: -1.0,
    aten.square.default: 2.0,
}


@handles(*_POWER)
def fixed_power(r: "Recorder", c: Call) -> list[str | None]:
    return [r.op("pow", [c["self"]], c.outs[0], exponent=_POWER[r.functional(c.func)])]


@handles(aten.pow.Tensor_Scalar)
def power(r: "Recorder", c: Call) -> list[str | None]:
    exponent = c["exponent"]
    if isinstance(exponent, complex):
        raise Unmapped("complex exponent")
    return [r.op("pow", [c["self"]], c.outs[0], exponent=float(exponent))]


@handles(aten.leaky_relu.default)
def leaky_relu(r: "Recorder", c: Call) -> list[str | None]:
    return [r.op("leaky_relu", [c["self"]], c.outs[0], slope=float(c["negative_slope"]))]


@handles(aten.threshold.default)
def threshold(r: "Recorder", c: Call) -> list[str | None]:
    if c["threshold"] != 0 or c["value"] != 0:
        raise Unmapped("threshold other than relu")
    return [r.op("relu", [c["self"]], c.outs[0])]


def _scaled(r: "Recorder", other: object, alpha: object, like: torch.Tensor) -> str | float:
    """`alpha · other` for add/sub's alpha; a number stays a number."""
    if alpha is None or alpha == 1:
        return other  # type: ignore[return-value]
    if not isinstance(other, torch.Tensor):
        return float(other) * float(alpha)  # type: ignore[arg-type]
    value = r.compute(lambda: other * alpha)
    return r.op("mul", [other, r.scalar(alpha, like)], value)


@handles(aten.add.Tensor, aten.add.Scalar)
def add(r: "Recorder", c: Call) -> list[str | None]:
    out = c.outs[0]
    other = _scaled(r, c["other"], c["alpha"], out)
    return [r.op("add", [c["self"], r.operand(other, out)], out)]


@handles(aten.sub.Tensor, aten.sub.Scalar)
def sub(r: "Recorder", c: Call) -> list[str | None]:
    out = c.outs[0]
    other = _scaled(r, c["other"], c["alpha"], out)
    return [r.op("sub", [c["self"], r.operand(other, out)], out)]


@handles(aten.rsub.Tensor, aten.rsub.Scalar)
def rsub(r: "Recorder", c: Call) -> list[str | None]:
    # rsub(self, other, alpha) = other − alpha · self
    out = c.outs[0]
    scaled = _scaled(r, c["self"], c["alpha"], out)
    return [r.op("sub", [r.operand(c["other"], out), r.operand(scaled, out)], out)]


@handles(aten.mul.Tensor, aten.mul.Scalar)
def mul(r: "Recorder", c: Call) -> list[str | None]:
    out = c.outs[0]
    return [r.op("mul", [r.operand(c["self"], out), r.operand(c["other"], out)], out)]


@handles(aten.div.Tensor, aten.div.Scalar)
def div(r: "Recorder", c: Call) -> list[str | None]:
    out = c.outs[0]
    return [r.op("div", [r.operand(c["self"], out), r.operand(c["other"], out)], out)]
