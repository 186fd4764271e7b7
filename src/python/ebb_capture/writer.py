"""Writing a trace: the JSON header and its safetensors sidecar, both through
temporary files in the target directory and renamed into place, so a failed
or interrupted write never leaves a half-written trace."""

from __future__ import annotations

import json
import math
import os
import struct
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, BinaryIO

import numpy as np
import torch

from .dtypes import SAFETENSORS_NAME
from .graph import Node

FORMAT_VERSION = 2


@dataclass
class Header:
    """The trace's header fields."""

    title: str
    description: str
    dtype: str
    output: str
    seed: torch.Tensor | float | None = None
    accumulate: str | None = None
    extra: dict[str, Any] = field(default_factory=dict)


def number(x: float) -> float | str:
    """A JSON number, or Ebb's spelling of a non-finite one."""
    if math.isnan(x):
        return "NaN"
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    return x


def _numbers(a: np.ndarray) -> list[Any]:
    flat = a.astype(np.float64).reshape(-1)
    if np.isfinite(flat).all():
        return flat.tolist()
    return [number(x) for x in flat.tolist()]


class Sidecar:
    """Tensors collected for the safetensors file, written in one pass."""

    def __init__(self) -> None:
        self.entries: list[tuple[str, torch.Tensor]] = []
        self._names: set[str] = set()

    def add(self, name: str, t: torch.Tensor) -> dict[str, Any]:
        if name in self._names:
            raise AssertionError(f"duplicate sidecar entry {name!r}")
        if t.dtype not in SAFETENSORS_NAME:
            raise ValueError(f"cannot store {t.dtype} in a trace sidecar")
        self._names.add(name)
        self.entries.append((name, t))
        return {"tensor": name, "shape": list(t.shape)}

    def write(self, out: BinaryIO) -> None:
        """safetensors layout: an 8-byte little-endian header length, a JSON
        header padded with spaces to a multiple of 8, then the tensors'
        bytes back to back. Wider elements come first so that every tensor
        starts at a multiple of its element size."""
        order = sorted(self.entries, key=lambda e: -e[1].element_size())
        header: dict[str, Any] = {}
        offset = 0
        for name, t in order:
            size = t.numel() * t.element_size()
            header[name] = {
                "dtype": SAFETENSORS_NAME[t.dtype],
                "shape": list(t.shape),
                "data_offsets": [offset, offset + size],
            }
            offset += size
        text = json.dumps(header, separators=(",", ":")).encode()
        text += b" " * (-len(text) % 8)
        out.write(struct.pack("<Q", len(text)))
        out.write(text)
        for _, t in order:
            out.write(_bytes(t))


def _bytes(t: torch.Tensor) -> memoryview:
    t = t.detach().to("cpu").contiguous()
    if t.dtype == torch.bfloat16:
        t = t.view(torch.int16)
    array = t.numpy()
    if array.dtype.byteorder == ">":
        array = array.byteswap()
    return memoryview(np.ascontiguousarray(array)).cast("B")


def value_json(value: torch.Tensor | float, name: str, sidecar: Sidecar | None) -> Any:
    """A node value: inline for scalars, a sidecar entry for tensors."""
    if not isinstance(value, torch.Tensor):
        return number(float(value))
    if value.dim() == 0:
        return number(float(value.item()))
    if sidecar is None:
        return {"shape": list(value.shape), "data": _numbers(value.detach().to(torch.float64).numpy())}
    return sidecar.add(name, value)


def node_json(node: Node, default_dtype: str, sidecar: Sidecar | None) -> dict[str, Any]:
    out: dict[str, Any] = {"id": node.id, "op": node.op}
    if node.inputs:
        out["inputs"] = node.inputs
    if node.dtype != default_dtype:
        out["dtype"] = node.dtype
    if node.group:
        out["group"] = node.group
    if node.site:
        out["site"] = node.site
    out["value"] = value_json(node.value, node.id, sidecar)
    if node.attrs:
        out["attrs"] = node.attrs
    if node.partials:
        out["partials"] = [_partial_json(p) for p in node.partials]
    if node.reported is not None:
        out["reported"] = value_json(node.reported, f"grad/{node.id}", sidecar)
    return out


def _partial_json(partial: dict[str, Any]) -> dict[str, Any]:
    (kind, matrix), = partial.items()
    array = matrix.detach().to(torch.float64).numpy() if isinstance(matrix, torch.Tensor) else np.asarray(matrix)
    if kind == "diag":
        return {"diag": _numbers(array)}
    return {"jacobian": [_numbers(row) for row in array]}


def write_trace(path: str | os.PathLike[str], header: Header, nodes: list[Node], sidecar: bool = True) -> None:
    """Writes `nodes` as a trace at `path` (and, with `sidecar`, a
    safetensors file beside it named after it). Existing files are replaced
    only once both new ones are complete."""
    path = Path(path)
    side = Sidecar() if sidecar else None
    side_name = path.with_suffix(".safetensors").name if path.suffix else path.name + ".safetensors"
    if side_name == path.name:
        side_name = path.name + ".safetensors"
    doc: dict[str, Any] = {"format": FORMAT_VERSION, "title": header.title}
    if header.description:
        doc["description"] = header.description
    doc["dtype"] = header.dtype
    if header.accumulate:
        doc["accumulate"] = header.accumulate
    body = [node_json(n, header.dtype, side) for n in nodes]
    if side is not None and side.entries:
        doc["sidecar"] = side_name
    doc["output"] = header.output
    if header.seed is not None:
        doc["seed"] = value_json(header.seed, f"seed/{header.output}", side)
    doc.update(header.extra)
    lines = ["{"]
    for key, value in doc.items():
        lines.append(f"  {json.dumps(key)}: {json.dumps(value, allow_nan=False)},")
    lines.append('  "nodes": [')
    for i, node in enumerate(body):
        comma = "," if i + 1 < len(body) else ""
        lines.append(f"    {json.dumps(node, allow_nan=False)}{comma}")
    lines.append("  ]")
    lines.append("}")
    text = "\n".join(lines) + "\n"

    directory = path.parent if str(path.parent) else Path(".")
    directory.mkdir(parents=True, exist_ok=True)
    temporaries: list[str] = []
    try:
        side_tmp = None
        if side is not None and side.entries:
            fd, side_tmp = tempfile.mkstemp(prefix=f".{side_name}.", suffix=".tmp", dir=directory)
            temporaries.append(side_tmp)
            with os.fdopen(fd, "wb") as f:
                side.write(f)
        fd, head_tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=directory)
        temporaries.append(head_tmp)
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(text)
        for tmp in temporaries:
            os.chmod(tmp, 0o644)
        if side_tmp is not None:
            os.replace(side_tmp, directory / side_name)
        os.replace(head_tmp, path)
        temporaries = []
    finally:
        for tmp in temporaries:
            try:
                os.unlink(tmp)
            except FileNotFoundError:
                pass
