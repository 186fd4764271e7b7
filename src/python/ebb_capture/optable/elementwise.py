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
    aten.tan.default: "tan",
    aten.tanh.default: "tanh",
    aten.sigmoid.default: "sigmoid",
    aten.relu.default: "relu",
    aten.square.default: "square",
    aten.reciprocal.default: "reciprocal",
    aten.rsqrt.default: "rsqrt",
    aten.log1p.default: "log1p",
    aten.expm1.default: "expm1",
    aten.erf.default: "erf",
    aten.silu.default: "silu",
}


@handles(*_UNARY)
def unary(r: "Recorder", c: Call) -> list[str | None]:
    return [r.op(_UNARY[r.functional(c.func)], [c["self"]], c.outs[0])]


@handles(aten.pow.Tensor_Scalar)
def power(r: "Recorder", c: Call) -> list[str | None]:
    exponent = c["exponent"]
    if isinstance(exponent, complex):
        raise Unmapped("complex exponent")
    return [r.op("pow", [c["self"]], c.outs[0], exponent=float(exponent))]


@handles(aten.pow.Tensor_Tensor)
def power_tensor(r: "Recorder", c: Call) -> list[str | None]:
    out = c.outs[0]
    return [r.op("powt", [c["self"], c["exponent"]], out)]


@handles(aten.pow.Scalar)
def power_of_scalar(r: "Recorder", c: Call) -> list[str | None]:
    out = c.outs[0]
    return [r.op("powt", [c["self"], c["exponent"]], out)]


@handles(aten.leaky_relu.default)
def leaky_relu(r: "Recorder", c: Call) -> list[str | None]:
    return [r.op("leaky_relu", [c["self"]], c.outs[0], slope=float(c["negative_slope"]))]


@handles(aten.threshold.default)
def threshold(r: "Recorder", c: Call) -> list[str | None]:
    if c["threshold"] != 0 or c["value"] != 0:
        raise Unmapped("threshold other than relu")
    return [r.op("relu", [c["self"]], c.outs[0])]


@handles(aten.gelu.default)
def gelu(r: "Recorder", c: Call) -> list[str | None]:
    return [r.op("gelu", [c["self"]], c.outs[0], approximate=c["approximate"])]


@handles(aten.softplus.default)
def softplus(r: "Recorder", c: Call) -> list[str | None]:
    return [r.op("softplus", [c["self"]], c.outs[0], beta=float(c["beta"]), threshold=float(c["threshold"]))]


@handles(aten.elu.default)
def elu(r: "Recorder", c: Call) -> list[str | None]:
    if c["scale"] != 1 or c["input_scale"] != 1:
        raise Unmapped("a scaled elu (selu)")
    return [r.op("elu", [c["self"]], c.outs[0], alpha=float(c["alpha"]))]


def _bounds(low: object, high: object) -> dict[str, float]:
    bounds = {}
    if low is not None:
        bounds["min"] = float(low)  # type: ignore[arg-type]
    if high is not None:
        bounds["max"] = float(high)  # type: ignore[arg-type]
    return bounds


@handles(aten.clamp.default)
def clamp(r: "Recorder", c: Call) -> list[str | None]:
    bounds = _bounds(c["min"], c["max"])
    if not bounds:
        return [r.same(c["self"], c.outs[0])]
    return [r.op("clamp", [c["self"]], c.outs[0], **bounds)]


@handles(aten.clamp_min.default)
def clamp_min(r: "Recorder", c: Call) -> list[str | None]:
    return [r.op("clamp", [c["self"]], c.outs[0], min=float(c["min"]))]


@handles(aten.clamp_max.default)
def clamp_max(r: "Recorder", c: Call) -> list[str | None]:
    return [r.op("clamp", [c["self"]], c.outs[0], max=float(c["max"]))]


@handles(aten.hardtanh.default)
def hardtanh(r: "Recorder", c: Call) -> list[str | None]:
    return [r.op("clamp", [c["self"]], c.outs[0], min=float(c["min_val"]), max=float(c["max_val"]))]


@handles(aten.maximum.default)
def maximum(r: "Recorder", c: Call) -> list[str | None]:
    return [r.op("maximum", [c["self"], c["other"]], c.outs[0])]


@handles(aten.minimum.default)
def minimum(r: "Recorder", c: Call) -> list[str | None]:
    return [r.op("minimum", [c["self"], c["other"]], c.outs[0])]


@handles(aten.where.self, aten.where.ScalarSelf, aten.where.ScalarOther, aten.where.Scalar)
def where(r: "Recorder", c: Call) -> list[str | None]:
    """a where the condition holds, b elsewhere; the condition is a node of
    0s and 1s (a constant: it carries no derivative)."""
    return [r.op("where", [c["condition"], c["self"], c["other"]], c.outs[0])]


@handles(aten.masked_fill.Scalar, aten.masked_fill.Tensor)
def masked_fill(r: "Recorder", c: Call) -> list[str | None]:
    return [r.op("where", [c["mask"], c["value"], c["self"]], c.outs[0])]


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
    return [r.op("add", [c["self"], other], out)]


@handles(aten.sub.Tensor, aten.sub.Scalar)
def sub(r: "Recorder", c: Call) -> list[str | None]:
    out = c.outs[0]
    other = _scaled(r, c["other"], c["alpha"], out)
    return [r.op("sub", [c["self"], other], out)]


@handles(aten.rsub.Tensor, aten.rsub.Scalar)
def rsub(r: "Recorder", c: Call) -> list[str | None]:
    # rsub(self, other, alpha) = other − alpha · self
    out = c.outs[0]
    scaled = _scaled(r, c["self"], c["alpha"], out)
    return [r.op("sub", [c["other"], scaled], out)]


@handles(aten.mul.Tensor, aten.mul.Scalar)
def mul(r: "Recorder", c: Call) -> list[str | None]:
    return [r.op("mul", [c["self"], c["other"]], c.outs[0])]


@handles(aten.div.Tensor, aten.div.Scalar)
def div(r: "Recorder", c: Call) -> list[str | None]:
    return [r.op("div", [c["self"], c["other"]], c.outs[0])]
