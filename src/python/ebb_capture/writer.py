"""Writing a trace: the JSON header and its safetensors sidecar (assembled
from the spill files), both through temporary files in the target
directory and renamed into place, so a failed or interrupted write never
leaves a half-written trace."""

from __future__ import annotations

import json
import math
import os
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import torch

from .graph import Node
from .spill import Spill, Stored

FORMAT_VERSION = 2


@dataclass
class Header:
    """The trace's header fields."""

    title: str
    description: str
    dtype: str
    output: str
    seed: Stored | float | None = None
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


def value_json(value: Stored | torch.Tensor | float) -> Any:
    """A node value: a number inline, or a sidecar entry."""
    if isinstance(value, Stored):
        return {"tensor": value.name, "shape": list(value.shape)}
    if isinstance(value, torch.Tensor):
        if value.dim() != 0:
            raise AssertionError("tensor values are stored before the trace is written")
        return number(float(value.item()))
    return number(float(value))


def node_json(node: Node, default_dtype: str) -> dict[str, Any]:
    out: dict[str, Any] = {"id": node.id, "op": node.op}
    if node.inputs:
        out["inputs"] = node.inputs
    if node.dtype != default_dtype:
        out["dtype"] = node.dtype
    if node.group:
        out["group"] = node.group
    if node.site:
        out["site"] = node.site
    out["value"] = value_json(node.value)
    if node.attrs:
        out["attrs"] = node.attrs
    if node.partials:
        out["partials"] = [_partial_json(p) for p in node.partials]
    if node.reported is not None:
        out["reported"] = value_json(node.reported)
    return out


def _partial_json(partial: dict[str, Any]) -> dict[str, Any]:
    (kind, matrix), = partial.items()
    array = matrix.detach().to(torch.float64).numpy() if isinstance(matrix, torch.Tensor) else np.asarray(matrix)
    if kind == "diag":
        return {"diag": _numbers(array)}
    return {"jacobian": [_numbers(row) for row in array]}


def sidecar_name(path: Path) -> str:
    """`step.tape` → `step.safetensors`."""
    name = path.with_suffix(".safetensors").name if path.suffix else path.name + ".safetensors"
    return name if name != path.name else path.name + ".safetensors"


def stored_of(nodes: list[Node], header: Header) -> list[Stored]:
    """Every sidecar entry the trace refers to."""
    entries = [v for n in nodes for v in (n.value, n.reported) if isinstance(v, Stored)]
    if isinstance(header.seed, Stored):
        entries.append(header.seed)
    return entries


def header_text(header: Header, nodes: list[Node], sidecar: str | None) -> str:
    """The trace's JSON: one header field per line, then one node per line."""
    doc: dict[str, Any] = {"format": FORMAT_VERSION, "title": header.title}
    if header.description:
        doc["description"] = header.description
    doc["dtype"] = header.dtype
    if header.accumulate:
        doc["accumulate"] = header.accumulate
    if sidecar is not None:
        doc["sidecar"] = sidecar
    doc["output"] = header.output
    if header.seed is not None:
        doc["seed"] = value_json(header.seed)
    doc.update(header.extra)
    lines = ["{"]
    for key, value in doc.items():
        lines.append(f"  {json.dumps(key)}: {json.dumps(value, allow_nan=False)},")
    lines.append('  "nodes": [')
    for i, node in enumerate(nodes):
        comma = "," if i + 1 < len(nodes) else ""
        lines.append(f"    {json.dumps(node_json(node, header.dtype), allow_nan=False)}{comma}")
    lines.append("  ]")
    lines.append("}")
    return "\n".join(lines) + "\n"


def write_trace(path: str | os.PathLike[str], header: Header, nodes: list[Node], spill: Spill) -> None:
    """Writes `nodes` as a trace at `path` and, when any value is a tensor,
    a safetensors sidecar beside it named after it. Existing files are
    replaced only once both new ones are complete."""
    path = Path(path)
    entries = stored_of(nodes, header)
    side_name = sidecar_name(path) if entries else None
    text = header_text(header, nodes, side_name)
    directory = path.parent if str(path.parent) else Path(".")
    directory.mkdir(parents=True, exist_ok=True)
    temporaries: list[str] = []
    try:
        side_tmp = None
        if side_name is not None:
            side_tmp = spill.sidecar(entries)
            temporaries.append(side_tmp)
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
