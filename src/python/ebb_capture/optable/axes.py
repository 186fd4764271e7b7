"""Picking and joining along one axis: select, slice, split, unbind, cat,
stack and constant padding."""

from __future__ import annotations

from typing import TYPE_CHECKING

import torch

from . import Call, Unmapped, handles

if TYPE_CHECKING:
    from ..recorder import Recorder

aten = torch.ops.aten


def _slice(r: "Recorder", x: torch.Tensor, axis: int, start: int, end: int, out: torch.Tensor) -> str:
    """`x[start:end]` along `axis` (the whole axis is `x` itself)."""
    if start == 0 and end == x.shape[axis] and tuple(x.shape) == tuple(out.shape):
        return r.same(x, out)
    return r.op("slice", [x], out, axis=axis, start=start, end=end, step=1)


@handles(aten.select.int)
def select(r: "Recorder", c: Call) -> list[str | None]:
    x = c["self"]
    axis = c["dim"] % x.dim()
    return [r.op("select", [x], c.outs[0], axis=axis, index=c["index"] % x.shape[axis])]


@handles(aten.slice.Tensor)
def slice_(r: "Recorder", c: Call) -> list[str | None]:
    x, out = c["self"], c.outs[0]
    axis = c["dim"] % x.dim()
    # Python's slice rules, as the catalog's slice takes them: clip the
    # bounds PyTorch allows to run past the axis (INT64_MAX for "to the end").
    n = x.shape[axis]
    start, end, step = c["start"], c["end"], c["step"]
    start = None if start is None else max(min(start, n), -n - 1)
    end = None if end is None else max(min(end, n), -n - 1)
    if (start in (None, 0) and end in (None, n) and step == 1) and tuple(x.shape) == tuple(out.shape):
        return [r.same(x, out)]
    attrs = {"axis": axis, "step": step}
    if start is not None:
        attrs["start"] = start
    if end is not None:
        attrs["end"] = end
    return [r.op("slice", [x], out, **attrs)]


@handles(aten.narrow.default)
def narrow(r: "Recorder", c: Call) -> list[str | None]:
    x = c["self"]
    axis = c["dim"] % x.dim()
    start = c["start"] % x.shape[axis] if c["start"] < 0 else c["start"]
    return [_slice(r, x, axis, start, start + c["length"], c.outs[0])]


def _pieces(r: "Recorder", c: Call, axis: int, keep_axis: bool) -> list[str | None]:
    """Consecutive pieces along `axis`, one per output (slices, or selects
    when the axis is dropped)."""
    x = c["self"]
    nodes: list[str | None] = []
    at = 0
    for out in c.outs:
        if keep_axis:
            length = out.shape[axis]
            nodes.append(_slice(r, x, axis, at, at + length, out))
        else:
            length = 1
            nodes.append(r.op("select", [x], out, axis=axis, index=at))
        at += length
    if at != x.shape[axis]:
        raise Unmapped("pieces that do not tile the axis")
    return nodes


@handles(
    aten.split.Tensor,
    aten.split_with_sizes.default,
    aten.unsafe_split.Tensor,
    aten.unsafe_split_with_sizes.default,
    aten.chunk.default,
    aten.unsafe_chunk.default,
    aten.tensor_split.sections,
    aten.tensor_split.indices,
)
def split(r: "Recorder", c: Call) -> list[str | None]:
    x = c["self"]
    return _pieces(r, c, c["dim"] % x.dim(), keep_axis=True)


@handles(aten.unbind.int)
def unbind(r: "Recorder", c: Call) -> list[str | None]:
    x = c["self"]
    return _pieces(r, c, c["dim"] % x.dim(), keep_axis=False)


@handles(aten.cat.default)
def cat(r: "Recorder", c: Call) -> list[str | None]:
    out = c.outs[0]
    # torch.cat skips 1-d empty tensors whatever the axis (legacy behaviour).
    tensors = [t for t in c["tensors"] if not (t.dim() == 1 and t.numel() == 0)]
    if any(t.dtype != out.dtype for t in tensors):
        raise Unmapped("a join across dtypes")
    if len(tensors) == 1:
        return [r.same(tensors[0], out)]
    return [r.op("concat", tensors, out, axis=c["dim"] % out.dim())]


@handles(aten.stack.default)
def stack(r: "Recorder", c: Call) -> list[str | None]:
    out = c.outs[0]
    tensors = list(c["tensors"])
    if any(t.dtype != out.dtype for t in tensors):
        raise Unmapped("a stack across dtypes")
    return [r.op("stack", tensors, out, axis=c["dim"] % out.dim())]


@handles(aten.constant_pad_nd.default)
def constant_pad(r: "Recorder", c: Call) -> list[str | None]:
    """PyTorch lists (before, after) pairs from the last axis backwards; the
    catalog's `pads` (ONNX's order) every axis's start, then every axis's end."""
    x, out = c["self"], c.outs[0]
    pairs = list(c["pad"])
    rank = x.dim()
    starts, ends = [0] * rank, [0] * rank
    for k in range(len(pairs) // 2):
        axis = rank - 1 - k
        starts[axis], ends[axis] = pairs[2 * k], pairs[2 * k + 1]
    if not any(starts) and not any(ends):
        return [r.same(x, out)]
    return [r.op("pad", [x], out, pads=starts + ends, value=float(c["value"]))]
