"""Tensors that share memory: which tensors an in-place write changed.

PyTorch views and in-place ops share storage. Writes are logged per
storage, so a tensor read later can tell whether an in-place op on another
view of its memory changed it since it was bound to its node. (Recorded
values cannot change: each is stored as soon as its op is recorded.)
"""

from __future__ import annotations

from dataclasses import dataclass

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
    """The log of in-place writes, by storage."""

    def __init__(self) -> None:
        self.seq = 0
        self._writes: dict[int, list[Write]] = {}

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
