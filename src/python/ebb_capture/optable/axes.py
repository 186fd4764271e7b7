"""Picking and joining along one axis: select, slice, split, unbind, cat
and stack.

Ebb's catalog does not have slice, select or concat yet. Until it does, a
pick along an axis is a matmul of that axis with a constant 0/1 matrix
(column j holds a single 1 in the row of the element picked), and a join
adds each input's product with a matrix that places it. Products with 0
and 1 and sums with zeros are exact in every dtype, so the values are the
ones PyTorch computed; the derivative is the transposed placement, also
exact. (A non-finite element would turn the zeros it meets into NaN, which
PyTorch's own pick would not: another reason to prefer the catalog ops
once they exist.)
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Sequence

import torch

from . import Call, Unmapped, handles

if TYPE_CHECKING:
    from ..recorder import Recorder

aten = torch.ops.aten


def _to_last(r: "Recorder", x: torch.Tensor | str, value: torch.Tensor, axis: int) -> tuple[torch.Tensor | str, torch.Tensor, list[int] | None]:
    """`x` with `axis` moved last (and at least two axes); the permutation
    that moves it back, or None when nothing moved."""
    if value.dim() == 1:
        lifted = r.compute(lambda: value.reshape(1, -1))
        return r.op("reshape", [x], lifted, shape=[1, value.shape[0]]), lifted, None
    rank = value.dim()
    if axis == rank - 1:
        return x, value, None
    perm = [d for d in range(rank) if d != axis] + [axis]
    moved = r.compute(lambda: value.permute(perm))
    back = [0] * rank
    for i, d in enumerate(perm):
        back[d] = i
    return r.op("transpose", [x], moved, perm=perm), moved, back


def _from_last(r: "Recorder", node: str, value: torch.Tensor, back: list[int] | None, out: torch.Tensor) -> str:
    if back is None:
        if tuple(value.shape) != tuple(out.shape):
            return r.op("reshape", [node], out, shape=list(out.shape))
        r.set_value(node, out)
        return node
    return r.op("transpose", [node], out, perm=back)


def pick_along(r: "Recorder", x: torch.Tensor, axis: int, index: Sequence[int], out: torch.Tensor) -> str:
    """`out` = `x` at positions `index` along `axis` (out keeps the axis,
    or drops it when `out` has one axis fewer, as select does)."""
    axis %= x.dim()
    n = x.shape[axis]
    if list(index) == list(range(n)):
        if tuple(x.shape) == tuple(out.shape):
            return r.same(x, out)
        return r.op("reshape", [x], out, shape=list(out.shape))
    matrix = torch.zeros(n, len(index), dtype=x.dtype)
    matrix[torch.as_tensor(list(index), dtype=torch.int64), torch.arange(len(index))] = 1
    node, moved, back = _to_last(r, x, x, axis)
    product = r.compute(lambda: moved @ matrix)
    picked = r.op("matmul", [node, r.const(matrix, "pick")], product)
    if back is None:
        return _from_last(r, picked, product, None, out)
    kept = list(x.shape)
    kept[axis] = len(index)
    restored = r.compute(lambda: product.permute(back))
    node = r.op("transpose", [picked], restored, perm=back)
    if tuple(restored.shape) != tuple(out.shape):
        return r.op("reshape", [node], out, shape=list(out.shape))
    r.set_value(node, out)
    return node


@handles(aten.select.int)
def select(r: "Recorder", c: Call) -> list[str | None]:
    x = c["self"]
    axis = c["dim"] % x.dim()
    return [pick_along(r, x, axis, [c["index"] % x.shape[axis]], c.outs[0])]


def _slice_positions(n: int, start: int | None, end: int | None, step: int) -> list[int]:
    return list(range(n))[slice(start, end, step)]


@handles(aten.slice.Tensor)
def slice_(r: "Recorder", c: Call) -> list[str | None]:
    x = c["self"]
    axis = c["dim"] % x.dim()
    return [pick_along(r, x, axis, _slice_positions(x.shape[axis], c["start"], c["end"], c["step"]), c.outs[0])]


@handles(aten.narrow.default)
def narrow(r: "Recorder", c: Call) -> list[str | None]:
    x = c["self"]
    axis = c["dim"] % x.dim()
    start = c["start"] % x.shape[axis] if c["start"] < 0 else c["start"]
    return [pick_along(r, x, axis, list(range(start, start + c["length"])), c.outs[0])]


def _pieces(r: "Recorder", c: Call, axis: int, keep_axis: bool) -> list[str | None]:
    """Consecutive pieces along `axis`, one per output."""
    x = c["self"]
    nodes: list[str | None] = []
    at = 0
    for out in c.outs:
        length = out.shape[axis] if keep_axis else 1
        nodes.append(pick_along(r, x, axis, list(range(at, at + length)), out))
        at += length
    if at != x.shape[axis]:
        raise Unmapped("pieces that do not tile the axis")
    return nodes


@handles(aten.split.Tensor, aten.split_with_sizes.default, aten.unsafe_split.Tensor, aten.unsafe_split_with_sizes.default, aten.chunk.default, aten.unsafe_chunk.default, aten.tensor_split.sections, aten.tensor_split.indices)
def split(r: "Recorder", c: Call) -> list[str | None]:
    x = c["self"]
    return _pieces(r, c, c["dim"] % x.dim(), keep_axis=True)


@handles(aten.unbind.int)
def unbind(r: "Recorder", c: Call) -> list[str | None]:
    x = c["self"]
    return _pieces(r, c, c["dim"] % x.dim(), keep_axis=False)


def join(r: "Recorder", parts: Sequence[torch.Tensor | str], values: Sequence[torch.Tensor], axis: int, out: torch.Tensor) -> str:
    """`out` = the parts side by side along `axis` (every part has it)."""
    width = out.shape[axis]
    total: str | None = None
    total_value: torch.Tensor | None = None
    back: list[int] | None = None
    at = 0
    for part, value in zip(parts, values):
        n = value.shape[axis]
        if n == 0:
            continue
        matrix = torch.zeros(n, width, dtype=out.dtype)
        matrix[torch.arange(n), torch.arange(at, at + n)] = 1
        at += n
        node, moved, back = _to_last(r, part, value, axis)
        product = r.compute(lambda: moved.to(out.dtype) @ matrix)
        placed = r.op("matmul", [node, r.const(matrix, "place")], product)
        if total is None:
            total, total_value = placed, product
        else:
            assert total_value is not None
            total_value = r.compute(lambda: total_value + product)
            total = r.op("add", [total, placed], total_value)
    if total is None or total_value is None:
        raise Unmapped("nothing to join")
    return _from_last(r, total, total_value, back, out)


@handles(aten.cat.default)
def cat(r: "Recorder", c: Call) -> list[str | None]:
    out = c.outs[0]
    tensors = [t for t in c["tensors"] if not (t.dim() == 1 and t.numel() == 0)]
    if any(t.dtype != out.dtype for t in tensors):
        raise Unmapped("a join across dtypes")
    axis = c["dim"] % out.dim()
    return [join(r, tensors, tensors, axis, out)]


@handles(aten.stack.default)
def stack(r: "Recorder", c: Call) -> list[str | None]:
    out = c.outs[0]
    tensors = list(c["tensors"])
    if any(t.dtype != out.dtype for t in tensors):
        raise Unmapped("a stack across dtypes")
    axis = c["dim"] % out.dim()
    parts: list[str] = []
    values: list[torch.Tensor] = []
    for t in tensors:
        lifted = r.compute(lambda t=t: t.unsqueeze(axis))
        parts.append(r.op("reshape", [t], lifted, shape=list(lifted.shape)))
        values.append(lifted)
    return [join(r, parts, values, axis, out)]


@handles(aten.constant_pad_nd.default)
def constant_pad(r: "Recorder", c: Call) -> list[str | None]:
    """Constant padding, one axis at a time from the last: a matmul with a
    0/1 matrix placing the axis in the middle of a longer one, plus a
    constant holding the padding value around it (an add, so a −∞ padding
    value meets no multiplication)."""
    x, out = c["self"], c.outs[0]
    pads = list(c["pad"])
    value = float(c["value"])
    node: torch.Tensor | str = x
    current = x
    for k in range(len(pads) // 2):
        axis = x.dim() - 1 - k
        before, after = pads[2 * k], pads[2 * k + 1]
        if before == 0 and after == 0:
            continue
        if before < 0 or after < 0:
            raise Unmapped("cropping")
        n = current.shape[axis]
        width = n + before + after
        matrix = torch.zeros(n, width, dtype=x.dtype)
        matrix[torch.arange(n), torch.arange(before, before + n)] = 1
        moved_node, moved, back = _to_last(r, node, current, axis)
        product = r.compute(lambda: moved @ matrix)
        placed = r.op("matmul", [moved_node, r.const(matrix, "place")], product)
        border = torch.full((width,), value, dtype=x.dtype)
        border[before : before + n] = 0
        padded_value = r.compute(lambda: product + border)
        padded = r.op("add", [placed, r.const(border, "padding")], padded_value)
        if back is None:
            current = padded_value.reshape([*current.shape[:axis], width, *current.shape[axis + 1 :]])
            node = padded if tuple(padded_value.shape) == tuple(current.shape) else r.op("reshape", [padded], current, shape=list(current.shape))
        else:
            current = r.compute(lambda: padded_value.permute(back))
            node = r.op("transpose", [padded], current, perm=back)
    if isinstance(node, torch.Tensor):
        return [r.same(x, out)]
    r.set_value(node, out)
    return [node]
