"""Reductions and softmax: Ebb reduces over one axis (or everything) per
node, so a reduction over several axes becomes a chain of nodes."""

from __future__ import annotations

from typing import TYPE_CHECKING, Callable

import torch

from . import Call, Unmapped, handles

if TYPE_CHECKING:
    from ..recorder import Recorder

aten = torch.ops.aten


def _axes(dims: object, rank: int) -> list[int] | None:
    """Normalised axes, highest first (so removing one leaves the others'
    numbers valid); None for all elements."""
    if dims is None:
        return None
    if isinstance(dims, int):
        dims = [dims]
    axes = sorted({d % rank for d in dims}, reverse=True) if rank else []  # type: ignore[union-attr]
    return axes or None


def _chain(
    r: "Recorder",
    op: str,
    x: torch.Tensor,
    axes: list[int],
    keepdim: bool,
    out: torch.Tensor,
    reduce: Callable[[torch.Tensor, int], torch.Tensor],
    start: str | None = None,
) -> str:
    """Reduces `x` (held by node `start`, or bound to a node) over `axes`
    (highest first), one node per axis; the last node's value is `out`."""
    node: torch.Tensor | str = x if start is None else start
    value = x
    for i, axis in enumerate(axes):
        last = i == len(axes) - 1
        value = out if last else r.compute(lambda v=value, a=axis: reduce(v, a))
        node = r.op(op, [node], value, axis=axis, keepdims=keepdim)
    return node  # type: ignore[return-value]


def _reduction(op: str, reduce: Callable[[torch.Tensor, int, bool], torch.Tensor]) -> Callable[["Recorder", Call], list[str | None]]:
    def handler(r: "Recorder", c: Call) -> list[str | None]:
        x, out = c["self"], c.outs[0]
        if c.a.get("dtype") is not None and c.a["dtype"] != x.dtype:
            raise Unmapped("reduction into another dtype")
        axes = _axes(c.a.get("dim"), x.dim())
        keepdim = bool(c.a.get("keepdim") or False)
        if axes is None and keepdim and x.dim() > 0:
            axes = list(range(x.dim() - 1, -1, -1))
        if axes is None or len(axes) == x.dim() and not keepdim:
            if x.dim() == 0:
                return [r.same(x, out)]
            return [r.op(op, [x], out)]
        return [_chain(r, op, x, axes, keepdim, out, lambda v, a: reduce(v, a, keepdim))]

    return handler


handles(aten.sum.default, aten.sum.dim_IntList)(_reduction("sum", lambda v, a, k: v.sum(a, keepdim=k)))
handles(aten.mean.default, aten.mean.dim)(_reduction("mean", lambda v, a, k: v.mean(a, keepdim=k)))


@handles(aten.amax.default)
def amax(r: "Recorder", c: Call) -> list[str | None]:
    x, out = c["self"], c.outs[0]
    axes = _axes(c["dim"], x.dim()) or list(range(x.dim() - 1, -1, -1))
    keepdim = bool(c["keepdim"])
    if not axes:
        return [r.same(x, out)]
    return [_chain(r, "max", x, axes, keepdim, out, lambda v, a: v.amax(a, keepdim=keepdim))]


@handles(aten.max.dim)
def max_dim(r: "Recorder", c: Call) -> list[str | None]:
    x, values = c["self"], c.outs[0]
    if x.dim() == 0:
        return [r.same(x, values), None]
    return [r.op("max", [x], values, axis=c["dim"] % x.dim(), keepdims=bool(c["keepdim"])), None]


@handles(aten.max.default)
def max_all(r: "Recorder", c: Call) -> list[str | None]:
    x, out = c["self"], c.outs[0]
    if x.dim() == 0:
        return [r.same(x, out)]
    flat = r.compute(lambda: x.reshape(-1))
    node = r.op("reshape", [x], flat, shape=[x.numel()]) if x.dim() != 1 else r.node(x)
    return [r.op("max", [node], out, axis=0, keepdims=False)]


