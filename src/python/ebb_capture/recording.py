"""The public surface: ``record(path, model=...)`` as a context manager."""

from __future__ import annotations

import contextlib
import os
import time
from collections import Counter
from pathlib import Path
from typing import Any

import torch
from torch import nn
from torch.nn.attention import SDPBackend, sdpa_kernel

from .dtypes import ebb_dtype
from .errors import CaptureError
from .graph import Node
from .jacobians import fill_partials
from .recorder import JACOBIAN_LIMIT, Recorder
from .spill import Spill, Stored
from .writer import Header, write_trace


class Recording:
    """One step being recorded. Use it through :func:`record`."""

    def __init__(
        self,
        path: str | os.PathLike[str],
        *,
        model: nn.Module | None = None,
        module: nn.Module | None = None,
        title: str | None = None,
        description: str = "",
        gradients: str = "all",
        jacobian_limit: int = JACOBIAN_LIMIT,
        keep_unreached: bool = False,
    ) -> None:
        self.path = os.fspath(path)
        self.model = model
        self.module = module
        self.title = title
        self.description = description
        self.keep_unreached = keep_unreached
        target = Path(self.path)
        self._spill = Spill(target.parent if str(target.parent) else Path("."), target.name)
        self._recorder = Recorder(model, module, gradients, jacobian_limit, self._spill)
        self._flags = contextlib.ExitStack()
        self.nodes: list[Node] = []
        # Seconds spent storing tensors while the step ran, finishing the
        # trace (partials of custom ops, gradients attached, nodes pruned) and
        # writing its two files.
        self.seconds: dict[str, float] = {}

    def __enter__(self) -> "Recording":
        # The CPU's fused recurrent kernels (oneDNN) run a whole LSTM layer
        # as one op with no derivative formula we could record; with them
        # off, PyTorch runs the cell's own ops, which we record.
        self._flags.enter_context(_fused_kernels_off())
        # Fused attention kernels hide their softmax and dropout mask; the
        # math path runs them as ops we record.
        self._flags.enter_context(sdpa_kernel([SDPBackend.MATH]))
        try:
            self._recorder.open()
        except BaseException:
            self._flags.close()
            raise
        return self

    def output(self, t: torch.Tensor) -> torch.Tensor:
        """Names the step's output (the loss) and ends the recording of ops:
        anything after it (``backward()``, an optimizer step) is not recorded,
        but gradients that ``backward()`` computes are kept. Returns `t`."""
        self._recorder.output(t)
        return t

    def __exit__(self, exc_type: Any, exc: Any, tb: Any) -> bool:
        try:
            try:
                self._recorder.close()
            finally:
                self._flags.close()
            if exc_type is None:
                self._finish()
        finally:
            self._spill.close()
        return False  # nothing is written for a step that failed

    # ----------------------------------------------------------- finishing

    def _finish(self) -> None:
        start = time.perf_counter()
        rec = self._recorder
        for item in rec.deferred:
            fill_partials(item)
        output, seed = self._output()
        rec.seal()
        if rec.gradients != "none":
            for node in rec.graph.nodes:
                grad = rec.reported.get(node.id)
                if grad is None and node.reported_from is not None:
                    source = rec.graph.by_id[node.reported_from]
                    if source.dtype == node.dtype and source.shape == node.shape:
                        grad = rec.reported.get(node.reported_from)
                node.reported = grad
        nodes = rec.graph.nodes if self.keep_unreached else _reaching(rec.graph.nodes, output)
        dtype = _default_dtype(nodes)
        title = self.title or _default_title(self.model, self.module)
        header = Header(title=title, description=self.description, dtype=dtype, output=output, seed=seed)
        self.nodes = nodes
        written = time.perf_counter()
        write_trace(self.path, header, nodes, self._spill)
        self.seconds = {
            "store": self._spill.seconds,
            "finish": written - start,
            "write": time.perf_counter() - written,
        }

    def _output(self) -> tuple[str, torch.Tensor | float | None]:
        """The output node and its seed: the gradient that reached it when
        ``backward()`` ran inside the block, else Ebb's default."""
        rec = self._recorder
        if self.module is None:
            if rec.output_node is None:
                raise CaptureError(
                    "ebb_capture: no output was named; call rec.output(loss) inside the `with` block, before loss.backward()"
                )
            return rec.output_node, _seed(rec.reported.get(rec.output_node))
        outs = rec.scope_outputs
        if not outs:
            raise CaptureError(
                f"ebb_capture: the module given as `module` ({type(self.module).__name__}) never ran inside the block; "
                "call the model inside the `with` block"
            )
        if len(outs) == 1:
            tensor, node = outs[0]
            return node, _seed(rec.reported.get(node))
        return self._combine(outs), None

    def _combine(self, outs: list[tuple[torch.Tensor, str]]) -> str:
        """Several outputs of the scoped module (several calls, or a tuple):
        one scalar Σₖ ⟨gₖ, yₖ⟩ with each gₖ the gradient PyTorch sent into
        output yₖ (ones when none was computed), so the parameters' adjoints
        are their gradients."""
        rec = self._recorder
        rec._group = ""
        rec._site = None
        rec._frame = None
        total: str | None = None
        total_value: torch.Tensor | None = None
        for tensor, node in outs:
            value = tensor.detach()
            grad = rec.reported.get(node)
            if isinstance(grad, Stored):
                weight = self._spill.read(grad).to(value.dtype)
            elif grad is not None:
                weight = torch.full_like(value, grad)
            else:
                weight = torch.ones_like(value)
            product = rec.op("mul", [node, rec.const(weight, "output_gradient")], value * weight)
            inner = (value * weight).sum()
            term = rec.op("sum", [product], inner)
            if total is None:
                total, total_value = term, inner
            else:
                assert total_value is not None
                total_value = total_value + inner
                total = rec.op("add", [total, term], total_value)
        assert total is not None
        return total

    def __repr__(self) -> str:
        return f"Recording({self.path!r}, {len(self._recorder.graph)} nodes)"


