"""The nodes of a recording, in recording order, and how they get their ids."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import torch

from .spill import Stored

# A node's value: a tensor while its op is being recorded, then stored in a
# spill file (`Stored`); scalars are Python numbers, written inline.
Value = torch.Tensor | Stored | float


@dataclass
class Node:
    """One Ebb node as it will be written."""

    id: str
    op: str
    inputs: list[str]
    value: Value
    dtype: str
    group: str = ""
    site: str | None = None
    attrs: dict[str, Any] = field(default_factory=dict)
    # One entry per input edge for custom ops: {"jacobian": ndarray} or {"diag": ndarray}.
    partials: list[dict[str, Any]] | None = None
    reported: Stored | float | None = None
    # A node split out of a fused op has no tensor of its own in PyTorch;
    # when its gradient equals another node's (the addmm product's is the
    # addmm output's), that node's reported gradient is reported for it too.
    reported_from: str | None = None
    index: int = -1  # position in recording order

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(self.value.shape) if isinstance(self.value, (torch.Tensor, Stored)) else ()

    @property
    def numel(self) -> int:
        n = 1
        for s in self.shape:
            n *= s
        return n


class Graph:
    """Nodes in recording order with unique, readable ids.

    An id is the node's group and op (``encoder/layers.0/matmul``); a second
    node of the same op in the same group gets ``#2``, and so on.
    """

    def __init__(self) -> None:
        self.nodes: list[Node] = []
        self.by_id: dict[str, Node] = {}
        self._taken: dict[str, int] = {}

    def fresh_id(self, base: str) -> str:
        """An unused id built from `base`."""
        count = self._taken.get(base, 0)
        while True:
            count += 1
            candidate = base if count == 1 else f"{base}#{count}"
            if candidate not in self.by_id:
                self._taken[base] = count
                return candidate

    def add(self, node: Node) -> Node:
        if node.id in self.by_id:
            raise AssertionError(f"duplicate node id {node.id!r}")
        node.index = len(self.nodes)
        self.nodes.append(node)
        self.by_id[node.id] = node
        return node

    def __len__(self) -> int:
        return len(self.nodes)
