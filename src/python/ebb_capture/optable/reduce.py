"""Reductions, softmax and gathers. Ebb's reductions take one axis (or
every element), so a reduction over several axes becomes a chain of nodes
(sum, mean, max, min, prod) or, for variance, the axes moved last and
merged into one."""

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
) -> str:
    """Reduces `x` over `axes` (highest first), one node per axis; the last
    node's value is `out`."""
    node: torch.Tensor | str = x
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
            raise Unmapped("a reduction into another dtype")
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
handles(aten.prod.default, aten.prod.dim_int)(_reduction("prod", lambda v, a, k: v.prod(a, keepdim=k)))


def _extreme(op: str, method: str) -> Callable[["Recorder", Call], list[str | None]]:
    """max/min over axes (amax, amin): a chain of single-axis nodes."""

    def handler(r: "Recorder", c: Call) -> list[str | None]:
        x, out = c["self"], c.outs[0]
        axes = _axes(c["dim"], x.dim()) or list(range(x.dim() - 1, -1, -1))
        keepdim = bool(c["keepdim"])
        if not axes:
            return [r.same(x, out)]
        return [_chain(r, op, x, axes, keepdim, out, lambda v, a: getattr(v, method)(a, keepdim=keepdim))]

    return handler


handles(aten.amax.default)(_extreme("max", "amax"))
handles(aten.amin.default)(_extreme("min", "amin"))


def _along(op: str) -> Callable[["Recorder", Call], list[str | None]]:
    """max.dim / min.dim: values along one axis; the indices carry no derivative."""

    def handler(r: "Recorder", c: Call) -> list[str | None]:
        x, values = c["self"], c.outs[0]
        if x.dim() == 0:
            return [r.same(x, values), None]
        return [r.op(op, [x], values, axis=c["dim"] % x.dim(), keepdims=bool(c["keepdim"])), None]

    return handler


handles(aten.max.dim)(_along("max"))
handles(aten.min.dim)(_along("min"))


def _overall(op: str) -> Callable[["Recorder", Call], list[str | None]]:
    """max() / min() of every element: flattened, then along its one axis."""

    def handler(r: "Recorder", c: Call) -> list[str | None]:
        x, out = c["self"], c.outs[0]
        if x.dim() == 0:
            return [r.same(x, out)]
        flat = r.compute(lambda: x.reshape(-1))
        node = r.op("reshape", [x], flat, shape=[x.numel()]) if x.dim() != 1 else r.node(x)
        return [r.op(op, [node], out, axis=0, keepdims=False)]

    return handler


handles(aten.max.default)(_overall("max"))
handles(aten.min.default)(_overall("min"))


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


@handles(aten.cumsum.default)
def cumsum(r: "Recorder", c: Call) -> list[str | None]:
    x, out = c["self"], c.outs[0]
    if out.dtype != x.dtype:
        raise Unmapped("a running sum into another dtype")
    return [r.op("cumsum", [x], out, axis=c["dim"] % max(x.dim(), 1))]


def _correction(c: Call) -> float:
    if c.a.get("correction") is not None:
        return float(c.a["correction"])
    if c.a.get("unbiased") is not None:
        return 1.0 if c.a["unbiased"] else 0.0
    return 1.0


def _spread(op: str, c: Call, r: "Recorder", out: torch.Tensor) -> str:
    """var or std over the call's axes (all of them when none are given)."""
    x = c["self"]
    axes = _axes(c.a.get("dim"), x.dim()) or list(range(x.dim()))
    return r.reduce_to(op, x, axes, out, correction=_correction(c))


@handles(aten.var.correction, aten.var.dim, aten.var.default)
def var(r: "Recorder", c: Call) -> list[str | None]:
    return [_spread("var", c, r, c.outs[0])]


@handles(aten.std.correction, aten.std.dim, aten.std.default)
def std(r: "Recorder", c: Call) -> list[str | None]:
    return [_spread("std", c, r, c.outs[0])]


@handles(aten.var_mean.correction, aten.var_mean.dim, aten.var_mean.default)
def var_mean(r: "Recorder", c: Call) -> list[str | None]:
    x = c["self"]
    axes = _axes(c.a.get("dim"), x.dim()) or list(range(x.dim()))
    return [_spread("var", c, r, c.outs[0]), r.reduce_to("mean", x, axes, c.outs[1])]


