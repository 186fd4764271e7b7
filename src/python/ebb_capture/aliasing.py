"""Tensors that share memory: keeping recorded values safe from later
in-place writes (copy on write), and knowing which tensors a write changed.

PyTorch views and in-place ops share storage. A recorded node keeps its
forward value by reference; before any op writes into a storage, every
recorded value that overlaps the written elements is copied, so the trace
holds the values as they were when computed. Writes are logged per storage,
so a tensor read later can tell whether an in-place op on another view of
its memory changed it since it was bound to its node.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import torch


def storage_key(t: torch.Tensor) -> int:
    """Identifies the memory a tensor lives in (its storage's address; the
    recorder keeps every storage it tracks alive, so addresses are not
    reused while it runs)."""
    return t.untyped_storage().data_ptr()


@dataclass(frozen=True)
class Geometry:
    """Where a tensor's elements sit in its storage, in elements."""

    offset: int
    size: tuple[int, ...]
    stride: tuple[int, ...]
    itemsize: int

    @staticmethod
    def of(t: torch.Tensor) -> "Geometry":
        return Geometry(t.storage_offset(), tuple(t.shape), tuple(t.stride()), t.element_size())

    def byte_span(self) -> tuple[int, int]:
        """[first byte, one past the last byte] touched (empty for no elements)."""
        if any(s == 0 for s in self.size):
            return (0, 0)
        low = self.offset
        high = self.offset
        for n, s in zip(self.size, self.stride):
            if s >= 0:
                high += (n - 1) * s
            else:
                low += (n - 1) * s
        return (low * self.itemsize, (high + 1) * self.itemsize)

    def byte_starts(self) -> torch.Tensor:
        """The first byte of every element, in the tensor's row-major order."""
        n = 1
        for s in self.size:
            n *= s
        if n == 0:
            return torch.empty(0, dtype=torch.int64)
        end = self.offset + 1 + sum((k - 1) * abs(s) for k, s in zip(self.size, self.stride))
        base = torch.arange(end, dtype=torch.int64)
        return base.as_strided(self.size, self.stride, self.offset).reshape(-1) * self.itemsize


def overlaps(a: Geometry, b: Geometry) -> bool:
    """Whether two tensors in the same storage share any byte."""
    a0, a1 = a.byte_span()
    b0, b1 = b.byte_span()
    if a1 <= b0 or b1 <= a0:
        return False
    if a == b:
        return True
    # Interleaved views (chunks along an inner axis) can have overlapping spans
    # without sharing elements: compare the elements themselves.
    sa = a.byte_starts()
    sb = b.byte_starts()
    wa = torch.stack([sa, sa + a.itemsize], 1)
    wb = torch.stack([sb, sb + b.itemsize], 1)
    # Two byte ranges [x0, x1) and [y0, y1) meet when x0 < y1 and y0 < x1.
    order_b = torch.argsort(wb[:, 0])
    starts_b = wb[order_b, 0].contiguous()
    ends_b = wb[order_b, 1].contiguous()
    # For each range of a, the ranges of b that start before it ends.
    idx = torch.searchsorted(starts_b, wa[:, 1].contiguous(), right=False)
    # Among them, the one with the largest end (prefix maximum of ends).
    prefix_max = torch.cummax(ends_b, 0).values
    has = idx > 0
    if not bool(has.any()):
        return False
    best_end = prefix_max[(idx - 1).clamp(min=0)]
    return bool((has & (best_end > wa[:, 0])).any())


@dataclass
class Write:
    """An in-place write into a storage: the tensor written and its new node."""

    seq: int
    geometry: Geometry
    node: str | None


class AliasTracker:
    """Recorded values and reported gradients by storage, and the write log."""

    def __init__(self) -> None:
        self.seq = 0
        # storage → holder number → (the tensor held, its geometry, how to replace it)
        self._held: dict[int, dict[int, tuple[torch.Tensor, Geometry, Callable[[torch.Tensor], None]]]] = {}
        self._writes: dict[int, list[Write]] = {}
        self._next_holder = 0

    def hold(self, t: torch.Tensor, replace: Callable[[torch.Tensor], None]) -> None:
        """Registers a recorded tensor; `replace` swaps in a stand-in for it
        (a copy before its elements change, an alias before its shape does)."""
        key = storage_key(t)
        self._next_holder += 1
        self._held.setdefault(key, {})[self._next_holder] = (t, Geometry.of(t), replace)

    def before_write(self, target: torch.Tensor) -> None:
        """Copies every recorded value that a write into `target` would change."""
        holders = self._held.get(storage_key(target))
        if not holders:
            return
        geometry = Geometry.of(target)
        doomed = [h for h, (_, g, _) in holders.items() if overlaps(g, geometry)]
        for h in doomed:
            held, _, replace = holders.pop(h)
            replace(held.clone())

    def before_reshape(self, target: torch.Tensor) -> None:
        """An in-place view op (transpose_) is about to change `target`'s shape
        and strides: recorded values that are that very tensor object get an
        alias with the old shape (same memory, still held)."""
        holders = self._held.get(storage_key(target))
        if not holders:
            return
        for h in [h for h, (t, _, _) in holders.items() if t is target]:
            held, geometry, replace = holders.pop(h)
            stand_in = held.as_strided(geometry.size, geometry.stride, geometry.offset)
            replace(stand_in)
            self.hold(stand_in, replace)

    def log_write(self, target: torch.Tensor, node: str | None) -> int:
        """Records that `target` now holds `node`'s value (None: a value with
        no derivative); returns the write's number."""
        self.seq += 1
        self._writes.setdefault(storage_key(target), []).append(Write(self.seq, Geometry.of(target), node))
        return self.seq

    def writes_since(self, t: torch.Tensor, seq: int) -> list[Write]:
        """The logged writes into `t`'s storage after `seq`, oldest first."""
        log = self._writes.get(storage_key(t))
        if not log or log[-1].seq <= seq:
            return []
        return [w for w in log if w.seq > seq]