def record(path: str | os.PathLike[str], **options: Any) -> Recording:
    """Records one step into an Ebb trace at `path` (JSON) and a safetensors
    sidecar beside it.

    >>> with ebb_capture.record("step.tape", model=model, title="epoch 3, batch 41") as rec:
    ...     loss = loss_fn(model(x), y)
    ...     rec.output(loss)
    ...     loss.backward()

    Options: ``model`` (names parameters and groups), ``module`` (record only
    that submodule; its inputs become leaves), ``title``, ``description``,
    ``gradients`` ("all", "params" or "none": which gradients PyTorch reports
    are kept), ``jacobian_limit`` (largest custom-op Jacobian, in entries),
    ``keep_unreached`` (keep nodes that do not reach the output).
    """
    return Recording(path, **options)


@contextlib.contextmanager
def _fused_kernels_off() -> Any:
    before = torch._C._get_mkldnn_enabled()
    torch._C._set_mkldnn_enabled(False)
    try:
        yield
    finally:
        torch._C._set_mkldnn_enabled(before)


def _seed(grad: Stored | float | None) -> Stored | float | None:
    """The seed: the output's gradient, unless it is Ebb's default of 1."""
    if grad is None or isinstance(grad, Stored):
        return grad
    return None if grad == 1.0 else grad


def _reaching(nodes: list[Node], output: str) -> list[Node]:
    """Nodes the output depends on, plus every parameter (a parameter the
    loss does not reach is worth seeing)."""
    by_id = {n.id: n for n in nodes}
    keep = {output}
    todo = [output]
    while todo:
        for i in by_id[todo.pop()].inputs:
            if i not in keep:
                keep.add(i)
                todo.append(i)
    return [n for n in nodes if n.id in keep or n.op == "param"]


def _default_dtype(nodes: list[Node]) -> str:
    """The header's dtype: the parameters' (an autocast step keeps f32
    weights), else the most common among the nodes."""
    for pool in ([n for n in nodes if n.op == "param"], [n for n in nodes if n.op != "const"]):
        counts = Counter(n.dtype for n in pool)
        if counts:
            best = max(counts.values())
            for preferred in ("f32", "f64", "bf16", "f16"):
                if counts.get(preferred) == best:
                    return preferred
    return "f32"


def _default_title(model: nn.Module | None, module: nn.Module | None) -> str:
    if module is not None:
        return f"one step of {type(module).__name__}"
    if model is not None:
        return f"one step of {type(model).__name__}"
    return "one recorded step"


__all__ = ["Recording", "record", "ebb_dtype"]
