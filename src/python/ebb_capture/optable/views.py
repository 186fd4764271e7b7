"""Views that pick elements of their input in no simple pattern (as_strided,
diagonal): each output element is found in the input's memory, so the map
from input to output is read off the storage, never guessed. The picked
elements are recorded as a custom op whose partial is a 0/1 Jacobian."""

from __future__ import annotations

from typing import TYPE_CHECKING

import torch

from ..aliasing import Geometry
from . import Call, Unmapped, handles

if TYPE_CHECKING:
    from ..recorder import Recorder

aten = torch.ops.aten


def positions(x: torch.Tensor, out: torch.Tensor) -> torch.Tensor:
    """For each element of `out` (row-major), the row-major index of the
    element of `x` at the same memory address."""
    if x.untyped_storage().data_ptr() != out.untyped_storage().data_ptr() or x.element_size() != out.element_size():
        raise Unmapped("the output is not a view of the input")
    starts = Geometry.of(x).byte_starts()
    wanted = Geometry.of(out).byte_starts()
    order = torch.argsort(starts, stable=True)
    ordered = starts[order]
    if ordered.numel() == 0:
        raise Unmapped("an empty input")
    idx = torch.searchsorted(ordered, wanted).clamp(max=ordered.numel() - 1)
    if not bool((ordered[idx] == wanted).all()):
        raise Unmapped("the output reads memory outside the input")
    return order[idx]


def pick(r: "Recorder", x: torch.Tensor, out: torch.Tensor, name: str) -> str:
    """Node for `out`, a view holding some of `x`'s elements."""
    where = positions(x, out)
    if where.numel() == x.numel() and bool((where == torch.arange(x.numel())).all()):
        if tuple(x.shape) == tuple(out.shape):
            return r.same(x, out)
        return r.op("reshape", [x], out, shape=list(out.shape))
    return r.selection(x, out, where, name)


def _each(name: str):  # type: ignore[no-untyped-def]
    def handler(r: "Recorder", c: Call) -> list[str | None]:
        x = c["self"]
        return [pick(r, x, o, name) for o in c.outs]

    return handler


handles(aten.as_strided.default)(_each("as_strided"))
handles(aten.diagonal.default)(_each("diagonal"))
