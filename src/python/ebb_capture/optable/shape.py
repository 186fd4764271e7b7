"""Views and copies: transposes and permutations, reshapes, broadcasts,
copies and dtype conversions."""

from __future__ import annotations

from typing import TYPE_CHECKING

import torch

from . import Call, Unmapped, handles

if TYPE_CHECKING:
    from ..recorder import Recorder

aten = torch.ops.aten


def _perm(r: "Recorder", c: Call, perm: list[int]) -> list[str | None]:
    if perm == sorted(perm):
        return [r.same(c["self"], c.outs[0])]
    return [r.op("transpose", [c["self"]], c.outs[0], perm=perm)]


@handles(aten.t.default)
def t(r: "Recorder", c: Call) -> list[str | None]:
    rank = c["self"].dim()
    return _perm(r, c, [1, 0] if rank == 2 else list(range(rank)))


@handles(aten.transpose.int)
def transpose(r: "Recorder", c: Call) -> list[str | None]:
    rank = c["self"].dim()
    perm = list(range(rank))
    if rank:
        d0, d1 = c["dim0"] % rank, c["dim1"] % rank
        perm[d0], perm[d1] = perm[d1], perm[d0]
    return _perm(r, c, perm)


@handles(aten.permute.default)
def permute(r: "Recorder", c: Call) -> list[str | None]:
    rank = c["self"].dim()
    return _perm(r, c, [d % rank for d in c["dims"]] if rank else [])


# Ops that keep the elements in row-major order and change only the shape.
_RESHAPES = [
    aten.view.default,
    aten._unsafe_view.default,
    aten.reshape.default,
    aten._reshape_alias.default,
    aten.unsqueeze.default,
    aten.squeeze.default,
    aten.squeeze.dim,
    aten.squeeze.dims,
    aten.flatten.using_ints,
    aten.unflatten.int,
    aten.view_as.default,
    aten.reshape_as.default,
]


@handles(*_RESHAPES)
def reshape(r: "Recorder", c: Call) -> list[str | None]:
    x, out = c["self"], c.outs[0]
    if tuple(x.shape) == tuple(out.shape):
        return [r.same(x, out)]
    return [r.op("reshape", [x], out, shape=list(out.shape))]


@handles(aten.expand.default, aten.expand_as.default)
def expand(r: "Recorder", c: Call) -> list[str | None]:
    x, out = c["self"], c.outs[0]
    if tuple(x.shape) == tuple(out.shape):
        return [r.same(x, out)]
    return [r.broadcast(x, out)]


@handles(aten.clone.default, aten.alias.default, aten.contiguous.default)
def copy(r: "Recorder", c: Call) -> list[str | None]:
    return [r.same(c["self"], c.outs[0])]


@handles(aten._to_copy.default, aten.to.dtype, aten.to.dtype_layout, aten.to.device, aten.to.other)
def to_copy(r: "Recorder", c: Call) -> list[str | None]:
    x, out = c["self"], c.outs[0]
    if out.dtype == x.dtype:
        return [r.same(x, out)]
    if not out.is_floating_point():
        return [None]
    return [r.cast(x, out)]


@handles(aten.copy.default)
def copy_from(r: "Recorder", c: Call) -> list[str | None]:
    # copy(self, src) (and copy_): the result is src, converted to self's
    # dtype and broadcast to self's shape.
    src, out = c["src"], c.outs[0]
    if not isinstance(src, torch.Tensor):
        raise Unmapped("copy from a non-tensor")
    node: str = r.node(src)
    if src.dtype != out.dtype:
        converted = r.compute(lambda: src.to(out.dtype))
        node = r.cast(node, converted)
    if tuple(src.shape) != tuple(out.shape):
        return [r.broadcast(node, out)]
    return [r.same(node, out)]