def _softmax_like(op: str) -> Callable[["Recorder", Call], list[str | None]]:
    def handler(r: "Recorder", c: Call) -> list[str | None]:
        x, out = c["self"], c.outs[0]
        if out.dtype != x.dtype:
            raise Unmapped("softmax into another dtype")
        if x.dim() == 0:
            raise Unmapped("softmax of a scalar")
        if r.functional(c.func) == aten._safe_softmax.default:
            # _safe_softmax gives 0 where a whole row is −inf (masked out);
            # softmax would give NaN there.
            if bool(torch.isneginf(x).all(dim=c["dim"]).any()):
                raise Unmapped("a fully masked row")
        return [r.op(op, [x], out, axis=c["dim"] % x.dim())]

    return handler


handles(aten._softmax.default, aten._safe_softmax.default)(_softmax_like("softmax"))
handles(aten._log_softmax.default)(_softmax_like("log_softmax"))


@handles(aten.logsumexp.default)
def logsumexp(r: "Recorder", c: Call) -> list[str | None]:
    x, out = c["self"], c.outs[0]
    axes = _axes(c["dim"], x.dim())
    if axes is None or len(axes) != 1:
        raise Unmapped("logsumexp over several axes")
    return [r.op("logsumexp", [x], out, axis=axes[0], keepdims=bool(c["keepdim"]))]


def _variance(r: "Recorder", x: torch.Tensor, dims: object, correction: float, keepdim: bool, var_out: torch.Tensor) -> tuple[str, str]:
    """Variance as mean, centre, square, sum, divide: returns the variance
    node and the keepdims mean node."""
    axes = _axes(dims, x.dim()) or list(range(x.dim() - 1, -1, -1))
    count = 1
    for a in axes:
        count *= x.shape[a]
    mean_value = r.compute(lambda: x.mean(dim=axes, keepdim=True))
    mean = _chain(r, "mean", x, axes, True, mean_value, lambda v, a: v.mean(a, keepdim=True))
    centred_value = r.compute(lambda: x - mean_value)
    centred = r.op("sub", [x, mean], centred_value)
    squares_value = r.compute(lambda: centred_value * centred_value)
    squares = r.op("mul", [centred, centred], squares_value)
    total_value = r.compute(lambda: squares_value.sum(dim=axes, keepdim=keepdim))
    total = _chain(r, "sum", squares_value, axes, keepdim, total_value, lambda v, a: v.sum(a, keepdim=keepdim), start=squares)
    variance = r.op("div", [total, max(count - correction, 0)], var_out)
    return variance, mean


def _correction(c: Call) -> float:
    if "correction" in c.a and c.a["correction"] is not None:
        return float(c.a["correction"])
    if "unbiased" in c.a and c.a["unbiased"] is not None:
        return 1.0 if c.a["unbiased"] else 0.0
    return 1.0


@handles(aten.var_mean.correction, aten.var_mean.dim, aten.var_mean.default)
def var_mean(r: "Recorder", c: Call) -> list[str | None]:
    x, var_out, mean_out = c["self"], c.outs[0], c.outs[1]
    keepdim = bool(c.a.get("keepdim") or False)
    variance, mean = _variance(r, x, c.a.get("dim"), _correction(c), keepdim, var_out)
    if tuple(mean_out.shape) != r.shape_of(mean):
        mean = r.op("reshape", [mean], mean_out, shape=list(mean_out.shape))
    else:
        r.set_value(mean, mean_out)
    return [variance, mean]


@handles(aten.var.correction, aten.var.dim, aten.var.default)
def var(r: "Recorder", c: Call) -> list[str | None]:
    x, out = c["self"], c.outs[0]
    variance, _ = _variance(r, x, c.a.get("dim"), _correction(c), bool(c.a.get("keepdim") or False), out)
    return [variance]


@handles(aten.std.correction, aten.std.dim, aten.std.default)
def std(r: "Recorder", c: Call) -> list[str | None]:
    x, out = c["self"], c.outs[0]
    var_value = r.compute(lambda: out * out)
    variance, _ = _variance(r, x, c.a.get("dim"), _correction(c), bool(c.a.get("keepdim") or False), var_value)
    return [r.op("sqrt", [variance], out)]