@handles(aten.gather.default)
def gather(r: "Recorder", c: Call) -> list[str | None]:
    x = c["self"]
    return [r.op("gather", [x, c["index"]], c.outs[0], axis=c["dim"] % max(x.dim(), 1))]


@handles(aten.index_select.default)
def index_select(r: "Recorder", c: Call) -> list[str | None]:
    """The same positions along one axis for every lane: a gather whose
    indices are those positions, broadcast to the output's shape."""
    x, index, out = c["self"], c["index"], c.outs[0]
    axis = c["dim"] % max(x.dim(), 1)
    if x.dim() == 0:
        return [r.same(x, out)]
    shape = [1] * x.dim()
    shape[axis] = -1
    spread = index.reshape(shape).expand(out.shape).contiguous()
    return [r.op("gather", [x, spread], out, axis=axis)]


@handles(aten.index.Tensor)
def index(r: "Recorder", c: Call) -> list[str | None]:
    """Advanced indexing, ``x[i, :, j]`` (nearest and bilinear upsampling
    index this way too): the indexed axes moved to the front and merged
    into one, the picked rows gathered along it (a gather's adjoint adds
    repeated picks), then the result reshaped and its axes put where
    PyTorch puts them."""
    x, out = c["self"], c.outs[0]
    given = list(c["indices"])
    if any(i is not None and i.dtype == torch.bool for i in given):
        raise Unmapped("boolean masks select a data-dependent number of elements")
    given += [None] * (x.dim() - len(given))
    axes = [d for d, i in enumerate(given) if i is not None]
    if not axes or x.dim() == 0:
        raise Unmapped("nothing indexed")
    rest = [d for d in range(x.dim()) if d not in axes]
    picked = torch.broadcast_tensors(*[given[d] for d in axes])
    sizes = [x.shape[d] for d in axes]
    flat = torch.zeros(picked[0].shape, dtype=torch.int64)
    for i, n in zip(picked, sizes):
        flat = flat * n + torch.remainder(i.to(torch.int64), n)
    rows = flat.numel()
    width = 1
    for d in rest:
        width *= x.shape[d]
    node: torch.Tensor | str = x
    moved = x
    if axes + rest != list(range(x.dim())):
        moved = r.compute(lambda: x.permute(axes + rest))
        node = r.op("transpose", [x], moved, perm=axes + rest)
    merged = r.compute(lambda: moved.reshape(-1, width))
    node = r.op("reshape", [node], merged, shape=[merged.shape[0], width])
    spread = flat.reshape(rows, 1).expand(rows, width).contiguous()
    gathered = r.compute(lambda: torch.gather(merged, 0, spread))
    node = r.op("gather", [node, spread], gathered, axis=0)
    # PyTorch puts the broadcast index axes where the indexed axes were when
    # those are adjacent, else first.
    batch = list(flat.shape)
    kept = [x.shape[d] for d in rest]
    adjacent = axes == list(range(axes[0], axes[-1] + 1))
    lead = axes[0] if adjacent else 0
    shaped = r.compute(lambda: gathered.reshape(batch + kept))
    if lead == 0:
        return [r.op("reshape", [node], out, shape=list(out.shape))]
    node = r.op("reshape", [node], shaped, shape=batch + kept)
    # Axes now: batch…, rest…; wanted: rest[:lead]…, batch…, rest[lead:]….
    nb = len(batch)
    perm = [nb + k for k in range(lead)] + list(range(nb)) + [nb + k for k in range(lead, len(kept))]
    return [r.op("transpose", [node], out, perm=perm)]


@handles(aten.flip.default)
def flip(r: "Recorder", c: Call) -> list[str | None]:
    """Reversal along each named axis: a gather with the reversed positions
    along that axis."""
    x, out = c["self"], c.outs[0]
    dims = sorted({d % max(x.dim(), 1) for d in c["dims"]})
    if x.dim() == 0 or not dims:
        return [r.same(x, out)]
    node: torch.Tensor | str = x
    value = x
    for k, axis in enumerate(dims):
        shape = [1] * x.dim()
        shape[axis] = -1
        reversed_positions = torch.arange(x.shape[axis] - 1, -1, -1).reshape(shape).expand(x.shape).contiguous()
        last = k == len(dims) - 1
        value = out if last else r.compute(lambda v=value, a=axis: torch.flip(v, [a]))
        node = r.op("gather", [node, reversed_positions], value, axis=axis)
    return [node]
